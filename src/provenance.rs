//! Which batches each model saw, and which models saw a batch: read from
//! the audit log alone, so it answers for any model the log names.
//!
//! A candidate's own training could touch every batch that was stored, in
//! use (not set aside) and no later than its `trained_through` when it was
//! trained: a cold run reads them all, and a warm run reads the new ones
//! plus a sample of the older ones, any of which may be drawn. A warm
//! candidate also carries, through its starting weights, everything its
//! parent saw. So:
//!
//!   saw(m) = in_use(at m's training, ≤ m.trained_through) ∪ saw(parent)  (warm)
//!   saw(m) = in_use(at m's training, ≤ m.trained_through)                (cold)
//!
//! This is the safe side of "saw" for the question it exists for ("which
//! models trained on the broken file, directly or through their parents?"):
//! a batch is never left out that a model may have learnt from.

use std::collections::{BTreeMap, BTreeSet};

use serde::Serialize;

use crate::audit::{Entry, Event};
use crate::ids::{BatchId, ModelId};

/// What the log says about one model's data.
#[derive(Debug, Clone, PartialEq, Serialize)]
pub struct Lineage {
    pub model: ModelId,
    pub parent: Option<ModelId>,
    /// "warm" or "cold".
    pub run: String,
    /// Batches its own training could read.
    pub direct: BTreeSet<BatchId>,
    /// `direct` and, for a warm model, everything its parent saw.
    pub saw: BTreeSet<BatchId>,
}

/// How a model came to have seen a batch.
#[derive(Debug, Clone, Copy, PartialEq, Eq, Serialize)]
#[serde(rename_all = "snake_case")]
pub enum Route {
    /// Its own training could read the batch's rows.
    Directly,
    /// Only through the weights it started from.
    ThroughParent,
}

impl Route {
    /// How the route reads on screens and the page.
    pub fn words(self) -> &'static str {
        match self {
            Route::Directly => "directly",
            Route::ThroughParent => "through its parents",
        }
    }
}

/// What replaying the whole log gives: every model's lineage and the
/// batches set aside at its end.
#[derive(Debug, Clone, Default, PartialEq)]
pub struct Replay {
    pub lineages: BTreeMap<ModelId, Lineage>,
    /// Batches set aside now (suspect at intake or by hand, not brought back).
    pub aside: BTreeSet<BatchId>,
    /// Models that became the serving one by passing the gate (promoted or
    /// approved) and were never rolled back from.
    pub served: BTreeSet<ModelId>,
}

impl Replay {
    /// The batches now set aside that `model` saw (empty for a model the
    /// log has no training entry of).
    pub fn saw_aside(&self, model: ModelId) -> BTreeSet<BatchId> {
        self.lineages
            .get(&model)
            .map(|l| l.saw.intersection(&self.aside).copied().collect())
            .unwrap_or_default()
    }
}

/// Every model's lineage, replaying the log in order.
pub fn lineages<'a>(entries: impl IntoIterator<Item = &'a Entry>) -> BTreeMap<ModelId, Lineage> {
    replay(entries).lineages
}

/// Replays the log in order: lineages, and which batches are set aside.
pub fn replay<'a>(entries: impl IntoIterator<Item = &'a Entry>) -> Replay {
    let mut stored: BTreeSet<BatchId> = BTreeSet::new();
    let mut aside: BTreeSet<BatchId> = BTreeSet::new();
    let mut out: BTreeMap<ModelId, Lineage> = BTreeMap::new();
    let mut served: BTreeSet<ModelId> = BTreeSet::new();
    for e in entries {
        match &e.event {
            Event::Promoted { model, .. } | Event::Approved { model, .. } => {
                served.insert(*model);
            }
            // A rollback says the model did worse on fresh data.
            Event::RolledBack { from, .. } => {
                served.remove(from);
            }
            Event::BatchAccepted { batch, suspect, .. } => {
                stored.insert(*batch);
                if suspect.as_ref().is_some_and(|s| s.suspect) {
                    aside.insert(*batch);
                }
            }
            Event::BatchSetAside { batch, .. } => {
                aside.insert(*batch);
            }
            Event::BatchBroughtBack { batch, .. } => {
                aside.remove(batch);
            }
            Event::CandidateTrained {
                model,
                run,
                parent,
                trained_through,
                ..
            } => {
                let direct: BTreeSet<BatchId> = stored
                    .iter()
                    .filter(|b| **b <= *trained_through && !aside.contains(b))
                    .copied()
                    .collect();
                let mut saw = direct.clone();
                if run == "warm"
                    && let Some(p) = parent.and_then(|p| out.get(&p))
                {
                    saw.extend(p.saw.iter().copied());
                }
                out.insert(
                    *model,
                    Lineage {
                        model: *model,
                        parent: *parent,
                        run: run.clone(),
                        direct,
                        saw,
                    },
                );
            }
            _ => {}
        }
    }
    Replay {
        lineages: out,
        aside,
        served,
    }
}

/// The newest model that passed the gate, was never rolled back from, and
/// never saw any batch of `aside`, directly or through its parents: where a
/// warm start may begin when the serving model saw batches since set aside.
/// Model ids grow with time, so the newest is the highest.
pub fn newest_clean(replay: &Replay, aside: &BTreeSet<BatchId>) -> Option<ModelId> {
    replay
        .served
        .iter()
        .rev()
        .find(|m| {
            replay
                .lineages
                .get(m)
                .is_some_and(|l| l.saw.is_disjoint(aside))
        })
        .copied()
}

/// The models that saw `batch`, and how.
pub fn trained_on(lineages: &BTreeMap<ModelId, Lineage>, batch: BatchId) -> Vec<(ModelId, Route)> {
    lineages
        .values()
        .filter(|l| l.saw.contains(&batch))
        .map(|l| {
            let route = if l.direct.contains(&batch) {
                Route::Directly
            } else {
                Route::ThroughParent
            };
            (l.model, route)
        })
        .collect()
}

/// What `log --lineage` follows, and a line saying so.
#[derive(Debug, Clone, Default, PartialEq)]
pub struct Related {
    /// The batch asked about and every batch the model asked about saw.
    pub batches: BTreeSet<BatchId>,
    /// The model asked about and every model that saw the batch asked about.
    pub models: BTreeSet<ModelId>,
    pub summary: Vec<String>,
}

/// For a batch: itself and every model that saw it, directly or through
/// its parents. For a model: itself and every batch it saw.
pub fn related(
    lineages: &BTreeMap<ModelId, Lineage>,
    batch: Option<BatchId>,
    model: Option<ModelId>,
) -> Related {
    let mut r = Related::default();
    if let Some(b) = batch {
        r.batches.insert(b);
        let reached = trained_on(lineages, b);
        r.summary.push(if reached.is_empty() {
            format!("{b} reached no model")
        } else {
            format!(
                "{b} reached {}",
                reached
                    .iter()
                    .map(|(m, route)| format!("{m} ({})", route.words()))
                    .collect::<Vec<_>>()
                    .join(", ")
            )
        });
        r.models.extend(reached.into_iter().map(|(m, _)| m));
    }
    if let Some(m) = model {
        r.models.insert(m);
        match lineages.get(&m) {
            Some(l) => {
                r.summary.push(format!(
                    "{m} saw {} (its own training: {})",
                    ranges_text(&l.saw),
                    ranges_text(&l.direct)
                ));
                r.batches.extend(l.saw.iter().copied());
            }
            None => r
                .summary
                .push(format!("the log has no training entry of {m}")),
        }
    }
    r
}

/// A set of batches as runs: "b000001–b000005, b000007".
pub fn ranges_text(batches: &BTreeSet<BatchId>) -> String {
    let mut runs: Vec<(BatchId, BatchId)> = Vec::new();
    for &b in batches {
        match runs.last_mut() {
            Some((_, hi)) if hi.0 + 1 == b.0 => *hi = b,
            _ => runs.push((b, b)),
        }
    }
    if runs.is_empty() {
        return "none".into();
    }
    runs.iter()
        .map(|(lo, hi)| {
            if lo == hi {
                lo.to_string()
            } else {
                format!("{lo}–{hi}")
            }
        })
        .collect::<Vec<_>>()
        .join(", ")
}

/// Log events for tests of what reads the log (here and in the report).
#[cfg(test)]
pub(crate) mod fixtures {
    use super::*;
    use crate::audit::SuspectEvidence;

    pub(crate) fn flagged() -> SuspectEvidence {
        SuspectEvidence {
            suspect: true,
            why: vec!["targets unrelated to inputs".into()],
            rows: 10,
            references: Vec::new(),
            target_scale: None,
            copies_share: 0.1,
            reason: String::new(),
        }
    }

    pub(crate) fn accepted(b: u64, suspect: bool) -> Event {
        Event::BatchAccepted {
            batch: BatchId(b),
            file: format!("night-{b}.csv"),
            file_hash: String::new(),
            rows: 10,
            train_rows: 8,
            holdout_rows: 2,
            new_categories: Default::default(),
            new_category_counts: Default::default(),
            drift: None,
            suspect: suspect.then(flagged),
            rows_file: None,
        }
    }

    pub(crate) fn trained(m: u64, run: &str, parent: Option<u64>, through: u64) -> Event {
        Event::CandidateTrained {
            cycle: m,
            model: ModelId(m),
            run: run.into(),
            parent: parent.map(ModelId),
            trained_through: BatchId(through),
            epochs: 1,
            seconds: 0.0,
            stop: String::new(),
            holdout_rows: 2,
            holdout_loss: 1.0,
            manifest_hash: String::new(),
            widened: Default::default(),
            rescaled: Vec::new(),
        }
    }
    /// A gate's evidence for a clear win on `rows` holdout rows.
    pub(crate) fn gate_evidence(rows: usize) -> crate::audit::GateEvidence {
        crate::audit::GateEvidence {
            compared_with: "serving".into(),
            rows,
            mean_loss_compared_with: 2.0,
            mean_loss_candidate: 1.0,
            relative_improvement: Some(0.5),
            t: Some(3.0),
            p: 0.01,
            batches: None,
            batches_needed: None,
            candidates: None,
            p_unadjusted: None,
            wilcoxon_p: None,
            new_rows: rows / 2,
            old_rows: rows - rows / 2,
            reason: "better".into(),
        }
    }

    /// A hash-chained log of `(user, event)`, one minute apart from
    /// 2026-12-01 00:00 UTC.
    pub(crate) fn chained(events: Vec<(&str, Event)>) -> Vec<Entry> {
        let t0 = chrono::DateTime::parse_from_rfc3339("2026-12-01T00:00:00Z")
            .expect("a valid time")
            .with_timezone(&chrono::Utc);
        let mut prev = crate::audit::GENESIS.to_string();
        events
            .into_iter()
            .enumerate()
            .map(|(i, (user, ev))| {
                let e = Entry::seal(
                    crate::ids::AuditSeq(i as u64 + 1),
                    t0 + chrono::TimeDelta::minutes(i as i64),
                    user,
                    ev,
                    &prev,
                );
                prev = e.hash.clone();
                e
            })
            .collect()
    }
}

#[cfg(test)]
mod tests {
    use super::fixtures::{accepted, trained};
    use super::*;

    fn entry(seq: u64, event: Event) -> Entry {
        Entry::seal(
            crate::ids::AuditSeq(seq),
            chrono::Utc::now(),
            "ana",
            event,
            "",
        )
    }

    fn set(v: &[u64]) -> BTreeSet<BatchId> {
        v.iter().map(|&b| BatchId(b)).collect()
    }

    #[test]
    fn a_warm_model_inherits_its_parents_batches_a_cold_one_does_not() {
        let log = vec![
            entry(1, accepted(1, false)),
            entry(2, accepted(2, false)),
            entry(3, trained(1, "cold", None, 2)),
            entry(4, accepted(3, false)),
            entry(
                5,
                Event::BatchSetAside {
                    batch: BatchId(2),
                    reason: "broken export".into(),
                },
            ),
            entry(6, trained(2, "warm", Some(1), 3)),
            entry(7, trained(3, "cold", None, 3)),
        ];
        let l = lineages(&log);
        assert_eq!(l[&ModelId(1)].saw, set(&[1, 2]));
        // Batch 2 is aside when m2 trains, but m2 started from m1's weights.
        assert_eq!(l[&ModelId(2)].direct, set(&[1, 3]));
        assert_eq!(l[&ModelId(2)].saw, set(&[1, 2, 3]));
        assert_eq!(l[&ModelId(3)].saw, set(&[1, 3]));
        assert_eq!(
            trained_on(&l, BatchId(2)),
            vec![
                (ModelId(1), Route::Directly),
                (ModelId(2), Route::ThroughParent)
            ]
        );
    }

    #[test]
    fn a_suspect_batch_is_not_seen_until_brought_back() {
        let log = vec![
            entry(1, accepted(1, false)),
            entry(2, accepted(2, true)),
            entry(3, trained(1, "cold", None, 2)),
            entry(
                4,
                Event::BatchBroughtBack {
                    batch: BatchId(2),
                    reason: "checked by hand".into(),
                },
            ),
            entry(5, trained(2, "cold", None, 2)),
        ];
        let l = lineages(&log);
        assert_eq!(l[&ModelId(1)].saw, set(&[1]));
        assert_eq!(l[&ModelId(2)].saw, set(&[1, 2]));
        assert!(replay(&log).aside.is_empty());
        assert_eq!(replay(&log[..3]).aside, set(&[2]));
    }

    #[test]
    fn the_replay_names_the_set_aside_batches_each_model_saw() {
        let log = vec![
            entry(1, accepted(1, false)),
            entry(2, accepted(2, false)),
            entry(3, trained(1, "cold", None, 2)),
            entry(4, accepted(3, true)),
            entry(5, trained(2, "warm", Some(1), 3)),
            entry(
                6,
                Event::BatchSetAside {
                    batch: BatchId(1),
                    reason: "wrong shop codes".into(),
                },
            ),
        ];
        let r = replay(&log);
        assert_eq!(r.aside, set(&[1, 3]));
        assert_eq!(r.saw_aside(ModelId(1)), set(&[1]));
        // Batch 3 was suspect at intake, so no model read it.
        assert_eq!(r.saw_aside(ModelId(2)), set(&[1]));
        assert_eq!(r.saw_aside(ModelId(9)), set(&[]));
    }

    fn promoted(m: u64) -> Event {
        Event::Promoted {
            cycle: m,
            model: ModelId(m),
            previous: None,
            evidence: super::fixtures::gate_evidence(10),
        }
    }

    #[test]
    fn the_newest_clean_model_passed_the_gate_and_never_saw_the_batches_set_aside() {
        let mut log = vec![
            entry(1, accepted(1, false)),
            entry(2, accepted(2, false)),
            entry(3, trained(1, "cold", None, 2)),
            entry(4, promoted(1)),
            entry(5, accepted(3, false)),
            entry(6, trained(2, "warm", Some(1), 3)),
            entry(7, promoted(2)),
            entry(8, accepted(4, false)),
            // m3 never served: shelved candidates are no starting point.
            entry(9, trained(3, "warm", Some(2), 4)),
            entry(10, accepted(5, false)),
            entry(11, trained(4, "warm", Some(2), 5)),
            entry(12, promoted(4)),
        ];
        let r = replay(&log);
        assert_eq!(r.served, [1, 2, 4].map(ModelId).into());
        // Batch 4: m4 saw it; m2 did not, and served.
        assert_eq!(newest_clean(&r, &set(&[4])), Some(ModelId(2)));
        // Batch 3: m2 and m4 (through m2) saw it; m1 did not.
        assert_eq!(newest_clean(&r, &set(&[3])), Some(ModelId(1)));
        // Batch 1: every model saw it.
        assert_eq!(newest_clean(&r, &set(&[1])), None);
        // A model rolled back from is no starting point either.
        log.push(entry(
            13,
            Event::RolledBack {
                from: ModelId(2),
                to: ModelId(1),
                how: "manual".into(),
                reason: "worse on fresh nights".into(),
                evidence: None,
            },
        ));
        assert_eq!(newest_clean(&replay(&log), &set(&[4])), Some(ModelId(1)));
    }

    #[test]
    fn ranges_are_written_as_runs() {
        assert_eq!(ranges_text(&set(&[])), "none");
        assert_eq!(ranges_text(&set(&[3])), "b000003");
        assert_eq!(
            ranges_text(&set(&[1, 2, 3, 5, 7, 8])),
            "b000001–b000003, b000005, b000007–b000008"
        );
    }

    #[test]
    fn related_follows_a_batch_to_its_models_and_a_model_to_its_batches() {
        let log = vec![
            entry(1, accepted(1, false)),
            entry(2, accepted(2, false)),
            entry(3, trained(1, "cold", None, 2)),
            entry(4, accepted(3, false)),
            entry(5, trained(2, "warm", Some(1), 3)),
            entry(6, trained(3, "cold", None, 1)),
        ];
        let l = lineages(&log);
        let r = related(&l, Some(BatchId(2)), None);
        assert_eq!(r.batches, set(&[2]));
        assert_eq!(r.models, [ModelId(1), ModelId(2)].into_iter().collect());
        assert_eq!(
            r.summary,
            vec!["b000002 reached m000001 (directly), m000002 (directly)"]
        );
        let r = related(&l, None, Some(ModelId(3)));
        assert_eq!(r.batches, set(&[1]));
        assert_eq!(
            r.summary,
            vec!["m000003 saw b000001 (its own training: b000001)"]
        );
        let r = related(&l, None, Some(ModelId(9)));
        assert_eq!(r.batches, set(&[]));
        assert_eq!(r.summary, vec!["the log has no training entry of m000009"]);
    }
}
