//! Holdout metrics and the per-row losses the gate compares.
//!
//! Regression: MSE, RMSE, MAE, R²; the gate's per-row loss is the squared
//! error. Classification: log loss, accuracy, Brier score and expected
//! calibration error from a row-major probability table; the gate's per-row
//! loss is the log loss. The trivial predictors the first model must beat
//! (training mean, training class frequencies) live here too.

use super::{InputError, check_finite, check_same_len, mean};

/// Probabilities below this are raised to it before taking a log, so a
/// confident miss costs −ln(1e-15) ≈ 34.5 instead of infinity.
pub const PROB_FLOOR: f64 = 1e-15;

/// How far a probability row may sum away from 1 (softmax output in f32
/// is accurate to a few 1e-7).
pub const PROB_SUM_TOLERANCE: f64 = 1e-5;

/// Default number of equal-width confidence bins for calibration error.
pub const ECE_BINS: usize = 10;

/// Regression metrics on one set of rows.
#[derive(Debug, Clone, Copy, PartialEq)]
pub struct RegressionMetrics {
    pub rows: usize,
    pub mse: f64,
    pub rmse: f64,
    pub mae: f64,
    /// 1 − SS_res / SS_tot; `None` when every target is equal (SS_tot = 0).
    pub r2: Option<f64>,
}

fn check_pairs(targets: &[f64], predictions: &[f64]) -> Result<(), InputError> {
    check_same_len("targets and predictions", targets.len(), predictions.len())?;
    if targets.is_empty() {
        return Err(InputError::TooFew {
            what: "rows",
            need: 1,
            have: 0,
        });
    }
    check_finite("targets", targets)?;
    check_finite("predictions", predictions)
}

/// Per-row squared errors (y − ŷ)²: the gate's loss for regression.
pub fn squared_errors(targets: &[f64], predictions: &[f64]) -> Result<Vec<f64>, InputError> {
    check_pairs(targets, predictions)?;
    Ok(targets
        .iter()
        .zip(predictions)
        .map(|(y, p)| (y - p) * (y - p))
        .collect())
}

/// Per-row absolute errors |y − ŷ|.
pub fn absolute_errors(targets: &[f64], predictions: &[f64]) -> Result<Vec<f64>, InputError> {
    check_pairs(targets, predictions)?;
    Ok(targets
        .iter()
        .zip(predictions)
        .map(|(y, p)| (y - p).abs())
        .collect())
}

/// MSE, RMSE, MAE and R² of predictions against targets.
pub fn regression_metrics(
    targets: &[f64],
    predictions: &[f64],
) -> Result<RegressionMetrics, InputError> {
    let squared = squared_errors(targets, predictions)?;
    let mse = mean(&squared);
    let mae = mean(&absolute_errors(targets, predictions)?);
    let y_mean = mean(targets);
    let ss_tot: f64 = targets.iter().map(|y| (y - y_mean) * (y - y_mean)).sum();
    let ss_res: f64 = squared.iter().sum();
    let r2 = (ss_tot > 0.0).then(|| 1.0 - ss_res / ss_tot);
    Ok(RegressionMetrics {
        rows: targets.len(),
        mse,
        rmse: mse.sqrt(),
        mae,
        r2,
    })
}

/// A row-major table of class probabilities, checked on construction:
/// every value finite and in [0, 1], every row summing to 1 within
/// [`PROB_SUM_TOLERANCE`].
#[derive(Debug, Clone, Copy)]
pub struct ProbTable<'a> {
    values: &'a [f64],
    classes: usize,
}

impl<'a> ProbTable<'a> {
    pub fn new(values: &'a [f64], classes: usize) -> Result<ProbTable<'a>, InputError> {
        if classes < 2 {
            return Err(InputError::TooFew {
                what: "classes",
                need: 2,
                have: classes,
            });
        }
        if !values.len().is_multiple_of(classes) {
            return Err(InputError::BadProbabilities {
                row: values.len() / classes,
                problem: "the table length is not a multiple of the number of classes",
            });
        }
        for (row, probs) in values.chunks_exact(classes).enumerate() {
            if probs
                .iter()
                .any(|p| !p.is_finite() || !(0.0..=1.0).contains(p))
            {
                return Err(InputError::BadProbabilities {
                    row,
                    problem: "a value is outside [0, 1]",
                });
            }
            if (probs.iter().sum::<f64>() - 1.0).abs() > PROB_SUM_TOLERANCE {
                return Err(InputError::BadProbabilities {
                    row,
                    problem: "the row does not sum to 1",
                });
            }
        }
        Ok(ProbTable { values, classes })
    }

    pub fn rows(&self) -> usize {
        self.values.len() / self.classes
    }

    pub fn classes(&self) -> usize {
        self.classes
    }

    /// Probabilities of row `index`, or `None` past the last row.
    pub fn row(&self, index: usize) -> Option<&'a [f64]> {
        self.values.chunks_exact(self.classes).nth(index)
    }

    fn iter(&self) -> impl Iterator<Item = &'a [f64]> {
        self.values.chunks_exact(self.classes)
    }

    fn check_labels(&self, labels: &[usize]) -> Result<(), InputError> {
        check_same_len("probability rows and labels", self.rows(), labels.len())?;
        if labels.is_empty() {
            return Err(InputError::TooFew {
                what: "rows",
                need: 1,
                have: 0,
            });
        }
        match labels.iter().position(|&l| l >= self.classes) {
            Some(row) => Err(InputError::LabelOutOfRange {
                row,
                label: labels[row],
                classes: self.classes,
            }),
            None => Ok(()),
        }
    }
}

/// Index of the largest probability; the first one on ties (0 for an
/// empty slice, which a checked [`ProbTable`] never yields).
pub fn predicted_class(probs: &[f64]) -> usize {
    let mut best = 0;
    for (k, p) in probs.iter().enumerate().skip(1) {
        if *p > probs[best] {
            best = k;
        }
    }
    best
}

/// Per-row log loss −ln max(p_label, [`PROB_FLOOR`]): the gate's loss for
/// classification.
pub fn log_losses(probs: &ProbTable<'_>, labels: &[usize]) -> Result<Vec<f64>, InputError> {
    probs.check_labels(labels)?;
    Ok(probs
        .iter()
        .zip(labels)
        .map(|(row, &l)| -row[l].max(PROB_FLOOR).ln())
        .collect())
}

/// Per-row correctness of the arg-max prediction (for McNemar's test).
pub fn correct(probs: &ProbTable<'_>, labels: &[usize]) -> Result<Vec<bool>, InputError> {
    probs.check_labels(labels)?;
    Ok(probs
        .iter()
        .zip(labels)
        .map(|(row, &l)| predicted_class(row) == l)
        .collect())
}

/// Classification metrics on one set of rows.
#[derive(Debug, Clone, Copy, PartialEq)]
pub struct ClassMetrics {
    pub rows: usize,
    pub classes: usize,
    pub log_loss: f64,
    pub accuracy: f64,
    /// Mean over rows of Σ_k (p_k − [label = k])²: the multi-class form, in
    /// [0, 2]. With two classes it is twice [`brier_binary`].
    pub brier: f64,
    /// Expected calibration error with [`ECE_BINS`] equal-width bins.
    pub ece: f64,
}

/// Log loss, accuracy, Brier score and calibration error.
pub fn class_metrics(probs: &ProbTable<'_>, labels: &[usize]) -> Result<ClassMetrics, InputError> {
    let log_loss = mean(&log_losses(probs, labels)?);
    let right = correct(probs, labels)?;
    let accuracy = right.iter().filter(|r| **r).count() as f64 / right.len() as f64;
    let brier = mean(
        &probs
            .iter()
            .zip(labels)
            .map(|(row, &l)| {
                row.iter()
                    .enumerate()
                    .map(|(k, p)| {
                        let e = p - if k == l { 1.0 } else { 0.0 };
                        e * e
                    })
                    .sum::<f64>()
            })
            .collect::<Vec<f64>>(),
    );
    let ece = expected_calibration_error(probs, labels, ECE_BINS)?;
    Ok(ClassMetrics {
        rows: labels.len(),
        classes: probs.classes(),
        log_loss,
        accuracy,
        brier,
        ece,
    })
}

/// Brier score of a binary classifier: mean (p − y)² with p the predicted
/// probability of the positive class. In [0, 1].
pub fn brier_binary(labels: &[bool], p_positive: &[f64]) -> Result<f64, InputError> {
    check_same_len("labels and probabilities", labels.len(), p_positive.len())?;
    if labels.is_empty() {
        return Err(InputError::TooFew {
            what: "rows",
            need: 1,
            have: 0,
        });
    }
    if let Some(row) = p_positive
        .iter()
        .position(|p| !p.is_finite() || !(0.0..=1.0).contains(p))
    {
        return Err(InputError::BadProbabilities {
            row,
            problem: "a value is outside [0, 1]",
        });
    }
    let squared: Vec<f64> = labels
        .iter()
        .zip(p_positive)
        .map(|(&y, p)| {
            let e = p - if y { 1.0 } else { 0.0 };
            e * e
        })
        .collect();
    Ok(mean(&squared))
}

/// Expected calibration error on the top-class probability.
///
/// Binning: `bins` equal-width bins on [0, 1]; a confidence c goes to bin
/// floor(c · bins), with c = 1 in the last bin, so bin i holds
/// [i/bins, (i+1)/bins). ECE = Σ_bins (rows in bin / rows) · |accuracy in
/// bin − mean confidence in bin|; empty bins contribute nothing.
pub fn expected_calibration_error(
    probs: &ProbTable<'_>,
    labels: &[usize],
    bins: usize,
) -> Result<f64, InputError> {
    probs.check_labels(labels)?;
    if bins == 0 {
        return Err(InputError::TooFew {
            what: "calibration bins",
            need: 1,
            have: 0,
        });
    }
    let mut count = vec![0usize; bins];
    let mut confidence = vec![0.0; bins];
    let mut hits = vec![0.0; bins];
    for (row, &label) in probs.iter().zip(labels) {
        let k = predicted_class(row);
        let c = row[k];
        let bin = ((c * bins as f64).floor() as usize).min(bins - 1);
        count[bin] += 1;
        confidence[bin] += c;
        if k == label {
            hits[bin] += 1.0;
        }
    }
    let total = labels.len() as f64;
    Ok((0..bins)
        .filter(|&b| count[b] > 0)
        .map(|b| {
            let m = count[b] as f64;
            (m / total) * (hits[b] / m - confidence[b] / m).abs()
        })
        .sum())
}

/// Per-row squared errors of the trivial regression predictor: the mean of
/// the training targets, scored on the holdout targets.
pub fn mean_predictor_losses(
    training_targets: &[f64],
    holdout_targets: &[f64],
) -> Result<Vec<f64>, InputError> {
    if training_targets.is_empty() {
        return Err(InputError::TooFew {
            what: "training rows",
            need: 1,
            have: 0,
        });
    }
    check_finite("training targets", training_targets)?;
    let prediction = vec![mean(training_targets); holdout_targets.len()];
    squared_errors(holdout_targets, &prediction)
}

/// Per-row log losses of the trivial classifier: the training class
/// frequencies with one pseudo-count per class (so an unseen class costs a
/// finite amount; common practice, no source). Its arg max is the majority
/// class.
pub fn prior_predictor_losses(
    training_labels: &[usize],
    classes: usize,
    holdout_labels: &[usize],
) -> Result<Vec<f64>, InputError> {
    if classes < 2 {
        return Err(InputError::TooFew {
            what: "classes",
            need: 2,
            have: classes,
        });
    }
    let mut counts = vec![1.0; classes];
    for (row, &l) in training_labels.iter().enumerate() {
        if l >= classes {
            return Err(InputError::LabelOutOfRange {
                row,
                label: l,
                classes,
            });
        }
        counts[l] += 1.0;
    }
    let total: f64 = counts.iter().sum();
    let prior: Vec<f64> = counts.iter().map(|c| c / total).collect();
    let table: Vec<f64> = holdout_labels
        .iter()
        .flat_map(|_| prior.iter().copied())
        .collect();
    log_losses(&ProbTable::new(&table, classes)?, holdout_labels)
}

#[cfg(test)]
mod tests {
    use super::*;

    use crate::gate::near;

    #[test]
    fn regression_metrics_match_scikit_learn_docs() {
        // Source: scikit-learn documentation examples (CHECKS.md):
        // y = [3, -0.5, 2, 7], ŷ = [2.5, 0, 2, 8]: MSE 0.375, RMSE 0.612372, MAE 0.5, R² 0.948608.
        let m = regression_metrics(&[3.0, -0.5, 2.0, 7.0], &[2.5, 0.0, 2.0, 8.0]).expect("valid");
        near(m.mse, 0.375, 1e-15);
        near(m.rmse, 0.612372, 5e-7);
        near(m.mae, 0.5, 1e-15);
        near(m.r2.expect("targets vary"), 0.948608, 5e-7);
        assert_eq!(m.rows, 4);
    }

    #[test]
    fn regression_metric_edges() {
        let m = regression_metrics(&[2.0, 2.0], &[1.0, 3.0]).expect("valid");
        assert_eq!(m.r2, None, "constant targets have no R²");
        assert_eq!(m.mse, 1.0);
        assert!(regression_metrics(&[], &[]).is_err());
        assert!(regression_metrics(&[1.0], &[1.0, 2.0]).is_err());
        assert!(regression_metrics(&[1.0], &[f64::INFINITY]).is_err());
        // A perfect fit: R² = 1 exactly.
        let m = regression_metrics(&[1.0, 2.0, 4.0], &[1.0, 2.0, 4.0]).expect("valid");
        assert_eq!((m.mse, m.r2), (0.0, Some(1.0)));
    }

    #[test]
    fn brier_matches_scikit_learn_docs() {
        // Source: scikit-learn documentation example (CHECKS.md): y = [0,1,1,0], p = [.1,.9,.8,.3] → 0.0375.
        let b = brier_binary(&[false, true, true, false], &[0.1, 0.9, 0.8, 0.3]).expect("valid");
        near(b, 0.0375, 1e-15);
        // The multi-class form on the same rows counts both classes: twice
        // the binary value (identity for two classes).
        let table = [0.9, 0.1, 0.1, 0.9, 0.2, 0.8, 0.7, 0.3];
        let probs = ProbTable::new(&table, 2).expect("valid");
        let m = class_metrics(&probs, &[0, 1, 1, 0]).expect("valid");
        near(m.brier, 0.075, 1e-15);
        assert_eq!(m.accuracy, 1.0);
        // log loss by hand: −(ln .9 + ln .9 + ln .8 + ln .7)/4.
        let expected = -(0.9f64.ln() * 2.0 + 0.8f64.ln() + 0.7f64.ln()) / 4.0;
        near(m.log_loss, expected, 1e-15);
    }

    #[test]
    fn calibration_error_by_hand() {
        // Three classes, four rows. Top-class confidences 0.6, 0.6, 0.95, 0.35.
        // Bins (10 wide): 0.6 and 0.6 in bin 6 (one right, one wrong:
        // accuracy 0.5 vs confidence 0.6), 0.95 in bin 9 (right: 1 vs 0.95),
        // 0.35 in bin 3 (wrong: 0 vs 0.35).
        // ECE = 2/4·0.1 + 1/4·0.05 + 1/4·0.35 = 0.15.
        let table = [
            0.6, 0.3, 0.1, //
            0.2, 0.6, 0.2, //
            0.95, 0.03, 0.02, //
            0.35, 0.33, 0.32,
        ];
        let probs = ProbTable::new(&table, 3).expect("valid");
        let ece = expected_calibration_error(&probs, &[0, 0, 0, 1], 10).expect("valid");
        near(ece, 0.15, 1e-12);
        // One bin: |overall accuracy − mean confidence| = |0.5 − 0.625|.
        let ece1 = expected_calibration_error(&probs, &[0, 0, 0, 1], 1).expect("valid");
        near(ece1, 0.125, 1e-12);
        let m = class_metrics(&probs, &[0, 0, 0, 1]).expect("valid");
        near(m.accuracy, 0.5, 0.0);
        near(m.ece, 0.15, 1e-12);
    }

    #[test]
    fn probability_table_is_validated() {
        assert!(ProbTable::new(&[0.5, 0.5, 0.2], 2).is_err());
        assert!(ProbTable::new(&[0.5, 0.6], 2).is_err());
        assert!(ProbTable::new(&[1.5, -0.5], 2).is_err());
        assert!(ProbTable::new(&[f64::NAN, 1.0], 2).is_err());
        assert!(ProbTable::new(&[1.0], 1).is_err());
        let probs = ProbTable::new(&[0.0, 1.0], 2).expect("valid");
        assert_eq!(
            log_losses(&probs, &[2]),
            Err(InputError::LabelOutOfRange {
                row: 0,
                label: 2,
                classes: 2
            })
        );
        // A confident miss costs −ln(PROB_FLOOR), not infinity.
        let losses = log_losses(&probs, &[0]).expect("valid");
        near(losses[0], -PROB_FLOOR.ln(), 1e-12);
        assert_eq!(probs.row(0), Some(&[0.0, 1.0][..]));
        assert_eq!(probs.row(1), None);
        assert_eq!(predicted_class(&[]), 0);
        assert_eq!(predicted_class(&[0.4, 0.4, 0.2]), 0, "first on ties");
    }

    #[test]
    fn trivial_predictors() {
        // Mean of training targets is 2; holdout errors (1−2)², (4−2)².
        let losses = mean_predictor_losses(&[1.0, 2.0, 3.0], &[1.0, 4.0]).expect("valid");
        assert_eq!(losses, vec![1.0, 4.0]);
        // Training labels 0,0,0,1 with one pseudo-count per class: p = (4/6, 2/6).
        let losses = prior_predictor_losses(&[0, 0, 0, 1], 2, &[0, 1]).expect("valid");
        near(losses[0], -(4.0f64 / 6.0).ln(), 1e-15);
        near(losses[1], -(2.0f64 / 6.0).ln(), 1e-15);
        assert!(prior_predictor_losses(&[3], 2, &[0]).is_err());
    }
}
