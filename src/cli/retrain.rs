//! `tidegate retrain`: one cycle now — candidates, holdout scores, the gate,
//! promote or keep. `--dry-run` judges without changing or recording
//! anything; `--progress` draws a bar per candidate on stderr (only on a
//! terminal).

use std::collections::HashMap;
use std::sync::Mutex;

use indicatif::{MultiProgress, ProgressBar, ProgressDrawTarget, ProgressStyle};

use super::{Cli, Exit, emit};
use crate::cycle::{self, Options, Outcome, run_name};
use crate::model::RunKind;
use crate::state::{self, StateDir};
use crate::train::Progress;

#[derive(Debug, clap::Args)]
pub struct Args {
    /// Also train a cold candidate from scratch, whatever the schedule says.
    #[arg(long)]
    cold: bool,
    /// Train and judge, but change nothing and record nothing.
    #[arg(long)]
    dry_run: bool,
    /// Show a progress bar per candidate on stderr (a terminal only).
    #[arg(long)]
    progress: bool,
}

/// Progress bars keyed by candidate kind, fed from the training threads.
struct Bars {
    multi: MultiProgress,
    bars: Mutex<HashMap<&'static str, ProgressBar>>,
}

impl Bars {
    fn new() -> Bars {
        Bars {
            multi: MultiProgress::with_draw_target(ProgressDrawTarget::stderr()),
            bars: Mutex::new(HashMap::new()),
        }
    }

    fn update(&self, p: Progress) {
        let name = run_name(p.kind);
        let Ok(mut bars) = self.bars.lock() else {
            return;
        };
        let bar = bars.entry(name).or_insert_with(|| {
            let total = (p.max_epochs * p.batches.max(1)) as u64;
            let bar = self.multi.add(ProgressBar::new(total));
            let style =
                ProgressStyle::with_template("{prefix:>5} [{bar:30}] epoch {msg} {elapsed}")
                    .map(|s| s.progress_chars("=> "));
            if let Ok(style) = style {
                bar.set_style(style);
            }
            bar.set_prefix(name);
            bar
        });
        bar.set_position(((p.epoch.saturating_sub(1)) * p.batches + p.batch) as u64);
        let mut msg = format!("{}/{}", p.epoch, p.max_epochs);
        if let Some(v) = p.validation_loss {
            msg.push_str(&format!(" val {v:.4}"));
        }
        bar.set_message(msg);
    }

    fn finish(&self) {
        if let Ok(bars) = self.bars.lock() {
            for b in bars.values() {
                b.finish_and_clear();
            }
        }
    }
}

pub fn run(cli: &Cli, state: &StateDir, args: &Args) -> anyhow::Result<Exit> {
    // A running daemon owns the state dir: the cycle runs on its worker.
    let request = crate::daemon::Request::Retrain {
        cold: args.cold,
        dry_run: args.dry_run,
    };
    if let Some(exit) = crate::daemon::client::route(state, &request, cli.json)? {
        return Ok(exit);
    }
    let config = super::load_config(cli, state)?;
    let (mut owner, recovery) = state::open(state, &config)?;
    if let Some(c) = recovery.abandoned_cycle {
        tracing::warn!("cycle {c} was cut short before it ended; recorded as abandoned");
    }
    let bars = args.progress.then(Bars::new);
    let progress = |p: Progress| {
        if let Some(b) = &bars {
            b.update(p);
        }
    };
    let options = Options {
        force_cold: args.cold,
        dry_run: args.dry_run,
        hold: false,
    };
    let outcome = cycle::run(
        &mut owner,
        options,
        &state::current_user(),
        Some(&progress),
        None,
    );
    if let Some(b) = &bars {
        b.finish();
    }
    emit(&render(outcome?, cli.json))?;
    Ok(Exit::Ok)
}

/// A cycle's outcome as printed (text, or one JSON object); the daemon
/// answers a routed `retrain` with the same.
pub(crate) fn render(outcome: Outcome, json: bool) -> String {
    let report = match outcome {
        Outcome::NothingNew { serving } => {
            return if json {
                format!(
                    "{}\n",
                    serde_json::json!({"outcome": "nothing-new", "serving": serving})
                )
            } else {
                format!(
                    "nothing to do: {serving} serves and has been trained on every batch (use --cold to train from scratch anyway)\n"
                )
            };
        }
        Outcome::Decided(r) => r,
    };
    // The model the candidates were compared with (not the reference
    // models, which the table calls baselines).
    let compared_with = match report.serving_before {
        Some(m) => m.to_string(),
        None => "trivial predictor".to_string(),
    };
    if json {
        let candidates: Vec<serde_json::Value> = report
            .candidates
            .iter()
            .map(|c| {
                serde_json::json!({
                    "model": c.id, "run": run_name(c.run), "epochs": c.summary.epochs,
                    "seconds": c.summary.seconds, "stop": format!("{:?}", c.summary.stop), "holdout_loss": c.holdout_loss,
                })
            })
            .collect();
        let evidence = report
            .decision
            .evidence()
            .map(|e| cycle::evidence_of(e, &report.decision));
        let v = serde_json::json!({
            "outcome": report.decision.kind(), "cycle": report.cycle, "dry_run": report.dry_run,
            "serving_before": report.serving_before, "serving_after": report.serving_after,
            "compared_with": compared_with, "compared_with_loss": report.baseline_loss, "holdout_rows": report.holdout_rows,
            "holdout_batches": report.holdout_batches,
            "batches_needed": report.batches_needed,
            "new_batches": report.new_batches, "candidates": candidates, "judged": report.judged,
            "evidence": evidence, "reason": report.decision.reason(),
            "ridge_loss": report.ridge_loss, "trivial_loss": report.trivial_loss,
            "trees_loss": report.trees_loss, "trees_better_by": report.trees_better_by,
        });
        return format!("{v}\n");
    }
    let mut rows: Vec<Vec<String>> = vec![vec![
        compared_with.clone(),
        "serving".into(),
        "-".into(),
        "-".into(),
        format!("{:.4}", report.baseline_loss),
    ]];
    if report.serving_before.is_some() {
        rows.push(vec![
            "trivial predictor".into(),
            "baseline".into(),
            "-".into(),
            "-".into(),
            format!("{:.4}", report.trivial_loss),
        ]);
    } else {
        rows[0][1] = "baseline".into();
    }
    rows.push(vec![
        "ridge".into(),
        "baseline".into(),
        "-".into(),
        "-".into(),
        report
            .ridge_loss
            .map_or_else(|| "not fitted".into(), |l| format!("{l:.4}")),
    ]);
    rows.push(vec![
        "boosted trees".into(),
        "baseline".into(),
        "-".into(),
        "-".into(),
        report
            .trees_loss
            .map_or_else(|| "not fitted".into(), |l| format!("{l:.4}")),
    ]);
    for (i, c) in report.candidates.iter().enumerate() {
        let name =
            c.id.map_or_else(|| "(dry run)".to_string(), |m| m.to_string());
        let mark = if i == report.judged { " *" } else { "" };
        rows.push(vec![
            format!("{name}{mark}"),
            match c.run {
                RunKind::Warm => "warm".into(),
                RunKind::Cold => "cold".into(),
            },
            c.summary.epochs.to_string(),
            format!("{:.1}", c.summary.seconds),
            format!("{:.4}", c.holdout_loss),
        ]);
    }
    let mut out = format!(
        "cycle {}{}: {} new batch(es), {} holdout rows from {} batch(es) ({} needed for a decision)\n",
        report.cycle,
        if report.dry_run {
            " (dry run: nothing saved or recorded)"
        } else {
            ""
        },
        report.new_batches.len(),
        report.holdout_rows,
        report.holdout_batches,
        report.batches_needed
    );
    out.push_str(&super::table_styled(
        &["model", "kind", "epochs", "seconds", "holdout loss"],
        &rows,
        false,
    ));
    out.push_str(&format!(
        "decision: {} — {}\n",
        report.decision.kind(),
        report.decision.reason()
    ));
    if report.decision.waits_for_evidence() {
        out.push_str(
            "not enough evidence yet: the gate decides once the holdout rows span enough batches\n",
        );
    }
    for (i, d) in report.decisions.iter().enumerate() {
        if i != report.judged
            && let Some(c) = report.candidates.get(i)
        {
            let name =
                c.id.map_or_else(|| "(dry run)".to_string(), |m| m.to_string());
            out.push_str(&format!("also judged: {name} — {}\n", d.reason()));
        }
    }
    if let Some(s) = report.serving_after {
        out.push_str(&format!("serving: {s}\n"));
    }
    let best = report.candidates[report.judged].holdout_loss;
    if let Some(r) = report.ridge_loss
        && best >= r
    {
        out.push_str(&format!(
            "warning: the best network ({best:.4}) does not beat the ridge baseline ({r:.4}) on the holdout rows\n"
        ));
    }
    if let Some(share) = report.trees_better_by {
        out.push_str(&format!(
            "advice: boosted trees do {:.0}% better than the best network on these holdout rows; \
             the network may be the wrong tool for this data (the network serves: this is advice only)\n",
            100.0 * share
        ));
    }
    out
}
