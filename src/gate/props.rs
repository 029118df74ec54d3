//! Property tests of `decide`: invariants that must hold for any losses.

use proptest::prelude::*;

use super::decide::{Baseline, Decision, Policy, Scores, decide, decide_among};
use super::mean;

/// Baseline losses, a per-row multiplier for the candidate (so it is often
/// clearly better, sometimes worse), new-row flags, and a policy.
fn case() -> impl Strategy<Value = (Scores, Scores, Policy)> {
    (2usize..300)
        .prop_flat_map(|rows| {
            (
                prop::collection::vec(0.0f64..10.0, rows),
                prop::collection::vec(0.2f64..1.3, rows),
                prop::collection::vec(any::<bool>(), rows),
                0.0f64..0.2,
                prop::sample::select(vec![0.001, 0.01, 0.05, 0.1, 0.5]),
                0usize..250,
                any::<bool>(),
            )
        })
        .prop_map(
            |(base, factor, flags, min_improvement, alpha, min_holdout_rows, require_approval)| {
                let cand: Vec<f64> = base.iter().zip(&factor).map(|(b, f)| b * f).collect();
                let policy = Policy {
                    min_improvement,
                    alpha,
                    min_holdout_rows,
                    min_batches: 2,
                    require_approval,
                };
                (
                    Scores::new(base, flags.clone()),
                    Scores::new(cand, flags),
                    policy,
                )
            },
        )
}

/// The variant names of the shortfalls, for comparing decisions whose
/// numbers differ only by rounding.
fn outline(decision: &Decision) -> (String, Vec<String>) {
    let reasons = match decision {
        Decision::Keep { shortfalls, .. } => shortfalls
            .iter()
            .map(|s| {
                format!("{s:?}")
                    .split([' ', '(', '{'])
                    .next()
                    .unwrap_or_default()
                    .to_string()
            })
            .collect(),
        _ => Vec::new(),
    };
    (decision.kind().to_string(), reasons)
}

proptest! {
    #[test]
    fn never_promotes_a_candidate_with_higher_mean_loss((base, cand, policy) in case()) {
        let decision = decide(&base, &cand, &policy);
        if mean(&cand.losses) >= mean(&base.losses) {
            prop_assert!(!decision.candidate_won(), "{}", decision.reason());
        }
    }

    #[test]
    fn never_promotes_below_min_holdout_rows((base, cand, policy) in case()) {
        let decision = decide(&base, &cand, &policy);
        if base.losses.len() < policy.min_holdout_rows {
            prop_assert!(!decision.candidate_won(), "{}", decision.reason());
        }
    }

    #[test]
    fn a_second_candidate_never_helps_the_first_through((base, cand, policy) in case()) {
        // Holm's correction only makes each test stricter: whatever the
        // second candidate is, the first is promoted with it only if it
        // would have been promoted alone.
        let alone = decide(&base, &cand, &policy);
        let other = Scores::new(base.losses.iter().map(|x| x * 0.97).collect(), base.new_rows.clone());
        let together = decide_among(Baseline::Serving, &base, &[cand.clone(), other], &policy);
        prop_assert!(!together.decisions[0].candidate_won() || alone.candidate_won(),
            "{} / {}", alone.reason(), together.decisions[0].reason());
        if let (Some(a), Some(b)) = (alone.evidence(), together.decisions[0].evidence()) {
            prop_assert!(b.p >= a.p || (a.p.is_nan() && b.p.is_nan()));
        }
    }

    #[test]
    fn scaling_all_losses_keeps_the_decision(
        (base, cand, policy) in case(),
        scale in prop::sample::select(vec![1e-3, 0.37, 2.0, 13.5, 1e3]),
    ) {
        let scaled = |s: &Scores| Scores::new(s.losses.iter().map(|x| x * scale).collect(), s.new_rows.clone());
        let before = decide(&base, &cand, &policy);
        let after = decide(&scaled(&base), &scaled(&cand), &policy);
        prop_assert_eq!(outline(&before), outline(&after), "{} / {}", before.reason(), after.reason());
    }

    #[test]
    fn arbitrary_numbers_never_panic(
        base in prop::collection::vec(any::<f64>(), 0..20),
        cand in prop::collection::vec(any::<f64>(), 0..20),
        flags in prop::collection::vec(any::<bool>(), 0..20),
    ) {
        let policy = Policy { min_improvement: 0.0, alpha: 0.05, min_holdout_rows: 0, min_batches: 2, require_approval: false };
        let decision = decide(&Scores::new(base.clone(), flags.clone()), &Scores::new(cand, flags), &policy);
        prop_assert!(!decision.reason().is_empty());
        if base.iter().any(|x| !x.is_finite() || *x < 0.0) {
            prop_assert!(!decision.candidate_won());
        }
    }
}

#[test]
fn the_generated_cases_include_promotions_and_keeps() {
    // Guards the properties above against being vacuous: cases drawn from
    // the very generator they use include promotions and keeps.
    use proptest::strategy::ValueTree;
    use proptest::test_runner::TestRunner;
    let mut runner = TestRunner::deterministic();
    let strategy = case();
    let (mut won, mut kept) = (0, 0);
    for _ in 0..300 {
        let (base, cand, policy) = strategy.new_tree(&mut runner).expect("a case").current();
        if decide(&base, &cand, &policy).candidate_won() {
            won += 1;
        } else {
            kept += 1;
        }
    }
    assert!(won >= 10 && kept >= 10, "{won} promoted, {kept} kept");
}
