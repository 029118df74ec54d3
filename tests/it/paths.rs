//! Every command that writes to a path the user names works with a bare
//! file name (the current folder), a relative path and an absolute path.

use std::path::{Path, PathBuf};

use crate::support::{Env, code, stderr};

/// The three ways to name a destination, for a command run in `cwd`:
/// (argument as given, where the file must land).
fn destinations(cwd: &Path, name: &str) -> Vec<(String, PathBuf)> {
    std::fs::create_dir_all(cwd.join("sub")).unwrap();
    vec![
        (format!("bare-{name}"), cwd.join(format!("bare-{name}"))),
        (
            format!("sub/rel-{name}"),
            cwd.join(format!("sub/rel-{name}")),
        ),
        (
            cwd.join(format!("abs-{name}")).display().to_string(),
            cwd.join(format!("abs-{name}")),
        ),
    ]
}

fn run_in(env: &Env, cwd: &Path, args: &[&str]) -> std::process::Output {
    env.command().current_dir(cwd).args(args).output().unwrap()
}

#[test]
fn predict_output_takes_bare_relative_and_absolute_paths() {
    let env = Env::tiny_with_model();
    let cwd = env.dir.path().join("work");
    let input = env.dir.path().join("score.csv");
    std::fs::write(&input, crate::support::tiny_rows(5000, 20)).unwrap();
    for (arg, lands) in destinations(&cwd, "out.csv") {
        let out = run_in(
            &env,
            &cwd,
            &[
                "predict",
                "--input",
                input.to_str().unwrap(),
                "--output",
                &arg,
            ],
        );
        assert_eq!(code(&out), 0, "--output {arg}: {}", stderr(&out));
        let text = std::fs::read_to_string(&lands).unwrap();
        assert_eq!(
            text.lines().count(),
            21,
            "--output {arg}: header and 20 rows"
        );
    }
}

#[test]
fn report_backup_and_template_take_bare_relative_and_absolute_paths() {
    let env = Env::with_config_text(crate::support::TINY_CONFIG);
    let cwd = env.dir.path().join("work");
    for (arg, lands) in destinations(&cwd, "report.html") {
        let out = run_in(&env, &cwd, &["report", "--out", &arg]);
        assert_eq!(code(&out), 0, "report --out {arg}: {}", stderr(&out));
        assert!(std::fs::read_to_string(&lands).unwrap().contains("<html"));
    }
    for (arg, lands) in destinations(&cwd, "backup") {
        let out = run_in(&env, &cwd, &["backup", "--out", &arg]);
        assert_eq!(code(&out), 0, "backup --out {arg}: {}", stderr(&out));
        assert!(lands.join("backup.json").is_file(), "backup --out {arg}");
    }
    for (arg, lands) in destinations(&cwd, "tidegate.toml") {
        let out = run_in(&env, &cwd, &["init", "--template", &arg]);
        assert_eq!(code(&out), 0, "init --template {arg}: {}", stderr(&out));
        assert!(std::fs::read_to_string(&lands).unwrap().contains("[data]"));
    }
}
