//! Uniform samples of stored rows without reading every row: a seeded
//! choice of row positions, which `Store::rows_at` turns into reads of only
//! the chunks holding them. Used where a cycle or a check needs "some older
//! rows" (replay, the baselines, the fresh-data check's reference) and the
//! store may hold millions.

use std::collections::HashSet;

use crate::rng::Rng;

/// `k` distinct positions out of `0..n`, every set of `k` equally likely,
/// in ascending order; all of `0..n` when `k >= n`. The same `rng` state
/// gives the same positions. Takes O(k) time and memory, whatever `n` is.
pub fn choose(n: usize, k: usize, rng: &mut Rng) -> Vec<usize> {
    if k >= n {
        return (0..n).collect();
    }
    // For each of the last k positions j in turn, draw t in 0..=j and take
    // t, or j itself when t is taken already. By induction every set of the
    // positions seen so far is equally likely after each step.
    let mut taken = HashSet::with_capacity(k);
    for j in n - k..n {
        let t = rng.below(j + 1);
        if !taken.insert(t) {
            taken.insert(j);
        }
    }
    let mut out: Vec<usize> = taken.into_iter().collect();
    out.sort_unstable();
    out
}

/// A seed for one sampling purpose, derived from the configured seed and
/// what the sample is for (so two purposes never share a stream).
pub fn seed_for(seed: u64, purpose: &[u8]) -> u64 {
    let h = blake3::hash(&[&seed.to_le_bytes()[..], purpose].concat());
    u64::from_le_bytes(h.as_bytes()[..8].try_into().expect("8 bytes"))
}

#[cfg(test)]
mod tests {
    use super::*;
    use crate::config::Config;
    use crate::intake::{self, Outcome, Source};
    use crate::state::{self, StateDir};
    use crate::store::Split;

    #[test]
    fn positions_are_distinct_sorted_in_range_and_repeatable() {
        for (n, k) in [(0, 3), (5, 0), (5, 5), (5, 9), (1000, 10), (1000, 999)] {
            let a = choose(n, k, &mut Rng::new(3));
            assert_eq!(a.len(), k.min(n), "n {n} k {k}");
            assert!(a.windows(2).all(|w| w[0] < w[1]), "{a:?}");
            assert!(a.iter().all(|&p| p < n));
            assert_eq!(a, choose(n, k, &mut Rng::new(3)));
        }
        assert_ne!(
            choose(1000, 10, &mut Rng::new(3)),
            choose(1000, 10, &mut Rng::new(4))
        );
        assert_ne!(seed_for(1, b"replay"), seed_for(1, b"fresh"));
        assert_eq!(seed_for(1, b"replay"), seed_for(1, b"replay"));
    }

    #[test]
    fn every_position_and_pair_is_about_equally_likely() {
        // n = 12, k = 4, 30,000 draws: each position is in a sample with
        // probability 1/3 (10,000 expected, sd ≈ 82), each pair with
        // probability 1/11 (≈ 2,727 expected, sd ≈ 50). Bounds at 5 sd.
        let (n, k, trials) = (12, 4, 30_000);
        let mut rng = Rng::new(11);
        let mut single = vec![0u32; n];
        let mut pair = vec![0u32; n * n];
        for _ in 0..trials {
            let s = choose(n, k, &mut rng);
            for (i, &a) in s.iter().enumerate() {
                single[a] += 1;
                for &b in &s[i + 1..] {
                    pair[a * n + b] += 1;
                }
            }
        }
        for (p, &c) in single.iter().enumerate() {
            assert!((f64::from(c) - 10_000.0).abs() < 410.0, "position {p}: {c}");
        }
        let expected = trials as f64 * (k * (k - 1)) as f64 / (n * (n - 1)) as f64;
        for a in 0..n {
            for b in a + 1..n {
                let c = f64::from(pair[a * n + b]);
                assert!((c - expected).abs() < 250.0, "pair {a},{b}: {c}");
            }
        }
    }

    /// A state dir holding three batches (one of several chunks) of a
    /// 12-column schema, so sampled reads cross batch and chunk borders.
    fn three_batches() -> (tempfile::TempDir, state::Owner) {
        let mut text = String::from(
            "[data]\ntarget = \"y\"\ntask = \"regression\"\nholdout_fraction = 0.3\n\n",
        );
        for i in 0..11 {
            text.push_str(&format!(
                "[[data.columns]]\nname = \"x{i}\"\nkind = \"number\"\n\n"
            ));
        }
        text.push_str("[[data.columns]]\nname = \"y\"\nkind = \"number\"\n");
        let dir = tempfile::tempdir().unwrap();
        let config = Config::parse(&text, std::path::Path::new("t.toml")).unwrap();
        let st = StateDir::new(dir.path().join("state"));
        let mut owner = state::create(&st, &config, &text, "tester").unwrap();
        let mut row = 0u64;
        for (b, n) in [3000usize, 7, 2600].into_iter().enumerate() {
            let mut csv = String::from("x0,x1,x2,x3,x4,x5,x6,x7,x8,x9,x10,y\n");
            for _ in 0..n {
                for c in 0..12 {
                    csv.push_str(&format!(
                        "{}{}",
                        row * 12 + c,
                        if c < 11 { "," } else { "\n" }
                    ));
                }
                row += 1;
            }
            let file = dir.path().join(format!("b{b}.csv"));
            std::fs::write(&file, csv).unwrap();
            let out = intake::take_file(
                &mut owner,
                &file,
                Source::Keep,
                "tester",
                chrono::Utc::now(),
            )
            .unwrap();
            assert!(matches!(out, Outcome::Accepted { .. }), "{out:?}");
        }
        (dir, owner)
    }

    #[test]
    fn sampled_reads_equal_the_same_rows_of_a_full_read() {
        let (_dir, owner) = three_batches();
        let store = &owner.store;
        for split in [Split::Train, Split::Holdout] {
            for (from, to) in [
                (None, None),
                (Some(crate::ids::BatchId(2)), None),
                (None, Some(crate::ids::BatchId(2))),
            ] {
                let all = store.rows(split, from, to).unwrap();
                let n = store.row_count(split, from, to).unwrap();
                assert_eq!(n, all.n_rows());
                for k in [0, 1, 50, n / 2, n] {
                    let picks = choose(n, k, &mut Rng::new(k as u64));
                    let got = store.rows_at(split, from, to, &picks).unwrap();
                    assert_eq!(got.cells(), all.select(&picks).cells(), "{split:?} k {k}");
                }
            }
        }
        // The chunk border: the first batch's training rows span chunks.
        let n = store.row_count(Split::Train, None, None).unwrap();
        assert!(n > 2 * 1280, "{n}");
    }
}
