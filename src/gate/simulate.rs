//! Error rates of the gate by simulation, on synthetic holdout losses where
//! the truth is known and rows of one batch share a day.
//!
//! Each batch b has a day effect δ_b ~ N(0, 0.12²) that multiplies every
//! row's target: y = μ(1 + δ_b) + ε with ε ~ N(0, (0.15 μ)²). A model
//! predicts f = μ(1 + β) + η with its own systematic lean β and row error
//! η ~ N(0, (s μ)²); the loss is (y − f)². Two models that lean opposite
//! ways by the same amount are equally good on average, but on each day the
//! one leaning with that day's effect wins every row together: exactly the
//! dependence that makes a row-by-row test see differences that are not
//! there. A smaller s is a real improvement of known size.

use super::decide::{Baseline, Policy, Scores, decide_among};
use crate::rng::Rng;

/// Holdout rows per batch (about a fifth of a 150-row night).
pub const ROWS_PER_BATCH: usize = 30;
const DAY_SD: f64 = 0.12;
const NOISE: f64 = 0.15;
const LEAN: f64 = 0.05;

pub fn policy() -> Policy {
    Policy::from(&crate::config::GateConfig::default())
}

/// Expected loss over μ² of a model with lean β and row error s.
fn expected(beta: f64, s: f64) -> f64 {
    DAY_SD * DAY_SD + beta * beta + NOISE * NOISE + s * s
}

/// Per-row losses of `models` (lean, s) on `batches` batches; the first
/// `new_batches` batches are flagged new.
fn losses(
    rng: &mut Rng,
    batches: usize,
    rows_per_batch: usize,
    new_batches: usize,
    models: &[(f64, f64)],
) -> (Vec<Vec<f64>>, Vec<bool>, Vec<u64>) {
    let mut out = vec![Vec::new(); models.len()];
    let mut flags = Vec::new();
    let mut labels = Vec::new();
    for b in 0..batches {
        let day = DAY_SD * rng.normal();
        for _ in 0..rows_per_batch {
            let mu = 20.0 + 40.0 * rng.uniform();
            let y = mu * (1.0 + day) + NOISE * mu * rng.normal();
            for (m, &(beta, s)) in models.iter().enumerate() {
                let f = mu * (1.0 + beta) + s * mu * rng.normal();
                out[m].push((y - f).powi(2));
            }
            flags.push(b >= batches - new_batches);
            labels.push(b as u64);
        }
    }
    (out, flags, labels)
}

/// Share of trials in which some candidate was promoted. `models[0]` is
/// the serving model; `clustered = false` treats every row as independent
/// (what the gate did before batches were its unit).
pub fn promotion_rate(
    trials: usize,
    batches: usize,
    seed: u64,
    models: &[(f64, f64)],
    clustered: bool,
) -> f64 {
    promotion_rate_with(
        &policy(),
        trials,
        batches,
        ROWS_PER_BATCH,
        seed,
        models,
        clustered,
    )
}

/// `promotion_rate` under `policy`, with `rows_per_batch` holdout rows in
/// every batch.
pub fn promotion_rate_with(
    policy: &Policy,
    trials: usize,
    batches: usize,
    rows_per_batch: usize,
    seed: u64,
    models: &[(f64, f64)],
    clustered: bool,
) -> f64 {
    let mut rng = Rng::new(seed);
    let mut promoted = 0usize;
    for _ in 0..trials {
        // Which way the serving model leans is random per trial.
        let sign = if rng.uniform() < 0.5 { 1.0 } else { -1.0 };
        let signed: Vec<(f64, f64)> = models.iter().map(|&(b, s)| (sign * b, s)).collect();
        let (l, flags, labels) = losses(&mut rng, batches, rows_per_batch, 1, &signed);
        let scores = |v: &Vec<f64>| {
            if clustered {
                Scores::clustered(v.clone(), flags.clone(), labels.clone())
            } else {
                Scores::new(v.clone(), flags.clone())
            }
        };
        let candidates: Vec<Scores> = l[1..].iter().map(scores).collect();
        let j = decide_among(Baseline::Serving, &scores(&l[0]), &candidates, policy);
        if j.decision().candidate_won() {
            promoted += 1;
        }
    }
    promoted as f64 / trials as f64
}

/// Serving model and equally good candidates: leaning the other way.
pub fn equal(candidates: usize) -> Vec<(f64, f64)> {
    let mut m = vec![(LEAN, 0.2)];
    m.extend(std::iter::repeat_n((-LEAN, 0.2), candidates));
    m
}

/// Serving model and a candidate whose expected loss is `gain` lower.
pub fn better(gain: f64) -> Vec<(f64, f64)> {
    let target = (1.0 - gain) * expected(LEAN, 0.2);
    let s = (target - expected(-LEAN, 0.0)).max(0.0).sqrt();
    vec![(LEAN, 0.2), (-LEAN, s)]
}

/// Smallest count of holdout batches at which a candidate `gain` better is
/// promoted in at least `share` of trials (`None` up to `max`).
pub fn batches_to_promote(gain: f64, share: f64, trials: usize, max: usize) -> Option<usize> {
    (3..=max).find(|&b| promotion_rate(trials, b, 100 + b as u64, &better(gain), true) >= share)
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn the_two_leaning_models_are_equally_good_and_the_better_one_is_better() {
        let (a, b) = (expected(LEAN, 0.2), expected(-LEAN, 0.2));
        assert!((a - b).abs() < 1e-15);
        let m = better(0.1);
        let gain = 1.0 - expected(m[1].0, m[1].1) / expected(m[0].0, m[0].1);
        assert!((gain - 0.1).abs() < 1e-12, "{gain}");
    }

    #[test]
    fn false_promotions_stay_at_alpha_with_one_candidate_or_two() {
        // 1,000 trials of 10 holdout batches: binomial sd at 5% is 0.7%.
        for k in [1, 2] {
            let rate = promotion_rate(1_000, 10, 7 + k as u64, &equal(k), true);
            assert!(rate <= 0.05 + 0.021, "{k} candidate(s): {rate}");
        }
    }

    #[test]
    fn rows_taken_as_independent_promote_far_too_often() {
        // The defect the batch as unit removes: shown so that this suite
        // would notice if the gate went back to counting rows.
        let rate = promotion_rate(500, 10, 9, &equal(1), false);
        assert!(rate > 0.07, "{rate}");
    }

    #[test]
    fn a_real_ten_percent_gain_is_promoted_once_enough_batches_are_in() {
        let few = promotion_rate(300, 10, 20, &better(0.1), true);
        let many = promotion_rate(300, 40, 21, &better(0.1), true);
        assert!(
            many >= 0.25 && many > few + 0.1,
            "{few} at 10 batches, {many} at 40"
        );
        // And never with fewer batches than the policy needs.
        assert_eq!(promotion_rate(100, 2, 22, &better(0.5), true), 0.0);
    }

    /// Measurement, not a check: the gate's false-promotion rate and its
    /// power against holdout batches and rows per batch, with no row
    /// minimum, to choose `min_holdout_rows` beside `min_holdout_batches`.
    /// `cargo test --release --lib gate::simulate::tests::evidence_table -- --ignored --nocapture`
    #[test]
    #[ignore]
    fn evidence_table() {
        println!(
            "| holdout batches | rows per batch | rows | false promotions | 20% gain promoted | 10% gain promoted |"
        );
        println!("|---|---|---|---|---|---|");
        for batches in [3, 5, 7, 10, 14] {
            let policy = Policy {
                min_holdout_rows: 0,
                min_batches: 2,
                ..policy()
            };
            for rows in [5, 10, 30, 100] {
                let seed = (batches * 1000 + rows) as u64;
                let fp = promotion_rate_with(&policy, 2_000, batches, rows, seed, &equal(1), true);
                let p20 =
                    promotion_rate_with(&policy, 500, batches, rows, seed + 1, &better(0.2), true);
                let p10 =
                    promotion_rate_with(&policy, 500, batches, rows, seed + 2, &better(0.1), true);
                println!(
                    "| {batches} | {rows} | {} | {:.1}% | {:.0}% | {:.0}% |",
                    batches * rows,
                    100.0 * fp,
                    100.0 * p20,
                    100.0 * p10
                );
            }
        }
    }
}
