//! Holes found by review and by running the CLI as a new user: a damaged
//! row file, a path with no file name, numbers that overflow into the
//! audit log, the acting user of a routed command.

use crate::support::{Env, TINY_CONFIG, code, stderr, stdout, tiny_rows};

#[test]
fn a_damaged_row_file_is_reported_as_a_damaged_store_not_a_panic() {
    let env = Env::with_config_text(TINY_CONFIG);
    let file = env.dir.path().join("rows.csv");
    std::fs::write(&file, tiny_rows(0, 300)).unwrap();
    assert_eq!(code(&env.ingest(&[file])), 0);
    let row_file = std::fs::read_dir(env.state().join("rows"))
        .unwrap()
        .map(|e| e.unwrap().path())
        .find(|p| p.extension().is_some_and(|x| x == "parquet"))
        .expect("a row file");
    // Bytes that are no Parquet file at all, then a file cut short.
    for damage in [b"not parquet at all".to_vec(), {
        let mut b = std::fs::read(&row_file).unwrap();
        b.truncate(b.len() / 2);
        b
    }] {
        std::fs::write(&row_file, &damage).unwrap();
        let out = env.run(&["retrain"]);
        assert_eq!(code(&out), 1, "{}", stderr(&out));
        let name = row_file.file_name().unwrap().to_string_lossy().into_owned();
        assert!(
            stderr(&out).contains("is damaged") && stderr(&out).contains(&name),
            "{}",
            stderr(&out)
        );
    }
}

#[test]
fn a_path_with_no_file_name_keeps_its_reasons_inside_the_state_dir() {
    let env = Env::with_config_text(TINY_CONFIG);
    let sub = env.dir.path().join("sub");
    std::fs::create_dir(&sub).unwrap();
    // `sub/..` names a directory and has no last component of its own.
    let out = env
        .command()
        .arg("ingest")
        .arg(sub.join(".."))
        .output()
        .unwrap();
    assert_eq!(code(&out), 65, "{}", stderr(&out));
    let outside: Vec<String> = std::fs::read_dir(&sub)
        .unwrap()
        .map(|e| e.unwrap().file_name().to_string_lossy().into_owned())
        .collect();
    assert!(
        outside.is_empty(),
        "written outside the state dir: {outside:?}"
    );
    let why: Vec<String> = std::fs::read_dir(env.state().join("refused"))
        .unwrap()
        .map(|e| e.unwrap().file_name().to_string_lossy().into_owned())
        .filter(|n| n.ends_with(".why.json"))
        .collect();
    assert_eq!(why.len(), 1, "{why:?}");
}

/// A number column with no `max` lets a batch carry values near f32::MAX;
/// the model's output and the losses of the fresh-data check overflow.
/// Whatever lands in the audit log must read back: `verify`, `status`,
/// `log` and the next start all work.
#[test]
fn an_overflowing_model_output_leaves_a_readable_audit_log() {
    let env = Env::tiny_with_model();
    let file = env.dir.path().join("huge.csv");
    let mut text = String::from("count,temp,town,y\n");
    for i in 0..150 {
        text.push_str(&format!("3.4e38,{}.5,Arden,{}\n", i % 30, i));
    }
    std::fs::write(&file, text).unwrap();
    let out = env.ingest(&[file]);
    assert_eq!(code(&out), 0, "{}", stderr(&out));
    let log = env.log_json(&["--kind", "fresh-checked"]);
    let check = &log.last().expect("a fresh check was logged")["check"];
    let loss = &check["mean_loss_serving"];
    assert!(
        loss.is_string() || loss.as_f64().is_some_and(|x| !x.is_finite()),
        "the overflow is recorded as a marker: {check}"
    );
    for args in [&["verify"][..], &["status"], &["log"], &["models"]] {
        let out = env.run(args);
        assert_eq!(code(&out), 0, "{args:?}: {}{}", stdout(&out), stderr(&out));
    }
    // The next owner start reads the last entry back from the store.
    let more = env.dir.path().join("more.csv");
    std::fs::write(&more, tiny_rows(1000, 20)).unwrap();
    let out = env.ingest(&[more]);
    assert_eq!(code(&out), 0, "{}", stderr(&out));
}

#[test]
fn status_names_inbox_entries_the_daemon_leaves_alone() {
    let env = Env::with_config_text(TINY_CONFIG);
    let inbox = env.state().join("inbox");
    std::fs::write(inbox.join(".night-08.csv"), "x").unwrap();
    std::fs::write(inbox.join("night-09.csv.part"), "x").unwrap();
    std::fs::write(inbox.join(".tmp/night-10.csv"), "x").unwrap();
    std::fs::write(inbox.join("night-11.csv"), "x").unwrap();
    let out = env.run(&["status"]);
    assert_eq!(code(&out), 0, "{}", stderr(&out));
    let text = stdout(&out);
    assert!(text.contains("inbox       1 waiting"), "{text}");
    assert!(
        text.contains("ignored until renamed")
            && text.contains(".night-08.csv")
            && text.contains("night-09.csv.part")
            && text.contains(".tmp/night-10.csv"),
        "{text}"
    );
    let v = env.status_json();
    assert_eq!(v["inbox"]["waiting"], serde_json::json!(["night-11.csv"]));
    assert_eq!(v["inbox"]["being_written"].as_array().unwrap().len(), 3);
}

/// Messages a new user met: an encoding problem named as such, a whole-file
/// problem without a "line 0", a missing file's cause said once, and every
/// refusal on stderr as well as in the per-file result on stdout.
#[test]
fn refusal_and_error_messages_say_what_is_wrong_once_and_on_stderr() {
    let env = Env::with_config_text(TINY_CONFIG);
    let dir = env.dir.path();
    // Windows-1252 text with a comma the producer did not quote: the count
    // is off, and the cause is the encoding.
    let latin = dir.join("latin.csv");
    std::fs::write(&latin, b"count,temp,town,y\n1,3,Caf\xe9, Ost,4\n").unwrap();
    let out = env.ingest(std::slice::from_ref(&latin));
    assert_eq!(code(&out), 65);
    assert!(
        stdout(&out).contains("latin.csv: refused")
            && stdout(&out).contains("not valid UTF-8")
            && stdout(&out).contains("save it as UTF-8"),
        "{}",
        stdout(&out)
    );
    assert!(
        stderr(&out).starts_with("error: ") && stderr(&out).contains("not valid UTF-8"),
        "the refusal is on stderr too: {}",
        stderr(&out)
    );
    let empty = dir.join("empty.csv");
    std::fs::write(&empty, b"").unwrap();
    let out = env.ingest(&[empty]);
    assert_eq!(code(&out), 65);
    assert!(!stdout(&out).contains("line 0"), "{}", stdout(&out));
    assert!(
        stdout(&out).contains(": the file is empty"),
        "{}",
        stdout(&out)
    );
    let out = env.ingest(&[dir.join("missing.csv")]);
    assert_eq!(code(&out), 1);
    assert_eq!(
        stderr(&out).matches("No such file or directory").count(),
        1,
        "{}",
        stderr(&out)
    );
    // A failed check: the result on stdout, the reason on stderr.
    let log = env.state().join("audit.jsonl");
    let text = std::fs::read_to_string(&log).unwrap();
    std::fs::write(&log, text.replacen("tester", "mallory", 1)).unwrap();
    let out = env.run(&["verify"]);
    assert_eq!(code(&out), 1);
    assert!(stdout(&out).starts_with("problem: "), "{}", stdout(&out));
    assert!(
        stderr(&out).starts_with("error: verify found a problem: audit entry #1"),
        "{}",
        stderr(&out)
    );
}
