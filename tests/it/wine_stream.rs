//! A broken join on a public data set, through the real binary: the
//! red-wine quality rows (Cortez et al. 2009, as shipped in linfa-datasets
//! 0.8.1: 11 number inputs, a 0–10 quality score) arrive as nightly files
//! of 160 rows with `min_holdout_rows = 50`, a cycle after each file from
//! the third whose rows are in use (as a daemon with a small `min_new_rows`
//! runs them). One file carries the next night's inputs with its targets
//! shuffled among its rows; the same night arrives again, joined right, as
//! the following file. 319 rows are kept back and never sent.
//!
//! The same stream without the shuffled file is the comparison. If the
//! batch set aside is truly out of everything (training, holdout, drift
//! reference, baselines, cycle triggers and the fresh-data check), both
//! streams hand every cycle the same rows, so the final serving models are
//! the same model: training is deterministic for a given seed (an
//! invariant in DEVELOPERS.md). The test therefore asks for identical
//! predictions on the kept-back rows, which makes "no worse" hold with a
//! tolerance of 0.
//!
//! `a_broken_join_set_aside_changes_nothing` runs one seed in CI;
//! `broken_join_table` (ignored) prints the table for several seeds with
//! ordinary least squares on the same rows as the reference:
//! `cargo test --release --test it wine_stream::broken_join_table -- --ignored --nocapture`.

use std::fs;

use tidegate::rng::Rng;

use crate::support::{Env, code, stderr, stdout};

const NAMES: [&str; 12] = [
    "fixed_acidity",
    "volatile_acidity",
    "citric_acid",
    "residual_sugar",
    "chlorides",
    "free_sulfur",
    "total_sulfur",
    "density",
    "ph",
    "sulphates",
    "alcohol",
    "quality",
];
const INPUTS: usize = 11;
const NIGHT_ROWS: usize = 160;
const NIGHTS: usize = 8;
const KEPT: usize = 319;

type Row = [f64; 12];

/// Every row of the data set, inputs then the quality score.
fn wine() -> Vec<Row> {
    let ds = linfa_datasets::winequality();
    let (x, y) = (&ds.records, &ds.targets);
    assert_eq!((x.nrows(), x.ncols()), (NIGHTS * NIGHT_ROWS + KEPT, INPUTS));
    (0..x.nrows())
        .map(|r| {
            let mut row = [0.0; 12];
            for (c, v) in row.iter_mut().take(INPUTS).enumerate() {
                *v = x[[r, c]];
            }
            row[INPUTS] = f64::from(y[r] as u32);
            row
        })
        .collect()
}

/// The rows in a seeded order: eight nights and the rows kept back.
fn split(seed: u64) -> (Vec<Vec<Row>>, Vec<Row>) {
    let mut rows = wine();
    Rng::new(seed).shuffle(&mut rows);
    let kept = rows.split_off(NIGHTS * NIGHT_ROWS);
    let nights = rows.chunks(NIGHT_ROWS).map(<[Row]>::to_vec).collect();
    (nights, kept)
}

/// A night whose targets were joined to the wrong rows: the same inputs,
/// the night's own targets shuffled among them.
fn broken_join(night: &[Row], seed: u64) -> Vec<Row> {
    let mut targets: Vec<f64> = night.iter().map(|r| r[INPUTS]).collect();
    Rng::new(seed ^ 0x5eed).shuffle(&mut targets);
    let mut out = night.to_vec();
    for (r, t) in out.iter_mut().zip(targets) {
        r[INPUTS] = t;
    }
    out
}

fn csv(rows: &[Row]) -> String {
    let mut s = NAMES.join(",");
    s.push('\n');
    for r in rows {
        let cells: Vec<String> = r.iter().map(f64::to_string).collect();
        s.push_str(&cells.join(","));
        s.push('\n');
    }
    s
}

fn config(seed: u64, keys: &str) -> String {
    let mut s = String::from("[data]\ntarget = \"quality\"\ntask = \"regression\"\n");
    for n in NAMES {
        s.push_str(&format!(
            "\n[[data.columns]]\nname = \"{n}\"\nkind = \"number\"\n"
        ));
    }
    // Everything else is the default a new user gets, unless `keys`
    // (`table.key=value;…`, for measuring other settings) says otherwise.
    let mut tables: Vec<(&str, String)> = vec![
        ("training", format!("seed = {seed}\n")),
        ("gate", "min_holdout_rows = 50\n".into()),
        ("model", String::new()),
    ];
    for kv in keys.split(';').filter(|k| !k.trim().is_empty()) {
        let (table, rest) = kv.trim().split_once('.').expect("keys as table.key=value");
        let (_, lines) = tables
            .iter_mut()
            .find(|(t, _)| *t == table)
            .unwrap_or_else(|| panic!("{kv}: training, gate or model"));
        lines.push_str(rest);
        lines.push('\n');
    }
    for (table, lines) in tables {
        s.push_str(&format!("\n[{table}]\n{lines}"));
    }
    s
}

/// What one stream left behind.
struct Outcome {
    /// Predictions of the final serving model on the kept-back rows, as
    /// `predict` printed them.
    predictions: Vec<String>,
    mae: f64,
    serving: u64,
    /// Batch id of the shuffled file, when it was sent, and whether it was
    /// set aside at intake.
    shuffled: Option<(u64, bool)>,
    /// Clean files set aside at intake.
    clean_set_aside: usize,
    status_text: String,
    status: serde_json::Value,
    rolled_back: bool,
    fresh_checked: Vec<u64>,
    candidates: usize,
    /// With `Stream::score_each`: after each file, the MAE on the
    /// kept-back rows of the model serving then (`None` before any).
    mae_by_file: Vec<Option<f64>>,
}

/// How a stream runs.
#[derive(Clone, Copy, Default)]
struct Stream<'a> {
    with_broken: bool,
    /// Settings over the defaults, `table.key=value;…`.
    keys: &'a str,
    /// Score the kept-back rows after every file.
    score_each: bool,
}

/// `predict` on the kept-back rows with the serving model: the column of
/// predictions as printed, or `None` when no model serves.
fn predict_kept(env: &Env, kept: &[Row]) -> Option<Vec<String>> {
    let kept_path = env.dir.path().join("kept.csv");
    fs::write(&kept_path, csv(kept)).unwrap();
    let out = env.run(&["predict", "--input", kept_path.to_str().unwrap()]);
    if code(&out) != 0 && env.status_json()["summary"]["serving"].is_null() {
        return None;
    }
    assert_eq!(code(&out), 0, "{}", stderr(&out));
    let text = stdout(&out);
    let mut lines = text.lines();
    let header: Vec<&str> = lines.next().unwrap().split(',').collect();
    let col = header
        .iter()
        .position(|h| *h == "predicted_quality")
        .expect("a predicted_quality column");
    let predictions: Vec<String> = lines
        .map(|l| l.split(',').nth(col).unwrap().to_string())
        .collect();
    assert_eq!(predictions.len(), kept.len());
    Some(predictions)
}

fn mae_of(predictions: &[String], kept: &[Row]) -> f64 {
    predictions
        .iter()
        .zip(kept)
        .map(|(p, r)| (p.parse::<f64>().unwrap() - r[INPUTS]).abs())
        .sum::<f64>()
        / kept.len() as f64
}

/// Sends the stream (nights 1–7, the broken join of night 8 when
/// `with_broken`, night 8) with a cycle after each file in use from the
/// third, then scores the kept-back rows with `predict`.
fn run_stream(seed: u64, how: Stream<'_>) -> Outcome {
    let with_broken = how.with_broken;
    let (nights, kept) = split(seed);
    let env = Env::with_config_text(&config(seed, how.keys));
    let mut mae_by_file = Vec::new();
    let mut files: Vec<(String, Vec<Row>)> = (0..NIGHTS - 1)
        .map(|n| (format!("night-{:02}.csv", n + 1), nights[n].clone()))
        .collect();
    if with_broken {
        files.push((
            "night-08-joined-wrong.csv".into(),
            broken_join(&nights[NIGHTS - 1], seed),
        ));
    }
    files.push(("night-08.csv".into(), nights[NIGHTS - 1].clone()));
    let mut shuffled = None;
    let mut clean_set_aside = 0;
    for (i, (name, rows)) in files.iter().enumerate() {
        let path = env.dir.path().join(name);
        fs::write(&path, csv(rows)).unwrap();
        let out = env.run(&["--json", "ingest", path.to_str().unwrap()]);
        assert_eq!(code(&out), 0, "{name}: {}", stderr(&out));
        let r: serde_json::Value = serde_json::from_str(stdout(&out).trim()).unwrap();
        assert_eq!(r["status"], "accepted", "{name}: {r}");
        let aside = r["set_aside"]["automatic"] == true;
        if aside {
            // Set aside at intake: never scored by the fresh-data check.
            assert!(
                r.get("fresh_check").is_none(),
                "seed {seed}: {name} was set aside and fresh-checked: {r}"
            );
        }
        if name.contains("joined-wrong") {
            shuffled = Some((r["batch"].as_u64().unwrap(), aside));
        } else if aside {
            clean_set_aside += 1;
        }
        // A cycle after each file from the third, as a daemon with
        // `min_new_rows` ≤ 160 starts one; rows set aside do not count
        // towards that trigger (`daemon::event_loop::untrained_rows`).
        if i >= 2 && !aside {
            let out = env.run(&["retrain"]);
            assert_eq!(code(&out), 0, "{name}: {}", stderr(&out));
        }
        if how.score_each {
            mae_by_file.push(predict_kept(&env, &kept).map(|p| mae_of(&p, &kept)));
        }
    }

    let predictions =
        predict_kept(&env, &kept).unwrap_or_else(|| panic!("seed {seed}: no model serves"));
    assert_eq!(predictions.len(), KEPT);
    let mae = mae_of(&predictions, &kept);

    if std::env::var_os("TIDEGATE_WINE_LOG").is_some() {
        println!("seed {seed}:\n{}", stdout(&env.run(&["log"])));
    }
    let status = env.status_json();
    let serving = status["summary"]["serving"]
        .as_u64()
        .unwrap_or_else(|| panic!("seed {seed}: no model serves: {status}"));
    let rolled_back = !env.log_json(&["--kind", "rolled-back"]).is_empty();
    let fresh_checked = env
        .log_json(&["--kind", "fresh-checked"])
        .iter()
        .map(|e| e["check"]["batch"].as_u64().unwrap())
        .collect();
    let candidates = env.log_json(&["--kind", "candidate-trained"]).len();
    let status_text = stdout(&env.run(&["status"]));
    let v = env.run(&["verify"]);
    assert_eq!(code(&v), 0, "{}{}", stdout(&v), stderr(&v));
    Outcome {
        predictions,
        mae,
        serving,
        shuffled,
        clean_set_aside,
        status_text,
        status,
        rolled_back,
        fresh_checked,
        candidates,
        mae_by_file,
    }
}

/// Ordinary least squares fitted on every row the stream delivered (the
/// eight clean nights) and scored on the kept-back rows: the reference.
fn ols_mae(seed: u64) -> f64 {
    let (nights, kept) = split(seed);
    let fit: Vec<&Row> = nights.iter().flatten().collect();
    let x: Vec<f64> = fit.iter().flat_map(|r| r[..INPUTS].to_vec()).collect();
    let y: Vec<f64> = fit.iter().map(|r| r[INPUTS]).collect();
    let b = tidegate::train::least_squares(&x, &y, INPUTS, 0.0).expect("full rank");
    kept.iter()
        .map(|r| {
            let p = b[0] + (0..INPUTS).map(|c| b[c + 1] * r[c]).sum::<f64>();
            (p - r[INPUTS]).abs()
        })
        .sum::<f64>()
        / kept.len() as f64
}

/// The 64-64 reference: a network of the default shape trained once, cold,
/// on every delivered row with the project's own training code, with the
/// settings of a common stand-alone recipe (Adam at 1e-3, mini-batches of
/// 200 whatever the rows, early stopping on a tenth of the rows with patience 10, at most 200
/// epochs; common practice, no source), so that the reference does not move
/// when tidegate's defaults do. Mean MAE on the kept-back rows over five
/// initial seeds.
fn reference_mae(seed: u64) -> f64 {
    use tidegate::config::{ColumnKind, ModelConfig, Task, TrainingConfig};
    use tidegate::model::Predictions;
    use tidegate::schema::{Column, ColumnStats, FeatureSpec, RowMatrix, Schema, Vocabularies};
    let (nights, kept) = split(seed);
    let schema = Schema {
        columns: NAMES
            .iter()
            .map(|n| Column {
                name: (*n).into(),
                kind: ColumnKind::Number,
                min: None,
                max: None,
                required: true,
            })
            .collect(),
        target: INPUTS,
        task: Task::Regression,
    };
    let matrix = |rows: &[&Row]| {
        let mut m = RowMatrix::new(NAMES.len());
        for r in rows {
            let cells: Vec<u32> = r
                .iter()
                .map(|v| tidegate::schema::number_cell(Some(*v as f32)))
                .collect();
            m.push_row(&cells);
        }
        m
    };
    let fit = matrix(&nights.iter().flatten().collect::<Vec<_>>());
    let kept_m = matrix(&kept.iter().collect::<Vec<_>>());
    let spec = FeatureSpec::new(
        &schema,
        &ColumnStats::of_rows(&schema, &fit),
        &Vocabularies::new(),
    );
    let net = ModelConfig {
        hidden: vec![64, 64],
        ..ModelConfig::default()
    };
    let maes: Vec<f64> = (0..5)
        .map(|s| {
            let training = TrainingConfig {
                batch_size: 200,
                min_batches_per_epoch: 1,
                learning_rate: 1e-3,
                cold_epochs: 200,
                patience: 10,
                validation_fraction: 0.1,
                seed: seed * 100 + s,
                ..TrainingConfig::default()
            };
            let model = tidegate::train::train_cold(
                &spec,
                &net,
                &training,
                &fit,
                tidegate::train::Control::default(),
            )
            .expect("trains")
            .model;
            let Predictions::Regression { values } = model
                .predict(&kept_m, training.predict_backend)
                .expect("predicts")
            else {
                panic!("regression")
            };
            values
                .iter()
                .zip(&kept)
                .map(|(p, r)| (f64::from(*p) - r[INPUTS]).abs())
                .sum::<f64>()
                / kept.len() as f64
        })
        .collect();
    maes.iter().sum::<f64>() / maes.len() as f64
}

/// Predicting the mean quality of the delivered rows for every kept-back
/// row: what a model that learnt nothing from the inputs scores.
fn constant_mae(seed: u64) -> f64 {
    let (nights, kept) = split(seed);
    let ys: Vec<f64> = nights.iter().flatten().map(|r| r[INPUTS]).collect();
    let mean = ys.iter().sum::<f64>() / ys.len() as f64;
    kept.iter().map(|r| (mean - r[INPUTS]).abs()).sum::<f64>() / kept.len() as f64
}

/// One seed's figures.
struct Figures {
    caught: bool,
    /// A rollback in the stream with the broken join / without it.
    rolled_back: (bool, bool),
    clean_set_aside: usize,
    mae_with: f64,
    mae_without: f64,
    /// Kept-back predictions that differ between the two streams.
    differ: usize,
    /// The final serving model (with the broken join) and the candidates
    /// trained in that stream.
    serving: u64,
    candidates: usize,
}

/// Both streams of one seed. When the broken join is caught, the
/// properties the issue names are asserted here: it is listed in `status`
/// as suspect, it is never fresh-checked, nothing is rolled back, and the
/// final serving model is the one the stream without it ends with.
fn compare(seed: u64) -> Figures {
    let with = run_stream(
        seed,
        Stream {
            with_broken: true,
            ..Stream::default()
        },
    );
    let without = run_stream(seed, Stream::default());
    let (b, caught) = with.shuffled.expect("the broken join was sent");
    let differ = with
        .predictions
        .iter()
        .zip(&without.predictions)
        .filter(|(a, b)| a != b)
        .count();
    if caught {
        assert!(
            with.status["summary"]["set_aside"][b.to_string()]
                .as_str()
                .is_some_and(|why| why.starts_with("suspect")),
            "seed {seed}: {}",
            with.status
        );
        assert!(
            with.status_text
                .contains(&format!("set aside   b{b:06} (stored, not used): suspect")),
            "seed {seed}: {}",
            with.status_text
        );
        assert!(!with.fresh_checked.contains(&b), "seed {seed}");
        assert!(
            !with.rolled_back || without.rolled_back,
            "seed {seed}: a rollback only with the broken join"
        );
        // The extra file started no cycle of its own, and every cycle had
        // the same rows: the same final model, digit for digit.
        assert_eq!(with.candidates, without.candidates, "seed {seed}");
        assert_eq!(with.serving, without.serving, "seed {seed}");
        assert_eq!(
            differ, 0,
            "seed {seed}: {differ} of {KEPT} kept-back predictions differ (MAE {} with the \
             broken join, {} without): rows set aside reached a cycle",
            with.mae, without.mae
        );
    }
    Figures {
        caught,
        rolled_back: (with.rolled_back, without.rolled_back),
        clean_set_aside: with.clean_set_aside + without.clean_set_aside,
        mae_with: with.mae,
        mae_without: without.mae,
        differ,
        serving: with.serving,
        candidates: with.candidates,
    }
}

#[test]
fn a_broken_join_set_aside_changes_nothing() {
    // Seed 1 is one where the check catches the broken join (the table
    // below gives the catch rate over seeds; a miss there is a measured
    // limit of the check's power on 160 rows of a target the inputs explain
    // about a third of, not a failure of this test's subject). What must
    // hold once it is caught is asserted in `compare`.
    let f = compare(1);
    assert!(f.caught, "seed 1: the broken join was not set aside");
    assert_eq!(f.clean_set_aside, 0);
    assert_eq!(f.rolled_back, (false, false));
    let (ols, constant) = (ols_mae(1), constant_mae(1));
    eprintln!(
        "seed 1: MAE with the broken join {:.4}, without {:.4}; OLS {ols:.4}, the delivered \
         rows' mean {constant:.4}",
        f.mae_with, f.mae_without
    );
    // The final model learnt from the inputs at all.
    assert!(
        f.mae_with < constant,
        "MAE {} against a constant's {constant}",
        f.mae_with
    );
}

#[test]
#[ignore = "about 50 s: cargo test --release --test it wine_stream::broken_join_table -- --ignored --nocapture"]
fn broken_join_table() {
    println!(
        "| seed | set aside | rollback (with / without) | serving at the end (of candidates) | \
         MAE with broken join | MAE without | predictions differing | OLS on the same rows | \
         constant (mean) |"
    );
    println!("|---|---|---|---|---|---|---|---|---|");
    let seeds = 1..=20;
    let (mut caught, mut false_aside) = (0, 0);
    for seed in seeds.clone() {
        let f = compare(seed);
        caught += usize::from(f.caught);
        false_aside += f.clean_set_aside;
        println!(
            "| {seed} | {} | {} / {} | m{:06} (of {}) | {:.4} | {:.4} | {} | {:.4} | {:.4} |",
            if f.caught { "yes" } else { "no" },
            f.rolled_back.0,
            f.rolled_back.1,
            f.serving,
            f.candidates,
            f.mae_with,
            f.mae_without,
            f.differ,
            ols_mae(seed),
            constant_mae(seed)
        );
    }
    let n = seeds.count();
    println!(
        "broken join set aside in {caught} of {n} streams; clean files set aside: {false_aside} \
         of {} (8 per stream, both streams)",
        n * 8 * 2
    );
}

#[test]
#[ignore = "about a minute: cargo test --release --test it wine_stream::serving_against_references -- --ignored --nocapture"]
fn serving_against_references() {
    // The done-when: the final serving model of the clean stream
    // against OLS and the 64-64 reference, both fitted once on all eight
    // nights. `TIDEGATE_WINE_KEYS` (`table.key=value;…`) measures other
    // settings through the same binary; `TIDEGATE_WINE_SEEDS` sets the count.
    let keys = std::env::var("TIDEGATE_WINE_KEYS").unwrap_or_default();
    let seeds: u64 = std::env::var("TIDEGATE_WINE_SEEDS")
        .ok()
        .and_then(|v| v.parse().ok())
        .unwrap_or(10);
    if !keys.is_empty() {
        println!("settings over the defaults: {keys}");
    }
    println!(
        "| seed | serving MAE | OLS MAE | 64-64 reference MAE | serving / OLS | serving / reference | \
         files until serving ≤ OLS (and stays) | MAE of the serving model after files 3–8 |"
    );
    println!("|---|---|---|---|---|---|---|---|");
    let mut sums = [0.0; 3];
    let (mut beat_ols, mut beat_ref) = (0, 0);
    for seed in 1..=seeds {
        let out = run_stream(
            seed,
            Stream {
                keys: &keys,
                score_each: true,
                ..Stream::default()
            },
        );
        let (ols, reference) = (ols_mae(seed), reference_mae(seed));
        let stays = out
            .mae_by_file
            .iter()
            .rposition(|m| m.is_none_or(|m| m > ols))
            .map_or(1, |last_above| last_above + 2);
        let stays = if stays > out.mae_by_file.len() {
            "never".to_string()
        } else {
            stays.to_string()
        };
        let by_file: Vec<String> = out.mae_by_file[2..]
            .iter()
            .map(|m| m.map_or("-".into(), |m| format!("{m:.3}")))
            .collect();
        println!(
            "| {seed} | {:.4} | {ols:.4} | {reference:.4} | {:.3} | {:.3} | {stays} | {} |",
            out.mae,
            out.mae / ols,
            out.mae / reference,
            by_file.join(" ")
        );
        for (acc, v) in sums.iter_mut().zip([out.mae, ols, reference]) {
            *acc += v / seeds as f64;
        }
        beat_ols += usize::from(out.mae < ols);
        beat_ref += usize::from(out.mae <= reference);
    }
    println!(
        "| mean | {:.4} | {:.4} | {:.4} | {:.3} | {:.3} | serving < OLS in {beat_ols} of {seeds}, \
         ≤ reference in {beat_ref} of {seeds} | |",
        sums[0],
        sums[1],
        sums[2],
        sums[0] / sums[1],
        sums[0] / sums[2]
    );
}
