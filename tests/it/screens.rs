//! Snapshots of what people read: `--help`, `status`, `models` and `log`
//! on a small demo state. Times, temp paths and measured numbers are
//! redacted, and runs of spaces folded, so a snapshot changes only when a
//! screen's wording or layout does. `UPDATE_SNAPSHOTS=1` rewrites them.

use std::path::PathBuf;

use crate::support::{Env, code, repo, stderr, stdout};

fn redact(text: &str, env: &Env) -> String {
    let state = env.state().display().to_string();
    let mut out = String::new();
    for line in text.replace(&state, "<state>").lines() {
        let mut l = String::new();
        let mut word = String::new();
        let flush = |word: &mut String, l: &mut String| {
            if !word.is_empty() {
                l.push_str(&redact_word(word));
                word.clear();
            }
        };
        for ch in line.chars() {
            if ch == ' ' {
                flush(&mut word, &mut l);
                if !l.ends_with(' ') {
                    l.push(' ');
                }
            } else {
                word.push(ch);
            }
        }
        flush(&mut word, &mut l);
        out.push_str(l.trim_end());
        out.push('\n');
    }
    out
}

/// Times become <time> and every number <x> (losses, p-values, epochs and
/// counts can move with the CPU's float rounding); ids such as m000001
/// stay.
fn redact_word(w: &str) -> String {
    let core = w.trim_matches(|c: char| ",;:()[]".contains(c));
    if core.len() >= 20 && core.as_bytes().get(4) == Some(&b'-') && core.contains('T') {
        return w.replace(core, "<time>");
    }
    let numeric = core.trim_end_matches('%');
    if !numeric.is_empty() && numeric.parse::<f64>().is_ok() {
        return w.replace(core, "<x>");
    }
    w.to_string()
}

fn check(name: &str, text: &str) {
    let path: PathBuf = repo(&format!("tests/snapshots/{name}.txt"));
    if std::env::var_os("UPDATE_SNAPSHOTS").is_some() {
        std::fs::write(&path, text).unwrap();
        return;
    }
    let want = std::fs::read_to_string(&path).unwrap_or_else(|_| {
        panic!(
            "no snapshot {}; run with UPDATE_SNAPSHOTS=1",
            path.display()
        )
    });
    assert_eq!(
        text, want,
        "{name} changed; if on purpose, run with UPDATE_SNAPSHOTS=1"
    );
}

#[test]
fn screens_match_their_snapshots() {
    let env = Env::new(&repo("demo-data/tidegate.toml"));
    let files: Vec<PathBuf> = ["01", "02", "03", "04", "05"]
        .iter()
        .map(|n| repo(&format!("demo-data/night-{n}.csv")))
        .collect();
    assert_eq!(code(&env.ingest(&files)), 65, "night 5 is refused");
    let out = env.run(&["retrain"]);
    assert_eq!(code(&out), 0, "{}", stderr(&out));
    for (name, args) in [
        ("help", &["--help"][..]),
        ("status", &["status"][..]),
        ("models", &["models"][..]),
        (
            "log",
            &["log", "--kind", "batch-refused,promoted,baselines-scored"][..],
        ),
    ] {
        let out = env.run(args);
        assert_eq!(code(&out), 0, "{name}: {}", stderr(&out));
        check(name, &redact(&stdout(&out), &env));
    }
}
