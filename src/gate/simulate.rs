//! Error rates of the gate by simulation, on synthetic losses where the
//! truth is known.
//!
//! Each trial scores two regression models on the same holdout rows: the
//! target's noise ε ~ N(0, 1) is shared, each model adds its own error
//! e ~ N(0, s²), and the per-row loss is (ε + e)², so the true mean loss is
//! 1 + s². Equal s means no real difference; a smaller candidate s is a real
//! improvement of known size. A share of the rows is flagged new at random.

use super::decide::{Policy, Scores, decide, regression_check};
use crate::rng::Rng;

/// Holdout rows per trial in the asserted runs.
const ROWS: usize = 300;
const NEW_SHARE: f64 = 0.3;

fn policy(min_improvement: f64) -> Policy {
    Policy {
        min_improvement,
        alpha: 0.05,
        min_holdout_rows: 200,
        require_approval: false,
    }
}

/// Share of `trials` seeded trials in which the candidate was promoted.
fn promotion_rate(
    trials: usize,
    rows: usize,
    seed: u64,
    sd_serving: f64,
    sd_candidate: f64,
    policy: &Policy,
) -> f64 {
    let mut rng = Rng::new(seed);
    let mut promoted = 0usize;
    for _ in 0..trials {
        let mut serving = Vec::with_capacity(rows);
        let mut candidate = Vec::with_capacity(rows);
        let mut flags = Vec::with_capacity(rows);
        for _ in 0..rows {
            let noise = rng.normal();
            serving.push((noise + sd_serving * rng.normal()).powi(2));
            candidate.push((noise + sd_candidate * rng.normal()).powi(2));
            flags.push(rng.uniform() < NEW_SHARE);
        }
        let decision = decide(
            &Scores::new(serving, flags.clone()),
            &Scores::new(candidate, flags),
            policy,
        );
        if decision.candidate_won() {
            promoted += 1;
        }
    }
    promoted as f64 / trials as f64
}

/// True mean loss 1 + s² for a model with error sd s.
fn relative_gain(sd_serving: f64, sd_candidate: f64) -> f64 {
    let (s, c) = (
        1.0 + sd_serving * sd_serving,
        1.0 + sd_candidate * sd_candidate,
    );
    (s - c) / s
}

/// Share of trials in which the fresh-data check reports a regression of a
/// serving model with error sd `sd_serving` against a predecessor with
/// `sd_previous`.
fn rollback_rate(trials: usize, rows: usize, seed: u64, sd_serving: f64, sd_previous: f64) -> f64 {
    let mut rng = Rng::new(seed);
    let mut flagged = 0usize;
    for _ in 0..trials {
        let (mut serving, mut previous) = (Vec::with_capacity(rows), Vec::with_capacity(rows));
        for _ in 0..rows {
            let noise = rng.normal();
            serving.push((noise + sd_serving * rng.normal()).powi(2));
            previous.push((noise + sd_previous * rng.normal()).powi(2));
        }
        if regression_check(&serving, &previous, 0.05).regressed() {
            flagged += 1;
        }
    }
    flagged as f64 / trials as f64
}

#[test]
fn false_rollback_rate_without_a_real_difference() {
    // Same reasoning and bound as for false promotions: a one-sided test at
    // alpha = 0.05 on 400 trials, 8% allows ~2.7 standard errors of noise.
    let rate = rollback_rate(400, ROWS, 13, 0.5, 0.5);
    assert!(rate <= 0.08, "false-rollback rate {rate}");
    // A real regression (error sd 0.2 → 0.5) is caught most of the time.
    let caught = rollback_rate(400, ROWS, 14, 0.5, 0.2);
    assert!(caught >= 0.85, "regression detection rate {caught}");
}

#[test]
fn false_promotion_rate_without_a_real_difference() {
    // No real difference (both error sd 0.5), min_improvement 0 so only the
    // test stands between noise and a promotion. The one-sided test at
    // alpha = 0.05 should promote in about 5% of trials or fewer (the
    // guards only remove promotions). Over 400 trials the binomial standard
    // error at 5% is about 1.1 points, so 8% is ~2.7 standard errors above
    // the nominal rate: a bound that a correct gate passes and a gate
    // testing two-sided, or at the wrong tail, would not.
    let rate = promotion_rate(400, ROWS, 11, 0.5, 0.5, &policy(0.0));
    assert!(rate <= 0.08, "false-promotion rate {rate}");
    // With the default 1% minimum improvement it can only be lower.
    let with_minimum = promotion_rate(400, ROWS, 11, 0.5, 0.5, &policy(0.01));
    assert!(with_minimum <= rate, "{with_minimum} > {rate}");
}

#[test]
fn real_improvement_is_promoted_most_of_the_time() {
    // Candidate error sd 0.2 vs 0.5: true mean loss 1.04 vs 1.25, a 16.8%
    // improvement. The long run in `print_rates` (20 000 trials of 300
    // rows) promoted it in 94.6% of trials; over 400 trials the binomial
    // standard error is about 1.1 points, so at least 85% must be reached.
    assert!((relative_gain(0.5, 0.2) - 0.168).abs() < 1e-9);
    let rate = promotion_rate(400, ROWS, 12, 0.5, 0.2, &policy(0.01));
    assert!(rate >= 0.85, "detection rate {rate}");
    // A smaller gain is detected less often, a sanity check on the ordering.
    let smaller = promotion_rate(400, ROWS, 12, 0.5, 0.4, &policy(0.01));
    assert!(smaller < rate, "{smaller} >= {rate}");
}

/// Longer runs for the report:
/// `cargo test --release --lib gate::simulate::print_rates -- --ignored --nocapture`
#[test]
#[ignore = "long run for the report; prints the rates"]
fn print_rates() {
    let trials = 20_000;
    for rows in [ROWS, 1000] {
        println!("{trials} trials of {rows} holdout rows, {NEW_SHARE} of them new, alpha 0.05");
        for min_improvement in [0.0, 0.01] {
            let rate = promotion_rate(trials, rows, 101, 0.5, 0.5, &policy(min_improvement));
            println!("  no real difference, min_improvement {min_improvement}: promoted {rate:.4}");
        }
        for sd_candidate in [0.45, 0.4, 0.3, 0.2] {
            let gain = relative_gain(0.5, sd_candidate);
            let rate = promotion_rate(trials, rows, 102, 0.5, sd_candidate, &policy(0.01));
            println!(
                "  candidate error sd {sd_candidate} vs 0.5 (true gain {:.1}%), min_improvement 0.01: promoted {rate:.4}",
                100.0 * gain
            );
        }
        let false_alarm = rollback_rate(trials, rows, 103, 0.5, 0.5);
        println!("  fresh-data check, no real difference: regression reported {false_alarm:.4}");
        let caught = rollback_rate(trials, rows, 104, 0.5, 0.2);
        println!("  fresh-data check, error sd 0.2 -> 0.5: regression reported {caught:.4}");
    }
}
