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
#[ignore = "pins one outcome of the seeded demo under the row-by-row gate; to be rewritten as a property (issue 16)"]
fn manual_rollback_and_the_model_list() {
    let env = demo_with(&["01", "02", "03", "04"]);
    assert_eq!(retrain(&env, &[])["outcome"], "promote");
    assert_eq!(code(&env.ingest(&[night("06"), night("07")])), 0);
    assert_eq!(
        retrain(&env, &[])["outcome"],
        "promote",
        "the seeded demo promotes its first warm candidate"
    );
    let out = env.run(&["rollback", "--reason", "complaints from the harbour shop"]);
    assert_eq!(code(&out), 0, "{}", stderr(&out));
    assert_eq!(
        fs::read_to_string(env.state().join("serving")).unwrap(),
        "m000001\n"
    );
    let rb = env.log_json(&["--kind", "rolled-back"]);
    assert_eq!(
        (rb[0]["from"].as_u64(), rb[0]["to"].as_u64()),
        (Some(2), Some(1))
    );
    assert_eq!(rb[0]["how"], "manual");
    assert_eq!(rb[0]["user"], "tester");
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
    assert_eq!(models[0]["serving"], true);
    assert_eq!(models[1]["parent"], 1);
    assert_eq!(models[1]["kind"], "warm");
    assert_eq!(models[1]["decisions"], serde_json::json!(["promoted"]));
    assert_eq!(
        models[0]["decisions"],
        serde_json::json!(["promoted", "rolled-back"])
    );
    assert!(models[1]["holdout_loss"].as_f64().unwrap() > 0.0);
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

#[test]
#[ignore = "pins one outcome of the seeded demo under the row-by-row gate; to be rewritten as a property (issue 16)"]
fn the_demand_shift_night_is_flagged_by_the_fresh_data_check() {
    // Night 10 is the first with Corrin's demand 45% higher (demo-data/README.md).
    let env = demo_with(&["01", "02", "03", "04"]);
    assert_eq!(retrain(&env, &[])["outcome"], "promote");
    assert_eq!(code(&env.ingest(&[night("09"), night("10")])), 0);
    let checks = fresh_checks(&env);
    assert_eq!(checks.len(), 2);
    let (before, shift) = (&checks[0], &checks[1]);
    assert_eq!(before["verdict"], "steady", "{before}");
    assert_eq!(shift["verdict"], "shifted", "{shift}");
    assert!(shift["p_shift"].as_f64().unwrap() < 0.05);
    assert!(
        shift["mean_loss_serving"].as_f64().unwrap()
            > shift["mean_loss_reference"].as_f64().unwrap()
    );
    // Where it went wrong: the shops of the town whose demand moved.
    let spots = shift["hotspots"].as_array().unwrap();
    assert_eq!(spots.len(), 3, "{shift}");
    for h in spots {
        assert_eq!(h["column"], "shop");
        assert!(h["value"].as_str().unwrap().starts_with("Corrin "), "{h}");
    }
    // The first model replaced nothing, so nothing is rolled back.
    assert!(env.log_json(&["--kind", "rolled-back"]).is_empty());
    let status = stdout(&env.run(&["status"]));
    assert!(status.contains("WARNING"), "{status}");
    assert!(status.contains("shop = Corrin"), "{status}");
    // A cycle answers the warning; status stops repeating it.
    retrain(&env, &[]);
    assert!(env.status_json()["summary"]["fresh_check"].is_null());
}

/// Night `n` with every `loaves_sold` scaled by 1.3: a short festival
/// (test data derived from the invented demo).
fn festival_night(env: &Env, n: &str) -> PathBuf {
    let text = fs::read_to_string(night(n)).unwrap();
    let mut lines = text.lines();
    let header = lines.next().unwrap();
    let target = header.split(',').position(|c| c == "loaves_sold").unwrap();
    let mut out = format!("{header}\n");
    for line in lines {
        let mut fields: Vec<String> = line.split(',').map(String::from).collect();
        let v: f64 = fields[target].parse().unwrap();
        fields[target] = format!("{}", (v * 1.3).round());
        out.push_str(&fields.join(","));
        out.push('\n');
    }
    let path = env.dir.path().join(format!("festival-{n}.csv"));
    fs::write(&path, out).unwrap();
    path
}

/// Nights 1–4, then two festival nights; the warm model trained on them
/// passes the gate (it is far better on the festival rows and not
/// significantly worse on the older ones) and serves.
fn festival_promoted(env: &Env, approve: bool) {
    let files: Vec<PathBuf> = ["01", "02", "03", "04"].iter().map(|n| night(n)).collect();
    assert_eq!(code(&env.ingest(&files)), 0);
    let winner = if approve { "await-approval" } else { "promote" };
    assert_eq!(retrain(env, &[])["outcome"], winner);
    if approve {
        assert_eq!(
            code(&env.run(&["approve", "m000001", "--reason", "first"])),
            0
        );
    }
    let fest = [festival_night(env, "08"), festival_night(env, "09")];
    assert_eq!(code(&env.ingest(&fest)), 0);
    assert_eq!(retrain(env, &[])["outcome"], winner);
    if approve {
        assert_eq!(
            code(&env.run(&["approve", "m000002", "--reason", "festival"])),
            0
        );
    }
}

#[test]
#[ignore = "pins one outcome of the seeded demo under the row-by-row gate; to be rewritten as a property (issue 16)"]
fn a_model_that_does_worse_on_fresh_rows_is_rolled_back_automatically() {
    let env = Env::new(&repo("demo-data/tidegate.toml"));
    festival_promoted(&env, false);
    // Back to normal: the first night is not yet conclusive, the second is.
    assert_eq!(code(&env.ingest(&[night("10")])), 0);
    assert!(env.log_json(&["--kind", "rolled-back"]).is_empty());
    let out = env.run(&["--json", "ingest", night("11").to_str().unwrap()]);
    assert_eq!(code(&out), 0, "{}", stderr(&out));
    let answer: serde_json::Value = serde_json::from_str(stdout(&out).trim()).unwrap();
    assert_eq!(answer["fresh_check"]["verdict"], "regressed", "{answer}");
    assert_eq!(answer["rolled_back"], true);
    let rb = env.log_json(&["--kind", "rolled-back"]);
    assert_eq!(rb.len(), 1);
    assert_eq!(
        (rb[0]["from"].as_u64(), rb[0]["to"].as_u64()),
        (Some(2), Some(1))
    );
    assert_eq!(rb[0]["how"], "automatic");
    let ev = &rb[0]["evidence"];
    assert_eq!(ev["previous"], 1);
    assert!(ev["p_regression"].as_f64().unwrap() < 0.05, "{ev}");
    assert!(ev["mean_loss_serving"].as_f64().unwrap() > ev["mean_loss_previous"].as_f64().unwrap());
    assert_eq!(
        fs::read_to_string(env.state().join("serving")).unwrap(),
        "m000001\n"
    );
    // m000001 now serves by a rollback: the next batch has nothing to
    // compare it with, so there is no flip back.
    assert_eq!(code(&env.ingest(&[night("12")])), 0);
    let last = fresh_checks(&env).pop().unwrap();
    assert_eq!(last["serving"], 1);
    assert!(last["previous"].is_null(), "{last}");
    assert_eq!(env.log_json(&["--kind", "rolled-back"]).len(), 1);
    assert_eq!(code(&env.run(&["verify"])), 0);
}

#[test]
#[ignore = "pins one outcome of the seeded demo under the row-by-row gate; to be rewritten as a property (issue 16)"]
fn in_approval_mode_a_regression_is_reported_not_acted_on() {
    let env = approval_env();
    festival_promoted(&env, true);
    assert_eq!(code(&env.ingest(&[night("10"), night("11")])), 0);
    let last = fresh_checks(&env).pop().unwrap();
    assert_eq!(last["verdict"], "regressed", "{last}");
    assert!(env.log_json(&["--kind", "rolled-back"]).is_empty());
    assert_eq!(
        fs::read_to_string(env.state().join("serving")).unwrap(),
        "m000002\n"
    );
    let status = stdout(&env.run(&["status"]));
    assert!(
        status.contains("WARNING") && status.contains("regressed"),
        "{status}"
    );
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
