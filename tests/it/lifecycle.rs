//! Retrain cycles and predictions through the real binary on the demo data:
//! the first model must beat the trivial predictor, later candidates face
//! the serving model, a damaged candidate is shelved, a dry run changes
//! nothing, and `predict` scores files with the serving model.

use std::fs;
use std::path::PathBuf;

use crate::support::{Env, code, repo, stderr, stdout};

fn night(n: &str) -> PathBuf {
    repo(&format!("demo-data/night-{n}.csv"))
}

fn demo_with(nights: &[&str]) -> Env {
    let env = Env::new(&repo("demo-data/tidegate.toml"));
    let files: Vec<PathBuf> = nights.iter().map(|n| night(n)).collect();
    let out = env.ingest(&files);
    assert_eq!(code(&out), 0, "{}", stderr(&out));
    env
}

fn retrain(env: &Env, args: &[&str]) -> serde_json::Value {
    let mut a = vec!["--json", "retrain"];
    a.extend_from_slice(args);
    let out = env.run(&a);
    assert_eq!(code(&out), 0, "{}", stderr(&out));
    serde_json::from_str(stdout(&out).trim()).unwrap()
}

fn kinds(env: &Env) -> Vec<String> {
    env.log_json(&[])
        .iter()
        .map(|e| e["kind"].as_str().unwrap().to_string())
        .collect()
}

#[test]
fn first_model_beats_trivial_then_warm_cycles_face_the_serving_model() {
    let env = demo_with(&["01", "02", "03", "04"]);
    let r = retrain(&env, &[]);
    assert_eq!(r["outcome"], "promote", "{r}");
    assert_eq!(r["compared_with"], "trivial predictor");
    assert_eq!(r["candidates"].as_array().unwrap().len(), 1);
    assert_eq!(r["candidates"][0]["run"], "cold");
    assert_eq!(r["serving_after"], 1);
    assert!(
        r["candidates"][0]["holdout_loss"].as_f64().unwrap()
            < r["compared_with_loss"].as_f64().unwrap() / 2.0
    );
    assert_eq!(
        fs::read_to_string(env.state().join("serving")).unwrap(),
        "m000001\n"
    );
    assert_eq!(env.status_json()["summary"]["serving"], 1);

    // Nothing new: nothing to do, nothing recorded.
    let before = kinds(&env).len();
    assert_eq!(retrain(&env, &[])["outcome"], "nothing-new");
    assert_eq!(kinds(&env).len(), before);

    let out = env.ingest(&[night("06"), night("07")]);
    assert_eq!(code(&out), 0);
    let r = retrain(&env, &[]);
    assert_eq!(r["serving_before"], 1);
    assert_eq!(r["compared_with"], "m000001");
    assert_eq!(r["candidates"][0]["run"], "warm");
    assert_eq!(r["new_batches"], serde_json::json!([5, 6]));
    // The warm parent took the values nights 6 and 7 brought: Saturday,
    // Sunday and the new shop (demo-data/README.md).
    let trained = env.log_json(&["--kind", "candidate-trained"]);
    assert_eq!(
        trained.last().unwrap()["widened"],
        serde_json::json!({"weekday": 2, "shop": 1})
    );
    let decided = r["outcome"].as_str().unwrap();
    assert!(decided == "promote" || decided == "keep", "{r}");
    let log = kinds(&env);
    assert_eq!(
        &log[log.len() - 4..],
        &[
            "cycle-started".to_string(),
            "candidate-trained".to_string(),
            "baselines-scored".to_string(),
            if decided == "promote" {
                "promoted".into()
            } else {
                "shelved".into()
            }
        ]
    );
    // The reviewer's question: what changed, when, on which evidence.
    let promoted = env.log_json(&["--kind", "promoted", "--model", "m000001"]);
    assert_eq!(promoted.len(), 1);
    assert_eq!(promoted[0]["evidence"]["compared_with"], "trivial");
    assert!(promoted[0]["evidence"]["p"].as_f64().unwrap() < 0.05);
    // The rank test on per-batch means is recorded beside it (with a few
    // batches it cannot go below 1/2^batches).
    assert!(promoted[0]["evidence"]["wilcoxon_p"].as_f64().unwrap() <= 0.5);
    assert!(promoted[0]["evidence"]["batches"].as_u64().unwrap() >= 3);
    let out = env.run(&["verify"]);
    assert_eq!(code(&out), 0, "{}", stdout(&out));
    assert!(stdout(&out).contains("2 checkpoints"), "{}", stdout(&out));
}

#[test]
fn a_candidate_trained_on_scrambled_targets_is_shelved() {
    let env = demo_with(&["01", "02", "03", "04", "06"]);
    assert_eq!(retrain(&env, &[])["outcome"], "promote");
    // Night 7 with its target column replaced by the values of another
    // night's rows in reverse order: shape and range are fine, meaning is gone.
    let text = fs::read_to_string(night("07")).unwrap();
    let other: Vec<String> = fs::read_to_string(night("08"))
        .unwrap()
        .lines()
        .skip(1)
        .map(|l| l.rsplit(',').next().unwrap().to_string())
        .collect();
    let mut lines: Vec<String> = text.lines().map(str::to_string).collect();
    for (i, line) in lines.iter_mut().enumerate().skip(1) {
        let cut = line.rfind(',').unwrap();
        line.truncate(cut + 1);
        line.push_str(&other[(other.len() - i) % other.len()]);
    }
    let bad = env.dir.path().join("night-07-scrambled.csv");
    fs::write(&bad, lines.join("\n") + "\n").unwrap();
    assert_eq!(code(&env.ingest(&[bad])), 0);
    let r = retrain(&env, &[]);
    assert_eq!(r["outcome"], "keep", "{r}");
    assert_eq!(r["serving_after"], 1);
    assert_eq!(
        fs::read_to_string(env.state().join("serving")).unwrap(),
        "m000001\n"
    );
    // The shelved candidate stays on disk, and the log says why (the kind's
    // former name still selects it).
    assert!(env.state().join("models/m000002/manifest.json").exists());
    let shelved = env.log_json(&["--kind", "shelved"]);
    assert_eq!(shelved.last().unwrap()["model"], 2);
    assert_eq!(shelved.last().unwrap()["kind"], "shelved");
    assert!(
        !shelved.last().unwrap()["reason"]
            .as_str()
            .unwrap()
            .is_empty()
    );
    assert_eq!(env.log_json(&["--kind", "kept"]), shelved);
}

#[test]
fn dry_run_changes_nothing() {
    let env = demo_with(&["01", "02", "03"]);
    let before_log = fs::read(env.state().join("audit.jsonl")).unwrap();
    let r = retrain(&env, &["--dry-run"]);
    assert_eq!(r["dry_run"], true);
    assert_eq!(r["candidates"][0]["model"], serde_json::Value::Null);
    assert_eq!(
        fs::read(env.state().join("audit.jsonl")).unwrap(),
        before_log
    );
    assert!(!env.state().join("serving").exists());
    assert_eq!(fs::read_dir(env.state().join("models")).unwrap().count(), 0);
    // The same cycle for real promotes the model the dry run described.
    let real = retrain(&env, &[]);
    assert_eq!(real["outcome"], r["outcome"]);
    assert_eq!(
        real["candidates"][0]["holdout_loss"], r["candidates"][0]["holdout_loss"],
        "seeded: same training, same score"
    );
}

#[test]
fn predict_scores_files_with_the_serving_model() {
    let env = demo_with(&["01", "02", "03", "04"]);
    let out = env.run(&["predict", "--input", night("08").to_str().unwrap()]);
    assert_eq!(code(&out), 1, "no model yet");
    assert!(stderr(&out).contains("no model serves"), "{}", stderr(&out));
    assert_eq!(retrain(&env, &[])["outcome"], "promote");

    let out = env.run(&["predict", "--input", night("08").to_str().unwrap()]);
    assert_eq!(code(&out), 0, "{}", stderr(&out));
    let text = stdout(&out);
    let mut lines = text.lines();
    assert_eq!(
        lines.next().unwrap(),
        "shop,town,bread,weekday,temp_c,rain_mm,promo,prev_day_sold,loaves_sold,predicted_loaves_sold"
    );
    let rows: Vec<(f64, f64)> = lines
        .map(|l| {
            let f: Vec<&str> = l.rsplitn(3, ',').collect();
            (f[1].parse().unwrap(), f[0].parse().unwrap())
        })
        .collect();
    assert_eq!(
        rows.len(),
        fs::read_to_string(night("08")).unwrap().lines().count() - 1
    );
    // The model must do far better than predicting the mean on unseen rows.
    let mean = rows.iter().map(|r| r.0).sum::<f64>() / rows.len() as f64;
    let mse = rows.iter().map(|(y, p)| (y - p).powi(2)).sum::<f64>() / rows.len() as f64;
    let var = rows.iter().map(|(y, _)| (y - mean).powi(2)).sum::<f64>() / rows.len() as f64;
    assert!(mse < 0.5 * var, "mse {mse} vs variance {var}");

    // Without the target column, as JSON Lines, into a file.
    let no_target: String = fs::read_to_string(night("08"))
        .unwrap()
        .lines()
        .map(|l| l.rsplit_once(',').unwrap().0.to_string() + "\n")
        .collect();
    let input = env.dir.path().join("tomorrow.csv");
    fs::write(&input, no_target).unwrap();
    let dest = env.dir.path().join("scored.jsonl");
    let out = env.run(&[
        "predict",
        "--input",
        input.to_str().unwrap(),
        "--format",
        "jsonl",
        "--output",
        dest.to_str().unwrap(),
        "--model",
        "m000001",
    ]);
    assert_eq!(code(&out), 0, "{}", stderr(&out));
    let first: serde_json::Value =
        serde_json::from_str(fs::read_to_string(&dest).unwrap().lines().next().unwrap()).unwrap();
    assert_eq!(first["shop"], "Ashby Market St");
    assert!(first["predicted_loaves_sold"].as_f64().unwrap().is_finite());
    assert!(first.get("loaves_sold").is_none());

    // Bad rows are refused with reasons; an unknown model is an error.
    let out = env.run(&["predict", "--input", night("05").to_str().unwrap()]);
    assert_eq!(code(&out), 65);
    assert!(stderr(&out).contains("line 41"), "{}", stderr(&out));
    let out = env.run(&[
        "predict",
        "--input",
        night("08").to_str().unwrap(),
        "--model",
        "m000042",
    ]);
    assert_eq!(code(&out), 1);
    assert!(stderr(&out).contains("m000042"), "{}", stderr(&out));
}

#[test]
fn progress_bar_stays_off_when_stderr_is_not_a_terminal() {
    let env = demo_with(&["01", "02"]);
    let out = env.run(&["retrain", "--progress"]);
    assert_eq!(code(&out), 0);
    assert!(!stderr(&out).contains("epoch"), "{}", stderr(&out));
    assert!(stdout(&out).contains("decision:"), "{}", stdout(&out));
}

#[test]
fn an_interrupted_cycle_is_logged_as_abandoned() {
    use tidegate::audit::Event;
    use tidegate::config::Config;
    use tidegate::state::{self, StateDir};
    let env = demo_with(&["01"]);
    {
        // A cycle that starts and never ends, as a crash would leave it.
        let config = Config::load(&repo("demo-data/tidegate.toml")).unwrap();
        let (mut owner, _) = state::open(&StateDir::new(env.state()), &config).unwrap();
        let event = Event::CycleStarted {
            cycle: 1,
            serving: None,
            new_batches: vec![],
            candidates: vec!["cold".into()],
        };
        owner
            .store
            .record_with_meta(
                event,
                "tester",
                chrono::Utc::now(),
                &[(
                    tidegate::store::META_OPEN_CYCLE,
                    Some(1u64.to_be_bytes().to_vec()),
                )],
            )
            .unwrap();
    }
    let out = env.ingest(&[night("02")]);
    assert_eq!(code(&out), 0, "{}", stderr(&out));
    let abandoned = env.log_json(&["--kind", "cycle-abandoned"]);
    assert_eq!(abandoned.len(), 1);
    assert_eq!(abandoned[0]["cycle"], 1);
    // Once only.
    env.ingest(&[night("03")]);
    assert_eq!(env.log_json(&["--kind", "cycle-abandoned"]).len(), 1);
}

#[test]
fn a_warm_cycle_in_a_new_process_continues_the_checkpoint_exactly() {
    use tidegate::config::Config;
    use tidegate::ids::BatchId;
    use tidegate::model::checkpoint::{Checkpoint, read_manifest};
    use tidegate::state::{self, StateDir};
    use tidegate::store::Split;
    use tidegate::train::{Control, train_warm};

    // Process 1 trains and saves m000001; process 2 loads its weights and
    // Adam state from disk and trains the warm candidate m000002.
    let env = demo_with(&["01", "02", "03"]);
    assert_eq!(retrain(&env, &[])["outcome"], "promote");
    assert_eq!(code(&env.ingest(&[night("04")])), 0);
    let r = retrain(&env, &[]);
    assert_eq!(r["candidates"][0]["run"], "warm");
    let from_process = read_manifest(&env.state().join("models/m000002")).unwrap();

    // The same warm run here, from the files process 1 wrote.
    let config = Config::load(&repo("demo-data/tidegate.toml")).unwrap();
    let (owner, _) = state::open(&StateDir::new(env.state()), &config).unwrap();
    let parent = Checkpoint::load(
        &env.state().join("models/m000001"),
        &config.schema_fingerprint(),
    )
    .unwrap();
    let older = owner
        .store
        .rows(Split::Train, None, Some(BatchId(3)))
        .unwrap();
    let new = owner
        .store
        .rows(Split::Train, Some(BatchId(4)), None)
        .unwrap();
    // As the cycle does: widened for the weekday night 4 brought.
    let (parent_model, added) = parent.model.widened(owner.store.vocabularies()).unwrap();
    assert_eq!(added.len(), 1, "Thursday is new on night 4");
    let here = train_warm(
        &parent_model,
        &config.training,
        &new,
        &older,
        Control::default(),
    )
    .unwrap();
    assert_eq!(
        here.model.weights_digest(),
        from_process.weights_digest,
        "bit-identical weights across processes"
    );
    // (The manifest's losses went through JSON, whose float parsing may move
    // the last bit; the weights digest above is the exact check.)
    assert_eq!(
        here.summary.train_loss.len(),
        from_process.summary.train_loss.len()
    );
    for (a, b) in here
        .summary
        .train_loss
        .iter()
        .zip(&from_process.summary.train_loss)
    {
        assert!((a - b).abs() <= 1e-12 * a.abs(), "{a} vs {b}");
    }
    // And the first epoch's loss continues from where the parent ended,
    // rather than starting over (the optimizer state was restored too).
    let parent_last = *parent.manifest.summary.validation_loss.last().unwrap();
    let warm_first = here.summary.validation_loss[0];
    assert!(
        warm_first < 2.0 * parent_last,
        "warm start lost the fit: {warm_first} vs {parent_last}"
    );
}

/// A state dir on the demo config in approval mode.
fn approval_env() -> Env {
    let dir = tempfile::tempdir().unwrap();
    let cfg = dir.path().join("approval.toml");
    let text = fs::read_to_string(repo("demo-data/tidegate.toml"))
        .unwrap()
        .replace("require_approval = false", "require_approval = true");
    fs::write(&cfg, text).unwrap();
    Env::new(&cfg)
}

#[test]
fn approval_mode_waits_for_a_person() {
    let env = approval_env();
    assert_eq!(
        code(&env.ingest(&[night("01"), night("02"), night("03")])),
        0
    );
    let r = retrain(&env, &[]);
    assert_eq!(r["outcome"], "await-approval", "{r}");
    assert!(
        !env.state().join("serving").exists(),
        "nothing serves before approval"
    );
    // No new cycle while one waits; the wrong id and a missing reason are refused.
    let out = env.run(&["retrain"]);
    assert_eq!(code(&out), 1);
    assert!(
        stderr(&out).contains("already waiting for approval (m000001)"),
        "{}",
        stderr(&out)
    );
    let out = env.run(&["approve", "m000007", "--reason", "looks fine"]);
    assert_eq!(code(&out), 1);
    assert!(stderr(&out).contains("m000001 is"), "{}", stderr(&out));
    assert_eq!(
        code(&env.run(&["approve", "m000001"])),
        2,
        "--reason is required"
    );
    let out = env.run(&[
        "approve",
        "m000001",
        "--reason",
        "checked the error by shop",
    ]);
    assert_eq!(code(&out), 0, "{}", stderr(&out));
    assert_eq!(
        fs::read_to_string(env.state().join("serving")).unwrap(),
        "m000001\n"
    );
    let approved = env.log_json(&["--kind", "approved"]);
    assert_eq!(approved[0]["user"], "tester");
    assert_eq!(approved[0]["reason"], "checked the error by shop");

    assert_eq!(code(&env.ingest(&[night("04"), night("06")])), 0);
    let r = retrain(&env, &[]);
    if r["outcome"] == "await-approval" {
        let out = env.run(&["decline", "m000002", "--reason", "wait for a full week"]);
        assert_eq!(code(&out), 0, "{}", stderr(&out));
        assert_eq!(
            fs::read_to_string(env.state().join("serving")).unwrap(),
            "m000001\n"
        );
        assert_eq!(env.log_json(&["--kind", "declined"]).len(), 1);
    }
    let out = env.run(&["decline", "m000002", "--reason", "again"]);
    assert_eq!(code(&out), 1);
    assert!(
        stderr(&out).contains("no candidate is waiting"),
        "{}",
        stderr(&out)
    );
    assert_eq!(code(&env.run(&["verify"])), 0);
}

#[test]
fn manual_rollback_and_the_model_list() {
    // Whatever the gate decides on the demo nights: a first model, then a
    // second version promoted over it (made worse on purpose, so that a
    // person has a reason to go back).
    let env = demo_with(&["01", "02", "03", "04"]);
    assert_eq!(retrain(&env, &[])["outcome"], "promote");
    let second = worse_serving(&env, 1.25);
    assert_eq!(second, 2);
    assert_eq!(env.status_json()["summary"]["serving"], 2);
    let out = env.run(&["rollback", "--reason", "complaints from the harbour shop"]);
    assert_eq!(code(&out), 0, "{}", stderr(&out));
    // The model it replaced serves again, and the log says who and why.
    assert_eq!(
        fs::read_to_string(env.state().join("serving")).unwrap(),
        "m000001\n"
    );
    let rb = env.log_json(&["--kind", "rolled-back"]);
    assert_eq!(rb.len(), 1);
    assert_eq!(
        (rb[0]["from"].as_u64(), rb[0]["to"].as_u64()),
        (Some(2), Some(1))
    );
    assert_eq!(rb[0]["how"], "manual");
    assert_eq!(rb[0]["user"], "tester");
    assert_eq!(rb[0]["reason"], "complaints from the harbour shop");
    assert_eq!(env.status_json()["summary"]["serving"], 1);
    let out = env.run(&["rollback", "--to", "m000001", "--reason", "again"]);
    assert_eq!(code(&out), 1);
    assert!(
        stderr(&out).contains("m000001 already serves"),
        "{}",
        stderr(&out)
    );
    assert_eq!(
        code(&env.run(&["rollback", "--to", "m000002"])),
        2,
        "--reason is required"
    );

    let out = env.run(&["--json", "models"]);
    assert_eq!(code(&out), 0, "{}", stderr(&out));
    let models: Vec<serde_json::Value> = stdout(&out)
        .lines()
        .map(|l| serde_json::from_str(l).unwrap())
        .collect();
    assert_eq!(models.len(), 2);
    let by_id = |id: u64| {
        models
            .iter()
            .find(|m| m["id"].as_u64() == Some(id))
            .unwrap_or_else(|| panic!("m{id} in {models:?}"))
    };
    assert_eq!(by_id(1)["serving"], true);
    assert_eq!(by_id(2)["serving"], false);
    assert_eq!(by_id(2)["parent"], 1);
    assert!(
        by_id(2)["decisions"]
            .as_array()
            .unwrap()
            .contains(&serde_json::json!("promoted")),
        "{models:?}"
    );
    assert!(by_id(1)["holdout_loss"].as_f64().unwrap() > 0.0);
    let out = env.run(&["models"]);
    assert!(stdout(&out).contains("m000001 *"), "{}", stdout(&out));
    assert_eq!(code(&env.run(&["verify"])), 0);
}

#[test]
fn every_cycle_scores_ridge_and_the_log_models_and_status_compare_with_it() {
    let env = demo_with(&["01", "02", "03", "04"]);
    let r = retrain(&env, &[]);
    let ridge = r["ridge_loss"].as_f64().expect("ridge fitted");
    let trivial = r["trivial_loss"].as_f64().unwrap();
    let network = r["candidates"][0]["holdout_loss"].as_f64().unwrap();
    // Ridge on the encoded inputs is far better than the mean, and the
    // network better still on this data (shop × bread effects and lags).
    assert!(ridge < trivial / 2.0, "ridge {ridge} vs trivial {trivial}");
    assert!(network < ridge, "network {network} vs ridge {ridge}");
    let b = env.log_json(&["--kind", "baselines-scored"]);
    assert_eq!(b.len(), 1);
    assert_eq!(b[0]["ridge_loss"].as_f64(), Some(ridge));
    assert_eq!(b[0]["holdout_rows"], r["holdout_rows"]);
    let models: Vec<serde_json::Value> = stdout(&env.run(&["--json", "models"]))
        .lines()
        .map(|l| serde_json::from_str(l).unwrap())
        .collect();
    assert_eq!(models[0]["ridge_loss"].as_f64(), Some(ridge));
    assert_eq!(models[0]["beats_ridge"], true);
    let vs = &env.status_json()["summary"]["versus_ridge"];
    assert_eq!(vs["model"], 1);
    assert_eq!(vs["beats_ridge"], true);
    assert!(!stdout(&env.run(&["status"])).contains("does not beat the ridge"));
}

/// The fresh-data check of each accepted batch, as logged.
fn fresh_checks(env: &Env) -> Vec<serde_json::Value> {
    env.log_json(&["--kind", "fresh-checked"])
        .into_iter()
        .map(|e| e["check"].clone())
        .collect()
}

/// Night `n` with `loaves_sold` of every shop in `town` scaled by
/// `factor`: a strong, designed change in one town (test data derived from
/// the invented demo).
fn town_night(env: &Env, n: &str, town: &str, factor: f64) -> PathBuf {
    let text = fs::read_to_string(night(n)).unwrap();
    let mut lines = text.lines();
    let header = lines.next().unwrap();
    let cols: Vec<&str> = header.split(',').collect();
    let target = cols.iter().position(|c| *c == "loaves_sold").unwrap();
    let town_col = cols.iter().position(|c| *c == "town").unwrap();
    let mut out = format!("{header}\n");
    for line in lines {
        let mut fields: Vec<String> = line.split(',').map(String::from).collect();
        if fields[town_col] == town {
            let v: f64 = fields[target].parse().unwrap();
            fields[target] = format!("{}", (v * factor).round());
        }
        out.push_str(&fields.join(","));
        out.push('\n');
    }
    let path = env.dir.path().join(format!("{town}-{n}.csv"));
    fs::write(&path, out).unwrap();
    path
}

#[test]
fn the_fresh_check_flags_a_strong_shift_in_one_town_and_nothing_on_ordinary_nights() {
    let env = demo_with(&["01", "02", "03", "04"]);
    assert_eq!(retrain(&env, &[])["outcome"], "promote");
    // Nights where nothing was designed to change (demo-data/README.md):
    // new weekdays and the new shop are new conditions, never a flag.
    assert_eq!(
        code(&env.ingest(&[night("06"), night("07"), night("08")])),
        0
    );
    for c in fresh_checks(&env) {
        let verdict = c["verdict"].as_str().unwrap();
        assert!(
            ["steady", "new-conditions", "untested"].contains(&verdict),
            "nothing changed on this night: {c}"
        );
        assert!(
            c["shifted_values"].as_array().is_none_or(|v| v.is_empty()),
            "{c}"
        );
    }
    // Night 9 with demand in Corrin doubled: the serving model's loss there
    // is far above the rest of the town column's.
    let doubled = town_night(&env, "09", "Corrin", 2.0);
    assert_eq!(code(&env.ingest(&[doubled])), 0);
    let shift = fresh_checks(&env).pop().unwrap();
    assert_eq!(shift["verdict"], "shifted", "{shift}");
    let values: Vec<&str> = shift["shifted_values"]
        .as_array()
        .unwrap()
        .iter()
        .map(|v| v.as_str().unwrap())
        .collect();
    assert!(values.contains(&"town = Corrin"), "{shift}");
    // Only Corrin's rows moved: no other town, bread or weekday is named.
    for v in &values {
        assert!(
            *v == "town = Corrin" || v.starts_with("shop = Corrin "),
            "{v} did not change: {shift}"
        );
    }
    assert!(
        shift["mean_loss_serving"].as_f64().unwrap()
            > shift["mean_loss_reference"].as_f64().unwrap()
    );
    // Where it went wrong: the hotspots with most loss are Corrin's.
    let top = &shift["hotspots"][0];
    assert!(
        top["value"].as_str().unwrap().starts_with("Corrin"),
        "{shift}"
    );
    // A shift blames no model: nothing is rolled back.
    assert!(env.log_json(&["--kind", "rolled-back"]).is_empty());
    let status = stdout(&env.run(&["status"]));
    assert!(
        status.contains("WARNING") && status.contains("Corrin"),
        "{status}"
    );
    // A cycle answers the warning; status stops repeating it.
    retrain(&env, &[]);
    assert!(env.status_json()["summary"]["fresh_check"].is_null());
}

/// Makes the serving model `factor` times worse on the stored holdout rows
/// (its output shifted up, as an upstream unit slip would) and promotes
/// that version with the serving model as its predecessor, as if the gate
/// had passed it: a regression of a known size, whatever the seed.
fn worse_serving(env: &Env, factor: f64) -> u64 {
    use tidegate::config::Config;
    use tidegate::state::{self, StateDir};
    let config = Config::load(&env.state().join("tidegate.toml")).unwrap();
    let (mut owner, _) = state::open(&StateDir::new(env.state()), &config).unwrap();
    tidegate::sim::make_worse(&mut owner, factor, "tester")
        .unwrap()
        .0
}

/// Promotes a copy of the serving model made `factor` times worse (as
/// [`worse_serving`]) and records, in the same transaction, a fresh-data
/// monitor that has already seen 30 batches on which its loss was half
/// again its predecessor's: the evidence is far past
/// 1 / alpha, so the next fresh check decides on it. The monitor's power
/// (how many nights real evidence takes) is measured in `gate::monitor` and
/// `sim`; this sets up what the check must then do. Returns (worse, before).
fn worse_with_evidence(env: &Env, factor: f64) -> (u64, u64) {
    use tidegate::config::Config;
    use tidegate::fresh::{META_MONITOR, MonitorState};
    use tidegate::gate::monitor::{self, Prior};
    use tidegate::state::{self, StateDir};
    let config = Config::load(&env.state().join("tidegate.toml")).unwrap();
    let (mut owner, _) = state::open(&StateDir::new(env.state()), &config).unwrap();
    let before = owner.store.serving().unwrap().unwrap();
    let worse = tidegate::sim::make_worse(&mut owner, factor, "tester").unwrap();
    // Half the loss again: a log loss ratio of ln 1.5 on every batch.
    let prior = Prior::new(0.01);
    let mut observations = Vec::new();
    for _ in 0..30 {
        observations.push(monitor::observe(&prior, &observations, 1.5f64.ln(), 1e-4));
    }
    let state = MonitorState {
        serving: worse,
        previous: Some(before),
        prior,
        observations,
    };
    // The monitor is written with a second record of the promotion (the
    // store writes meta only beside a log entry).
    let event = tidegate::audit::Event::Promoted {
        cycle: 0,
        model: worse,
        previous: Some(before),
        evidence: tidegate::audit::GateEvidence::without_test(
            100,
            1.0,
            factor,
            "set up by the test: monitor evidence of a regression".into(),
        ),
    };
    owner
        .store
        .record_with_meta(
            event,
            "tester",
            chrono::Utc::now(),
            &[(META_MONITOR, Some(state.encode()))],
        )
        .unwrap();
    (worse.0, before.0)
}

#[test]
fn a_model_that_does_worse_on_fresh_rows_is_rolled_back_automatically() {
    let env = demo_with(&["01", "02", "03", "04"]);
    assert_eq!(retrain(&env, &[])["outcome"], "promote");
    let (worse, before) = worse_with_evidence(&env, 1.5);
    // Night 8 is a Monday: every row is a condition both models know.
    let out = env.run(&["--json", "ingest", night("08").to_str().unwrap()]);
    assert_eq!(code(&out), 0, "{}", stderr(&out));
    let answer: serde_json::Value = serde_json::from_str(stdout(&out).trim()).unwrap();
    assert_eq!(answer["fresh_check"]["verdict"], "regressed", "{answer}");
    assert_eq!(answer["rolled_back"], true);
    let rb = env.log_json(&["--kind", "rolled-back"]);
    assert_eq!(rb.len(), 1);
    assert_eq!(
        (rb[0]["from"].as_u64(), rb[0]["to"].as_u64()),
        (Some(worse), Some(before))
    );
    assert_eq!(rb[0]["how"], "automatic");
    let ev = &rb[0]["evidence"];
    assert_eq!(ev["previous"].as_u64(), Some(before));
    assert!(
        ev["evidence"].as_f64().unwrap() >= ev["evidence_needed"].as_f64().unwrap(),
        "{ev}"
    );
    // The night's own rows agree: the version made worse did worse on them.
    assert!(
        ev["mean_loss_serving"].as_f64().unwrap() > ev["mean_loss_previous"].as_f64().unwrap(),
        "{ev}"
    );
    assert_eq!(
        fs::read_to_string(env.state().join("serving")).unwrap(),
        format!("m{before:06}\n")
    );
    // The model serves again by a rollback: the next batch has nothing to
    // compare it with, so there is no flip back.
    assert_eq!(code(&env.ingest(&[night("09")])), 0);
    let last = fresh_checks(&env).pop().unwrap();
    assert_eq!(last["serving"].as_u64(), Some(before));
    assert!(last["previous"].is_null(), "{last}");
    assert_eq!(env.log_json(&["--kind", "rolled-back"]).len(), 1);
    assert_eq!(code(&env.run(&["verify"])), 0);
}

#[test]
fn in_approval_mode_a_regression_is_reported_not_acted_on() {
    let env = approval_env();
    let files: Vec<PathBuf> = ["01", "02", "03", "04"].iter().map(|n| night(n)).collect();
    assert_eq!(code(&env.ingest(&files)), 0);
    assert_eq!(retrain(&env, &[])["outcome"], "await-approval");
    assert_eq!(
        code(&env.run(&["approve", "m000001", "--reason", "first"])),
        0
    );
    let (worse, _) = worse_with_evidence(&env, 1.5);
    assert_eq!(code(&env.ingest(&[night("08")])), 0);
    let last = fresh_checks(&env).pop().unwrap();
    assert_eq!(last["verdict"], "regressed", "{last}");
    // Reported, not acted on: the same model serves, no rollback entry.
    assert!(env.log_json(&["--kind", "rolled-back"]).is_empty());
    assert_eq!(
        fs::read_to_string(env.state().join("serving")).unwrap(),
        format!("m{worse:06}\n")
    );
    let status = stdout(&env.run(&["status"]));
    assert!(
        status.contains("WARNING") && status.contains("regressed"),
        "{status}"
    );
}

/// What the monitor needs today to catch a genuinely worse model on the
/// demo nights, as a measurement (see the report of this change).
#[test]
#[ignore = "measurement: the monitor does not yet catch a model 3 times worse within the 4 nights both models know"]
fn a_model_three_times_worse_is_rolled_back_within_four_nights() {
    let env = demo_with(&["01", "02", "03", "04"]);
    assert_eq!(retrain(&env, &[])["outcome"], "promote");
    worse_serving(&env, 3.0);
    // Nights 6 and 7 bring Saturday and Sunday, which neither model knows.
    for n in ["06", "07", "08", "09", "10", "11"] {
        assert_eq!(code(&env.ingest(&[night(n)])), 0);
        let c = fresh_checks(&env).pop().unwrap();
        println!("night {n}: {} evidence {}", c["verdict"], c["evidence"]);
    }
    assert_eq!(env.log_json(&["--kind", "rolled-back"]).len(), 1);
}

#[test]
fn every_accepted_batch_carries_a_drift_report_judged_against_past_batches() {
    // Every good night of the demo, one ingest each, as the nights arrive.
    let nights = [
        "01", "02", "03", "04", "06", "07", "08", "09", "10", "11", "12",
    ];
    let env = demo_with(&nights[..1]);
    for n in &nights[1..] {
        let out = env.ingest(&[night(n)]);
        assert_eq!(code(&out), 0, "{}", stderr(&out));
    }
    let accepted = env.log_json(&["--kind", "batch-accepted"]);
    assert_eq!(accepted.len(), nights.len());
    assert!(
        accepted[0]["drift"].is_null(),
        "nothing to compare the first with"
    );
    let col = |b: usize, name: &str| {
        let d = &accepted[b]["drift"];
        d["columns"]
            .as_array()
            .unwrap()
            .iter()
            .find(|c| c["column"] == name)
            .unwrap_or_else(|| panic!("{name} in {d}"))
            .clone()
    };
    // Night 2 is a Tuesday after a Monday: every row has a new weekday. It
    // is reported as a new value, with no distance and no flag.
    let weekday = col(1, "weekday");
    assert_eq!(weekday["unseen_share"].as_f64(), Some(1.0));
    assert_eq!(weekday["new_values"], serde_json::json!(["Tue"]));
    assert_eq!(weekday["flagged"], false);
    assert_eq!(weekday["judged"]["verdict"], "no_distance");
    assert_eq!(weekday["day_level"], true);
    // The same shops upload every night.
    assert_eq!(col(1, "shop")["unseen_share"].as_f64(), Some(0.0));
    assert_eq!(col(1, "loaves_sold")["target"], true);
    for b in 1..accepted.len() {
        // Each number column has one past distance per earlier batch with
        // a report, kept in the store beside the batches (at most 28).
        let temp = col(b, "temp_c");
        assert_eq!(
            temp["judged"]["past"].as_u64(),
            Some((b as u64 - 1).min(28)),
            "batch {}: {temp}",
            b + 1
        );
        let building = b - 1 < 7;
        assert_eq!(
            temp["judged"]["verdict"] == "building",
            building,
            "batch {}: {temp}",
            b + 1
        );
        // The day-level columns are never flagged, on any night.
        for name in ["weekday", "temp_c"] {
            assert_eq!(
                col(b, name)["flagged"],
                false,
                "batch {}: {}",
                b + 1,
                col(b, name)
            );
        }
    }
    // Night 7 brings the new shop: a new value with its share of rows.
    let shop = col(5, "shop");
    assert_eq!(shop["new_values"], serde_json::json!(["Harwick Harbour"]));
    let share = shop["unseen_share"].as_f64().unwrap();
    assert!(share > 0.0 && share < 0.02, "{shop}");
    // status and log say where the reference stands.
    let status = stdout(&env.run(&["status"]));
    assert!(status.contains("drift"), "{status}");
    let log = stdout(&env.run(&["log", "--kind", "batch-accepted"]));
    // Night 3: one past distance for most columns; prev_day_sold has none
    // (night 1 has no previous day). Each night so far brought a new
    // weekday, which has no distance and is reported as new.
    assert!(
        log.contains(
            "new weekday: Wed; building the drift reference: 1 of 7 batches; prev_day_sold 0 of 7"
        ),
        "{log}"
    );
    // Night 10 (batch 9): judged, except the weekday (first distance on
    // night 8) and prev_day_sold.
    assert!(
        log.contains("building the drift reference for weekday 2 of 7, prev_day_sold 6 of 7"),
        "{log}"
    );
}

#[test]
fn widening_for_the_new_shop_leaves_every_prediction_of_the_serving_model_unchanged() {
    use tidegate::config::Config;
    use tidegate::model::Predictions;
    use tidegate::model::checkpoint::Checkpoint;
    use tidegate::state::{self, StateDir};
    use tidegate::store::Split;

    let env = demo_with(&["01", "02", "03", "04"]);
    assert_eq!(retrain(&env, &[])["outcome"], "promote");
    // Night 7 brings a new shop, nights 6 and 7 two new weekdays.
    assert_eq!(code(&env.ingest(&[night("06"), night("07")])), 0);
    let config = Config::load(&repo("demo-data/tidegate.toml")).unwrap();
    let (owner, _) = state::open(&StateDir::new(env.state()), &config).unwrap();
    let served = Checkpoint::load(
        &env.state().join("models/m000001"),
        &config.schema_fingerprint(),
    )
    .unwrap()
    .model;
    let (wide, added) = served.widened(owner.store.vocabularies()).unwrap();
    assert_eq!(added.len(), 2, "shop and weekday gained inputs");
    // Old shops and the new one, old rows and new: the same predictions.
    let mut rows = owner.store.rows(Split::Holdout, None, None).unwrap();
    rows.extend(&owner.store.rows(Split::Train, None, None).unwrap());
    let backend = config.training.predict_backend;
    let values = |p: Predictions| match p {
        Predictions::Regression { values } => values,
        Predictions::Classification { .. } => unreachable!("regression demo"),
    };
    let before = values(served.predict(&rows, backend).unwrap());
    let after = values(wide.predict(&rows, backend).unwrap());
    assert_eq!(before.len(), rows.n_rows());
    assert_eq!(before, after, "widening changes no prediction");
}
