//! `tidegate demo` through the real binary: the whole story in one run.

use crate::support::{code, stderr, stdout};

#[test]
fn the_demo_tells_the_whole_story_and_leaves_a_state_that_verifies() {
    let dir = tempfile::tempdir().unwrap();
    let state = dir.path().join("demo-state");
    let bin = env!("CARGO_BIN_EXE_tidegate");
    let out = std::process::Command::new(bin)
        .args(["--json", "demo", "--into"])
        .arg(&state)
        .env("USER", "tester")
        .output()
        .unwrap();
    assert_eq!(code(&out), 0, "{}", stderr(&out));
    let v: serde_json::Value = serde_json::from_str(stdout(&out).trim()).unwrap();
    let nights = v["nights"].as_array().unwrap();
    assert_eq!(nights.len(), 25, "24 nights and one resent file");
    let has = |field: &str, pat: &str| {
        nights
            .iter()
            .any(|n| n[field].as_str().unwrap_or("").contains(pat))
    };
    assert!(has("decision", "promote"), "{v}");
    assert!(has("decision", "shelve"), "{v}");
    assert!(has("intake", "refused"), "{v}");
    assert!(has("intake", "duplicate of"), "{v}");
    assert!(has("intake", "new shop"), "{v}");
    // Two things change how the data behave: Corrin's demand (from night
    // 10) and the flour shortage during a heatwave (nights 13–17), after
    // which a model that learnt "heat halves sales" is worse than the one
    // it replaced while the heat goes on (nights 18–23). Corrin's shift
    // must be flagged by night 11; the only other verdict allowed is a
    // regression once the flour is back, and a regression must be caught
    // and rolled back before the heat ends. New weekdays and the new shop
    // are new conditions, reported, never a flag.
    let file = |n: &serde_json::Value| n["file"].as_str().unwrap_or("").to_string();
    let mut corrin_by_11 = false;
    let mut rolled_back = false;
    for n in nights {
        let check = n["fresh_check"].as_str().unwrap_or("");
        if check.contains("regressed") || check.contains("rolled back") {
            let f = file(n);
            assert!(
                f.as_str() >= "night-18" && f.as_str() < "night-24",
                "a regression only once the flour is back, in the heat: {n}"
            );
            rolled_back |= check.contains("rolled back");
        }
        if let Some(rest) = check.strip_prefix("shifted (") {
            // Only the designed shift: the town of Corrin, or one of its
            // shops (named "Corrin <place>"), which carry the same change.
            let values = rest.trim_end_matches(')');
            for value in values.split(", ") {
                assert!(
                    value == "town = Corrin" || value.starts_with("shop = Corrin "),
                    "only the designed shift: {value} in {n}"
                );
            }
            assert!(file(n).as_str() >= "night-10", "before the shift: {n}");
            corrin_by_11 |= file(n).as_str() <= "night-11.csv" && values.contains("Corrin");
        }
    }
    // A model promoted from the shortage nights must not keep serving.
    let promoted_in_shortage = nights.iter().any(|n| {
        let f = file(n);
        f.as_str() >= "night-13"
            && f.as_str() < "night-18"
            && n["decision"].as_str().unwrap_or("").contains("promote")
    });
    assert!(
        !promoted_in_shortage || rolled_back,
        "the designed regression is rolled back: {v}"
    );
    assert!(corrin_by_11, "Corrin's shift is flagged by night 11: {v}");
    assert!(has("fresh_check", "new-conditions"), "{v}");
    let report = std::path::PathBuf::from(v["report"].as_str().unwrap());
    let page = std::fs::read_to_string(&report).unwrap();
    assert!(
        page.contains("<svg") && !page.contains("<script"),
        "a self-contained page"
    );
    // The budget is one minute on 2 cores after the build.
    assert!(v["seconds"].as_f64().unwrap() < 60.0, "{v}");
    let verify = std::process::Command::new(bin)
        .arg("--state")
        .arg(&state)
        .arg("verify")
        .output()
        .unwrap();
    assert_eq!(code(&verify), 0, "{}", stdout(&verify));
    // Drift flags only where the data were designed to move: the sales
    // (and so the next night's prev_day_sold) during the flour shortage,
    // and the temperature in the heatwave. The day-level columns (weekday,
    // weather) differ every night, which the rule learns from past batches;
    // Corrin's shift is in the target of one town; the new shop is a new
    // value, reported, not flagged.
    let accepted = std::process::Command::new(bin)
        .arg("--state")
        .arg(&state)
        .args(["--json", "log", "--kind", "batch-accepted"])
        .output()
        .unwrap();
    let mut judged = 0;
    for line in stdout(&accepted).lines() {
        let e: serde_json::Value = serde_json::from_str(line).unwrap();
        let Some(columns) = e["drift"]["columns"].as_array() else {
            continue;
        };
        for c in columns {
            if c["judged"]["verdict"] == "usual" || c["judged"]["verdict"] == "drift" {
                judged += 1;
            }
            if c["flagged"] == true {
                let f = e["file"].as_str().unwrap_or("");
                let designed = ("night-13".."night-19").contains(&f)
                    && ["loaves_sold", "prev_day_sold", "temp_c"]
                        .contains(&c["column"].as_str().unwrap_or(""));
                assert!(designed, "{f}: {c}");
            }
        }
    }
    assert!(judged > 0, "the last nights are judged, not only building");
}

#[test]
fn completions_are_printed_for_each_shell() {
    let bin = env!("CARGO_BIN_EXE_tidegate");
    for (shell, marker) in [
        ("bash", "complete -F"),
        ("zsh", "#compdef tidegate"),
        ("fish", "complete -c tidegate"),
    ] {
        let out = std::process::Command::new(bin)
            .args(["completions", shell])
            .output()
            .unwrap();
        assert_eq!(code(&out), 0, "{}", stderr(&out));
        let text = stdout(&out);
        assert!(
            text.contains(marker),
            "{shell}: {}",
            &text[..text.len().min(200)]
        );
        for sub in ["ingest", "retrain", "rollback", "demo"] {
            assert!(text.contains(sub), "{shell} script lacks {sub}");
        }
    }
    let out = std::process::Command::new(bin)
        .args(["completions", "tcsh"])
        .output()
        .unwrap();
    assert_eq!(code(&out), 2, "an unknown shell is a usage error");
}

#[test]
fn colours_only_when_asked_or_on_a_terminal_without_no_color() {
    let dir = tempfile::tempdir().unwrap();
    let state = dir.path().join("s");
    let bin = env!("CARGO_BIN_EXE_tidegate");
    let run = |args: &[&str], no_color: bool| {
        let mut c = std::process::Command::new(bin);
        c.arg("--state")
            .arg(&state)
            .args(args)
            .env_remove("NO_COLOR");
        if no_color {
            c.env("NO_COLOR", "1");
        }
        stdout(&c.output().unwrap())
    };
    let out = std::process::Command::new(bin)
        .args(["--json", "demo", "--into"])
        .arg(&state)
        .output()
        .unwrap();
    assert_eq!(code(&out), 0, "{}", stderr(&out));
    let log = ["log", "--kind", "promoted,shelved"];
    // Tests read a pipe, not a terminal: auto means no colours.
    assert!(!run(&log, false).contains('\x1b'));
    let forced = run(&[&["--color", "always"][..], &log[..]].concat(), false);
    assert!(forced.contains("\x1b[32mpromoted\x1b[0m"), "{forced}");
    assert!(!run(&[&["--color", "never"][..], &log[..]].concat(), false).contains('\x1b'));
    assert!(!run(&log, true).contains('\x1b'));
}
