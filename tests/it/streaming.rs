//! A cold candidate whose rows do not fit the cycle's memory budget
//! (`[memory] cycle_mb`) streams them from the store, through the real
//! binary: it says so in the log and in its manifest, and the gate judges
//! the model it trained like any other. With the default budget the same
//! store trains in memory, as before.

use super::support::*;

/// The tiny state's three batches of 200 rows.
fn tiny_state(extra: &str) -> Env {
    let env = Env::with_config_text(&format!("{TINY_CONFIG}\n{extra}"));
    let files: Vec<_> = (0..3)
        .map(|i| {
            let file = env.dir.path().join(format!("rows-{i}.csv"));
            std::fs::write(&file, tiny_rows(i * 200, 200)).unwrap();
            file
        })
        .collect();
    let out = env.ingest(&files);
    assert_eq!(code(&out), 0, "{}", stderr(&out));
    env
}

fn manifest(env: &Env, model: &str) -> serde_json::Value {
    let path = env.state().join(format!("models/{model}/manifest.json"));
    serde_json::from_slice(&std::fs::read(path).unwrap()).unwrap()
}

#[test]
fn a_cold_candidate_over_the_memory_budget_streams_and_is_judged() {
    // About 450 training rows of 4 cells and 5 encoded inputs take about
    // 29 KB held; 20 KiB is too little, the more so once a holdout slice
    // is counted.
    let env = tiny_state("[memory]\ncycle_mb = 0.02\n");
    let out = env.run(&["-v", "--json", "retrain"]);
    assert_eq!(code(&out), 0, "{}", stderr(&out));
    let said = stderr(&out);
    let streamed: u64 = said
        .split("the cold candidate streams ")
        .skip(1)
        .find_map(|rest| rest.split(' ').next().and_then(|n| n.parse().ok()))
        .unwrap_or_else(|| panic!("no word of streaming: {said}"));
    assert!(
        said.contains("training rows from the store (memory budget 0.02 MiB)"),
        "{said}"
    );
    assert!((400..500).contains(&streamed), "{said}");
    let r: serde_json::Value = serde_json::from_str(stdout(&out).trim()).unwrap();
    let m = manifest(&env, "m000001");
    let s = &m["summary"]["streamed"];
    assert!(s["blocks"].as_u64().unwrap() >= 3, "{m}");
    assert_eq!(s["budget_mb"], 1, "{m}");
    // Every training row but the validation rows, each epoch.
    let rows = m["summary"]["rows"].as_u64().unwrap();
    let validation = m["summary"]["validation_rows"].as_u64().unwrap();
    assert_eq!(rows + validation, streamed, "{m}");
    assert!(validation > 0);
    // The gate judged it against the trivial predictor on the holdout rows
    // and it learnt the plain linear truth well enough to serve.
    let loss = r["candidates"][0]["holdout_loss"].as_f64().unwrap();
    let trivial = r["trivial_loss"].as_f64().unwrap();
    assert!(
        loss < 0.2 * trivial,
        "streamed {loss}, trivial {trivial}: {r}"
    );
    assert_eq!(env.status_json()["summary"]["serving"], 1, "{r}");

    // With a model serving, a forced cold candidate streams beside the
    // warm one and both are judged against the serving model.
    std::fs::write(env.dir.path().join("rows-3.csv"), tiny_rows(600, 200)).unwrap();
    assert_eq!(code(&env.ingest(&[env.dir.path().join("rows-3.csv")])), 0);
    let out = env.run(&["--json", "retrain", "--cold"]);
    assert_eq!(code(&out), 0, "{}", stderr(&out));
    let r: serde_json::Value = serde_json::from_str(stdout(&out).trim()).unwrap();
    assert_eq!(r["candidates"].as_array().unwrap().len(), 2, "{r}");
    let kinds: Vec<(String, bool)> = ["m000002", "m000003"]
        .iter()
        .map(|id| {
            let m = manifest(&env, id);
            (
                m["kind"].as_str().unwrap_or_default().to_string(),
                !m["summary"]["streamed"].is_null(),
            )
        })
        .collect();
    assert!(kinds.contains(&("cold".into(), true)), "{kinds:?}");
    assert!(kinds.contains(&("warm".into(), false)), "{kinds:?}");
    let shelved_or_promoted = env
        .log_json(&[])
        .iter()
        .filter(|e| {
            let kind = e["kind"].as_str().unwrap_or_default();
            (kind == "promoted" || kind == "shelved") && e["cycle"] == 2
        })
        .count();
    assert_eq!(shelved_or_promoted, 2, "each candidate's fate is logged");
    assert_eq!(code(&env.run(&["verify"])), 0);
}

#[test]
fn with_the_default_budget_the_same_store_trains_in_memory() {
    let env = tiny_state("");
    let out = env.run(&["-v", "retrain"]);
    assert_eq!(code(&out), 0, "{}", stderr(&out));
    assert!(!stderr(&out).contains("streams"), "{}", stderr(&out));
    let m = manifest(&env, "m000001");
    assert!(m["summary"]["streamed"].is_null(), "{m}");
}

#[test]
fn a_memory_budget_that_is_not_a_positive_number_is_refused_with_its_place() {
    let dir = tempfile::tempdir().unwrap();
    let path = dir.path().join("tidegate.toml");
    std::fs::write(&path, format!("{TINY_CONFIG}\n[memory]\ncycle_mb = 0\n")).unwrap();
    let out = std::process::Command::new(env!("CARGO_BIN_EXE_tidegate"))
        .arg("--state")
        .arg(dir.path().join("state"))
        .arg("--config")
        .arg(&path)
        .arg("init")
        .output()
        .unwrap();
    assert_ne!(code(&out), 0);
    let line = TINY_CONFIG.lines().count() + 3;
    let err = stderr(&out);
    assert!(
        err.contains(&format!("tidegate.toml:{line}:1")) && err.contains("cycle_mb = 0 must be"),
        "{err}"
    );
}
