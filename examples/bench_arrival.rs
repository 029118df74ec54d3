//! What learning how the serving model arrived costs (the fresh-data check
//! asks on a new serving model's first batch, `rollback` on every call):
//! the record kept in the store (`Store::arrival`) against a full reading of
//! the audit log (`lifecycle::arrival_from_log`, what every batch paid
//! before), on a store with NIGHTS nights of entries, in the same run.
//!
//! Each night writes two entries of about the size of a real night's
//! `batch-accepted` and `fresh-checked` lines (1.5 KiB each, as
//! `declined` entries: only their size matters to the reading), and every
//! seventh night a promotion.
//!
//! Run: `cargo run --release --example bench_arrival -- [NIGHTS]` (3,000 by default).

use std::time::Instant;

use tidegate::audit::{Event, GateEvidence};
use tidegate::config::Config;
use tidegate::ids::ModelId;
use tidegate::lifecycle::arrival_from_log;
use tidegate::schema::Schema;
use tidegate::store::Store;

fn promoted(model: u64) -> Event {
    Event::Promoted {
        cycle: model,
        model: ModelId(model),
        previous: (model > 1).then(|| ModelId(model - 1)),
        evidence: GateEvidence::without_test(1000, 1.0, 0.9, "better on the holdout rows".into()),
    }
}

fn main() -> anyhow::Result<()> {
    let nights: u64 = std::env::args().nth(1).map_or(Ok(3_000), |a| a.parse())?;
    let text = "[data]\ntarget = \"loaves_sold\"\ntask = \"regression\"\n\
                [[data.columns]]\nname = \"temp_c\"\nkind = \"number\"\n\
                [[data.columns]]\nname = \"loaves_sold\"\nkind = \"number\"\n";
    let config = Config::parse(text, std::path::Path::new("bench.toml"))?;
    let dir = tempfile::tempdir()?;
    let mut store = Store::create(
        &dir.path().join("store"),
        &Schema::from_config(&config),
        &config.schema_fingerprint(),
    )?;
    let filler = "x".repeat(1500);
    let mut serving = ModelId(0);
    let t = Instant::now();
    for night in 1..=nights {
        for _ in 0..2 {
            let e = Event::Declined {
                model: ModelId(night),
                reason: filler.clone(),
            };
            store.record_with_meta(e, "bench", chrono::Utc::now(), &[])?;
        }
        if night % 7 == 0 {
            serving = ModelId(serving.0 + 1);
            store.record_with_meta(promoted(serving.0), "bench", chrono::Utc::now(), &[])?;
        }
    }
    let entries = store.last_audit_seq().0;
    println!(
        "store: {nights} nights, {entries} entries, written in {:.1} s",
        t.elapsed().as_secs_f64()
    );

    // The full reading, a few times; the stored record, many times.
    let repeats = 5;
    let t = Instant::now();
    let mut from_log = (None, false);
    for _ in 0..repeats {
        from_log = arrival_from_log(&store, serving)?;
    }
    let log_s = t.elapsed().as_secs_f64() / f64::from(repeats);
    let reads = 10_000;
    let t = Instant::now();
    let mut stored = None;
    for _ in 0..reads {
        stored = store.arrival(serving)?;
    }
    let stored_s = t.elapsed().as_secs_f64() / f64::from(reads);
    anyhow::ensure!(
        stored == Some(from_log),
        "the stored record {stored:?} differs from the log's {from_log:?}"
    );
    println!(
        "arrival of {serving}: full log reading {:.3} ms, stored record {:.2} µs, ratio {:.0}x",
        log_s * 1e3,
        stored_s * 1e6,
        log_s / stored_s
    );
    Ok(())
}
