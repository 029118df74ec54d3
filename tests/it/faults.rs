//! Failures at named points (see `src/failpoint.rs`): a crash (abort) or an
//! I/O error such as a full disk at each step of intake and of a retrain
//! cycle. Each must leave no partial state, name the path and the cause,
//! and recover cleanly once the fault is gone.

use std::fs;
use std::path::PathBuf;

use crate::support::{Env, code, data, repo, stderr, stdout};

fn faulty(env: &Env, point: &str, action: &str, args: &[&str]) -> std::process::Output {
    env.command()
        .env("TIDEGATE_FAILPOINTS", format!("{point}={action}"))
        .args(args)
        .output()
        .unwrap()
}

fn rows_in(file: &std::path::Path) -> u64 {
    fs::read_to_string(file).unwrap().lines().count() as u64 - 1
}

fn pending_files(env: &Env) -> Vec<String> {
    fs::read_dir(env.state().join("archive"))
        .unwrap()
        .map(|e| e.unwrap().file_name().to_string_lossy().into_owned())
        .filter(|n| n.starts_with('.'))
        .collect()
}

#[test]
fn a_crash_at_any_step_of_intake_stores_the_file_exactly_once() {
    let file = data("good/plain.csv");
    for point in [
        "intake:after-validate",
        "intake:after-pending",
        "intake:after-commit",
        "intake:after-audit",
    ] {
        let env = Env::new(&data("small.toml"));
        let out = faulty(&env, point, "abort", &["ingest", file.to_str().unwrap()]);
        assert_ne!(code(&out), 0, "{point}: the process died");
        assert!(stderr(&out).contains(point), "{point}: {}", stderr(&out));
        // The next run recovers and takes (or finishes taking) the file.
        let out = env.ingest(std::slice::from_ref(&file));
        assert_eq!(code(&out), 0, "{point}: {}", stderr(&out));
        let again = env.ingest(std::slice::from_ref(&file));
        assert!(
            stdout(&again).contains("duplicate"),
            "{point}: {}",
            stdout(&again)
        );
        let s = env.status_json();
        assert_eq!(s["summary"]["batches"], 1, "{point}");
        assert_eq!(s["summary"]["rows"], rows_in(&file), "{point}: stored once");
        assert!(
            pending_files(&env).is_empty(),
            "{point}: {:?}",
            pending_files(&env)
        );
        let v = env.run(&["verify"]);
        assert_eq!(code(&v), 0, "{point}: {}", stdout(&v));
    }
}

#[test]
fn a_full_disk_during_intake_is_reported_and_leaves_nothing_behind() {
    let env = Env::new(&data("small.toml"));
    let file = data("good/plain.csv");
    for (point, action, cause) in [
        ("intake:after-pending", "enospc", "No space left on device"),
        ("intake:after-validate", "eio", "Input/output error"),
    ] {
        let out = faulty(&env, point, action, &["ingest", file.to_str().unwrap()]);
        assert_eq!(code(&out), 1, "{point}");
        let err = stderr(&out);
        assert!(err.contains(cause), "{point}: {err}");
        assert!(
            err.contains("plain.csv") || err.contains("archive"),
            "{point} names the path: {err}"
        );
        assert_eq!(
            env.status_json()["summary"]["rows"],
            0,
            "{point}: nothing stored"
        );
    }
    // Once the fault is gone the file goes in, and the stale pending copy
    // is cleared by recovery.
    let out = env.ingest(std::slice::from_ref(&file));
    assert_eq!(code(&out), 0, "{}", stderr(&out));
    assert!(pending_files(&env).is_empty(), "{:?}", pending_files(&env));
    assert_eq!(env.status_json()["summary"]["rows"], rows_in(&file));
    assert_eq!(code(&env.run(&["verify"])), 0);
}

fn demo_env() -> Env {
    let env = Env::new(&repo("demo-data/tidegate.toml"));
    let files: Vec<PathBuf> = ["01", "02", "03"]
        .iter()
        .map(|n| repo(&format!("demo-data/night-{n}.csv")))
        .collect();
    assert_eq!(code(&env.ingest(&files)), 0);
    env
}

#[test]
fn a_crash_inside_a_cycle_never_leaves_a_half_promoted_model() {
    for (point, promoted) in [
        ("cycle:mid-checkpoint", false),
        ("cycle:before-promote", false),
        ("cycle:after-promote", true),
    ] {
        let env = demo_env();
        let out = faulty(&env, point, "abort", &["retrain"]);
        assert_ne!(code(&out), 0, "{point}");
        // The next owner recovers: an unfinished cycle is logged as
        // abandoned; a promotion whose transaction committed stands, and
        // its audit line and serving file are restored. (A dry run opens
        // the state dir as owner and changes nothing else.)
        let out = env.run(&["retrain", "--dry-run"]);
        assert_eq!(code(&out), 0, "{point}: {}", stderr(&out));
        let s = env.status_json();
        let serving = s["summary"]["serving"].clone();
        if promoted {
            assert_eq!(serving, 1, "{point}: the committed promotion stands");
            assert_eq!(
                fs::read_to_string(env.state().join("serving")).unwrap(),
                "m000001\n"
            );
        } else {
            assert!(serving.is_null(), "{point}: nothing serves: {s}");
            let kinds: Vec<String> = env
                .log_json(&[])
                .iter()
                .map(|e| e["kind"].as_str().unwrap().to_string())
                .collect();
            assert!(
                kinds.contains(&"cycle-abandoned".to_string()),
                "{point}: {kinds:?}"
            );
        }
        assert_eq!(code(&env.run(&["verify"])), 0, "{point}");
        // And the next cycle runs normally.
        let out = env.run(&["retrain"]);
        assert_eq!(code(&out), 0, "{point}: {}", stderr(&out));
        assert_eq!(code(&env.run(&["verify"])), 0, "{point}");
    }
}

#[test]
fn a_failure_during_recovery_is_reported_and_the_next_start_recovers() {
    let env = Env::new(&data("small.toml"));
    let out = faulty(
        &env,
        "state:during-recovery",
        "eio",
        &["ingest", data("good/plain.csv").to_str().unwrap()],
    );
    assert_eq!(code(&out), 1);
    assert!(
        stderr(&out).contains("Input/output error"),
        "{}",
        stderr(&out)
    );
    assert_eq!(code(&env.ingest(&[data("good/plain.csv")])), 0);
    assert_eq!(code(&env.run(&["verify"])), 0);
}

/// `fresh-checked` entries of `batch` in the log.
fn fresh_checks_of(env: &Env, batch: u64) -> usize {
    env.log_json(&[])
        .iter()
        .filter(|e| e["kind"] == "fresh-checked" && e["check"]["batch"] == batch)
        .count()
}

/// A new file of the tiny schema in the env's temp dir.
fn tiny_file(env: &Env, name: &str, from: usize) -> PathBuf {
    let file = env.state().parent().unwrap().join(name);
    fs::write(&file, crate::support::tiny_rows(from, 200)).unwrap();
    file
}

#[test]
fn a_crash_between_the_commit_and_the_fresh_check_is_made_good_at_the_next_start() {
    let env = Env::tiny_with_model();
    let file = tiny_file(&env, "rows-3.csv", 600);
    let out = faulty(
        &env,
        "fresh:before-check",
        "abort",
        &["ingest", file.to_str().unwrap()],
    );
    assert_ne!(code(&out), 0, "{}", stderr(&out));
    assert_eq!(fresh_checks_of(&env, 4), 0, "the check never ran");
    // Any owner's start runs the missing check, once: the second start
    // finds it recorded.
    for _ in 0..2 {
        let out = env.ingest(std::slice::from_ref(&file));
        assert_eq!(code(&out), 0, "{}", stderr(&out));
        assert!(stdout(&out).contains("duplicate"), "{}", stdout(&out));
        assert_eq!(fresh_checks_of(&env, 4), 1);
    }
    assert_eq!(code(&env.run(&["verify"])), 0);
}

#[test]
fn an_io_error_recording_a_fresh_check_ends_the_command_and_reuses_no_sequence_number() {
    let env = Env::tiny_with_model();
    let files = [
        tiny_file(&env, "rows-3.csv", 600),
        tiny_file(&env, "rows-4.csv", 800),
    ];
    // Flush 1 is the batch's commit, flush 2 its fresh-data check's entry.
    let out = env
        .command()
        .env("TIDEGATE_FAILPOINTS", "store:before-flush=eio@2")
        .arg("ingest")
        .args(&files)
        .output()
        .unwrap();
    assert_eq!(code(&out), 1, "{}\n{}", stdout(&out), stderr(&out));
    assert!(
        stderr(&out).contains("Input/output error") && stderr(&out).contains("fresh-data check"),
        "{}",
        stderr(&out)
    );
    // The command stopped: the second file was not taken.
    assert_eq!(env.status_json()["summary"]["rows"], 800);
    let out = env.ingest(&files);
    assert_eq!(code(&out), 0, "{}", stderr(&out));
    assert_eq!(env.status_json()["summary"]["rows"], 1000);
    assert_eq!(code(&env.run(&["verify"])), 0);
    let seqs: Vec<u64> = env
        .log_json(&[])
        .iter()
        .map(|e| e["seq"].as_u64().unwrap())
        .collect();
    assert_eq!(seqs, (1..=seqs.len() as u64).collect::<Vec<_>>());
    for batch in [4, 5] {
        assert_eq!(fresh_checks_of(&env, batch), 1, "{batch}");
    }
}

/// Makes the model that does not serve serve by a recorded promotion, with
/// a fresh-data monitor holding 30 batches on which it did far worse than
/// the model it replaced: the next batch's check rolls back. (Written with
/// the library while no process owns the state dir.)
fn promote_with_evidence_of_regression(env: &Env) -> (u64, u64) {
    use tidegate::fresh::{META_MONITOR, MonitorState};
    use tidegate::gate::monitor::{self, Prior};
    use tidegate::ids::ModelId;
    use tidegate::store::{META_SERVING, Store};
    let config = tidegate::config::Config::load(&env.state().join("tidegate.toml")).unwrap();
    let mut store = Store::open(
        &env.state().join("store"),
        &tidegate::schema::Schema::from_config(&config),
        &config.schema_fingerprint(),
    )
    .unwrap();
    let serving = store.serving().unwrap().unwrap();
    let other = ModelId(if serving.0 == 1 { 2 } else { 1 });
    // A day-to-day variance of 0.05, so that one ordinary batch (a log
    // ratio near 0) does not outweigh thirty bad ones (e times the loss).
    let prior = Prior::new(0.05);
    let mut observations = Vec::new();
    for _ in 0..30 {
        observations.push(monitor::observe(&prior, &observations, 1.0, 1e-4));
    }
    let state = MonitorState {
        serving: other,
        previous: Some(serving),
        prior,
        observations,
    };
    let event = tidegate::audit::Event::Promoted {
        cycle: 99,
        model: other,
        previous: Some(serving),
        evidence: tidegate::audit::GateEvidence::without_test(
            100,
            1.0,
            0.9,
            "set up by the test".into(),
        ),
    };
    store
        .record_with_meta(
            event,
            "tester",
            chrono::Utc::now(),
            &[
                (META_SERVING, Some(other.key().to_vec())),
                (META_MONITOR, Some(state.encode())),
            ],
        )
        .unwrap();
    (other.0, serving.0)
}

#[test]
fn an_io_error_during_an_automatic_rollback_ends_the_command_and_the_next_start_is_consistent() {
    let env = Env::tiny_with_model();
    // A second model on disk (promoted or kept).
    let out = env.ingest(&[tiny_file(&env, "rows-3.csv", 600)]);
    assert_eq!(code(&out), 0, "{}", stderr(&out));
    let out = env.run(&["retrain"]);
    assert_eq!(code(&out), 0, "{}", stderr(&out));
    let (from, to) = promote_with_evidence_of_regression(&env);
    let file = tiny_file(&env, "rows-4.csv", 800);
    // Flush 1: the batch; 2: its check's entry; 3: the rollback.
    let out = env
        .command()
        .env("TIDEGATE_FAILPOINTS", "store:before-flush=eio@3")
        .arg("ingest")
        .arg(&file)
        .output()
        .unwrap();
    assert_eq!(
        code(&out),
        1,
        "{}\n{}\n{:?}",
        stdout(&out),
        stderr(&out),
        env.log_json(&["--kind", "fresh-checked"])
    );
    assert!(
        stderr(&out).contains("Input/output error"),
        "{}",
        stderr(&out)
    );
    // The next start finds a consistent state: the rollback happened with
    // its entry or not at all, and the pointer agrees with the log.
    let out = env.ingest(std::slice::from_ref(&file));
    assert_eq!(code(&out), 0, "{}", stderr(&out));
    assert_eq!(code(&env.run(&["verify"])), 0);
    let log = env.log_json(&[]);
    let rollbacks: Vec<_> = log.iter().filter(|e| e["kind"] == "rolled-back").collect();
    assert!(rollbacks.len() <= 1, "{rollbacks:?}");
    let serving = env.status_json()["summary"]["serving"].as_u64().unwrap();
    let checks: Vec<_> = log
        .iter()
        .filter(|e| e["kind"] == "fresh-checked")
        .map(|e| e["check"]["reason"].to_string())
        .collect();
    assert_eq!(
        serving,
        if rollbacks.is_empty() { from } else { to },
        "{checks:?}"
    );
    let seqs: Vec<u64> = log.iter().map(|e| e["seq"].as_u64().unwrap()).collect();
    assert_eq!(seqs, (1..=seqs.len() as u64).collect::<Vec<_>>());
    // Without the failure, the same state rolls back: the path was reached.
    let out = env.ingest(&[tiny_file(&env, "rows-5.csv", 1000)]);
    assert_eq!(code(&out), 0, "{}", stderr(&out));
    if rollbacks.is_empty() {
        assert!(
            stdout(&out).contains("rolled back")
                || env.log_json(&[]).iter().any(|e| e["kind"] == "rolled-back"),
            "{}",
            stdout(&out)
        );
    }
}
