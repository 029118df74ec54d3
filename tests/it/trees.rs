//! The boosted-tree reference model through the real binary: its loss in
//! the log, and advice in `status`, `models` and the log when the trees do
//! clearly better than the network; none when they do not. The network
//! keeps serving either way.

use std::path::PathBuf;

use super::support::*;
use tidegate::rng::Rng;

/// Two number inputs; a small network trained briefly, as a user might
/// configure one.
const CONFIG: &str = r#"[data]
target = "y"
task = "regression"
holdout_fraction = 0.25

[[data.columns]]
name = "a"
kind = "number"

[[data.columns]]
name = "b"
kind = "number"

[[data.columns]]
name = "y"
kind = "number"

[model]
hidden = [8]

[training]
cold_epochs = 100
warm_epochs = 5
learning_rate = 0.01

[gate]
min_holdout_rows = 50
"#;

/// y = 3·b, plus 10 on every other eighth of a's range, plus noise: a
/// linear part any model finds and a step pattern in `a` that a small
/// network smooths over and trees cut where it changes.
fn striped_rows(seed: u64, n: usize) -> String {
    let mut rng = Rng::new(seed);
    let mut s = String::from("a,b,y\n");
    for _ in 0..n {
        let a = rng.uniform();
        let b = 10.0 * rng.uniform();
        let stripe = ((a * 8.0).floor() as u64 % 2) as f64;
        let y = 3.0 * b + 10.0 * stripe + rng.normal();
        s.push_str(&format!("{a:.4},{b:.3},{y:.3}\n"));
    }
    s
}

fn night(env: &Env, i: u64) -> PathBuf {
    let file = env.dir.path().join(format!("night-{i}.csv"));
    std::fs::write(&file, striped_rows(100 + i, 300)).unwrap();
    file
}

fn retrain(env: &Env) -> serde_json::Value {
    let out = env.run(&["--json", "retrain"]);
    assert_eq!(code(&out), 0, "{}", stderr(&out));
    serde_json::from_str(stdout(&out).trim()).unwrap()
}

#[test]
fn trees_that_do_clearly_better_are_advice_and_the_network_keeps_serving() {
    let env = Env::with_config_text(CONFIG);
    let files: Vec<PathBuf> = (0..3).map(|i| night(&env, i)).collect();
    assert_eq!(code(&env.ingest(&files)), 0);
    let r = retrain(&env);
    let trees = r["trees_loss"].as_f64().expect("trees fitted");
    let network = r["candidates"][0]["holdout_loss"].as_f64().unwrap();
    assert!(trees < 0.5 * network, "trees {trees} vs network {network}");
    let better = r["trees_better_by"].as_f64().expect("advice");
    assert!(better > 0.5, "{better}");
    // The network was promoted on its own merit; the trees never serve.
    let summary = &env.status_json()["summary"];
    assert_eq!(summary["serving"], 1, "{r}");
    assert!(summary["versus_trees"]["p"].as_f64().unwrap() <= 0.05);
    let status = stdout(&env.run(&["status"]));
    assert!(
        status.contains("advice      boosted trees do")
            && status.contains("the network may be the wrong tool for this data; it keeps serving"),
        "{status}"
    );
    let models = stdout(&env.run(&["models"]));
    assert!(
        models.contains("% better)") && models.contains("advice only"),
        "{models}"
    );
    let b = env.log_json(&["--kind", "baselines-scored"]);
    assert_eq!(b[0]["trees_loss"].as_f64(), Some(trees));
    assert!(b[0]["trees_rows"].as_u64().unwrap() > 500);
    assert_eq!(b[0]["trees_versus"][0]["model"], 1);

    // The next cycle scores m000001 as the serving model beside a warm
    // candidate; the trees beat the better of the two, and the log line
    // says so.
    assert_eq!(code(&env.ingest(&[night(&env, 3)])), 0);
    retrain(&env);
    let log = stdout(&env.run(&["log", "--kind", "baselines-scored"]));
    let line = log.lines().last().unwrap();
    assert!(
        line.contains(", trees ")
            && line.contains("boosted trees do")
            && line.contains("better than the best network (m00000"),
        "{log}"
    );
    // The report draws the trees' line and gives the advice.
    let page = env.dir.path().join("report.html");
    let out = env.run(&["report", "--out", page.to_str().unwrap()]);
    assert_eq!(code(&out), 0, "{}", stderr(&out));
    let html = std::fs::read_to_string(&page).unwrap();
    assert!(
        html.contains("Advice: boosted trees do") && html.contains(">\nboosted trees\n</text>"),
        "no advice or trees line in the report"
    );
    assert_eq!(code(&env.run(&["verify"])), 0);
}

#[test]
fn no_advice_when_the_trees_do_not_do_clearly_better() {
    // A plain linear truth that the network learns: the trees' steps do
    // no better.
    let env = Env::tiny_with_model();
    let summary = &env.status_json()["summary"];
    let v = &summary["versus_trees"];
    assert!(v["trees_loss"].as_f64().unwrap() > 0.0, "{summary}");
    assert!(v["trees_better_by"].is_null(), "{summary}");
    let status = stdout(&env.run(&["status"]));
    assert!(status.contains("vs trees    m000001"), "{status}");
    assert!(!status.contains("advice"), "{status}");
    let log = stdout(&env.run(&["log", "--kind", "baselines-scored"]));
    assert!(
        log.contains(", trees ") && !log.contains("boosted trees do"),
        "{log}"
    );
    let models = stdout(&env.run(&["models"]));
    assert!(!models.contains("% better)"), "{models}");
    let page = env.dir.path().join("report.html");
    assert_eq!(
        code(&env.run(&["report", "--out", page.to_str().unwrap()])),
        0
    );
    let html = std::fs::read_to_string(&page).unwrap();
    assert!(html.contains("against boosted trees") && !html.contains("Advice: boosted trees"));
}
