//! Backup, restore, and rebuilding a store from its archive.

use std::fs;
use std::path::PathBuf;

use crate::support::{Env, code, repo, stderr, stdout};

fn night(n: &str) -> PathBuf {
    repo(&format!("demo-data/night-{n}.csv"))
}

fn demo_state() -> Env {
    let env = Env::new(&repo("demo-data/tidegate.toml"));
    let files: Vec<PathBuf> = ["01", "02", "03", "04", "05", "06"]
        .iter()
        .map(|n| night(n))
        .collect();
    assert_eq!(code(&env.ingest(&files)), 65, "night 5 is refused");
    let out = env.run(&["retrain"]);
    assert_eq!(code(&out), 0, "{}", stderr(&out));
    env
}

fn run_on(state: &std::path::Path, args: &[&str]) -> std::process::Output {
    std::process::Command::new(env!("CARGO_BIN_EXE_tidegate"))
        .arg("--state")
        .arg(state)
        .args(args)
        .env("USER", "tester")
        .env_remove("TIDEGATE_STATE")
        .output()
        .unwrap()
}

#[test]
fn a_backup_restores_to_a_state_that_verifies_and_answers_the_same() {
    let env = demo_state();
    let out_dir = env.dir.path().join("backup-1");
    let out = env.run(&["backup", "--out", out_dir.to_str().unwrap()]);
    assert_eq!(code(&out), 0, "{}", stderr(&out));
    assert!(out_dir.join("backup.json").is_file());
    // The live state logged the backup, and a second one into the same
    // folder is refused.
    assert_eq!(env.log_json(&["--kind", "backup-made"]).len(), 1);
    let again = env.run(&["backup", "--out", out_dir.to_str().unwrap()]);
    assert_eq!(code(&again), 1);
    assert!(stderr(&again).contains("not empty"), "{}", stderr(&again));

    let restored = env.dir.path().join("restored");
    let out = run_on(&restored, &["restore", "--from", out_dir.to_str().unwrap()]);
    assert_eq!(code(&out), 0, "{}", stderr(&out));
    assert!(stdout(&out).contains("verify passed"), "{}", stdout(&out));
    let status = |state: &std::path::Path| -> serde_json::Value {
        serde_json::from_str(stdout(&run_on(state, &["--json", "status"])).trim()).unwrap()
    };
    let (a, b) = (status(&env.state()), status(&restored));
    for key in [
        "rows",
        "batches",
        "train_rows",
        "holdout_rows",
        "serving",
        "refused_files",
    ] {
        assert_eq!(a["summary"][key], b["summary"][key], "{key}");
    }
    assert_eq!(code(&run_on(&restored, &["verify"])), 0);
    let log = stdout(&run_on(&restored, &["--json", "log", "--kind", "restored"]));
    assert_eq!(log.lines().count(), 1, "{log}");
    // The restored state predicts exactly as the original.
    let predict = |state: &std::path::Path| {
        stdout(&run_on(
            state,
            &["predict", "--input", night("07").to_str().unwrap()],
        ))
    };
    assert_eq!(predict(&env.state()), predict(&restored));
}

#[test]
fn a_damaged_backup_is_refused_before_anything_is_written() {
    let env = demo_state();
    let out_dir = env.dir.path().join("backup");
    assert_eq!(
        code(&env.run(&["backup", "--out", out_dir.to_str().unwrap()])),
        0
    );
    let archived = out_dir.join("archive/b000002.csv");
    let mut bytes = fs::read(&archived).unwrap();
    bytes[100] ^= 1;
    fs::write(&archived, bytes).unwrap();
    let restored = env.dir.path().join("restored");
    let out = run_on(&restored, &["restore", "--from", out_dir.to_str().unwrap()]);
    assert_eq!(code(&out), 1);
    assert!(stderr(&out).contains("b000002.csv"), "{}", stderr(&out));
    assert!(stderr(&out).contains("does not match"), "{}", stderr(&out));
    assert!(!restored.exists(), "nothing written");
    // A folder without a manifest is not a backup.
    fs::remove_file(out_dir.join("backup.json")).unwrap();
    let out = run_on(&restored, &["restore", "--from", out_dir.to_str().unwrap()]);
    assert!(
        stderr(&out).contains("not a finished backup"),
        "{}",
        stderr(&out)
    );
}

#[test]
fn rebuilding_from_the_archive_gives_the_same_rows_and_holdout_split() {
    // The archive holds every accepted file's exact bytes: ingesting them in
    // batch order into a new state dir must reproduce each batch's row
    // counts and train/holdout split (membership is a hash of row content).
    let env = demo_state();
    let fresh = Env::new(&repo("demo-data/tidegate.toml"));
    let mut archived: Vec<PathBuf> = fs::read_dir(env.state().join("archive"))
        .unwrap()
        .map(|e| e.unwrap().path())
        .filter(|p| p.extension().is_some_and(|x| x == "csv"))
        .collect();
    archived.sort();
    assert_eq!(archived.len(), 5);
    assert_eq!(code(&fresh.ingest(&archived)), 0);
    let split = |env: &Env| -> Vec<(u64, u64, u64)> {
        env.log_json(&["--kind", "batch-accepted"])
            .iter()
            .map(|e| {
                (
                    e["batch"].as_u64().unwrap(),
                    e["train_rows"].as_u64().unwrap(),
                    e["holdout_rows"].as_u64().unwrap(),
                )
            })
            .collect()
    };
    assert_eq!(split(&env), split(&fresh));
    let hashes = |env: &Env| -> Vec<String> {
        env.log_json(&["--kind", "batch-accepted"])
            .iter()
            .map(|e| e["file_hash"].as_str().unwrap().to_string())
            .collect()
    };
    assert_eq!(hashes(&env), hashes(&fresh));
}
