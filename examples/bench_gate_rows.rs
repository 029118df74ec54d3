//! What the gate's decision costs on a large holdout: `gate::decide` on
//! N paired per-row losses, against the paired t-test alone (one pass over
//! the differences) in the same run.
//!
//! Run: `cargo run --release --example bench_gate_rows [-- N]` (default
//! 1,000,000 rows, the holdout of a 5M-row store).

use std::time::Instant;

use tidegate::config::GateConfig;
use tidegate::gate::{self, Scores};
use tidegate::rng::Rng;

fn main() {
    let n: usize = std::env::args()
        .nth(1)
        .and_then(|a| a.parse().ok())
        .unwrap_or(1_000_000);
    let mut rng = Rng::new(9);
    let serving: Vec<f64> = (0..n).map(|_| rng.normal().powi(2) * 0.02).collect();
    let candidate: Vec<f64> = serving
        .iter()
        .map(|s| s * (0.99 + 0.02 * rng.uniform()))
        .collect();
    let flags: Vec<bool> = (0..n).map(|i| i % 500 == 0).collect();
    let d: Vec<f64> = serving.iter().zip(&candidate).map(|(a, b)| a - b).collect();
    let t = Instant::now();
    let _ = gate::paired::paired_t(&d);
    let t_test = t.elapsed().as_secs_f64();
    let t = Instant::now();
    let _ = gate::paired::wilcoxon_signed_rank(&d);
    let rank = t.elapsed().as_secs_f64();
    let policy = gate::Policy::from(&GateConfig::default());
    let (a, b) = (
        Scores::new(serving, flags.clone()),
        Scores::new(candidate, flags),
    );
    let t = Instant::now();
    let decision = gate::decide(&a, &b, &policy);
    let decide = t.elapsed().as_secs_f64();
    println!(
        "{n} rows: decide {decide:.3} s ({}) | paired t alone {t_test:.4} s | signed-rank test alone {rank:.3} s | decide / t-test {:.0}x",
        decision.kind(),
        decide / t_test
    );
}
