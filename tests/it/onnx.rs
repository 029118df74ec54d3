//! The ONNX export against an independent runtime: ONNX Runtime (Python
//! package, pinned in .ci/run) scores the exported file through
//! `tests/onnx/ort_score.py`, and every row must match `tidegate predict`
//! on the same file: regression values and class probabilities within
//! 1e-5 relative, class labels identical. Covered: the first model on the
//! demo rows (with missing values and unseen categories), a warm model
//! widened by new category values, a model with refreshed scaling, and a
//! classification model. Then the export that follows the gate: promotion
//! and rollback each replace the file and log its hash, `verify` checks it,
//! and the next owner repairs a damaged one.
//!
//! Without onnxruntime the comparisons are skipped with a note, except
//! under CI (`CI=true`), where a missing runtime fails the test.

use std::fs;
use std::path::{Path, PathBuf};
use std::process::Command;

use crate::support::{Env, code, repo, stderr, stdout};

fn night(n: &str) -> PathBuf {
    repo(&format!("demo-data/night-{n}.csv"))
}

/// Whether onnxruntime and numpy import; under CI their absence fails.
fn runtime_available() -> bool {
    let ok = Command::new("python3")
        .args(["-c", "import onnxruntime, numpy"])
        .output()
        .is_ok_and(|o| o.status.success());
    if !ok {
        assert!(
            std::env::var("CI").as_deref() != Ok("true"),
            "CI=true but python3 cannot import onnxruntime and numpy; .ci/run installs them"
        );
        eprintln!(
            "note: onnxruntime is not installed (pip install onnxruntime numpy); ONNX comparison skipped"
        );
    }
    ok
}

/// ONNX Runtime's outputs for `csv` through `model`.
fn ort_score(model: &Path, csv: &Path) -> serde_json::Value {
    let out = Command::new("python3")
        .arg(repo("tests/onnx/ort_score.py"))
        .arg(model)
        .arg(csv)
        .output()
        .unwrap();
    assert!(out.status.success(), "ort_score.py: {}", stderr(&out));
    serde_json::from_str(&stdout(&out)).unwrap()
}

/// `tidegate predict --format jsonl` rows.
fn predict(env: &Env, model: &str, csv: &Path) -> Vec<serde_json::Value> {
    let out = env.run(&[
        "predict",
        "--model",
        model,
        "--format",
        "jsonl",
        "--input",
        csv.to_str().unwrap(),
    ]);
    assert_eq!(code(&out), 0, "{}", stderr(&out));
    stdout(&out)
        .lines()
        .map(|l| serde_json::from_str(l).unwrap())
        .collect()
}

fn export(env: &Env, model: &str, out: &Path) -> serde_json::Value {
    let o = env.run(&[
        "--json",
        "onnx",
        "--model",
        model,
        "--output",
        out.to_str().unwrap(),
    ]);
    assert_eq!(code(&o), 0, "{}", stderr(&o));
    let manifest: serde_json::Value = serde_json::from_str(stdout(&o).trim()).unwrap();
    let bytes = fs::read(out).unwrap();
    assert_eq!(
        manifest["onnx_blake3"],
        blake3::hash(&bytes).to_hex().to_string()
    );
    let beside: serde_json::Value =
        serde_json::from_slice(&fs::read(format!("{}.json", out.display())).unwrap()).unwrap();
    assert_eq!(beside["onnx_blake3"], manifest["onnx_blake3"]);
    assert_eq!(beside["model"], manifest["model"]);
    assert_eq!(manifest["opset"], 17);
    manifest
}

/// Largest relative difference; panics past `rel` (plus `abs`, the
/// rounding of a value printed with fixed decimals).
fn compare(what: &str, ours: &[f64], theirs: &[f64], rel: f64, abs: f64) -> f64 {
    assert_eq!(ours.len(), theirs.len(), "{what}: row counts");
    assert!(!ours.is_empty(), "{what}: no rows");
    let mut worst = 0.0f64;
    let mut worst_abs = 0.0f64;
    for (i, (a, b)) in ours.iter().zip(theirs).enumerate() {
        let d = (a - b).abs();
        worst_abs = worst_abs.max(d);
        assert!(
            d <= rel * a.abs().max(b.abs()) + abs,
            "{what}: row {i}: predict {a}, ONNX Runtime {b}"
        );
        if a.abs() > 0.0 {
            worst = worst.max(d / a.abs());
        }
    }
    eprintln!(
        "{what}: {} values, largest relative difference {worst:.2e}, absolute {worst_abs:.2e}",
        ours.len()
    );
    worst
}

/// Regression: `predict` against ONNX Runtime on every row of `csv`.
fn regression_matches(env: &Env, model: &str, csv: &Path, what: &str) {
    let file = env.dir.path().join(format!("{model}.onnx"));
    let manifest = export(env, model, &file);
    assert_eq!(
        manifest["model"].as_u64(),
        model.trim_start_matches('m').parse().ok()
    );
    let ours: Vec<f64> = predict(env, model, csv)
        .iter()
        .map(|r| r["predicted_loaves_sold"].as_f64().unwrap())
        .collect();
    let theirs = ort_score(&file, csv);
    let theirs: Vec<f64> = theirs["predicted_loaves_sold"]
        .as_array()
        .unwrap()
        .iter()
        .map(|v| v.as_f64().unwrap_or(f64::NAN))
        .collect();
    // The task's tolerance: 1e-5 relative; both compute in f32 with the
    // same operations, so only the matrix products' summation order differs.
    compare(what, &ours, &theirs, 1e-5, 0.0);
}

#[test]
fn regression_exports_match_predict_under_onnx_runtime() {
    if !runtime_available() {
        return;
    }
    let env = Env::new(&repo("demo-data/tidegate.toml"));
    let out = env.ingest(&[night("01"), night("02"), night("03"), night("04")]);
    assert_eq!(code(&out), 0, "{}", stderr(&out));
    let out = env.run(&["retrain"]);
    assert_eq!(code(&out), 0, "{}", stderr(&out));
    // Night 1 has empty prev_day_sold fields (missing values); night 6
    // brings a weekday the first model never saw (scored as unknown).
    regression_matches(&env, "m000001", &night("01"), "first model, night 1");
    regression_matches(&env, "m000001", &night("06"), "first model, night 6");

    // A warm candidate widened by the values nights 6 and 7 brought.
    let out = env.ingest(&[night("06"), night("07")]);
    assert_eq!(code(&out), 0, "{}", stderr(&out));
    let out = env.run(&["retrain"]);
    assert_eq!(code(&out), 0, "{}", stderr(&out));
    let trained = env.log_json(&["--kind", "candidate-trained"]);
    let last = trained.last().unwrap();
    assert_eq!(last["model"], 2);
    assert!(
        last["widened"]["shop"].as_u64() == Some(1),
        "the warm model was widened: {last}"
    );
    regression_matches(&env, "m000002", &night("07"), "widened model, night 7");

    // A model with refreshed scaling: the first model's number columns
    // re-standardised (folded into its first layer), saved as m000099.
    let config = tidegate::config::Config::load(&repo("demo-data/tidegate.toml")).unwrap();
    let fp = config.schema_fingerprint();
    let models = env.state().join("models");
    let cp = tidegate::model::Checkpoint::load(&models.join("m000001"), &fp).unwrap();
    let mut stats = tidegate::schema::ColumnStats::default();
    for enc in &cp.model.spec().inputs {
        if let tidegate::schema::InputEncoding::Number { column, mean, std } = *enc {
            let (mean, sd) = (f64::from(mean) + 3.0, f64::from(std) * 1.8);
            stats.numbers.insert(
                column,
                tidegate::schema::RunningStats {
                    count: 1000,
                    mean,
                    m2: sd * sd * 999.0,
                    min: mean - 3.0 * sd,
                    max: mean + 3.0 * sd,
                },
            );
        }
    }
    let (rescaled, columns) = cp.model.rescaled(&stats, 0.01).unwrap();
    assert_eq!(
        columns.len(),
        3,
        "temp_c, rain_mm and prev_day_sold refreshed"
    );
    assert_ne!(rescaled.spec(), cp.model.spec());
    let vocabs = cp.manifest.vocabularies();
    rescaled
        .save(
            &models,
            &cp.manifest.summary,
            &tidegate::model::CheckpointMeta {
                id: tidegate::ids::ModelId(99),
                parent: Some(tidegate::ids::ModelId(1)),
                created_at: chrono::Utc::now(),
                schema_fingerprint: &fp,
                vocabularies: &vocabs,
            },
        )
        .unwrap();
    regression_matches(&env, "m000099", &night("04"), "refreshed scaling, night 4");
}

/// Demand level of a demo row: the classification target of the set below.
fn demand(loaves: f64) -> &'static str {
    if loaves < 30.0 {
        "low"
    } else if loaves < 60.0 {
        "usual"
    } else {
        "busy"
    }
}

/// A classification set from the demo nights: the same inputs, and the
/// demand level in place of the loaves sold.
fn demand_file(src: &Path, dest: &Path) {
    let mut reader = csv::Reader::from_path(src).unwrap();
    let mut writer = csv::Writer::from_path(dest).unwrap();
    let header = reader.headers().unwrap().clone();
    let last = header.len() - 1;
    assert_eq!(&header[last], "loaves_sold");
    let mut names: Vec<&str> = header.iter().take(last).collect();
    names.push("demand");
    writer.write_record(&names).unwrap();
    for rec in reader.records() {
        let rec = rec.unwrap();
        let mut fields: Vec<String> = rec.iter().take(last).map(str::to_string).collect();
        fields.push(demand(rec[last].parse().unwrap()).to_string());
        writer.write_record(&fields).unwrap();
    }
    writer.flush().unwrap();
}

#[test]
fn classification_export_matches_predict_under_onnx_runtime() {
    if !runtime_available() {
        return;
    }
    for activation in ["tanh", "sigmoid"] {
        classification_matches(activation);
    }
}

/// A classification model with `activation` between its layers, trained
/// on four demo nights, scored on night 6 by `predict` and ONNX Runtime.
fn classification_matches(activation: &str) {
    let dir = tempfile::tempdir().unwrap();
    let demo = fs::read_to_string(repo("demo-data/tidegate.toml")).unwrap();
    let config = demo
        .replace("target = \"loaves_sold\"", "target = \"demand\"")
        .replace("task = \"regression\"", "task = \"classification\"")
        .replace(
            "name = \"loaves_sold\"\nkind = \"number\"\nmin = 0\nmax = 20000",
            "name = \"demand\"\nkind = \"category\"",
        )
        .replace("hidden = [64, 64]", "hidden = [24, 12]")
        .replace(
            "activation = \"relu\"",
            &format!("activation = \"{activation}\""),
        )
        .replace("cold_epochs = 100", "cold_epochs = 60")
        .replace("learning_rate = 0.001", "learning_rate = 0.01");
    assert!(config.contains("name = \"demand\""), "config rewritten");
    let config_path = dir.path().join("demand.toml");
    fs::write(&config_path, &config).unwrap();
    let env = Env::new(&config_path);
    let files: Vec<PathBuf> = ["01", "02", "03", "04"]
        .iter()
        .map(|n| {
            let p = dir.path().join(format!("demand-{n}.csv"));
            demand_file(&night(n), &p);
            p
        })
        .collect();
    let out = env.ingest(&files);
    assert_eq!(code(&out), 0, "{}", stderr(&out));
    let out = env.run(&["retrain"]);
    assert_eq!(code(&out), 0, "{}", stderr(&out));

    let scored = dir.path().join("demand-06.csv");
    demand_file(&night("06"), &scored);
    let file = dir.path().join("demand.onnx");
    let manifest = export(&env, "m000001", &file);
    assert_eq!(manifest["task"], "classification");
    let ours = predict(&env, "m000001", &scored);
    let theirs = ort_score(&file, &scored);
    let labels = theirs["predicted_demand"].as_array().unwrap();
    let probs = theirs["probabilities_demand"].as_array().unwrap();
    assert_eq!(labels.len(), ours.len());
    // Output k is class code k: the target's values in order of first appearance.
    let order = manifest_labels(&env);
    assert_eq!(manifest["outputs"][1]["shape"][1], order.len().to_string());
    let mut printed = Vec::new();
    let mut theirs_p = Vec::new();
    let mut seen = std::collections::BTreeSet::new();
    for (i, row) in ours.iter().enumerate() {
        let label = labels[i].as_str().unwrap();
        assert_eq!(
            row["predicted_demand"].as_str().unwrap(),
            label,
            "row {i}: class labels differ"
        );
        seen.insert(label.to_string());
        let p = probs[i].as_array().unwrap();
        assert_eq!(p.len(), order.len());
        let sum: f64 = p.iter().map(|v| v.as_f64().unwrap_or(f64::NAN)).sum();
        // Softmax outputs sum to 1 (common practice, no source).
        assert!(
            (sum - 1.0).abs() < 1e-5,
            "row {i}: probabilities sum to {sum}"
        );
        for (k, class) in order.iter().enumerate() {
            printed.push(row[format!("p_{class}")].as_f64().unwrap());
            theirs_p.push(p[k].as_f64().unwrap_or(f64::NAN));
        }
    }
    assert!(seen.len() >= 2, "the model predicts more than one class");
    // `predict` prints probabilities with six decimals: 5e-7 absolute on top
    // of the 1e-5 relative tolerance.
    compare(
        &format!("classification ({activation}), night 6, as printed"),
        &printed,
        &theirs_p,
        1e-5,
        5e-7,
    );
    // The same model through the library, which `predict` calls, at full
    // precision: 1e-5 relative alone.
    let parsed = tidegate::config::Config::parse(&config, &config_path).unwrap();
    let cp = tidegate::model::Checkpoint::load(
        &env.state().join("models/m000001"),
        &parsed.schema_fingerprint(),
    )
    .unwrap();
    let rows = tidegate::ingest::parse_for_scoring(
        &fs::read(&scored).unwrap(),
        &tidegate::schema::Schema::from_config(&parsed),
        &cp.manifest.vocabularies(),
        &tidegate::ingest::Limits {
            max_file_bytes: parsed.data.max_file_bytes,
            max_field_bytes: parsed.data.max_field_bytes,
            holdout_fraction: 0.2,
        },
    )
    .unwrap()
    .rows;
    let tidegate::model::Predictions::Classification { probabilities, .. } = cp
        .model
        .predict(&rows, parsed.training.predict_backend)
        .unwrap()
    else {
        panic!("a classification model predicts classes");
    };
    let exact: Vec<f64> = probabilities.iter().map(|&p| f64::from(p)).collect();
    compare(
        &format!("classification ({activation}), night 6, full precision"),
        &exact,
        &theirs_p,
        1e-5,
        0.0,
    );
}

/// The class labels in output order (the target's values in code order).
fn manifest_labels(env: &Env) -> Vec<String> {
    let m: serde_json::Value = serde_json::from_slice(
        &fs::read(env.state().join("models/m000001/manifest.json")).unwrap(),
    )
    .unwrap();
    let target = m["features"]["target"].as_u64().unwrap().to_string();
    m["vocabularies"][target]
        .as_array()
        .unwrap()
        .iter()
        .map(|v| v.as_str().unwrap().to_string())
        .collect()
}

fn kinds(env: &Env) -> Vec<String> {
    env.log_json(&[])
        .iter()
        .map(|e| e["kind"].as_str().unwrap().to_string())
        .collect()
}

/// The export file's model (from its manifest) and the file's blake3.
fn exported(env: &Env) -> (u64, String) {
    let file = env.state().join("export/model.onnx");
    let manifest: serde_json::Value =
        serde_json::from_slice(&fs::read(env.state().join("export/model.onnx.json")).unwrap())
            .unwrap();
    let hash = blake3::hash(&fs::read(&file).unwrap()).to_hex().to_string();
    assert_eq!(manifest["onnx_blake3"], hash, "manifest and file agree");
    (manifest["model"].as_u64().unwrap(), hash)
}

fn serving(env: &Env) -> u64 {
    env.status_json()["summary"]["serving"].as_u64().unwrap()
}

/// The last entry is `model-exported` for the serving model with the
/// file's hash, right after the entry of kind `cause`.
fn assert_followed(env: &Env, cause: &str) {
    let log = env.log_json(&[]);
    let n = log.len();
    assert_eq!(log[n - 2]["kind"], cause, "{:?}", kinds(env));
    let last = &log[n - 1];
    assert_eq!(last["kind"], "model-exported");
    let (model, hash) = exported(env);
    assert_eq!(model, serving(env));
    assert_eq!(last["model"].as_u64(), Some(model));
    assert_eq!(last["onnx_hash"].as_str(), Some(hash.as_str()));
    let out = env.run(&["verify"]);
    assert_eq!(code(&out), 0, "{}{}", stdout(&out), stderr(&out));
}

#[test]
fn the_configured_export_follows_promotions_and_rollbacks() {
    let dir = tempfile::tempdir().unwrap();
    let config_path = export_config(dir.path());
    let env = Env::new(&config_path);
    let out = env.ingest(&[night("01"), night("02"), night("03"), night("04")]);
    assert_eq!(code(&out), 0, "{}", stderr(&out));
    assert!(!env.state().join("export").exists(), "nothing serves yet");
    let out = env.run(&["retrain"]);
    assert_eq!(code(&out), 0, "{}", stderr(&out));
    assert_followed(&env, "promoted");
    assert_eq!(serving(&env), 1);

    let out = env.ingest(&[night("06"), night("07")]);
    assert_eq!(code(&out), 0, "{}", stderr(&out));
    let out = env.run(&["retrain"]);
    assert_eq!(code(&out), 0, "{}", stderr(&out));
    // Whatever the gate decided, a rollback moves the pointer: back to the
    // first model, or forward to the kept candidate.
    let to = if serving(&env) == 2 {
        assert_followed(&env, "promoted");
        "m000001"
    } else {
        "m000002"
    };
    let out = env.run(&["rollback", "--to", to, "--reason", "export test"]);
    assert_eq!(code(&out), 0, "{}", stderr(&out));
    assert_followed(&env, "rolled-back");
    let exports = kinds(&env)
        .iter()
        .filter(|k| *k == "model-exported")
        .count();

    // A damaged export: verify says so; the next owner writes it again.
    let file = env.state().join("export/model.onnx");
    fs::write(&file, b"not a model").unwrap();
    let out = env.run(&["verify"]);
    assert_eq!(code(&out), 1, "{}", stdout(&out));
    assert!(
        stdout(&out).contains("export"),
        "verify names the export: {}",
        stdout(&out)
    );
    // A dry run opens the state dir as owner and records nothing of its own.
    let out = env.run(&["retrain", "--dry-run"]);
    assert_eq!(code(&out), 0, "{}", stderr(&out));
    let after = kinds(&env);
    assert_eq!(after.last().map(String::as_str), Some("model-exported"));
    assert_eq!(
        after.iter().filter(|k| *k == "model-exported").count(),
        exports + 1
    );
    let (model, _) = exported(&env);
    assert_eq!(model, serving(&env));
    let out = env.run(&["verify"]);
    assert_eq!(code(&out), 0, "{}{}", stdout(&out), stderr(&out));
}

/// The demo config with `[export] path` on, written into `dir`.
fn export_config(dir: &Path) -> PathBuf {
    let config = fs::read_to_string(repo("demo-data/tidegate.toml"))
        .unwrap()
        .replace(
            "# path = \"export/model.onnx\"",
            "path = \"export/model.onnx\"",
        );
    let path = dir.join("tidegate.toml");
    fs::write(&path, config).unwrap();
    path
}

#[test]
fn a_crash_or_full_disk_before_the_export_is_repaired_at_the_next_start() {
    for action in ["abort", "enospc"] {
        let dir = tempfile::tempdir().unwrap();
        let env = Env::new(&export_config(dir.path()));
        let out = env.ingest(&[night("01"), night("02"), night("03")]);
        assert_eq!(code(&out), 0, "{}", stderr(&out));
        let out = env
            .command()
            .env(
                "TIDEGATE_FAILPOINTS",
                format!("export:before-write={action}"),
            )
            .arg("retrain")
            .output()
            .unwrap();
        assert_ne!(code(&out), 0, "{action}");
        if action == "enospc" {
            assert!(
                stderr(&out).contains("model.onnx"),
                "the error names the file: {}",
                stderr(&out)
            );
        }
        // The promotion committed before the export: it stands, and the
        // export is missing, which verify reports.
        let file = env.state().join("export/model.onnx");
        assert!(!file.exists(), "{action}");
        let out = env.run(&["verify"]);
        assert_eq!(code(&out), 1, "{action}: {}", stdout(&out));
        assert!(stdout(&out).contains("export"), "{}", stdout(&out));
        // The next owner writes it and logs it.
        let out = env.run(&["retrain", "--dry-run"]);
        assert_eq!(code(&out), 0, "{action}: {}", stderr(&out));
        assert_eq!(serving(&env), 1, "{action}");
        let log = kinds(&env);
        assert_eq!(log.last().map(String::as_str), Some("model-exported"));
        assert_eq!(exported(&env).0, 1);
        let out = env.run(&["verify"]);
        assert_eq!(code(&out), 0, "{action}: {}{}", stdout(&out), stderr(&out));
        let leftovers: Vec<_> = fs::read_dir(env.state().join("export"))
            .unwrap()
            .map(|e| e.unwrap().file_name())
            .collect();
        assert_eq!(leftovers.len(), 2, "file and manifest only: {leftovers:?}");
    }
}

/// The export's cost beside the cycle it follows (benchmark, not a test
/// of speed): `cargo test --release --test it onnx::export_time --
/// --ignored --nocapture`. A cycle trains the default network on four demo
/// nights (the reference, timed through the real binary); then the
/// serving model is exported 20 times in this process, each time exactly
/// what follows a promotion: load and verify the checkpoint, build the
/// graph, write the file and its manifest atomically with fsyncs.
#[test]
#[ignore]
fn export_time() {
    let dir = tempfile::tempdir().unwrap();
    let config_path = export_config(dir.path());
    let env = Env::new(&config_path);
    let out = env.ingest(&[night("01"), night("02"), night("03"), night("04")]);
    assert_eq!(code(&out), 0, "{}", stderr(&out));
    let t = std::time::Instant::now();
    let out = env.run(&["retrain"]);
    let cycle = t.elapsed().as_secs_f64() * 1e3;
    assert_eq!(code(&out), 0, "{}", stderr(&out));
    let config = tidegate::config::Config::load(&config_path).unwrap();
    let state = tidegate::state::StateDir::new(env.state());
    let id: tidegate::ids::ModelId = serving(&env).to_string().parse().unwrap();
    let target = dir.path().join("bench.onnx");
    let mut times: Vec<f64> = (0..20)
        .map(|_| {
            let t = std::time::Instant::now();
            tidegate::export::export_to(&state, &config, id, &target).unwrap();
            t.elapsed().as_secs_f64() * 1e3
        })
        .collect();
    times.sort_by(f64::total_cmp);
    let (median, worst) = (times[times.len() / 2], times[times.len() - 1]);
    println!(
        "export of the serving model (default network, demo columns): median {median:.1} ms, slowest {worst:.1} ms of 20; the cycle before it {cycle:.0} ms; ratio median/cycle {:.4}",
        median / cycle
    );
    assert!(fs::metadata(&target).unwrap().len() > 0);
}
