//! Tests that take the batch, not the row, as the unit of evidence.
//!
//! Rows of one nightly file share that day: its weather, its weekday,
//! events nobody recorded. Two models' per-row loss differences on such
//! rows move together, so a test that counts every row as an independent
//! sample mistakes "this day was unusual" for "this model is better".
//!
//! - [`clustered_t`]: the mean of per-row differences with a cluster-robust
//!   standard error, batches as clusters (Liang & Zeger 1986), with the CR1
//!   small-sample factor G/(G−1)·(N−1)/(N−K) and G − 1 degrees of freedom
//!   as recommended for few clusters by Cameron & Miller (2015). With equal
//!   cluster sizes it equals the one-sample t-test on the cluster means.
//! - [`holm_adjust`]: Holm's (1979) step-down adjusted p-values, so that
//!   testing several candidates against the serving model keeps the chance
//!   of promoting any candidate that is not better at or below alpha.
//! - [`t_quantile`], [`normal_quantile`], [`chi2_quantile`]: inverses of the
//!   distribution functions in [`super::dist`], by bisection.

use super::InputError;
use super::dist::{chi2_sf, normal_sf, t_cdf, t_sf, t_two_sided};

/// Result of the cluster-robust test of mean(d) against zero.
#[derive(Debug, Clone, Copy, PartialEq)]
pub struct ClusteredT {
    /// Rows.
    pub n: usize,
    /// Clusters (batches) the rows came from.
    pub clusters: usize,
    /// Mean difference over rows.
    pub mean: f64,
    /// CR1 cluster-robust standard error of the mean.
    pub se: f64,
    /// t = mean / se (±∞ when se = 0 and mean ≠ 0; 0 when both are 0).
    pub t: f64,
    /// Degrees of freedom, clusters − 1.
    pub df: f64,
    /// P(T ≥ t): evidence that the mean difference is above zero.
    pub p_greater: f64,
    /// P(T ≤ t): evidence that the mean difference is below zero.
    pub p_less: f64,
    pub p_two_sided: f64,
}

/// Cluster-robust (CR1) t-test of mean(d) = 0, rows grouped by `cluster`
/// (any label per row; rows with the same label form one cluster, in any
/// order). Needs at least 2 clusters.
pub fn clustered_t(d: &[f64], cluster: &[u64]) -> Result<ClusteredT, InputError> {
    super::check_same_len("differences and cluster labels", d.len(), cluster.len())?;
    super::check_finite("differences", d)?;
    let n = d.len();
    let mean = super::mean(d);
    // Σ of residuals per cluster.
    let mut sums: std::collections::BTreeMap<u64, f64> = std::collections::BTreeMap::new();
    for (x, c) in d.iter().zip(cluster) {
        *sums.entry(*c).or_default() += x - mean;
    }
    let g = sums.len();
    if g < 2 {
        return Err(InputError::TooFew {
            what: "batches (clusters) for a cluster-robust test",
            need: 2,
            have: g,
        });
    }
    let (gf, nf) = (g as f64, n as f64);
    // CR1: G/(G−1)·(N−1)/(N−K); with K = 1 (the intercept) the second
    // factor is 1.
    let factor = gf / (gf - 1.0);
    let meat: f64 = sums.values().map(|s| s * s).sum();
    let se = (factor * meat).sqrt() / nf;
    let df = gf - 1.0;
    let t = if se > 0.0 {
        mean / se
    } else if mean > 0.0 {
        f64::INFINITY
    } else if mean < 0.0 {
        f64::NEG_INFINITY
    } else {
        0.0
    };
    Ok(ClusteredT {
        n,
        clusters: g,
        mean,
        se,
        t,
        df,
        p_greater: t_sf(t, df),
        p_less: t_cdf(t, df),
        p_two_sided: t_two_sided(t, df),
    })
}

/// Holm's step-down adjusted p-values, in the input order: sorted
/// ascending, p_(j) becomes max over i ≤ j of min(1, (k − i)·p_(i)). A
/// hypothesis is rejected at level alpha exactly when its adjusted p ≤
/// alpha, and the chance of rejecting any true one stays ≤ alpha whatever
/// the dependence between the tests. A NaN p stays NaN (never rejected).
pub fn holm_adjust(p: &[f64]) -> Vec<f64> {
    let k = p.len();
    let mut order: Vec<usize> = (0..k).collect();
    order.sort_by(|&a, &b| p[a].total_cmp(&p[b]));
    let mut out = vec![f64::NAN; k];
    let mut running: f64 = 0.0;
    for (rank, &i) in order.iter().enumerate() {
        if p[i].is_nan() {
            continue;
        }
        running = running.max(((k - rank) as f64 * p[i]).min(1.0));
        out[i] = running;
    }
    out
}

/// Finds x in [lo, hi] where `f` (increasing) crosses `target`.
fn bisect(f: impl Fn(f64) -> f64, target: f64, mut lo: f64, mut hi: f64) -> f64 {
    for _ in 0..200 {
        let mid = 0.5 * (lo + hi);
        if f(mid) < target {
            lo = mid;
        } else {
            hi = mid;
        }
        if (hi - lo) <= 1e-12 * mid.abs().max(1e-12) {
            break;
        }
    }
    0.5 * (lo + hi)
}

/// The z whose upper tail is `p` (the normal equivalent of a p-value),
/// found on the tail itself so that a tiny p keeps its precision; within
/// ±40 (a p of 0 gives the z where the tail underflows, about 38.5).
pub fn normal_upper_quantile(p: f64) -> f64 {
    if p.is_nan() {
        return f64::NAN;
    }
    bisect(|z| -normal_sf(z), -p, -40.0, 40.0)
}

/// The `q` quantile of the standard normal (0 < q < 1).
pub fn normal_quantile(q: f64) -> f64 {
    if !(q > 0.0 && q < 1.0) {
        return f64::NAN;
    }
    bisect(|z| 1.0 - normal_sf(z), q, -40.0, 40.0)
}

/// The `q` quantile of Student's t with `df` degrees of freedom.
pub fn t_quantile(q: f64, df: f64) -> f64 {
    if !(q > 0.0 && q < 1.0 && df > 0.0) {
        return f64::NAN;
    }
    bisect(|t| t_cdf(t, df), q, -1e8, 1e8)
}

/// The `q` quantile of the chi-square distribution with `k` degrees of freedom.
pub fn chi2_quantile(q: f64, k: f64) -> f64 {
    if !(q > 0.0 && q < 1.0 && k > 0.0) {
        return f64::NAN;
    }
    bisect(|x| 1.0 - chi2_sf(x, k), q, 0.0, 1e6 + 100.0 * k)
}

#[cfg(test)]
mod tests {
    use super::*;
    use crate::gate::near;
    use crate::gate::paired::paired_t;

    /// Darwin's Zea mays differences as analysed by Fisher (1935).
    const DARWIN: [f64; 15] = [
        6.125, -8.375, 1.0, 2.0, 0.75, 2.875, 3.5, 5.125, 1.75, 3.625, 7.0, 3.0, 9.375, 7.5, -6.0,
    ];

    #[test]
    fn darwin_in_five_clusters_matches_the_published_cluster_robust_values() {
        // CHECKS.md: Liang & Zeger (1986) with the CR1 factor of Cameron &
        // Miller (2015), checked with statsmodels OLS(d, ones) and
        // cov_type="cluster": 5 consecutive clusters of 3.
        let clusters: Vec<u64> = (0..15).map(|i| i / 3).collect();
        let t = clustered_t(&DARWIN, &clusters).unwrap();
        assert_eq!((t.n, t.clusters), (15, 5));
        near(t.mean, 2.616667, 1e-6);
        near(t.se, 0.8712619, 1e-6);
        near(t.t, 3.003307, 1e-5);
        assert_eq!(t.df, 4.0);
        near(t.p_two_sided, 0.039812, 1e-6);
        near(t.p_greater, 0.019906, 1e-6);
    }

    #[test]
    fn equal_clusters_equal_the_t_test_on_cluster_means() {
        // CHECKS.md: an algebraic identity with equal cluster sizes.
        let clusters: Vec<u64> = (0..15).map(|i| i / 3).collect();
        let means = [-0.416667, 1.875, 3.458333, 4.541667, 3.625];
        let on_means = paired_t(&means).unwrap();
        let t = clustered_t(&DARWIN, &clusters).unwrap();
        near(t.t, on_means.t, 1e-5);
        near(t.p_greater, on_means.p_greater, 1e-6);
        // The labels' order and values do not matter, only the grouping.
        let shuffled: Vec<u64> = (0..15).map(|i| 100 - (i % 5) as u64).collect();
        let regrouped: Vec<f64> = (0..15).map(|i| DARWIN[(i % 5) * 3 + i / 5]).collect();
        let u = clustered_t(&regrouped, &shuffled).unwrap();
        near(u.t, t.t, 1e-9);
    }

    #[test]
    fn one_cluster_is_not_enough_evidence() {
        let e = clustered_t(&DARWIN, &[7; 15]).unwrap_err();
        assert!(matches!(
            e,
            InputError::TooFew {
                need: 2,
                have: 1,
                ..
            }
        ));
    }

    #[test]
    fn holm_on_the_textbook_example() {
        // CHECKS.md: Holm (1979) on p = [0.01, 0.04, 0.03] at alpha 0.05:
        // 0.01 ≤ 0.05/3 is rejected; 0.03 > 0.05/2 stops the procedure.
        let adj = holm_adjust(&[0.01, 0.04, 0.03]);
        near(adj[0], 0.03, 1e-12);
        near(adj[2], 0.06, 1e-12);
        near(adj[1], 0.06, 1e-12);
        let rejected: Vec<bool> = adj.iter().map(|p| *p <= 0.05).collect();
        assert_eq!(rejected, vec![true, false, false]);
        assert_eq!(holm_adjust(&[0.2]), vec![0.2]);
        assert!(holm_adjust(&[f64::NAN, 0.01])[0].is_nan());
    }

    #[test]
    fn quantiles_invert_the_distribution_functions() {
        // Reference library: statrs.
        use statrs::distribution::{ChiSquared, ContinuousCDF, Normal, StudentsT};
        let n = Normal::new(0.0, 1.0).unwrap();
        for q in [0.001, 0.025, 0.5, 0.95, 0.999] {
            near(normal_quantile(q), n.inverse_cdf(q), 1e-7);
            for df in [1.0, 4.0, 30.0] {
                let t = StudentsT::new(0.0, 1.0, df).unwrap();
                near(
                    t_quantile(q, df),
                    t.inverse_cdf(q),
                    1e-6 * t.inverse_cdf(q).abs().max(1.0),
                );
                let c = ChiSquared::new(df).unwrap();
                near(
                    chi2_quantile(q, df),
                    c.inverse_cdf(q),
                    1e-6 * c.inverse_cdf(q).max(1e-3),
                );
            }
            // The upper quantile is the lower one of 1 − q.
            near(normal_upper_quantile(q), -n.inverse_cdf(q), 1e-7);
        }
        // Far in the tail, where 1 − p rounds to 1: found on the tail.
        for p in [1e-20, 1e-100] {
            near(normal_sf(normal_upper_quantile(p)) / p, 1.0, 1e-6);
        }
        // A p of 0 (an underflowed tail): where the tail itself underflows.
        assert!(normal_upper_quantile(0.0) > 38.0);
    }
}
