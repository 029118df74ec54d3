//! Suspect batches through the real binary: a file with its targets
//! shuffled among its rows, one with its target scaled by 1000 and one of a
//! single row repeated are stored but set aside (no rollback, not in any
//! later cycle's holdout); the demo's real demand shift is not; a batch set
//! aside by hand and brought back leaves the store, the log and `verify`
//! consistent. Every stream here is invented: a bakery's nightly sales of
//! a few bread lines in a few shops, with a day effect on every row.

use std::fs;
use std::path::{Path, PathBuf};

use tidegate::rng::Rng;

use crate::support::{Env, code, repo, stderr, stdout};

const CONFIG: &str = r#"
[data]
target = "sold"
task = "regression"
holdout_fraction = 0.2

[[data.columns]]
name = "shop"
kind = "category"

[[data.columns]]
name = "bread"
kind = "category"

[[data.columns]]
name = "temp_c"
kind = "number"

[[data.columns]]
name = "price"
kind = "number"

[[data.columns]]
name = "sold"
kind = "number"

[model]
hidden = [16]

[training]
cold_epochs = 150
warm_epochs = 8
learning_rate = 0.01

[gate]
min_holdout_rows = 50
"#;

const SHOPS: [&str; 8] = [
    "Ashby",
    "Brackwell",
    "Corrin",
    "Dunmore",
    "Elstead",
    "Farrow",
    "Glenholm",
    "Harwick",
];
const BREADS: [&str; 5] = ["white tin", "wholemeal", "rye", "seeded", "spelt"];

/// What is wrong with a night's file, if anything.
#[derive(Clone, Copy, PartialEq)]
enum Fault {
    None,
    /// Targets shuffled among the file's rows (a broken join).
    Shuffled,
    /// Targets in another unit: ×1000.
    Scaled,
    /// The export repeated one row.
    OneRow,
}

/// One night of 160 rows: sales depend on the shop, the bread, the price
/// and the day's temperature, times a day effect shared by every row, plus
/// row noise.
fn night(seed: u64, n: usize, fault: Fault) -> String {
    let mut rng = Rng::new(seed * 1_000 + n as u64);
    let shop_level: Vec<f64> = {
        let mut r = Rng::new(seed);
        SHOPS.iter().map(|_| 20.0 + 40.0 * r.uniform()).collect()
    };
    let bread_level = [1.6, 1.1, 0.5, 0.8, 0.4];
    let temp = 8.0 + 6.0 * rng.normal();
    let day = 1.0 + 0.12 * rng.normal();
    let mut rows: Vec<(usize, usize, f64, f64)> = Vec::new();
    for _ in 0..160 {
        let s = rng.below(SHOPS.len());
        let b = rng.below(BREADS.len());
        let price = 1.5 + 2.0 * rng.uniform();
        let sold =
            (shop_level[s] * bread_level[b] * day * (1.0 - 0.01 * temp) * (2.2 - 0.3 * price)
                + 6.0 * rng.normal())
            .max(0.0);
        rows.push((s, b, price, sold));
    }
    match fault {
        Fault::None => {}
        Fault::Shuffled => {
            let mut sold: Vec<f64> = rows.iter().map(|r| r.3).collect();
            rng.shuffle(&mut sold);
            for (r, v) in rows.iter_mut().zip(sold) {
                r.3 = v;
            }
        }
        Fault::Scaled => rows.iter_mut().for_each(|r| r.3 *= 1000.0),
        Fault::OneRow => {
            let first = rows[0];
            rows.iter_mut().skip(8).for_each(|r| *r = first);
        }
    }
    let mut csv = String::from("shop,bread,temp_c,price,sold\n");
    for (s, b, price, sold) in rows {
        csv.push_str(&format!(
            "{},{},{temp:.1},{price:.2},{sold:.1}\n",
            SHOPS[s], BREADS[b]
        ));
    }
    csv
}

fn write(env: &Env, name: &str, text: &str) -> PathBuf {
    let p = env.dir.path().join(name);
    fs::write(&p, text).unwrap();
    p
}

fn ingest_json(env: &Env, file: &Path) -> serde_json::Value {
    let out = env.run(&["--json", "ingest", file.to_str().unwrap()]);
    assert_eq!(code(&out), 0, "{}", stderr(&out));
    serde_json::from_str(stdout(&out).trim()).unwrap()
}

fn retrain(env: &Env) {
    let out = env.run(&["retrain"]);
    assert_eq!(code(&out), 0, "{}", stderr(&out));
}

fn kinds(env: &Env) -> Vec<String> {
    env.log_json(&[])
        .iter()
        .map(|e| e["kind"].as_str().unwrap().to_string())
        .collect()
}

/// Holdout rows of the batches in use, from the log's accepted entries.
fn holdout_rows_in_use(env: &Env, aside: &[u64]) -> u64 {
    env.log_json(&["--kind", "batch-accepted"])
        .iter()
        .filter(|e| !aside.contains(&e["batch"].as_u64().unwrap()))
        .map(|e| e["holdout_rows"].as_u64().unwrap())
        .sum()
}

#[test]
fn broken_files_are_set_aside_without_rollback_and_never_judge_a_model() {
    let env = Env::with_config_text(CONFIG);
    // Eight ordinary nights, a cycle after each from the third (as a daemon
    // with a small min_new_rows would run).
    for n in 1..=8 {
        let f = write(&env, &format!("night-{n}.csv"), &night(7, n, Fault::None));
        let r = ingest_json(&env, &f);
        assert!(r.get("set_aside").is_none(), "night {n}: {r}");
        if n >= 3 {
            retrain(&env);
        }
    }
    assert!(!env.status_json()["summary"]["serving"].is_null());

    let mut aside = Vec::new();
    for (n, fault) in [
        (9, Fault::Shuffled),
        (10, Fault::Scaled),
        (11, Fault::OneRow),
    ] {
        let f = write(&env, &format!("night-{n}.csv"), &night(7, n, fault));
        let r = ingest_json(&env, &f);
        assert_eq!(r["status"], "accepted", "{r}");
        assert!(
            r["set_aside"]["automatic"] == true,
            "night {n} was not set aside: {r}"
        );
        assert!(
            r.get("fresh_check").is_none(),
            "a suspect batch was fresh-checked: {r}"
        );
        aside.push(r["batch"].as_u64().unwrap());
    }
    // The evidence is in each batch's entry.
    let accepted = env.log_json(&["--kind", "batch-accepted"]);
    for e in &accepted {
        let b = e["batch"].as_u64().unwrap();
        assert_eq!(
            e["suspect"]["suspect"].as_bool().unwrap_or(false),
            aside.contains(&b),
            "{e}"
        );
    }
    let shuffled = &accepted[8]["suspect"];
    assert!(
        shuffled["references"]
            .as_array()
            .unwrap()
            .iter()
            .any(|r| r["name"].as_str().unwrap().starts_with("serving")),
        "{shuffled}"
    );

    let status = env.status_json();
    let listed = status["summary"]["set_aside"].as_object().unwrap();
    assert_eq!(listed.len(), 3, "{status}");
    let text = stdout(&env.run(&["status"]));
    assert!(text.contains("set aside"), "{text}");

    // No batch set aside caused a rollback or a fresh-data check.
    let k = kinds(&env);
    assert!(!k.iter().any(|k| k == "rolled-back"), "{k:?}");
    let checked: Vec<u64> = env
        .log_json(&["--kind", "fresh-checked"])
        .iter()
        .map(|e| e["check"]["batch"].as_u64().unwrap())
        .collect();
    assert!(!checked.iter().any(|b| aside.contains(b)), "{checked:?}");

    // A later ordinary night is taken; later cycles neither train on nor
    // judge with the batches set aside.
    let f = write(&env, "night-12.csv", &night(7, 12, Fault::None));
    let r = ingest_json(&env, &f);
    assert!(r.get("set_aside").is_none(), "{r}");
    for _ in 0..2 {
        let out = env.run(&["--json", "retrain"]);
        assert_eq!(code(&out), 0, "{}", stderr(&out));
        let r: serde_json::Value = serde_json::from_str(stdout(&out).trim()).unwrap();
        if r["outcome"] == "nothing-new" {
            continue;
        }
        let new: Vec<u64> = r["new_batches"]
            .as_array()
            .unwrap()
            .iter()
            .map(|b| b.as_u64().unwrap())
            .collect();
        assert!(!new.iter().any(|b| aside.contains(b)), "{r}");
        assert_eq!(
            r["holdout_rows"].as_u64().unwrap(),
            holdout_rows_in_use(&env, &aside),
            "{r}"
        );
    }
    let out = env.run(&["verify"]);
    assert_eq!(code(&out), 0, "{}{}", stdout(&out), stderr(&out));
}

#[test]
fn the_demo_demand_shift_is_not_set_aside() {
    let env = Env::new(&repo("demo-data/tidegate.toml"));
    let nights = |list: &[&str]| -> Vec<PathBuf> {
        list.iter()
            .map(|n| repo(&format!("demo-data/night-{n}.csv")))
            .collect()
    };
    let out = env.ingest(&nights(&["01", "02", "03", "04"]));
    assert_eq!(code(&out), 0, "{}", stderr(&out));
    retrain(&env);
    let out = env.ingest(&nights(&["06", "07", "08", "09", "10", "11", "12"]));
    assert_eq!(code(&out), 0, "{}", stderr(&out));
    let accepted = env.log_json(&["--kind", "batch-accepted"]);
    assert_eq!(accepted.len(), 11);
    for e in &accepted[1..] {
        let s = &e["suspect"];
        assert_eq!(s["suspect"], false, "batch {} set aside: {s}", e["batch"]);
    }
    // Nights 10–12 (the Corrin shift) were judged by every reference,
    // the serving model among them, and found related.
    // (Night 12 is the first Friday stored, since night 5 was refused: every
    // row is a new condition, so no reference can speak for it.)
    for e in &accepted[8..10] {
        let refs = e["suspect"]["references"].as_array().unwrap();
        assert!(refs.len() >= 2, "{e}");
        assert!(
            refs.iter().all(|r| r["verdict"] == "related"),
            "{}",
            e["suspect"]
        );
    }
    assert!(
        env.status_json()["summary"]["set_aside"]
            .as_object()
            .unwrap()
            .is_empty()
    );
}

#[test]
fn a_batch_set_aside_by_hand_and_brought_back_keeps_store_log_and_verify_consistent() {
    let env = Env::with_config_text(CONFIG);
    let files: Vec<PathBuf> = (1..=4)
        .map(|n| write(&env, &format!("night-{n}.csv"), &night(3, n, Fault::None)))
        .collect();
    let out = env.ingest(&files);
    assert_eq!(code(&out), 0, "{}", stderr(&out));

    // A reason is required, the batch must exist, and the state must change.
    let out = env.run(&["set-aside", "b000002"]);
    assert_ne!(code(&out), 0);
    let out = env.run(&["set-aside", "b000009", "--reason", "x"]);
    assert_ne!(code(&out), 0);
    assert!(
        stderr(&out).contains("no batch b000009"),
        "{}",
        stderr(&out)
    );
    let out = env.run(&["bring-back", "b000002", "--reason", "x"]);
    assert_ne!(code(&out), 0);
    assert!(stderr(&out).contains("not set aside"), "{}", stderr(&out));

    let out = env.run(&["set-aside", "b000002", "--reason", "export was broken"]);
    assert_eq!(code(&out), 0, "{}", stderr(&out));
    let entries = env.log_json(&["--kind", "batch-set-aside"]);
    assert_eq!(entries.len(), 1);
    assert_eq!(entries[0]["user"], "tester");
    assert_eq!(entries[0]["reason"], "export was broken");
    let out = env.run(&["verify"]);
    assert_eq!(code(&out), 0, "{}{}", stdout(&out), stderr(&out));
    let status = env.status_json();
    assert!(status["summary"]["set_aside"]["2"].is_string(), "{status}");
    let out = env.run(&["set-aside", "b000002", "--reason", "again"]);
    assert_ne!(code(&out), 0);

    // The first cycle's holdout leaves the batch out.
    retrain(&env);
    let trained = env.log_json(&["--kind", "candidate-trained"]);
    assert_eq!(
        trained[0]["holdout_rows"].as_u64().unwrap(),
        holdout_rows_in_use(&env, &[2])
    );

    let out = env.run(&["bring-back", "b000002", "--reason", "the file was fine"]);
    assert_eq!(code(&out), 0, "{}", stderr(&out));
    let out = env.run(&["verify"]);
    assert_eq!(code(&out), 0, "{}{}", stdout(&out), stderr(&out));
    assert!(
        env.status_json()["summary"]["set_aside"]
            .as_object()
            .unwrap()
            .is_empty()
    );
    // Back in use: the next cycle's holdout has every batch again.
    let f = write(&env, "night-5.csv", &night(3, 5, Fault::None));
    let out = env.ingest(&[f]);
    assert_eq!(code(&out), 0, "{}", stderr(&out));
    let holdout_all = holdout_rows_in_use(&env, &[]);
    retrain(&env);
    let trained = env.log_json(&["--kind", "candidate-trained"]);
    assert_eq!(
        trained.last().unwrap()["holdout_rows"].as_u64().unwrap(),
        holdout_all
    );

    // A backup restores the same state and verifies.
    let out = env.run(&["set-aside", "b000003", "--reason", "late doubt"]);
    assert_eq!(code(&out), 0, "{}", stderr(&out));
    let backup = env.dir.path().join("copy");
    let out = env.run(&["backup", "--out", backup.to_str().unwrap()]);
    assert_eq!(code(&out), 0, "{}", stderr(&out));
    let restored = env.dir.path().join("restored");
    let out = std::process::Command::new(env!("CARGO_BIN_EXE_tidegate"))
        .args([
            "--state",
            restored.to_str().unwrap(),
            "restore",
            "--from",
            backup.to_str().unwrap(),
        ])
        .env("NO_COLOR", "1")
        .output()
        .unwrap();
    assert_eq!(code(&out), 0, "{}{}", stdout(&out), stderr(&out));
    let out = std::process::Command::new(env!("CARGO_BIN_EXE_tidegate"))
        .args(["--state", restored.to_str().unwrap(), "--json", "status"])
        .output()
        .unwrap();
    let v: serde_json::Value = serde_json::from_str(stdout(&out).trim()).unwrap();
    assert!(v["summary"]["set_aside"]["3"].is_string(), "{v}");
}

fn faulty(env: &Env, point: &str, args: &[&str]) -> std::process::Output {
    env.command()
        .env("TIDEGATE_FAILPOINTS", format!("{point}=abort"))
        .args(args)
        .output()
        .unwrap()
}

#[test]
fn a_crash_while_setting_aside_loses_nothing_and_leaves_store_and_log_agreeing() {
    let env = Env::with_config_text(CONFIG);
    let files: Vec<PathBuf> = (1..=6)
        .map(|n| write(&env, &format!("night-{n}.csv"), &night(5, n, Fault::None)))
        .collect();
    let out = env.ingest(&files);
    assert_eq!(code(&out), 0, "{}", stderr(&out));

    // By hand: a crash inside, before or after the transaction is durable.
    for point in [
        "store:mid-transaction",
        "store:before-flush",
        "store:after-flush",
    ] {
        let before = env.status_json()["summary"]["set_aside"].clone();
        let was_aside = before.get("2").is_some();
        let verb = if was_aside { "bring-back" } else { "set-aside" };
        let out = faulty(&env, point, &[verb, "b000002", "--reason", "crash test"]);
        assert_ne!(code(&out), 0, "{point}: the process died");
        // The next owner's start catches `audit.jsonl` up with the store
        // (this command opens the state dir, then finds no such batch).
        let out = env.run(&["set-aside", "b000999", "--reason", "probe"]);
        assert!(
            stderr(&out).contains("no batch b000999"),
            "{}",
            stderr(&out)
        );
        let v = env.run(&["verify"]);
        assert_eq!(code(&v), 0, "{point}: {}{}", stdout(&v), stderr(&v));
        let now = env.status_json()["summary"]["set_aside"].get("2").is_some();
        if point == "store:after-flush" {
            assert_ne!(now, was_aside, "{point}: a durable change was lost");
        } else if now == was_aside {
            // Not applied: doing it again works.
            let out = env.run(&[verb, "b000002", "--reason", "again"]);
            assert_eq!(code(&out), 0, "{point}: {}", stderr(&out));
        }
        let v = env.run(&["verify"]);
        assert_eq!(code(&v), 0, "{point}: {}{}", stdout(&v), stderr(&v));
    }

    // At intake: a suspect file whose ingest dies after its commit is
    // finished by the next run, still set aside, stored once.
    let bad = write(&env, "night-7.csv", &night(5, 7, Fault::Shuffled));
    let out = faulty(
        &env,
        "intake:after-commit",
        &["ingest", bad.to_str().unwrap()],
    );
    assert_ne!(code(&out), 0);
    let out = env.ingest(std::slice::from_ref(&bad));
    assert_eq!(code(&out), 0, "{}", stderr(&out));
    let s = env.status_json();
    assert_eq!(s["summary"]["batches"], 7, "{s}");
    assert!(s["summary"]["set_aside"].get("7").is_some(), "{s}");
    let v = env.run(&["verify"]);
    assert_eq!(code(&v), 0, "{}{}", stdout(&v), stderr(&v));
}

#[test]
fn models_name_the_batches_they_saw_and_the_models_a_batch_reached() {
    let env = Env::with_config_text(CONFIG);
    let files: Vec<PathBuf> = (1..=3)
        .map(|n| write(&env, &format!("night-{n}.csv"), &night(5, n, Fault::None)))
        .collect();
    assert_eq!(code(&env.ingest(&files)), 0);
    retrain(&env);
    let out = env.run(&["set-aside", "b000002", "--reason", "export was broken"]);
    assert_eq!(code(&out), 0, "{}", stderr(&out));
    let f = write(&env, "night-4.csv", &night(5, 4, Fault::None));
    assert_eq!(code(&env.ingest(&[f])), 0);
    retrain(&env);

    let models = |args: &[&str]| -> Vec<serde_json::Value> {
        let mut all = vec!["--json", "models"];
        all.extend(args);
        let out = env.run(&all);
        assert_eq!(code(&out), 0, "{}", stderr(&out));
        stdout(&out)
            .lines()
            .map(|l| serde_json::from_str(l).unwrap())
            .collect()
    };
    let ids = |v: &serde_json::Value| -> Vec<u64> {
        v.as_array()
            .unwrap()
            .iter()
            .map(|b| b.as_u64().unwrap())
            .collect()
    };
    let all = models(&[]);
    assert!(all.len() >= 2, "{all:?}");
    let by_id: std::collections::BTreeMap<u64, &serde_json::Value> =
        all.iter().map(|m| (m["id"].as_u64().unwrap(), m)).collect();
    for m in &all {
        let direct = ids(&m["batches_direct"]);
        let seen = ids(&m["batches_seen"]);
        let first_cycle = m["cycle"] == 1;
        // The first cycle read batches 1-3; later ones not the batch set
        // aside before them, and batch 4 as well.
        if first_cycle {
            assert_eq!(direct, vec![1, 2, 3], "{m}");
        } else {
            assert_eq!(direct, vec![1, 3, 4], "{m}");
        }
        // A warm model saw what its parent saw; a cold one only its own.
        let mut want = direct.clone();
        if m["kind"] == "warm" {
            let parent = by_id[&m["parent"].as_u64().unwrap()];
            want.extend(ids(&parent["batches_seen"]));
            want.sort_unstable();
            want.dedup();
        }
        assert_eq!(seen, want, "{m}");
    }
    // The models batch 2 reached, and how.
    let reached = models(&["--trained-on", "b000002"]);
    assert!(!reached.is_empty());
    for m in &reached {
        let direct = ids(&m["batches_direct"]).contains(&2);
        let route = if direct { "directly" } else { "through_parent" };
        assert_eq!(m["route"], route, "{m}");
        assert!(ids(&m["batches_seen"]).contains(&2));
    }
    let reached_ids: Vec<u64> = reached.iter().map(|m| m["id"].as_u64().unwrap()).collect();
    let want: Vec<u64> = all
        .iter()
        .filter(|m| ids(&m["batches_seen"]).contains(&2))
        .map(|m| m["id"].as_u64().unwrap())
        .collect();
    assert_eq!(reached_ids, want);
    // The screen says it in words.
    let out = env.run(&["models", "--trained-on", "b000002"]);
    assert!(
        stdout(&out).contains("b000002 was seen by: m000001 directly"),
        "{}",
        stdout(&out)
    );
    // The log follows the batch to the models that saw it: their entries
    // are shown beside the batch's own, and no other model's.
    let out = env.run(&["log", "--batch", "b000002", "--lineage"]);
    let text = stdout(&out);
    assert!(out.status.success(), "{text}");
    assert!(
        text.starts_with("b000002 reached m000001 (directly)"),
        "{text}"
    );
    for m in &all {
        let id = format!("m{:06}", m["id"].as_u64().unwrap());
        let saw = ids(&m["batches_seen"]).contains(&2);
        // The "what" column of an entry about a model starts with its id.
        let shown = text
            .lines()
            .skip(2)
            .filter_map(|l| {
                l.split("  ")
                    .map(str::trim)
                    .filter(|c| !c.is_empty())
                    .last()
            })
            .any(|what| what.starts_with(&format!("{id} ")));
        assert_eq!(shown, saw, "{id} in\n{text}");
    }
    assert!(text.contains("b000002 from"), "{text}");
    // And a model to the batches it saw.
    let out = env.run(&[
        "log",
        "--model",
        "m000001",
        "--lineage",
        "--kind",
        "batch-accepted",
    ]);
    let text = stdout(&out);
    assert!(text.starts_with("m000001 saw b000001–b000003"), "{text}");
    assert_eq!(
        text.lines()
            .filter(|l| l.contains("batch-accepted"))
            .count(),
        3,
        "{text}"
    );
}

#[test]
/// The only model that passed the gate saw the batch: no clean model to
/// start from, so the next cycle trains cold only.
fn a_serving_model_that_saw_a_batch_now_set_aside_is_replaced_by_a_cold_run_only() {
    let env = Env::with_config_text(CONFIG);
    let files: Vec<PathBuf> = (1..=4)
        .map(|n| write(&env, &format!("night-{n}.csv"), &night(7, n, Fault::None)))
        .collect();
    assert_eq!(code(&env.ingest(&files)), 0);
    retrain(&env);
    let serving = env.status_json()["summary"]["serving"].clone();
    assert!(
        serving.is_u64(),
        "the first cycle promotes a model: {serving}"
    );
    // Nothing new: a cycle has nothing to do.
    let before = env.log_json(&["--kind", "candidate-trained"]).len();
    retrain(&env);
    assert_eq!(env.log_json(&["--kind", "candidate-trained"]).len(), before);

    let out = env.run(&["set-aside", "b000002", "--reason", "export was broken"]);
    assert_eq!(code(&out), 0, "{}", stderr(&out));
    let status = env.status_json();
    assert_eq!(
        status["summary"]["serving_saw_set_aside"],
        serde_json::json!([2]),
        "{status}"
    );
    // Still nothing new, but the serving model carries the batch: a cold
    // candidate trains without it, and no warm one starts from its weights.
    retrain(&env);
    let trained = env.log_json(&["--kind", "candidate-trained"]);
    let new: Vec<&serde_json::Value> = trained[before..].iter().collect();
    assert_eq!(new.len(), 1, "{new:?}");
    assert_eq!(new[0]["run"], "cold");
    let out = env.run(&["--json", "models"]);
    let cold = stdout(&out)
        .lines()
        .map(|l| serde_json::from_str::<serde_json::Value>(l).unwrap())
        .find(|m| m["id"] == new[0]["model"])
        .unwrap();
    assert!(
        !cold["batches_seen"]
            .as_array()
            .unwrap()
            .contains(&serde_json::json!(2)),
        "{cold}"
    );
    assert_eq!(code(&env.run(&["verify"])), 0);
}

fn models_json(env: &Env) -> Vec<serde_json::Value> {
    let out = env.run(&["--json", "models"]);
    assert_eq!(code(&out), 0, "{}", stderr(&out));
    stdout(&out)
        .lines()
        .map(|l| serde_json::from_str(l).unwrap())
        .collect()
}

fn seen(m: &serde_json::Value) -> Vec<u64> {
    m["batches_seen"]
        .as_array()
        .unwrap()
        .iter()
        .map(|b| b.as_u64().unwrap())
        .collect()
}

#[test]
fn a_serving_model_that_saw_a_batch_now_set_aside_is_replaced_warm_from_the_newest_clean_model() {
    let env = Env::with_config_text(CONFIG);
    // Nights, a cycle after each from the third, until a second model has
    // replaced the first: it learnt its last night, which the first never
    // saw.
    let mut n = 0;
    let mut first = None;
    let serving = loop {
        n += 1;
        assert!(n <= 20, "no second model was promoted in 20 nights");
        let f = write(&env, &format!("night-{n}.csv"), &night(7, n, Fault::None));
        assert_eq!(code(&env.ingest(&[f])), 0);
        if n < 3 {
            continue;
        }
        retrain(&env);
        let id = env.status_json()["summary"]["serving"].clone();
        if first.is_none() {
            first = Some(id.clone());
        }
        if first.as_ref() != Some(&id) {
            break models_json(&env)
                .into_iter()
                .find(|m| m["id"] == id)
                .unwrap();
        }
    };
    let b = *seen(&serving).last().unwrap();
    let out = env.run(&[
        "set-aside",
        &format!("b{b:06}"),
        "--reason",
        "export was broken",
    ]);
    assert_eq!(code(&out), 0, "{}", stderr(&out));
    assert_eq!(
        env.status_json()["summary"]["serving_saw_set_aside"],
        serde_json::json!([b])
    );
    // The model to start from: the newest that passed the gate and never
    // saw the batch (the serving model's parent is one).
    let before = models_json(&env);
    let passed = |m: &serde_json::Value| {
        let d = m["decisions"].as_array().unwrap();
        d.iter().any(|k| k == "promoted" || k == "approved")
            && !d.iter().any(|k| k == "rolled-back")
    };
    let clean: Vec<u64> = before
        .iter()
        .filter(|m| passed(m) && !seen(m).contains(&b))
        .map(|m| m["id"].as_u64().unwrap())
        .collect();
    assert!(
        clean.contains(&serving["parent"].as_u64().unwrap()),
        "{before:?}"
    );
    let start = *clean.last().unwrap();

    // Nothing new, but the serving model carries the batch: a cold
    // candidate and a warm one from the clean model, neither of which saw
    // it, judged on the holdout rows without it.
    let out = env.run(&["--json", "retrain"]);
    assert_eq!(code(&out), 0, "{}", stderr(&out));
    let r: serde_json::Value = serde_json::from_str(stdout(&out).trim()).unwrap();
    assert_eq!(
        r["holdout_rows"].as_u64().unwrap(),
        holdout_rows_in_use(&env, &[b]),
        "{r}"
    );
    let after = models_json(&env);
    let new: Vec<&serde_json::Value> = after[before.len()..].iter().collect();
    let mut runs: Vec<&str> = new.iter().map(|m| m["kind"].as_str().unwrap()).collect();
    runs.sort_unstable();
    assert_eq!(runs, ["cold", "warm"], "{new:?}");
    for m in &new {
        assert!(!seen(m).contains(&b), "{m}");
        if m["kind"] == "warm" {
            assert_eq!(m["parent"].as_u64(), Some(start), "{m}");
            // Its own training read every batch in use, its parent's
            // included: the rows after the parent's last batch are new.
            let mut all: Vec<u64> = (1..=n as u64).filter(|x| *x != b).collect();
            all.sort_unstable();
            let direct: Vec<u64> = m["batches_direct"]
                .as_array()
                .unwrap()
                .iter()
                .map(|x| x.as_u64().unwrap())
                .collect();
            assert_eq!(direct, all, "{m}");
        }
    }
    assert_eq!(code(&env.run(&["verify"])), 0);
}
