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
