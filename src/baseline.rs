//! Closed-form reference models every cycle scores beside the network: the
//! trivial predictor (training mean or class frequencies) and a ridge
//! regression on the network's own encoded inputs. A network that cannot
//! beat ridge on the same holdout rows is not earning its keep, and the
//! log, `models` and `status` say so.
//!
//! Pure: rows in, coefficients and per-row losses out. The normal equations
//! are accumulated in f64 over chunks of encoded rows, so memory stays at
//! one chunk plus a `(width+1)²` matrix however many rows are stored.

use crate::config::Task;
use crate::gate;
use crate::model::MAX_ROW_LOG_LOSS;
use crate::schema::{FeatureSpec, RowMatrix};

/// Rows encoded at a time while accumulating the normal equations.
const CHUNK_ROWS: usize = 4096;

/// Smallest probability a ridge classifier's clipped score is given before
/// normalising (common practice, no source).
const MIN_CLASS_SHARE: f64 = 1e-3;

#[derive(Debug, Clone, PartialEq, thiserror::Error)]
pub enum BaselineError {
    #[error("no training rows with a target to fit the baseline on")]
    NoRows,
    #[error("the ridge penalty must be finite and > 0, got {0}")]
    BadLambda(f64),
    #[error("the ridge system is not positive definite (non-finite inputs?)")]
    Singular,
    #[error("{0}")]
    Scoring(String),
}

/// A fitted ridge model: one coefficient column per output (1 for
/// regression, one per class for classification), intercept first.
#[derive(Debug, Clone, PartialEq)]
pub struct Ridge {
    spec: FeatureSpec,
    lambda: f64,
    /// `(width + 1) × outputs`, row-major; row 0 is the intercept.
    coef: Vec<f64>,
    outputs: usize,
}

impl Ridge {
    /// Fits ridge regression on the training rows of all `parts` (rows with
    /// a missing target are skipped). `lambda` penalises every slope but not
    /// the intercept; inputs are the spec's standardised numbers and one-hot
    /// categories, so one value of `lambda` suits every column. For
    /// classification each class is a 0/1 target column.
    pub fn fit(
        spec: &FeatureSpec,
        parts: &[&RowMatrix],
        lambda: f64,
    ) -> Result<Ridge, BaselineError> {
        if !(lambda.is_finite() && lambda > 0.0) {
            return Err(BaselineError::BadLambda(lambda));
        }
        let w = spec.width() + 1;
        let k = match spec.task {
            Task::Regression => 1,
            Task::Classification => spec.outputs.max(1),
        };
        let mut a = vec![0.0f64; w * w];
        let mut b = vec![0.0f64; w * k];
        let mut n = 0usize;
        let mut xrow = vec![0.0f64; w];
        for rows in parts {
            let mut start = 0;
            while start < rows.n_rows() {
                let end = (start + CHUNK_ROWS).min(rows.n_rows());
                let cells = rows.width();
                let chunk =
                    RowMatrix::from_cells(cells, rows.cells()[start * cells..end * cells].to_vec());
                let x = spec.encode_inputs(&chunk);
                let y = spec.encode_targets(&chunk);
                for (r, &t) in y.iter().enumerate() {
                    if t.is_nan() {
                        continue;
                    }
                    n += 1;
                    xrow[0] = 1.0;
                    for (dst, &v) in xrow[1..].iter_mut().zip(&x[r * (w - 1)..(r + 1) * (w - 1)]) {
                        *dst = f64::from(v);
                    }
                    // Lower triangle only; one-hot rows are mostly zeros.
                    for j in 0..w {
                        let xj = xrow[j];
                        if xj == 0.0 {
                            continue;
                        }
                        let row = &mut a[j * w..j * w + j + 1];
                        for (dst, &xl) in row.iter_mut().zip(&xrow[..=j]) {
                            *dst += xj * xl;
                        }
                        match spec.task {
                            Task::Regression => b[j] += xj * f64::from(t),
                            Task::Classification => {
                                let class = t as usize;
                                if class < k {
                                    b[j * k + class] += xj;
                                }
                            }
                        }
                    }
                }
                start = end;
            }
        }
        if n == 0 {
            return Err(BaselineError::NoRows);
        }
        for j in 0..w {
            if j > 0 {
                a[j * w + j] += lambda;
            }
            for l in 0..j {
                a[l * w + j] = a[j * w + l];
            }
        }
        let coef = solve_spd(&a, &b, w, k).ok_or(BaselineError::Singular)?;
        Ok(Ridge {
            spec: spec.clone(),
            lambda,
            coef,
            outputs: k,
        })
    }

    pub fn lambda(&self) -> f64 {
        self.lambda
    }

    /// Raw scores, `n_rows × outputs`. Rows are encoded `CHUNK_ROWS` at a
    /// time, so a large holdout is never encoded all at once.
    pub fn scores(&self, rows: &RowMatrix) -> Vec<f64> {
        let w = self.spec.width() + 1;
        let k = self.outputs;
        let cells = rows.width();
        let mut out = vec![0.0; rows.n_rows() * k];
        for (c, block) in out.chunks_mut(CHUNK_ROWS * k).enumerate() {
            let start = c * CHUNK_ROWS;
            let end = start + block.len() / k;
            let chunk =
                RowMatrix::from_cells(cells, rows.cells()[start * cells..end * cells].to_vec());
            let x = self.spec.encode_inputs(&chunk);
            for (r, o) in block.chunks_exact_mut(k).enumerate() {
                o.copy_from_slice(&self.coef[..k]);
                for (j, &v) in x[r * (w - 1)..(r + 1) * (w - 1)].iter().enumerate() {
                    if v != 0.0 {
                        let c = &self.coef[(j + 1) * k..(j + 2) * k];
                        for (dst, &cv) in o.iter_mut().zip(c) {
                            *dst += f64::from(v) * cv;
                        }
                    }
                }
            }
        }
        out
    }

    /// Per-row losses in the network's terms: squared error for regression;
    /// for classification −ln p(true class), where p are the scores clipped
    /// below at a small share and normalised, capped like the network's.
    pub fn row_losses(&self, rows: &RowMatrix) -> Result<Vec<f64>, BaselineError> {
        let targets = self.spec.encode_targets(rows);
        if let Some(row) = targets.iter().position(|t| t.is_nan()) {
            return Err(BaselineError::Scoring(format!(
                "holdout row {row} has no target"
            )));
        }
        let scores = self.scores(rows);
        let k = self.outputs;
        Ok(match self.spec.task {
            Task::Regression => scores
                .iter()
                .zip(&targets)
                .map(|(&s, &y)| (s - f64::from(y)).powi(2))
                .collect(),
            Task::Classification => scores
                .chunks_exact(k)
                .zip(&targets)
                .map(|(s, &y)| {
                    let class = y as usize;
                    if class >= k {
                        return MAX_ROW_LOG_LOSS;
                    }
                    let clipped: Vec<f64> = s.iter().map(|v| v.max(MIN_CLASS_SHARE)).collect();
                    let total: f64 = clipped.iter().sum();
                    (-(clipped[class] / total).ln()).min(MAX_ROW_LOG_LOSS)
                })
                .collect(),
        })
    }
}

/// Per-row holdout losses of the trivial predictor fitted on the training
/// rows of all `parts`: the mean (regression) or the class frequencies
/// with one pseudo-count each (classification).
pub fn trivial_losses(
    spec: &FeatureSpec,
    parts: &[&RowMatrix],
    holdout: &RowMatrix,
) -> Result<Vec<f64>, BaselineError> {
    let t: Vec<f64> = parts
        .iter()
        .flat_map(|p| spec.encode_targets(p))
        .filter(|v| !v.is_nan())
        .map(f64::from)
        .collect();
    let h: Vec<f64> = spec
        .encode_targets(holdout)
        .iter()
        .map(|&v| f64::from(v))
        .collect();
    let result = match spec.task {
        Task::Regression => gate::metrics::mean_predictor_losses(&t, &h),
        Task::Classification => {
            let tl: Vec<usize> = t.iter().map(|&v| v as usize).collect();
            let hl: Vec<usize> = h.iter().map(|&v| v as usize).collect();
            gate::metrics::prior_predictor_losses(&tl, spec.outputs, &hl)
        }
    };
    result.map_err(|e| BaselineError::Scoring(e.to_string()))
}

/// Solves `A·X = B` for a symmetric positive definite `A` (`n × n`) and
/// `k` right-hand sides by Cholesky; `None` if `A` is not positive definite.
pub(crate) fn solve_spd(a: &[f64], b: &[f64], n: usize, k: usize) -> Option<Vec<f64>> {
    let mut l = vec![0.0; n * n];
    for j in 0..n {
        for i in 0..=j {
            let mut s = a[j * n + i];
            for m in 0..i {
                s -= l[j * n + m] * l[i * n + m];
            }
            if i == j {
                if s.is_nan() || s <= 0.0 || !s.is_finite() {
                    return None;
                }
                l[j * n + j] = s.sqrt();
            } else {
                l[j * n + i] = s / l[i * n + i];
            }
        }
    }
    let mut x = b.to_vec();
    for c in 0..k {
        // Forward: L·y = b.
        for i in 0..n {
            let mut s = x[i * k + c];
            for m in 0..i {
                s -= l[i * n + m] * x[m * k + c];
            }
            x[i * k + c] = s / l[i * n + i];
        }
        // Back: Lᵀ·x = y.
        for i in (0..n).rev() {
            let mut s = x[i * k + c];
            for m in i + 1..n {
                s -= l[m * n + i] * x[m * k + c];
            }
            x[i * k + c] = s / l[i * n + i];
        }
    }
    Some(x)
}

#[cfg(test)]
mod tests {
    use super::*;
    use crate::model::test_spec;
    use crate::schema::number_cell;

    fn rows(points: &[(f32, f32)]) -> RowMatrix {
        let cells = points
            .iter()
            .flat_map(|&(x, y)| [number_cell(Some(x)), number_cell(Some(y))])
            .collect();
        RowMatrix::from_cells(2, cells)
    }

    #[test]
    fn ridge_with_a_tiny_penalty_matches_anscombe_set_one() {
        // Anscombe (1973), "Graphs in Statistical Analysis", set I: the
        // least-squares line is ŷ = 3.0001 + 0.5001·x (CHECKS.md).
        let x = [10.0, 8.0, 13.0, 9.0, 11.0, 14.0, 6.0, 4.0, 12.0, 7.0, 5.0];
        let y = [
            8.04, 6.95, 7.58, 8.81, 8.33, 9.96, 7.24, 4.26, 10.84, 4.82, 5.68,
        ];
        let data = rows(&x.iter().copied().zip(y).collect::<Vec<_>>());
        let spec = test_spec(1, Task::Regression, 1);
        let ridge = Ridge::fit(&spec, &[&data], 1e-9).unwrap();
        let at = |v: f32| ridge.scores(&rows(&[(v, 0.0)]))[0];
        let intercept = at(0.0);
        let slope = at(1.0) - at(0.0);
        assert!((intercept - 3.0001).abs() < 1e-4, "{intercept}");
        assert!((slope - 0.5001).abs() < 1e-4, "{slope}");
    }

    #[test]
    fn the_penalty_shrinks_the_slope_but_not_the_intercept() {
        // With x centred, the intercept is the mean of y whatever the
        // penalty, and the slope is Sxy / (Sxx + λ) (ridge algebra).
        let data = rows(&[(-1.0, 1.0), (0.0, 2.0), (1.0, 6.0)]);
        let spec = test_spec(1, Task::Regression, 1);
        let ridge = Ridge::fit(&spec, &[&data], 2.0).unwrap();
        let s = ridge.scores(&rows(&[(0.0, 0.0), (1.0, 0.0)]));
        assert!((s[0] - 3.0).abs() < 1e-12, "{}", s[0]);
        // Sxy = 5, Sxx = 2, λ = 2: slope 1.25.
        assert!((s[1] - s[0] - 1.25).abs() < 1e-12, "{}", s[1] - s[0]);
        // Fitting on the rows split in two parts gives the same model.
        let (p1, p2) = (rows(&[(-1.0, 1.0)]), rows(&[(0.0, 2.0), (1.0, 6.0)]));
        assert_eq!(Ridge::fit(&spec, &[&p1, &p2], 2.0).unwrap(), ridge);
    }

    #[test]
    fn regression_losses_are_squared_errors() {
        let data = rows(&[(0.0, 1.0), (1.0, 3.0), (2.0, 5.0)]);
        let spec = test_spec(1, Task::Regression, 1);
        let ridge = Ridge::fit(&spec, &[&data], 1e-12).unwrap();
        // y = 1 + 2x exactly; a holdout row at (3, 10) misses by 3.
        let l = ridge.row_losses(&rows(&[(3.0, 10.0), (0.5, 2.0)])).unwrap();
        assert!((l[0] - 9.0).abs() < 1e-6 && l[1] < 1e-9, "{l:?}");
    }

    #[test]
    fn classifier_losses_follow_the_separating_input() {
        // Class 1 when x > 0: the right class gets the larger share.
        let pts: Vec<(f32, f32)> = (-20..=20)
            .filter(|&i| i != 0)
            .map(|i| (i as f32 / 10.0, if i > 0 { 1.0 } else { 0.0 }))
            .collect();
        let spec = test_spec(1, Task::Classification, 2);
        let data = RowMatrix::from_cells(
            2,
            pts.iter()
                .flat_map(|&(x, c)| [number_cell(Some(x)), c as u32])
                .collect(),
        );
        let ridge = Ridge::fit(&spec, &[&data], 1e-3).unwrap();
        let probe = RowMatrix::from_cells(
            2,
            vec![number_cell(Some(1.5)), 1, number_cell(Some(1.5)), 0],
        );
        let l = ridge.row_losses(&probe).unwrap();
        assert!(l[0] < 2f64.ln() && l[1] > 2f64.ln(), "{l:?}");
        assert!(l.iter().all(|v| *v <= MAX_ROW_LOG_LOSS));
    }

    #[test]
    fn bad_inputs_are_errors_not_panics() {
        let spec = test_spec(1, Task::Regression, 1);
        let empty = RowMatrix::new(2);
        assert_eq!(
            Ridge::fit(&spec, &[&empty], 1.0),
            Err(BaselineError::NoRows)
        );
        let data = rows(&[(0.0, 1.0)]);
        assert_eq!(
            Ridge::fit(&spec, &[&data], 0.0),
            Err(BaselineError::BadLambda(0.0))
        );
        let missing = RowMatrix::from_cells(2, vec![number_cell(Some(1.0)), number_cell(None)]);
        let ridge = Ridge::fit(&spec, &[&data], 1.0).unwrap();
        assert!(matches!(
            ridge.row_losses(&missing),
            Err(BaselineError::Scoring(_))
        ));
    }

    #[test]
    fn scoring_in_chunks_gives_each_row_its_own_score() {
        // More rows than one encoding chunk: every row, the ones at the
        // chunk borders included, scores as it does on its own.
        let n = 2 * CHUNK_ROWS + 7;
        let pts: Vec<(f32, f32)> = (0..n).map(|i| (i as f32 / 100.0, i as f32)).collect();
        let data = rows(&pts);
        let spec = test_spec(1, Task::Regression, 1);
        let ridge = Ridge::fit(&spec, &[&data], 1.0).unwrap();
        let all = ridge.scores(&data);
        assert_eq!(all.len(), n);
        for r in [0, CHUNK_ROWS - 1, CHUNK_ROWS, 2 * CHUNK_ROWS, n - 1] {
            let one = ridge.scores(&rows(&pts[r..=r]));
            assert_eq!(all[r], one[0], "row {r}");
        }
        assert!(all[n - 1] > all[0]);
    }

    #[test]
    fn trivial_losses_use_the_training_mean() {
        let spec = test_spec(1, Task::Regression, 1);
        let train = rows(&[(0.0, 1.0), (0.0, 3.0)]);
        let l = trivial_losses(&spec, &[&train], &rows(&[(0.0, 5.0)])).unwrap();
        assert_eq!(l, vec![9.0]);
    }
}
