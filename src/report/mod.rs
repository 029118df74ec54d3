//! `tidegate report`: one self-contained HTML page (inline CSS and SVG, no
//! script, no URL) that shows a state dir's history: holdout loss per model
//! version with the gate's decisions and the baselines, training curves,
//! rows stored, the serving model's response over two inputs, the
//! permutation importance of each input column on the holdout rows,
//! fresh-data checks, drift flags, the batches each model saw and the
//! batches set aside (with the models that trained on them), and the audit
//! log.
//!
//! Reads files only (`gather`), so it works while another process owns the
//! state dir. `scan` computes what the serving model does, `charts` draws,
//! `html` lays out and escapes.

pub mod charts;
pub mod gather;
pub mod html;
pub mod importance;
pub mod scan;
pub mod seen;

use chrono::{DateTime, SecondsFormat, Utc};

use crate::config::Config;
use crate::ids::ModelId;
use crate::ingest::Limits;
use crate::model::checkpoint::{Checkpoint, model_dir};
use crate::schema::Schema;
use crate::state::StateDir;
use gather::{Arrival, Timeline};
use html::{escape, figure, missing, note, section, table};

/// Training curves of this many of the newest model versions.
pub const CURVES_SHOWN: usize = 4;

/// What the user chose for the page.
#[derive(Debug, Clone, Default)]
pub struct Options {
    /// Inputs of the response map (default: the first two number inputs).
    pub x: Option<String>,
    pub y: Option<String>,
}

/// The page and a few counts for the command's message.
#[derive(Debug, Clone)]
pub struct Report {
    pub html: String,
    pub charts: usize,
    pub events: usize,
}

fn loss(v: f64) -> String {
    format!("{v:.4}")
}

fn maybe(v: Option<f64>) -> String {
    v.map_or_else(|| "-".into(), |p| format!("{p:.4}"))
}

/// The last cycle's best network beside the boosted trees, with the advice when the
/// trees do clearly better (advice only: the network keeps serving).
fn trees_note(v: &gather::VersusTrees) -> String {
    let model = v.network;
    match v.trees_better_by {
        Some(share) => note(&format!(
            "Advice: boosted trees do {:.0}% better than the best network of cycle {} ({model}) on \
             its holdout rows (mean loss {} against {}; at least {:.0}% lower, one-sided p ≤ {} with \
             batches as clusters). The network may be the wrong tool for this data. It keeps \
             serving: the trees are a reference, never a candidate.",
            100.0 * share,
            v.cycle,
            loss(v.trees_loss),
            loss(v.network_loss),
            100.0 * crate::trees::ADVICE_MARGIN,
            crate::trees::ADVICE_ALPHA
        )),
        None => note(&format!(
            "The best network of cycle {} ({model}) against boosted trees on its holdout rows: \
             mean loss {} against the trees' {}; no clear gap in the trees' favour.",
            v.cycle,
            loss(v.network_loss),
            loss(v.trees_loss)
        )),
    }
}

/// Builds the report of `state` (read-only).
pub fn build(
    state: &StateDir,
    config: &Config,
    options: &Options,
    now: DateTime<Utc>,
) -> anyhow::Result<Report> {
    let entries = state.mirror().entries()?;
    let t = gather::timeline(&entries);
    let seen = seen::Seen::from_entries(&entries);
    let serving = gather::serving(state)?;
    let (manifests, mut notes) = gather::manifests(&state.models());
    let schema = Schema::from_config(config);
    let mut charts = 0;
    let mut body = String::new();

    // 1. Holdout loss per model version.
    let mut s = note(
        "Mean loss on the holdout rows of every candidate, by the retrain cycle that trained it; \
         the marker says what the log records as its latest fate, each fate with a shape of its own \
         as well as a colour. Dashed lines: the cycle's ridge \
         regression, boosted trees and trivial predictor, fitted on the same rows (the trees on a \
         sample of at most 20,000 of them) and scored on the same holdout rows; they are references, \
         never candidates. \
         The table names the batches each model saw: those its own training could read, and those \
         it carries only through the weights it was warm-started from. A model that saw a batch \
         now set aside is marked.",
    );
    if let Some(v) = t.versus_trees() {
        s.push_str(&trees_note(&v));
    }
    match charts::holdout(&t)? {
        Some(svg) => {
            charts += 1;
            s.push_str(&figure(&svg, "holdout loss per model version (log scale)"));
            let rows: Vec<Vec<String>> = t
                .candidates
                .iter()
                .map(|c| {
                    vec![
                        format!(
                            "{}{}",
                            c.model,
                            if serving == Some(c.model) {
                                " (serving)"
                            } else {
                                ""
                            }
                        ),
                        c.cycle.to_string(),
                        c.run.clone(),
                        loss(c.holdout_loss),
                        c.fate.label().to_string(),
                        c.time.clone(),
                        seen.batches_cell(c.model),
                        seen.aside_cell(c.model),
                    ]
                })
                .collect();
            let marks: Vec<String> = t
                .candidates
                .iter()
                .map(|c| seen.row_attr(c.model))
                .collect();
            s.push_str(&table(
                "models",
                &[
                    "model",
                    "cycle",
                    "run",
                    "holdout loss",
                    "fate",
                    "trained (UTC)",
                    "batches seen",
                    "set-aside batches seen",
                ],
                &rows,
                &marks,
            ));
        }
        None => s.push_str(&missing(
            "No candidate has been trained yet: ingest data and run `tidegate retrain`.",
        )),
    }
    body.push_str(&section("holdout", "1. Holdout loss per model version", &s));

    // 2. Training curves of the newest versions.
    let mut s = note(
        "Mean training loss per epoch over the mini-batches (solid) and loss on the rows held \
         aside for early stopping (dashed) of the newest model versions; a ring marks the epoch \
         whose weights were kept.",
    );
    let newest: Vec<(String, &crate::model::TrainingSummary)> = manifests
        .iter()
        .rev()
        .take(CURVES_SHOWN)
        .map(|(id, m)| {
            (
                format!("{id} {}", crate::cycle::run_name(m.kind)),
                &m.summary,
            )
        })
        .collect::<Vec<_>>()
        .into_iter()
        .rev()
        .collect();
    match charts::curves(&newest)? {
        Some(svg) => {
            charts += 1;
            s.push_str(&figure(&svg, "training and validation loss per epoch"));
        }
        None => s.push_str(&missing(
            "No model version with training curves in models/: run `tidegate retrain`.",
        )),
    }
    body.push_str(&section("curves", "2. Training curves", &s));

    // 3. Rows stored.
    let mut s = note(
        "Rows in the store after each file arrived. Refused files store nothing and are marked; \
         so are duplicates and batches whose drift report flagged a column.",
    );
    match charts::rows(&t)? {
        Some(svg) => {
            charts += 1;
            s.push_str(&figure(&svg, "rows stored, file by file"));
        }
        None => s.push_str(&missing(
            "No file has arrived yet: run `tidegate ingest FILE`.",
        )),
    }
    let refused: Vec<Vec<String>> = t
        .files
        .iter()
        .filter_map(|f| match &f.what {
            Arrival::Refused {
                problems,
                first_problem,
            } => Some(vec![
                f.file.clone(),
                f.time.clone(),
                problems.to_string(),
                first_problem.clone(),
            ]),
            _ => None,
        })
        .collect();
    if !refused.is_empty() {
        s.push_str("<h3>Refused files</h3>\n");
        s.push_str(&table(
            "refused",
            &["file", "time (UTC)", "problems", "first problem"],
            &refused,
            &[],
        ));
    }
    let aside = seen.aside_rows();
    if !aside.is_empty() {
        s.push_str("<h3>Batches set aside</h3>\n");
        s.push_str(&note(
            "Stored and archived, but read by nothing that trains, judges or measures drift: \
             not in training, the holdout rows, the baselines or the drift reference, nor in the \
             response map and input influence below. The last column names the models that \
             trained on the batch before it was set aside, directly or only through the weights \
             they were warm-started from.",
        ));
        s.push_str(&table(
            "aside",
            &["batch", "file", "why", "models that trained on it"],
            &aside,
            &[],
        ));
    }
    body.push_str(&section("rows", "3. Rows stored", &s));

    // 4 and 5 need the serving model.
    let loaded = match serving {
        None => Err("No model serves yet: run `tidegate retrain` once the data is in.".to_string()),
        Some(id) => Checkpoint::load(
            &model_dir(&state.models(), id),
            &config.schema_fingerprint(),
        )
        .map_err(|e| format!("The serving model {id} cannot be loaded: {e}")),
    };
    // The stored rows, read back once for the response map and the
    // permutation importance.
    let served = match loaded {
        Err(why) => Err(why),
        Ok(cp) => {
            let limits = Limits::of(config);
            let mut vocabs = cp.manifest.vocabularies();
            // Rows set aside are read (their new values keep the codes in
            // step with the store's) but not drawn or scored.
            let (rows, row_notes) = gather::stored_rows(
                state,
                &t.batches(),
                seen.aside(),
                &schema,
                &mut vocabs,
                &limits,
            );
            notes.extend(row_notes);
            Ok((cp, rows, vocabs))
        }
    };
    let mut s = note(
        "The serving model's output over a grid of two number inputs, every other input held at \
         its median (numbers) or most frequent value (categories) among the stored rows; the dots \
         are stored rows. Pick the inputs with --x and --y.",
    );
    match &served {
        Err(why) => s.push_str(&missing(why)),
        Ok((cp, rows, vocabs)) => {
            match scan::pick_axes(&schema, options.x.as_deref(), options.y.as_deref()) {
                Err(why) => s.push_str(&missing(&format!("No response map: {why}."))),
                Ok(axes) => {
                    match scan::response_map(
                    &cp.model,
                    &schema,
                    vocabs,
                    &rows.rows,
                    axes,
                    config.training.predict_backend,
                )? {
                    None => s.push_str(&missing(
                        "No stored row has values in both inputs, so there is no range to scan.",
                    )),
                    Some(map) => {
                        charts += 1;
                        s.push_str(&figure(
                            &charts::response(&map)?,
                            &format!(
                                "{} of {} over {} and {} ({}×{} grid, {} stored rows drawn)",
                                map.value_label,
                                cp.manifest.id,
                                map.x_name,
                                map.y_name,
                                scan::GRID,
                                scan::GRID,
                                map.points.len()
                            ),
                        ));
                        if !map.held.is_empty() {
                            let held: Vec<Vec<String>> = map
                                .held
                                .iter()
                                .map(|(c, v)| vec![c.clone(), v.clone()])
                                .collect();
                            s.push_str("<h3>Other inputs held at</h3>\n");
                            s.push_str(&table("held", &["column", "value"], &held, &[]));
                        }
                    }
                }
                }
            }
        }
    }
    body.push_str(&section("response", "4. Response of the serving model", &s));

    let mut s = String::new();
    match &served {
        Err(why) => s.push_str(&missing(why)),
        Ok((cp, rows, _)) => {
            match scan::importance(
                &cp.model,
                &schema,
                &rows.holdout,
                &rows.holdout_batches,
                config.training.predict_backend,
            ) {
                Err(e) => s.push_str(&missing(&format!(
                    "The serving model {} cannot score the stored holdout rows: {e}",
                    cp.manifest.id
                ))),
                Ok(None) => s.push_str(&missing(
                    "Fewer than two stored holdout rows: there is nothing to shuffle yet.",
                )),
                Ok(Some(out)) => match charts::importance(&out.columns)? {
                    None => s.push_str(&missing("The serving model has no input columns.")),
                    Some(svg) => {
                        charts += 1;
                        s.push_str(&importance_section(&svg, &out, cp.manifest.id));
                    }
                },
            }
        }
    }
    body.push_str(&section("influence", "5. Input influence", &s));

    body.push_str(&section(
        "checks",
        "6. Fresh-data checks and drift",
        &checks(&t),
    ));

    // 7. The audit log, newest first.
    let mut s = note(&format!(
        "Every entry of {} ({} entries), newest first. `tidegate verify` checks the hash chain.",
        state.audit().display(),
        entries.len()
    ));
    let rows: Vec<Vec<String>> = entries.iter().rev().map(|e| e.cells()).collect();
    let attrs: Vec<String> = entries
        .iter()
        .rev()
        .map(|e| format!(" data-seq=\"{}\"", e.seq.0))
        .collect();
    if rows.is_empty() {
        s.push_str(&missing("The audit log is empty."));
    } else {
        s.push_str(&table(
            "log",
            &["#", "time (UTC)", "user", "kind", "what happened"],
            &rows,
            &attrs,
        ));
    }
    body.push_str(&section("log", "7. Audit log", &s));

    if !notes.is_empty() {
        body.push_str("<section id=\"notes\">\n<h2>Left out</h2>\n<ul class=\"notes\">\n");
        for n in &notes {
            body.push_str(&format!("<li>{}</li>\n", escape(n)));
        }
        body.push_str("</ul>\n</section>\n");
    }

    let stored = t.files.last().map_or(0, |f| f.rows_stored);
    let header = format!(
        "<h1>tidegate report</h1>\n<p class=\"facts\">state dir <b>{}</b> · made {} · serving <b>{}</b> · \
         <b>{stored}</b> rows in <b>{}</b> batches · <b>{}</b> model versions · target <b>{}</b> ({})</p>\n",
        escape(&state.root().display().to_string()),
        escape(&now.to_rfc3339_opts(SecondsFormat::Secs, true)),
        escape(&serving.map_or_else(|| "none".to_string(), |m| m.to_string())),
        t.batches().len(),
        manifests.len(),
        escape(&schema.columns[schema.target].name),
        escape(&schema.task.to_string()),
    );
    let nav = [
        ("holdout", "holdout loss"),
        ("curves", "training curves"),
        ("rows", "rows stored"),
        ("response", "response map"),
        ("influence", "input influence"),
        ("checks", "checks and drift"),
        ("log", "audit log"),
    ];
    Ok(Report {
        html: html::page("tidegate report", &header, &nav, &body),
        charts,
        events: entries.len(),
    })
}

/// The permutation-importance chart with what it means beside it, and
/// its numbers in a table.
fn importance_section(svg: &str, out: &importance::Outcome, model: ModelId) -> String {
    let mut s = note(&format!(
        "How much the serving model relies on each input column on the holdout rows: \
         permutation importance (Breiman 2001; Fisher, Rudin & Dominici 2019, \
         \"model reliance\"). {} stored holdout rows from {} batches (a seeded sample of at most \
         {}) are scored as they are, then once more for each column with that column's values \
         shuffled among the rows, {} times with different shuffles; a bar is the mean rise in \
         the model's mean loss (unshuffled: {}).",
        out.rows,
        out.batches,
        importance::MAX_ROWS,
        out.repeats,
        loss(out.base_loss),
    ));
    let caption = format!(
        "permutation importance of the input columns of {model} (bars: mean rise over {} \
         shuffles; whiskers: {:.0}% interval, each batch one cluster)",
        out.repeats,
        importance::LEVEL * 100.0
    );
    let aside = [
        "What it means: how much worse this model does, on these rows, when a column's values \
         no longer match the rest of the row. A category column is shuffled as one column: its \
         value moves, so its whole group of one-hot inputs moves together, however many values \
         it has.",
        "What it does not mean: it is not the causal effect of the column on the target. \
         Correlated columns share credit: shuffling one leaves the other's information in place, \
         so both can look small. It says nothing about columns the model was not given, and a \
         rise near 0 means this model does not use the column here, not that the column holds \
         no information.",
        "Rows of one batch share a day, so a day-level column (weekday, the day's weather) is \
         paired with other days' values when shuffled: that measures reliance on it, not what \
         another day would bring. For the same reason the interval counts each batch as one \
         cluster (Liang & Zeger 1986; Cameron & Miller 2015), so few batches give wide \
         intervals. An interval that covers 0 gives no evidence that this model uses the column.",
    ];
    s.push_str("<div class=\"beside\">\n");
    s.push_str(&figure(svg, &caption));
    s.push_str("<aside>\n");
    for p in aside {
        s.push_str(&format!("<p>{}</p>\n", escape(p)));
    }
    s.push_str("</aside>\n</div>\n");
    let rows: Vec<Vec<String>> = out
        .columns
        .iter()
        .map(|c| {
            vec![
                c.column.clone(),
                format!("{:.4}", c.rise),
                format!("{:.4}", c.repeat_sd),
                c.interval.map_or_else(
                    || "- (one batch)".to_string(),
                    |(lo, hi)| format!("{lo:.4} to {hi:.4}"),
                ),
                c.ratio
                    .map_or_else(|| "-".to_string(), |r| format!("{r:.3}")),
            ]
        })
        .collect();
    s.push_str(&table(
        "importance",
        &[
            "column",
            "mean rise in loss",
            "sd over shuffles",
            &format!("{:.0}% interval", importance::LEVEL * 100.0),
            "shuffled / unshuffled loss",
        ],
        &rows,
        &[],
    ));
    s
}

/// Tables of the fresh-data checks and of drift-flagged batches.
fn checks(t: &Timeline) -> String {
    let mut s = note(
        "Each accepted batch is scored by the serving model before anything trains on it: \
         \"shifted\" means its loss on the batch is significantly above its usual holdout loss \
         (p shift), \"regressed\" that the model it replaced does better on it (p regression). \
         Drift compares each column of a batch with the stored training rows and flags it only \
         when that distance is far above the column's distances in its past batches (a robust z \
         of the log distance over the last batches); the first batches only build that \
         reference. Category values never seen before are listed as new values, not flagged.",
    );
    s.push_str("<h3>Fresh-data checks</h3>\n");
    if t.fresh.is_empty() {
        s.push_str(&missing(
            "No fresh-data check yet: batches are checked once a model serves.",
        ));
    } else {
        let rows: Vec<Vec<String>> = t
            .fresh
            .iter()
            .map(|f| {
                vec![
                    f.batch.to_string(),
                    f.serving.to_string(),
                    f.verdict.clone(),
                    maybe(f.p_shift),
                    maybe(f.p_regression),
                ]
            })
            .collect();
        s.push_str(&table(
            "fresh",
            &[
                "batch",
                "serving model",
                "verdict",
                "p shift",
                "p regression",
            ],
            &rows,
            &[],
        ));
    }
    s.push_str("<h3>Drift flags</h3>\n");
    let drifted: Vec<Vec<String>> = t
        .files
        .iter()
        .filter_map(|f| match &f.what {
            Arrival::Accepted { batch, drifted, .. } if !drifted.is_empty() => {
                Some(vec![batch.to_string(), f.file.clone(), drifted.join(", ")])
            }
            _ => None,
        })
        .collect();
    if drifted.is_empty() {
        s.push_str(&missing("No accepted batch has a drift-flagged column."));
    } else {
        s.push_str(&table(
            "drift",
            &["batch", "file", "flagged columns"],
            &drifted,
            &[],
        ));
    }
    s.push_str("<h3>New values</h3>\n");
    let fresh_values: Vec<Vec<String>> = t
        .files
        .iter()
        .filter_map(|f| match &f.what {
            Arrival::Accepted {
                batch, new_values, ..
            } if !new_values.is_empty() => Some(vec![
                batch.to_string(),
                f.file.clone(),
                new_values.join("; "),
            ]),
            _ => None,
        })
        .collect();
    if fresh_values.is_empty() {
        s.push_str(&missing(
            "No batch after the first brought a category value never seen before.",
        ));
    } else {
        s.push_str(&table(
            "new-values",
            &["batch", "file", "new values"],
            &fresh_values,
            &[],
        ));
    }
    s
}
