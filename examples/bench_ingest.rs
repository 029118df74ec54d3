//! Ingest and scoring speed against references measured in the same run:
//!
//! - ingest: rows/s of the whole intake path (read, hash, parse, validate,
//!   one store transaction, fsync, audit line, archive) on one 12-column
//!   CSV, against the csv crate alone reading the same bytes into records
//!   (the parsing limit);
//! - scoring: rows/s of the serving model alone on the parsed rows, and of
//!   parse + score + CSV out, against a csv read + write of the same file.
//!
//! Run: `cargo run --release --example bench_ingest [-- ROWS]` (default
//! 1,000,000). Uses a temp dir; prints one line per figure with its ratio.

use std::time::Instant;

// The same allocator as the tidegate binary.
#[global_allocator]
static GLOBAL: mimalloc::MiMalloc = mimalloc::MiMalloc;

use tidegate::config::Config;
use tidegate::cycle;
use tidegate::ingest;
use tidegate::intake::{self, Outcome, Source};
use tidegate::rng::Rng;
use tidegate::state::{self, StateDir};

/// A config of 12 columns: 4 categories, 7 numbers and the target.
fn config_text() -> String {
    let mut t = String::from(
        "[data]\ntarget = \"y\"\ntask = \"regression\"\nmax_file_bytes = 2147483648\n\n",
    );
    for i in 0..4 {
        t.push_str(&format!(
            "[[data.columns]]\nname = \"c{i}\"\nkind = \"category\"\n\n"
        ));
    }
    for i in 0..7 {
        t.push_str(&format!(
            "[[data.columns]]\nname = \"x{i}\"\nkind = \"number\"\n\n"
        ));
    }
    t.push_str("[[data.columns]]\nname = \"y\"\nkind = \"number\"\n\n");
    t.push_str("[training]\ncold_epochs = 2\npatience = 0\n");
    t
}

fn csv_text(rows: usize, seed: u64) -> String {
    let mut rng = Rng::new(seed);
    let mut s = String::with_capacity(rows * 80);
    s.push_str("c0,c1,c2,c3,x0,x1,x2,x3,x4,x5,x6,y\n");
    for _ in 0..rows {
        let mut y = 0.0;
        for c in 0..4 {
            let k = (rng.uniform() * (5.0 + 10.0 * c as f64)) as usize;
            y += k as f64 * 0.1;
            s.push_str(&format!("v{c}_{k},"));
        }
        for _ in 0..7 {
            let x = rng.normal();
            y += 0.3 * x;
            s.push_str(&format!("{x:.4},"));
        }
        s.push_str(&format!("{:.4}\n", y + 0.1 * rng.normal()));
    }
    s
}

fn line(what: &str, rows: usize, secs: f64, reference: &str, ref_secs: f64) {
    let rate = rows as f64 / secs;
    let ref_rate = rows as f64 / ref_secs;
    println!(
        "{what:<34} {:>12.0} rows/s | {reference:<30} {:>12.0} rows/s | ratio {:.2}",
        rate,
        ref_rate,
        rate / ref_rate
    );
}

fn main() -> anyhow::Result<()> {
    let rows: usize = std::env::args()
        .nth(1)
        .and_then(|a| a.parse().ok())
        .unwrap_or(1_000_000);
    let dir = std::env::temp_dir().join(format!("tidegate-bench-{}", std::process::id()));
    std::fs::create_dir_all(&dir)?;
    let file = dir.join("batch.csv");
    std::fs::write(&file, csv_text(rows, 7))?;
    let bytes = std::fs::read(&file)?;
    println!(
        "{rows} rows, 12 columns, {:.1} MB, {} cores",
        bytes.len() as f64 / 1e6,
        std::thread::available_parallelism().map_or(1, |n| n.get())
    );

    // Reference: the csv crate alone, records read and dropped.
    let t = Instant::now();
    let mut reader = csv::ReaderBuilder::new().from_reader(bytes.as_slice());
    let mut record = csv::ByteRecord::new();
    let mut n = 0usize;
    while reader.read_byte_record(&mut record)? {
        n += record.len();
    }
    let parse_only = t.elapsed().as_secs_f64();
    assert_eq!(n, rows * 12);

    // Where intake's time goes: parsing and validation alone.
    let text = config_text();
    let config = Config::parse(&text, &dir.join("bench.toml"))?;
    let schema = tidegate::schema::Schema::from_config(&config);
    let limits = ingest::Limits::of(&config);
    let t = Instant::now();
    let parsed_batch = ingest::parse(&bytes, &schema, &Default::default(), &limits)
        .map_err(|r| anyhow::anyhow!("{:?}", r.problems.first()))?;
    let parse_validate = t.elapsed().as_secs_f64();
    assert_eq!(parsed_batch.rows(), rows);
    drop(parsed_batch);
    if std::env::args().nth(2).as_deref() == Some("parse") {
        std::fs::remove_dir_all(&dir)?;
        return Ok(());
    }
    line(
        "  of which parse + validate + split",
        rows,
        parse_validate,
        "csv crate parse only",
        parse_only,
    );

    // Measured: the whole intake path into a fresh state dir.
    let state = StateDir::new(dir.join("state"));
    let mut owner = state::create(&state, &config, &text, "bench")?;
    let t = Instant::now();
    let outcome = intake::take_file(&mut owner, &file, Source::Keep, "bench", chrono::Utc::now())?;
    let intake_secs = t.elapsed().as_secs_f64();
    let Outcome::Accepted { batch, .. } = outcome else {
        anyhow::bail!("the bench file was not accepted: {outcome:?}");
    };
    assert_eq!(batch.rows() as usize, rows);
    line(
        "ingest (parse+validate+store+fsync)",
        rows,
        intake_secs,
        "csv crate parse only",
        parse_only,
    );
    if std::env::args().nth(2).as_deref() == Some("ingest") {
        drop(owner);
        std::fs::remove_dir_all(&dir)?;
        return Ok(());
    }

    // A model to score with (two quick epochs: speed, not quality). One
    // file is one batch, too few for the gate to promote anything, so the
    // benchmark scores with the cycle's candidate, promoted or not.
    let t = Instant::now();
    let outcome = cycle::run(&mut owner, cycle::Options::default(), "bench", None, None)?;
    println!("(cold model trained in {:.1} s)", t.elapsed().as_secs_f64());
    let serving = match outcome {
        cycle::Outcome::Decided(report) => report.candidates.iter().find_map(|c| c.id),
        cycle::Outcome::NothingNew { serving } => Some(serving),
    }
    .ok_or_else(|| anyhow::anyhow!("the cycle saved no candidate to score with"))?;
    let ck = tidegate::model::checkpoint::Checkpoint::load(
        &tidegate::model::checkpoint::model_dir(&state.models(), serving),
        &config.schema_fingerprint(),
    )?;

    // Reference: csv read + write of the same file, no scoring.
    let t = Instant::now();
    let mut reader = csv::ReaderBuilder::new().from_reader(bytes.as_slice());
    let mut writer = csv::Writer::from_writer(Vec::with_capacity(bytes.len() + rows * 10));
    while reader.read_byte_record(&mut record)? {
        record.push_field(b"0.0");
        writer.write_byte_record(&record)?;
    }
    let copied = writer.into_inner()?;
    let csv_copy = t.elapsed().as_secs_f64();

    let t = Instant::now();
    let scoring = ingest::parse_for_scoring(
        &bytes,
        owner.store.schema(),
        owner.store.vocabularies(),
        &limits,
    )
    .map_err(|r| anyhow::anyhow!("{:?}", r.problems.first()))?;
    let parsed = t.elapsed().as_secs_f64();
    let backend = config.training.predict_backend;
    let t = Instant::now();
    let predictions = ck.model.predict(&scoring.rows, backend)?;
    let model_secs = t.elapsed().as_secs_f64();
    let t = Instant::now();
    let mut writer = csv::Writer::from_writer(Vec::with_capacity(copied.len()));
    let mut reader = csv::ReaderBuilder::new().from_reader(bytes.as_slice());
    let tidegate::model::Predictions::Regression { values } = &predictions else {
        anyhow::bail!("a regression model");
    };
    let mut i = 0;
    let mut buf = String::with_capacity(16);
    while reader.read_byte_record(&mut record)? {
        buf.clear();
        buf.push_str(&values[i].to_string());
        record.push_field(buf.as_bytes());
        writer.write_byte_record(&record)?;
        i += 1;
    }
    let written = t.elapsed().as_secs_f64();
    line(
        "score: model alone",
        rows,
        model_secs,
        "csv read + write",
        csv_copy,
    );
    line(
        "score: parse + model + CSV out",
        rows,
        parsed + model_secs + written,
        "csv read + write",
        csv_copy,
    );
    drop(owner);
    std::fs::remove_dir_all(&dir)?;
    Ok(())
}
