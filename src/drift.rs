//! Per-batch drift statistics: how far a new batch of one column has moved
//! away from the reference data the serving model was trained on.
//!
//! * Number columns: the two-sample Kolmogorov–Smirnov test ([`ks_two_sample`])
//!   and the Population Stability Index over reference-quantile bins
//!   ([`psi_samples`], [`psi_from_shares`]).
//! * Category columns: the chi-square test of homogeneity
//!   ([`chi_square_homogeneity`]) and the share of batch rows whose category
//!   the reference never saw ([`category_drift`]).
//! * [`ColumnDrift`] holds one column's result and, with [`Thresholds`], says
//!   whether it should be flagged and why.
//!
//! Pure: no I/O, no allocation beyond sorted copies and small vectors. Bad
//! input (empty samples, non-finite values, ragged tables, share vectors
//! that do not sum to one) gives a [`DriftError`], never a panic.

use std::collections::BTreeMap;
use std::f64::consts::PI;

use serde::{Deserialize, Serialize};

/// Why a drift statistic could not be computed.
#[derive(Debug, Clone, PartialEq, thiserror::Error)]
pub enum DriftError {
    #[error("the {which} sample is empty")]
    EmptySample { which: &'static str },
    #[error("the {which} sample holds a non-finite value ({value}) at index {index}")]
    NonFinite {
        which: &'static str,
        index: usize,
        value: f64,
    },
    #[error("significance level must lie strictly between 0 and 1, got {0}")]
    BadAlpha(f64),
    #[error("the number of bins must be at least 1")]
    NoBins,
    #[error("share vectors differ in length: reference {reference}, new {new}")]
    LengthMismatch { reference: usize, new: usize },
    #[error("{which} share {index} is {value}; shares must be finite and in [0, 1]")]
    BadShare {
        which: &'static str,
        index: usize,
        value: f64,
    },
    #[error("{which} shares sum to {sum}, not 1")]
    SharesNotNormalised { which: &'static str, sum: f64 },
    #[error("a contingency table needs at least 2 rows (samples), got {0}")]
    TooFewRows(usize),
    #[error("contingency table row {row} has {got} columns, row 0 has {expected}")]
    RaggedTable {
        row: usize,
        got: usize,
        expected: usize,
    },
    #[error("contingency table row {0} has no counts")]
    EmptyRow(usize),
    #[error("threshold {name} is {value}, outside its allowed range")]
    BadThreshold { name: &'static str, value: f64 },
}

/// Checks that a sample is non-empty and fully finite.
fn check_sample(which: &'static str, xs: &[f64]) -> Result<(), DriftError> {
    if xs.is_empty() {
        return Err(DriftError::EmptySample { which });
    }
    if let Some((index, &value)) = xs.iter().enumerate().find(|(_, v)| !v.is_finite()) {
        return Err(DriftError::NonFinite {
            which,
            index,
            value,
        });
    }
    Ok(())
}

fn check_alpha(alpha: f64) -> Result<(), DriftError> {
    if alpha > 0.0 && alpha < 1.0 {
        Ok(())
    } else {
        Err(DriftError::BadAlpha(alpha))
    }
}

fn sorted_copy(xs: &[f64]) -> Vec<f64> {
    let mut v = xs.to_vec();
    v.sort_unstable_by(f64::total_cmp);
    v
}

// ---------------------------------------------------------------------------
// Kolmogorov–Smirnov
// ---------------------------------------------------------------------------

/// Result of a two-sample Kolmogorov–Smirnov test.
#[derive(Debug, Clone, PartialEq, Serialize, Deserialize)]
pub struct Ks {
    /// Largest absolute gap between the two empirical distribution functions,
    /// in [0, 1].
    pub d: f64,
    /// Size of the first (reference) sample.
    pub n: usize,
    /// Size of the second (batch) sample.
    pub m: usize,
    /// Asymptotic p-value: the Kolmogorov distribution's upper tail at
    /// λ = (√nₑ + 0.12 + 0.11/√nₑ)·D with effective size nₑ = n·m/(n+m).
    /// The small-sample adjustment of λ makes the asymptotic tail usable
    /// from nₑ of about 4 up; below that it is rough.
    pub p_value: f64,
}

impl Ks {
    /// Critical value of D at level `alpha` for this test's sample sizes:
    /// c(α)·√((n+m)/(n·m)). See [`ks_critical_value`].
    pub fn critical_value(&self, alpha: f64) -> Result<f64, DriftError> {
        ks_critical_value(self.n, self.m, alpha)
    }

    /// True when D exceeds the critical value at level `alpha`.
    pub fn rejects_at(&self, alpha: f64) -> Result<bool, DriftError> {
        Ok(self.d > self.critical_value(alpha)?)
    }
}

/// The coefficient c(α) = √(−ln(α/2)/2) of the two-sample KS critical value.
pub fn ks_c_alpha(alpha: f64) -> Result<f64, DriftError> {
    check_alpha(alpha)?;
    Ok((-(alpha / 2.0).ln() / 2.0).sqrt())
}

/// Large-sample critical value of the two-sample KS statistic:
/// reject equality of distributions at level `alpha` when
/// D > c(α)·√((n+m)/(n·m)).
pub fn ks_critical_value(n: usize, m: usize, alpha: f64) -> Result<f64, DriftError> {
    if n == 0 {
        return Err(DriftError::EmptySample { which: "first" });
    }
    if m == 0 {
        return Err(DriftError::EmptySample { which: "second" });
    }
    let (n, m) = (n as f64, m as f64);
    Ok(ks_c_alpha(alpha)? * ((n + m) / (n * m)).sqrt())
}

/// Two-sample Kolmogorov–Smirnov test of `a` (reference) against `b` (batch).
///
/// D is found by walking both sorted copies together; at a value that occurs
/// in either sample both empirical distribution functions step past every
/// copy of it before the gap is measured, so ties within or across samples
/// are handled exactly. The gap is kept as the integer |i·m − j·n| and
/// divided by n·m once, so D is exact up to that one division.
/// Cost O((n+m)·log(n+m)) time and O(n+m) extra memory.
///
/// Errors: an empty sample or a non-finite value (NaN, ±∞) in either one.
pub fn ks_two_sample(a: &[f64], b: &[f64]) -> Result<Ks, DriftError> {
    check_sample("first", a)?;
    check_sample("second", b)?;
    let a = sorted_copy(a);
    let b = sorted_copy(b);
    let (n, m) = (a.len(), b.len());
    let (n128, m128) = (n as u128, m as u128);
    let (mut i, mut j) = (0usize, 0usize);
    let mut widest: u128 = 0;
    while i < n && j < m {
        let v = if a[i] <= b[j] { a[i] } else { b[j] };
        // `<=` against the current value: on sorted data this steps past
        // every element equal to `v` (including -0.0 next to 0.0).
        while i < n && a[i] <= v {
            i += 1;
        }
        while j < m && b[j] <= v {
            j += 1;
        }
        let gap = (i as u128 * m128).abs_diff(j as u128 * n128);
        widest = widest.max(gap);
    }
    // Once one sample is used up its ECDF is 1 and the other one only climbs
    // towards 1, so the gap can only shrink from here.
    let d = widest as f64 / (n128 * m128) as f64;
    let p_value = ks_p_value(d, n, m);
    Ok(Ks { d, n, m, p_value })
}

/// Asymptotic p-value of D for sample sizes n and m (see [`Ks::p_value`]).
fn ks_p_value(d: f64, n: usize, m: usize) -> f64 {
    let (nf, mf) = (n as f64, m as f64);
    let root = (nf * mf / (nf + mf)).sqrt();
    kolmogorov_sf((root + 0.12 + 0.11 / root) * d)
}

/// Below this λ the theta-function form of the Kolmogorov distribution
/// converges fastest, above it the alternating series does.
const KOLMOGOROV_SWITCH: f64 = 1.18;

/// Upper tail P(K > λ) of the Kolmogorov distribution, clamped to [0, 1].
/// λ ≤ 0 (or NaN) gives 1.
fn kolmogorov_sf(lambda: f64) -> f64 {
    if lambda.is_nan() || lambda <= 0.0 {
        return 1.0;
    }
    let p = if lambda < KOLMOGOROV_SWITCH {
        1.0 - kolmogorov_cdf_theta(lambda)
    } else {
        kolmogorov_sf_alternating(lambda)
    };
    p.clamp(0.0, 1.0)
}

/// P(K ≤ λ) = √(2π)/λ · Σ_{k≥1} exp(−(2k−1)²π²/(8λ²)); converges fast for
/// small λ.
fn kolmogorov_cdf_theta(lambda: f64) -> f64 {
    let q = -PI * PI / (8.0 * lambda * lambda);
    let mut sum = 0.0;
    for k in 1..=100u32 {
        let odd = f64::from(2 * k - 1);
        let term = (odd * odd * q).exp();
        sum += term;
        if term <= 1e-17 * sum {
            break;
        }
    }
    (2.0 * PI).sqrt() / lambda * sum
}

/// P(K > λ) = 2·Σ_{k≥1} (−1)^(k−1) exp(−2k²λ²); converges fast for large λ.
fn kolmogorov_sf_alternating(lambda: f64) -> f64 {
    let l2 = lambda * lambda;
    let mut sum = 0.0;
    let mut sign = 1.0;
    for k in 1..=100u32 {
        let kf = f64::from(k);
        let term = (-2.0 * kf * kf * l2).exp();
        sum += sign * term;
        if term <= 1e-17 * sum.abs() || term == 0.0 {
            break;
        }
        sign = -sign;
    }
    2.0 * sum
}

// ---------------------------------------------------------------------------
// Population Stability Index
// ---------------------------------------------------------------------------

/// Every share is raised to at least this before the PSI terms are formed,
/// so a bin that is empty in one sample gives a large but finite term
/// instead of infinity. The value is common practice, no source.
pub const PSI_SHARE_FLOOR: f64 = 1e-4;

/// Default number of reference-quantile bins for [`psi_samples`]
/// (common practice, no source).
pub const PSI_DEFAULT_BINS: usize = 10;

/// Shares passed to [`psi_from_shares`] must sum to 1 within this.
const SHARE_SUM_TOLERANCE: f64 = 1e-6;

/// Population Stability Index of a batch against reference bins.
#[derive(Debug, Clone, PartialEq, Serialize, Deserialize)]
pub struct Psi {
    /// Σ (p_new − p_ref)·ln(p_new / p_ref) over the bins, with shares floored
    /// at [`PSI_SHARE_FLOOR`]. Always ≥ 0.
    pub value: f64,
    /// Interior cut points, strictly increasing. Bin 0 is (−∞, e₀], bin k is
    /// (e_{k−1}, e_k], the last bin is (e_last, +∞); so there is one more
    /// bin than edges.
    pub edges: Vec<f64>,
    /// Share of the reference sample in each bin (before flooring).
    pub reference_shares: Vec<f64>,
    /// Share of the new sample in each bin (before flooring).
    pub new_shares: Vec<f64>,
}

impl Psi {
    /// Band of this PSI value under `t` (see [`PsiBand::classify`]).
    pub fn band(&self, t: &Thresholds) -> PsiBand {
        PsiBand::classify(self.value, t.psi_warn, t.psi_alert)
    }
}

/// How much a column's distribution has moved by PSI. The usual cut points
/// are 0.1 and 0.25 (common practice, no source).
#[derive(Debug, Clone, Copy, PartialEq, Eq, Serialize, Deserialize)]
pub enum PsiBand {
    /// PSI below the warning level.
    Stable,
    /// PSI at or above the warning level but below the alert level.
    Moderate,
    /// PSI at or above the alert level.
    Major,
}

impl PsiBand {
    /// Stable below `warn`, Moderate in [`warn`, `alert`), Major from
    /// `alert` up. A NaN value falls in Stable (no comparison holds).
    pub fn classify(psi: f64, warn: f64, alert: f64) -> PsiBand {
        if psi >= alert {
            PsiBand::Major
        } else if psi >= warn {
            PsiBand::Moderate
        } else {
            PsiBand::Stable
        }
    }

    pub fn as_str(self) -> &'static str {
        match self {
            PsiBand::Stable => "stable",
            PsiBand::Moderate => "moderate shift",
            PsiBand::Major => "major shift",
        }
    }
}

fn check_shares(which: &'static str, shares: &[f64]) -> Result<(), DriftError> {
    if let Some((index, &value)) = shares
        .iter()
        .enumerate()
        .find(|(_, v)| !(v.is_finite() && **v >= 0.0 && **v <= 1.0))
    {
        return Err(DriftError::BadShare {
            which,
            index,
            value,
        });
    }
    let sum: f64 = shares.iter().sum();
    if (sum - 1.0).abs() > SHARE_SUM_TOLERANCE {
        return Err(DriftError::SharesNotNormalised { which, sum });
    }
    Ok(())
}

/// PSI = Σ (p_new − p_ref)·ln(p_new / p_ref) over matching bins, each share
/// first raised to at least [`PSI_SHARE_FLOOR`].
///
/// Both slices must have the same non-zero length, hold finite shares in
/// [0, 1] and each sum to 1 (within 1e-6); otherwise an error. Each term is
/// ≥ 0, so the result is ≥ 0, and exactly 0 for identical shares.
pub fn psi_from_shares(reference: &[f64], new: &[f64]) -> Result<f64, DriftError> {
    if reference.len() != new.len() {
        return Err(DriftError::LengthMismatch {
            reference: reference.len(),
            new: new.len(),
        });
    }
    if reference.is_empty() {
        return Err(DriftError::EmptySample { which: "reference" });
    }
    check_shares("reference", reference)?;
    check_shares("new", new)?;
    Ok(reference
        .iter()
        .zip(new)
        .map(|(&r, &q)| {
            let r = r.max(PSI_SHARE_FLOOR);
            let q = q.max(PSI_SHARE_FLOOR);
            (q - r) * (q / r).ln()
        })
        .sum())
}

/// Cut points for `bins` reference-quantile bins: for k = 1..bins−1 the
/// k/bins quantile of the sorted reference, taken as the smallest sample
/// value with at least k/bins of the sample at or below it (no
/// interpolation, so every edge is a value the reference holds). Equal edges,
/// which discrete data gives, are merged.
///
/// When `bins` exceeds the sample size the ranks ceil(k·n/bins) step by less
/// than 1 and run from 1 to n, so every sample value is an edge; that case
/// is taken directly, keeping the cost O(n) however large `bins` is.
fn quantile_edges(sorted: &[f64], bins: usize) -> Vec<f64> {
    let n = sorted.len();
    let mut edges: Vec<f64> = Vec::with_capacity(bins.min(n + 1).saturating_sub(1));
    let mut push = |edge: f64| {
        if edges.last().is_none_or(|&last| edge > last) {
            edges.push(edge);
        }
    };
    if bins > n {
        sorted.iter().for_each(|&v| push(v));
    } else {
        for k in 1..bins {
            // ceil(k·n / bins) ≥ 1 because k ≥ 1 and n ≥ 1.
            let rank = (k as u128 * n as u128).div_ceil(bins as u128);
            push(sorted[(rank - 1) as usize]);
        }
    }
    edges
}

/// Share of `sorted` in each bin cut by `edges` (see [`Psi::edges`]).
fn bin_shares(sorted: &[f64], edges: &[f64]) -> Vec<f64> {
    let total = sorted.len() as f64;
    let mut shares = Vec::with_capacity(edges.len() + 1);
    let mut below = 0usize;
    for &e in edges {
        let upto = sorted.partition_point(|&x| x <= e);
        shares.push((upto - below) as f64 / total);
        below = upto;
    }
    shares.push((sorted.len() - below) as f64 / total);
    shares
}

/// PSI of `new` against `reference` over `bins` reference-quantile bins
/// (use [`PSI_DEFAULT_BINS`] unless there is a reason not to).
///
/// Edges come from the reference sample's quantiles; equal edges are merged,
/// so a discrete column gets fewer bins. Bins are closed on the right, so a
/// value equal to an edge counts in the bin below it. `bins = 1` gives a
/// single bin and PSI 0.
///
/// Errors: `bins = 0`, an empty sample, or a non-finite value.
pub fn psi_samples(reference: &[f64], new: &[f64], bins: usize) -> Result<Psi, DriftError> {
    if bins == 0 {
        return Err(DriftError::NoBins);
    }
    check_sample("reference", reference)?;
    check_sample("new", new)?;
    let reference = sorted_copy(reference);
    let new = sorted_copy(new);
    let edges = quantile_edges(&reference, bins);
    let reference_shares = bin_shares(&reference, &edges);
    let new_shares = bin_shares(&new, &edges);
    let value = psi_from_shares(&reference_shares, &new_shares)?;
    Ok(Psi {
        value,
        edges,
        reference_shares,
        new_shares,
    })
}

// ---------------------------------------------------------------------------
// Chi-square homogeneity
// ---------------------------------------------------------------------------

/// Result of a chi-square test that several samples share one category
/// distribution.
#[derive(Debug, Clone, PartialEq, Serialize, Deserialize)]
pub struct ChiSquare {
    /// Σ (observed − expected)² / expected over the kept cells; ≥ 0.
    pub statistic: f64,
    /// (rows − 1)·(kept columns − 1).
    pub df: usize,
    /// Upper tail of the chi-square distribution with `df` degrees of
    /// freedom at `statistic`; 1 when `df` is 0.
    pub p_value: f64,
    /// Number of categories left after all-zero columns were dropped.
    pub categories: usize,
}

/// Chi-square test of homogeneity. `table[r][c]` is the count of category
/// `c` in sample `r`; every row must have the same length.
///
/// Columns that are zero in every row are dropped first. If at most one
/// category is left there is nothing to compare: the neutral result
/// statistic 0, df 0, p-value 1 is returned.
///
/// Errors: fewer than 2 rows, rows of different lengths, or a row whose
/// counts are all zero (an empty sample).
pub fn chi_square_homogeneity(table: &[Vec<u64>]) -> Result<ChiSquare, DriftError> {
    if table.len() < 2 {
        return Err(DriftError::TooFewRows(table.len()));
    }
    let width = table[0].len();
    for (row, counts) in table.iter().enumerate() {
        if counts.len() != width {
            return Err(DriftError::RaggedTable {
                row,
                got: counts.len(),
                expected: width,
            });
        }
    }
    // Totals in f64: exact up to 2^53 counts, far past any batch we see.
    let row_totals: Vec<f64> = table
        .iter()
        .map(|r| r.iter().map(|&c| c as f64).sum())
        .collect();
    if let Some(row) = row_totals.iter().position(|&t| t == 0.0) {
        return Err(DriftError::EmptyRow(row));
    }
    let col_totals: Vec<f64> = (0..width)
        .map(|c| table.iter().map(|r| r[c] as f64).sum())
        .collect();
    let kept: Vec<usize> = (0..width).filter(|&c| col_totals[c] > 0.0).collect();
    if kept.len() < 2 {
        return Ok(ChiSquare {
            statistic: 0.0,
            df: 0,
            p_value: 1.0,
            categories: kept.len(),
        });
    }
    let grand: f64 = row_totals.iter().sum();
    let mut statistic = 0.0;
    for (counts, &rt) in table.iter().zip(&row_totals) {
        for &c in &kept {
            let expected = rt * col_totals[c] / grand;
            let diff = counts[c] as f64 - expected;
            statistic += diff * diff / expected;
        }
    }
    let df = (table.len() - 1) * (kept.len() - 1);
    Ok(ChiSquare {
        statistic,
        df,
        p_value: chi_square_sf(statistic, df),
        categories: kept.len(),
    })
}

/// Upper tail of the chi-square distribution; 1 for df 0 or x ≤ 0.
fn chi_square_sf(x: f64, df: usize) -> f64 {
    if df == 0 || x.is_nan() || x <= 0.0 {
        return 1.0;
    }
    crate::gate::dist::chi2_sf(x, df as f64).clamp(0.0, 1.0)
}

/// Drift of one category column: the homogeneity test of the batch against
/// the reference, and how much of the batch falls in unseen categories.
#[derive(Debug, Clone, PartialEq, Serialize, Deserialize)]
pub struct CategoryDrift {
    pub chi: ChiSquare,
    /// Share of the batch's rows whose category has no count in the
    /// reference, in [0, 1].
    pub unseen_share: f64,
    /// Number of distinct categories in the batch that the reference lacks.
    pub unseen_categories: usize,
}

/// Compares a batch's category counts with the reference's, over the union
/// of their categories (a category with count 0 counts as absent).
///
/// Errors: either side has no counts at all.
pub fn category_drift<K: Ord>(
    reference: &BTreeMap<K, u64>,
    batch: &BTreeMap<K, u64>,
) -> Result<CategoryDrift, DriftError> {
    let mut union: BTreeMap<&K, [u64; 2]> = BTreeMap::new();
    for (k, &c) in reference {
        union.entry(k).or_default()[0] += c;
    }
    for (k, &c) in batch {
        union.entry(k).or_default()[1] += c;
    }
    let mut ref_row = Vec::with_capacity(union.len());
    let mut batch_row = Vec::with_capacity(union.len());
    let (mut unseen_rows, mut unseen_categories, mut batch_total) = (0u64, 0usize, 0u64);
    for [r, b] in union.into_values() {
        ref_row.push(r);
        batch_row.push(b);
        batch_total = batch_total.saturating_add(b);
        if r == 0 && b > 0 {
            unseen_rows = unseen_rows.saturating_add(b);
            unseen_categories += 1;
        }
    }
    if ref_row.iter().all(|&c| c == 0) {
        return Err(DriftError::EmptySample { which: "reference" });
    }
    if batch_total == 0 {
        return Err(DriftError::EmptySample { which: "batch" });
    }
    let chi = chi_square_homogeneity(&[ref_row, batch_row])?;
    Ok(CategoryDrift {
        chi,
        unseen_share: unseen_rows as f64 / batch_total as f64,
        unseen_categories,
    })
}

// ---------------------------------------------------------------------------
// Per-column summary
// ---------------------------------------------------------------------------

/// Levels at which a column's drift is flagged.
#[derive(Debug, Clone, PartialEq, Serialize, Deserialize)]
pub struct Thresholds {
    /// Flag a number column when the KS p-value is below this.
    pub ks_alpha: f64,
    /// PSI from here up is reported as a moderate shift (not flagged alone).
    pub psi_warn: f64,
    /// Flag a number column when PSI reaches this.
    pub psi_alert: f64,
    /// Flag a category column when the chi-square p-value is below this.
    pub chi_alpha: f64,
    /// Flag a category column when more than this share of the batch is in
    /// categories the reference never saw.
    pub unseen_share: f64,
}

impl Default for Thresholds {
    /// KS and chi-square at 1%, PSI 0.1 / 0.25, unseen share 5%
    /// (all common practice, no source).
    fn default() -> Self {
        Thresholds {
            ks_alpha: 0.01,
            psi_warn: 0.1,
            psi_alert: 0.25,
            chi_alpha: 0.01,
            unseen_share: 0.05,
        }
    }
}

impl Thresholds {
    /// Checks the levels: alphas in (0, 1), 0 ≤ psi_warn ≤ psi_alert (finite),
    /// unseen_share in [0, 1].
    pub fn validate(&self) -> Result<(), DriftError> {
        let bad = |name, value| Err(DriftError::BadThreshold { name, value });
        if !(self.ks_alpha > 0.0 && self.ks_alpha < 1.0) {
            return bad("ks_alpha", self.ks_alpha);
        }
        if !(self.chi_alpha > 0.0 && self.chi_alpha < 1.0) {
            return bad("chi_alpha", self.chi_alpha);
        }
        if !(self.psi_warn.is_finite() && self.psi_warn >= 0.0) {
            return bad("psi_warn", self.psi_warn);
        }
        if !(self.psi_alert.is_finite() && self.psi_alert >= self.psi_warn) {
            return bad("psi_alert", self.psi_alert);
        }
        if !(self.unseen_share >= 0.0 && self.unseen_share <= 1.0) {
            return bad("unseen_share", self.unseen_share);
        }
        Ok(())
    }
}

/// Drift of one column of a batch against the reference.
#[derive(Debug, Clone, PartialEq, Serialize, Deserialize)]
pub enum ColumnDrift {
    Numeric { ks: Ks, psi: Psi },
    Category { chi: ChiSquare, unseen_share: f64 },
}

impl ColumnDrift {
    /// KS test and PSI (over `bins` reference-quantile bins) of a number
    /// column. Missing values must be removed by the caller.
    pub fn numeric(reference: &[f64], batch: &[f64], bins: usize) -> Result<Self, DriftError> {
        Ok(ColumnDrift::Numeric {
            ks: ks_two_sample(reference, batch)?,
            psi: psi_samples(reference, batch, bins)?,
        })
    }

    /// Homogeneity test and unseen share of a category column.
    pub fn category<K: Ord>(
        reference: &BTreeMap<K, u64>,
        batch: &BTreeMap<K, u64>,
    ) -> Result<Self, DriftError> {
        let c = category_drift(reference, batch)?;
        Ok(ColumnDrift::Category {
            chi: c.chi,
            unseen_share: c.unseen_share,
        })
    }

    /// True when the column has drifted past `t`: for a number column the KS
    /// p-value is below `ks_alpha` or PSI is at least `psi_alert`; for a
    /// category column the chi-square p-value is below `chi_alpha` or the
    /// unseen share is above `unseen_share`.
    pub fn flagged(&self, t: &Thresholds) -> bool {
        match self {
            ColumnDrift::Numeric { ks, psi } => {
                ks.p_value < t.ks_alpha || psi.band(t) == PsiBand::Major
            }
            ColumnDrift::Category { chi, unseen_share } => {
                chi.p_value < t.chi_alpha || *unseen_share > t.unseen_share
            }
        }
    }

    /// One line in words: what was measured and which levels were crossed.
    pub fn reason(&self, t: &Thresholds) -> String {
        let verdict = if self.flagged(t) { "drift" } else { "no drift" };
        match self {
            ColumnDrift::Numeric { ks, psi } => {
                let ks_part = if ks.p_value < t.ks_alpha {
                    format!(
                        "KS D = {:.4}, p = {:.3e} below {}",
                        ks.d, ks.p_value, t.ks_alpha
                    )
                } else {
                    format!("KS D = {:.4}, p = {:.3e}", ks.d, ks.p_value)
                };
                format!(
                    "{verdict}: {ks_part}; PSI {:.4} ({})",
                    psi.value,
                    psi.band(t).as_str()
                )
            }
            ColumnDrift::Category { chi, unseen_share } => {
                let chi_part = if chi.p_value < t.chi_alpha {
                    format!(
                        "chi-square {:.3} on {} df, p = {:.3e} below {}",
                        chi.statistic, chi.df, chi.p_value, t.chi_alpha
                    )
                } else {
                    format!(
                        "chi-square {:.3} on {} df, p = {:.3e}",
                        chi.statistic, chi.df, chi.p_value
                    )
                };
                let unseen_part = if *unseen_share > t.unseen_share {
                    format!(
                        "{:.1}% of rows in unseen categories, above {:.1}%",
                        100.0 * unseen_share,
                        100.0 * t.unseen_share
                    )
                } else {
                    format!("{:.1}% of rows in unseen categories", 100.0 * unseen_share)
                };
                format!("{verdict}: {chi_part}; {unseen_part}")
            }
        }
    }
}

// ---------------------------------------------------------------------------
// Report for one batch
// ---------------------------------------------------------------------------

/// One column's drift as kept in the batch's audit entry: the numbers that
/// matter, all finite (a statistic that could not be computed is absent and
/// the reason says why).
#[derive(Debug, Clone, PartialEq, Serialize, Deserialize)]
pub struct ColumnReport {
    pub column: String,
    /// "number" or "category".
    pub kind: String,
    pub target: bool,
    /// KS D for a number column, the chi-square statistic for a category one.
    pub statistic: Option<f64>,
    pub p: Option<f64>,
    /// KS critical value of D at `ks_alpha`.
    #[serde(default, skip_serializing_if = "Option::is_none")]
    pub critical: Option<f64>,
    #[serde(default, skip_serializing_if = "Option::is_none")]
    pub psi: Option<f64>,
    #[serde(default, skip_serializing_if = "Option::is_none")]
    pub unseen_share: Option<f64>,
    pub flagged: bool,
    pub reason: String,
}

/// Drift of a whole batch against the stored training rows.
#[derive(Debug, Clone, PartialEq, Serialize, Deserialize)]
pub struct BatchReport {
    /// Stored training rows compared against (after thinning).
    pub reference_rows: usize,
    pub columns: Vec<ColumnReport>,
}

impl BatchReport {
    /// Names of the flagged columns.
    pub fn flagged(&self) -> Vec<&str> {
        self.columns
            .iter()
            .filter(|c| c.flagged)
            .map(|c| c.column.as_str())
            .collect()
    }
}

fn finite(x: f64) -> Option<f64> {
    x.is_finite().then_some(x)
}

/// Compares every column of `batch` (inputs and target) with `reference`.
/// Missing cells are left out of both sides. `None` when there is no
/// reference row yet.
pub fn batch_report(
    schema: &crate::schema::Schema,
    vocabs: &crate::schema::Vocabularies,
    reference: &crate::schema::RowMatrix,
    batch: &crate::schema::RowMatrix,
    t: &Thresholds,
) -> Option<BatchReport> {
    use crate::config::ColumnKind;
    if reference.n_rows() == 0 || batch.n_rows() == 0 {
        return None;
    }
    let mut columns = Vec::new();
    for (ci, col) in schema.columns.iter().enumerate() {
        let mut report = ColumnReport {
            column: col.name.clone(),
            kind: match col.kind {
                ColumnKind::Number => "number",
                ColumnKind::Category => "category",
            }
            .into(),
            target: ci == schema.target,
            statistic: None,
            p: None,
            critical: None,
            psi: None,
            unseen_share: None,
            flagged: false,
            reason: String::new(),
        };
        let found = match col.kind {
            ColumnKind::Number => {
                let values = |m: &crate::schema::RowMatrix| -> Vec<f64> {
                    (0..m.n_rows())
                        .filter_map(|r| m.number(r, ci))
                        .map(f64::from)
                        .collect()
                };
                ColumnDrift::numeric(&values(reference), &values(batch), PSI_DEFAULT_BINS)
            }
            ColumnKind::Category => {
                let counts = |m: &crate::schema::RowMatrix| {
                    let mut c: BTreeMap<String, u64> = BTreeMap::new();
                    for r in 0..m.n_rows() {
                        if let Some(code) = m.code(r, ci) {
                            let name = vocabs
                                .get(&ci)
                                .and_then(|v| v.value(code))
                                .map_or_else(|| format!("#{code}"), str::to_string);
                            *c.entry(name).or_default() += 1;
                        }
                    }
                    c
                };
                ColumnDrift::category(&counts(reference), &counts(batch))
            }
        };
        match found {
            Ok(d) => {
                report.flagged = d.flagged(t);
                report.reason = d.reason(t);
                match &d {
                    ColumnDrift::Numeric { ks, psi } => {
                        report.statistic = finite(ks.d);
                        report.p = finite(ks.p_value);
                        report.critical = ks.critical_value(t.ks_alpha).ok().and_then(finite);
                        report.psi = finite(psi.value);
                    }
                    ColumnDrift::Category { chi, unseen_share } => {
                        report.statistic = finite(chi.statistic);
                        report.p = finite(chi.p_value);
                        report.unseen_share = finite(*unseen_share);
                    }
                }
            }
            Err(e) => report.reason = format!("not computed: {e}"),
        }
        columns.push(report);
    }
    Some(BatchReport {
        reference_rows: reference.n_rows(),
        columns,
    })
}

/// Every `k`-th row so that at most `max` remain (all rows when fewer).
pub fn thin(rows: &crate::schema::RowMatrix, max: usize) -> crate::schema::RowMatrix {
    let n = rows.n_rows();
    if n <= max || max == 0 {
        return rows.clone();
    }
    let picked: Vec<usize> = (0..max).map(|i| i * n / max).collect();
    rows.select(&picked)
}

#[cfg(test)]
mod tests {
    use super::*;
    use proptest::prelude::*;

    fn close(a: f64, b: f64, tol: f64) -> bool {
        (a - b).abs() <= tol
    }

    // --- KS ---------------------------------------------------------------

    #[test]
    fn ks_c_alpha_matches_published_values() {
        // Source: two-sample KS critical value formula c(α) = sqrt(−ln(α/2)/2)
        // as tabulated in standard references (listed in shared CHECKS.md).
        assert!(close(ks_c_alpha(0.05).unwrap(), 1.35810, 5e-6));
        // Source: same formula and table, α = 0.01 (CHECKS.md).
        assert!(close(ks_c_alpha(0.01).unwrap(), 1.62762, 5e-6));
    }

    #[test]
    fn ks_critical_value_for_100_and_100() {
        // Source: c(0.05)·sqrt((n+m)/(n·m)) with n = m = 100, as tabulated in
        // standard references (CHECKS.md): 0.19206.
        assert!(close(
            ks_critical_value(100, 100, 0.05).unwrap(),
            0.19206,
            5e-6
        ));
        let ks = ks_two_sample(&[1.0; 100], &[2.0; 100]).unwrap();
        // Source: same published value, reached through the Ks method.
        assert!(close(ks.critical_value(0.05).unwrap(), 0.19206, 5e-6));
        assert!(ks.rejects_at(0.05).unwrap());
    }

    #[test]
    fn ks_bad_alpha_is_an_error() {
        for alpha in [0.0, 1.0, -0.1, 1.5, f64::NAN] {
            assert!(matches!(ks_c_alpha(alpha), Err(DriftError::BadAlpha(_))));
            assert!(ks_critical_value(10, 10, alpha).is_err());
        }
        assert!(ks_critical_value(0, 10, 0.05).is_err());
        assert!(ks_critical_value(10, 0, 0.05).is_err());
    }

    #[test]
    fn ks_d_with_ties_by_hand() {
        // a = [1,2,2,3], b = [2,3,3,4] (n = m = 4). ECDFs after each value:
        //   x = 1: Fa = 1/4, Fb = 0   -> gap 1/4
        //   x = 2: Fa = 3/4, Fb = 1/4 -> gap 1/2
        //   x = 3: Fa = 1,   Fb = 3/4 -> gap 1/4
        //   x = 4: Fa = 1,   Fb = 1   -> gap 0
        // D = 1/2. Stepping only `a` past the tie at 2 first would wrongly
        // see Fa = 3/4, Fb = 0, a gap of 3/4.
        let ks = ks_two_sample(&[3.0, 2.0, 1.0, 2.0], &[4.0, 3.0, 2.0, 3.0]).unwrap();
        assert_eq!(ks.d, 0.5);
        assert_eq!((ks.n, ks.m), (4, 4));

        // a = [1,1,2] (n = 3), b = [1,2,2,2,3] (m = 5):
        //   x = 1: Fa = 2/3, Fb = 1/5 -> gap 7/15
        //   x = 2: Fa = 1,   Fb = 4/5 -> gap 1/5
        //   x = 3: Fa = 1,   Fb = 1   -> gap 0
        // D = 7/15 (a naive walk would report 2/3 at the tie at 1).
        let ks = ks_two_sample(&[1.0, 2.0, 1.0], &[2.0, 1.0, 3.0, 2.0, 2.0]).unwrap();
        assert!(close(ks.d, 7.0 / 15.0, 1e-15), "{}", ks.d);
    }

    #[test]
    fn ks_negative_zero_ties_with_zero() {
        let ks = ks_two_sample(&[-0.0, 1.0], &[0.0, 1.0]).unwrap();
        assert_eq!(ks.d, 0.0);
    }

    #[test]
    fn ks_identical_and_disjoint_samples() {
        let a = [0.3, 1.2, -4.0, 2.2, 2.2, 7.5];
        let ks = ks_two_sample(&a, &a).unwrap();
        assert_eq!(ks.d, 0.0);
        assert_eq!(ks.p_value, 1.0);

        let b: Vec<f64> = a.iter().map(|x| x + 100.0).collect();
        assert_eq!(ks_two_sample(&a, &b).unwrap().d, 1.0);
        assert_eq!(ks_two_sample(&b, &a).unwrap().d, 1.0);
    }

    #[test]
    fn ks_rejects_bad_input() {
        assert!(matches!(
            ks_two_sample(&[], &[1.0]),
            Err(DriftError::EmptySample { which: "first" })
        ));
        assert!(matches!(
            ks_two_sample(&[1.0], &[]),
            Err(DriftError::EmptySample { which: "second" })
        ));
        assert!(matches!(
            ks_two_sample(&[1.0, f64::NAN], &[1.0]),
            Err(DriftError::NonFinite { index: 1, .. })
        ));
        assert!(ks_two_sample(&[1.0], &[f64::INFINITY]).is_err());
    }

    #[test]
    fn ks_large_inputs() {
        // a = 0..N, b = a shifted up by N/10: for every x the ECDF of a leads
        // that of b by exactly 1/10 until a runs out, so D = 0.1.
        let n = 400_000usize;
        let a: Vec<f64> = (0..n).map(|i| i as f64).collect();
        let b: Vec<f64> = (0..n).map(|i| (i + n / 10) as f64).collect();
        let ks = ks_two_sample(&a, &b).unwrap();
        assert!(close(ks.d, 0.1, 1e-12), "{}", ks.d);
        assert!(ks.p_value < 1e-100);
    }

    #[test]
    fn kolmogorov_tail_at_c_alpha_is_alpha() {
        // c(α) solves 2·exp(−2c²) = α, the leading term of the Kolmogorov
        // tail series; the next term, 2·exp(−8c²), is below 1e-6 here, so the
        // full tail at c(α) equals α to within 1e-5.
        for alpha in [0.05, 0.01] {
            let c = ks_c_alpha(alpha).unwrap();
            let p = kolmogorov_sf(c);
            assert!(close(p, alpha, 1e-5), "alpha {alpha}: tail {p}");
        }
    }

    #[test]
    fn kolmogorov_series_forms_agree() {
        // The two series are the same function (a theta-function identity);
        // near the switch point both converge well, so they must agree.
        for lambda in [0.8, 1.0, KOLMOGOROV_SWITCH, 1.4] {
            let theta = 1.0 - kolmogorov_cdf_theta(lambda);
            let alternating = kolmogorov_sf_alternating(lambda);
            assert!(
                close(theta, alternating, 1e-12),
                "λ {lambda}: {theta} vs {alternating}"
            );
        }
        assert_eq!(kolmogorov_sf(0.0), 1.0);
        assert_eq!(kolmogorov_sf(-1.0), 1.0);
        assert!(kolmogorov_sf(0.2) > 0.999_999);
        assert!(kolmogorov_sf(5.0) < 1e-20);
    }

    #[test]
    fn ks_p_value_falls_as_d_grows() {
        let mut last = 1.0;
        for k in 0..=100 {
            let p = ks_p_value(f64::from(k) / 100.0, 50, 70);
            assert!((0.0..=1.0).contains(&p));
            assert!(p <= last, "p rose at D = {}", f64::from(k) / 100.0);
            last = p;
        }
        assert!(last < 1e-10);
    }

    #[test]
    fn ks_p_value_agrees_with_critical_value_for_large_samples() {
        // With large n and m the effective-size adjustment is negligible, so
        // D just above the α critical value has p just below α (CHECKS.md
        // values feed the critical value).
        let (n, m) = (20_000, 30_000);
        let crit = ks_critical_value(n, m, 0.05).unwrap();
        assert!(ks_p_value(crit * 1.01, n, m) < 0.05);
        assert!(ks_p_value(crit * 0.99, n, m) > 0.05);
    }

    // --- PSI --------------------------------------------------------------

    #[test]
    fn psi_from_shares_published_value() {
        let reference = [0.1; 10];
        let new = [0.05, 0.05, 0.1, 0.1, 0.1, 0.1, 0.1, 0.1, 0.15, 0.15];
        let psi = psi_from_shares(&reference, &new).unwrap();
        // Source: direct computation from the PSI definition, 0.1·ln 3
        // (CHECKS.md): 0.1098612.
        assert!(close(psi, 0.1098612, 5e-8), "{psi}");
        assert!(close(psi, 0.1 * 3f64.ln(), 1e-12));
    }

    #[test]
    fn psi_samples_reaches_published_value_through_binning() {
        // Reference 1..=100: the k/10 quantiles are 10, 20, ..., 90 and each
        // right-closed bin holds exactly 10 values, shares 0.1 each.
        let reference: Vec<f64> = (1..=100).map(f64::from).collect();
        // 20 new values placed 1,1,2,2,2,2,2,2,3,3 per bin give shares
        // [.05,.05,.1×6,.15,.15].
        let per_bin = [1, 1, 2, 2, 2, 2, 2, 2, 3, 3];
        let new: Vec<f64> = per_bin
            .iter()
            .enumerate()
            .flat_map(|(bin, &count)| {
                // Upper edge of each bin: a value equal to an edge stays in
                // the bin below it.
                std::iter::repeat_n(10.0 * (bin as f64 + 1.0), count)
            })
            .collect();
        let psi = psi_samples(&reference, &new, 10).unwrap();
        assert_eq!(
            psi.edges,
            (1..=9).map(|k| 10.0 * f64::from(k)).collect::<Vec<_>>()
        );
        assert_eq!(psi.reference_shares, vec![0.1; 10]);
        // Source: direct computation from the PSI definition (CHECKS.md).
        assert!(close(psi.value, 0.1098612, 5e-8), "{}", psi.value);
        assert_eq!(psi.band(&Thresholds::default()), PsiBand::Moderate);
    }

    #[test]
    fn psi_discrete_reference_merges_edges() {
        // 80 zeros and 20 ones: the 0.1..0.8 quantiles are all 0, the 0.9
        // quantile is 1, so edges [0, 1] and bins (−∞,0], (0,1], (1,∞).
        let mut reference = vec![0.0; 80];
        reference.extend(std::iter::repeat_n(1.0, 20));
        let same = psi_samples(&reference, &reference, 10).unwrap();
        assert_eq!(same.edges, vec![0.0, 1.0]);
        assert_eq!(same.reference_shares, vec![0.8, 0.2, 0.0]);
        assert_eq!(same.value, 0.0);

        let mut half = vec![0.0; 50];
        half.extend(std::iter::repeat_n(1.0, 50));
        let moved = psi_samples(&reference, &half, 10).unwrap();
        // The PSI definition written out per bin; the third bin is empty on
        // both sides, so after flooring it contributes 0.
        let want = (0.5 - 0.8) * (0.5f64 / 0.8).ln() + (0.5 - 0.2) * (0.5f64 / 0.2).ln();
        assert!(close(moved.value, want, 1e-12), "{} vs {want}", moved.value);
        assert_eq!(moved.band(&Thresholds::default()), PsiBand::Major);
    }

    #[test]
    fn psi_empty_bin_is_finite() {
        let psi = psi_from_shares(&[0.5, 0.5, 0.0], &[0.0, 0.5, 0.5]).unwrap();
        assert!(psi.is_finite());
        let floor = PSI_SHARE_FLOOR;
        let term = (0.5 - floor) * (0.5 / floor).ln();
        assert!(close(psi, 2.0 * term, 1e-12));
    }

    #[test]
    fn psi_single_bin_and_constant_reference() {
        let psi = psi_samples(&[1.0, 2.0, 3.0], &[10.0, 20.0], 1).unwrap();
        assert!(psi.edges.is_empty());
        assert_eq!(psi.value, 0.0);

        // Constant reference: one edge, everything new above it lands in
        // the empty top bin.
        let psi = psi_samples(&[5.0; 10], &[6.0; 10], 10).unwrap();
        assert_eq!(psi.edges, vec![5.0]);
        assert_eq!(psi.new_shares, vec![0.0, 1.0]);
        assert!(psi.value > 1.0);
    }

    #[test]
    fn psi_many_bins_uses_every_value() {
        let reference = [3.0, 1.0, 2.0, 2.0];
        let huge = psi_samples(&reference, &[2.5], usize::MAX).unwrap();
        assert_eq!(huge.edges, vec![1.0, 2.0, 3.0]);
        assert_eq!(huge.reference_shares, vec![0.25, 0.5, 0.25, 0.0]);
        assert_eq!(huge.new_shares, vec![0.0, 0.0, 1.0, 0.0]);
        assert_eq!(huge, psi_samples(&reference, &[2.5], 5).unwrap());
    }

    #[test]
    fn psi_rejects_bad_input() {
        assert_eq!(psi_samples(&[1.0], &[1.0], 0), Err(DriftError::NoBins));
        assert!(psi_samples(&[], &[1.0], 10).is_err());
        assert!(psi_samples(&[1.0], &[], 10).is_err());
        assert!(psi_samples(&[1.0, f64::NAN], &[1.0], 10).is_err());
        assert!(matches!(
            psi_from_shares(&[0.5, 0.5], &[1.0]),
            Err(DriftError::LengthMismatch { .. })
        ));
        assert!(psi_from_shares(&[], &[]).is_err());
        assert!(matches!(
            psi_from_shares(&[0.5, 0.5], &[1.5, -0.5]),
            Err(DriftError::BadShare { index: 0, .. })
        ));
        assert!(matches!(
            psi_from_shares(&[0.5, 0.5], &[0.3, 0.3]),
            Err(DriftError::SharesNotNormalised { which: "new", .. })
        ));
        assert!(psi_from_shares(&[f64::NAN, 1.0], &[0.0, 1.0]).is_err());
    }

    #[test]
    fn psi_band_edges() {
        // Cut points 0.1 / 0.25: common practice, no source.
        let t = Thresholds::default();
        assert_eq!(
            PsiBand::classify(0.0999, t.psi_warn, t.psi_alert),
            PsiBand::Stable
        );
        assert_eq!(
            PsiBand::classify(0.1, t.psi_warn, t.psi_alert),
            PsiBand::Moderate
        );
        assert_eq!(
            PsiBand::classify(0.2499, t.psi_warn, t.psi_alert),
            PsiBand::Moderate
        );
        assert_eq!(
            PsiBand::classify(0.25, t.psi_warn, t.psi_alert),
            PsiBand::Major
        );
    }

    // --- chi-square -------------------------------------------------------

    #[test]
    fn chi_square_agresti_party_by_gender() {
        let chi = chi_square_homogeneity(&[vec![762, 327, 468], vec![484, 239, 477]]).unwrap();
        // Source: Agresti, An Introduction to Categorical Data Analysis,
        // party identification by gender table: χ² = 30.0701, df = 2.
        assert!(close(chi.statistic, 30.0701, 5e-5), "{}", chi.statistic);
        // Source: same table and book, df = 2.
        assert_eq!(chi.df, 2);
        assert_eq!(chi.categories, 3);
        // With 2 df the chi-square tail is exactly exp(−x/2) (closed form of
        // the distribution), so the p-value follows from the statistic.
        let want = (-chi.statistic / 2.0).exp();
        assert!(
            close(chi.p_value / want, 1.0, 1e-9),
            "{} vs {want}",
            chi.p_value
        );
    }

    #[test]
    fn chi_square_two_by_two_closed_form() {
        // For a 2×2 table the statistic is N(ad − bc)² / (r1·r2·c1·c2), an
        // algebraic identity; with 1 df the tail is erfc(sqrt(x/2)).
        let (a, b, c, d) = (30u64, 10u64, 15u64, 25u64);
        let chi = chi_square_homogeneity(&[vec![a, b], vec![c, d]]).unwrap();
        let (af, bf, cf, df) = (a as f64, b as f64, c as f64, d as f64);
        let n = af + bf + cf + df;
        let want =
            n * (af * df - bf * cf).powi(2) / ((af + bf) * (cf + df) * (af + cf) * (bf + df));
        assert!(
            close(chi.statistic, want, 1e-10),
            "{} vs {want}",
            chi.statistic
        );
        assert_eq!(chi.df, 1);
        let tail = statrs::function::erf::erfc((want / 2.0).sqrt());
        assert!(close(chi.p_value, tail, 1e-12));
    }

    #[test]
    fn chi_square_drops_empty_columns() {
        let with = chi_square_homogeneity(&[vec![10, 0, 5, 0], vec![20, 0, 7, 0]]).unwrap();
        let without = chi_square_homogeneity(&[vec![10, 5], vec![20, 7]]).unwrap();
        assert_eq!(with, without);
        assert_eq!(with.df, 1);
        assert_eq!(with.categories, 2);
    }

    #[test]
    fn chi_square_single_category_is_neutral() {
        let chi = chi_square_homogeneity(&[vec![0, 7], vec![0, 3]]).unwrap();
        assert_eq!(chi.statistic, 0.0);
        assert_eq!(chi.df, 0);
        assert_eq!(chi.p_value, 1.0);
        assert_eq!(chi.categories, 1);
    }

    #[test]
    fn chi_square_rejects_bad_tables() {
        assert_eq!(chi_square_homogeneity(&[]), Err(DriftError::TooFewRows(0)));
        assert_eq!(
            chi_square_homogeneity(&[vec![1, 2]]),
            Err(DriftError::TooFewRows(1))
        );
        assert_eq!(
            chi_square_homogeneity(&[vec![1, 2], vec![1]]),
            Err(DriftError::RaggedTable {
                row: 1,
                got: 1,
                expected: 2
            })
        );
        assert_eq!(
            chi_square_homogeneity(&[vec![1, 2], vec![0, 0]]),
            Err(DriftError::EmptyRow(1))
        );
    }

    #[test]
    fn category_drift_counts_unseen_rows() {
        let reference: BTreeMap<&str, u64> = [("a", 50), ("b", 50), ("gone", 0)].into();
        let batch: BTreeMap<&str, u64> = [("a", 10), ("b", 8), ("c", 2)].into();
        let drift = category_drift(&reference, &batch).unwrap();
        assert!(close(drift.unseen_share, 0.1, 1e-15));
        assert_eq!(drift.unseen_categories, 1);
        // Union order a, b, c, gone; "gone" is all-zero and dropped.
        let direct = chi_square_homogeneity(&[vec![50, 50, 0, 0], vec![10, 8, 2, 0]]).unwrap();
        assert_eq!(drift.chi, direct);
        assert_eq!(drift.chi.df, 2);

        let empty: BTreeMap<&str, u64> = [("a", 0)].into();
        assert!(matches!(
            category_drift(&empty, &batch),
            Err(DriftError::EmptySample { which: "reference" })
        ));
        assert!(matches!(
            category_drift(&reference, &BTreeMap::new()),
            Err(DriftError::EmptySample { which: "batch" })
        ));
    }

    // --- summary ----------------------------------------------------------

    #[test]
    fn column_drift_numeric_flags() {
        let t = Thresholds::default();
        let reference: Vec<f64> = (0..500).map(|i| f64::from(i) / 500.0).collect();
        let same = ColumnDrift::numeric(&reference, &reference, PSI_DEFAULT_BINS).unwrap();
        assert!(!same.flagged(&t));
        assert!(
            same.reason(&t).starts_with("no drift"),
            "{}",
            same.reason(&t)
        );

        let shifted: Vec<f64> = reference.iter().map(|x| x + 0.5).collect();
        let moved = ColumnDrift::numeric(&reference, &shifted, PSI_DEFAULT_BINS).unwrap();
        assert!(moved.flagged(&t));
        let why = moved.reason(&t);
        assert!(why.starts_with("drift"), "{why}");
        assert!(why.contains("major shift"), "{why}");

        // Same shift judged with levels no statistic can cross.
        let lax = Thresholds {
            ks_alpha: 1e-300,
            psi_alert: 1e9,
            psi_warn: 1e9,
            ..t
        };
        assert!(!moved.flagged(&lax));
    }

    #[test]
    fn column_drift_category_flags() {
        let t = Thresholds::default();
        let reference: BTreeMap<u32, u64> = [(0, 500), (1, 500)].into();
        let alike: BTreeMap<u32, u64> = [(0, 49), (1, 51)].into();
        let c = ColumnDrift::category(&reference, &alike).unwrap();
        assert!(!c.flagged(&t), "{}", c.reason(&t));

        // 6% unseen but otherwise the same mix: flagged by the unseen share.
        let unseen: BTreeMap<u32, u64> = [(0, 47), (1, 47), (2, 6)].into();
        let c = ColumnDrift::category(&reference, &unseen).unwrap();
        assert!(c.flagged(&Thresholds {
            chi_alpha: 1e-300,
            ..t.clone()
        }));
        assert!(c.reason(&t).contains("above 5.0%"), "{}", c.reason(&t));

        // Strongly different mix: flagged by the chi-square test.
        let skewed: BTreeMap<u32, u64> = [(0, 90), (1, 10)].into();
        let c = ColumnDrift::category(&reference, &skewed).unwrap();
        assert!(c.flagged(&t));
        assert!(c.reason(&t).contains("below 0.01"), "{}", c.reason(&t));
    }

    #[test]
    fn thresholds_validate() {
        assert_eq!(Thresholds::default().validate(), Ok(()));
        let t = Thresholds::default();
        for bad in [
            Thresholds {
                ks_alpha: 0.0,
                ..t.clone()
            },
            Thresholds {
                chi_alpha: f64::NAN,
                ..t.clone()
            },
            Thresholds {
                psi_warn: -0.1,
                ..t.clone()
            },
            Thresholds {
                psi_alert: 0.05,
                ..t.clone()
            },
            Thresholds {
                unseen_share: 1.5,
                ..t.clone()
            },
        ] {
            assert!(bad.validate().is_err(), "{bad:?}");
        }
    }

    // --- properties -------------------------------------------------------

    fn small_sample() -> impl Strategy<Value = Vec<f64>> {
        // Small integers so that ties are frequent.
        proptest::collection::vec((-20i32..20).prop_map(f64::from), 1..40)
    }

    fn shares(len: usize) -> impl Strategy<Value = Vec<f64>> {
        proptest::collection::vec(0u32..100, len).prop_map(|w| {
            let total: u32 = w.iter().sum::<u32>().max(1);
            if w.iter().all(|&x| x == 0) {
                let mut v = vec![0.0; w.len()];
                v[0] = 1.0;
                v
            } else {
                w.iter().map(|&x| f64::from(x) / f64::from(total)).collect()
            }
        })
    }

    proptest! {
        #[test]
        fn prop_ks_d_in_unit_interval_and_symmetric(a in small_sample(), b in small_sample()) {
            let ab = ks_two_sample(&a, &b).unwrap();
            let ba = ks_two_sample(&b, &a).unwrap();
            prop_assert!((0.0..=1.0).contains(&ab.d));
            prop_assert_eq!(ab.d, ba.d);
            prop_assert_eq!(ab.p_value, ba.p_value);
            prop_assert!((0.0..=1.0).contains(&ab.p_value));
        }

        #[test]
        fn prop_ks_invariant_under_monotone_map(a in small_sample(), b in small_sample()) {
            let f = |x: &f64| (x / 3.0).exp() + 5.0 * x;
            let fa: Vec<f64> = a.iter().map(f).collect();
            let fb: Vec<f64> = b.iter().map(f).collect();
            prop_assert_eq!(ks_two_sample(&a, &b).unwrap().d, ks_two_sample(&fa, &fb).unwrap().d);
        }

        #[test]
        fn prop_ks_matches_brute_force(a in small_sample(), b in small_sample()) {
            // Brute force: evaluate both ECDFs at every observed value.
            let ecdf = |s: &[f64], x: f64| s.iter().filter(|&&v| v <= x).count() as f64 / s.len() as f64;
            let brute = a.iter().chain(&b)
                .map(|&x| (ecdf(&a, x) - ecdf(&b, x)).abs())
                .fold(0.0, f64::max);
            prop_assert!((ks_two_sample(&a, &b).unwrap().d - brute).abs() < 1e-12);
        }

        #[test]
        fn prop_psi_non_negative_and_zero_on_identical(
            (r, q) in (1usize..12).prop_flat_map(|n| (shares(n), shares(n)))
        ) {
            let psi = psi_from_shares(&r, &q).unwrap();
            prop_assert!(psi >= 0.0);
            prop_assert_eq!(psi_from_shares(&r, &r).unwrap(), 0.0);
        }

        #[test]
        fn prop_psi_samples_non_negative(a in small_sample(), b in small_sample(), bins in 1usize..15) {
            let psi = psi_samples(&a, &b, bins).unwrap();
            prop_assert!(psi.value >= 0.0);
            prop_assert!(psi.edges.len() < bins.max(1));
            prop_assert!(psi.edges.windows(2).all(|w| w[0] < w[1]));
            prop_assert_eq!(psi_samples(&a, &a, bins).unwrap().value, 0.0);
        }

        #[test]
        fn prop_quantile_edges_match_rank_rule(a in small_sample(), bins in 1usize..100) {
            // The k/bins quantile is the smallest value with at least k/bins of
            // the sample at or below it; check every edge against that rule.
            let sorted = sorted_copy(&a);
            let n = sorted.len() as f64;
            let mut want: Vec<f64> = Vec::new();
            for k in 1..bins {
                let q = sorted
                    .iter()
                    .copied()
                    .find(|&v| sorted.iter().filter(|&&x| x <= v).count() as f64 * bins as f64 >= k as f64 * n)
                    .unwrap();
                if want.last().is_none_or(|&l| q > l) {
                    want.push(q);
                }
            }
            prop_assert_eq!(quantile_edges(&sorted, bins), want);
        }

        #[test]
        fn prop_chi_square_non_negative(
            table in (2usize..5, 1usize..6).prop_flat_map(|(r, c)| {
                proptest::collection::vec(proptest::collection::vec(0u64..50, c), r)
            })
        ) {
            match chi_square_homogeneity(&table) {
                Ok(chi) => {
                    prop_assert!(chi.statistic >= 0.0);
                    prop_assert!((0.0..=1.0).contains(&chi.p_value));
                }
                Err(e) => prop_assert!(matches!(e, DriftError::EmptyRow(_)), "{e}"),
            }
        }
    }
}
