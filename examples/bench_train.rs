//! Throughput of the learning core: training rows/s per epoch for a
//! 16-64-64-1 network on 100k synthetic rows (both backends, batch 256, and
//! batch 1024 with a linearly scaled rate), and prediction rows/s per
//! backend, with a hand-written f32 forward pass as the in-run reference.
//!
//! Run: `cargo run --release --example bench_train [-- EPOCHS [ROWS [FILTER]]]`;
//! FILTER keeps only the runs whose name contains it ("predict" for prediction).

use std::time::Instant;

use tidegate::config::{Activation, Backend, ColumnKind, ModelConfig, Task, TrainingConfig};
use tidegate::model::{LayerWeights, Model, Predictions};
use tidegate::rng::Rng;
use tidegate::schema::{
    Column, ColumnStats, FeatureSpec, RowMatrix, Schema, Vocabularies, number_cell,
};
use tidegate::train::{Control, train_cold};

const INPUTS: usize = 16;

fn data(n: usize, seed: u64) -> (Schema, RowMatrix) {
    let mut columns: Vec<Column> = (0..=INPUTS)
        .map(|i| Column {
            name: format!("c{i}"),
            kind: ColumnKind::Number,
            min: None,
            max: None,
            required: true,
        })
        .collect();
    columns[INPUTS].name = "y".into();
    let schema = Schema {
        columns,
        target: INPUTS,
        task: Task::Regression,
    };
    let mut rng = Rng::new(seed);
    let mut rows = RowMatrix::with_capacity(INPUTS + 1, n);
    let mut cells = vec![0u32; INPUTS + 1];
    for _ in 0..n {
        let v: Vec<f64> = (0..INPUTS).map(|_| rng.normal()).collect();
        let y = v[0].sin() + v[1] * v[2] - 0.5 * v[3] + 0.3 * v[4].abs() + 0.1 * rng.normal();
        for (c, x) in cells.iter_mut().zip(&v) {
            *c = number_cell(Some(*x as f32));
        }
        cells[INPUTS] = number_cell(Some(y as f32));
        rows.push_row(&cells);
    }
    (schema, rows)
}

fn median(v: &[f64]) -> f64 {
    let mut s = v.to_vec();
    s.sort_by(f64::total_cmp);
    s[s.len() / 2]
}

/// The same network, forward only, in plain Rust (row by row, f32).
fn reference_forward(weights: &[LayerWeights], x: &[f32], out: &mut Vec<f32>) {
    let last = weights.len() - 1;
    let mut h: Vec<f32> = Vec::new();
    let mut next: Vec<f32> = Vec::new();
    out.clear();
    for row in x.chunks_exact(weights[0].inputs) {
        h.clear();
        h.extend_from_slice(row);
        for (i, lw) in weights.iter().enumerate() {
            next.clear();
            next.extend_from_slice(&lw.bias);
            for (k, hk) in h.iter().enumerate() {
                let w = &lw.weight[k * lw.outputs..(k + 1) * lw.outputs];
                for (n, wv) in next.iter_mut().zip(w) {
                    *n += hk * wv;
                }
            }
            if i < last {
                for n in next.iter_mut() {
                    *n = n.max(0.0);
                }
            }
            std::mem::swap(&mut h, &mut next);
        }
        out.push(h[0]);
    }
}

pub fn main() {
    let args: Vec<String> = std::env::args().collect();
    let epochs: usize = args.get(1).and_then(|a| a.parse().ok()).unwrap_or(6);
    let n: usize = args.get(2).and_then(|a| a.parse().ok()).unwrap_or(100_000);
    let filter = args.get(3).cloned().unwrap_or_default();
    let (schema, rows) = data(n, 1);
    let spec = FeatureSpec::new(
        &schema,
        &ColumnStats::of_rows(&schema, &rows),
        &Vocabularies::new(),
    );
    let relu = ModelConfig {
        hidden: vec![64, 64],
        activation: Activation::Relu,
        ..ModelConfig::default()
    };
    let tanh = ModelConfig {
        activation: Activation::Tanh,
        ..relu.clone()
    };
    println!("rows {n}, epochs {epochs}, network {INPUTS}-64-64-1, validation 10%");
    println!(
        "{:<34} {:>14} {:>14} {:>12}",
        "training run", "median rows/s", "best rows/s", "val MSE"
    );
    let runs = [
        (
            "flex relu batch 256 lr 1e-3",
            Backend::Flex,
            &relu,
            256,
            1e-3,
        ),
        (
            "ndarray relu batch 256 lr 1e-3",
            Backend::Ndarray,
            &relu,
            256,
            1e-3,
        ),
        (
            "flex relu batch 1024 lr 4e-3",
            Backend::Flex,
            &relu,
            1024,
            4e-3,
        ),
        (
            "ndarray relu batch 1024 lr 4e-3",
            Backend::Ndarray,
            &relu,
            1024,
            4e-3,
        ),
        (
            "flex relu batch 512 lr 2e-3",
            Backend::Flex,
            &relu,
            512,
            2e-3,
        ),
        (
            "flex tanh batch 256 lr 1e-3",
            Backend::Flex,
            &tanh,
            256,
            1e-3,
        ),
    ];
    let mut trained: Option<Model> = None;
    for (name, backend, net, batch, lr) in runs {
        let wanted = name.contains(&filter) || (filter == "predict" && trained.is_none());
        if !wanted {
            continue;
        }
        let cfg = TrainingConfig {
            backend,
            batch_size: batch,
            learning_rate: lr,
            cold_epochs: epochs,
            patience: 1000,
            ..TrainingConfig::default()
        };
        let t = train_cold(&spec, net, &cfg, &rows, Control::default()).expect("training runs");
        let s = &t.summary;
        let rate: Vec<f64> = s
            .epoch_seconds
            .iter()
            .map(|sec| s.rows as f64 / sec)
            .collect();
        let best = rate.iter().copied().fold(0.0, f64::max);
        let val = s.validation_loss.last().copied().unwrap_or(f64::NAN);
        println!(
            "{name:<34} {:>14.0} {:>14.0} {:>12.5}",
            median(&rate),
            best,
            val
        );
        if trained.is_none() {
            trained = Some(t.model);
        }
    }

    let model = trained.expect("first run trained");
    if !filter.is_empty() && filter != "predict" {
        return;
    }
    let x = spec.encode_inputs(&rows);
    println!(
        "{:<34} {:>14} {:>14}",
        "prediction (all rows, 7 runs)", "median rows/s", "best rows/s"
    );
    let mut outputs: Vec<Vec<f32>> = Vec::new();
    for backend in [Backend::Flex, Backend::Ndarray] {
        let mut rates = Vec::new();
        let mut last = None;
        for _ in 0..7 {
            let start = Instant::now();
            let p = model.raw_outputs(&x, backend).expect("width matches");
            rates.push(n as f64 / start.elapsed().as_secs_f64());
            last = Some(p);
        }
        println!(
            "{:<34} {:>14.0} {:>14.0}",
            format!("predict {backend:?}"),
            median(&rates),
            rates.iter().copied().fold(0.0, f64::max)
        );
        outputs.push(last.expect("ran"));
    }
    let weights = model.weights();
    let mut rates = Vec::new();
    let mut reference = Vec::new();
    for _ in 0..7 {
        let start = Instant::now();
        reference_forward(&weights, &x, &mut reference);
        rates.push(n as f64 / start.elapsed().as_secs_f64());
    }
    println!(
        "{:<34} {:>14.0} {:>14.0}",
        "reference: plain Rust forward",
        median(&rates),
        rates.iter().copied().fold(0.0, f64::max)
    );
    let diff = outputs
        .iter()
        .flat_map(|o| o.iter().zip(&reference).map(|(a, b)| (a - b).abs()))
        .fold(0.0f32, f32::max);
    println!("largest difference backend vs reference output: {diff:e}");
    if let Predictions::Regression { values } = model
        .predict_features(&x[..INPUTS], Backend::Flex)
        .expect("width")
    {
        println!("first prediction {}", values[0]);
    }
}
