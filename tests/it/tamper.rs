//! `verify` finds edits, deletions, insertions and reorderings of the audit
//! log, and changed archive files, naming the first bad entry.

use std::fs;

use crate::support::{Env, code, data, stdout};

fn three_batches() -> Env {
    let env = Env::new(&data("small.toml"));
    let out = env.ingest(&[
        data("good/plain.csv"),
        data("good/reordered-columns.csv"),
        data("good/spaces.csv"),
    ]);
    assert_eq!(code(&out), 0);
    env
}

fn log_lines(env: &Env) -> Vec<String> {
    fs::read_to_string(env.state().join("audit.jsonl"))
        .unwrap()
        .lines()
        .map(str::to_string)
        .collect()
}

fn write_log(env: &Env, lines: &[String]) {
    fs::write(env.state().join("audit.jsonl"), lines.join("\n") + "\n").unwrap();
}

/// Runs verify and returns the first bad sequence number it names.
fn first_bad(env: &Env) -> Option<u64> {
    let out = env.run(&["--json", "verify"]);
    let v: serde_json::Value = serde_json::from_str(stdout(&out).trim()).unwrap();
    if v["ok"] == true {
        assert_eq!(code(&out), 0);
        None
    } else {
        assert_eq!(code(&out), 1);
        Some(v["problem"]["seq"].as_u64().unwrap_or(0))
    }
}

#[test]
fn intact_state_verifies() {
    let env = three_batches();
    let out = env.run(&["verify"]);
    assert_eq!(code(&out), 0);
    assert_eq!(
        stdout(&out),
        "ok: 4 audit entries, 3 batches, 6 rows, 0 checkpoints; chain, store, archive and checkpoints agree\n"
    );
}

#[test]
fn edited_entry_is_found() {
    let env = three_batches();
    let mut lines = log_lines(&env);
    lines[2] = lines[2].replace("\"rows\":2", "\"rows\":20");
    write_log(&env, &lines);
    assert_eq!(first_bad(&env), Some(3));
}

#[test]
fn deleted_entry_is_found() {
    let env = three_batches();
    let mut lines = log_lines(&env);
    lines.remove(1);
    write_log(&env, &lines);
    assert_eq!(first_bad(&env), Some(2));
}

#[test]
fn reordered_entries_are_found() {
    let env = three_batches();
    let mut lines = log_lines(&env);
    lines.swap(2, 3);
    write_log(&env, &lines);
    assert_eq!(first_bad(&env), Some(3));
}

#[test]
fn inserted_entry_is_found() {
    let env = three_batches();
    let mut lines = log_lines(&env);
    let copy = lines[1].clone();
    lines.insert(2, copy);
    write_log(&env, &lines);
    assert_eq!(first_bad(&env), Some(3));
}

#[test]
fn truncated_log_is_found_against_the_store() {
    let env = three_batches();
    let lines = log_lines(&env);
    write_log(&env, &lines[..2]);
    assert_eq!(first_bad(&env), Some(3));
    // An owner's start re-appends what the store has, and all agrees again.
    let out = env.ingest(&[data("good/plain.csv")]);
    assert_eq!(code(&out), 0);
    assert_eq!(first_bad(&env), None);
}

#[test]
fn changed_archive_file_is_found() {
    let env = three_batches();
    let p = env.state().join("archive/b000002.csv");
    let mut bytes = fs::read(&p).unwrap();
    bytes[0] ^= 1;
    fs::write(&p, bytes).unwrap();
    assert_eq!(first_bad(&env), Some(3), "batch 2 was logged as entry 3");
}

#[test]
fn changed_checkpoint_is_found() {
    let env = Env::new(&crate::support::repo("demo-data/tidegate.toml"));
    let out = env.ingest(&[
        crate::support::repo("demo-data/night-01.csv"),
        crate::support::repo("demo-data/night-02.csv"),
    ]);
    assert_eq!(code(&out), 0);
    assert_eq!(code(&env.run(&["retrain"])), 0);
    assert_eq!(first_bad(&env), None);
    let weights = env.state().join("models/m000001/weights.bpk");
    let mut bytes = fs::read(&weights).unwrap();
    let mid = bytes.len() / 2;
    bytes[mid] ^= 0x10;
    fs::write(&weights, bytes).unwrap();
    // Entry 5 is the candidate-trained entry of m000001 (after initialized,
    // two batches and cycle-started).
    assert_eq!(first_bad(&env), Some(5));
}
