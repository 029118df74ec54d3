//! `tidegate status`: what the state dir holds and who owns it. Reads
//! `audit.jsonl` and `LOCK` only, so it works while the daemon runs.

use std::collections::{BTreeMap, BTreeSet};

use serde::Serialize;

use super::{Cli, Exit, emit};
use crate::audit::{Entry, Event, FreshEvidence, TreesVersus};
use crate::ids::{BatchId, ModelId};
use crate::state::{self, StateDir};

#[derive(Debug, clap::Args)]
pub struct Args {
    /// How many recent events to show.
    #[arg(long, default_value_t = 5, value_name = "N")]
    recent: usize,
}

/// What the audit log says the store holds.
#[derive(Debug, Default, Clone, PartialEq, Serialize)]
pub struct Summary {
    pub batches: u64,
    pub rows: u64,
    pub train_rows: u64,
    pub holdout_rows: u64,
    pub refused_files: u64,
    pub duplicate_files: u64,
    /// Category values per column, in order of first appearance, as the
    /// log lists them (a `batch-accepted` entry lists at most
    /// `audit::NEW_VALUES_LISTED` per column).
    pub vocabularies: BTreeMap<String, Vec<String>>,
    /// How many values each column has.
    pub vocabulary_sizes: BTreeMap<String, u64>,
    pub audit_entries: u64,
    /// The serving model according to the log.
    pub serving: Option<crate::ids::ModelId>,
    pub models_trained: u64,
    /// The last gate decision, in words.
    pub last_decision: Option<String>,
    /// The serving network against the ridge baseline, from the last cycle
    /// that scored both on the same holdout rows.
    pub versus_ridge: Option<VersusRidge>,
    /// The serving network against the boosted trees, from the last cycle
    /// that scored both on the same holdout rows.
    pub versus_trees: Option<VersusTrees>,
    /// The last fresh-data check, unless a cycle has started since.
    pub fresh_check: Option<FreshEvidence>,
    /// The last accepted batch's drift report.
    pub last_drift: Option<LastDrift>,
    /// Batches stored but set aside (suspect at intake, or by hand), with why.
    pub set_aside: BTreeMap<BatchId, String>,
    /// Batches now set aside that the serving model trained on, directly or
    /// through its parents.
    pub serving_saw_set_aside: Vec<BatchId>,
    /// Batches each model trained on, directly or through its parents.
    #[serde(skip)]
    pub seen: BTreeMap<ModelId, BTreeSet<BatchId>>,
}

/// Which columns of the last accepted batch moved away from the stored rows.
#[derive(Debug, Clone, PartialEq, Serialize)]
pub struct LastDrift {
    pub batch: crate::ids::BatchId,
    /// Columns flagged by the rule against past batches.
    pub flagged: Vec<String>,
    pub reasons: Vec<String>,
    /// How far the reference is built, while it is.
    pub building: Option<String>,
    /// "column: values (share of rows)" for category values never seen
    /// before.
    pub new_values: Vec<String>,
    /// Columns flagged by an older version's fixed-level tests (entries
    /// written before the rule against past batches; not drift flags).
    #[serde(skip_serializing_if = "Vec::is_empty")]
    pub old_rule_flagged: Vec<String>,
}

/// A network's holdout loss beside the ridge baseline's on the same rows.
#[derive(Debug, Clone, Copy, PartialEq, Serialize)]
pub struct VersusRidge {
    pub model: ModelId,
    pub cycle: u64,
    pub network_loss: f64,
    pub ridge_loss: f64,
    pub beats_ridge: bool,
}

/// A network's holdout loss beside the boosted trees' on the same rows.
#[derive(Debug, Clone, Copy, PartialEq, Serialize)]
pub struct VersusTrees {
    pub model: ModelId,
    pub cycle: u64,
    pub network_loss: f64,
    pub trees_loss: f64,
    /// One-sided p that the trees do better, batches as clusters (`None`:
    /// fewer than two batches).
    pub p: Option<f64>,
    /// The network with the lowest loss in that cycle (a candidate trained
    /// on its rows, or this one), which the advice is judged against.
    pub best_network: Option<ModelId>,
    /// How much lower the trees' loss is than the best network's, as a
    /// share of it, when that is worth telling
    /// (`audit::TreesVersus::advice`); advice, never a switch.
    pub trees_better_by: Option<f64>,
}

impl Summary {
    /// Folds the log into totals.
    pub fn from_entries(entries: &[Entry]) -> Summary {
        let mut s = Summary {
            audit_entries: entries.len() as u64,
            ..Summary::default()
        };
        // Holdout losses of this cycle's candidates, and each model's latest
        // comparison with ridge.
        let mut cycle_losses: BTreeMap<ModelId, f64> = BTreeMap::new();
        let mut vs_ridge: BTreeMap<ModelId, VersusRidge> = BTreeMap::new();
        let mut vs_trees: BTreeMap<ModelId, VersusTrees> = BTreeMap::new();
        for e in entries {
            match &e.event {
                Event::BatchAccepted {
                    batch,
                    rows,
                    train_rows,
                    holdout_rows,
                    new_categories,
                    new_category_counts,
                    drift,
                    suspect,
                    ..
                } => {
                    if let Some(x) = suspect.as_ref().filter(|x| x.suspect) {
                        s.set_aside
                            .insert(*batch, format!("suspect: {}", x.why.join("; ")));
                    }
                    s.last_drift = drift.as_ref().map(|d| LastDrift {
                        batch: *batch,
                        flagged: d.flagged().iter().map(|c| c.to_string()).collect(),
                        reasons: d
                            .columns
                            .iter()
                            .filter(|c| c.drifted())
                            .map(|c| format!("{}: {}", c.column, c.reason))
                            .collect(),
                        building: d.building_text(),
                        new_values: d.new_values_text(),
                        old_rule_flagged: d
                            .old_rule_flagged()
                            .iter()
                            .map(|c| c.to_string())
                            .collect(),
                    });
                    s.batches += 1;
                    s.rows += rows;
                    s.train_rows += train_rows;
                    s.holdout_rows += holdout_rows;
                    for (col, values) in new_categories {
                        s.vocabularies
                            .entry(col.clone())
                            .or_default()
                            .extend(values.iter().cloned());
                        *s.vocabulary_sizes.entry(col.clone()).or_default() += new_category_counts
                            .get(col)
                            .copied()
                            .unwrap_or(values.len() as u64);
                    }
                }
                Event::BatchSetAside { batch, reason } => {
                    s.set_aside
                        .insert(*batch, format!("by {} at {}: {reason}", e.user, e.time));
                }
                Event::BatchBroughtBack { batch, .. } => {
                    s.set_aside.remove(batch);
                }
                Event::BatchRefused { .. } => s.refused_files += 1,
                Event::BatchDuplicate { .. } => s.duplicate_files += 1,
                Event::Approved { model, .. } | Event::RolledBack { to: model, .. } => {
                    s.serving = Some(*model);
                    s.last_decision = Some(e.event.summary());
                }
                Event::Declined { .. } => s.last_decision = Some(e.event.summary()),
                Event::SchemaMigrated { .. } => {
                    s.serving = None;
                    s.last_decision = Some(e.event.summary());
                }
                Event::Promoted { model, .. } => {
                    s.serving = Some(*model);
                    s.last_decision = Some(e.event.summary());
                }
                Event::Shelved { .. } | Event::AwaitingApproval { .. } => {
                    s.last_decision = Some(e.event.summary())
                }
                Event::CandidateTrained {
                    model,
                    holdout_loss,
                    ..
                } => {
                    s.models_trained += 1;
                    cycle_losses.insert(*model, *holdout_loss);
                }
                Event::BaselinesScored {
                    cycle,
                    ridge_loss,
                    serving,
                    serving_loss,
                    trees_loss,
                    trees_versus,
                    ..
                } => {
                    let mut scored = std::mem::take(&mut cycle_losses);
                    if let (Some(m), Some(l)) = (serving, serving_loss) {
                        scored.insert(*m, *l);
                    }
                    for (model, loss) in scored {
                        if let Some(ridge) = ridge_loss {
                            vs_ridge.insert(
                                model,
                                VersusRidge {
                                    model,
                                    cycle: *cycle,
                                    network_loss: loss,
                                    ridge_loss: *ridge,
                                    beats_ridge: loss < *ridge,
                                },
                            );
                        }
                        if let Some(trees) = trees_loss {
                            vs_trees.insert(
                                model,
                                VersusTrees {
                                    model,
                                    cycle: *cycle,
                                    network_loss: loss,
                                    trees_loss: *trees,
                                    p: trees_versus
                                        .iter()
                                        .find(|v| v.model == model)
                                        .and_then(|v| v.p),
                                    best_network: TreesVersus::best(trees_versus).map(|v| v.model),
                                    trees_better_by: TreesVersus::advice(*trees, trees_versus)
                                        .map(|(_, share)| share),
                                },
                            );
                        }
                    }
                }
                Event::CycleStarted { .. } => {
                    cycle_losses.clear();
                    s.fresh_check = None;
                }
                Event::FreshChecked { check } => s.fresh_check = Some(check.clone()),
                Event::Initialized { .. }
                | Event::BackupMade { .. }
                | Event::Restored { .. }
                | Event::CycleAbandoned { .. }
                | Event::ModelExported { .. }
                | Event::RowsWritten { .. }
                | Event::FolderRenamed { .. } => {}
            }
        }
        s.versus_ridge = s.serving.and_then(|m| vs_ridge.get(&m).copied());
        s.versus_trees = s.serving.and_then(|m| vs_trees.get(&m).copied());
        s.seen = crate::provenance::lineages(entries)
            .into_iter()
            .map(|(m, l)| (m, l.saw))
            .collect();
        s.serving_saw_set_aside = s
            .serving
            .and_then(|m| s.seen.get(&m))
            .map(|seen| {
                seen.iter()
                    .filter(|b| s.set_aside.contains_key(b))
                    .copied()
                    .collect()
            })
            .unwrap_or_default();
        s
    }
}

pub fn run(cli: &Cli, state: &StateDir, args: &Args) -> anyhow::Result<Exit> {
    if !state.is_initialised() {
        return Err(crate::store::StoreError::NotInitialised {
            path: state.root().to_path_buf(),
        }
        .into());
    }
    let entries = state.mirror().entries()?;
    let summary = Summary::from_entries(&entries);
    let owner = state::owner_pid(state);
    let daemon = crate::daemon::client::ping(state);
    let recent: Vec<&Entry> = entries.iter().rev().take(args.recent).rev().collect();
    // The configured inbox when the config reads, else the default one.
    let inbox_dir = super::load_config(cli, state).map_or_else(
        |_| state.inbox(),
        |c| crate::daemon::event_loop::inbox_of(state, &c),
    );
    let inbox = crate::daemon::inbox::contents(&inbox_dir).unwrap_or_else(|e| {
        tracing::warn!("cannot list the inbox {}: {e}", inbox_dir.display());
        Default::default()
    });
    if cli.json {
        let v = serde_json::json!({
            "state": state.root(),
            "owner_pid": owner,
            "daemon": daemon,
            "inbox": inbox,
            "summary": summary,
            "recent": recent,
        });
        emit(&format!("{v}\n"))?;
        return Ok(Exit::Ok);
    }
    let mut out = String::new();
    out.push_str(&format!("state dir   {}\n", state.root().display()));
    out.push_str(&format!(
        "owner       {}\n",
        owner.map_or_else(
            || "none (no daemon or writer running)".to_string(),
            |p| format!("PID {p}")
        )
    ));
    out.push_str(&format!("daemon      {}\n", daemon_line(daemon.as_ref())));
    out.push_str(&format!(
        "rows        {} in {} batches ({} train, {} holdout)\n",
        summary.rows, summary.batches, summary.train_rows, summary.holdout_rows
    ));
    out.push_str(&format!(
        "serving     {}\n",
        summary
            .serving
            .map_or_else(|| "no model yet".to_string(), |m| m.to_string())
    ));
    if let Some(d) = &summary.last_decision {
        out.push_str(&format!("last gate   {d}\n"));
    }
    if let Some(v) = &summary.versus_ridge {
        let share = (v.ridge_loss - v.network_loss) / v.ridge_loss.abs().max(f64::MIN_POSITIVE);
        if v.beats_ridge {
            out.push_str(&format!(
                "vs ridge    {} holdout loss {:.4} vs ridge {:.4} in cycle {} ({:.1}% lower)\n",
                v.model,
                v.network_loss,
                v.ridge_loss,
                v.cycle,
                100.0 * share
            ));
        } else {
            out.push_str(&format!(
                "WARNING     the serving network {} does not beat the ridge baseline: holdout loss \
                 {:.4} vs {:.4} in cycle {}; check the model settings before relying on it\n",
                v.model, v.network_loss, v.ridge_loss, v.cycle
            ));
        }
    }
    if let Some(v) = &summary.versus_trees {
        out.push_str(&trees_lines(v));
    }
    if let Some(d) = &summary.last_drift {
        if !d.flagged.is_empty() {
            out.push_str(&format!(
                "drift       {}: {} far outside past batches\n",
                d.batch,
                d.flagged.join(", ")
            ));
            for r in &d.reasons {
                out.push_str(&format!("            {r}\n"));
            }
        } else if let Some(b) = &d.building {
            out.push_str(&format!(
                "drift       {}: {b}; a column is not flagged before that\n",
                d.batch
            ));
        } else if !d.old_rule_flagged.is_empty() {
            out.push_str(&format!(
                "drift       {}: no flag by the rule against past batches (the old fixed-level tests named {})\n",
                d.batch,
                d.old_rule_flagged.join(", ")
            ));
        } else {
            out.push_str(&format!(
                "drift       {}: no column far outside past batches\n",
                d.batch
            ));
        }
        for v in &d.new_values {
            out.push_str(&format!("new values  {v}\n"));
        }
    }
    if let Some(f) = &summary.fresh_check {
        let lead = match f.verdict.as_str() {
            "shifted" | "regressed" => "WARNING    ",
            _ => "fresh check",
        };
        out.push_str(&format!(
            "{lead} {} scored by {}: {}\n",
            f.batch, f.serving, f.verdict
        ));
        if matches!(f.verdict.as_str(), "shifted" | "regressed") {
            out.push_str(&format!("            {}\n", f.reason));
            for h in &f.hotspots {
                out.push_str(&format!("            most excess loss: {h}\n"));
            }
        }
    }
    for (b, why) in &summary.set_aside {
        out.push_str(&format!("set aside   {b} (stored, not used): {why}\n"));
    }
    if !summary.serving_saw_set_aside.is_empty() {
        let list: Vec<String> = summary
            .serving_saw_set_aside
            .iter()
            .map(|b| b.to_string())
            .collect();
        out.push_str(&format!(
            "WARNING     the serving model trained on {} (since set aside), directly or through \
             its parents; the next retrain trains a cold candidate without it\n",
            list.join(", ")
        ));
    }
    out.push_str(&format!(
        "files       {} refused, {} duplicates\n",
        summary.refused_files, summary.duplicate_files
    ));
    if !inbox.waiting.is_empty() || !inbox.being_written.is_empty() {
        out.push_str(&format!(
            "inbox       {} waiting to be taken by the daemon\n",
            inbox.waiting.len()
        ));
    }
    if !inbox.being_written.is_empty() {
        out.push_str(&format!(
            "            ignored until renamed to a name without a leading dot or `.part`: {}\n",
            inbox.being_written.join(", ")
        ));
    }
    for (col, values) in &summary.vocabularies {
        const SHOWN: usize = 8;
        let mut list = values
            .iter()
            .take(SHOWN)
            .cloned()
            .collect::<Vec<_>>()
            .join(", ");
        let size = summary
            .vocabulary_sizes
            .get(col)
            .copied()
            .unwrap_or(values.len() as u64);
        if size > SHOWN as u64 {
            list.push_str(&format!(", … {} more", size - SHOWN as u64));
        }
        out.push_str(&format!("vocabulary  {col}: {size} values ({list})\n"));
    }
    out.push_str("\nrecent events\n");
    let rows: Vec<Vec<String>> = recent
        .iter()
        .map(|e| {
            vec![
                e.seq.0.to_string(),
                e.time.clone(),
                e.event.kind().to_string(),
                e.event.summary(),
            ]
        })
        .collect();
    out.push_str(&super::table_styled(
        &["seq", "time (UTC)", "kind", "what"],
        &rows,
        cli.colored(),
    ));
    emit(&out)?;
    Ok(Exit::Ok)
}

/// The serving network beside the boosted trees: one line, and a second
/// with the advice when the trees do clearly better.
fn trees_lines(v: &VersusTrees) -> String {
    let gap = (v.network_loss - v.trees_loss) / v.network_loss.abs().max(f64::MIN_POSITIVE);
    let mut out = format!(
        "vs trees    {} holdout loss {:.4} vs boosted trees {:.4} in cycle {} ",
        v.model, v.network_loss, v.trees_loss, v.cycle
    );
    if let Some(share) = v.trees_better_by {
        out.push_str(&match v.p {
            Some(p) => format!(
                "(trees {:.1}% lower, one-sided {})\n",
                100.0 * gap,
                p_text(p)
            ),
            None => format!("(trees {:.1}% lower)\n", 100.0 * gap),
        });
        out.push_str(&format!(
            "advice      boosted trees do {:.0}% better than the best network on cycle {}'s holdout \
             rows ({}): the network may be the wrong tool for this data; it keeps serving\n",
            100.0 * share,
            v.cycle,
            v.best_network.map_or_else(String::new, |m| m.to_string())
        ));
        return out;
    }
    match (v.trees_better_by, v.p) {
        _ if gap <= 0.0 => out.push_str(&format!("(network {:.1}% lower)\n", -100.0 * gap)),
        (_, Some(p)) => out.push_str(&format!(
            "(trees {:.1}% lower, one-sided {}; advice needs ≥ {:.0}% and p ≤ {})\n",
            100.0 * gap,
            p_text(p),
            100.0 * crate::trees::ADVICE_MARGIN,
            crate::trees::ADVICE_ALPHA
        )),
        (_, None) => out.push_str(&format!(
            "(trees {:.1}% lower; too few batches to test)\n",
            100.0 * gap
        )),
    }
    out
}

fn p_text(p: f64) -> String {
    if p < 0.001 {
        "p < 0.001".to_string()
    } else {
        format!("p = {p:.3}")
    }
}

/// What the running daemon is doing, in one line.
fn daemon_line(d: Option<&crate::daemon::DaemonStatus>) -> String {
    let Some(d) = d else {
        return "not running".to_string();
    };
    let mut line = format!(
        "running (PID {}, since {}): {}",
        d.pid, d.started_at, d.activity
    );
    if let Some(c) = d.cycle {
        line.push_str(&format!(" cycle {c}"));
    }
    if let Some(why) = &d.cycle_reason {
        line.push_str(&format!(" ({why})"));
    }
    if let Some(p) = &d.progress {
        line.push_str(&format!(", {p}"));
    }
    line.push_str(&format!(
        "; {} untrained rows (a cycle starts at {}{})",
        d.untrained_rows,
        d.min_new_rows,
        d.train_at
            .as_ref()
            .map_or_else(String::new, |t| format!(" or daily at {t}"))
    ));
    if d.waiting_requests > 0 {
        line.push_str(&format!("; {} command(s) waiting", d.waiting_requests));
    }
    if d.inbox_files > 0 {
        line.push_str(&format!("; {} inbox file(s) settling", d.inbox_files));
    }
    line
}

#[cfg(test)]
mod tests {
    use super::*;
    use crate::ids::{AuditSeq, BatchId};

    #[test]
    fn summary_folds_the_log() {
        let t = chrono::Utc::now();
        let mut cats = BTreeMap::new();
        cats.insert("shop".to_string(), vec!["Quay".to_string()]);
        let events = [
            Event::BatchAccepted {
                batch: BatchId(1),
                file: "a".into(),
                file_hash: "h".into(),
                rows: 10,
                train_rows: 8,
                holdout_rows: 2,
                new_categories: cats.clone(),
                new_category_counts: BTreeMap::new(),
                drift: None,
                suspect: None,
                rows_file: None,
            },
            Event::BatchRefused {
                file: "b".into(),
                file_hash: "h2".into(),
                problems: 3,
                first_problem: "x".into(),
                kept_as: None,
            },
            Event::BatchDuplicate {
                file: "c".into(),
                file_hash: "h".into(),
                duplicate_of: BatchId(1),
            },
            Event::BatchAccepted {
                batch: BatchId(2),
                file: "d".into(),
                file_hash: "h3".into(),
                rows: 5,
                train_rows: 4,
                holdout_rows: 1,
                // A list cut at the cap: 250 new values, one listed.
                new_categories: [("shop".to_string(), vec!["Harbour".to_string()])].into(),
                new_category_counts: [("shop".to_string(), 250)].into(),
                drift: None,
                suspect: None,
                rows_file: None,
            },
        ];
        let entries: Vec<Entry> = events
            .into_iter()
            .enumerate()
            .map(|(i, ev)| Entry::seal(AuditSeq(i as u64 + 1), t, "u", ev, "p"))
            .collect();
        let s = Summary::from_entries(&entries);
        assert_eq!(
            (s.batches, s.rows, s.train_rows, s.holdout_rows),
            (2, 15, 12, 3)
        );
        assert_eq!((s.refused_files, s.duplicate_files), (1, 1));
        assert_eq!(s.vocabularies["shop"], ["Quay", "Harbour"]);
        assert_eq!(s.vocabulary_sizes["shop"], 251);
        assert_eq!(s.versus_trees, None);
    }

    #[test]
    fn the_trees_advice_follows_the_serving_model_and_needs_a_clear_gap() {
        let t = chrono::Utc::now();
        let trained = |cycle, model, holdout_loss| Event::CandidateTrained {
            cycle,
            model: ModelId(model),
            run: "cold".into(),
            parent: None,
            trained_through: BatchId(1),
            epochs: 3,
            seconds: 1.0,
            stop: "Patience".into(),
            holdout_rows: 100,
            holdout_loss,
            manifest_hash: "h".into(),
            widened: BTreeMap::new(),
            rescaled: Vec::new(),
        };
        let scored = |cycle, serving: Option<(u64, f64)>, trees: f64, p: Vec<(u64, f64, f64)>| {
            Event::BaselinesScored {
                cycle,
                holdout_rows: 100,
                trivial_loss: 1.0,
                ridge_loss: Some(0.6),
                ridge_lambda: 1.0,
                ridge_problem: None,
                serving: serving.map(|s| ModelId(s.0)),
                serving_loss: serving.map(|s| s.1),
                trees_loss: Some(trees),
                trees_rows: Some(100),
                trees_problem: None,
                trees_versus: p
                    .into_iter()
                    .map(|(m, loss, p)| crate::audit::TreesVersus {
                        model: ModelId(m),
                        loss,
                        p: Some(p),
                    })
                    .collect(),
            }
        };
        let promoted = |cycle, model, previous: Option<u64>| Event::Promoted {
            cycle,
            model: ModelId(model),
            previous: previous.map(ModelId),
            evidence: crate::provenance::fixtures::gate_evidence(100),
        };
        let fold = |events: Vec<Event>| {
            let entries: Vec<Entry> = events
                .into_iter()
                .enumerate()
                .map(|(i, ev)| Entry::seal(AuditSeq(i as u64 + 1), t, "u", ev, "p"))
                .collect();
            Summary::from_entries(&entries)
        };
        // Cycle 1: m1 (0.5) promoted; trees 0.4 with p = 0.01: 20% better.
        let one = vec![
            trained(1, 1, 0.5),
            scored(1, None, 0.4, vec![(1, 0.5, 0.01)]),
            promoted(1, 1, None),
        ];
        let s = fold(one.clone());
        let v = s.versus_trees.unwrap();
        assert_eq!((v.model, v.cycle, v.p), (ModelId(1), 1, Some(0.01)));
        assert!((v.trees_better_by.unwrap() - 0.2).abs() < 1e-12);
        assert!(trees_lines(&v).contains("advice      boosted trees do 20% better"));
        // Cycle 2 scores m1 again as the serving model: 20% but p = 0.3.
        let mut two = one.clone();
        two.push(scored(2, Some((1, 0.5)), 0.4, vec![(1, 0.5, 0.3)]));
        let v = fold(two).versus_trees.unwrap();
        assert_eq!((v.cycle, v.trees_better_by), (2, None));
        assert!(!trees_lines(&v).contains("advice      "));
        // A clear but small gap (4%) is not advice either.
        let mut three = one;
        let mut stale = three.clone();
        three.push(scored(2, Some((1, 0.5)), 0.48, vec![(1, 0.5, 0.001)]));
        let v = fold(three).versus_trees.unwrap();
        assert_eq!(v.trees_better_by, None);
        assert!(trees_lines(&v).contains("advice needs ≥ 10% and p ≤ 0.05"));
        // The serving model has gone stale (0.9, far behind the trees), but
        // this cycle's candidate m2, trained on the same rows, is close to
        // them: no advice, the network is not the wrong tool.
        stale.push(trained(2, 2, 0.42));
        stale.push(scored(
            2,
            Some((1, 0.9)),
            0.4,
            vec![(2, 0.42, 0.2), (1, 0.9, 0.001)],
        ));
        let v = fold(stale).versus_trees.unwrap();
        assert_eq!(
            (v.model, v.network_loss, v.best_network),
            (ModelId(1), 0.9, Some(ModelId(2)))
        );
        assert_eq!(v.trees_better_by, None);
        assert!(!trees_lines(&v).contains("advice      "));
    }
}
