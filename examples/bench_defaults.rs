//! Training settings measured across public data sets: for each setting,
//! each data set and each seed, a cold run on every delivered row and a
//! warm stream (cold on the first three files, then one warm run per file
//! with every earlier row as the replay pool), both scored on rows kept
//! back, against ordinary least squares fitted on the same delivered rows in
//! the same run.
//!
//! Data sets, as shipped in linfa-datasets 0.8.1: red-wine quality
//! (Cortez et al. 2009; 1599 rows, 11 inputs, a 0–10 score) and diabetes
//! progression (Efron et al. 2004; 441 rows as shipped, 10 inputs). Each seed shuffles
//! the rows, keeps a fifth back and cuts the rest into eight files.
//!
//! ```text
//! cargo run --release --example bench_defaults -- [--seeds N] [--sets wine,diabetes] [NAME:KEY=VALUE;KEY=VALUE ...]
//! cargo run --release --example bench_defaults -- --ensembles [--seeds N]
//! ```
//!
//! Keys are those of `[training]` and `[model]` in `tidegate.toml`
//! (`hidden = [64, 64]` style values). Without settings, the built-in list
//! below runs. Figures are MAE on the kept-back rows divided by OLS's MAE
//! on the same rows (below 1 is better than OLS), the mean over seeds, and
//! the mean wall time of one run.

use std::time::Instant;

use tidegate::config::{ColumnKind, ModelConfig, Task, TrainingConfig};
use tidegate::model::{Model, Predictions};
use tidegate::rng::Rng;
use tidegate::schema::{
    Column, ColumnStats, FeatureSpec, RowMatrix, Schema, Vocabularies, number_cell,
};
use tidegate::train::{Control, least_squares, train_cold, train_warm};

const FILES: usize = 8;
const FIRST_FILES: usize = 3;

/// One data set: rows of inputs with the target last.
struct Set {
    name: &'static str,
    rows: Vec<Vec<f64>>,
}

fn wine() -> Set {
    let ds = linfa_datasets::winequality();
    let rows = (0..ds.records.nrows())
        .map(|r| {
            let mut v: Vec<f64> = ds.records.row(r).to_vec();
            v.push(ds.targets[r] as f64);
            v
        })
        .collect();
    Set { name: "wine", rows }
}

fn diabetes() -> Set {
    let ds = linfa_datasets::diabetes();
    let rows = (0..ds.records.nrows())
        .map(|r| {
            let mut v: Vec<f64> = ds.records.row(r).to_vec();
            v.push(ds.targets[r]);
            v
        })
        .collect();
    Set {
        name: "diabetes",
        rows,
    }
}

fn schema(width: usize) -> Schema {
    Schema {
        columns: (0..width)
            .map(|c| Column {
                name: format!("c{c}"),
                kind: ColumnKind::Number,
                min: None,
                max: None,
                required: true,
            })
            .collect(),
        target: width - 1,
        task: Task::Regression,
    }
}

fn matrix(rows: &[Vec<f64>]) -> RowMatrix {
    let mut m = RowMatrix::new(rows[0].len());
    for r in rows {
        let cells: Vec<u32> = r.iter().map(|v| number_cell(Some(*v as f32))).collect();
        m.push_row(&cells);
    }
    m
}

/// A seed's split: the delivered files and the rows kept back.
fn split(set: &Set, seed: u64) -> (Vec<Vec<Vec<f64>>>, Vec<Vec<f64>>) {
    let mut rows = set.rows.clone();
    Rng::new(seed).shuffle(&mut rows);
    let kept = rows.split_off(rows.len() - rows.len() / 5);
    let per = rows.len().div_ceil(FILES);
    (rows.chunks(per).map(<[_]>::to_vec).collect(), kept)
}

fn ols_mae(fit: &[Vec<f64>], kept: &[Vec<f64>]) -> f64 {
    let w = fit[0].len() - 1;
    let x: Vec<f64> = fit.iter().flat_map(|r| r[..w].to_vec()).collect();
    let y: Vec<f64> = fit.iter().map(|r| r[w]).collect();
    let b = least_squares(&x, &y, w, 0.0).expect("full rank");
    kept.iter()
        .map(|r| (b[0] + (0..w).map(|c| b[c + 1] * r[c]).sum::<f64>() - r[w]).abs())
        .sum::<f64>()
        / kept.len() as f64
}

/// The stream's first model: cold on its first files (returned too), with
/// the scaling of those rows.
fn first_model(
    files: &[Vec<Vec<f64>>],
    sch: &Schema,
    net: &ModelConfig,
    training: &TrainingConfig,
) -> (Model, Vec<Vec<f64>>) {
    let first: Vec<Vec<f64>> = files[..FIRST_FILES].iter().flatten().cloned().collect();
    let rows = matrix(&first);
    let spec = FeatureSpec::new(sch, &ColumnStats::of_rows(sch, &rows), &Vocabularies::new());
    let model = train_cold(&spec, net, training, &rows, Control::default())
        .expect("trains")
        .model;
    (model, first)
}

/// The stream after its first files: one warm run per later file with
/// every earlier row as the replay pool; `each` sees every model.
fn warm_stream(
    mut model: Model,
    files: &[Vec<Vec<f64>>],
    training: &TrainingConfig,
    mut each: impl FnMut(&Model),
) -> Model {
    let mut seen: Vec<Vec<f64>> = files[..FIRST_FILES].iter().flatten().cloned().collect();
    for file in &files[FIRST_FILES..] {
        model = train_warm(
            &model,
            training,
            &matrix(file),
            &matrix(&seen),
            Control::default(),
        )
        .expect("trains")
        .model;
        seen.extend(file.iter().cloned());
        each(&model);
    }
    model
}

fn model_mae(model: &Model, kept: &[Vec<f64>]) -> f64 {
    mean_mae(&[predictions(model, kept)], kept)
}

fn predictions(model: &Model, kept: &[Vec<f64>]) -> Vec<f64> {
    let Predictions::Regression { values } = model
        .predict(&matrix(kept), model.backend())
        .expect("predicts")
    else {
        panic!("regression")
    };
    values.iter().map(|v| f64::from(*v)).collect()
}

/// MAE on `kept` of the mean of several models' predictions.
fn mean_mae(preds: &[Vec<f64>], kept: &[Vec<f64>]) -> f64 {
    let w = kept[0].len() - 1;
    let k = preds.len() as f64;
    kept.iter()
        .enumerate()
        .map(|(i, r)| (preds.iter().map(|p| p[i]).sum::<f64>() / k - r[w]).abs())
        .sum::<f64>()
        / kept.len() as f64
}

/// Ensembles as candidates, measured with the defaults (`--ensembles`):
/// MAE over OLS of a single cold model, the warm stream's last model, the
/// mean of those two, the mean of the stream's last three warm models, and
/// the mean of three cold models of other seeds against their own mean
/// single MAE.
fn ensembles(set: &Set, seed: u64) -> [f64; 7] {
    let (files, kept) = split(set, seed);
    let delivered: Vec<Vec<f64>> = files.iter().flatten().cloned().collect();
    let ols = ols_mae(&delivered, &kept);
    let sch = schema(delivered[0].len());
    let training = |seed| TrainingConfig {
        seed,
        ..TrainingConfig::default()
    };
    let net = ModelConfig::default();
    let all = matrix(&delivered);
    let spec = FeatureSpec::new(
        &sch,
        &ColumnStats::of_rows(&sch, &all),
        &Vocabularies::new(),
    );
    let colds: Vec<Vec<f64>> = (0..3)
        .map(|k| {
            let m = train_cold(
                &spec,
                &net,
                &training(seed * 10 + k),
                &all,
                Control::default(),
            )
            .expect("trains")
            .model;
            predictions(&m, &kept)
        })
        .collect();
    let (model, _) = first_model(&files, &sch, &net, &training(seed));
    let mut warm = Vec::new();
    warm_stream(model, &files, &training(seed), |m| {
        warm.push(predictions(m, &kept))
    });
    let last = warm.last().expect("a warm model").clone();
    let singles: f64 = colds
        .iter()
        .map(|p| mean_mae(std::slice::from_ref(p), &kept))
        .sum::<f64>()
        / 3.0;
    [
        mean_mae(&colds[..1], &kept) / ols,
        mean_mae(std::slice::from_ref(&last), &kept) / ols,
        mean_mae(&[colds[0].clone(), last], &kept) / ols,
        mean_mae(&warm[warm.len() - 3..], &kept) / ols,
        singles / ols,
        mean_mae(&colds, &kept) / ols,
        ols,
    ]
}

/// A setting: a name and `[training]` / `[model]` keys over the defaults.
struct Setting {
    name: String,
    training: TrainingConfig,
    model: ModelConfig,
}

const MODEL_KEYS: [&str; 6] = ["hidden", "activation", "dropout", "l2", "l1", "init_scale"];

fn setting(spec: &str) -> Setting {
    let (name, keys) = spec.split_once(':').unwrap_or((spec, ""));
    let (mut training, mut model) = (String::new(), String::new());
    for kv in keys.split(';').filter(|k| !k.trim().is_empty()) {
        let key = kv.split('=').next().unwrap_or("").trim();
        let out = if MODEL_KEYS.contains(&key) {
            &mut model
        } else {
            &mut training
        };
        out.push_str(kv.trim());
        out.push('\n');
    }
    Setting {
        name: name.to_string(),
        training: toml::from_str(&training)
            .unwrap_or_else(|e| panic!("{name}: [training] keys: {e}")),
        model: toml::from_str(&model).unwrap_or_else(|e| panic!("{name}: [model] keys: {e}")),
    }
}

/// Built-in list: the defaults, then one change at a time.
const SETTINGS: &[&str] = &[
    "defaults:",
    "min_batches_per_epoch 1 (the former rule):min_batches_per_epoch=1",
    "min_batches_per_epoch 8:min_batches_per_epoch=8",
    "min_batches_per_epoch 32:min_batches_per_epoch=32",
    "batch_size 32:batch_size=32",
    "learning_rate 3e-3:learning_rate=3e-3",
    "learning_rate 3e-4:learning_rate=3e-4",
    "warm_learning_rate 3e-4:warm_learning_rate=3e-4",
    "warm_learning_rate 1e-3:warm_learning_rate=1e-3",
    "cold_epochs 300, patience 30:cold_epochs=300;patience=30",
    "patience 4:patience=4",
    "patience 16:patience=16",
    "validation_fraction 0.2:validation_fraction=0.2",
    "hidden [32, 32]:hidden=[32,32]",
    "hidden [128, 128]:hidden=[128,128]",
    "l2 1e-4:l2=1e-4",
    "l2 1e-3:l2=1e-3",
    "replay_ratio 2:replay_ratio=2",
    "weight_average_decay 0.9:weight_average_decay=0.9",
    "weight_average_decay 0.99:weight_average_decay=0.99",
    "weight_average_decay 0.999:weight_average_decay=0.999",
];

struct Figures {
    cold: f64,
    /// Cold on the first files only, over OLS on those files.
    first: f64,
    warm: f64,
    cold_seconds: f64,
    warm_seconds: f64,
    cold_epochs: f64,
}

fn run(set: &Set, s: &Setting, seed: u64) -> (f64, Figures) {
    let (files, kept) = split(set, seed);
    let delivered: Vec<Vec<f64>> = files.iter().flatten().cloned().collect();
    let ols = ols_mae(&delivered, &kept);
    let width = delivered[0].len();
    let sch = schema(width);
    let training = TrainingConfig {
        seed,
        ..s.training.clone()
    };

    let all = matrix(&delivered);
    let spec = FeatureSpec::new(
        &sch,
        &ColumnStats::of_rows(&sch, &all),
        &Vocabularies::new(),
    );
    let t = Instant::now();
    let cold = train_cold(&spec, &s.model, &training, &all, Control::default()).expect("trains");
    let cold_seconds = t.elapsed().as_secs_f64();
    let cold_mae = model_mae(&cold.model, &kept);

    let t = Instant::now();
    let (model, first) = first_model(&files, &sch, &s.model, &training);
    let first_ratio = model_mae(&model, &kept) / ols_mae(&first, &kept);
    let model = warm_stream(model, &files, &training, |_| {});
    let warm_seconds = t.elapsed().as_secs_f64();
    let warm_mae = model_mae(&model, &kept);
    (
        ols,
        Figures {
            cold: cold_mae,
            first: first_ratio,
            warm: warm_mae,
            cold_seconds,
            warm_seconds,
            cold_epochs: cold.summary.epochs as f64,
        },
    )
}

fn main() {
    let mut args = std::env::args().skip(1);
    let mut seeds = 5u64;
    let mut sets = vec!["wine".to_string(), "diabetes".to_string()];
    let mut specs: Vec<String> = Vec::new();
    let mut dump: Option<std::path::PathBuf> = None;
    let mut ensemble = false;
    while let Some(a) = args.next() {
        match a.as_str() {
            "--ensembles" => ensemble = true,
            "--seeds" => seeds = args.next().and_then(|v| v.parse().ok()).expect("--seeds N"),
            "--dump" => {
                let dir = std::path::PathBuf::from(args.next().expect("--dump DIR"));
                dump = Some(dir);
            }
            "--sets" => {
                sets = args
                    .next()
                    .expect("--sets a,b")
                    .split(',')
                    .map(str::to_string)
                    .collect()
            }
            _ => specs.push(a),
        }
    }
    if specs.is_empty() {
        specs = SETTINGS.iter().map(|s| (*s).to_string()).collect();
    }
    let data: Vec<Set> = sets
        .iter()
        .map(|n| match n.as_str() {
            "wine" => wine(),
            "diabetes" => diabetes(),
            other => panic!("unknown data set {other}: wine or diabetes"),
        })
        .collect();
    if ensemble {
        println!(
            "| data set | cold | warm stream | mean of cold and warm stream | mean of the last 3 warm models | cold, 3 seeds, each alone | mean of the 3 cold seeds | OLS MAE |"
        );
        println!("|---|---|---|---|---|---|---|---|");
        for set in &data {
            let mut sum = [0.0f64; 7];
            for seed in 1..=seeds {
                for (acc, v) in sum.iter_mut().zip(ensembles(set, seed)) {
                    *acc += v / seeds as f64;
                }
            }
            println!(
                "| {} | {:.4} | {:.4} | {:.4} | {:.4} | {:.4} | {:.4} | {:.4} |",
                set.name, sum[0], sum[1], sum[2], sum[3], sum[4], sum[5], sum[6]
            );
        }
        return;
    }
    if let Some(dir) = dump {
        // The splits as CSV, for a reference fitted outside this program on
        // exactly these rows (ops/bench/reference_mlp.py).
        std::fs::create_dir_all(&dir).expect("creates the dump folder");
        for set in &data {
            for seed in 1..=seeds {
                let (files, kept) = split(set, seed);
                let delivered: Vec<Vec<f64>> = files.iter().flatten().cloned().collect();
                for (part, rows) in [("delivered", &delivered), ("kept", &kept)] {
                    let text: String = rows
                        .iter()
                        .map(|r| {
                            let cells: Vec<String> = r.iter().map(|v| v.to_string()).collect();
                            cells.join(",") + "\n"
                        })
                        .collect();
                    let path = dir.join(format!("{}-{seed}-{part}.csv", set.name));
                    std::fs::write(&path, text).expect("writes the split");
                }
            }
        }
        println!("splits written to {}", dir.display());
        return;
    }
    println!(
        "| setting | data set | cold MAE / OLS | cold on 3 files / OLS on them | warm stream MAE / OLS | cold s | warm stream s | cold epochs | OLS MAE |"
    );
    println!("|---|---|---|---|---|---|---|---|---|");
    for spec in &specs {
        let s = setting(spec);
        for set in &data {
            let mut sum = [0.0f64; 7];
            for seed in 1..=seeds {
                let (ols, f) = run(set, &s, seed);
                for (acc, v) in sum.iter_mut().zip([
                    f.cold / ols,
                    f.warm / ols,
                    f.cold_seconds,
                    f.warm_seconds,
                    f.cold_epochs,
                    ols,
                    f.first,
                ]) {
                    *acc += v / seeds as f64;
                }
            }
            println!(
                "| {} | {} | {:.4} | {:.4} | {:.4} | {:.2} | {:.2} | {:.0} | {:.4} |",
                s.name, set.name, sum[0], sum[6], sum[1], sum[2], sum[3], sum[4], sum[5]
            );
        }
    }
}
