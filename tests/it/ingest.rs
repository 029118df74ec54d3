//! The intake path through the real binary: accepted, duplicate and refused
//! files, the malformed-input set, the owner lock, `status` and `log`.

use std::fs;

use tidegate::config::Config;
use tidegate::state::{self, StateDir};

use crate::support::{Env, code, data, repo, stderr, stdout};

fn small() -> Env {
    Env::new(&data("small.toml"))
}

/// Rows in the store according to `status --json`.
fn stored_rows(env: &Env) -> u64 {
    env.status_json()["summary"]["rows"].as_u64().unwrap()
}

#[test]
fn accepts_then_reports_duplicate() {
    let env = small();
    let out = env.ingest(&[data("good/plain.csv")]);
    assert_eq!(code(&out), 0, "{}", stderr(&out));
    assert!(
        stdout(&out).contains("accepted: batch b000001 with 3 rows"),
        "{}",
        stdout(&out)
    );
    // The same bytes under another name are a duplicate.
    let copy = env.dir.path().join("again.csv");
    fs::copy(data("good/plain.csv"), &copy).unwrap();
    let out = env.ingest(std::slice::from_ref(&copy));
    assert_eq!(code(&out), 0);
    assert!(
        stdout(&out).contains("duplicate of batch b000001; nothing stored"),
        "{}",
        stdout(&out)
    );
    assert_eq!(stored_rows(&env), 3);
    let dups = env.log_json(&["--kind", "batch-duplicate"]);
    assert_eq!(dups.len(), 1);
    assert_eq!(dups[0]["file"], "again.csv");
    assert_eq!(dups[0]["duplicate_of"], 1);
    // The accepted bytes are archived under the batch id; the source is left alone.
    assert_eq!(
        fs::read(env.state().join("archive/b000001.csv")).unwrap(),
        fs::read(data("good/plain.csv")).unwrap()
    );
    assert!(copy.exists());
}

#[test]
fn good_files_are_accepted_with_the_same_rows() {
    // BOM, CRLF, a missing final newline, reordered columns, quoting, blank
    // lines and spaces around values are all fine.
    let env = small();
    for name in [
        "bom.csv",
        "crlf.csv",
        "no-trailing-newline.csv",
        "reordered-columns.csv",
        "rfc4180-quoting.csv",
        "blank-lines.csv",
        "spaces.csv",
    ] {
        let out = env.ingest(&[data(&format!("good/{name}"))]);
        assert_eq!(code(&out), 0, "{name}: {}{}", stdout(&out), stderr(&out));
        assert!(
            stdout(&out).contains("accepted"),
            "{name}: {}",
            stdout(&out)
        );
    }
    // bom, crlf, no-trailing-newline, reordered and blank-lines hold the same
    // two rows, so the vocabulary of city is Oslo, Lima, then the quoted name.
    let s = env.status_json();
    let cities: Vec<&str> = s["summary"]["vocabularies"]["city"]
        .as_array()
        .unwrap()
        .iter()
        .map(|v| v.as_str().unwrap())
        .collect();
    assert_eq!(cities, vec!["Oslo", "Lima", "Oslo, Norway"]);
    assert_eq!(s["summary"]["rows"], 2 * 5 + 2 + 1);
}

/// (file, line, column, words the reason must contain)
const BAD: &[(&str, u64, Option<&str>, &str)] = &[
    ("empty.csv", 0, None, "the file is empty"),
    ("header-only.csv", 0, None, "header but no rows"),
    (
        "ragged-short.csv",
        3,
        None,
        "has 4 fields but the header has 5",
    ),
    (
        "ragged-long.csv",
        2,
        None,
        "has 6 fields but the header has 5",
    ),
    (
        "unterminated-quote.csv",
        3,
        None,
        "opened in this row is never closed",
    ),
    (
        "nan.csv",
        2,
        Some("temp"),
        "NaN and infinity are not accepted",
    ),
    ("inf.csv", 2, Some("y"), "NaN and infinity are not accepted"),
    (
        "overflow.csv",
        2,
        Some("y"),
        "NaN and infinity are not accepted",
    ),
    (
        "above-max.csv",
        2,
        Some("temp"),
        "above the column's max of 60",
    ),
    (
        "below-min.csv",
        2,
        Some("temp"),
        "below the column's min of -50",
    ),
    ("unknown-column.csv", 1, None, "unknown column(s): extra"),
    ("missing-column.csv", 1, None, "missing column(s): temp"),
    (
        "duplicate-header.csv",
        1,
        None,
        "column(s) named twice: city",
    ),
    ("wrong-type.csv", 2, Some("temp"), "not a number"),
    ("hex-number.csv", 2, Some("id"), "not a number"),
    ("decimal-comma.csv", 2, Some("temp"), "not a number"),
    (
        "missing-required.csv",
        2,
        Some("y"),
        "empty field in a required column",
    ),
    (
        "missing-required-category.csv",
        2,
        Some("city"),
        "empty field in a required column",
    ),
    (
        "huge-field.csv",
        2,
        Some("city"),
        "over the limit of 64 (data.max_field_bytes)",
    ),
    ("control-char.csv", 2, Some("city"), "control characters"),
    (
        "quoted-line-break.csv",
        2,
        Some("city"),
        "line breaks inside a value",
    ),
    ("invalid-utf8.csv", 2, Some("city"), "not valid UTF-8"),
    (
        "invalid-utf8-header.csv",
        1,
        None,
        "header is not valid UTF-8",
    ),
    ("nul-byte.csv", 2, None, "NUL byte"),
    ("utf16.csv", 1, None, "NUL byte"),
    ("binary.csv", 1, None, "NUL byte"),
    (
        "too-large.csv",
        0,
        None,
        "over the limit of 4096 bytes (data.max_file_bytes)",
    ),
    ("many-bad-rows.csv", 2, Some("temp"), "not a number"),
    ("bom-only.csv", 0, None, "no header line"),
    (
        "deep-quotes.csv",
        2,
        Some("city"),
        "over the limit of 64 (data.max_field_bytes)",
    ),
    ("empty-header-name.csv", 1, None, "missing column(s): city"),
    ("header-case.csv", 1, None, "unknown column(s): ID, Y"),
    (
        "header-field-too-long.csv",
        1,
        None,
        "expected these columns (any order)",
    ),
    ("hex-float.csv", 2, Some("temp"), "not a number"),
    (
        "huge-exponent.csv",
        2,
        Some("y"),
        "NaN and infinity are not accepted",
    ),
    (
        "missing-target.csv",
        3,
        Some("y"),
        "empty field in a required column",
    ),
    ("number-with-unit.csv", 2, Some("temp"), "not a number"),
    (
        "row-of-commas.csv",
        2,
        Some("id"),
        "empty field in a required column",
    ),
    (
        "semicolon-separated.csv",
        1,
        None,
        "unknown column(s): id;city;temp;flag;y",
    ),
    ("tab-separated.csv", 1, None, "missing column(s): id, city"),
    (
        "thousands-separator.csv",
        2,
        None,
        "has 6 fields but the header has 5",
    ),
    (
        "trailing-comma.csv",
        3,
        None,
        "has 6 fields but the header has 5",
    ),
    (
        "truncated-multibyte.csv",
        3,
        None,
        // The count is off because of the encoding, and the message says so.
        "the row is not valid UTF-8 (field 2, byte 2) and has 2 fields",
    ),
    ("whitespace-only.csv", 1, None, "missing column(s): id"),
];

#[test]
fn malformed_files_are_refused_whole_with_reasons() {
    let env = small();
    assert!(BAD.len() >= 40);
    let listed: std::collections::BTreeSet<String> = fs::read_dir(data("bad"))
        .unwrap()
        .map(|e| e.unwrap().file_name().to_string_lossy().into_owned())
        .collect();
    let covered: std::collections::BTreeSet<String> = BAD.iter().map(|b| b.0.to_string()).collect();
    assert_eq!(
        listed, covered,
        "every file under tests/data/bad has an expectation"
    );
    for (name, line, column, words) in BAD {
        let out = env.ingest(&[data(&format!("bad/{name}"))]);
        assert_eq!(code(&out), 65, "{name}: {}{}", stdout(&out), stderr(&out));
        let text = stdout(&out);
        assert!(text.contains(": refused: nothing stored"), "{name}: {text}");
        assert!(text.contains(words), "{name}: {text}");
        // The JSON form names line, column and reason.
        let out = env
            .command()
            .args(["--json", "ingest"])
            .arg(data(&format!("bad/{name}")))
            .output()
            .unwrap();
        let v: serde_json::Value = serde_json::from_str(stdout(&out).trim()).unwrap();
        assert_eq!(v["status"], "refused", "{name}");
        let first = &v["problems"][0];
        assert_eq!(first["line"], *line, "{name}: {first}");
        assert_eq!(first["column"].as_str(), *column, "{name}: {first}");
        assert!(
            first["reason"].as_str().unwrap().contains(words),
            "{name}: {first}"
        );
    }
    assert_eq!(
        stored_rows(&env),
        0,
        "nothing from a refused file is stored"
    );
    let s = env.status_json();
    assert_eq!(s["summary"]["batches"], 0);
    assert_eq!(s["summary"]["refused_files"], 2 * BAD.len());
    // Each refused file that could be read is kept with its reasons.
    let why: serde_json::Value = serde_json::from_slice(
        &fs::read(env.state().join("refused/many-bad-rows.csv.why.json")).unwrap(),
    )
    .unwrap();
    assert_eq!(why["problems_total"], 150);
    assert_eq!(why["problems_listed"], 100);
    assert_eq!(why["problems"][0]["value"], "hot");
    assert_eq!(
        fs::read(env.state().join("refused/many-bad-rows.csv")).unwrap(),
        fs::read(data("bad/many-bad-rows.csv")).unwrap()
    );
}

#[test]
fn refused_file_message_names_file_line_column_and_fix() {
    let env = Env::new(&repo("demo-data/tidegate.toml"));
    let out = env.ingest(&[repo("demo-data/night-05.csv")]);
    assert_eq!(code(&out), 65);
    assert_eq!(
        stdout(&out).trim(),
        format!(
            "{}: refused: nothing stored (3 problems): line 41, column \"temp_c\" (field 5), value \"n/a\": not a number; write a decimal number such as 12.5; all problems in refused/night-05.csv.why.json",
            repo("demo-data/night-05.csv").display()
        )
    );
    let log = env.log_json(&["--kind", "batch-refused"]);
    assert_eq!(log[0]["problems"], 3);
    assert_eq!(log[0]["kept_as"], "refused/night-05.csv");
}

#[test]
fn special_files_are_refused_without_reading() {
    let env = small();
    let dir = env.dir.path();
    std::os::unix::fs::symlink(data("good/plain.csv"), dir.join("link.csv")).unwrap();
    let out = env.ingest(&[dir.join("link.csv")]);
    assert_eq!(code(&out), 65);
    assert!(
        stdout(&out).contains("is a symbolic link"),
        "{}",
        stdout(&out)
    );
    let out = env.ingest(&[data("good")]);
    assert_eq!(code(&out), 65);
    assert!(
        stdout(&out).contains("not a regular file"),
        "{}",
        stdout(&out)
    );
    // A file that cannot be read at all is a failure of the run, not of the data.
    let out = env.ingest(&[dir.join("missing.csv")]);
    assert_eq!(code(&out), 1);
    assert!(
        stderr(&out).contains("missing.csv") && stderr(&out).contains("No such file"),
        "{}",
        stderr(&out)
    );
    assert_eq!(stored_rows(&env), 0);
}

#[test]
fn demo_batches_ingest_with_the_bad_night_refused() {
    let env = Env::new(&repo("demo-data/tidegate.toml"));
    let mut files: Vec<_> = fs::read_dir(repo("demo-data"))
        .unwrap()
        .map(|e| e.unwrap().path())
        .filter(|p| p.extension().is_some_and(|e| e == "csv"))
        .collect();
    files.sort();
    let out = env.ingest(&files);
    assert_eq!(code(&out), 65, "one file is refused");
    let text = stdout(&out);
    // Every night but the refused one; the resent copy is a duplicate.
    let nights = tidegate::demo::NIGHTS;
    assert_eq!(text.matches(": accepted:").count(), nights - 1, "{text}");
    assert_eq!(text.matches(": refused:").count(), 1, "{text}");
    assert_eq!(text.matches(": duplicate:").count(), 1, "{text}");
    let s = env.status_json();
    assert_eq!(s["summary"]["batches"], nights - 1);
    // The new shop appears as a new category value on its first night.
    let log = env.log_json(&["--kind", "batch-accepted"]);
    let new_shop: Vec<&serde_json::Value> = log
        .iter()
        .filter(|e| {
            e["new_categories"]["shop"]
                .as_array()
                .is_some_and(|v| v.len() == 1)
        })
        .collect();
    assert_eq!(new_shop.len(), 1);
    assert_eq!(new_shop[0]["file"], "night-07.csv");
    assert_eq!(new_shop[0]["new_categories"]["shop"][0], "Harwick Harbour");
}

#[test]
fn committed_demo_files_match_the_generator() {
    for (name, text) in tidegate::demo::files(tidegate::demo::SEED) {
        let committed = fs::read_to_string(repo("demo-data").join(&name)).unwrap();
        assert!(
            committed == text,
            "demo-data/{name} differs from the generator; run cargo run --release --example gen_demo_data"
        );
    }
    // The demo config is the template users start from.
    assert_eq!(
        fs::read_to_string(repo("demo-data/tidegate.toml")).unwrap(),
        tidegate::config::TEMPLATE
    );
}

#[test]
fn second_writer_is_refused_and_readers_still_answer() {
    let env = small();
    let out = env.ingest(&[data("good/plain.csv")]);
    assert_eq!(code(&out), 0);
    // This test process becomes the owner, like a running daemon would.
    let config = Config::load(&data("small.toml")).unwrap();
    let (owner, _) = state::open(&StateDir::new(env.state()), &config).unwrap();
    let out = env.ingest(&[data("good/bom.csv")]);
    assert_eq!(code(&out), 75, "{}", stderr(&out));
    assert!(
        stderr(&out).contains(&format!("is in use by PID {}", std::process::id())),
        "{}",
        stderr(&out)
    );
    // Read-only commands answer from files while the store is held.
    let s = env.status_json();
    assert_eq!(s["owner_pid"], std::process::id());
    assert_eq!(s["summary"]["rows"], 3);
    assert_eq!(env.log_json(&[]).len(), 2);
    drop(owner);
    assert_eq!(env.status_json()["owner_pid"], serde_json::Value::Null);
    let out = env.ingest(&[data("good/bom.csv")]);
    assert_eq!(code(&out), 0, "{}", stderr(&out));
}

#[test]
fn log_filters_and_json_lines() {
    let env = small();
    env.ingest(&[
        data("good/plain.csv"),
        data("bad/nan.csv"),
        data("good/bom.csv"),
        data("good/plain.csv"),
    ]);
    let all = env.log_json(&[]);
    let kinds: Vec<&str> = all.iter().map(|e| e["kind"].as_str().unwrap()).collect();
    assert_eq!(
        kinds,
        vec![
            "initialized",
            "batch-accepted",
            "batch-refused",
            "batch-accepted",
            "batch-duplicate"
        ]
    );
    for (i, e) in all.iter().enumerate() {
        assert_eq!(e["seq"], i as u64 + 1);
        assert_eq!(e["user"], "tester");
        assert_eq!(e["hash"].as_str().unwrap().len(), 64);
    }
    assert_eq!(all[1]["prev"], all[0]["hash"]);
    assert_eq!(
        env.log_json(&["--kind", "batch-accepted,batch-duplicate"])
            .len(),
        3
    );
    assert_eq!(
        env.log_json(&["--limit", "2"])
            .iter()
            .map(|e| e["seq"].as_u64().unwrap())
            .collect::<Vec<_>>(),
        vec![4, 5]
    );
    assert_eq!(
        env.log_json(&["--batch", "b000001"]).len(),
        2,
        "accepted and its duplicate"
    );
    assert_eq!(env.log_json(&["--since", "1h"]).len(), 5);
    assert_eq!(env.log_json(&["--until", "2000-01-01"]).len(), 0);
    let t = all[3]["time"].as_str().unwrap();
    assert_eq!(env.log_json(&["--since", t]).len(), 2);
    // The human table has a header and one row per entry.
    let out = env.run(&["log"]);
    let text = stdout(&out);
    assert!(text.starts_with("seq  time (UTC)"), "{text}");
    assert_eq!(text.lines().count(), 6);
    // Bad filters are usage errors with a hint.
    let out = env.run(&["log", "--since", "yesterday"]);
    assert_eq!(code(&out), 2);
    assert!(stderr(&out).contains("7d"), "{}", stderr(&out));
    let out = env.run(&["log", "--kind", "promoted-ish"]);
    assert_eq!(code(&out), 2);
    assert!(stderr(&out).contains("batch-accepted"), "{}", stderr(&out));
}

#[test]
fn status_json_shape() {
    let env = small();
    env.ingest(&[data("good/plain.csv")]);
    let s = env.status_json();
    assert_eq!(s["summary"]["batches"], 1);
    assert_eq!(s["summary"]["rows"], 3);
    assert_eq!(
        s["summary"]["train_rows"].as_u64().unwrap()
            + s["summary"]["holdout_rows"].as_u64().unwrap(),
        3
    );
    assert_eq!(
        s["summary"]["vocabularies"]["flag"],
        serde_json::json!(["a", "b"])
    );
    assert_eq!(s["recent"].as_array().unwrap().len(), 2);
    let out = env.run(&["status"]);
    assert!(
        stdout(&out).contains("rows        3 in 1 batches"),
        "{}",
        stdout(&out)
    );
}

#[test]
fn config_errors_exit_78_with_line_and_column() {
    let dir = tempfile::tempdir().unwrap();
    let cfg = dir.path().join("bad.toml");
    let text = fs::read_to_string(data("small.toml"))
        .unwrap()
        .replace("target = \"y\"", "target = \"why\"");
    fs::write(&cfg, text).unwrap();
    let out = std::process::Command::new(env!("CARGO_BIN_EXE_tidegate"))
        .arg("--state")
        .arg(dir.path().join("s"))
        .arg("--config")
        .arg(&cfg)
        .arg("init")
        .output()
        .unwrap();
    assert_eq!(code(&out), 78);
    assert!(stderr(&out).contains("bad.toml:3:10: target \"why\" is not one of the columns; allowed: id, city, temp, flag, y"), "{}", stderr(&out));
    assert!(!dir.path().join("s").exists(), "nothing created");
}

#[test]
fn init_refuses_to_overwrite_and_uninitialised_dirs_are_explained() {
    let env = small();
    let out = env.run_with_config(&data("small.toml"), &["init"]);
    assert_eq!(code(&out), 1);
    assert!(
        stderr(&out).contains("already holds a tidegate state dir"),
        "{}",
        stderr(&out)
    );
    let dir = tempfile::tempdir().unwrap();
    let out = std::process::Command::new(env!("CARGO_BIN_EXE_tidegate"))
        .arg("--state")
        .arg(dir.path().join("nope"))
        .arg("status")
        .output()
        .unwrap();
    assert_eq!(code(&out), 1);
    assert!(
        stderr(&out).contains("tidegate init --config FILE"),
        "{}",
        stderr(&out)
    );
    use std::os::unix::fs::PermissionsExt;
    assert_eq!(
        fs::metadata(env.state()).unwrap().permissions().mode() & 0o777,
        0o700
    );
    // The template is a valid config.
    let t = dir.path().join("t.toml");
    let out = std::process::Command::new(env!("CARGO_BIN_EXE_tidegate"))
        .arg("init")
        .arg("--template")
        .arg(&t)
        .output()
        .unwrap();
    assert_eq!(code(&out), 0, "{}", stderr(&out));
    assert!(Config::load(&t).is_ok());
}

#[test]
fn broken_pipe_is_success() {
    let env = small();
    env.ingest(&[data("good/plain.csv")]);
    let mut child = env
        .command()
        .arg("log")
        .stdout(std::process::Stdio::piped())
        .spawn()
        .unwrap();
    drop(child.stdout.take());
    let status = child.wait().unwrap();
    assert_eq!(status.code(), Some(0));
}

#[test]
fn a_file_over_the_size_limit_is_refused_unread_even_at_two_gigabytes() {
    // A sparse 2 GiB file costs no disk; it must be refused by its size
    // alone, before a byte is read (the demo config allows 256 MiB).
    let env = Env::new(&repo("demo-data/tidegate.toml"));
    let big = env.dir.path().join("huge.csv");
    let f = fs::File::create(&big).unwrap();
    f.set_len(2 << 30).unwrap();
    drop(f);
    let started = std::time::Instant::now();
    let out = env.ingest(std::slice::from_ref(&big));
    assert_eq!(code(&out), 65, "{}", stderr(&out));
    assert!(stdout(&out).contains("max_file_bytes"), "{}", stdout(&out));
    assert!(started.elapsed().as_secs() < 10, "refused without reading");
    assert_eq!(env.status_json()["summary"]["rows"], 0);
    assert!(
        !env.state().join("refused/huge.csv").exists(),
        "an oversized file is not copied"
    );
}

/// A config like `small.toml` without its tiny file-size limit.
fn large_files() -> (tempfile::TempDir, Env) {
    let dir = tempfile::tempdir().unwrap();
    let text = fs::read_to_string(data("small.toml"))
        .unwrap()
        .replace("max_file_bytes = 4096", "max_file_bytes = 67108864");
    let config = dir.path().join("large.toml");
    fs::write(&config, text).unwrap();
    let env = Env::new(&config);
    (dir, env)
}

/// About 2.5 MB of rows (so the file is parsed in parts on several threads)
/// whose city values first appear in a known order spread over the file.
fn big_file(rows: usize, bad_at: Option<usize>) -> (String, Vec<String>) {
    let mut text = String::from("id,city,temp,flag,y\n");
    let mut first_seen = Vec::new();
    for i in 0..rows {
        // A new city every 7,919 rows, reused afterwards.
        let n = i / 7919;
        let city = format!("town-{}", (n * 37) % 101);
        if !first_seen.contains(&city) {
            first_seen.push(city.clone());
        }
        let temp = if bad_at == Some(i) {
            "warm".to_string()
        } else {
            format!("{}.{}", (i % 50) as i64 - 10, i % 10)
        };
        text.push_str(&format!("{i},{city},{temp},,{}.25\n", i % 13));
    }
    (text, first_seen)
}

#[test]
fn a_large_file_keeps_file_order_for_new_values_and_leaves_sled_no_blob_files() {
    let (dir, env) = large_files();
    let (text, first_seen) = big_file(120_000, None);
    assert!(text.len() > 2_000_000);
    let file = dir.path().join("big.csv");
    fs::write(&file, &text).unwrap();
    let out = env.ingest(std::slice::from_ref(&file));
    assert_eq!(code(&out), 0, "{}", stderr(&out));
    assert_eq!(stored_rows(&env), 120_000);
    let accepted = env.log_json(&["--kind", "batch-accepted"]);
    let listed: Vec<String> = accepted[0]["new_categories"]["city"]
        .as_array()
        .unwrap()
        .iter()
        .map(|v| v.as_str().unwrap().to_string())
        .collect();
    assert_eq!(
        listed, first_seen,
        "codes follow first appearance in the file"
    );
    // Values over sled's inline limit would be written to blob files, which
    // sled does not fsync: rows must be chunked small enough to avoid them.
    let blobs = env.state().join("store/blobs");
    let count = fs::read_dir(&blobs).map(|d| d.count()).unwrap_or(0);
    assert_eq!(
        count,
        0,
        "sled wrote {count} blob files under {}",
        blobs.display()
    );
    let out = env.run(&["verify"]);
    assert_eq!(code(&out), 0, "{}", stderr(&out));
}

#[test]
fn a_bad_row_deep_in_a_large_file_is_reported_at_its_own_line() {
    let (dir, env) = large_files();
    let (text, _) = big_file(120_000, Some(100_000));
    let file = dir.path().join("big-bad.csv");
    fs::write(&file, &text).unwrap();
    let out = env.ingest(std::slice::from_ref(&file));
    assert_eq!(code(&out), 65, "{}", stderr(&out));
    // Row index 100,000 is on line 100,002 (the header is line 1).
    let message = format!("{}{}", stdout(&out), stderr(&out));
    assert!(message.contains("line 100002"), "{message}");
    assert!(message.contains("warm"), "{message}");
    assert_eq!(stored_rows(&env), 0);
}

#[test]
fn twenty_thousand_new_category_values_leave_sled_no_blob_files() {
    // Every value sled keeps must stay under its blob threshold, or sled
    // writes it to a blob file it never fsyncs: the audit entry of a batch
    // that brings 20,000 new values must not carry them all.
    let (dir, env) = large_files();
    let mut text = String::from("id,city,temp,flag,y\n");
    for i in 0..20_000 {
        text.push_str(&format!(
            "{i},a-rather-long-city-name-{i:05},{}.5,,{}.25\n",
            i % 30,
            i % 13
        ));
    }
    let file = dir.path().join("many-cities.csv");
    fs::write(&file, &text).unwrap();
    let out = env.ingest(std::slice::from_ref(&file));
    assert_eq!(code(&out), 0, "{}", stderr(&out));
    let blobs = env.state().join("store/blobs");
    let count = fs::read_dir(&blobs).map(|d| d.count()).unwrap_or(0);
    assert_eq!(count, 0, "sled wrote {count} blob files");
    let accepted = env.log_json(&["--kind", "batch-accepted"]);
    let e = &accepted[0];
    assert_eq!(e["new_category_counts"]["city"], 20_000, "{e}");
    // The entry lists the first values in the order first seen; the full
    // list is the vocabulary, written in the same transaction.
    let listed = e["new_categories"]["city"].as_array().unwrap();
    assert_eq!(listed.len(), tidegate::audit::NEW_VALUES_LISTED);
    assert_eq!(listed[0], "a-rather-long-city-name-00000");
    assert_eq!(listed[99], "a-rather-long-city-name-00099");
    let log = stdout(&env.run(&["log", "--kind", "batch-accepted"]));
    assert!(log.contains("and 19900 more (20000 new values)"), "{log}");
    let status = stdout(&env.run(&["status"]));
    assert!(status.contains("city: 20000 values"), "{status}");
    let out = env.run(&["verify"]);
    assert_eq!(code(&out), 0, "{}", stderr(&out));
}
