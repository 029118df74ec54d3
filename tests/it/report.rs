//! `tidegate report` through the real binary: the page of a demo state dir
//! is self-contained (no script, no URL), has one chart per section that
//! has data, names the model versions and lists every audit entry, shows
//! the permutation importance of every input column with its caveats; an
//! empty state dir still gets a page that says what is missing; the page
//! renders in headless Chromium without console errors.

use std::collections::HashSet;
use std::fs;
use std::path::{Path, PathBuf};
use std::process::{Command, Stdio};
use std::time::Duration;

use crate::support::{Env, code, repo, stderr, stdout};

fn night(n: &str) -> PathBuf {
    repo(&format!("demo-data/night-{n}.csv"))
}

/// Two retrain cycles over nights 1–7: a cold first model, a refused file
/// (night 5), a new shop and a warm candidate.
fn demo_state() -> Env {
    let env = Env::new(&repo("demo-data/tidegate.toml"));
    let first: Vec<PathBuf> = ["01", "02", "03", "04"].iter().map(|n| night(n)).collect();
    assert_eq!(code(&env.ingest(&first)), 0);
    let out = env.run(&["retrain"]);
    assert_eq!(code(&out), 0, "{}", stderr(&out));
    let next: Vec<PathBuf> = ["05", "06", "07"].iter().map(|n| night(n)).collect();
    // 65: night 5 is refused (demo-data/README.md), the others are stored.
    assert_eq!(code(&env.ingest(&next)), 65);
    let out = env.run(&["retrain"]);
    assert_eq!(code(&out), 0, "{}", stderr(&out));
    env
}

fn write_report(env: &Env, extra: &[&str]) -> (PathBuf, String) {
    let path = env.dir.path().join("out.html");
    let mut args = vec!["report", "--out", path.to_str().unwrap()];
    args.extend_from_slice(extra);
    let out = env.run(&args);
    assert_eq!(code(&out), 0, "{}", stderr(&out));
    assert_eq!(stdout(&out).trim(), path.display().to_string());
    let html = fs::read_to_string(&path).unwrap();
    (path, html)
}

/// Nothing on the page may load from elsewhere or run.
fn assert_self_contained(html: &str) {
    let lower = html.to_ascii_lowercase();
    for banned in [
        "http://",
        "https://",
        "<script",
        "<link",
        "<img",
        "<iframe",
        "<object",
        "<embed",
        " src=",
        "url(",
        "@import",
        "javascript:",
    ] {
        assert!(!lower.contains(banned), "the report contains {banned:?}");
    }
    assert!(lower.starts_with("<!doctype html>"));
    assert!(lower.trim_end().ends_with("</html>"));
}

fn audit_lines(env: &Env) -> usize {
    fs::read_to_string(env.state().join("audit.jsonl"))
        .unwrap()
        .lines()
        .count()
}

fn logged_seqs(html: &str) -> Vec<u64> {
    html.match_indices("<tr data-seq=\"")
        .map(|(i, m)| {
            let rest = &html[i + m.len()..];
            rest[..rest.find('"').unwrap()].parse().unwrap()
        })
        .collect()
}

/// The input-influence section: permutation importance of every input
/// column the demo model was given, with an interval and the text that
/// says what the number does not mean; the old weight sum is gone.
fn assert_importance(html: &str) {
    let start = html
        .find("<section id=\"influence\">")
        .expect("influence section");
    let section = &html[start..start + html[start..].find("</section>").unwrap()];
    assert!(section.contains("permutation importance"), "{section}");
    assert!(section.contains("Breiman 2001"));
    assert!(section.contains("not the causal effect"));
    assert!(section.contains("Correlated columns share credit"));
    assert!(section.contains("columns the model was not given"));
    assert!(!html.contains("first-layer weight"));
    assert_eq!(section.matches("<svg").count(), 1);
    let table = &section[section.find("<table class=\"importance\">").expect("table")..];
    let columns: Vec<&str> = table
        .match_indices("<tr><td>")
        .map(|(i, m)| {
            let rest = &table[i + m.len()..];
            &rest[..rest.find("</td>").unwrap()]
        })
        .collect();
    let mut sorted = columns.clone();
    sorted.sort_unstable();
    assert_eq!(
        sorted,
        [
            "bread",
            "prev_day_sold",
            "promo",
            "rain_mm",
            "shop",
            "temp_c",
            "town",
            "weekday"
        ],
        "every input column once, the target never"
    );
    // Six batches are stored (night 5 was refused), so every row has an
    // interval ("a to b"), none says "one batch".
    assert_eq!(table.matches(" to ").count(), 8, "{table}");
    assert!(!table.contains("one batch"));
}

#[test]
fn report_of_the_demo_is_self_contained_and_shows_every_part() {
    let env = demo_state();
    let (_, html) = write_report(&env, &[]);
    assert_self_contained(&html);
    // Holdout, curves, rows, response map, permutation importance.
    assert_eq!(html.matches("<svg").count(), 5, "one chart per section");
    assert_eq!(html.matches("</svg>").count(), 5);
    assert_importance(&html);
    for id in ["m000001", "m000002"] {
        assert!(html.contains(id), "{id} missing");
    }
    // Every audit entry, newest first.
    let seqs = logged_seqs(&html);
    let n = audit_lines(&env);
    assert_eq!(seqs.len(), n);
    assert_eq!(seqs, (1..=n as u64).rev().collect::<Vec<_>>());
    // The refused file and its reason, the baselines, the map's inputs
    // (the first two number inputs of the demo config).
    assert!(html.contains("night-05.csv"));
    assert!(html.contains("ridge baseline") && html.contains("trivial predictor"));
    assert!(html.contains("predicted loaves_sold"));
    assert!(html.contains("over temp_c and rain_mm"));
    assert!(html.contains("promoted"));
    assert!(!html.contains("No model serves yet"));

    // Other axes, and the default path in the state dir.
    let out = env.run(&["report", "--x", "prev_day_sold", "--y", "temp_c"]);
    assert_eq!(code(&out), 0, "{}", stderr(&out));
    let default = env.state().join("report.html");
    assert_eq!(stdout(&out).trim(), default.display().to_string());
    let html = fs::read_to_string(&default).unwrap();
    assert!(html.contains("over prev_day_sold and temp_c"));
    assert_eq!(html.matches("<svg").count(), 5);

    // A category column cannot be an axis: usage error naming the choices.
    let out = env.run(&["report", "--x", "shop"]);
    assert_eq!(code(&out), 2);
    let err = stderr(&out);
    assert!(err.contains("\"shop\" is a category column"), "{err}");
    assert!(err.contains("temp_c, rain_mm, prev_day_sold"), "{err}");
}

#[test]
fn report_of_an_empty_state_dir_says_what_is_missing() {
    let env = Env::new(&repo("demo-data/tidegate.toml"));
    let (_, html) = write_report(&env, &[]);
    assert_self_contained(&html);
    assert_eq!(html.matches("<svg").count(), 0);
    assert!(html.contains("No candidate has been trained yet"));
    assert!(html.contains("No file has arrived yet"));
    assert!(html.contains("No model serves yet"));
    assert_eq!(logged_seqs(&html), vec![1]);

    // A folder that is not a state dir is an error that names it.
    let other = env.dir.path().join("nothing-here");
    let out = Command::new(env!("CARGO_BIN_EXE_tidegate"))
        .args(["--state", other.to_str().unwrap(), "report"])
        .env_remove("TIDEGATE_STATE")
        .output()
        .unwrap();
    assert_eq!(code(&out), 1);
    assert!(stderr(&out).contains("nothing-here"), "{}", stderr(&out));

    // Writing into a missing folder fails with the path and what to do.
    let out = env.run(&["report", "--out", "/nonexistent-folder/r.html"]);
    assert_eq!(code(&out), 1);
    assert!(
        stderr(&out).contains("/nonexistent-folder/r.html"),
        "{}",
        stderr(&out)
    );
}

const CHROMIUM: &str = "/usr/bin/chromium";

/// Runs `cmd`, killing it when it takes longer than `limit`.
fn output_within(mut cmd: Command, limit: Duration) -> std::process::Output {
    let child = cmd
        .stdout(Stdio::piped())
        .stderr(Stdio::piped())
        .spawn()
        .unwrap();
    let pid = child.id();
    let (tx, rx) = std::sync::mpsc::channel();
    std::thread::spawn(move || {
        let _ = tx.send(child.wait_with_output());
    });
    match rx.recv_timeout(limit) {
        Ok(out) => out.unwrap(),
        Err(_) => {
            let _ = Command::new("kill").args(["-9", &pid.to_string()]).status();
            panic!("{CHROMIUM} did not finish within {limit:?}");
        }
    }
}

/// Width, height and number of distinct colours of an 8-bit, non-interlaced
/// RGB or RGBA PNG (what Chromium writes), decoded here per the PNG spec
/// (chunks, zlib stream, the five scanline filters).
fn png_colours(path: &Path) -> (u32, u32, usize) {
    use std::io::Read;
    let bytes = fs::read(path).unwrap();
    assert_eq!(&bytes[..8], b"\x89PNG\r\n\x1a\n", "not a PNG");
    let (mut at, mut ihdr, mut idat) = (8, Vec::new(), Vec::new());
    while at + 8 <= bytes.len() {
        let len = u32::from_be_bytes(bytes[at..at + 4].try_into().unwrap()) as usize;
        let kind = &bytes[at + 4..at + 8];
        let data = &bytes[at + 8..at + 8 + len];
        match kind {
            b"IHDR" => ihdr = data.to_vec(),
            b"IDAT" => idat.extend_from_slice(data),
            _ => {}
        }
        at += 12 + len;
    }
    let w = u32::from_be_bytes(ihdr[0..4].try_into().unwrap());
    let h = u32::from_be_bytes(ihdr[4..8].try_into().unwrap());
    let (depth, colour_type, interlace) = (ihdr[8], ihdr[9], ihdr[12]);
    assert_eq!((depth, interlace), (8, 0), "unexpected PNG layout");
    let bpp = match colour_type {
        2 => 3,
        6 => 4,
        other => panic!("PNG colour type {other} not handled"),
    };
    let mut raw = Vec::new();
    flate2::read::ZlibDecoder::new(&idat[..])
        .read_to_end(&mut raw)
        .unwrap();
    let stride = w as usize * bpp;
    assert_eq!(raw.len(), h as usize * (stride + 1));
    let mut prev = vec![0u8; stride];
    let mut colours: HashSet<Vec<u8>> = HashSet::new();
    for line in raw.chunks_exact(stride + 1) {
        let (filter, src) = (line[0], &line[1..]);
        let mut cur = vec![0u8; stride];
        for i in 0..stride {
            let a = if i >= bpp { cur[i - bpp] } else { 0 };
            let b = prev[i];
            let c = if i >= bpp { prev[i - bpp] } else { 0 };
            let pred = match filter {
                0 => 0,
                1 => a,
                2 => b,
                3 => ((u16::from(a) + u16::from(b)) / 2) as u8,
                4 => {
                    let p = i16::from(a) + i16::from(b) - i16::from(c);
                    let (pa, pb, pc) = (
                        (p - i16::from(a)).abs(),
                        (p - i16::from(b)).abs(),
                        (p - i16::from(c)).abs(),
                    );
                    if pa <= pb && pa <= pc {
                        a
                    } else if pb <= pc {
                        b
                    } else {
                        c
                    }
                }
                f => panic!("bad PNG filter {f}"),
            };
            cur[i] = src[i].wrapping_add(pred);
        }
        for px in cur.chunks_exact(bpp) {
            colours.insert(px.to_vec());
        }
        prev = cur;
    }
    (w, h, colours.len())
}

#[test]
fn report_renders_in_headless_chromium() {
    if !Path::new(CHROMIUM).exists() {
        let why = format!(
            "{CHROMIUM} not found; install it (Debian: apt-get install chromium) to run this test"
        );
        if std::env::var("TIDEGATE_REQUIRE_BROWSER").as_deref() == Ok("1") {
            panic!("TIDEGATE_REQUIRE_BROWSER=1 but {why}");
        }
        eprintln!("skipped: {why}");
        return;
    }
    let env = demo_state();
    let (page, _) = write_report(&env, &[]);
    let shot = env.dir.path().join("shot.png");
    let profile = env.dir.path().join("chromium-profile");
    let mut cmd = Command::new(CHROMIUM);
    cmd.args([
        "--headless",
        "--no-sandbox",
        "--disable-gpu",
        "--no-first-run",
        "--disable-extensions",
        "--enable-logging=stderr",
        "--v=0",
        "--window-size=1200,3000",
    ])
    .arg(format!("--user-data-dir={}", profile.display()))
    .arg(format!("--screenshot={}", shot.display()))
    .arg(format!("file://{}", page.display()))
    .env("HOME", env.dir.path());
    let out = output_within(cmd, Duration::from_secs(90));
    let log = stderr(&out);
    assert!(out.status.success(), "chromium failed:\n{log}");
    // Console messages (errors from the page) are logged as CONSOLE lines.
    let console: Vec<&str> = log.lines().filter(|l| l.contains("CONSOLE")).collect();
    assert!(console.is_empty(), "console messages: {console:#?}");
    let size = fs::metadata(&shot).map(|m| m.len()).unwrap_or(0);
    assert!(size > 0, "no screenshot at {}:\n{log}", shot.display());
    let (w, h, colours) = png_colours(&shot);
    assert_eq!((w, h), (1200, 3000));
    // A blank or single-colour page has one colour; charts, the heat map
    // and text give many.
    assert!(colours > 50, "only {colours} colours in the screenshot");
}

/// The `<section id="…">` of the page.
fn section<'a>(html: &'a str, id: &str) -> &'a str {
    let start = html
        .find(&format!("<section id=\"{id}\">"))
        .unwrap_or_else(|| panic!("no section {id}"));
    &html[start..start + html[start..].find("</section>").unwrap()]
}

/// The `<tr …>` row of a table whose first cell is `first`, or `first`
/// followed by " (serving)".
fn row<'a>(table: &'a str, first: &str) -> &'a str {
    let at = [
        format!("<td>{first}</td>"),
        format!("<td>{first} (serving)</td>"),
    ]
    .iter()
    .find_map(|cell| table.find(cell.as_str()))
    .unwrap_or_else(|| panic!("no row {first}"));
    let start = table[..at].rfind("<tr").unwrap();
    &table[start..at + table[at..].find("</tr>").unwrap()]
}

#[test]
fn report_names_the_batches_each_model_saw_and_the_models_a_set_aside_batch_reached() {
    let env = demo_state();
    let (_, before) = write_report(&env, &[]);
    let models = section(&before, "holdout");
    // m000001 (cold, nights 1–4) and m000002 (warm, also nights 6–7:
    // batches 5–6) read every batch stored before them.
    assert!(models.contains("<th>batches seen</th>"), "{models}");
    let m1 = row(models, "m000001");
    assert!(m1.contains("<td>b000001–b000004</td>"), "{m1}");
    let m2 = row(models, "m000002");
    assert!(m2.contains("<td>b000001–b000006</td>"), "{m2}");
    assert!(!before.contains("class=\"saw-aside\""));
    assert!(!before.contains("Batches set aside"));
    assert!(before.contains("stored holdout rows from 6 batches"));

    let out = env.run(&["set-aside", "b000002", "--reason", "till export was broken"]);
    assert_eq!(code(&out), 0, "{}", stderr(&out));
    let (_, html) = write_report(&env, &[]);
    assert_self_contained(&html);
    let models = section(&html, "holdout");
    for m in ["m000001", "m000002"] {
        let r = row(models, m);
        assert!(r.starts_with("<tr class=\"saw-aside\">"), "{r}");
        assert!(r.contains("<td>saw b000002 (set aside)</td>"), "{r}");
    }
    // The batch is listed with its file, who set it aside and why, and the
    // models that trained on it.
    let rows = section(&html, "rows");
    let aside = &rows[rows.find("<table class=\"aside\">").expect("aside table")..];
    let b2 = row(aside, "b000002");
    assert!(b2.contains("<td>night-02.csv</td>"), "{b2}");
    assert!(b2.contains("by tester at "), "{b2}");
    assert!(b2.contains("till export was broken"), "{b2}");
    assert!(
        b2.contains("<td>m000001 directly, m000002 directly</td>"),
        "{b2}"
    );
    // Its rows are no longer scored for the input influence.
    assert!(
        html.contains("stored holdout rows from 5 batches"),
        "{}",
        section(&html, "influence")
    );
}
