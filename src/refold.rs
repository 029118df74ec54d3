//! Function-preserving edits of a network's first layer, for when the input
//! encoding changes between training rounds.
//!
//! The first layer computes h = x·W + b, where x is the encoded input row:
//! a number column is standardised as (v − μ)/σ, a category column is a
//! one-hot block. **Layout:** `weight` holds W as `in_dim × out_dim` values
//! in row-major order, so `weight[i * out_dim + j]` is the weight from input
//! `i` to output `j`, and `bias` holds `out_dim` values. This is the layout
//! of a linear layer that computes y = x·W + b with W of shape
//! [d_input, d_output].
//!
//! * [`widen_inputs`] makes room for new one-hot positions (new category
//!   values) with zero weights, so every old input gives the same output.
//! * [`refold_scaler`] / [`refold_scalers`] move a number column's
//!   standardisation from (μ, σ) to (μ', σ') and fold the change into W and
//!   b, so every old raw value gives the same output.
//! * [`should_refresh`] says whether the new statistics differ enough to be
//!   worth a refold.
//!
//! Arithmetic is done in f64 and stored back as f32, so outputs agree up to
//! f32 rounding of the new weights and biases. Pure: no I/O. Bad shapes,
//! out-of-range indexes and invalid statistics give a [`RefoldError`], and
//! on error nothing is modified.

/// Why a first-layer edit was refused.
#[derive(Debug, Clone, PartialEq, thiserror::Error)]
pub enum RefoldError {
    #[error("{what} has {got} values, expected {expected}")]
    Shape {
        what: &'static str,
        got: usize,
        expected: usize,
    },
    #[error("layer size {in_dim} × {out_dim} overflows")]
    SizeOverflow { in_dim: usize, out_dim: usize },
    #[error("input column {col} is out of range for {in_dim} inputs")]
    ColumnOutOfRange { col: usize, in_dim: usize },
    #[error("insert position {at} is past the end of {in_dim} inputs")]
    InsertOutOfRange { at: usize, in_dim: usize },
    #[error(
        "{which} scale of column {col} is (mean {mean}, std {std}); the mean must be finite and the std finite and > 0"
    )]
    BadScale {
        col: usize,
        which: &'static str,
        mean: f32,
        std: f32,
    },
    #[error("column {0} appears more than once in one refold")]
    DuplicateColumn(usize),
    #[error("refolding column {col} gives a non-finite weight or bias")]
    NonFinite { col: usize },
}

/// A column's standardisation (mean, std): the encoded value is
/// (v − mean) / std.
pub type Scale = (f32, f32);

/// One number column's change of standardisation, for [`refold_scalers`].
#[derive(Debug, Clone, Copy, PartialEq, serde::Serialize, serde::Deserialize)]
pub struct ScaleChange {
    /// Input index of the column in the encoded row.
    pub col: usize,
    /// (mean, std) the layer was trained with.
    pub old: Scale,
    /// (mean, std) the encoding will use from now on.
    pub new: Scale,
}

fn check_shape(
    what: &'static str,
    got: usize,
    in_dim: usize,
    out_dim: usize,
) -> Result<(), RefoldError> {
    let expected = in_dim
        .checked_mul(out_dim)
        .ok_or(RefoldError::SizeOverflow { in_dim, out_dim })?;
    if got != expected {
        return Err(RefoldError::Shape {
            what,
            got,
            expected,
        });
    }
    Ok(())
}

fn check_scale(col: usize, which: &'static str, (mean, std): Scale) -> Result<(), RefoldError> {
    if mean.is_finite() && std.is_finite() && std > 0.0 {
        Ok(())
    } else {
        Err(RefoldError::BadScale {
            col,
            which,
            mean,
            std,
        })
    }
}

/// Inserts `count` input rows of zero weights before input `insert_at` of a
/// row-major `[in_dim, out_dim]` weight matrix (y = x·W + b layout; see the
/// module docs) and returns the `[in_dim + count, out_dim]` result. The bias
/// is unchanged.
///
/// Use it when a category column's one-hot block grows: an old input row,
/// with zeros in the new positions, gives exactly the same output (the new
/// rows only ever add 0·0).
///
/// `insert_at` may equal `in_dim` (append). Errors: `weight.len()` is not
/// `in_dim·out_dim`, or `insert_at > in_dim`.
pub fn widen_inputs(
    weight: &[f32],
    in_dim: usize,
    out_dim: usize,
    insert_at: usize,
    count: usize,
) -> Result<Vec<f32>, RefoldError> {
    check_shape("weight", weight.len(), in_dim, out_dim)?;
    if insert_at > in_dim {
        return Err(RefoldError::InsertOutOfRange {
            at: insert_at,
            in_dim,
        });
    }
    let added = count
        .checked_mul(out_dim)
        .ok_or(RefoldError::SizeOverflow {
            in_dim: count,
            out_dim,
        })?;
    let split = insert_at * out_dim;
    let mut widened = Vec::with_capacity(weight.len() + added);
    widened.extend_from_slice(&weight[..split]);
    widened.resize(split + added, 0.0);
    widened.extend_from_slice(&weight[split..]);
    Ok(widened)
}

/// New weight row for one column, computed in f64, with the column's bias
/// change added to `bias_acc`; `None` if a weight or the running bias would
/// not be finite in f32.
fn refolded_column(
    weight: &[f32],
    out_dim: usize,
    change: &ScaleChange,
    bias_acc: &mut [f64],
) -> Option<Vec<f32>> {
    let (mu, sigma) = (f64::from(change.old.0), f64::from(change.old.1));
    let (mu_new, sigma_new) = (f64::from(change.new.0), f64::from(change.new.1));
    let ratio = sigma_new / sigma;
    let shift = (mu_new - mu) / sigma;
    let row = &weight[change.col * out_dim..(change.col + 1) * out_dim];
    let mut new_row = Vec::with_capacity(out_dim);
    for (&w, acc) in row.iter().zip(bias_acc.iter_mut()) {
        let w = f64::from(w);
        let scaled = (w * ratio) as f32;
        if !scaled.is_finite() {
            return None;
        }
        new_row.push(scaled);
        *acc += w * shift;
        if !(*acc as f32).is_finite() {
            return None;
        }
    }
    Some(new_row)
}

/// Moves input `col` from standardisation `old` = (μ, σ) to `new` = (μ', σ')
/// and adjusts the layer so its output for any raw value is unchanged.
///
/// Layout: `weight` is row-major `[in_dim, out_dim]` (y = x·W + b), `bias`
/// has `out_dim` values. With x = (v − μ)/σ and x' = (v − μ')/σ',
/// x = x'·σ'/σ + (μ' − μ)/σ, so
/// W'[col, :] = W[col, :]·σ'/σ and b' = b + W[col, :]·(μ' − μ)/σ.
///
/// An input encoded as 0 whatever its value (how a missing number is often
/// encoded) is not preserved: before the edit 0 stood for μ, after it for
/// μ'.
///
/// Errors (and the layer is left untouched): wrong `weight` or `bias`
/// length, `col ≥ in_dim`, a non-finite mean, a std that is not finite and
/// positive, or a result that overflows f32.
pub fn refold_scaler(
    weight: &mut [f32],
    bias: &mut [f32],
    in_dim: usize,
    out_dim: usize,
    col: usize,
    old: Scale,
    new: Scale,
) -> Result<(), RefoldError> {
    refold_scalers(
        weight,
        bias,
        in_dim,
        out_dim,
        &[ScaleChange { col, old, new }],
    )
}

/// [`refold_scaler`] for several number columns at once (same layout and
/// formula). The bias change of all columns is summed in f64 and rounded to
/// f32 once.
///
/// Every change is checked before anything is written: on any error
/// (including a column listed twice) the layer is left untouched.
pub fn refold_scalers(
    weight: &mut [f32],
    bias: &mut [f32],
    in_dim: usize,
    out_dim: usize,
    changes: &[ScaleChange],
) -> Result<(), RefoldError> {
    check_shape("weight", weight.len(), in_dim, out_dim)?;
    check_shape("bias", bias.len(), 1, out_dim)?;
    let mut seen = vec![false; in_dim];
    for change in changes {
        if change.col >= in_dim {
            return Err(RefoldError::ColumnOutOfRange {
                col: change.col,
                in_dim,
            });
        }
        if std::mem::replace(&mut seen[change.col], true) {
            return Err(RefoldError::DuplicateColumn(change.col));
        }
        check_scale(change.col, "old", change.old)?;
        check_scale(change.col, "new", change.new)?;
    }
    let mut bias_acc: Vec<f64> = bias.iter().map(|&b| f64::from(b)).collect();
    let mut rows = Vec::with_capacity(changes.len());
    for change in changes {
        let row = refolded_column(weight, out_dim, change, &mut bias_acc)
            .ok_or(RefoldError::NonFinite { col: change.col })?;
        rows.push(row);
    }
    let new_bias: Vec<f32> = bias_acc.iter().map(|&b| b as f32).collect();
    for (change, row) in changes.iter().zip(rows) {
        weight[change.col * out_dim..(change.col + 1) * out_dim].copy_from_slice(&row);
    }
    bias.copy_from_slice(&new_bias);
    Ok(())
}

/// True when a column's statistics have moved enough to refresh its
/// standardisation: the std changed by more than `threshold` relative to
/// the old std, or the mean moved by more than `threshold` old stds.
///
/// Returns false (refresh nothing) when either scale is invalid (non-finite
/// mean, std not finite and positive), since [`refold_scaler`] would refuse
/// it, and when `threshold` is NaN.
pub fn should_refresh(old: Scale, new: Scale, threshold: f32) -> bool {
    if check_scale(0, "old", old).is_err() || check_scale(0, "new", new).is_err() {
        return false;
    }
    let (mu, sigma) = (f64::from(old.0), f64::from(old.1));
    let (mu_new, sigma_new) = (f64::from(new.0), f64::from(new.1));
    let threshold = f64::from(threshold);
    (sigma_new - sigma).abs() / sigma > threshold || (mu_new - mu).abs() / sigma > threshold
}

#[cfg(test)]
mod tests {
    use super::*;
    use proptest::prelude::*;

    /// h = x·W + b in f64 from the stored f32 values, and the size of the
    /// largest summand per output (Σ|x_i·W_ij| + |b_j|).
    fn forward(weight: &[f32], bias: &[f32], out_dim: usize, x: &[f64]) -> (Vec<f64>, Vec<f64>) {
        let mut out: Vec<f64> = bias.iter().map(|&b| f64::from(b)).collect();
        let mut size: Vec<f64> = bias.iter().map(|&b| f64::from(b).abs()).collect();
        for (i, &xi) in x.iter().enumerate() {
            for j in 0..out_dim {
                let term = xi * f64::from(weight[i * out_dim + j]);
                out[j] += term;
                size[j] += term.abs();
            }
        }
        (out, size)
    }

    fn encode(raw: &[f64], scales: &[Scale]) -> Vec<f64> {
        raw.iter()
            .zip(scales)
            .map(|(&v, &(m, s))| (v - f64::from(m)) / f64::from(s))
            .collect()
    }

    /// Outputs agree to 1e-5 relative plus 1e-5 absolute. "Relative" is to
    /// the summed sizes of the terms, not just the output: storing W' and b'
    /// in f32 rounds each term by ~6e-8 of its own size, and terms can
    /// cancel to a much smaller output.
    fn assert_same_outputs(a: (Vec<f64>, Vec<f64>), b: (Vec<f64>, Vec<f64>)) {
        for j in 0..a.0.len() {
            let scale = a.1[j].max(b.1[j]);
            let tol = 1e-5 * scale + 1e-5;
            assert!(
                (a.0[j] - b.0[j]).abs() <= tol,
                "output {j}: {} vs {} (tolerance {tol})",
                a.0[j],
                b.0[j]
            );
        }
    }

    #[test]
    fn refold_by_hand() {
        // One output, inputs x0 (number) and x1. W = [2, 3], b = 1.
        // Column 0 moves from (10, 2) to (12, 4):
        //   W'[0] = 2·4/2 = 4, b' = 1 + 2·(12 − 10)/2 = 3.
        // Check at v = 14, x1 = 1: before 2·(14−10)/2 + 3 + 1 = 8;
        // after 4·(14−12)/4 + 3 + 3 = 8.
        let mut w = vec![2.0f32, 3.0];
        let mut b = vec![1.0f32];
        refold_scaler(&mut w, &mut b, 2, 1, 0, (10.0, 2.0), (12.0, 4.0)).unwrap();
        assert_eq!(w, vec![4.0, 3.0]);
        assert_eq!(b, vec![3.0]);
        let before = 2.0 * (14.0 - 10.0) / 2.0 + 3.0 + 1.0;
        let after = 4.0 * (14.0 - 12.0) / 4.0 + 3.0 + 3.0;
        assert_eq!(before, after);
    }

    #[test]
    fn widen_by_hand() {
        // in 2, out 2: rows [1, 2] and [3, 4]; insert 1 zero row at 1.
        let w = widen_inputs(&[1.0, 2.0, 3.0, 4.0], 2, 2, 1, 1).unwrap();
        assert_eq!(w, vec![1.0, 2.0, 0.0, 0.0, 3.0, 4.0]);
        // Append and prepend.
        assert_eq!(
            widen_inputs(&[1.0, 2.0], 1, 2, 1, 2).unwrap(),
            vec![1.0, 2.0, 0.0, 0.0, 0.0, 0.0]
        );
        assert_eq!(
            widen_inputs(&[1.0, 2.0], 1, 2, 0, 1).unwrap(),
            vec![0.0, 0.0, 1.0, 2.0]
        );
        assert_eq!(
            widen_inputs(&[1.0, 2.0], 1, 2, 0, 0).unwrap(),
            vec![1.0, 2.0]
        );
    }

    #[test]
    fn widen_rejects_bad_input() {
        assert_eq!(
            widen_inputs(&[1.0, 2.0, 3.0], 2, 2, 0, 1),
            Err(RefoldError::Shape {
                what: "weight",
                got: 3,
                expected: 4
            })
        );
        assert_eq!(
            widen_inputs(&[1.0, 2.0], 1, 2, 2, 1),
            Err(RefoldError::InsertOutOfRange { at: 2, in_dim: 1 })
        );
        assert!(matches!(
            widen_inputs(&[], usize::MAX, 2, 0, 1),
            Err(RefoldError::SizeOverflow { .. })
        ));
    }

    #[test]
    fn refold_rejects_bad_input_and_leaves_layer_untouched() {
        let w0 = vec![1.0f32, 2.0, 3.0, 4.0];
        let b0 = vec![0.5f32, -0.5];
        let ok = (0.0f32, 1.0f32);
        let cases: Vec<(usize, Scale, Scale, RefoldError)> = vec![
            (
                2,
                ok,
                ok,
                RefoldError::ColumnOutOfRange { col: 2, in_dim: 2 },
            ),
            (
                0,
                (0.0, 0.0),
                ok,
                RefoldError::BadScale {
                    col: 0,
                    which: "old",
                    mean: 0.0,
                    std: 0.0,
                },
            ),
            (
                1,
                ok,
                (0.0, -1.0),
                RefoldError::BadScale {
                    col: 1,
                    which: "new",
                    mean: 0.0,
                    std: -1.0,
                },
            ),
            (
                0,
                ok,
                (0.0, f32::INFINITY),
                RefoldError::BadScale {
                    col: 0,
                    which: "new",
                    mean: 0.0,
                    std: f32::INFINITY,
                },
            ),
            // Std ratio 1e60 overflows f32.
            (
                0,
                (0.0, 1e-30),
                (0.0, 1e30),
                RefoldError::NonFinite { col: 0 },
            ),
            // Mean shift of 1e38 / 1e-30 overflows the bias.
            (
                0,
                (0.0, 1e-30),
                (1e38, 1.0),
                RefoldError::NonFinite { col: 0 },
            ),
        ];
        for (col, old, new, want) in cases {
            let (mut w, mut b) = (w0.clone(), b0.clone());
            assert_eq!(
                refold_scaler(&mut w, &mut b, 2, 2, col, old, new),
                Err(want)
            );
            assert_eq!((&w, &b), (&w0, &b0));
        }
        // NaN mean (compared by variant: NaN != NaN).
        let (mut w, mut b) = (w0.clone(), b0.clone());
        assert!(matches!(
            refold_scaler(&mut w, &mut b, 2, 2, 0, (f32::NAN, 1.0), ok),
            Err(RefoldError::BadScale { which: "old", .. })
        ));
        assert_eq!((&w, &b), (&w0, &b0));
        // Shapes.
        let (mut w, mut b) = (w0.clone(), vec![0.0f32; 3]);
        assert!(matches!(
            refold_scaler(&mut w, &mut b, 2, 2, 0, ok, ok),
            Err(RefoldError::Shape { what: "bias", .. })
        ));
        let (mut w, mut b) = (vec![0.0f32; 3], b0.clone());
        assert!(matches!(
            refold_scaler(&mut w, &mut b, 2, 2, 0, ok, ok),
            Err(RefoldError::Shape { what: "weight", .. })
        ));
    }

    #[test]
    fn batch_refold_rejects_duplicates_before_writing() {
        let mut w = vec![1.0f32, 2.0, 3.0, 4.0];
        let mut b = vec![0.5f32, -0.5];
        let changes = [
            ScaleChange {
                col: 0,
                old: (0.0, 1.0),
                new: (1.0, 2.0),
            },
            ScaleChange {
                col: 0,
                old: (1.0, 2.0),
                new: (3.0, 1.0),
            },
        ];
        assert_eq!(
            refold_scalers(&mut w, &mut b, 2, 2, &changes),
            Err(RefoldError::DuplicateColumn(0))
        );
        assert_eq!(w, vec![1.0, 2.0, 3.0, 4.0]);
        assert_eq!(b, vec![0.5, -0.5]);
        // An empty change list is a no-op.
        refold_scalers(&mut w, &mut b, 2, 2, &[]).unwrap();
        assert_eq!(w, vec![1.0, 2.0, 3.0, 4.0]);
    }

    #[test]
    fn should_refresh_cases() {
        let old = (5.0, 2.0);
        assert!(!should_refresh(old, old, 0.1));
        assert!(!should_refresh(old, (5.0, 2.1), 0.1)); // std +5%
        assert!(should_refresh(old, (5.0, 2.5), 0.1)); // std +25%
        assert!(should_refresh(old, (5.0, 1.5), 0.1)); // std −25%
        assert!(!should_refresh(old, (5.1, 2.0), 0.1)); // mean +0.05σ
        assert!(should_refresh(old, (4.5, 2.0), 0.1)); // mean −0.25σ
        assert!(!should_refresh(old, (f32::NAN, 2.0), 0.1));
        assert!(!should_refresh((5.0, 0.0), (5.0, 1.0), 0.1));
        assert!(!should_refresh(old, (9.0, 9.0), f32::NAN));
    }

    fn layer() -> impl Strategy<Value = (usize, usize, Vec<f32>, Vec<f32>)> {
        (1usize..6, 1usize..5).prop_flat_map(|(i, o)| {
            (
                Just(i),
                Just(o),
                proptest::collection::vec(-2.0f32..2.0, i * o),
                proptest::collection::vec(-2.0f32..2.0, o),
            )
        })
    }

    fn scale() -> impl Strategy<Value = Scale> {
        (-10.0f32..10.0, 0.1f32..10.0)
    }

    proptest! {
        #[test]
        fn prop_widen_keeps_outputs(
            (in_dim, out_dim, w, b) in layer(),
            x in proptest::collection::vec(-5.0f64..5.0, 6),
            at_frac in 0.0f64..=1.0,
            count in 0usize..4,
        ) {
            let insert_at = ((in_dim as f64) * at_frac).round() as usize;
            let x = &x[..in_dim];
            let widened = widen_inputs(&w, in_dim, out_dim, insert_at, count).unwrap();
            prop_assert_eq!(widened.len(), (in_dim + count) * out_dim);
            let mut x_wide = x.to_vec();
            x_wide.splice(insert_at..insert_at, std::iter::repeat_n(0.0, count));
            // Adding 0·0 terms changes nothing: exact equality.
            prop_assert_eq!(forward(&w, &b, out_dim, x).0, forward(&widened, &b, out_dim, &x_wide).0);
        }

        #[test]
        fn prop_refold_one_column_keeps_outputs(
            (in_dim, out_dim, w, b) in layer(),
            raw in proptest::collection::vec(-20.0f64..20.0, 6),
            scales in proptest::collection::vec(scale(), 6),
            new in scale(),
            col_frac in 0.0f64..1.0,
        ) {
            let col = ((in_dim as f64) * col_frac) as usize;
            let raw = &raw[..in_dim];
            let old_scales = &scales[..in_dim];
            let before = forward(&w, &b, out_dim, &encode(raw, old_scales));
            let (mut w2, mut b2) = (w.clone(), b.clone());
            refold_scaler(&mut w2, &mut b2, in_dim, out_dim, col, old_scales[col], new).unwrap();
            let mut new_scales = old_scales.to_vec();
            new_scales[col] = new;
            let after = forward(&w2, &b2, out_dim, &encode(raw, &new_scales));
            assert_same_outputs(before, after);
        }

        #[test]
        fn prop_refold_all_columns_keeps_outputs(
            (in_dim, out_dim, w, b) in layer(),
            raw in proptest::collection::vec(-20.0f64..20.0, 6),
            old in proptest::collection::vec(scale(), 6),
            new in proptest::collection::vec(scale(), 6),
        ) {
            let raw = &raw[..in_dim];
            let changes: Vec<ScaleChange> = (0..in_dim)
                .map(|col| ScaleChange { col, old: old[col], new: new[col] })
                .collect();
            let before = forward(&w, &b, out_dim, &encode(raw, &old[..in_dim]));
            let (mut w2, mut b2) = (w.clone(), b.clone());
            refold_scalers(&mut w2, &mut b2, in_dim, out_dim, &changes).unwrap();
            let after = forward(&w2, &b2, out_dim, &encode(raw, &new[..in_dim]));
            assert_same_outputs(before, after);
        }

        #[test]
        fn prop_widen_then_refold_keeps_outputs(
            (in_dim, out_dim, w, b) in layer(),
            raw in proptest::collection::vec(-20.0f64..20.0, 6),
            old in proptest::collection::vec(scale(), 6),
            new in scale(),
            count in 1usize..3,
        ) {
            // A new category appended after the inputs, then column 0 refolded.
            let raw = &raw[..in_dim];
            let before = forward(&w, &b, out_dim, &encode(raw, &old[..in_dim]));
            let mut w2 = widen_inputs(&w, in_dim, out_dim, in_dim, count).unwrap();
            let mut b2 = b.clone();
            refold_scaler(&mut w2, &mut b2, in_dim + count, out_dim, 0, old[0], new).unwrap();
            let mut scales = old[..in_dim].to_vec();
            scales[0] = new;
            let mut x = encode(raw, &scales);
            x.extend(std::iter::repeat_n(0.0, count));
            let after = forward(&w2, &b2, out_dim, &x);
            assert_same_outputs(before, after);
        }

        #[test]
        fn prop_refold_round_trip(
            (in_dim, out_dim, w, b) in layer(),
            old in scale(),
            new in scale(),
        ) {
            // Refolding to the new scale and back restores the layer up to f32
            // rounding.
            let (mut w2, mut b2) = (w.clone(), b.clone());
            refold_scaler(&mut w2, &mut b2, in_dim, out_dim, 0, old, new).unwrap();
            refold_scaler(&mut w2, &mut b2, in_dim, out_dim, 0, new, old).unwrap();
            for (a, z) in w.iter().zip(&w2) {
                prop_assert!((a - z).abs() <= 1e-5 * (1.0 + a.abs()), "{} vs {}", a, z);
            }
            let span = 1.0 + (new.0 - old.0).abs() / old.1 * 2.0;
            for (a, z) in b.iter().zip(&b2) {
                prop_assert!((a - z).abs() <= 1e-5 * span, "{} vs {}", a, z);
            }
        }
    }
}
