//! What reading stored rows costs: all training rows (what a cold
//! candidate, and today the drift report's reference, read) against a
//! uniform sample read chunk by chunk (`Store::rows_at`, what a warm cycle
//! and the fresh-data check read), on an existing state dir, in the same
//! run. Peak memory of each read is its rows' size; the times are printed.
//!
//! Run: `cargo run --release --example bench_store_read -- STATE_DIR [SAMPLE]`
//! (SAMPLE defaults to 50,000 rows). The state dir must not be in use.

use std::time::Instant;

use tidegate::config::Config;
use tidegate::rng::Rng;
use tidegate::sample;
use tidegate::state::{self, StateDir};
use tidegate::store::Split;

fn main() -> anyhow::Result<()> {
    let mut args = std::env::args().skip(1);
    let dir = StateDir::new(
        args.next()
            .ok_or_else(|| anyhow::anyhow!("usage: bench_store_read STATE_DIR [SAMPLE]"))?,
    );
    let k: usize = args.next().map_or(Ok(50_000), |a| a.parse())?;
    let config = Config::load(&dir.config())?;
    let t = Instant::now();
    let (owner, _) = state::open(&dir, &config)?;
    let open_s = t.elapsed().as_secs_f64();
    let store = &owner.store;
    let t = Instant::now();
    let all = store.rows(Split::Train, None, None)?;
    let all_s = t.elapsed().as_secs_f64();
    let n = all.n_rows();
    let width = all.width();
    let mb = |rows: usize| (rows * width * 4) as f64 / 1e6;
    drop(all);
    let t = Instant::now();
    let picks = sample::choose(n, k, &mut Rng::new(1));
    let some = store.rows_at(Split::Train, None, None, &picks)?;
    let some_s = t.elapsed().as_secs_f64();
    println!(
        "open {open_s:.3} s | all {n} training rows ({:.1} MB): {all_s:.3} s | sample of {} ({:.1} MB): {some_s:.3} s | ratio sample/all {:.3}",
        mb(n),
        some.n_rows(),
        mb(some.n_rows()),
        some_s / all_s
    );
    Ok(())
}
