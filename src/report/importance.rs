//! Permutation importance of a model's input columns (Breiman 2001; Fisher,
//! Rudin & Dominici 2019, "model reliance"): for each column, the rise in
//! the model's mean loss when that column's values are shuffled among the
//! rows, repeated with different seeded shuffles.
//!
//! A category column is one cell per row, so shuffling it moves the code
//! and with it the column's whole one-hot group. The scorer is passed in,
//! so this module holds no model and its tests use closed-form predictors
//! as well as the real network (`scan::importance` is the model's side).
//!
//! Rows of one batch share that day's conditions, so they are not
//! independent samples: the interval of a rise treats each batch as one
//! cluster (Liang & Zeger 1986; CR1 small-sample factor and G − 1 degrees
//! of freedom as in Cameron & Miller 2015). With fewer than two batches
//! there is no interval, only the spread over repeats.

use crate::gate::dist::t_cdf;
use crate::rng::Rng;
use crate::schema::RowMatrix;

/// Holdout rows scored at most: enough for a rise to be measured well
/// (common practice, no source), few enough that the report stays fast on
/// big stores (each column costs `REPEATS` scorings of these rows).
pub const MAX_ROWS: usize = 5_000;

/// Shuffles per column.
pub const REPEATS: usize = 5;

/// Coverage of the interval around each rise.
pub const LEVEL: f64 = 0.95;

/// One input column to shuffle: its index in the rows and the name shown.
#[derive(Debug, Clone, PartialEq)]
pub struct Column {
    pub index: usize,
    pub name: String,
}

/// What shuffling one column did to the loss.
#[derive(Debug, Clone, PartialEq)]
pub struct Importance {
    pub column: String,
    /// Mean rise in loss over the rows and the repeats.
    pub rise: f64,
    /// Standard deviation of the per-repeat mean rise: the shuffle's own
    /// noise on these rows (0 with a single repeat).
    pub repeat_sd: f64,
    /// Interval for the rise at `LEVEL`, batches as clusters; `None` with
    /// fewer than two batches.
    pub interval: Option<(f64, f64)>,
    /// Mean loss with the column shuffled over the mean loss without;
    /// `None` when the unshuffled loss is 0.
    pub ratio: Option<f64>,
}

/// Permutation importance of every column, largest rise first.
#[derive(Debug, Clone, PartialEq)]
pub struct Outcome {
    pub rows: usize,
    pub batches: usize,
    pub repeats: usize,
    /// Mean loss on the unshuffled rows.
    pub base_loss: f64,
    pub columns: Vec<Importance>,
}

/// Shuffles the cells of `column` among the rows (Fisher–Yates); every
/// other column stays where it was.
pub fn permute_column(rows: &mut RowMatrix, column: usize, rng: &mut Rng) {
    let mut cells: Vec<u32> = (0..rows.n_rows()).map(|r| rows.row(r)[column]).collect();
    rng.shuffle(&mut cells);
    let mut next = cells.into_iter();
    rows.map_column(column, |old| next.next().unwrap_or(old));
}

/// Up to `max` of the indices `0..n`, drawn without replacement, in
/// increasing order; all of them when `n <= max`.
pub fn sample(n: usize, max: usize, rng: &mut Rng) -> Vec<usize> {
    let mut idx: Vec<usize> = (0..n).collect();
    if n > max {
        for i in 0..max {
            let j = i + rng.below(n - i);
            idx.swap(i, j);
        }
        idx.truncate(max);
        idx.sort_unstable();
    }
    idx
}

/// A mean with its cluster-robust standard error.
#[derive(Debug, Clone, Copy, PartialEq)]
pub struct ClusteredMean {
    pub mean: f64,
    pub se: f64,
    /// Clusters (distinct group labels); the t reference has `groups − 1`
    /// degrees of freedom.
    pub groups: usize,
}

/// Mean of `values` and its standard error with the values of one group
/// label as one cluster: the intercept-only regression's CR1 variance
/// G/(G−1)·(N−1)/(N−K)·Σ_g (Σ_{i∈g} (v_i − mean))² / N², K = 1 (Liang &
/// Zeger 1986; Cameron & Miller 2015). `None` with fewer than two groups
/// or when the lengths differ.
pub fn clustered_mean(values: &[f64], groups: &[u64]) -> Option<ClusteredMean> {
    if values.len() != groups.len() || values.is_empty() {
        return None;
    }
    let n = values.len() as f64;
    let mean = values.iter().sum::<f64>() / n;
    let mut sums: std::collections::BTreeMap<u64, f64> = Default::default();
    for (v, g) in values.iter().zip(groups) {
        *sums.entry(*g).or_default() += v - mean;
    }
    let g = sums.len();
    if g < 2 {
        return None;
    }
    let g_f = g as f64;
    let meat: f64 = sums.values().map(|s| s * s).sum();
    let se = (g_f / (g_f - 1.0) * meat).sqrt() / n;
    Some(ClusteredMean {
        mean,
        se,
        groups: g,
    })
}

/// The `p` quantile of Student's t with `df` degrees of freedom, found by
/// bisection on the distribution function.
pub fn t_quantile(p: f64, df: f64) -> f64 {
    if !(p > 0.0 && p < 1.0) || df.is_nan() || df <= 0.0 {
        return f64::NAN;
    }
    if p < 0.5 {
        return -t_quantile(1.0 - p, df);
    }
    let mut hi = 1.0;
    while t_cdf(hi, df) < p && hi < 1e12 {
        hi *= 2.0;
    }
    let mut lo = 0.0;
    for _ in 0..200 {
        let mid = 0.5 * (lo + hi);
        if t_cdf(mid, df) < p {
            lo = mid;
        } else {
            hi = mid;
        }
        if hi - lo <= 1e-12 * hi {
            break;
        }
    }
    0.5 * (lo + hi)
}

impl ClusteredMean {
    /// Two-sided interval at `level` with `groups − 1` degrees of freedom.
    pub fn interval(&self, level: f64) -> (f64, f64) {
        let half = t_quantile(0.5 + level / 2.0, (self.groups - 1) as f64) * self.se;
        (self.mean - half, self.mean + half)
    }
}

fn mean(v: &[f64]) -> f64 {
    if v.is_empty() {
        0.0
    } else {
        v.iter().sum::<f64>() / v.len() as f64
    }
}

/// Permutation importance of `columns` on `rows`, whose batch (cluster) is
/// `groups[r]`. `score` gives the per-row losses of the model on a set of
/// rows. Repeat `k` uses the same seeded shuffle order for every column, so
/// columns are compared under the same shuffles. `None` with fewer than two
/// rows (nothing to shuffle).
pub fn permutation_importance<E>(
    rows: &RowMatrix,
    groups: &[u64],
    columns: &[Column],
    repeats: usize,
    seed: u64,
    mut score: impl FnMut(&RowMatrix) -> Result<Vec<f64>, E>,
) -> Result<Option<Outcome>, E> {
    let n = rows.n_rows();
    assert_eq!(groups.len(), n, "one group label per row");
    if n < 2 {
        return Ok(None);
    }
    let repeats = repeats.max(1);
    let base = score(rows)?;
    let base_loss = mean(&base);
    let batches = groups
        .iter()
        .collect::<std::collections::BTreeSet<_>>()
        .len();
    let mut out = Vec::with_capacity(columns.len());
    for col in columns {
        // Per-row rise averaged over the repeats, and each repeat's mean.
        let mut per_row = vec![0.0; n];
        let mut per_repeat = Vec::with_capacity(repeats);
        for k in 0..repeats {
            let mut rng = Rng::new(seed ^ (k as u64 + 1).wrapping_mul(0x9E37_79B9_7F4A_7C15));
            let mut shuffled = rows.clone();
            permute_column(&mut shuffled, col.index, &mut rng);
            let losses = score(&shuffled)?;
            let mut total = 0.0;
            for ((acc, l), b) in per_row.iter_mut().zip(&losses).zip(&base) {
                let d = l - b;
                *acc += d / repeats as f64;
                total += d;
            }
            per_repeat.push(total / n as f64);
        }
        let rise = mean(&per_repeat);
        let repeat_sd = if repeats > 1 {
            (per_repeat.iter().map(|m| (m - rise).powi(2)).sum::<f64>() / (repeats - 1) as f64)
                .sqrt()
        } else {
            0.0
        };
        out.push(Importance {
            column: col.name.clone(),
            rise,
            repeat_sd,
            interval: clustered_mean(&per_row, groups).map(|c| c.interval(LEVEL)),
            ratio: (base_loss > 0.0).then(|| (base_loss + rise) / base_loss),
        });
    }
    out.sort_by(|a, b| b.rise.total_cmp(&a.rise));
    Ok(Some(Outcome {
        rows: n,
        batches,
        repeats,
        base_loss,
        columns: out,
    }))
}

#[cfg(test)]
mod tests {
    use super::*;
    use crate::schema::number_cell;

    fn num(rows: &RowMatrix, r: usize, c: usize) -> f64 {
        f64::from(rows.number(r, c).unwrap())
    }

    /// Rows of (x, z, y) with x, z ~ N(0, 1) independent and y = βx + ε,
    /// ε ~ N(0, σ²); group label = row index / per_group.
    fn linear(
        n: usize,
        beta: f64,
        sigma: f64,
        per_group: usize,
        seed: u64,
    ) -> (RowMatrix, Vec<u64>) {
        let mut rng = Rng::new(seed);
        let mut rows = RowMatrix::new(3);
        for _ in 0..n {
            let x = rng.normal();
            let z = rng.normal();
            let y = beta * x + sigma * rng.normal();
            rows.push_row(&[
                number_cell(Some(x as f32)),
                number_cell(Some(z as f32)),
                number_cell(Some(y as f32)),
            ]);
        }
        let groups = (0..n).map(|r| (r / per_group) as u64).collect();
        (rows, groups)
    }

    fn columns() -> Vec<Column> {
        vec![
            Column {
                index: 0,
                name: "x".into(),
            },
            Column {
                index: 1,
                name: "z".into(),
            },
        ]
    }

    #[test]
    fn a_shuffle_moves_one_column_and_keeps_its_values() {
        let cells: Vec<u32> = (0..60).collect();
        let rows = RowMatrix::from_cells(3, cells);
        let mut shuffled = rows.clone();
        permute_column(&mut shuffled, 1, &mut Rng::new(5));
        let column =
            |m: &RowMatrix, c: usize| (0..m.n_rows()).map(|r| m.row(r)[c]).collect::<Vec<_>>();
        assert_eq!(column(&shuffled, 0), column(&rows, 0));
        assert_eq!(column(&shuffled, 2), column(&rows, 2));
        assert_ne!(
            column(&shuffled, 1),
            column(&rows, 1),
            "20 cells stay in order with p = 1/20!"
        );
        let mut moved = column(&shuffled, 1);
        moved.sort_unstable();
        assert_eq!(moved, column(&rows, 1));
        // The seed decides the order.
        let mut again = rows.clone();
        permute_column(&mut again, 1, &mut Rng::new(5));
        assert_eq!(again, shuffled);
        let mut other = rows.clone();
        permute_column(&mut other, 1, &mut Rng::new(6));
        assert_ne!(other, shuffled);
    }

    #[test]
    fn samples_are_distinct_sorted_and_bounded() {
        let s = sample(10_000, 500, &mut Rng::new(1));
        assert_eq!(s.len(), 500);
        assert!(s.windows(2).all(|w| w[0] < w[1]));
        assert!(*s.last().unwrap() < 10_000);
        // Spread over the whole range, not the first rows.
        assert!(s.iter().filter(|&&i| i >= 5_000).count() > 150);
        assert_eq!(sample(7, 500, &mut Rng::new(1)), (0..7).collect::<Vec<_>>());
    }

    #[test]
    fn cluster_robust_mean_matches_the_darwin_reference() {
        // /work CHECKS: Darwin's Zea mays differences (Fisher 1935) in 5
        // consecutive clusters of 3, checked with statsmodels
        // OLS(d, ones).fit(cov_type="cluster"): mean 2.616667,
        // SE 0.8712619, t = 3.003307, two-sided p = 0.039812 with 4 df.
        let d = [
            6.125, -8.375, 1.0, 2.0, 0.75, 2.875, 3.5, 5.125, 1.75, 3.625, 7.0, 3.0, 9.375, 7.5,
            -6.0,
        ];
        let g: Vec<u64> = (0..15).map(|i| i / 3).collect();
        let c = clustered_mean(&d, &g).unwrap();
        assert_eq!(c.groups, 5);
        assert!((c.mean - 2.616667).abs() < 1e-6, "{}", c.mean);
        assert!((c.se - 0.8712619).abs() < 1e-7, "{}", c.se);
        assert!((c.mean / c.se - 3.003307).abs() < 1e-5);
        // An interval at level 1 − p just reaches 0 (same reference).
        let (lo, hi) = c.interval(1.0 - 0.039812);
        assert!(lo.abs() < 1e-4, "{lo}");
        assert!((hi - 2.0 * c.mean).abs() < 1e-4);
        let (lo, _) = c.interval(0.95);
        assert!(lo > 0.0);
        // t(4) 97.5% quantile 2.776445 (from memory; also the value the
        // p above implies).
        assert!((t_quantile(0.975, 4.0) - 2.776445).abs() < 1e-5);
        assert!((t_quantile(0.025, 4.0) + 2.776445).abs() < 1e-5);
        assert!(clustered_mean(&d, &[0; 15]).is_none(), "one cluster");
        assert!(clustered_mean(&d, &g[..3]).is_none(), "lengths differ");
    }

    #[test]
    fn shuffling_a_linear_input_raises_mse_by_two_beta_squared_var_x() {
        // Linear truth y = βx + ε, x ~ N(0, 1) independent of z, squared
        // error: permuting x raises the expected MSE by 2β²·Var(x) (by
        // derivation, no source; see Fisher, Rudin & Dominici 2019).
        let (beta, sigma) = (1.5, 0.5);
        let (rows, groups) = linear(20_000, beta, sigma, 200, 11);
        let truth = |m: &RowMatrix| -> Result<Vec<f64>, ()> {
            Ok((0..m.n_rows())
                .map(|r| (beta * num(m, r, 0) - num(m, r, 2)).powi(2))
                .collect())
        };
        let out = permutation_importance(&rows, &groups, &columns(), REPEATS, 3, truth)
            .unwrap()
            .unwrap();
        assert_eq!((out.rows, out.batches, out.repeats), (20_000, 100, REPEATS));
        let expected = 2.0 * beta * beta;
        let x = &out.columns[0];
        assert_eq!(x.column, "x");
        assert!((x.rise - expected).abs() / expected < 0.03, "{x:?}");
        let (lo, hi) = x.interval.unwrap();
        assert!(lo < expected && expected < hi, "{x:?} vs {expected}");
        assert!(x.repeat_sd > 0.0 && x.repeat_sd < 0.05 * expected);
        // The ratio is shuffled over unshuffled loss: (σ² + 2β²)/σ².
        let ratio = (sigma * sigma + expected) / (sigma * sigma);
        assert!((x.ratio.unwrap() - ratio).abs() / ratio < 0.05, "{x:?}");
        assert!((out.base_loss - sigma * sigma).abs() < 0.02);
        // The predictor ignores z: shuffling it changes no loss.
        let z = &out.columns[1];
        assert_eq!(z.column, "z");
        assert_eq!(z.rise, 0.0);
        let (lo, hi) = z.interval.unwrap();
        assert!(lo <= 0.0 && 0.0 <= hi);
    }

    /// In how many of 20 seeded data sets the interval of column `name`
    /// covers `value`, for the predictor ŷ = 1.5·x + w·z.
    fn coverage(w: f64, name: &str, value: f64) -> usize {
        (0..20)
            .filter(|&seed| {
                let (rows, groups) = linear(2_000, 1.5, 0.5, 50, 100 + seed);
                let fitted = |m: &RowMatrix| -> Result<Vec<f64>, ()> {
                    Ok((0..m.n_rows())
                        .map(|r| (1.5 * num(m, r, 0) + w * num(m, r, 1) - num(m, r, 2)).powi(2))
                        .collect())
                };
                let out = permutation_importance(&rows, &groups, &columns(), REPEATS, seed, fitted)
                    .unwrap()
                    .unwrap();
                let c = out.columns.iter().find(|c| c.column == name).unwrap();
                let (lo, hi) = c.interval.unwrap();
                lo <= value && value <= hi
            })
            .count()
    }

    #[test]
    fn intervals_cover_the_true_rise_and_zero_for_an_unused_column() {
        // A 95% interval misses in about 1 of 20 data sets; fewer than 16
        // covers of 20 has probability 0.003 (binomial).
        let x = coverage(0.0, "x", 2.0 * 1.5 * 1.5);
        assert!(x >= 16, "x covered in {x} of 20");
        // A fitted model leaves a small weight on a column unrelated to
        // the target: its true rise 2·w² = 3.2e-5 is far inside the noise,
        // so the interval covers 0 as well.
        let z = coverage(0.004, "z", 0.0);
        assert!(z >= 16, "z covered 0 in {z} of 20");
    }

    #[test]
    fn one_batch_gives_no_interval_and_scorer_errors_pass_through() {
        let (rows, _) = linear(50, 1.0, 0.1, 50, 2);
        let one = vec![7u64; 50];
        let ok = |m: &RowMatrix| -> Result<Vec<f64>, String> { Ok(vec![1.0; m.n_rows()]) };
        let out = permutation_importance(&rows, &one, &columns(), 3, 1, ok)
            .unwrap()
            .unwrap();
        assert_eq!(out.batches, 1);
        assert!(out.columns.iter().all(|c| c.interval.is_none()));
        let failing = |_: &RowMatrix| -> Result<Vec<f64>, String> { Err("no".into()) };
        assert_eq!(
            permutation_importance(&rows, &one, &columns(), 3, 1, failing),
            Err("no".to_string())
        );
        let single = RowMatrix::from_cells(3, vec![0, 0, 0]);
        assert_eq!(
            permutation_importance(&single, &[1], &columns(), 3, 1, ok),
            Ok(None)
        );
    }
}
