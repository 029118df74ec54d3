//! The promotion decision: given per-row holdout losses of a baseline (the
//! serving model, or the trivial predictor for the first model) and of one
//! or more candidates on the SAME rows, decide Promote, Keep or
//! AwaitApproval, with every number that led there and the reason in words.
//!
//! The batch is the unit of evidence: rows of one file share that day, so
//! the paired differences are tested with a cluster-robust t, batches as
//! clusters ([`super::cluster::clustered_t`]); with fewer batches than
//! `min_batches` the answer is "not enough evidence yet".
//!
//! Rules (all must hold to promote):
//! 1. at least `min_holdout_rows` rows from at least `min_batches` batches;
//! 2. the candidate's mean loss is strictly lower, and lower by at least
//!    `min_improvement` relative to the baseline's mean loss;
//! 3. the one-sided cluster-robust t-test of d_i = baseline_i − candidate_i
//!    (H1: mean d > 0) gives p ≤ `alpha`, after Holm's correction for the
//!    number of candidates judged in the same cycle;
//! 4. on the rows that arrived after the serving model was trained ("new
//!    rows") the candidate is not significantly worse (one-sided, `alpha`);
//! 5. on the other rows ("older rows") it is not significantly worse either,
//!    so gains on new data cannot hide forgetting of old data.
//!
//! A guard subset from two or more batches is tested with the same
//! cluster-robust t; a subset from one batch is tested row by row, which
//! asks "worse on that day's rows" (conditional on the day). A subset with
//! fewer than [`GUARD_MIN_ROWS`] rows does not block. The guards only
//! remove promotions, so the chance of promoting a candidate that is not
//! better stays at or below `alpha`, with one candidate or several.
//! Among the candidates that pass every rule, the one with the lowest mean
//! holdout loss is promoted; with `require_approval` it waits. Inputs that
//! cannot be compared are a `Keep` carrying the reason, never a panic.

use std::cmp::Ordering;
use std::fmt;

use super::cluster::{ClusteredT, clustered_t, holm_adjust};
use super::paired::{differences, paired_t, wilcoxon_signed_rank};
use super::{InputError, mean, show};
use crate::config::GateConfig;

/// Smallest subset of rows on which a guard runs its test.
pub const GUARD_MIN_ROWS: usize = 2;

/// The gate's settings, usually from `[gate]` in the config.
#[derive(Debug, Clone, Copy, PartialEq)]
pub struct Policy {
    /// Smallest relative drop in mean loss that counts, e.g. 0.01 for 1%.
    pub min_improvement: f64,
    /// Significance level of every one-sided test the gate runs.
    pub alpha: f64,
    /// No promotion on fewer holdout rows than this.
    pub min_holdout_rows: usize,
    /// No promotion on holdout rows from fewer batches than this (at least 2).
    pub min_batches: usize,
    /// A winning candidate waits for a person instead of serving at once.
    pub require_approval: bool,
}

impl From<&GateConfig> for Policy {
    fn from(config: &GateConfig) -> Policy {
        Policy {
            min_improvement: config.min_improvement,
            alpha: config.alpha,
            min_holdout_rows: config.min_holdout_rows,
            min_batches: config.min_holdout_batches,
            require_approval: config.require_approval,
        }
    }
}

impl Policy {
    /// Why this policy cannot be applied, or `None` when it can.
    pub fn problem(&self) -> Option<String> {
        if !(self.min_improvement.is_finite() && self.min_improvement >= 0.0) {
            return Some(format!(
                "min_improvement is {}; it must be a finite number of 0 or more",
                self.min_improvement
            ));
        }
        if !(self.alpha > 0.0 && self.alpha <= 0.5) {
            return Some(format!(
                "alpha is {}; it must be above 0 and at most 0.5, since a one-sided test at a \
                 larger level can pass a candidate that did worse",
                self.alpha
            ));
        }
        None
    }

    /// Batches a decision needs (never fewer than 2: one batch says nothing
    /// about how days differ).
    pub fn batches_needed(&self) -> usize {
        self.min_batches.max(2)
    }
}

/// One model's per-row holdout losses, with a flag per row telling whether
/// the row arrived after the serving model was trained, and the batch each
/// row came from. The baseline's and the candidate's `Scores` must describe
/// the same rows in the same order.
#[derive(Debug, Clone, PartialEq, Default)]
pub struct Scores {
    /// Per-row losses (squared error or log loss): finite and ≥ 0.
    pub losses: Vec<f64>,
    /// `new_rows[i]`: row i arrived after the serving model was trained.
    pub new_rows: Vec<bool>,
    /// `batches[i]`: the batch (cluster) row i came from.
    pub batches: Vec<u64>,
}

impl Scores {
    /// Rows known to be independent of each other: each is its own batch.
    /// For simulations and tests; stored rows always carry their batch.
    pub fn new(losses: Vec<f64>, new_rows: Vec<bool>) -> Scores {
        let batches = (0..losses.len() as u64).collect();
        Scores {
            losses,
            new_rows,
            batches,
        }
    }

    /// Rows grouped by the batch they came from.
    pub fn clustered(losses: Vec<f64>, new_rows: Vec<bool>, batches: Vec<u64>) -> Scores {
        Scores {
            losses,
            new_rows,
            batches,
        }
    }
}

/// What the candidate was compared with.
#[derive(Debug, Clone, Copy, PartialEq, Eq)]
pub enum Baseline {
    /// The model currently serving.
    Serving,
    /// The trivial predictor (training mean or class frequencies), for the
    /// first model.
    Trivial,
}

impl Baseline {
    pub fn name(self) -> &'static str {
        match self {
            Baseline::Serving => "serving model",
            Baseline::Trivial => "trivial predictor",
        }
    }
}

/// Outcome of a "not significantly worse" guard.
#[derive(Debug, Clone, Copy, PartialEq, Eq)]
pub enum GuardStatus {
    Passed,
    /// The candidate is significantly worse on these rows (or the p-value
    /// could not be computed, which fails safe).
    Failed,
    /// Fewer than [`GUARD_MIN_ROWS`] rows: nothing to test.
    NotTested,
}

/// A guard on a subset of the holdout rows (new or older).
#[derive(Debug, Clone, Copy, PartialEq)]
pub struct Guard {
    pub rows: usize,
    pub mean_loss_baseline: Option<f64>,
    pub mean_loss_candidate: Option<f64>,
    /// Test on the subset (cluster-robust over its batches, or row by row
    /// within its one batch: `clusters == 1`); `p_less` is the evidence
    /// that the candidate is worse there.
    pub test: Option<ClusteredT>,
    pub status: GuardStatus,
}

/// Every number behind a decision.
#[derive(Debug, Clone, PartialEq)]
pub struct Evidence {
    pub baseline: Baseline,
    pub rows: usize,
    /// Batches the holdout rows came from (the test's clusters).
    pub batches: usize,
    /// Batches a decision needs.
    pub batches_needed: usize,
    pub mean_loss_baseline: f64,
    pub mean_loss_candidate: f64,
    /// (baseline − candidate) / baseline mean loss; `None` when the
    /// baseline's mean loss is zero.
    pub relative_improvement: Option<f64>,
    /// One-sided cluster-robust t on all rows; `test.p_greater` is the
    /// candidate's own p.
    pub test: ClusteredT,
    /// Candidates judged together in this cycle (Holm's k).
    pub candidates: usize,
    /// The decision's p: `test.p_greater` after Holm's correction for
    /// `candidates` (equal to it for one candidate).
    pub p: f64,
    /// Wilcoxon signed-rank p on the per-batch mean differences that the
    /// candidate's losses tend to be lower: a second opinion that does not
    /// rest on the mean. Recorded, not part of the rule.
    pub wilcoxon_p: Option<f64>,
    pub new_rows: Guard,
    pub old_rows: Guard,
    pub policy: Policy,
}

/// One reason a candidate was kept.
#[derive(Debug, Clone, PartialEq)]
pub enum Shortfall {
    InvalidPolicy(String),
    InvalidInput(InputError),
    /// The two score sets flag different rows as new, or put rows in
    /// different batches.
    RowsDiffer,
    TooFewRows {
        have: usize,
        need: usize,
    },
    /// Not enough evidence yet: the holdout rows come from too few batches.
    TooFewBatches {
        have: usize,
        need: usize,
    },
    NotLower {
        baseline: Baseline,
        mean_baseline: f64,
        mean_candidate: f64,
    },
    SmallImprovement {
        relative: Option<f64>,
        need: f64,
    },
    NotSignificant {
        p: f64,
        alpha: f64,
        candidates: usize,
    },
    /// The overall p-value was not a number.
    NumericalFailure,
    WorseOnNewRows {
        rows: usize,
        p: f64,
        alpha: f64,
    },
    WorseOnOldRows {
        rows: usize,
        p: f64,
        alpha: f64,
    },
}

impl fmt::Display for Shortfall {
    fn fmt(&self, f: &mut fmt::Formatter<'_>) -> fmt::Result {
        match self {
            Shortfall::InvalidPolicy(why) => write!(f, "the gate policy cannot be applied: {why}"),
            Shortfall::InvalidInput(e) => write!(f, "the scores cannot be compared: {e}"),
            Shortfall::RowsDiffer => f.write_str(
                "the two score sets flag different rows as new or put them in different batches, \
                 so they do not describe the same rows",
            ),
            Shortfall::TooFewRows { have, need } => {
                write!(f, "only {have} holdout rows, at least {need} required")
            }
            Shortfall::TooFewBatches { have, need } => write!(
                f,
                "not enough evidence yet: holdout rows from {have} batch{}, at least {need} \
                 needed (rows of one batch share a day, so batches are the unit of evidence)",
                if *have == 1 { "" } else { "es" }
            ),
            Shortfall::NotLower {
                baseline,
                mean_baseline,
                mean_candidate,
            } => write!(
                f,
                "the candidate's mean loss {} is not below the {}'s {}",
                show(*mean_candidate),
                baseline.name(),
                show(*mean_baseline)
            ),
            Shortfall::SmallImprovement {
                relative: Some(r),
                need,
            } => write!(
                f,
                "the relative improvement {}% is below the required {}%",
                show(100.0 * r),
                show(100.0 * need)
            ),
            Shortfall::SmallImprovement { relative: None, .. } => {
                f.write_str("the baseline's mean loss is zero, so nothing can improve on it")
            }
            Shortfall::NotSignificant {
                p,
                alpha,
                candidates,
            } => {
                write!(
                    f,
                    "the improvement is not significant: one-sided cluster-robust p = {}{} > alpha {}",
                    show(*p),
                    if *candidates > 1 {
                        format!(" (Holm-adjusted for {candidates} candidates)")
                    } else {
                        String::new()
                    },
                    show(*alpha)
                )
            }
            Shortfall::NumericalFailure => f.write_str("the test's p-value could not be computed"),
            Shortfall::WorseOnNewRows { rows, p, alpha } => write!(
                f,
                "the candidate is significantly worse on the {rows} new rows \
                 (one-sided p = {} ≤ alpha {})",
                show(*p),
                show(*alpha)
            ),
            Shortfall::WorseOnOldRows { rows, p, alpha } => write!(
                f,
                "the candidate is significantly worse on the {rows} older rows, i.e. it forgot \
                 (one-sided p = {} ≤ alpha {})",
                show(*p),
                show(*alpha)
            ),
        }
    }
}

/// The gate's answer. A value, never an error.
#[derive(Debug, Clone, PartialEq)]
pub enum Decision {
    /// The candidate becomes the serving model.
    Promote { evidence: Evidence },
    /// The candidate won but `require_approval` is set: it waits.
    AwaitApproval { evidence: Evidence },
    /// The baseline stays. `evidence` is `None` when the inputs could not be
    /// compared at all.
    Keep {
        evidence: Option<Evidence>,
        shortfalls: Vec<Shortfall>,
    },
}

impl Decision {
    /// Short name for logs: "promote", "await-approval" or "keep".
    pub fn kind(&self) -> &'static str {
        match self {
            Decision::Promote { .. } => "promote",
            Decision::AwaitApproval { .. } => "await-approval",
            Decision::Keep { .. } => "keep",
        }
    }

    /// True when the candidate won (whether or not it waits for approval).
    pub fn candidate_won(&self) -> bool {
        !matches!(self, Decision::Keep { .. })
    }

    pub fn evidence(&self) -> Option<&Evidence> {
        match self {
            Decision::Promote { evidence } | Decision::AwaitApproval { evidence } => Some(evidence),
            Decision::Keep { evidence, .. } => evidence.as_ref(),
        }
    }

    /// True when the only reasons to keep are "not enough evidence yet"
    /// (too few rows or batches).
    pub fn waits_for_evidence(&self) -> bool {
        match self {
            Decision::Keep { shortfalls, .. } => {
                !shortfalls.is_empty()
                    && shortfalls.iter().any(|s| {
                        matches!(
                            s,
                            Shortfall::TooFewBatches { .. } | Shortfall::TooFewRows { .. }
                        )
                    })
            }
            _ => false,
        }
    }

    /// The decision and its grounds in plain words.
    pub fn reason(&self) -> String {
        match self {
            Decision::Promote { evidence } => {
                format!("promote: {}; {}", summary(evidence), guards_text(evidence))
            }
            Decision::AwaitApproval { evidence } => format!(
                "wait for approval (the candidate passed the gate): {}; {}",
                summary(evidence),
                guards_text(evidence)
            ),
            Decision::Keep {
                evidence,
                shortfalls,
            } => {
                let why: Vec<String> = shortfalls.iter().map(ToString::to_string).collect();
                match evidence {
                    Some(e) => format!("keep: {} (evidence: {})", why.join("; "), summary(e)),
                    None => format!("keep: {}", why.join("; ")),
                }
            }
        }
    }
}

fn summary(e: &Evidence) -> String {
    let change = match e.relative_improvement {
        Some(r) => format!("{}% lower", show(100.0 * r)),
        None => "relative change undefined".to_string(),
    };
    let holm = if e.candidates > 1 {
        format!(
            ", {} after Holm's correction for {} candidates",
            show(e.p),
            e.candidates
        )
    } else {
        String::new()
    };
    format!(
        "mean loss {} for the {} vs {} for the candidate on {} holdout rows from {} batches \
         ({} needed; {change}, at least {}% required); one-sided cluster-robust t = {} with {} df, \
         p = {}{holm} (alpha {})",
        show(e.mean_loss_baseline),
        e.baseline.name(),
        show(e.mean_loss_candidate),
        e.rows,
        e.batches,
        e.batches_needed,
        show(100.0 * e.policy.min_improvement),
        show(e.test.t),
        e.test.df,
        show(e.test.p_greater),
        show(e.policy.alpha)
    )
}

fn guard_text(label: &str, g: &Guard) -> String {
    let within = |t: &ClusteredT| {
        if t.clusters == 1 { " of one batch" } else { "" }
    };
    match (g.status, g.test) {
        (GuardStatus::NotTested, _) | (_, None) => {
            format!("{} {label} rows, too few to test", g.rows)
        }
        (GuardStatus::Passed, Some(t)) => {
            format!(
                "not significantly worse on {} {label} rows{} (p = {})",
                g.rows,
                within(&t),
                show(t.p_less)
            )
        }
        (GuardStatus::Failed, Some(t)) => {
            format!(
                "significantly worse on {} {label} rows{} (p = {})",
                g.rows,
                within(&t),
                show(t.p_less)
            )
        }
    }
}

fn guards_text(e: &Evidence) -> String {
    format!(
        "{}; {}",
        guard_text("new", &e.new_rows),
        guard_text("older", &e.old_rows)
    )
}

/// Compares a candidate with the serving model on the same holdout rows.
pub fn decide(serving: &Scores, candidate: &Scores, policy: &Policy) -> Decision {
    judge(Baseline::Serving, serving, candidate, policy, 1, None)
}

/// The first model: the candidate must beat the trivial predictor (the
/// training mean, or the training class frequencies) by the same rules.
pub fn decide_first(trivial: &Scores, candidate: &Scores, policy: &Policy) -> Decision {
    judge(Baseline::Trivial, trivial, candidate, policy, 1, None)
}

/// The gate's verdict on every candidate of one cycle, and which one the
/// cycle acts on.
#[derive(Debug, Clone, PartialEq)]
pub struct Judgement {
    /// One decision per candidate, in the input order.
    pub decisions: Vec<Decision>,
    /// The candidate the cycle acts on: the winner with the lowest mean
    /// loss, or when none won, the candidate with the lowest mean loss.
    pub chosen: usize,
}

impl Judgement {
    pub fn decision(&self) -> &Decision {
        &self.decisions[self.chosen]
    }
}

/// Judges several candidates against one baseline on the same rows. Every
/// candidate is tested, each p is Holm-adjusted for the number of
/// candidates, and only candidates that pass every rule can be chosen, so
/// picking the best-looking of several on the very rows that test it does
/// not raise the chance of a false promotion above alpha.
pub fn decide_among(
    baseline: Baseline,
    base: &Scores,
    candidates: &[Scores],
    policy: &Policy,
) -> Judgement {
    let k = candidates.len();
    if k == 0 {
        return Judgement {
            decisions: vec![keep(Shortfall::InvalidInput(InputError::TooFew {
                what: "candidates",
                need: 1,
                have: 0,
            }))],
            chosen: 0,
        };
    }
    // Raw one-sided p of each candidate, then Holm.
    let raw: Vec<f64> = candidates
        .iter()
        .map(
            |c| match judge(baseline, base, c, policy, 1, None).evidence() {
                Some(e) => e.test.p_greater,
                None => f64::NAN,
            },
        )
        .collect();
    let adjusted = holm_adjust(&raw);
    let decisions: Vec<Decision> = candidates
        .iter()
        .zip(&adjusted)
        .map(|(c, p)| judge(baseline, base, c, policy, k, Some(*p)))
        .collect();
    let loss = |i: usize| mean(&candidates[i].losses);
    let pick = |won: bool| {
        (0..k)
            .filter(|&i| decisions[i].candidate_won() == won)
            .min_by(|&a, &b| loss(a).total_cmp(&loss(b)))
    };
    let chosen = pick(true).or_else(|| pick(false)).unwrap_or(0);
    Judgement { decisions, chosen }
}

fn keep(shortfall: Shortfall) -> Decision {
    Decision::Keep {
        evidence: None,
        shortfalls: vec![shortfall],
    }
}

fn check_losses(what: &'static str, scores: &Scores) -> Result<(), InputError> {
    super::check_same_len(what, scores.losses.len(), scores.new_rows.len())?;
    super::check_same_len(what, scores.losses.len(), scores.batches.len())?;
    super::check_finite(what, &scores.losses)?;
    match scores.losses.iter().position(|x| *x < 0.0) {
        Some(index) => Err(InputError::Negative { what, index }),
        None => Ok(()),
    }
}

/// Per-batch mean differences, in batch order.
fn batch_means(d: &[f64], batches: &[u64]) -> Vec<f64> {
    let mut sums: std::collections::BTreeMap<u64, (f64, usize)> = Default::default();
    for (x, b) in d.iter().zip(batches) {
        let e = sums.entry(*b).or_default();
        e.0 += x;
        e.1 += 1;
    }
    sums.values().map(|(s, n)| s / *n as f64).collect()
}

/// The main test: cluster-robust over batches; `None` with one batch.
fn main_test(d: &[f64], batches: &[u64]) -> Option<ClusteredT> {
    clustered_t(d, batches).ok()
}

/// A guard's test on the rows where `picked` holds: over their batches
/// when there are two or more, else row by row within the one batch.
fn subset_test(d: &[f64], batches: &[u64]) -> Option<ClusteredT> {
    if d.len() < GUARD_MIN_ROWS {
        return None;
    }
    if let Ok(t) = clustered_t(d, batches) {
        return Some(t);
    }
    let t = paired_t(d).ok()?;
    Some(ClusteredT {
        n: t.n,
        clusters: 1,
        mean: t.mean,
        se: t.sd / (t.n as f64).sqrt(),
        t: t.t,
        df: t.df,
        p_greater: t.p_greater,
        p_less: t.p_less,
        p_two_sided: t.p_two_sided,
    })
}

fn judge(
    baseline: Baseline,
    base: &Scores,
    cand: &Scores,
    policy: &Policy,
    candidates: usize,
    adjusted_p: Option<f64>,
) -> Decision {
    if let Some(why) = policy.problem() {
        return keep(Shortfall::InvalidPolicy(why));
    }
    let checked = check_losses("baseline losses and row flags", base)
        .and_then(|()| check_losses("candidate losses and row flags", cand))
        .and_then(|()| differences(&base.losses, &cand.losses));
    let d = match checked {
        Ok(d) => d,
        Err(e) => return keep(Shortfall::InvalidInput(e)),
    };
    if base.new_rows != cand.new_rows || base.batches != cand.batches {
        return keep(Shortfall::RowsDiffer);
    }
    let rows = d.len();
    let need_rows = policy.min_holdout_rows.max(2);
    let need_batches = policy.batches_needed();
    let batch_count = base
        .batches
        .iter()
        .collect::<std::collections::BTreeSet<_>>()
        .len();
    let test = match main_test(&d, &base.batches) {
        Some(test) => test,
        None => {
            let mut shortfalls = vec![Shortfall::TooFewBatches {
                have: batch_count,
                need: need_batches,
            }];
            if rows < need_rows {
                shortfalls.push(Shortfall::TooFewRows {
                    have: rows,
                    need: need_rows,
                });
            }
            return Decision::Keep {
                evidence: None,
                shortfalls,
            };
        }
    };
    let mean_loss_baseline = mean(&base.losses);
    let mean_loss_candidate = mean(&cand.losses);
    let relative_improvement = (mean_loss_baseline > 0.0)
        .then(|| (mean_loss_baseline - mean_loss_candidate) / mean_loss_baseline);
    let p = adjusted_p.unwrap_or(test.p_greater);
    let evidence = Evidence {
        baseline,
        rows,
        batches: test.clusters,
        batches_needed: need_batches,
        mean_loss_baseline,
        mean_loss_candidate,
        relative_improvement,
        test,
        candidates,
        p,
        wilcoxon_p: wilcoxon_signed_rank(&batch_means(&d, &base.batches))
            .ok()
            .map(|w| w.p_greater),
        new_rows: guard(base, cand, true, policy.alpha),
        old_rows: guard(base, cand, false, policy.alpha),
        policy: *policy,
    };

    let mut shortfalls = Vec::new();
    if rows < need_rows {
        shortfalls.push(Shortfall::TooFewRows {
            have: rows,
            need: need_rows,
        });
    }
    if test.clusters < need_batches {
        shortfalls.push(Shortfall::TooFewBatches {
            have: test.clusters,
            need: need_batches,
        });
    }
    if mean_loss_candidate.partial_cmp(&mean_loss_baseline) != Some(Ordering::Less) {
        shortfalls.push(Shortfall::NotLower {
            baseline,
            mean_baseline: mean_loss_baseline,
            mean_candidate: mean_loss_candidate,
        });
    } else if !relative_improvement.is_some_and(|r| r >= policy.min_improvement) {
        shortfalls.push(Shortfall::SmallImprovement {
            relative: relative_improvement,
            need: policy.min_improvement,
        });
    }
    if p.is_nan() {
        shortfalls.push(Shortfall::NumericalFailure);
    } else if p > policy.alpha {
        shortfalls.push(Shortfall::NotSignificant {
            p,
            alpha: policy.alpha,
            candidates,
        });
    }
    for (g, new) in [(&evidence.new_rows, true), (&evidence.old_rows, false)] {
        if let (GuardStatus::Failed, Some(t)) = (g.status, g.test) {
            let (rows, p, alpha) = (g.rows, t.p_less, policy.alpha);
            shortfalls.push(if new {
                Shortfall::WorseOnNewRows { rows, p, alpha }
            } else {
                Shortfall::WorseOnOldRows { rows, p, alpha }
            });
        }
    }

    if !shortfalls.is_empty() {
        Decision::Keep {
            evidence: Some(evidence),
            shortfalls,
        }
    } else if policy.require_approval {
        Decision::AwaitApproval { evidence }
    } else {
        Decision::Promote { evidence }
    }
}

/// Tests "the candidate is worse" on the rows whose new-row flag is `new`.
/// Inputs are already validated.
fn guard(base: &Scores, cand: &Scores, new: bool, alpha: f64) -> Guard {
    let picked: Vec<usize> = (0..base.losses.len())
        .filter(|&i| base.new_rows[i] == new)
        .collect();
    let rows = picked.len();
    let b: Vec<f64> = picked.iter().map(|&i| base.losses[i]).collect();
    let c: Vec<f64> = picked.iter().map(|&i| cand.losses[i]).collect();
    let d: Vec<f64> = b.iter().zip(&c).map(|(x, y)| x - y).collect();
    let labels: Vec<u64> = picked.iter().map(|&i| base.batches[i]).collect();
    let test = subset_test(&d, &labels);
    let status = match test {
        None => GuardStatus::NotTested,
        // Only a p clearly above alpha passes, so a NaN p fails safe.
        Some(t) if t.p_less.partial_cmp(&alpha) == Some(Ordering::Greater) => GuardStatus::Passed,
        Some(_) => GuardStatus::Failed,
    };
    Guard {
        rows,
        mean_loss_baseline: (rows > 0).then(|| mean(&b)),
        mean_loss_candidate: (rows > 0).then(|| mean(&c)),
        test,
        status,
    }
}

#[cfg(test)]
mod tests {
    use super::*;
    use crate::rng::Rng;

    fn policy() -> Policy {
        Policy {
            min_improvement: 0.01,
            alpha: 0.05,
            min_holdout_rows: 100,
            min_batches: 2,
            require_approval: false,
        }
    }

    /// Squared errors of two models sharing the noise of the target:
    /// loss = (noise + model error)², model error sd given per model.
    fn losses(rng: &mut Rng, rows: usize, sd_base: f64, sd_cand: f64) -> (Vec<f64>, Vec<f64>) {
        let mut base = Vec::with_capacity(rows);
        let mut cand = Vec::with_capacity(rows);
        for _ in 0..rows {
            let noise = rng.normal();
            base.push((noise + sd_base * rng.normal()).powi(2));
            cand.push((noise + sd_cand * rng.normal()).powi(2));
        }
        (base, cand)
    }

    fn scores(losses: Vec<f64>, new_rows: &[bool]) -> Scores {
        Scores::new(losses, new_rows.to_vec())
    }

    fn first_new(rows: usize, new: usize) -> Vec<bool> {
        (0..rows).map(|i| i < new).collect()
    }

    #[test]
    fn clear_winner_is_promoted_with_every_number() {
        let mut rng = Rng::new(1);
        let (b, c) = losses(&mut rng, 600, 1.0, 0.3);
        let flags = first_new(600, 200);
        let decision = decide(
            &scores(b.clone(), &flags),
            &scores(c.clone(), &flags),
            &policy(),
        );
        let Decision::Promote { evidence } = &decision else {
            panic!("expected promote, got {}", decision.reason());
        };
        assert_eq!(evidence.rows, 600);
        assert_eq!(evidence.new_rows.rows, 200);
        assert_eq!(evidence.old_rows.rows, 400);
        assert_eq!(evidence.new_rows.status, GuardStatus::Passed);
        assert_eq!(evidence.old_rows.status, GuardStatus::Passed);
        assert_eq!(evidence.mean_loss_baseline, mean(&b));
        assert_eq!(evidence.mean_loss_candidate, mean(&c));
        let d: Vec<f64> = b.iter().zip(&c).map(|(x, y)| x - y).collect();
        // Every row its own batch: with the CR1 factor the cluster-robust t
        // is exactly the paired t.
        let plain = paired_t(&d).expect("valid");
        assert!((evidence.test.t - plain.t).abs() < 1e-9 * plain.t.abs());
        assert_eq!(evidence.batches, 600);
        let reason = decision.reason();
        assert!(reason.starts_with("promote: "), "{reason}");
        assert!(reason.contains("600 holdout rows"), "{reason}");
        assert!(
            reason.contains("200 new rows") && reason.contains("400 older rows"),
            "{reason}"
        );
        assert_eq!(decision.kind(), "promote");

        let waiting = Policy {
            require_approval: true,
            ..policy()
        };
        let decision = decide(&scores(b, &flags), &scores(c, &flags), &waiting);
        assert!(
            matches!(decision, Decision::AwaitApproval { .. }),
            "{}",
            decision.reason()
        );
        assert!(decision.candidate_won());
        assert!(decision.reason().starts_with("wait for approval"));
    }

    #[test]
    fn too_few_rows_keeps_but_reports_evidence() {
        let mut rng = Rng::new(2);
        let (b, c) = losses(&mut rng, 60, 1.0, 0.3);
        let flags = vec![false; 60];
        let decision = decide(&scores(b, &flags), &scores(c, &flags), &policy());
        let Decision::Keep {
            evidence,
            shortfalls,
        } = &decision
        else {
            panic!("expected keep")
        };
        assert_eq!(
            shortfalls,
            &vec![Shortfall::TooFewRows {
                have: 60,
                need: 100
            }]
        );
        assert!(evidence.is_some());
        assert!(
            decision
                .reason()
                .contains("only 60 holdout rows, at least 100 required")
        );
        // One row: not even a t-test.
        let one = decide(
            &scores(vec![1.0], &[false]),
            &scores(vec![0.0], &[false]),
            &policy(),
        );
        assert_eq!(
            one,
            Decision::Keep {
                evidence: None,
                shortfalls: vec![
                    Shortfall::TooFewBatches { have: 1, need: 2 },
                    Shortfall::TooFewRows { have: 1, need: 100 }
                ]
            }
        );
    }

    #[test]
    fn significant_but_small_improvement_is_kept() {
        // Candidate better by 0.5% on every row, with tiny jitter: highly
        // significant, but below the 1% minimum.
        let mut rng = Rng::new(3);
        let b: Vec<f64> = (0..400).map(|_| 1.0 + rng.uniform()).collect();
        let c: Vec<f64> = b.iter().map(|x| x * 0.995 + 1e-4 * rng.uniform()).collect();
        let flags = first_new(400, 100);
        let decision = decide(&scores(b, &flags), &scores(c, &flags), &policy());
        let Decision::Keep {
            shortfalls,
            evidence,
        } = &decision
        else {
            panic!("expected keep")
        };
        assert_eq!(shortfalls.len(), 1, "{}", decision.reason());
        assert!(matches!(shortfalls[0], Shortfall::SmallImprovement { .. }));
        assert!(evidence.as_ref().is_some_and(|e| e.test.p_greater < 1e-10));
        assert!(
            decision.reason().contains("below the required 1%"),
            "{}",
            decision.reason()
        );
    }

    #[test]
    fn not_significant_is_kept() {
        // Same error size: any difference is noise.
        let mut rng = Rng::new(4);
        let (b, c) = losses(&mut rng, 300, 0.5, 0.5);
        let flags = first_new(300, 100);
        let lenient = Policy {
            min_improvement: 0.0,
            ..policy()
        };
        let decision = decide(&scores(b, &flags), &scores(c, &flags), &lenient);
        let Decision::Keep { shortfalls, .. } = &decision else {
            panic!("expected keep")
        };
        assert!(
            shortfalls.iter().any(|s| matches!(
                s,
                Shortfall::NotSignificant { .. } | Shortfall::NotLower { .. }
            )),
            "{}",
            decision.reason()
        );
    }

    #[test]
    fn worse_on_new_rows_is_kept() {
        // Much better on 500 older rows, clearly worse on 100 new rows.
        let mut rng = Rng::new(5);
        let (mut b, mut c) = losses(&mut rng, 500, 1.0, 0.2);
        let (bn, cn) = losses(&mut rng, 100, 0.2, 1.0);
        b.extend(bn);
        c.extend(cn);
        let flags: Vec<bool> = (0..600).map(|i| i >= 500).collect();
        let decision = decide(&scores(b, &flags), &scores(c, &flags), &policy());
        let Decision::Keep {
            shortfalls,
            evidence,
        } = &decision
        else {
            panic!("expected keep, got {}", decision.reason())
        };
        assert!(matches!(
            shortfalls.as_slice(),
            [Shortfall::WorseOnNewRows { rows: 100, .. }]
        ));
        let e = evidence.as_ref().expect("evidence");
        assert!(e.test.p_greater < 0.05, "better overall");
        assert_eq!(e.old_rows.status, GuardStatus::Passed);
    }

    #[test]
    fn forgetting_older_rows_is_kept() {
        // Much better on 400 new rows, clearly worse on 300 older rows.
        let mut rng = Rng::new(6);
        let (mut b, mut c) = losses(&mut rng, 400, 1.5, 0.2);
        let (bo, co) = losses(&mut rng, 300, 0.2, 0.7);
        b.extend(bo);
        c.extend(co);
        let flags: Vec<bool> = (0..700).map(|i| i < 400).collect();
        let decision = decide(&scores(b, &flags), &scores(c, &flags), &policy());
        let Decision::Keep { shortfalls, .. } = &decision else {
            panic!("expected keep, got {}", decision.reason())
        };
        assert!(
            matches!(
                shortfalls.as_slice(),
                [Shortfall::WorseOnOldRows { rows: 300, .. }]
            ),
            "{}",
            decision.reason()
        );
        assert!(decision.reason().contains("forgot"));
    }

    #[test]
    fn small_guard_subsets_are_not_tested() {
        let mut rng = Rng::new(7);
        let (b, c) = losses(&mut rng, 300, 1.0, 0.3);
        let flags = first_new(300, 1);
        let decision = decide(&scores(b, &flags), &scores(c, &flags), &policy());
        let e = decision.evidence().expect("evidence");
        assert_eq!(e.new_rows.status, GuardStatus::NotTested);
        assert!(decision.candidate_won(), "{}", decision.reason());
        assert!(
            decision.reason().contains("1 new rows, too few to test"),
            "{}",
            decision.reason()
        );
    }

    #[test]
    fn bad_inputs_are_kept_with_the_reason() {
        let p = policy();
        let ok = scores(vec![1.0, 2.0], &[false, true]);
        let cases: Vec<(Scores, &str)> = vec![
            (scores(vec![1.0], &[false]), "lengths differ (2 vs 1)"),
            (
                scores(vec![1.0, f64::NAN], &[false, true]),
                "row 1 is not a finite number",
            ),
            (scores(vec![1.0, -2.0], &[false, true]), "row 1 is negative"),
            (
                Scores::new(vec![1.0, 2.0], vec![false]),
                "lengths differ (2 vs 1)",
            ),
            (
                scores(vec![1.0, 2.0], &[true, true]),
                "flag different rows as new",
            ),
        ];
        for (cand, expected) in cases {
            let decision = decide(&ok, &cand, &p);
            assert!(matches!(decision, Decision::Keep { evidence: None, .. }));
            assert!(
                decision.reason().contains(expected),
                "{}",
                decision.reason()
            );
        }
    }

    #[test]
    fn invalid_policy_is_kept() {
        let mut rng = Rng::new(8);
        let (b, c) = losses(&mut rng, 300, 1.0, 0.3);
        let flags = vec![false; 300];
        for bad in [
            Policy {
                alpha: 0.7,
                ..policy()
            },
            Policy {
                alpha: 0.0,
                ..policy()
            },
            Policy {
                min_improvement: -0.1,
                ..policy()
            },
            Policy {
                min_improvement: f64::NAN,
                ..policy()
            },
        ] {
            let decision = decide(&scores(b.clone(), &flags), &scores(c.clone(), &flags), &bad);
            assert!(matches!(&decision, Decision::Keep { shortfalls, .. }
                if matches!(shortfalls[0], Shortfall::InvalidPolicy(_))));
        }
    }

    #[test]
    fn zero_baseline_loss_cannot_be_improved() {
        let flags = vec![false; 200];
        let decision = decide(
            &scores(vec![0.0; 200], &flags),
            &scores(vec![0.0; 200], &flags),
            &policy(),
        );
        let e = decision.evidence().expect("evidence");
        assert_eq!(e.relative_improvement, None);
        assert!(!decision.candidate_won());
    }

    #[test]
    fn first_model_must_beat_the_trivial_predictor() {
        let mut rng = Rng::new(9);
        let targets: Vec<f64> = (0..400).map(|_| 3.0 + 2.0 * rng.normal()).collect();
        let training: Vec<f64> = (0..400).map(|_| 3.0 + 2.0 * rng.normal()).collect();
        let trivial =
            super::super::metrics::mean_predictor_losses(&training, &targets).expect("valid");
        let flags = vec![true; 400];
        // A model that explains most of the variance.
        let good: Vec<f64> = targets
            .iter()
            .map(|_| (0.5 * rng.normal()).powi(2))
            .collect();
        let decision = decide_first(
            &scores(trivial.clone(), &flags),
            &scores(good, &flags),
            &policy(),
        );
        assert!(
            matches!(decision, Decision::Promote { .. }),
            "{}",
            decision.reason()
        );
        assert_eq!(
            decision.evidence().map(|e| e.baseline),
            Some(Baseline::Trivial)
        );
        assert!(decision.reason().contains("trivial predictor"));
        // A model no better than guessing the mean is kept.
        let useless: Vec<f64> = trivial.iter().map(|x| x * 1.02).collect();
        let decision = decide_first(
            &scores(trivial, &flags),
            &scores(useless, &flags),
            &policy(),
        );
        assert!(matches!(decision, Decision::Keep { .. }));
        assert!(
            decision
                .reason()
                .contains("is not below the trivial predictor's"),
            "{}",
            decision.reason()
        );
    }

    #[test]
    fn policy_from_config() {
        let config = GateConfig {
            min_improvement: 0.02,
            alpha: 0.01,
            min_holdout_rows: 500,
            require_approval: true,
            cold_every: 3,
            ..GateConfig::default()
        };
        let p = Policy::from(&config);
        assert_eq!(
            p,
            Policy {
                min_improvement: 0.02,
                alpha: 0.01,
                min_holdout_rows: 500,
                min_batches: 3,
                require_approval: true
            }
        );
        assert_eq!(Policy::from(&GateConfig::default()).problem(), None);
    }
}
