//! Paired tests on per-row differences d_i = loss_serving_i − loss_candidate_i
//! (positive = the candidate did better on that row).
//!
//! The gate's decision uses the one-sided paired t-test ([`paired_t`]).
//! The others are reported alongside it or used by callers that want a
//! second opinion: [`diebold_mariano`] (horizon 1, with the small-sample
//! correction; it equals the paired t, which the tests check),
//! [`wilcoxon_signed_rank`], [`mcnemar`] for the right/wrong outcomes of two
//! classifiers, and [`sign_flip`], a permutation test.

use super::dist::{chi2_sf_1, normal_sf, t_cdf, t_sf, t_two_sided};
use super::{InputError, check_finite, check_same_len, mean};
use crate::rng::Rng;

/// d_i = serving_i − candidate_i, after checking that both cover the same
/// rows and hold finite numbers.
pub fn differences(serving: &[f64], candidate: &[f64]) -> Result<Vec<f64>, InputError> {
    check_same_len(
        "serving and candidate losses",
        serving.len(),
        candidate.len(),
    )?;
    check_finite("serving losses", serving)?;
    check_finite("candidate losses", candidate)?;
    let d: Vec<f64> = serving.iter().zip(candidate).map(|(s, c)| s - c).collect();
    // Two finite losses can still overflow when subtracted.
    check_finite("loss differences", &d)?;
    Ok(d)
}

/// Result of the paired t-test on differences.
#[derive(Debug, Clone, Copy, PartialEq)]
pub struct PairedT {
    pub n: usize,
    /// Mean difference.
    pub mean: f64,
    /// Sample standard deviation of the differences (divisor n − 1).
    pub sd: f64,
    /// t = mean / (sd / sqrt(n)). ±∞ when sd = 0 and mean ≠ 0; 0 when both are 0.
    pub t: f64,
    /// Degrees of freedom, n − 1.
    pub df: f64,
    /// P(T ≥ t): evidence that the mean difference is above zero.
    pub p_greater: f64,
    /// P(T ≤ t): evidence that the mean difference is below zero.
    pub p_less: f64,
    /// P(|T| ≥ |t|).
    pub p_two_sided: f64,
}

/// Paired t-test of mean(d) against zero. Needs at least 2 finite values.
///
/// When all differences are equal (sd = 0) the t statistic is taken as its
/// limit: +∞ (p_greater = 0) for a positive mean, −∞ for a negative mean,
/// and 0 (one-sided p = 0.5, two-sided p = 1) when every difference is 0.
pub fn paired_t(d: &[f64]) -> Result<PairedT, InputError> {
    let n = d.len();
    if n < 2 {
        return Err(InputError::TooFew {
            what: "paired t-test rows",
            need: 2,
            have: n,
        });
    }
    check_finite("differences", d)?;
    let m = mean(d);
    let ss: f64 = d.iter().map(|x| (x - m) * (x - m)).sum();
    let sd = (ss / (n - 1) as f64).sqrt();
    let df = (n - 1) as f64;
    let t = if sd > 0.0 {
        m / (sd / (n as f64).sqrt())
    } else if m > 0.0 {
        f64::INFINITY
    } else if m < 0.0 {
        f64::NEG_INFINITY
    } else {
        0.0
    };
    Ok(PairedT {
        n,
        mean: m,
        sd,
        t,
        df,
        p_greater: t_sf(t, df),
        p_less: t_cdf(t, df),
        p_two_sided: t_two_sided(t, df),
    })
}

/// Welch's two-sample t-test of mean(a) − mean(b) (unequal variances,
/// Welch–Satterthwaite degrees of freedom).
#[derive(Debug, Clone, Copy, PartialEq)]
pub struct WelchT {
    pub n_a: usize,
    pub n_b: usize,
    pub mean_a: f64,
    pub mean_b: f64,
    pub t: f64,
    pub df: f64,
    /// P(T ≥ t): evidence that mean(a) is above mean(b).
    pub p_greater: f64,
}

/// Welch's t-test; needs at least 2 finite values on each side. When both
/// samples have zero variance, t is taken as its limit (±∞, or 0 for equal
/// means) as in `paired_t`.
pub fn welch_t(a: &[f64], b: &[f64]) -> Result<WelchT, InputError> {
    for (what, v) in [("first sample", a), ("second sample", b)] {
        if v.len() < 2 {
            return Err(InputError::TooFew {
                what,
                need: 2,
                have: v.len(),
            });
        }
        check_finite(what, v)?;
    }
    let (na, nb) = (a.len() as f64, b.len() as f64);
    let (ma, mb) = (mean(a), mean(b));
    let var =
        |v: &[f64], m: f64| v.iter().map(|x| (x - m) * (x - m)).sum::<f64>() / (v.len() - 1) as f64;
    let (qa, qb) = (var(a, ma) / na, var(b, mb) / nb);
    let se2 = qa + qb;
    let diff = ma - mb;
    let (t, df) = if se2 > 0.0 {
        let df = se2 * se2 / (qa * qa / (na - 1.0) + qb * qb / (nb - 1.0));
        (diff / se2.sqrt(), df)
    } else {
        let t = if diff > 0.0 {
            f64::INFINITY
        } else if diff < 0.0 {
            f64::NEG_INFINITY
        } else {
            0.0
        };
        (t, na + nb - 2.0)
    };
    Ok(WelchT {
        n_a: a.len(),
        n_b: b.len(),
        mean_a: ma,
        mean_b: mb,
        t,
        df,
        p_greater: t_sf(t, df),
    })
}

/// Diebold–Mariano test with the small-sample correction, at horizon 1.
#[derive(Debug, Clone, Copy, PartialEq)]
pub struct DieboldMariano {
    pub n: usize,
    pub mean: f64,
    /// Autocovariance of the differences at lag 0 (divisor n).
    pub autocovariance_0: f64,
    /// The uncorrected statistic mean / sqrt(γ0 / n).
    pub uncorrected: f64,
    /// sqrt((n + 1 − 2h + h(h − 1)/n) / n) with h = 1.
    pub correction: f64,
    /// correction × uncorrected, referred to t with n − 1 df.
    pub statistic: f64,
    pub df: f64,
    pub p_greater: f64,
    pub p_two_sided: f64,
}

/// Forecast horizon of the comparison: each holdout row is scored once.
const HORIZON: f64 = 1.0;

/// Diebold–Mariano statistic for equal predictive accuracy at horizon 1,
/// computed from its own definition (long-run variance = γ0 at h = 1) with
/// the small-sample correction factor and t(n − 1) reference distribution.
/// Algebraically this equals [`paired_t`]; it is kept as an independent
/// path so the two can be checked against each other.
pub fn diebold_mariano(d: &[f64]) -> Result<DieboldMariano, InputError> {
    let n = d.len();
    if n < 2 {
        return Err(InputError::TooFew {
            what: "Diebold–Mariano rows",
            need: 2,
            have: n,
        });
    }
    check_finite("differences", d)?;
    let nf = n as f64;
    let m = mean(d);
    let gamma0 = d.iter().map(|x| (x - m) * (x - m)).sum::<f64>() / nf;
    let h = HORIZON;
    let correction = ((nf + 1.0 - 2.0 * h + h * (h - 1.0) / nf) / nf).sqrt();
    let uncorrected = if gamma0 > 0.0 {
        m / (gamma0 / nf).sqrt()
    } else if m > 0.0 {
        f64::INFINITY
    } else if m < 0.0 {
        f64::NEG_INFINITY
    } else {
        0.0
    };
    let statistic = correction * uncorrected;
    let df = nf - 1.0;
    Ok(DieboldMariano {
        n,
        mean: m,
        autocovariance_0: gamma0,
        uncorrected,
        correction,
        statistic,
        df,
        p_greater: t_sf(statistic, df),
        p_two_sided: t_two_sided(statistic, df),
    })
}

/// How a p-value was obtained.
#[derive(Debug, Clone, Copy, PartialEq, Eq)]
pub enum PMethod {
    /// From the exact null distribution.
    Exact,
    /// Normal approximation (with tie and continuity corrections).
    NormalApprox,
    /// Monte Carlo with the given number of random draws.
    MonteCarlo { draws: usize },
}

/// Wilcoxon signed-rank test on differences.
#[derive(Debug, Clone, Copy, PartialEq)]
pub struct SignedRank {
    /// Non-zero differences used.
    pub n: usize,
    /// Differences exactly equal to zero, dropped before ranking.
    pub zeros_dropped: usize,
    /// Sum of the ranks of |d| over positive differences.
    pub t_plus: f64,
    /// Sum of the ranks of |d| over negative differences.
    pub t_minus: f64,
    /// Whether some |d| were tied (they share the average rank).
    pub ties: bool,
    pub method: PMethod,
    /// P-value for "differences tend to be positive".
    pub p_greater: f64,
    pub p_two_sided: f64,
}

/// Largest number of non-zero differences for which the exact null
/// distribution is used (its subset counts fit in u64).
pub const SIGNED_RANK_EXACT_MAX: usize = 50;

/// Wilcoxon signed-rank test.
///
/// Differences exactly equal to zero are dropped before ranking (so `n`
/// counts only the non-zero ones). Tied |d| get the average of their ranks.
/// Without ties and with n ≤ [`SIGNED_RANK_EXACT_MAX`] the p-values come from
/// the exact distribution of T+; otherwise from the normal approximation
/// with the tie-corrected variance and a continuity correction of 1/2.
/// Needs at least one non-zero difference.
pub fn wilcoxon_signed_rank(d: &[f64]) -> Result<SignedRank, InputError> {
    check_finite("differences", d)?;
    let nonzero: Vec<f64> = d.iter().copied().filter(|x| *x != 0.0).collect();
    let zeros_dropped = d.len() - nonzero.len();
    let n = nonzero.len();
    if n == 0 {
        return Err(InputError::TooFew {
            what: "non-zero differences",
            need: 1,
            have: 0,
        });
    }
    let mut order: Vec<usize> = (0..n).collect();
    order.sort_by(|&i, &j| nonzero[i].abs().total_cmp(&nonzero[j].abs()));
    let mut ranks = vec![0.0; n];
    let mut tie_term = 0.0; // Σ (t³ − t) over groups of tied |d|
    let mut start = 0;
    while start < n {
        let mut end = start + 1;
        while end < n && nonzero[order[end]].abs() == nonzero[order[start]].abs() {
            end += 1;
        }
        // Positions start..end hold ranks start+1..=end; all get their mean.
        let average = (start + 1 + end) as f64 / 2.0;
        for &k in &order[start..end] {
            ranks[k] = average;
        }
        let size = (end - start) as f64;
        tie_term += size * size * size - size;
        start = end;
    }
    let t_plus: f64 = (0..n).filter(|&k| nonzero[k] > 0.0).map(|k| ranks[k]).sum();
    let t_minus: f64 = (0..n).filter(|&k| nonzero[k] < 0.0).map(|k| ranks[k]).sum();
    let ties = tie_term > 0.0;

    let (method, p_greater, p_two_sided) = if !ties && n <= SIGNED_RANK_EXACT_MAX {
        // Without ties every rank is an integer, so T+ is too.
        let counts = signed_rank_counts(n);
        let total = counts.iter().map(|&c| c as f64).sum::<f64>();
        let observed = t_plus.round() as usize;
        let at_most: u64 = counts[..=observed].iter().sum();
        let at_least: u64 = counts[observed..].iter().sum();
        let p_low = at_most as f64 / total;
        let p_high = at_least as f64 / total;
        (PMethod::Exact, p_high, (2.0 * p_low.min(p_high)).min(1.0))
    } else {
        let nf = n as f64;
        let centre = nf * (nf + 1.0) / 4.0;
        let variance = nf * (nf + 1.0) * (2.0 * nf + 1.0) / 24.0 - tie_term / 48.0;
        let sd = variance.sqrt();
        let diff = t_plus - centre;
        let z_greater = (diff - 0.5) / sd;
        let z_two = ((diff.abs() - 0.5).max(0.0)) / sd;
        (
            PMethod::NormalApprox,
            normal_sf(z_greater),
            (2.0 * normal_sf(z_two)).min(1.0),
        )
    };
    Ok(SignedRank {
        n,
        zeros_dropped,
        t_plus,
        t_minus,
        ties,
        method,
        p_greater,
        p_two_sided,
    })
}

/// counts[s] = number of subsets of {1, ..., n} whose sum is s: the null
/// distribution of T+ times 2^n. Exact in u64 for n ≤ 63.
fn signed_rank_counts(n: usize) -> Vec<u64> {
    let max_sum = n * (n + 1) / 2;
    let mut counts = vec![0u64; max_sum + 1];
    counts[0] = 1;
    for rank in 1..=n {
        for s in (rank..=max_sum).rev() {
            counts[s] += counts[s - rank];
        }
    }
    counts
}

/// McNemar's test for two classifiers scored on the same rows.
#[derive(Debug, Clone, Copy, PartialEq)]
pub struct McNemar {
    /// Rows the serving model got right and the candidate got wrong.
    pub b: u64,
    /// Rows the serving model got wrong and the candidate got right.
    pub c: u64,
    /// Continuity-corrected statistic max(|b − c| − 1, 0)² / (b + c).
    pub statistic: f64,
    /// P(χ²₁ ≥ statistic): two-sided by construction; the sign of c − b
    /// says which model the evidence favours.
    pub p: f64,
}

/// McNemar's continuity-corrected chi-square test from the discordant
/// counts. With b + c = 0 there is no evidence: statistic 0, p = 1.
/// (The correction is floored at zero, so b = c gives statistic 0.)
pub fn mcnemar(b: u64, c: u64) -> McNemar {
    // Counts are summed as f64 so that no pair of counts can overflow.
    let total = b as f64 + c as f64;
    let statistic = if total == 0.0 {
        0.0
    } else {
        let gap = (b.abs_diff(c) as f64 - 1.0).max(0.0);
        gap * gap / total
    };
    McNemar {
        b,
        c,
        statistic,
        p: chi2_sf_1(statistic),
    }
}

/// Counts the discordant rows (b, c) from per-row correctness of the
/// serving and candidate classifiers.
pub fn discordant_counts(
    serving_correct: &[bool],
    candidate_correct: &[bool],
) -> Result<(u64, u64), InputError> {
    check_same_len(
        "serving and candidate outcomes",
        serving_correct.len(),
        candidate_correct.len(),
    )?;
    let mut b = 0;
    let mut c = 0;
    for (&s, &k) in serving_correct.iter().zip(candidate_correct) {
        match (s, k) {
            (true, false) => b += 1,
            (false, true) => c += 1,
            _ => {}
        }
    }
    Ok((b, c))
}

/// Sign-flip permutation test of the mean difference.
#[derive(Debug, Clone, Copy, PartialEq)]
pub struct SignFlip {
    pub n: usize,
    /// Observed Σ d_i (the test statistic; equivalent to the mean).
    pub sum: f64,
    pub method: PMethod,
    /// Share of sign assignments with Σ s_i d_i ≥ the observed sum.
    pub p_greater: f64,
    /// Share with |Σ s_i d_i| ≥ |observed sum|.
    pub p_two_sided: f64,
}

/// Largest n for which all 2^n sign assignments are enumerated.
pub const SIGN_FLIP_EXACT_MAX: usize = 20;

/// Suggested number of Monte Carlo draws above the exact limit: the
/// standard error of a p-value near 0.05 is then about 0.002.
pub const SIGN_FLIP_DRAWS: usize = 9_999;

/// Sign-flip permutation test: under "no difference" each d_i is as likely
/// to have had the opposite sign.
///
/// For n ≤ [`SIGN_FLIP_EXACT_MAX`] all 2^n assignments are enumerated and
/// the p-values are exact. Above that, `draws` random assignments from a
/// SplitMix64 stream seeded with `seed` are used and p = (1 + hits) /
/// (1 + draws), which never reports p = 0. Sums within 1e-9 × Σ|d_i| of the
/// observed one count as "at least as extreme", so rounding cannot split
/// ties.
pub fn sign_flip(d: &[f64], draws: usize, seed: u64) -> Result<SignFlip, InputError> {
    let n = d.len();
    if n == 0 {
        return Err(InputError::TooFew {
            what: "sign-flip rows",
            need: 1,
            have: 0,
        });
    }
    check_finite("differences", d)?;
    let observed: f64 = d.iter().sum();
    let slack = 1e-9 * d.iter().map(|x| x.abs()).sum::<f64>();
    let mut hits_greater = 0u64;
    let mut hits_two = 0u64;
    let mut tally = |s: f64| {
        if s >= observed - slack {
            hits_greater += 1;
        }
        if s.abs() >= observed.abs() - slack {
            hits_two += 1;
        }
    };
    if n <= SIGN_FLIP_EXACT_MAX {
        let assignments = 1u64 << n;
        for mask in 0..assignments {
            let s: f64 = d
                .iter()
                .enumerate()
                .map(|(i, x)| if mask >> i & 1 == 1 { -x } else { *x })
                .sum();
            tally(s);
        }
        let total = assignments as f64;
        Ok(SignFlip {
            n,
            sum: observed,
            method: PMethod::Exact,
            p_greater: hits_greater as f64 / total,
            p_two_sided: hits_two as f64 / total,
        })
    } else {
        if draws == 0 {
            return Err(InputError::TooFew {
                what: "sign-flip random draws",
                need: 1,
                have: 0,
            });
        }
        let mut rng = Rng::new(seed);
        for _ in 0..draws {
            let mut s = 0.0;
            for chunk in d.chunks(64) {
                let bits = rng.next_u64();
                for (i, x) in chunk.iter().enumerate() {
                    s += if bits >> i & 1 == 1 { -x } else { *x };
                }
            }
            tally(s);
        }
        let total = (draws + 1) as f64;
        Ok(SignFlip {
            n,
            sum: observed,
            method: PMethod::MonteCarlo { draws },
            p_greater: (hits_greater + 1) as f64 / total,
            p_two_sided: (hits_two + 1) as f64 / total,
        })
    }
}

#[cfg(test)]
mod tests {
    use super::*;

    /// Darwin's Zea mays pair differences as analysed by Fisher (1935);
    /// values from CHECKS.md.
    const DARWIN: [f64; 15] = [
        6.125, -8.375, 1.0, 2.0, 0.75, 2.875, 3.5, 5.125, 1.75, 3.625, 7.0, 3.0, 9.375, 7.5, -6.0,
    ];

    use crate::gate::near;

    #[test]
    fn paired_t_on_darwin_fisher() {
        let r = paired_t(&DARWIN).expect("15 finite values");
        assert_eq!(r.n, 15);
        assert_eq!(r.df, 14.0);
        // Source: Darwin–Fisher (1935) worked example, CHECKS.md: t = 2.14799, two-sided p = 0.049703.
        near(r.t, 2.14799, 5e-6);
        near(r.p_two_sided, 0.049703, 5e-7);
        near(r.p_greater, 0.049703 / 2.0, 5e-7);
        near(r.p_greater + r.p_less, 1.0, 1e-14);
        // Mean difference 2.6167 (39.25 / 15): arithmetic on the data above.
        near(r.mean, 39.25 / 15.0, 1e-12);
    }

    #[test]
    fn diebold_mariano_equals_paired_t() {
        // Algebraic identity at horizon 1 (DM with the small-sample
        // correction = paired t), CHECKS.md.
        let t = paired_t(&DARWIN).expect("valid");
        let dm = diebold_mariano(&DARWIN).expect("valid");
        near(dm.statistic, t.t, 1e-12);
        near(dm.p_greater, t.p_greater, 1e-12);
        near(dm.p_two_sided, t.p_two_sided, 1e-12);
        near(dm.correction, (14.0f64 / 15.0).sqrt(), 1e-15);
        // The uncorrected statistic is larger by sqrt(n / (n − 1)).
        near(dm.uncorrected, t.t * (15.0f64 / 14.0).sqrt(), 1e-12);
        // Also on uneven data with a negative mean.
        let other = [0.3, -1.2, -0.4, 2.2, -3.1, -0.05, 0.7, -2.5];
        let t = paired_t(&other).expect("valid");
        let dm = diebold_mariano(&other).expect("valid");
        near(dm.statistic, t.t, 1e-12);
        assert!(dm.statistic < 0.0);
    }

    #[test]
    fn wilcoxon_on_darwin_fisher() {
        let r = wilcoxon_signed_rank(&DARWIN).expect("valid");
        // Source: Darwin–Fisher data, CHECKS.md: T− = 24, T+ = 96, exact two-sided p = 0.04126.
        assert_eq!(r.t_minus, 24.0);
        assert_eq!(r.t_plus, 96.0);
        assert_eq!(r.method, PMethod::Exact);
        assert!(!r.ties);
        near(r.p_two_sided, 0.04126, 5e-6);
        // One-sided is half of it here, because T+ lies in the upper tail.
        near(r.p_greater, r.p_two_sided / 2.0, 1e-15);
    }

    #[test]
    fn wilcoxon_counts_are_the_subset_sums() {
        // n = 3: subsets of {1,2,3} have sums 0,1,2,3,3,4,5,6 (enumerated by hand).
        assert_eq!(signed_rank_counts(3), vec![1, 1, 1, 2, 1, 1, 1]);
        // Total is 2^n.
        assert_eq!(signed_rank_counts(20).iter().sum::<u64>(), 1 << 20);
    }

    #[test]
    fn wilcoxon_drops_zeros_and_handles_ties() {
        // Zeros dropped: the result equals the test without them.
        let with_zeros = [0.0, 1.5, -0.5, 0.0, 2.5, 3.5];
        let r = wilcoxon_signed_rank(&with_zeros).expect("valid");
        assert_eq!(r.zeros_dropped, 2);
        assert_eq!(r.n, 4);
        assert_eq!(r.t_minus, 1.0);
        assert_eq!(r.t_plus, 9.0);
        // Ties: |d| = 1, 1, 2 share ranks 1.5, 1.5, 3; normal approximation.
        let tied = [1.0, -1.0, 2.0];
        let r = wilcoxon_signed_rank(&tied).expect("valid");
        assert!(r.ties);
        assert_eq!(r.method, PMethod::NormalApprox);
        assert_eq!(r.t_plus, 4.5);
        assert_eq!(r.t_minus, 1.5);
        // By hand: centre 3, variance 3·4·7/24 − (8 − 2)/48 = 3.375,
        // z = (4.5 − 3 − 0.5)/sqrt(3.375).
        let z = 1.0 / 3.375f64.sqrt();
        near(r.p_greater, normal_sf(z), 1e-15);
        near(r.p_two_sided, 2.0 * normal_sf(z), 1e-15);
        assert!(wilcoxon_signed_rank(&[0.0, 0.0]).is_err());
    }

    #[test]
    fn mcnemar_on_agresti_example() {
        let r = mcnemar(86, 150);
        // Source: Agresti's example (CHECKS.md): χ² = 16.818, p = 4.115e-05.
        near(r.statistic, 16.818, 5e-4);
        near(r.p, 4.115e-5, 5e-9);
        // No discordant rows, or equal counts: no evidence.
        assert_eq!(mcnemar(0, 0).p, 1.0);
        assert_eq!(mcnemar(7, 7).statistic, 0.0);
        assert_eq!(mcnemar(u64::MAX, u64::MAX).p, 1.0);
    }

    #[test]
    fn discordant_counts_from_outcomes() {
        let serving = [true, true, false, false, true];
        let candidate = [true, false, true, true, false];
        assert_eq!(discordant_counts(&serving, &candidate), Ok((2, 2)));
        assert!(discordant_counts(&serving, &candidate[..2]).is_err());
    }

    #[test]
    fn sign_flip_on_darwin_fisher() {
        let r = sign_flip(&DARWIN, 0, 0).expect("valid");
        assert_eq!(r.method, PMethod::Exact);
        // Source: Fisher's (1935) randomisation analysis of Darwin's data,
        // CHECKS.md: two-sided p = 1726/32768 = 0.052673.
        near(r.p_two_sided, 1726.0 / 32768.0, 1e-15);
        // The statistic's null distribution is symmetric, so one-sided is half.
        near(r.p_greater, 863.0 / 32768.0, 1e-15);
    }

    #[test]
    fn sign_flip_monte_carlo_is_seeded_and_close_to_exact() {
        // 22 rows: above the exact limit. Compare with an exact enumeration
        // written out here (2^22 sums is cheap enough).
        let d: Vec<f64> = DARWIN.iter().chain(&DARWIN[..7]).copied().collect();
        let a = sign_flip(&d, 20_000, 7).expect("valid");
        let b = sign_flip(&d, 20_000, 7).expect("valid");
        assert_eq!(a, b, "same seed, same answer");
        assert_eq!(a.method, PMethod::MonteCarlo { draws: 20_000 });
        let observed: f64 = d.iter().sum();
        let mut hits = 0u64;
        for mask in 0u32..(1 << d.len()) {
            let s: f64 = d
                .iter()
                .enumerate()
                .map(|(i, x)| if mask >> i & 1 == 1 { -x } else { *x })
                .sum();
            if s.abs() >= observed.abs() - 1e-9 {
                hits += 1;
            }
        }
        let exact = hits as f64 / f64::from(1u32 << d.len());
        // Monte Carlo standard error at p ≈ 0.01 with 20 000 draws is ≈ 0.0007.
        near(a.p_two_sided, exact, 0.003);
        assert!(sign_flip(&d, 0, 7).is_err());
    }

    #[test]
    fn paired_t_edges() {
        assert!(paired_t(&[1.0]).is_err());
        assert!(paired_t(&[1.0, f64::NAN]).is_err());
        let same = paired_t(&[0.5, 0.5, 0.5]).expect("valid");
        assert_eq!(
            (same.t, same.p_greater, same.p_two_sided),
            (f64::INFINITY, 0.0, 0.0)
        );
        let zero = paired_t(&[0.0, 0.0]).expect("valid");
        assert_eq!((zero.t, zero.p_greater, zero.p_two_sided), (0.0, 0.5, 1.0));
        assert!(differences(&[1.0, 2.0], &[1.0]).is_err());
        assert!(differences(&[f64::MAX], &[-f64::MAX]).is_err());
    }

    #[test]
    fn welch_equals_student_for_equal_sizes_and_matches_statrs() {
        // With equal sizes the Welch statistic equals the pooled Student t
        // (algebraic identity: s²/n + s²/n both ways); its df lie between
        // min(n)−1 and n_a+n_b−2 (Welch–Satterthwaite bounds).
        let a = [5.1, 4.9, 6.2, 5.8, 6.0, 5.5, 5.3, 6.1];
        let b = [4.2, 4.8, 3.9, 4.5, 5.0, 4.1, 4.6, 4.4];
        let w = welch_t(&a, &b).unwrap();
        let n = a.len() as f64;
        let var = |v: &[f64]| {
            let m = mean(v);
            v.iter().map(|x| (x - m) * (x - m)).sum::<f64>() / (n - 1.0)
        };
        let pooled = ((var(&a) + var(&b)) / 2.0 * (2.0 / n)).sqrt();
        let student = (mean(&a) - mean(&b)) / pooled;
        assert!((w.t - student).abs() < 1e-12, "{} vs {student}", w.t);
        assert!(w.df >= n - 1.0 && w.df <= 2.0 * n - 2.0, "{}", w.df);
        // The one-sided p from the t distribution, against statrs.
        use statrs::distribution::{ContinuousCDF, StudentsT};
        let reference = 1.0 - StudentsT::new(0.0, 1.0, w.df).unwrap().cdf(w.t);
        assert!(
            (w.p_greater - reference).abs() < 1e-10,
            "{} vs {reference}",
            w.p_greater
        );
        // Swapping the samples flips the sign.
        let back = welch_t(&b, &a).unwrap();
        assert!((back.t + w.t).abs() < 1e-12 && back.p_greater > 0.99);
        assert!(welch_t(&a, &[1.0]).is_err());
        assert!(welch_t(&a, &[1.0, f64::NAN]).is_err());
    }
}
