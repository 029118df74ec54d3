//! Provenance on the report: the batches each model saw (its own
//! training's and, through warm starts, its parents'), the models that saw
//! a batch now set aside, and for each batch set aside why and which models
//! trained on it. Pure: log entries in, table cells out. What "saw" means
//! is `provenance`'s rule; this module only words it.

use std::collections::{BTreeMap, BTreeSet};

use crate::audit::{Entry, Event};
use crate::ids::{BatchId, ModelId};
use crate::provenance::{self, Replay};

/// The row attribute that marks a model which saw a batch now set aside.
pub const MARK: &str = " class=\"saw-aside\"";

/// What the log says about which data reached which model.
#[derive(Debug, Clone, Default)]
pub struct Seen {
    replay: Replay,
    /// Why each batch was last set aside ("suspect: …" or "by … at …: …").
    why: BTreeMap<BatchId, String>,
    /// The file each batch came from.
    files: BTreeMap<BatchId, String>,
}

impl Seen {
    pub fn from_entries(entries: &[Entry]) -> Seen {
        let mut why = BTreeMap::new();
        let mut files = BTreeMap::new();
        for e in entries {
            match &e.event {
                Event::BatchAccepted {
                    batch,
                    file,
                    suspect,
                    ..
                } => {
                    files.insert(*batch, file.clone());
                    if let Some(x) = suspect.as_ref().filter(|x| x.suspect) {
                        why.insert(*batch, format!("suspect at intake: {}", x.why.join("; ")));
                    }
                }
                Event::BatchSetAside { batch, reason } => {
                    why.insert(*batch, format!("by {} at {}: {reason}", e.user, e.time));
                }
                _ => {}
            }
        }
        Seen {
            replay: provenance::replay(entries),
            why,
            files,
        }
    }

    /// Batches set aside now.
    pub fn aside(&self) -> &BTreeSet<BatchId> {
        &self.replay.aside
    }

    /// The batches `model` saw, as runs: its own training's, then what only
    /// its parents' weights brought; "-" for a model the log never trained.
    pub fn batches_cell(&self, model: ModelId) -> String {
        let Some(l) = self.replay.lineages.get(&model) else {
            return "-".into();
        };
        let inherited: BTreeSet<BatchId> = l.saw.difference(&l.direct).copied().collect();
        let direct = provenance::ranges_text(&l.direct);
        if inherited.is_empty() {
            direct
        } else {
            format!(
                "{direct}; through its parents also {}",
                provenance::ranges_text(&inherited)
            )
        }
    }

    /// The batches now set aside that `model` saw, or "-" for none.
    pub fn aside_cell(&self, model: ModelId) -> String {
        let saw = self.replay.saw_aside(model);
        if saw.is_empty() {
            "-".into()
        } else {
            format!("saw {} (set aside)", provenance::ranges_text(&saw))
        }
    }

    /// The row attribute of `model` in the models table: marked when it saw
    /// a batch now set aside.
    pub fn row_attr(&self, model: ModelId) -> String {
        if self.replay.saw_aside(model).is_empty() {
            String::new()
        } else {
            MARK.to_string()
        }
    }

    /// One row per batch set aside: batch, file, why, the models that
    /// trained on it and how.
    pub fn aside_rows(&self) -> Vec<Vec<String>> {
        self.replay
            .aside
            .iter()
            .map(|b| {
                let reached: Vec<String> = provenance::trained_on(&self.replay.lineages, *b)
                    .into_iter()
                    .map(|(m, route)| format!("{m} {}", route.words()))
                    .collect();
                vec![
                    b.to_string(),
                    self.files.get(b).cloned().unwrap_or_else(|| "-".into()),
                    self.why.get(b).cloned().unwrap_or_else(|| "-".into()),
                    if reached.is_empty() {
                        "no model".into()
                    } else {
                        reached.join(", ")
                    },
                ]
            })
            .collect()
    }
}

#[cfg(test)]
mod tests {
    use super::*;
    use crate::ids::AuditSeq;
    use crate::provenance::fixtures::{accepted, chained, trained};

    fn log(events: Vec<(&str, Event)>) -> Vec<Entry> {
        chained(events)
    }

    fn story() -> Vec<Entry> {
        let mut ev = vec![("daemon", accepted(1, false))];
        ev.push(("daemon", accepted(2, false)));
        ev.push(("daemon", accepted(3, false)));
        ev.push(("daemon", trained(1, "cold", None, 3)));
        ev.push(("daemon", accepted(4, true)));
        ev.push(("daemon", accepted(5, false)));
        ev.push(("daemon", trained(2, "warm", Some(1), 5)));
        ev.push((
            "ana",
            Event::BatchSetAside {
                batch: BatchId(2),
                reason: "the till export was broken".into(),
            },
        ));
        ev.push(("daemon", trained(3, "warm", Some(2), 5)));
        ev.push(("daemon", accepted(6, false)));
        ev.push(("daemon", trained(4, "cold", None, 6)));
        log(ev)
    }

    #[test]
    fn each_model_lists_its_batches_as_runs_and_what_its_parents_brought() {
        let s = Seen::from_entries(&story());
        assert_eq!(s.batches_cell(ModelId(1)), "b000001–b000003");
        assert_eq!(s.batches_cell(ModelId(2)), "b000001–b000003, b000005");
        // Batch 2 was aside when m3 trained: only its parent brought it.
        assert_eq!(
            s.batches_cell(ModelId(3)),
            "b000001, b000003, b000005; through its parents also b000002"
        );
        assert_eq!(
            s.batches_cell(ModelId(4)),
            "b000001, b000003, b000005–b000006"
        );
        assert_eq!(s.batches_cell(ModelId(9)), "-");
    }

    #[test]
    fn models_that_saw_a_batch_now_set_aside_are_marked() {
        let s = Seen::from_entries(&story());
        for m in [1, 2, 3] {
            assert_eq!(s.aside_cell(ModelId(m)), "saw b000002 (set aside)", "m{m}");
            assert_eq!(s.row_attr(ModelId(m)), MARK);
        }
        assert_eq!(s.aside_cell(ModelId(4)), "-");
        assert_eq!(s.row_attr(ModelId(4)), "");
    }

    #[test]
    fn each_batch_set_aside_names_why_and_the_models_it_reached() {
        let s = Seen::from_entries(&story());
        let rows = s.aside_rows();
        assert_eq!(rows.len(), 2);
        assert_eq!(
            rows[0],
            vec![
                "b000002".to_string(),
                "night-2.csv".into(),
                "by ana at 2026-12-01T00:07:00.000Z: the till export was broken".into(),
                "m000001 directly, m000002 directly, m000003 through its parents".into(),
            ]
        );
        assert_eq!(rows[1][0], "b000004");
        assert_eq!(rows[1][2], "suspect at intake: targets unrelated to inputs");
        assert_eq!(rows[1][3], "no model");
    }

    #[test]
    fn a_batch_brought_back_is_no_longer_listed_or_marked() {
        let mut ev: Vec<Entry> = story();
        let last = ev.last().unwrap().clone();
        ev.push(Entry::seal(
            AuditSeq(last.seq.0 + 1),
            chrono::Utc::now(),
            "ana",
            Event::BatchBroughtBack {
                batch: BatchId(2),
                reason: "the export was fine".into(),
            },
            &last.hash,
        ));
        let s = Seen::from_entries(&ev);
        assert_eq!(s.aside().iter().copied().collect::<Vec<_>>(), [BatchId(4)]);
        assert_eq!(s.aside_cell(ModelId(1)), "-");
        assert_eq!(s.row_attr(ModelId(3)), "");
    }
}
