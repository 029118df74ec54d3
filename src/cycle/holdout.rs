//! Holdout scoring straight from the store, slice by slice: every model of
//! a cycle (candidates, the serving model, the trivial predictor, ridge and
//! the boosted trees) scores one slice of holdout rows before the next is
//! read, so a cycle holds per-row losses (8 bytes a row and model), never
//! the holdout's cells or encoded inputs. Slices start at multiples of
//! `SCORE_ROWS`, where scoring in memory cut them too, so the losses are
//! the same numbers.

use std::ops::Range;

/// The holdout positions `0..rows` cut at multiples of `size`.
pub(crate) fn slices(rows: usize, size: usize) -> Vec<Range<usize>> {
    let size = size.max(1);
    (0..rows)
        .step_by(size)
        .map(|start| start..(start + size).min(rows))
        .collect()
}

/// Per-row losses of one reference model, or why it has none: it could
/// not be fitted, or could not score a slice (the first problem is kept).
pub(crate) struct Losses {
    pub(crate) losses: Result<Vec<f64>, String>,
}

impl Losses {
    pub(crate) fn new<T>(fitted: &Result<T, String>, rows: usize) -> Losses {
        Losses {
            losses: match fitted {
                Ok(_) => Ok(Vec::with_capacity(rows)),
                Err(e) => Err(e.clone()),
            },
        }
    }

    /// Adds a slice's losses, or the reason it has none.
    pub(crate) fn add<E: std::fmt::Display>(&mut self, slice: Result<Vec<f64>, E>) {
        if let Ok(out) = &mut self.losses {
            match slice {
                Ok(l) => out.extend(l),
                Err(e) => self.losses = Err(e.to_string()),
            }
        }
    }
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn slices_start_at_multiples_and_cover_every_row_once() {
        assert_eq!(slices(0, 4), Vec::<Range<usize>>::new());
        assert_eq!(slices(3, 4), vec![0..3]);
        assert_eq!(slices(8, 4), vec![0..4, 4..8]);
        assert_eq!(slices(9, 4), vec![0..4, 4..8, 8..9]);
    }

    #[test]
    fn a_reference_model_keeps_its_first_problem() {
        let mut l = Losses::new(&Ok::<(), String>(()), 4);
        l.add(Ok::<_, String>(vec![1.0, 2.0]));
        l.add(Err::<Vec<f64>, _>("slice 2 has no target"));
        l.add(Ok::<_, String>(vec![3.0]));
        assert_eq!(l.losses, Err("slice 2 has no target".to_string()));
        let unfitted = Losses::new(&Err::<(), _>("too few rows".to_string()), 4);
        assert_eq!(unfitted.losses, Err("too few rows".to_string()));
        let mut fine = Losses::new(&Ok::<(), String>(()), 3);
        fine.add(Ok::<_, String>(vec![1.0, 2.0]));
        fine.add(Ok::<_, String>(vec![3.0]));
        assert_eq!(fine.losses, Ok(vec![1.0, 2.0, 3.0]));
    }
}
