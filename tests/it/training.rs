//! The learning core through the library API: linear models against
//! certified and published values, warm-start continuity through a
//! checkpoint on disk, seeded determinism, both backends, two runs on two
//! threads, and a cold-then-warm stream of a public data set.

use std::path::Path;
use std::sync::atomic::AtomicBool;

use tidegate::config::{Activation, Backend, ColumnKind, ModelConfig, Task, TrainingConfig};
use tidegate::ids::ModelId;
use tidegate::model::{Checkpoint, CheckpointMeta, Model, Predictions};
use tidegate::rng::Rng;
use tidegate::schema::{
    Column, ColumnStats, FeatureSpec, RowMatrix, Schema, Vocabularies, number_cell,
};
use tidegate::train::{Control, Trained, least_squares, train_cold, train_warm};

/// A regression schema of number columns; the last one is the target.
fn number_schema(names: &[&str]) -> Schema {
    Schema {
        columns: names
            .iter()
            .map(|n| Column {
                name: (*n).into(),
                kind: ColumnKind::Number,
                min: None,
                max: None,
                required: true,
            })
            .collect(),
        target: names.len() - 1,
        task: Task::Regression,
    }
}

fn rows_of(values: &[Vec<f64>]) -> RowMatrix {
    let mut rows = RowMatrix::new(values[0].len());
    for v in values {
        let cells: Vec<u32> = v.iter().map(|x| number_cell(Some(*x as f32))).collect();
        rows.push_row(&cells);
    }
    rows
}

/// The feature encoding a cold start freezes: scaler stats of `rows`.
fn spec_for(schema: &Schema, rows: &RowMatrix) -> FeatureSpec {
    FeatureSpec::new(
        schema,
        &ColumnStats::of_rows(schema, rows),
        &Vocabularies::new(),
    )
}

/// Log relative error: the number of correct significant digits.
fn lre(x: f64, certified: f64) -> f64 {
    if x == certified {
        15.0
    } else {
        -((x - certified).abs() / certified.abs()).log10()
    }
}

/// Intercept and slope, in the data's units, of a linear model (`hidden = []`)
/// trained on one standardised input: ŷ = μy + σy·(w·(x − μx)/σx + b).
fn line_of(model: &Model) -> (f64, f64) {
    let layer = &model.weights()[0];
    let (w, b) = (f64::from(layer.weight[0]), f64::from(layer.bias[0]));
    let tidegate::schema::InputEncoding::Number { mean, std, .. } = model.spec().inputs[0] else {
        panic!("one number input");
    };
    let (mx, sx) = (f64::from(mean), f64::from(std));
    let t = model.target_scale();
    let slope = t.std * w / sx;
    (t.mean + t.std * b - slope * mx, slope)
}

fn read_norris() -> Vec<(f64, f64)> {
    let path = Path::new(env!("CARGO_MANIFEST_DIR")).join("tests/data/nist/norris.csv");
    let text =
        std::fs::read_to_string(path).expect("tests/data/nist/norris.csv is in the repository");
    text.lines()
        .skip(1)
        .map(|l| {
            let (y, x) = l.split_once(',').expect("two fields");
            (x.parse().expect("number"), y.parse().expect("number"))
        })
        .collect()
}

// NIST StRD Norris certified values (CHECKS.md, from the NIST data page).
const NORRIS_B0: f64 = -0.262323073774029;
const NORRIS_B1: f64 = 1.00211681802045;
const NORRIS_R2: f64 = 0.999993745883712;
const NORRIS_RSS: f64 = 26.6173985294224;

#[test]
fn norris_closed_form_reaches_the_certified_values() {
    // NIST StRD Norris: certified B0, B1 (CHECKS.md). In f64 on the decimal
    // rows the closed form must agree to 10+ digits; this also proves the 36
    // rows were transcribed correctly.
    let data = read_norris();
    assert_eq!(data.len(), 36);
    let x: Vec<f64> = data.iter().map(|d| d.0).collect();
    let y: Vec<f64> = data.iter().map(|d| d.1).collect();
    let b = least_squares(&x, &y, 1, 0.0).expect("full rank");
    assert!(
        lre(b[0], NORRIS_B0) > 10.0,
        "B0 {} LRE {}",
        b[0],
        lre(b[0], NORRIS_B0)
    );
    assert!(
        lre(b[1], NORRIS_B1) > 12.0,
        "B1 {} LRE {}",
        b[1],
        lre(b[1], NORRIS_B1)
    );
    // The same rows stored as f32 cells (as the store keeps them) cost digits:
    // the f32 rounding of x and y alone moves B0 in its 5th digit.
    let xf: Vec<f64> = x.iter().map(|v| f64::from(*v as f32)).collect();
    let yf: Vec<f64> = y.iter().map(|v| f64::from(*v as f32)).collect();
    let bf = least_squares(&xf, &yf, 1, 0.0).expect("full rank");
    eprintln!(
        "norris closed form LRE: f64 rows B0 {:.1} B1 {:.1}; f32 cells B0 {:.1} B1 {:.1}",
        lre(b[0], NORRIS_B0),
        lre(b[1], NORRIS_B1),
        lre(bf[0], NORRIS_B0),
        lre(bf[1], NORRIS_B1)
    );
}

fn norris_by_gradient_descent(backend: Backend) -> (f64, f64, f64, f64) {
    let data = read_norris();
    let schema = number_schema(&["x", "y"]);
    let rows = rows_of(&data.iter().map(|(x, y)| vec![*x, *y]).collect::<Vec<_>>());
    let spec = spec_for(&schema, &rows);
    let linear = ModelConfig {
        hidden: vec![],
        ..ModelConfig::default()
    };
    // Full batch, no validation split (patience 0), a fast phase then a slow
    // one to settle into the optimum.
    let cfg = TrainingConfig {
        backend,
        batch_size: 64,
        min_batches_per_epoch: 1,
        learning_rate: 1e-2,
        cold_epochs: 1500,
        patience: 0,
        ..TrainingConfig::default()
    };
    let cold = train_cold(&spec, &linear, &cfg, &rows, Control::default()).expect("trains");
    let slow = TrainingConfig {
        warm_learning_rate: Some(1e-4),
        warm_epochs: 1500,
        replay_ratio: 0.0,
        ..cfg
    };
    let warm = train_warm(
        &cold.model,
        &slow,
        &rows,
        &RowMatrix::new(2),
        Control::default(),
    )
    .expect("trains");
    let (b0, b1) = line_of(&warm.model);
    let mean_y = data.iter().map(|d| d.1).sum::<f64>() / 36.0;
    let tss: f64 = data.iter().map(|d| (d.1 - mean_y).powi(2)).sum();
    let rss: f64 = data.iter().map(|(x, y)| (y - b0 - b1 * x).powi(2)).sum();
    (b0, b1, 1.0 - rss / tss, rss)
}

#[test]
fn norris_linear_model_by_gradient_descent_reaches_the_certified_values() {
    // NIST StRD Norris certified values (CHECKS.md). Reached (flex and ndarray,
    // release): B1 LRE 6.52, B0 LRE 3.29, R² LRE 13.0, residual SS LRE 7.84.
    // The ceiling is f32 arithmetic: standardised targets carry ~1e-7 rounding
    // against residuals of ~2.5e-3, which moves B1 in its 7th digit, and
    // B0 = ȳ − B1·x̄ with x̄ ≈ 420 loses another 3 digits to cancellation
    // (a lower third-phase rate measured no better). The closed form on the
    // same f32 cells reaches B0 5.0 / B1 8.0.
    for backend in [Backend::Flex, Backend::Ndarray] {
        let (b0, b1, r2, rss) = norris_by_gradient_descent(backend);
        eprintln!(
            "norris gradient descent {backend:?}: B0 {b0} (LRE {:.2}) B1 {b1} (LRE {:.2}) R2 {r2} (LRE {:.2}) RSS {rss} (LRE {:.2})",
            lre(b0, NORRIS_B0),
            lre(b1, NORRIS_B1),
            lre(r2, NORRIS_R2),
            lre(rss, NORRIS_RSS)
        );
        assert!(lre(b1, NORRIS_B1) >= 6.0, "{backend:?} B1 {b1}");
        assert!(lre(b0, NORRIS_B0) >= 3.0, "{backend:?} B0 {b0}");
        assert!(lre(r2, NORRIS_R2) >= 12.0, "{backend:?} R2 {r2}");
        assert!(lre(rss, NORRIS_RSS) >= 7.0, "{backend:?} RSS {rss}");
    }
}

#[test]
fn anscombe_set_one_line() {
    // Anscombe (1973), set I: ŷ = 3.0001 + 0.5001·x, R² = 0.667 (CHECKS.md).
    // Rows from memory (they match the published table as vendored in public
    // repositories).
    let x = [10.0, 8.0, 13.0, 9.0, 11.0, 14.0, 6.0, 4.0, 12.0, 7.0, 5.0];
    let y = [
        8.04, 6.95, 7.58, 8.81, 8.33, 9.96, 7.24, 4.26, 10.84, 4.82, 5.68,
    ];
    let schema = number_schema(&["x", "y"]);
    let rows = rows_of(
        &x.iter()
            .zip(&y)
            .map(|(a, b)| vec![*a, *b])
            .collect::<Vec<_>>(),
    );
    let spec = spec_for(&schema, &rows);
    let linear = ModelConfig {
        hidden: vec![],
        ..ModelConfig::default()
    };
    for backend in [Backend::Flex, Backend::Ndarray] {
        let cfg = TrainingConfig {
            backend,
            batch_size: 16,
            learning_rate: 1e-2,
            cold_epochs: 3000,
            patience: 0,
            ..TrainingConfig::default()
        };
        let t = train_cold(&spec, &linear, &cfg, &rows, Control::default()).expect("trains");
        let (b0, b1) = line_of(&t.model);
        let mean_y = y.iter().sum::<f64>() / 11.0;
        let tss: f64 = y.iter().map(|v| (v - mean_y).powi(2)).sum();
        let rss: f64 = x
            .iter()
            .zip(&y)
            .map(|(a, b)| (b - b0 - b1 * a).powi(2))
            .sum();
        let r2 = 1.0 - rss / tss;
        assert!((b0 - 3.0001).abs() < 5e-4, "{backend:?} intercept {b0}");
        assert!((b1 - 0.5001).abs() < 5e-5, "{backend:?} slope {b1}");
        assert!((r2 - 0.667).abs() < 5e-4, "{backend:?} R² {r2}");
    }
    // The closed form agrees to the published 4 decimals.
    let b = least_squares(&x, &y, 1, 0.0).expect("full rank");
    assert!(
        (b[0] - 3.0001).abs() < 5e-5 && (b[1] - 0.5001).abs() < 5e-5,
        "{b:?}"
    );
}

/// y = sin(x0) + x1·x2 − 0.5·x3 + noise: needs the hidden layers.
fn synthetic(n: usize, seed: u64) -> (Schema, RowMatrix) {
    let schema = number_schema(&["a", "b", "c", "d", "y"]);
    let mut rng = Rng::new(seed);
    let rows: Vec<Vec<f64>> = (0..n)
        .map(|_| {
            let v: Vec<f64> = (0..4).map(|_| rng.normal()).collect();
            let y = v[0].sin() + v[1] * v[2] - 0.5 * v[3] + 0.1 * rng.normal();
            vec![v[0], v[1], v[2], v[3], y]
        })
        .collect();
    (schema, rows_of(&rows))
}

fn small_net() -> ModelConfig {
    ModelConfig {
        hidden: vec![16, 16],
        activation: Activation::Tanh,
        ..ModelConfig::default()
    }
}

fn cfg(backend: Backend) -> TrainingConfig {
    TrainingConfig {
        backend,
        batch_size: 32,
        learning_rate: 3e-3,
        // Warm runs continue at the cold rate: these tests compare a
        // continued run with an uninterrupted one.
        warm_learning_rate: None,
        cold_epochs: 5,
        warm_epochs: 5,
        patience: 0,
        replay_ratio: 0.0,
        ..TrainingConfig::default()
    }
}

fn meta<'a>(id: u64, vocabs: &'a Vocabularies) -> CheckpointMeta<'a> {
    CheckpointMeta {
        id: ModelId(id),
        parent: None,
        created_at: chrono::Utc::now(),
        schema_fingerprint: "fp",
        vocabularies: vocabs,
    }
}

#[test]
fn warm_start_from_a_checkpoint_continues_exactly() {
    let (schema, rows) = synthetic(800, 1);
    let spec = spec_for(&schema, &rows);
    let c = cfg(Backend::Flex);
    let cold = train_cold(&spec, &small_net(), &c, &rows, Control::default()).expect("trains");
    let dir = tempfile::tempdir().expect("temp dir");
    let vocabs = Vocabularies::new();
    let path = cold
        .model
        .save(dir.path(), &cold.summary, &meta(1, &vocabs))
        .expect("save");
    // A fresh model object built from the files alone.
    let reloaded = Checkpoint::load(&path, "fp").expect("load").model;

    // Predictions of the reloaded model are bit-identical, on both backends.
    for backend in [Backend::Flex, Backend::Ndarray] {
        assert_eq!(
            reloaded.predict(&rows, backend).expect("predict"),
            cold.model.predict(&rows, backend).expect("predict")
        );
    }
    // Continuing from the files equals continuing in memory, bit for bit:
    // weights and Adam state were both restored.
    let in_memory = train_warm(
        &cold.model,
        &c,
        &rows,
        &RowMatrix::new(5),
        Control::default(),
    )
    .expect("trains");
    let from_disk =
        train_warm(&reloaded, &c, &rows, &RowMatrix::new(5), Control::default()).expect("trains");
    assert_eq!(
        from_disk.model.weights_digest(),
        in_memory.model.weights_digest()
    );
    assert_eq!(from_disk.summary.train_loss, in_memory.summary.train_loss);
    // Without the optimizer state the continuation differs: the state matters.
    let mut fresh_adam = reloaded.clone();
    fresh_adam.reset_optimizer();
    let restarted = train_warm(
        &fresh_adam,
        &c,
        &rows,
        &RowMatrix::new(5),
        Control::default(),
    )
    .expect("trains");
    assert_ne!(
        restarted.model.weights_digest(),
        in_memory.model.weights_digest()
    );

    // The loss carries on from where the cold run stopped, and tracks an
    // uninterrupted run of the same length (same data, same rate; only the
    // shuffle order of the later epochs differs).
    let uninterrupted = train_cold(
        &spec,
        &small_net(),
        &TrainingConfig {
            cold_epochs: 10,
            ..c.clone()
        },
        &rows,
        Control::default(),
    )
    .expect("trains");
    let cold_last = cold.summary.train_loss[4];
    let warm_first = from_disk.summary.train_loss[0];
    assert!(
        warm_first < cold_last,
        "warm epoch 1 {warm_first} vs cold epoch 5 {cold_last}"
    );
    for (e, (w, u)) in from_disk
        .summary
        .train_loss
        .iter()
        .zip(&uninterrupted.summary.train_loss[5..])
        .enumerate()
    {
        assert!(
            (w - u).abs() / u < 0.05,
            "epoch {}: continued {w} vs uninterrupted {u}",
            e + 6
        );
    }
}

#[test]
fn same_seed_same_weights_other_seed_other_weights() {
    let (schema, rows) = synthetic(500, 2);
    let spec = spec_for(&schema, &rows);
    let c = TrainingConfig {
        patience: 3,
        ..cfg(Backend::Flex)
    };
    let a = train_cold(&spec, &small_net(), &c, &rows, Control::default()).expect("trains");
    let b = train_cold(&spec, &small_net(), &c, &rows, Control::default()).expect("trains");
    assert_eq!(a.model.weights_digest(), b.model.weights_digest());
    let other_seed = train_cold(
        &spec,
        &small_net(),
        &TrainingConfig {
            seed: 43,
            ..c.clone()
        },
        &rows,
        Control::default(),
    )
    .expect("trains");
    assert_ne!(a.model.weights_digest(), other_seed.model.weights_digest());
    // No golden digest of the weights: the bits of one seeded run are an
    // outcome, not a property, and pinning them blocked every change to a
    // training default (it had to be rewritten with each).
}

#[test]
fn both_backends_learn_the_same_function() {
    let (schema, rows) = synthetic(1000, 3);
    let spec = spec_for(&schema, &rows);
    let runs: Vec<Trained> = [Backend::Flex, Backend::Ndarray]
        .into_iter()
        .map(|b| {
            train_cold(
                &spec,
                &small_net(),
                &TrainingConfig {
                    cold_epochs: 8,
                    ..cfg(b)
                },
                &rows,
                Control::default(),
            )
            .expect("trains")
        })
        .collect();
    let (f, n) = (&runs[0], &runs[1]);
    // Same initial weights (drawn by the project's Rng), different kernels:
    // curves and predictions agree closely but not bit for bit.
    for (a, b) in f.summary.train_loss.iter().zip(&n.summary.train_loss) {
        assert!((a - b).abs() / a < 0.02, "flex {a} vs ndarray {b}");
    }
    let (Predictions::Regression { values: pf }, Predictions::Regression { values: pn }) = (
        f.model.predict(&rows, Backend::Flex).expect("predict"),
        n.model.predict(&rows, Backend::Ndarray).expect("predict"),
    ) else {
        panic!("regression");
    };
    let max_diff = pf
        .iter()
        .zip(&pn)
        .map(|(a, b)| (a - b).abs())
        .fold(0.0f32, f32::max);
    assert!(max_diff < 0.05, "largest prediction difference {max_diff}");
    let (first, last) = (f.summary.train_loss[0], f.summary.train_loss[7]);
    assert!(
        last < 0.5 * first,
        "the network learns: epoch 1 {first}, epoch 8 {last}"
    );
}

#[test]
fn two_runs_on_two_threads_match_sequential_runs() {
    fn is_send<T: Send>() {}
    is_send::<Model>();
    is_send::<Trained>();
    let (schema, rows) = synthetic(600, 4);
    let spec = spec_for(&schema, &rows);
    let c1 = cfg(Backend::Flex);
    let c2 = TrainingConfig {
        seed: 7,
        ..cfg(Backend::Flex)
    };
    let seq = [
        train_cold(&spec, &small_net(), &c1, &rows, Control::default())
            .expect("trains")
            .model
            .weights_digest(),
        train_cold(&spec, &small_net(), &c2, &rows, Control::default())
            .expect("trains")
            .model
            .weights_digest(),
    ];
    let cancel = AtomicBool::new(false);
    let par = std::thread::scope(|s| {
        let h1 = s.spawn(|| {
            train_cold(
                &spec,
                &small_net(),
                &c1,
                &rows,
                Control {
                    cancel: Some(&cancel),
                    progress: None,
                },
            )
        });
        let h2 = s.spawn(|| {
            train_cold(
                &spec,
                &small_net(),
                &c2,
                &rows,
                Control {
                    cancel: Some(&cancel),
                    progress: None,
                },
            )
        });
        [
            h1.join().expect("thread").expect("trains"),
            h2.join().expect("thread").expect("trains"),
        ]
    });
    assert_eq!(
        [par[0].model.weights_digest(), par[1].model.weights_digest()],
        seq
    );
}

#[test]
fn red_wine_streamed_cold_then_warm_meets_the_ols_baseline() {
    // Red-wine quality (Cortez et al. 2009) as shipped in linfa-datasets
    // 0.8.1: 1599 rows × 11 inputs, quality 3–8. The network is judged
    // against closed-form OLS fitted and scored on the same split in this
    // run; the recalled 10-fold figure (CHECKS.md) is checked against a
    // 10-fold OLS run here, like with like.
    let ds = linfa_datasets::winequality();
    let (records, targets) = (&ds.records, &ds.targets);
    assert_eq!((records.nrows(), records.ncols()), (1599, 11));
    let names = [
        "fa", "va", "ca", "rs", "cl", "fsd", "tsd", "dens", "ph", "sul", "alc", "quality",
    ];
    let schema = number_schema(&names);
    let all: Vec<Vec<f64>> = (0..1599)
        .map(|r| {
            let mut v: Vec<f64> = (0..11).map(|c| records[[r, c]]).collect();
            v.push(targets[r] as f64);
            v
        })
        .collect();
    let rows = rows_of(&all);
    // Holdout by a hash of each row's content, as the store splits (20%).
    let (mut train_idx, mut hold_idx) = (Vec::new(), Vec::new());
    for r in 0..rows.n_rows() {
        let key: Vec<u8> = rows.row(r).iter().flat_map(|c| c.to_le_bytes()).collect();
        if tidegate::schema::is_holdout(&key, 0.2) {
            hold_idx.push(r)
        } else {
            train_idx.push(r)
        }
    }
    let hold = rows.select(&hold_idx);
    // Stream: the first half of the training rows cold, then three warm batches.
    let cut = train_idx.len() / 2;
    let first = rows.select(&train_idx[..cut]);
    let spec = spec_for(&schema, &first);
    let net = ModelConfig {
        hidden: vec![32, 32],
        activation: Activation::Relu,
        l2: 1e-4,
        ..ModelConfig::default()
    };
    let c = TrainingConfig {
        batch_size: 32,
        learning_rate: 1e-3,
        cold_epochs: 60,
        warm_epochs: 15,
        patience: 8,
        replay_ratio: 1.0,
        ..TrainingConfig::default()
    };
    let mut model = train_cold(&spec, &net, &c, &first, Control::default())
        .expect("trains")
        .model;
    let mut seen = train_idx[..cut].to_vec();
    for part in train_idx[cut..].chunks(train_idx[cut..].len().div_ceil(3)) {
        let new = rows.select(part);
        let old = rows.select(&seen);
        model = train_warm(&model, &c, &new, &old, Control::default())
            .expect("trains")
            .model;
        seen.extend_from_slice(part);
    }
    let losses = model.row_losses(&hold, Backend::Ndarray).expect("losses");
    let mae = losses.iter().map(|l| l.sqrt()).sum::<f64>() / losses.len() as f64;
    // Reference in the same run: closed-form OLS on all training rows.
    let width = 11;
    let train = rows.select(&train_idx);
    let x: Vec<f64> = (0..train.n_rows())
        .flat_map(|r| (0..width).map(move |c| (r, c)))
        .map(|(r, c)| f64::from(train.number(r, c).expect("number")))
        .collect();
    let y: Vec<f64> = (0..train.n_rows())
        .map(|r| f64::from(train.number(r, 11).expect("number")))
        .collect();
    let b = least_squares(&x, &y, width, 0.0).expect("full rank");
    let ols_mae = (0..hold.n_rows())
        .map(|r| {
            let p = b[0]
                + (0..width)
                    .map(|c| b[c + 1] * f64::from(hold.number(r, c).expect("number")))
                    .sum::<f64>();
            (p - f64::from(hold.number(r, 11).expect("number"))).abs()
        })
        .sum::<f64>()
        / hold.n_rows() as f64;
    // 10-fold OLS over all rows (fold = row index mod 10).
    let mut abs_sum = 0.0;
    for fold in 0..10 {
        let (fit, test): (Vec<usize>, Vec<usize>) = (0..all.len()).partition(|r| r % 10 != fold);
        let x: Vec<f64> = fit.iter().flat_map(|&r| all[r][..width].to_vec()).collect();
        let y: Vec<f64> = fit.iter().map(|&r| all[r][width]).collect();
        let b = least_squares(&x, &y, width, 0.0).expect("full rank");
        abs_sum += test
            .iter()
            .map(|&r| {
                let p = b[0] + (0..width).map(|c| b[c + 1] * all[r][c]).sum::<f64>();
                (p - all[r][width]).abs()
            })
            .sum::<f64>();
    }
    let cv_mae = abs_sum / all.len() as f64;
    eprintln!(
        "red wine: {} holdout rows, network MAE {mae:.4}, OLS MAE {ols_mae:.4} on the same split; OLS 10-fold MAE {cv_mae:.4}",
        hold.n_rows()
    );
    // OLS 10-fold MAE ≈ 0.505: from memory (CHECKS.md), not read from the
    // paper; folds differ from any published run, hence the tolerance.
    assert!(
        (cv_mae - 0.505).abs() < 0.02,
        "OLS 10-fold MAE {cv_mae} vs the recalled 0.505"
    );
    assert!(
        mae <= ols_mae + 0.01,
        "network MAE {mae} vs OLS on the same split {ols_mae}"
    );
}
