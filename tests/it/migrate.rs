//! Schema changes: refused until `migrate`, which rewrites the stored rows
//! and makes the next cycle train a cold candidate on the new columns.

use std::fs;
use std::path::{Path, PathBuf};

use crate::support::{Env, code, repo, stderr, stdout};

fn night(n: &str) -> PathBuf {
    repo(&format!("demo-data/night-{n}.csv"))
}

/// The demo config without `rain_mm` and with an optional `holiday`.
fn new_config(dir: &Path) -> PathBuf {
    let text = fs::read_to_string(repo("demo-data/tidegate.toml")).unwrap();
    let text = text.replace(
        "[[data.columns]]\nname = \"rain_mm\"\nkind = \"number\"\nmin = 0\nmax = 300\n",
        "[[data.columns]]\nname = \"holiday\"\nkind = \"category\"\nrequired = false\n",
    );
    assert!(
        text.contains("holiday"),
        "the demo config still has rain_mm as expected"
    );
    let path = dir.join("new.toml");
    fs::write(&path, text).unwrap();
    path
}

/// A night in the new layout: rain_mm dropped, holiday added (empty or "yes").
fn new_layout(env: &Env, n: &str) -> PathBuf {
    let text = fs::read_to_string(night(n)).unwrap();
    let mut lines = text.lines();
    let header: Vec<&str> = lines.next().unwrap().split(',').collect();
    let rain = header.iter().position(|c| *c == "rain_mm").unwrap();
    let mut out = String::new();
    let mut keep = |fields: Vec<&str>, extra: &str| {
        let mut f: Vec<&str> = fields;
        f.remove(rain);
        f.push(extra);
        out.push_str(&f.join(","));
        out.push('\n');
    };
    keep(header.clone(), "holiday");
    for (i, line) in lines.enumerate() {
        keep(
            line.split(',').collect(),
            if i % 10 == 0 { "yes" } else { "" },
        );
    }
    let path = env.dir.path().join(format!("new-{n}.csv"));
    fs::write(&path, out).unwrap();
    path
}

#[test]
fn a_changed_schema_is_refused_until_migrated_then_a_cold_model_takes_over() {
    let env = Env::new(&repo("demo-data/tidegate.toml"));
    let files: Vec<PathBuf> = ["01", "02", "03"].iter().map(|n| night(n)).collect();
    assert_eq!(code(&env.ingest(&files)), 0);
    assert_eq!(code(&env.run(&["retrain"])), 0);
    let before = env.status_json()["summary"].clone();
    assert_eq!(before["serving"], 1);
    let cfg = new_config(env.dir.path());
    let cfg_s = cfg.to_str().unwrap();

    // Using the new config without migrating is refused with the way out.
    let out = env.run(&["--config", cfg_s, "ingest", night("04").to_str().unwrap()]);
    assert_eq!(code(&out), 78, "{}", stderr(&out));
    assert!(
        stderr(&out).contains("tidegate migrate"),
        "{}",
        stderr(&out)
    );

    // A dry run changes nothing.
    let out = env.run(&["--config", cfg_s, "migrate", "--reason", "x", "--dry-run"]);
    assert_eq!(code(&out), 0, "{}", stderr(&out));
    assert!(
        stdout(&out).contains("added: holiday; removed: rain_mm"),
        "{}",
        stdout(&out)
    );
    assert_eq!(env.status_json()["summary"]["serving"], 1);

    let out = env.run(&[
        "--config",
        cfg_s,
        "migrate",
        "--reason",
        "rain gauge retired; holidays logged",
    ]);
    assert_eq!(code(&out), 0, "{}", stderr(&out));
    let after = env.status_json()["summary"].clone();
    for key in ["rows", "batches", "train_rows", "holdout_rows"] {
        assert_eq!(before[key], after[key], "{key}");
    }
    assert!(
        after["serving"].is_null(),
        "the old model does not fit the new columns"
    );
    assert!(!env.state().join("serving").exists());
    let m = env.log_json(&["--kind", "schema-migrated"]);
    assert_eq!(m.len(), 1);
    assert_eq!(m[0]["removed"], serde_json::json!(["rain_mm"]));
    assert_eq!(m[0]["previous_serving"], 1);
    assert_eq!(code(&env.run(&["verify"])), 0);

    // Files in the old layout are now refused; the new layout is taken.
    let out = env.ingest(&[night("04")]);
    assert_eq!(code(&out), 65);
    assert!(
        stdout(&out).contains("unknown column(s): rain_mm"),
        "{}",
        stdout(&out)
    );
    assert_eq!(code(&env.ingest(&[new_layout(&env, "04")])), 0);
    // The next cycle is cold and judged against the trivial predictor.
    let out = env.run(&["--json", "retrain"]);
    assert_eq!(code(&out), 0, "{}", stderr(&out));
    let r: serde_json::Value = serde_json::from_str(stdout(&out).trim()).unwrap();
    assert_eq!(r["candidates"][0]["run"], "cold", "{r}");
    assert_eq!(r["compared_with"], "trivial predictor");
    assert_eq!(r["outcome"], "promote", "{r}");
    let out = env.run(&[
        "predict",
        "--input",
        new_layout(&env, "06").to_str().unwrap(),
    ]);
    assert_eq!(code(&out), 0, "{}", stderr(&out));
    // The old checkpoint cannot serve under the new columns.
    let out = env.run(&["rollback", "--to", "m000001", "--reason", "try"]);
    assert_eq!(code(&out), 1);
    assert!(stderr(&out).contains("cannot serve"), "{}", stderr(&out));
    assert_eq!(code(&env.run(&["verify"])), 0);
    // Running migrate again with the same config has nothing to do.
    let out = env.run(&["--config", cfg_s, "migrate", "--reason", "again"]);
    assert_eq!(code(&out), 0);
    assert!(
        stdout(&out).contains("nothing to migrate"),
        "{}",
        stdout(&out)
    );
}

#[test]
fn a_kind_change_is_refused_and_changes_nothing() {
    let env = Env::new(&repo("demo-data/tidegate.toml"));
    assert_eq!(code(&env.ingest(&[night("01")])), 0);
    let text = fs::read_to_string(repo("demo-data/tidegate.toml"))
        .unwrap()
        .replace(
            "name = \"rain_mm\"\nkind = \"number\"\nmin = 0\nmax = 300",
            "name = \"rain_mm\"\nkind = \"category\"",
        );
    let cfg = env.dir.path().join("kind.toml");
    fs::write(&cfg, text).unwrap();
    let out = env.run(&[
        "--config",
        cfg.to_str().unwrap(),
        "migrate",
        "--reason",
        "x",
    ]);
    assert_eq!(code(&out), 78, "{}", stderr(&out));
    assert!(stderr(&out).contains("changed kind"), "{}", stderr(&out));
    assert!(env.log_json(&["--kind", "schema-migrated"]).is_empty());
    assert_eq!(code(&env.run(&["verify"])), 0);
    assert_eq!(
        code(&env.ingest(&[night("02")])),
        0,
        "the old config still works"
    );
}
