//! Has the data moved away from what the serving model knows? Two checks
//! that compare a batch with how batches usually differ, never with a test
//! that counts the rows of one day as independent samples.
//!
//! - [`level_check`]: the batch's level, ln(mean loss on the batch / mean
//!   loss on the stored holdout rows), against the same figure for earlier
//!   batches that were not flagged: a one-sided prediction-interval t-test
//!   (the new value and n past values exchangeable and normal; Student
//!   1908). A day that is merely unusual sits inside the spread that past
//!   days showed; a change that lifts every row's loss does not.
//! - [`group_check`]: where a change hits some category values only (a
//!   town's shops), each value's own level ln(batch loss / its usual loss)
//!   against the other values of the same column on the same batch. What a
//!   day does to every value alike cancels; the spread across values is
//!   measured robustly (median and MAD, Hampel 1974) so the changed values
//!   do not hide themselves, and never taken below the value's own
//!   sampling error. Each of the C columns looked at gets alpha / C, shared
//!   among its m values (Bonferroni, weighted by column): a column of a
//!   hundred thin values (shops) then does not blunt the test of a column
//!   of twelve well-filled ones (towns), and the chance of any false flag
//!   on a batch stays at most alpha.

use super::cluster::{normal_quantile, t_quantile};
use super::dist::{normal_sf, t_sf};
use super::show;

/// Fewest earlier batches before the level check judges.
pub const LEVEL_MIN_HISTORY: usize = 5;
/// Earlier batches the level check remembers.
pub const LEVEL_HISTORY: usize = 60;
/// Fewest rows of one value, on the batch and in the reference, to test it.
pub const GROUP_MIN_ROWS: usize = 8;
/// Fewest rows of one value in the reference (its usual loss; the
/// sampling error of a small reference counts in the value's z).
pub const GROUP_MIN_REFERENCE_ROWS: usize = 5;
/// Fewest testable values in a column to estimate its spread.
pub const GROUP_MIN_VALUES: usize = 8;
/// A value must cost at least this much more than its usual loss, relative
/// to the batch's common level, to be flagged (a change worth a look;
/// common practice, no source).
pub const GROUP_MIN_RATIO: f64 = 1.5;

/// Outcome of the level check.
#[derive(Debug, Clone, Copy, PartialEq)]
pub struct LevelCheck {
    /// ln(mean batch loss / mean reference loss).
    pub level: f64,
    /// Earlier levels compared with.
    pub history: usize,
    pub mean: f64,
    pub sd: f64,
    /// Prediction t statistic, with history − 1 degrees of freedom.
    pub t: f64,
    pub p: f64,
    pub alpha: f64,
    pub flagged: bool,
}

impl LevelCheck {
    pub fn reason(&self) -> String {
        format!(
            "loss level ln(batch / holdout) = {} against {} earlier batches (mean {}, sd {}): \
             prediction t = {}, p = {} (alpha {})",
            show(self.level),
            self.history,
            show(self.mean),
            show(self.sd),
            show(self.t),
            show(self.p),
            show(self.alpha)
        )
    }
}

/// Compares `level` with earlier batches' levels. `None` with fewer than
/// [`LEVEL_MIN_HISTORY`] earlier values (not enough history to judge).
pub fn level_check(history: &[f64], level: f64, alpha: f64) -> Option<LevelCheck> {
    let past: Vec<f64> = history.iter().copied().filter(|v| v.is_finite()).collect();
    let n = past.len();
    if n < LEVEL_MIN_HISTORY || !level.is_finite() {
        return None;
    }
    let mean = past.iter().sum::<f64>() / n as f64;
    let sd = (past.iter().map(|v| (v - mean).powi(2)).sum::<f64>() / (n - 1) as f64).sqrt();
    let scale = sd * (1.0 + 1.0 / n as f64).sqrt();
    let df = (n - 1) as f64;
    let t = if scale > 0.0 {
        (level - mean) / scale
    } else if level > mean {
        f64::INFINITY
    } else {
        0.0
    };
    let p = t_sf(t, df);
    Some(LevelCheck {
        level,
        history: n,
        mean,
        sd,
        t,
        p,
        alpha,
        flagged: p <= alpha,
    })
}

/// One category value's losses on a batch and on the reference rows.
#[derive(Debug, Clone, PartialEq)]
pub struct Group {
    pub column: String,
    pub value: String,
    pub rows: usize,
    pub mean_loss: f64,
    /// Standard deviation of the row losses on the batch.
    pub sd_loss: f64,
    pub reference_rows: usize,
    pub reference_mean: f64,
    pub reference_sd: f64,
}

/// A value the group check found out of line with its column.
#[derive(Debug, Clone, PartialEq)]
pub struct GroupFlag {
    pub column: String,
    pub value: String,
    pub rows: usize,
    /// ln(batch loss / usual loss) of the value minus the column's median.
    pub excess_level: f64,
    pub z: f64,
    /// The z this value had to reach: its column's share of alpha.
    pub z_needed: f64,
    pub p: f64,
}

/// Outcome of the group check on one batch.
#[derive(Debug, Clone, PartialEq, Default)]
pub struct GroupCheck {
    /// Values tested, over all columns.
    pub tested: usize,
    /// Columns tested (C of the correction).
    pub columns: usize,
    pub flagged: Vec<GroupFlag>,
}

fn median(v: &mut [f64]) -> f64 {
    v.sort_by(f64::total_cmp);
    let n = v.len();
    if n % 2 == 1 {
        v[n / 2]
    } else {
        0.5 * (v[n / 2 - 1] + v[n / 2])
    }
}

/// Tests every value with enough rows against the other values of its
/// column on the same batch.
pub fn group_check(groups: &[Group], alpha: f64) -> GroupCheck {
    struct Scored<'a> {
        g: &'a Group,
        level: f64,
        sampling_sd: f64,
    }
    let mut by_column: std::collections::BTreeMap<&str, Vec<Scored<'_>>> = Default::default();
    for g in groups {
        if g.rows < GROUP_MIN_ROWS
            || g.reference_rows < GROUP_MIN_REFERENCE_ROWS
            || !(g.mean_loss > 0.0 && g.reference_mean > 0.0)
        {
            continue;
        }
        let level = (g.mean_loss / g.reference_mean).ln();
        // Delta method: sd of ln(mean) ≈ cv / sqrt(n).
        let cv2 = |sd: f64, m: f64, n: usize| (sd / m).powi(2) / n as f64;
        let sampling_sd = (cv2(g.sd_loss, g.mean_loss, g.rows)
            + cv2(g.reference_sd, g.reference_mean, g.reference_rows))
        .sqrt();
        if level.is_finite() && sampling_sd.is_finite() {
            by_column.entry(&g.column).or_default().push(Scored {
                g,
                level,
                sampling_sd,
            });
        }
    }
    let columns: Vec<Vec<Scored<'_>>> = by_column
        .into_values()
        .filter(|v| v.len() >= GROUP_MIN_VALUES)
        .collect();
    let tested: usize = columns.iter().map(Vec::len).sum();
    if tested == 0 || !(alpha > 0.0 && alpha <= 0.5) {
        return GroupCheck::default();
    }
    let mut flagged = Vec::new();
    for values in &columns {
        let z_needed = normal_quantile(1.0 - alpha / (columns.len() * values.len()) as f64);
        let mut levels: Vec<f64> = values.iter().map(|s| s.level).collect();
        let centre = median(&mut levels);
        let mut deviations: Vec<f64> = values.iter().map(|s| (s.level - centre).abs()).collect();
        let spread = 1.4826 * median(&mut deviations);
        for s in values {
            let excess = s.level - centre;
            let z = excess / spread.max(s.sampling_sd).max(1e-12);
            if z >= z_needed && excess >= GROUP_MIN_RATIO.ln() {
                flagged.push(GroupFlag {
                    column: s.g.column.clone(),
                    value: s.g.value.clone(),
                    rows: s.g.rows,
                    excess_level: excess,
                    z,
                    z_needed,
                    p: normal_sf(z),
                });
            }
        }
    }
    flagged.sort_by(|a, b| b.z.total_cmp(&a.z));
    GroupCheck {
        tested,
        columns: columns.len(),
        flagged,
    }
}

/// The t value a level must reach with `history` earlier batches (for
/// status lines).
pub fn level_t_needed(history: usize, alpha: f64) -> f64 {
    if history < 2 {
        return f64::INFINITY;
    }
    t_quantile(1.0 - alpha, (history - 1) as f64)
}

#[cfg(test)]
mod tests {
    use super::*;
    use crate::gate::near;
    use crate::rng::Rng;

    #[test]
    fn the_level_check_is_a_prediction_interval() {
        // Five past levels 0, 0.1, −0.1, 0.05, −0.05: mean 0, sd 0.0791;
        // a new level at the mean + t(0.99, 4)·sd·sqrt(1 + 1/5) sits exactly
        // on the boundary (Student's t quantile from statrs).
        let past = [0.0, 0.1, -0.1, 0.05, -0.05];
        let sd = (0.025f64 / 4.0).sqrt();
        let edge = 3.746947 * sd * (1.2f64).sqrt();
        let c = level_check(&past, edge, 0.01).unwrap();
        near(c.p, 0.01, 1e-5);
        assert!(level_check(&past, edge * 1.01, 0.01).unwrap().flagged);
        assert!(!level_check(&past, edge * 0.99, 0.01).unwrap().flagged);
        assert!(level_check(&past[..4], 5.0, 0.01).is_none());
    }

    #[test]
    fn exchangeable_levels_are_flagged_at_about_alpha() {
        let mut rng = Rng::new(3);
        let (mut flags, trials) = (0, 20_000);
        for _ in 0..trials {
            let v: Vec<f64> = (0..11).map(|_| 0.3 * rng.normal()).collect();
            if level_check(&v[..10], v[10], 0.01).unwrap().flagged {
                flags += 1;
            }
        }
        let rate = flags as f64 / trials as f64;
        assert!((0.006..=0.014).contains(&rate), "{rate}");
    }

    fn group(column: &str, value: usize, rows: usize, mean: f64, rng: &mut Rng) -> Group {
        // Squared normal errors: sd of the loss is sqrt(2) times its mean.
        let m = |base: f64, rows: usize, rng: &mut Rng| {
            let v: Vec<f64> = (0..rows)
                .map(|_| (base.sqrt() * rng.normal()).powi(2))
                .collect();
            let mean = v.iter().sum::<f64>() / rows as f64;
            let sd = (v.iter().map(|x| (x - mean).powi(2)).sum::<f64>() / (rows - 1) as f64).sqrt();
            (mean, sd)
        };
        let (a, sa) = m(mean, rows, rng);
        let (b, sb) = m(1.0, 4 * rows, rng);
        Group {
            column: column.into(),
            value: format!("v{value}"),
            rows,
            mean_loss: a,
            sd_loss: sa,
            reference_rows: 4 * rows,
            reference_mean: b,
            reference_sd: sb,
        }
    }

    #[test]
    fn a_day_that_lifts_every_value_flags_none_and_a_changed_town_is_found() {
        let mut rng = Rng::new(5);
        let mut false_batches = 0;
        let mut found = 0;
        for trial in 0..400 {
            // Every value's loss scaled by the same day factor.
            let day = (0.4 * rng.normal()).exp();
            let shifted = trial % 2 == 1;
            let groups: Vec<Group> = (0..100)
                .map(|v| {
                    let factor = if shifted && v < 9 { 5.0 } else { 1.0 };
                    group("shop", v, 11, day * factor, &mut rng)
                })
                .collect();
            let check = group_check(&groups, 0.01);
            assert_eq!(check.tested, 100);
            if shifted {
                if check
                    .flagged
                    .iter()
                    .any(|f| f.value.as_str() < "v9" && f.value.len() == 2)
                {
                    found += 1;
                }
            } else if !check.flagged.is_empty() {
                false_batches += 1;
            }
        }
        assert!(
            false_batches <= 6,
            "{false_batches} of 200 null batches flagged"
        );
        // Eleven rows a value: each changed value is found most of the time.
        assert!(found >= 120, "found {found} of 200");
    }

    #[test]
    fn a_thin_column_beside_a_full_one_does_not_blunt_it() {
        // A 100-value column of 11 rows a value (shops) beside a 12-value
        // column of 100 rows a value (towns). A town whose loss doubles is
        // found far more often when each column gets its own share of
        // alpha than under one Bonferroni over all 112 values, and a
        // stationary batch is still flagged at most about alpha.
        let mut rng = Rng::new(11);
        let (mut found, mut found_pooled, mut false_batches) = (0, 0, 0);
        let trials = 400;
        for trial in 0..trials {
            let day = (0.4 * rng.normal()).exp();
            let shifted = trial % 2 == 1;
            let mut groups: Vec<Group> = (0..100)
                .map(|v| group("shop", v, 11, day, &mut rng))
                .collect();
            groups.extend((0..12).map(|v| {
                let factor = if shifted && v == 0 { 2.0 } else { 1.0 };
                group("town", v, 100, day * factor, &mut rng)
            }));
            let check = group_check(&groups, 0.01);
            assert_eq!((check.tested, check.columns), (112, 2));
            let town = check
                .flagged
                .iter()
                .find(|f| f.column == "town" && f.value == "v0");
            if shifted {
                if let Some(f) = town {
                    found += 1;
                    if f.z >= normal_quantile(1.0 - 0.01 / 112.0) {
                        found_pooled += 1;
                    }
                }
            } else if !check.flagged.is_empty() {
                false_batches += 1;
            }
        }
        assert!(
            false_batches <= 6,
            "{false_batches} of 200 null batches flagged"
        );
        assert!(found > found_pooled, "{found} against {found_pooled}");
        assert!(found >= 100, "found {found} of 200");
    }

    #[test]
    fn columns_with_few_values_are_not_judged_by_spread() {
        let mut rng = Rng::new(6);
        let groups: Vec<Group> = (0..5)
            .map(|v| group("weekday", v, 100, 1.0, &mut rng))
            .collect();
        assert_eq!(group_check(&groups, 0.01).tested, 0);
    }
}
