//! Warm against cold, time to quality, through the library's real intake
//! and cycle on real state dirs.
//!
//! Run: `cargo run --release --example bench_warm [-- quick|full]`
//! (`quick`, the default: 100k rows + 3 batches, then 1M rows + 1 batch;
//! `full`: 100k + 5 batches, then 1M + 3 batches; or give
//! `ROWS:BATCHES ...` pairs, e.g. `-- 200000:2`).
//!
//! For each scale, a stream of the 12-column synthetic rows
//! (examples/common/stream.rs) starts at ROWS rows; the first cycle trains
//! a cold model that serves. Then batches of 1% of ROWS arrive one by one.
//! Each batch is taken by `intake::take_file` (with the fresh-data check)
//! into three state dirs, and then:
//! - warm: `cycle::run` with the config's training defaults (warm candidate
//!   from the serving checkpoint, new rows plus replay), shrink-and-perturb
//!   off;
//! - warm+s&p: the same from a copy of the same first model, with
//!   shrink-and-perturb on (`SHRINK`, `PERTURB` below);
//! - cold (the reference): `cycle::run` as a dry run in a state dir where
//!   no model serves, so it trains one cold candidate on every stored row
//!   and scores it on the same holdout rows.
//!
//! Printed per batch and in summary: holdout loss ratio warm / cold, the
//! loss of the model serving after the cycle against cold, and the wall
//! time of the warm cycle against the cold one. `[gate] cold_every = 0`
//! keeps every measured cycle warm only; all training keys are defaults
//! unless `BENCH_WARM_TRAINING` holds some (`\n` between keys), e.g.
//! `BENCH_WARM_TRAINING='warm_learning_rate = 0.0001'`.

#[path = "common/stream.rs"]
mod stream;

use std::path::Path;
use std::time::Instant;

use tidegate::config::Config;
use tidegate::cycle::{self, Options, Outcome, Report};
use tidegate::fresh;
use tidegate::intake::{self, Source};
use tidegate::model::RunKind;
use tidegate::state::{self, Owner, StateDir};

const SEED: u64 = 20_261_202;
const SHRINK: f64 = 0.8;
const PERTURB: f64 = 0.05;
/// Files the starting rows arrive in.
const BASE_FILES: u64 = 10;

fn copy_dir(from: &Path, to: &Path) -> std::io::Result<()> {
    std::fs::create_dir_all(to)?;
    for entry in std::fs::read_dir(from)? {
        let entry = entry?;
        let dest = to.join(entry.file_name());
        if entry.file_type()?.is_dir() {
            copy_dir(&entry.path(), &dest)?;
        } else {
            std::fs::copy(entry.path(), &dest)?;
        }
    }
    Ok(())
}

fn take(owner: &mut Owner, file: &Path) -> anyhow::Result<()> {
    let out = intake::take_file(owner, file, Source::Keep, "bench", chrono::Utc::now())?;
    let intake::Outcome::Accepted { batch, .. } = out else {
        anyhow::bail!("{} was not accepted: {out:?}", file.display());
    };
    fresh::check_batch(owner, batch.id, "bench")?;
    Ok(())
}

fn decided(out: Outcome) -> anyhow::Result<Report> {
    match out {
        Outcome::Decided(r) => Ok(*r),
        Outcome::NothingNew { .. } => anyhow::bail!("the cycle found nothing new"),
    }
}

/// One warm cycle: (warm candidate's loss, loss of the model serving
/// afterwards, decision, epochs, wall seconds).
fn warm_cycle(owner: &mut Owner) -> anyhow::Result<(f64, f64, String, usize, f64)> {
    let t = Instant::now();
    let r = decided(cycle::run(owner, Options::default(), "bench", None, None)?)?;
    let secs = t.elapsed().as_secs_f64();
    let c = r
        .candidates
        .iter()
        .find(|c| c.run == RunKind::Warm)
        .ok_or_else(|| anyhow::anyhow!("no warm candidate"))?;
    let serving_loss = if r.decision.kind() == "promote" {
        c.holdout_loss
    } else {
        r.baseline_loss
    };
    Ok((
        c.holdout_loss,
        serving_loss,
        r.decision.kind().to_string(),
        c.summary.epochs,
        secs,
    ))
}

#[derive(Default)]
struct Summary {
    warm_loss: Vec<f64>,
    serving_loss: Vec<f64>,
    sp_loss: Vec<f64>,
    warm_time: Vec<f64>,
    sp_time: Vec<f64>,
}

fn stats(v: &[f64]) -> (f64, f64, f64) {
    let mean = v.iter().sum::<f64>() / v.len().max(1) as f64;
    let min = v.iter().copied().fold(f64::INFINITY, f64::min);
    let max = v.iter().copied().fold(f64::NEG_INFINITY, f64::max);
    (mean, min, max)
}

fn scale(dir: &Path, rows: u64, batches: u64) -> anyhow::Result<Summary> {
    let batch_rows = rows / 100;
    println!(
        "\n== {rows} rows, then {batches} batches of {batch_rows} (1%); shrink-and-perturb: shrink {SHRINK}, perturb {PERTURB}"
    );
    // BENCH_WARM_TRAINING: extra `[training]` keys to try other settings.
    let extra = std::env::var("BENCH_WARM_TRAINING").unwrap_or_default();
    let text = stream::config_text(&format!(
        "[gate]\ncold_every = 0\n\n[training]\n{}\n",
        extra.replace("\\n", "\n")
    ));
    if !extra.is_empty() {
        println!("training keys set: {extra}");
    }
    let config = Config::parse(&text, &dir.join("bench.toml"))?;
    // The starting rows arrive as several files: the gate takes batches as
    // its unit of evidence and wants holdout rows from a few of them.
    let base: Vec<std::path::PathBuf> = (0..BASE_FILES)
        .map(|i| dir.join(format!("base-{i}.csv")))
        .collect();
    let per_file = rows / BASE_FILES;
    for (i, file) in base.iter().enumerate() {
        let start = i as u64 * per_file;
        let n = if i as u64 + 1 == BASE_FILES {
            rows - start
        } else {
            per_file
        };
        stream::write_csv(file, SEED, start, n)?;
    }

    let warm_dir = StateDir::new(dir.join("warm"));
    let t = Instant::now();
    {
        let mut owner = state::create(&warm_dir, &config, &text, "bench")?;
        for file in &base {
            take(&mut owner, file)?;
        }
        let r = decided(cycle::run(
            &mut owner,
            Options::default(),
            "bench",
            None,
            None,
        )?)?;
        anyhow::ensure!(
            r.serving_after.is_some(),
            "the first cold model was not promoted: {}",
            r.decision.reason()
        );
        let c = &r.candidates[0];
        println!(
            "first model: cold on {rows} rows, {} epochs ({:?}), holdout loss {:.5}, cycle {:.1} s",
            c.summary.epochs,
            c.summary.stop,
            c.holdout_loss,
            t.elapsed().as_secs_f64()
        );
    }
    let sp_dir = StateDir::new(dir.join("warm-sp"));
    copy_dir(warm_dir.root(), sp_dir.root())?;
    let mut warm = state::open(&warm_dir, &config)?.0;
    let mut sp = state::open(&sp_dir, &config)?.0;
    sp.config.training.shrink = SHRINK;
    sp.config.training.perturb = PERTURB;
    let cold_dir = StateDir::new(dir.join("cold"));
    let mut cold = state::create(&cold_dir, &config, &text, "bench")?;
    for file in &base {
        take(&mut cold, file)?;
        std::fs::remove_file(file)?;
    }

    println!(
        "{:>5} {:>9} | {:>9} {:>9} {:>7} {:>8} | {:>9} {:>7} | {:>9} {:>7} | {:>7} {:>7} {:>7} {:>7}",
        "batch",
        "stored",
        "cold loss",
        "warm loss",
        "w/c",
        "warm ->",
        "serving",
        "srv/c",
        "w+sp loss",
        "sp/c",
        "cold s",
        "warm s",
        "w/c t",
        "sp/c t"
    );
    let mut s = Summary::default();
    for b in 1..=batches {
        let file = dir.join(format!("batch-{b}.csv"));
        stream::write_csv(&file, SEED, rows + (b - 1) * batch_rows, batch_rows)?;
        take(&mut warm, &file)?;
        take(&mut sp, &file)?;
        take(&mut cold, &file)?;
        std::fs::remove_file(&file)?;

        let (w_loss, srv_loss, w_dec, _w_epochs, w_secs) = warm_cycle(&mut warm)?;
        let (sp_loss, _, _, _, sp_secs) = warm_cycle(&mut sp)?;
        let t = Instant::now();
        let r = decided(cycle::run(
            &mut cold,
            Options {
                dry_run: true,
                ..Options::default()
            },
            "bench",
            None,
            None,
        )?)?;
        let c_secs = t.elapsed().as_secs_f64();
        let c = &r.candidates[0];
        anyhow::ensure!(c.run == RunKind::Cold, "the reference is a cold run");
        let c_loss = c.holdout_loss;
        println!(
            "{b:>5} {:>9} | {c_loss:>9.5} {w_loss:>9.5} {:>7.4} {w_dec:>8} | {srv_loss:>9.5} {:>7.4} | {sp_loss:>9.5} {:>7.4} | {c_secs:>7.1} {w_secs:>7.2} {:>7.4} {:>7.4}",
            rows + b * batch_rows,
            w_loss / c_loss,
            srv_loss / c_loss,
            sp_loss / c_loss,
            w_secs / c_secs,
            sp_secs / c_secs,
        );
        s.warm_loss.push(w_loss / c_loss);
        s.serving_loss.push(srv_loss / c_loss);
        s.sp_loss.push(sp_loss / c_loss);
        s.warm_time.push(w_secs / c_secs);
        s.sp_time.push(sp_secs / c_secs);
    }
    Ok(s)
}

fn main() -> anyhow::Result<()> {
    let args: Vec<String> = std::env::args().skip(1).collect();
    let plan: Vec<(u64, u64)> = match args.first().map(String::as_str) {
        None | Some("quick") => vec![(100_000, 3), (1_000_000, 1)],
        Some("full") => vec![(100_000, 5), (1_000_000, 3)],
        Some(_) => args
            .iter()
            .map(|a| {
                let (r, b) = a
                    .split_once(':')
                    .ok_or_else(|| anyhow::anyhow!("expected ROWS:BATCHES, got {a}"))?;
                Ok((r.parse()?, b.parse()?))
            })
            .collect::<anyhow::Result<_>>()?,
    };
    println!(
        "bench_warm: {} cores; targets: warm holdout loss within 1% of cold (ratio <= 1.01) at <= 10% of its time",
        std::thread::available_parallelism().map_or(1, |n| n.get())
    );
    let root = std::env::temp_dir().join(format!("tidegate-warm-{}", std::process::id()));
    let mut results = Vec::new();
    for &(rows, batches) in &plan {
        let dir = root.join(rows.to_string());
        std::fs::create_dir_all(&dir)?;
        results.push((rows, scale(&dir, rows, batches)?));
        std::fs::remove_dir_all(&dir)?;
    }
    std::fs::remove_dir_all(&root)?;
    println!(
        "\n== summary (mean [min, max] over batches; reference: cold retrain on all rows, same run)"
    );
    for (rows, s) in &results {
        let line = |what: &str, v: &[f64], target: &str, ok: bool| {
            let (m, lo, hi) = stats(v);
            println!(
                "{rows:>8} rows  {what:<32} {m:.4} [{lo:.4}, {hi:.4}]  target {target}: {}",
                if ok { "met" } else { "NOT met" }
            );
        };
        let worst = |v: &[f64]| stats(v).2;
        line(
            "loss warm / cold",
            &s.warm_loss,
            "<= 1.01",
            worst(&s.warm_loss) <= 1.01,
        );
        line(
            "loss serving after / cold",
            &s.serving_loss,
            "<= 1.01",
            worst(&s.serving_loss) <= 1.01,
        );
        line(
            "loss warm+s&p / cold",
            &s.sp_loss,
            "<= 1.01",
            worst(&s.sp_loss) <= 1.01,
        );
        line(
            "time warm / cold",
            &s.warm_time,
            "<= 0.10",
            worst(&s.warm_time) <= 0.10,
        );
        line(
            "time warm+s&p / cold",
            &s.sp_time,
            "<= 0.10",
            worst(&s.sp_time) <= 0.10,
        );
    }
    Ok(())
}
