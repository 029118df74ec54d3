//! A state dir written before the names were settled (refused files in
//! `rejected/`, logged as `batch-rejected`) opens, verifies and reads, and
//! its first owner moves the folder to `refused/` and logs the move.

use std::fs;

use crate::support::{Env, code, repo, stderr, stdout};

/// Rewrites the last audit entry, in the store and in `audit.jsonl`, as a
/// version before the renames wrote it, with its hash over the line as
/// written (the audit log's rule), and moves `refused/` back to `rejected/`.
fn make_it_old(env: &Env) {
    let db = sled::Config::new()
        .path(env.state().join("store"))
        .mode(sled::Mode::HighThroughput)
        .open()
        .unwrap();
    let audit = db.open_tree("audit").unwrap();
    let (key, line) = audit.last().unwrap().unwrap();
    let mut value: serde_json::Value = serde_json::from_slice(&line).unwrap();
    assert_eq!(value["kind"], "batch-refused", "{value}");
    value["kind"] = "batch-rejected".into();
    value["kept_as"] = "rejected/night-05.csv".into();
    value.as_object_mut().unwrap().remove("hash");
    // serde_json keeps object keys sorted: the canonical form.
    let hash = blake3::hash(&serde_json::to_vec(&value).unwrap())
        .to_hex()
        .to_string();
    value["hash"] = hash.into();
    let old_line = serde_json::to_vec(&value).unwrap();
    audit.insert(key, old_line.clone()).unwrap();
    db.flush().unwrap();
    drop(audit);
    drop(db);
    let path = env.state().join("audit.jsonl");
    let text = fs::read(&path).unwrap();
    let body = &text[..text.len() - 1];
    let last_start = body.iter().rposition(|&b| b == b'\n').map_or(0, |i| i + 1);
    let mut rewritten = text[..last_start].to_vec();
    rewritten.extend_from_slice(&old_line);
    rewritten.push(b'\n');
    fs::write(&path, rewritten).unwrap();
    fs::rename(env.state().join("refused"), env.state().join("rejected")).unwrap();
}

#[test]
fn an_old_state_dir_reads_verifies_and_moves_its_refused_folder_once() {
    let env = Env::new(&repo("demo-data/tidegate.toml"));
    let out = env.ingest(&[repo("demo-data/night-05.csv")]);
    assert_eq!(code(&out), 65, "{}", stderr(&out));
    make_it_old(&env);
    let old = env.state().join("rejected");

    // Read-only commands read it as it is; verify checks the old line's
    // hash as written.
    let out = env.run(&["verify"]);
    assert_eq!(code(&out), 0, "{}{}", stdout(&out), stderr(&out));
    assert!(old.join("night-05.csv.why.json").exists());
    for kind in ["batch-refused", "batch-rejected"] {
        let log = env.log_json(&["--kind", kind]);
        assert_eq!(log.len(), 1, "{kind}");
        assert_eq!(log[0]["kind"], "batch-refused");
        assert_eq!(log[0]["kept_as"], "rejected/night-05.csv");
    }
    assert_eq!(env.status_json()["summary"]["refused_files"], 1);
    assert!(old.is_dir(), "a read-only command moved the folder");

    // The first owner moves the folder, logs it, and writes to the new one.
    let out = env.ingest(&[repo("demo-data/night-01.csv")]);
    assert_eq!(code(&out), 0, "{}", stderr(&out));
    assert!(!old.exists());
    let refused = env.state().join("refused");
    assert!(refused.join("night-05.csv").is_file());
    assert!(refused.join("night-05.csv.why.json").is_file());
    let moved = env.log_json(&["--kind", "folder-renamed"]);
    assert_eq!(moved.len(), 1);
    assert_eq!(
        (&moved[0]["from"], &moved[0]["to"], &moved[0]["files"]),
        (
            &serde_json::json!("rejected"),
            &serde_json::json!("refused"),
            &serde_json::json!(2)
        )
    );
    let late = env.dir.path().join("night-05-again.csv");
    let mut bytes = fs::read(repo("demo-data/night-05.csv")).unwrap();
    bytes.extend_from_slice(b"\n");
    fs::write(&late, bytes).unwrap();
    let out = env.ingest(&[late]);
    assert_eq!(code(&out), 65);
    assert!(refused.join("night-05-again.csv.why.json").is_file());
    assert!(!old.exists());
    let log = env.log_json(&["--kind", "batch-refused"]);
    assert_eq!(log[1]["kept_as"], "refused/night-05-again.csv");
    // Moved once: later owners find nothing to move.
    assert_eq!(env.log_json(&["--kind", "folder-renamed"]).len(), 1);
    let out = env.run(&["verify"]);
    assert_eq!(code(&out), 0, "{}{}", stdout(&out), stderr(&out));
    let out = env.run(&["status"]);
    assert!(
        stdout(&out).contains("files       2 refused, 0 duplicates"),
        "{}",
        stdout(&out)
    );
}
