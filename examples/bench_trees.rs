//! What the boosted-tree reference model adds to a cycle: its fit on the
//! sampled training rows plus scoring the holdout rows, beside the ridge
//! baseline fitted and scored on the same rows in the same run (what every
//! cycle already pays for).
//!
//! The rows have the demo's columns (shop, town, bread, weekday, temp_c,
//! rain_mm, promo, prev_day_sold → loaves_sold: 108 shops, 12 towns, 12
//! breads; 145 encoded inputs for ridge and the network, 8 input columns
//! for the trees), with sales that depend on interactions (bread × weekday,
//! warmth × bread, promo × shop size), invented here.
//!
//! Two sizes: 20,000 training rows (the trees' sample bound: every row is
//! used) and 100,000 stored training rows (the trees sample 20,000, ridge
//! reads all), each with a holdout of a quarter as many rows. Each figure
//! is the median of 3 runs, printed as one row of a Markdown table:
//! `| figure | value | unit | reference | reference value | ratio |`.
//!
//! Run: `cargo run --release --example bench_trees`.

use std::time::Instant;

use tidegate::baseline::Ridge;
use tidegate::config::Task;
use tidegate::rng::Rng;
use tidegate::schema::{FeatureSpec, InputEncoding, RowMatrix, number_cell};
use tidegate::trees::{Boosted, Settings};

const SHOPS: usize = 108;
const TOWNS: usize = 12;
const BREADS: usize = 12;
const WEEKDAYS: usize = 7;
const PROMOS: usize = 3;
const WIDTH: usize = 9;

/// Rows with the demo's columns; row `i` depends only on the seed and `i`
/// (the shops' sizes on neither: train and holdout rows share them).
fn rows(n: usize, seed: u64) -> RowMatrix {
    let mut out = RowMatrix::with_capacity(WIDTH, n);
    let mut size = vec![0.0; SHOPS];
    let mut base = Rng::new(0x5107);
    for s in &mut size {
        *s = 0.6 + 0.9 * base.uniform();
    }
    for i in 0..n {
        let mut rng = Rng::new(seed ^ (i as u64).wrapping_mul(0x9E37_79B9_7F4A_7C15));
        let shop = rng.below(SHOPS);
        let bread = rng.below(BREADS);
        let day = rng.below(WEEKDAYS);
        let promo = if rng.uniform() < 0.8 {
            0
        } else {
            1 + rng.below(2)
        };
        let temp = 8.0 + 10.0 * rng.uniform();
        let rain = if rng.uniform() < 0.6 {
            0.0
        } else {
            8.0 * rng.uniform()
        };
        let weekend = day >= 5;
        let mut mean = 20.0 + 4.0 * bread as f64;
        mean *= size[shop];
        mean *= if weekend && bread < 4 { 1.5 } else { 1.0 };
        mean *= if temp > 15.0 && bread >= 8 { 0.6 } else { 1.0 };
        mean *= if promo > 0 && size[shop] > 1.0 {
            1.4
        } else {
            1.0
        };
        mean *= 1.0 - 0.03 * rain;
        let prev = mean * (1.0 + 0.1 * rng.normal());
        let sold = (mean * (1.0 + 0.08 * rng.normal())).max(0.0);
        out.push_row(&[
            shop as u32,
            (shop / 9) as u32,
            bread as u32,
            day as u32,
            number_cell(Some(temp as f32)),
            number_cell(Some(rain as f32)),
            promo as u32,
            number_cell(Some(prev as f32)),
            number_cell(Some(sold as f32)),
        ]);
    }
    out
}

/// The demo's encoding: one-hot categories, standardised numbers.
fn spec(train: &RowMatrix) -> FeatureSpec {
    let stats = |c: usize| {
        let v: Vec<f64> = (0..train.n_rows())
            .filter_map(|r| train.number(r, c))
            .map(f64::from)
            .collect();
        let mean = v.iter().sum::<f64>() / v.len() as f64;
        let var = v.iter().map(|x| (x - mean).powi(2)).sum::<f64>() / v.len() as f64;
        InputEncoding::Number {
            column: c,
            mean: mean as f32,
            std: var.sqrt().max(1e-6) as f32,
        }
    };
    let one_hot = |column, width| InputEncoding::OneHot { column, width };
    FeatureSpec {
        inputs: vec![
            one_hot(0, SHOPS),
            one_hot(1, TOWNS),
            one_hot(2, BREADS),
            one_hot(3, WEEKDAYS),
            stats(4),
            stats(5),
            one_hot(6, PROMOS),
            stats(7),
        ],
        target: 8,
        task: Task::Regression,
        outputs: 1,
    }
}

fn mean(v: &[f64]) -> f64 {
    v.iter().sum::<f64>() / v.len() as f64
}

/// Median seconds of 3 runs of `f`, and its last result.
fn timed<T>(mut f: impl FnMut() -> T) -> (f64, T) {
    let mut secs = Vec::new();
    let mut last = None;
    for _ in 0..3 {
        let t = Instant::now();
        last = Some(f());
        secs.push(t.elapsed().as_secs_f64());
    }
    secs.sort_by(f64::total_cmp);
    (secs[1], last.expect("ran"))
}

fn main() {
    println!(
        "| figure | value | unit | reference | reference value | ratio |\n|---|---|---|---|---|---|"
    );
    for stored in [20_000usize, 100_000] {
        let train = rows(stored, 1);
        let holdout = rows(stored / 4, 2);
        let spec = spec(&train);
        let (trees_s, (trees_rows, trees_loss)) = timed(|| {
            let t = Boosted::fit(&spec, &[&train], &Settings::default()).expect("trees fit");
            (
                t.rows(),
                mean(&t.row_losses(&holdout).expect("trees score")),
            )
        });
        let (ridge_s, ridge_loss) = timed(|| {
            let r = Ridge::fit(&spec, &[&train], 1.0).expect("ridge fits");
            mean(&r.row_losses(&holdout).expect("ridge scores"))
        });
        println!(
            "| trees fit ({trees_rows} sampled of {stored} rows, {} encoded inputs) + score {} holdout rows | {trees_s:.3} | s | ridge on all {stored} rows, same holdout | {ridge_s:.3} | {:.2} |",
            spec.width(),
            holdout.n_rows(),
            trees_s / ridge_s
        );
        println!(
            "| trees holdout MSE, {stored} stored rows | {trees_loss:.2} | loaves² | ridge | {ridge_loss:.2} | {:.3} |",
            trees_loss / ridge_loss
        );
    }
}
