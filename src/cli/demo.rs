//! `tidegate demo`: the bundled bakery scenario (invented data) fed night by
//! night through the path the daemon takes — intake, fresh-data check, a
//! retrain cycle once enough new rows are waiting, the gate — with one line
//! per night, then the way back (a rollback) and where to look next.

use std::path::PathBuf;

use anyhow::Context;

use super::{Cli, Exit, emit};
use crate::config::{Config, TEMPLATE};
use crate::cycle::{self, Outcome as CycleOutcome};
use crate::fresh;
use crate::intake::{self, Outcome, Source};
use crate::state::{self, StateDir};

#[derive(Debug, clap::Args)]
pub struct Args {
    /// Where to create the demo's state dir (must not exist or be empty);
    /// default: a new folder under the system's temp dir, kept afterwards.
    #[arg(long = "into", value_name = "DIR")]
    into: Option<PathBuf>,
}

/// One printed line of the night-by-night table.
struct Night {
    file: String,
    intake: String,
    check: String,
    candidates: String,
    serving_loss: String,
    candidate_loss: String,
    p: String,
    decision: String,
}

pub fn run(cli: &Cli, args: &Args) -> anyhow::Result<Exit> {
    let started = std::time::Instant::now();
    let base = match (&args.into, &cli.state) {
        (Some(dir), _) => dir.clone(),
        (None, Some(dir)) => dir.clone(),
        (None, None) => {
            let stamp = chrono::Utc::now().format("%Y%m%dT%H%M%S");
            std::env::temp_dir().join(format!("tidegate-demo-{stamp}-{}", std::process::id()))
        }
    };
    let state = StateDir::new(&base);
    let nights_dir = base.with_file_name(format!(
        "{}.nights",
        base.file_name()
            .map_or_else(|| "demo".into(), |n| n.to_string_lossy().into_owned())
    ));
    std::fs::create_dir_all(&nights_dir)
        .with_context(|| format!("cannot create {}", nights_dir.display()))?;
    let mut files = Vec::new();
    for (name, text) in crate::demo::files(crate::demo::SEED) {
        let path = nights_dir.join(&name);
        crate::fsutil::write_atomic(&path, text.as_bytes())
            .with_context(|| format!("cannot write {}", path.display()))?;
        files.push(path);
    }
    let config_path = nights_dir.join("tidegate.toml");
    crate::fsutil::write_atomic(&config_path, TEMPLATE.as_bytes())
        .with_context(|| format!("cannot write {}", config_path.display()))?;
    let config = Config::parse(TEMPLATE, &config_path)?;
    let user = state::current_user();
    let mut owner = state::create(&state, &config, TEMPLATE, &user)?;

    let quiet = cli.json;
    if !quiet {
        emit(&format!(
            "tidegate demo: a bakery chain's nightly sales (invented data, {} files in {})\n\
             state dir: {}\n\n",
            files.len(),
            nights_dir.display(),
            state.root().display()
        ))?;
    }
    let mut nights = Vec::new();
    let mut waiting_rows = 0u64;
    let mut events = Vec::new();
    for path in &files {
        let name = path
            .file_name()
            .map_or_else(String::new, |n| n.to_string_lossy().into_owned());
        let mut night = Night {
            file: name,
            intake: String::new(),
            check: "-".into(),
            candidates: "-".into(),
            serving_loss: "-".into(),
            candidate_loss: "-".into(),
            p: "-".into(),
            decision: "-".into(),
        };
        let outcome = intake::take_file(&mut owner, path, Source::Keep, &user, chrono::Utc::now())?;
        match &outcome {
            Outcome::Accepted { batch, entry } => {
                night.intake = format!("{} rows", batch.rows());
                if let crate::audit::Event::BatchAccepted { new_categories, .. } = &entry.event
                    && let Some(shops) = new_categories.get("shop")
                    && batch.id.0 > 1
                {
                    night.intake.push_str(", new shop");
                    events.push(format!(
                        "{}: new shop {} taken in; the next warm candidate gets an input for it",
                        night.file,
                        shops.join(", ")
                    ));
                }
                if let crate::audit::Event::BatchAccepted {
                    drift: Some(report),
                    ..
                } = &entry.event
                {
                    let flagged = report.flagged();
                    if !flagged.is_empty() {
                        events.push(format!(
                            "{}: drift in {}: far from the stored rows, by more than any past \
                             night; reported, no model is blamed",
                            night.file,
                            flagged.join(", ")
                        ));
                    }
                }
                waiting_rows += batch.rows();
                if let Some(found) = fresh::check_batch(&mut owner, batch.id, &user)? {
                    let ev = &found.evidence;
                    night.check = ev.verdict.clone();
                    // Name what the verdict is about: the shifted value, the
                    // first value never seen, or the value carrying most loss.
                    let about = match ev.verdict.as_str() {
                        "shifted" => ev.shifted_values.first().cloned(),
                        // Every column with a value a model has not met
                        // (the first Thursday and a new shop can coincide).
                        "new-conditions" => Some(
                            ev.new_conditions
                                .iter()
                                .filter_map(|(c, v)| v.first().map(|v| format!("{c} = {v}")))
                                .collect::<Vec<_>>()
                                .join("; "),
                        )
                        .filter(|s| !s.is_empty()),
                        "regressed" => ev
                            .hotspots
                            .first()
                            .map(|h| format!("{} = {}", h.column, h.value)),
                        _ => None,
                    };
                    if let Some(about) = about {
                        night.check.push_str(&format!(" ({about})"));
                    }
                    if ev.verdict == "shifted" {
                        events.push(format!(
                            "{}: {} cost the serving model far more than usual beside the rest \
                             of the column: a shift in the data, flagged; no model is blamed",
                            night.file,
                            ev.shifted_values.join(", ")
                        ));
                    }
                    if let Some(rb) = &found.rollback {
                        if let crate::audit::Event::RolledBack { from, to, .. } = &rb.event {
                            events.push(format!(
                                "{}: {from} did significantly worse than {to} on these new rows, \
                                 so {to} serves again (automatic rollback, evidence in the log)",
                                night.file
                            ));
                        }
                        night.check.push_str(", rolled back");
                    }
                }
            }
            Outcome::Duplicate { of, .. } => {
                night.intake = format!("duplicate of {of}");
                events.push(format!(
                    "{}: same bytes as {of}; nothing stored twice",
                    night.file
                ));
            }
            Outcome::Refused { refusal, .. } => {
                night.intake = format!("refused, {} problems", refusal.total);
                events.push(format!(
                    "{}: refused whole, first problem: {}",
                    night.file,
                    refusal.first()
                ));
            }
            Outcome::Completed { batch } => night.intake = format!("already stored as {batch}"),
            Outcome::NotReady { reason } => night.intake = format!("not taken: {reason}"),
        }
        if waiting_rows >= owner.config.daemon.min_new_rows as u64 {
            waiting_rows = 0;
            match cycle::run(&mut owner, cycle::Options::default(), &user, None, None)? {
                CycleOutcome::NothingNew { .. } => {}
                CycleOutcome::Decided(r) => {
                    let judged = &r.candidates[r.judged];
                    night.candidates = r
                        .candidates
                        .iter()
                        .map(|c| cycle::run_name(c.run))
                        .collect::<Vec<_>>()
                        .join("+");
                    night.serving_loss = format!("{:.2}", r.baseline_loss);
                    if r.serving_before.is_none() {
                        night.serving_loss.push_str(" (mean)");
                    }
                    night.candidate_loss = format!("{:.2}", judged.holdout_loss);
                    if let Some(e) = r.decision.evidence() {
                        night.p = format!("{:.2e}", e.p);
                    }
                    // The candidate's fate: a candidate that does not serve
                    // is shelved (the serving model is what is kept).
                    night.decision = match r.decision.kind() {
                        "keep" => "shelve",
                        kind => kind,
                    }
                    .to_string();
                    if let Some(id) = judged.id {
                        night.decision.push_str(&format!(" {id}"));
                    }
                    if r.decision.kind() == "keep"
                        && events.iter().all(|e| !e.contains(" shelved:"))
                    {
                        let reason = r.decision.reason();
                        events.push(format!(
                            "{}: candidate {} shelved: {}",
                            night.file,
                            judged.id.map(|m| m.to_string()).unwrap_or_default(),
                            reason.strip_prefix("keep: ").unwrap_or(&reason)
                        ));
                    }
                }
            }
        }
        nights.push(night);
    }
    // The way back: if the fresh-data check did not roll back by itself,
    // a person does, as one would after a complaint.
    let rolled_back = events.iter().any(|e| e.contains("automatic rollback"));
    let mut rollback_line = None;
    if !rolled_back && owner.store.serving()?.is_some() {
        match crate::lifecycle::rollback(
            &mut owner,
            None,
            "demo: showing the way back to the previous model",
            &user,
        ) {
            Ok(entry) => rollback_line = Some(entry.event.summary()),
            Err(e) => rollback_line = Some(format!("no rollback possible: {e}")),
        }
    }
    let serving = owner.store.serving()?;
    drop(owner);
    // The page to look at the story rather than read it.
    let report_path = state.root().join("report.html");
    let built = crate::report::build(
        &state,
        &config,
        &crate::report::Options::default(),
        chrono::Utc::now(),
    )?;
    crate::fsutil::write_atomic(&report_path, built.html.as_bytes())
        .with_context(|| format!("cannot write {}", report_path.display()))?;

    if quiet {
        let v = serde_json::json!({
            "state": state.root(),
            "nights": nights.iter().map(|n| serde_json::json!({
                "file": n.file, "intake": n.intake, "fresh_check": n.check,
                "candidates": n.candidates, "serving_loss": n.serving_loss,
                "candidate_loss": n.candidate_loss, "p": n.p, "decision": n.decision,
            })).collect::<Vec<_>>(),
            "rollback": rollback_line,
            "serving": serving,
            "report": report_path,
            "seconds": started.elapsed().as_secs_f64(),
        });
        emit(&format!("{v}\n"))?;
        return Ok(Exit::Ok);
    }
    let rows: Vec<Vec<String>> = nights
        .iter()
        .map(|n| {
            vec![
                n.file.clone(),
                n.intake.clone(),
                n.check.clone(),
                n.candidates.clone(),
                n.serving_loss.clone(),
                n.candidate_loss.clone(),
                n.p.clone(),
                n.decision.clone(),
            ]
        })
        .collect();
    let mut out = super::table_styled(
        &[
            "file",
            "intake",
            "fresh check",
            "trained",
            "serving loss",
            "candidate",
            "p",
            "decision",
        ],
        &rows,
        cli.colored(),
    );
    out.push_str(
        "\nlosses: mean squared error (loaves²) on the holdout rows; p: one-sided cluster-robust \
         t-test, nights as clusters, that the candidate is better\n\nwhat happened:\n",
    );
    for e in &events {
        out.push_str(&format!("- {e}\n"));
    }
    if let Some(line) = &rollback_line {
        out.push_str(&format!("- a person rolls back: {line}\n"));
    }
    out.push_str(&format!(
        "serving now: {}\nfinished in {:.1} s\n\nreport (open in a browser): {}\n\nexplore:\n",
        serving.map_or_else(|| "none".to_string(), |m| m.to_string()),
        started.elapsed().as_secs_f64(),
        report_path.display()
    ));
    let root = state.root().display();
    out.push_str(&format!(
        "  tidegate --state {root} log --kind promoted,shelved,rolled-back,batch-refused\n  \
         tidegate --state {root} models\n  \
         tidegate --state {root} predict --input {}\n",
        files
            .last()
            .map(|p| p.display().to_string())
            .unwrap_or_default()
    ));
    emit(&out)?;
    Ok(Exit::Ok)
}
