//! The gate: holdout metrics, paired tests on per-row losses, and the pure
//! `decide` function that says whether a candidate model replaces the
//! serving one.
//!
//! Architecture invariant: nothing in this module tree does I/O, reads a
//! clock, touches tensors or the store. Plain slices and structs go in,
//! plain structs come out, so every number in an audit entry can be
//! recomputed from the recorded losses. Expected outcomes (a candidate that
//! loses, inputs that cannot be compared) are values, never panics.
//!
//! - [`dist`]: t, normal and chi-square tail probabilities.
//! - [`metrics`]: RMSE, MAE, R², log loss, accuracy, Brier score, calibration
//!   error, and the per-row losses the gate compares.
//! - [`paired`]: paired t, Diebold–Mariano, Wilcoxon signed-rank, McNemar and
//!   sign-flip permutation tests.
//! - [`cluster`]: the cluster-robust t with batches as clusters, Holm's
//!   correction, and quantile functions.
//! - [`decide`]: [`Policy`], [`Scores`], [`decide()`], [`decide_first`] and
//!   [`decide_among`] for several candidates at once.
//! - [`monitor`]: the anytime-valid evidence that the serving model is worse
//!   than the model it replaced, batch after batch.
//! - [`shift`]: whether a batch's losses moved beyond how batches usually
//!   differ, overall and for single category values.
//! - [`suspect`]: whether a batch's data is broken (targets unrelated to the
//!   inputs, a jumped target scale, one row repeated) rather than moved.

pub mod cluster;
pub mod decide;
pub mod dist;
pub mod metrics;
pub mod monitor;
pub mod paired;
pub mod shift;
pub mod suspect;

#[cfg(test)]
mod props;
#[cfg(test)]
pub(crate) mod simulate;

use std::fmt;

pub use decide::{
    Baseline, Decision, Evidence, Guard, GuardStatus, Judgement, Policy, Scores, Shortfall, decide,
    decide_among, decide_first,
};

/// Why a metric or test could not be computed from its inputs.
#[derive(Debug, Clone, PartialEq)]
pub enum InputError {
    /// Two inputs that must describe the same rows have different lengths.
    LengthMismatch {
        what: &'static str,
        left: usize,
        right: usize,
    },
    /// Fewer rows (or draws) than the computation needs.
    TooFew {
        what: &'static str,
        need: usize,
        have: usize,
    },
    /// A value is NaN or infinite.
    NonFinite { what: &'static str, index: usize },
    /// A loss is negative (losses are squared errors, log losses, ...).
    Negative { what: &'static str, index: usize },
    /// A probability row is not a distribution over the classes.
    BadProbabilities { row: usize, problem: &'static str },
    /// A class label is not below the number of classes.
    LabelOutOfRange {
        row: usize,
        label: usize,
        classes: usize,
    },
}

impl fmt::Display for InputError {
    fn fmt(&self, f: &mut fmt::Formatter<'_>) -> fmt::Result {
        match self {
            InputError::LengthMismatch { what, left, right } => {
                write!(
                    f,
                    "{what}: lengths differ ({left} vs {right}); both must cover the same rows"
                )
            }
            InputError::TooFew { what, need, have } => {
                write!(f, "{what}: needs at least {need}, got {have}")
            }
            InputError::NonFinite { what, index } => {
                write!(f, "{what}: value at row {index} is not a finite number")
            }
            InputError::Negative { what, index } => {
                write!(
                    f,
                    "{what}: value at row {index} is negative; losses must be 0 or more"
                )
            }
            InputError::BadProbabilities { row, problem } => {
                write!(f, "probabilities at row {row}: {problem}")
            }
            InputError::LabelOutOfRange {
                row,
                label,
                classes,
            } => {
                write!(
                    f,
                    "label {label} at row {row} is not one of the {classes} classes"
                )
            }
        }
    }
}

impl std::error::Error for InputError {}

/// Mean of a slice; NaN for an empty slice (callers check lengths first).
pub(crate) fn mean(values: &[f64]) -> f64 {
    values.iter().sum::<f64>() / values.len() as f64
}

/// Checks that a slice holds only finite values.
pub(crate) fn check_finite(what: &'static str, values: &[f64]) -> Result<(), InputError> {
    match values.iter().position(|v| !v.is_finite()) {
        Some(index) => Err(InputError::NonFinite { what, index }),
        None => Ok(()),
    }
}

/// Checks that two slices cover the same number of rows.
pub(crate) fn check_same_len(
    what: &'static str,
    left: usize,
    right: usize,
) -> Result<(), InputError> {
    if left == right {
        Ok(())
    } else {
        Err(InputError::LengthMismatch { what, left, right })
    }
}

/// Formats a statistic for a sentence: four significant digits without
/// trailing zeros, in scientific notation for very small or large
/// magnitudes (0.05, 48.86, 1.942e-6).
pub(crate) fn show(x: f64) -> String {
    if x == 0.0 || !x.is_finite() {
        return format!("{x}");
    }
    let magnitude = x.abs();
    let trim = |digits: &str| -> String {
        if digits.contains('.') {
            digits
                .trim_end_matches('0')
                .trim_end_matches('.')
                .to_string()
        } else {
            digits.to_string()
        }
    };
    if (1e-3..1e6).contains(&magnitude) {
        let decimals = (3 - magnitude.log10().floor() as i32).max(0) as usize;
        trim(&format!("{x:.decimals$}"))
    } else {
        let text = format!("{x:.3e}");
        match text.split_once('e') {
            Some((mantissa, exponent)) => format!("{}e{exponent}", trim(mantissa)),
            None => text,
        }
    }
}

/// Asserts `actual` is within `tolerance` of `expected` (for tests).
#[cfg(test)]
#[track_caller]
pub(crate) fn near(actual: f64, expected: f64, tolerance: f64) {
    assert!(
        (actual - expected).abs() <= tolerance,
        "got {actual}, expected {expected} ± {tolerance}"
    );
}

#[cfg(test)]
mod tests {
    use super::show;

    #[test]
    fn numbers_in_sentences() {
        assert_eq!(show(0.05), "0.05");
        assert_eq!(show(1.0), "1");
        assert_eq!(show(48.8612), "48.86");
        assert_eq!(show(-0.5), "-0.5");
        assert_eq!(show(1.9423e-6), "1.942e-6");
        assert_eq!(show(4.0e-5), "4e-5");
        assert_eq!(show(123_456.0), "123456");
        assert_eq!(show(f64::INFINITY), "inf");
        assert_eq!(show(0.0), "0");
    }
}
