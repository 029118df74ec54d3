use super::*;
use crate::config::{Activation, Backend, ModelConfig, Task};
use crate::schema::{Vocab, Vocabularies, number_cell};
use burn::tensor::Gradients;

use crate::model::test_spec as spec;

fn config(hidden: Vec<usize>, activation: Activation, init_scale: f64) -> ModelConfig {
    ModelConfig {
        hidden,
        activation,
        init_scale,
        ..ModelConfig::default()
    }
}

fn tensor2(values: &[f32], rows: usize, device: &Device) -> Tensor<2> {
    Tensor::<2>::from_data(
        TensorData::new(values.to_vec(), [rows, values.len() / rows]),
        device,
    )
}

fn values<const D: usize>(t: Tensor<D>) -> Vec<f32> {
    tensor_values(t.into_data())
}

fn grad_of(x: &Tensor<2>, grads: &Gradients) -> Vec<f32> {
    values(x.grad(grads).expect("input tracks a gradient"))
}

const BACKENDS: [Backend; 2] = [Backend::Flex, Backend::Ndarray];

/// Inputs from −6 to 6, where both functions saturate, through 0.
fn grid() -> Vec<f32> {
    (0..241).map(|i| -6.0 + 0.05 * i as f32).collect()
}

#[test]
fn fast_activations_match_burn_in_value_and_gradient() {
    // The custom path must agree with burn's own tanh/sigmoid within 1e-6
    // in value and in gradient (BURN-NOTES.md measured this bound).
    for backend in BACKENDS {
        let dev = device(backend).autodiff();
        let xs = grid();
        type Act = fn(Tensor<2>) -> Tensor<2>;
        let pairs: [(Act, Act); 2] = [
            (activation::tanh_tracked, |x| x.tanh()),
            (
                activation::sigmoid_tracked,
                burn::tensor::activation::sigmoid,
            ),
        ];
        for (fast, reference) in pairs {
            let a = tensor2(&xs, 1, &dev).require_grad();
            let b = tensor2(&xs, 1, &dev).require_grad();
            let ya = fast(a.clone());
            let yb = reference(b.clone());
            let (va, vb) = (values(ya.clone()), values(yb.clone()));
            let ga = grad_of(&a, &ya.sum().backward());
            let gb = grad_of(&b, &yb.sum().backward());
            for i in 0..xs.len() {
                assert!(
                    (va[i] - vb[i]).abs() <= 1e-6,
                    "{backend:?} value at {}: {} vs {}",
                    xs[i],
                    va[i],
                    vb[i]
                );
                assert!(
                    (ga[i] - gb[i]).abs() <= 1e-6,
                    "{backend:?} grad at {}: {} vs {}",
                    xs[i],
                    ga[i],
                    gb[i]
                );
            }
        }
    }
}

#[test]
fn sigmoid_derivative_is_s_times_one_minus_s_and_peaks_at_a_quarter() {
    // σ'(x) = σ(x)(1 − σ(x)), largest value 1/4 at x = 0 (common practice, no source).
    let dev = device(Backend::Flex).autodiff();
    let xs = grid();
    let x = tensor2(&xs, 1, &dev).require_grad();
    let y = activation::sigmoid_tracked(x.clone());
    let s = values(y.clone());
    let g = grad_of(&x, &y.sum().backward());
    for i in 0..xs.len() {
        assert!((g[i] - s[i] * (1.0 - s[i])).abs() < 1e-6);
    }
    let (at, peak) = g
        .iter()
        .enumerate()
        .fold((0, f32::MIN), |a, (i, &v)| if v > a.1 { (i, v) } else { a });
    assert!(xs[at].abs() < 1e-6, "peak at {}", xs[at]);
    assert!((peak - 0.25).abs() < 1e-7, "peak {peak}");
}

#[test]
fn l2_penalty_gradient_is_two_w() {
    // d/dw (λ·Σw²) = 2λw (common practice, no source); the L1 term adds λ·sign(w).
    let dev = device(Backend::Flex).autodiff();
    let mut rng = Rng::new(7);
    let weights = init_weights(&[3, 4, 2], 1.0, &mut rng);
    let net = Net::from_weights(&weights, Activation::Relu, 0.0, &dev);
    let lambda = 0.3;
    let grads = net
        .penalty(lambda, 0.0)
        .expect("l2 > 0 gives a penalty")
        .backward();
    for (layer, lw) in net.layers.iter().zip(&weights) {
        let g = values(layer.weight.val().grad(&grads).expect("weight gradient"));
        for (gi, wi) in g.iter().zip(&lw.weight) {
            assert!((gi - 2.0 * lambda as f32 * wi).abs() < 1e-6);
        }
    }
    let grads = net
        .penalty(0.0, lambda)
        .expect("l1 > 0 gives a penalty")
        .backward();
    let g = values(
        net.layers[0]
            .weight
            .val()
            .grad(&grads)
            .expect("weight gradient"),
    );
    for (gi, wi) in g.iter().zip(&weights[0].weight) {
        assert!((gi - lambda as f32 * wi.signum()).abs() < 1e-6);
    }
    assert!(net.penalty(0.0, 0.0).is_none());
}

#[test]
fn gradient_of_the_whole_equals_the_sum_over_chunks() {
    // The gradient of a summed loss over a data set is the sum of the
    // gradients over any split into chunks (common practice, no source).
    for backend in BACKENDS {
        let dev = device(backend).autodiff();
        let mut rng = Rng::new(11);
        let weights = init_weights(&[3, 8, 1], 1.0, &mut rng);
        let net = Net::from_weights(&weights, Activation::Tanh, 0.0, &dev);
        let n = 50;
        let x: Vec<f32> = (0..n * 3).map(|_| rng.normal() as f32).collect();
        let y: Vec<f32> = (0..n).map(|_| rng.normal() as f32).collect();
        let sse = |lo: usize, hi: usize| {
            let xt = tensor2(&x[lo * 3..hi * 3], hi - lo, &dev);
            let yt = tensor2(&y[lo..hi], hi - lo, &dev);
            net.forward(xt, None).sub(yt).square().sum()
        };
        let grad = |g: &Gradients| values(net.layers[0].weight.val().grad(g).expect("gradient"));
        let whole = grad(&sse(0, n).backward());
        let mut parts = vec![0.0f32; whole.len()];
        for (lo, hi) in [(0, 17), (17, 18), (18, 50)] {
            for (p, v) in parts.iter_mut().zip(grad(&sse(lo, hi).backward())) {
                *p += v;
            }
        }
        for (a, b) in whole.iter().zip(&parts) {
            assert!(
                (a - b).abs() <= 1e-4 * (1.0 + a.abs()),
                "{backend:?}: {a} vs {b}"
            );
        }
    }
}

#[test]
fn tanh_network_with_tiny_weights_is_close_to_linear() {
    // tanh(z) ≈ z for small z, so with tiny weights the network is close to
    // the linear map W₂ᵀ(W₁ᵀx) + b (common practice, no source).
    let mut rng = Rng::new(3);
    let weights = init_weights(&[4, 16, 1], 1e-3, &mut rng);
    let net = Net::from_weights(&weights, Activation::Tanh, 0.0, &device(Backend::Flex));
    let n = 20;
    let x: Vec<f32> = (0..n * 4).map(|_| rng.normal() as f32).collect();
    let got = values(net.forward(tensor2(&x, n, &device(Backend::Flex)), None));
    for r in 0..n {
        let mut h = [0.0f64; 16];
        for (j, hj) in h.iter_mut().enumerate() {
            for i in 0..4 {
                *hj += f64::from(x[r * 4 + i]) * f64::from(weights[0].weight[i * 16 + j]);
            }
        }
        let lin: f64 = h
            .iter()
            .enumerate()
            .map(|(j, hj)| hj * f64::from(weights[1].weight[j]))
            .sum();
        assert!(lin.abs() > 0.0);
        let rel = (f64::from(got[r]) - lin).abs() / lin.abs();
        assert!(rel < 1e-4, "row {r}: {} vs linear {lin}", got[r]);
    }
}

#[test]
fn softmax_probabilities_sum_to_one_and_class_is_arg_max() {
    // Class probabilities from a softmax head sum to 1; the predicted class
    // is the arg max (common practice, no source).
    let model = Model::new(
        spec(3, Task::Classification, 4),
        &config(vec![8], Activation::Relu, 3.0),
        TargetScale::IDENTITY,
        Backend::Flex,
        5,
    )
    .expect("valid shape");
    let mut rng = Rng::new(9);
    let x: Vec<f32> = (0..30 * 3).map(|_| rng.normal() as f32).collect();
    let Predictions::Classification {
        classes,
        probabilities,
        n_classes,
    } = model
        .predict_features(&x, Backend::Flex)
        .expect("width matches")
    else {
        panic!("classification model gives class predictions");
    };
    assert_eq!(n_classes, 4);
    assert_eq!(classes.len(), 30);
    let mut seen = std::collections::BTreeSet::new();
    for (r, p) in probabilities.chunks(4).enumerate() {
        let s: f32 = p.iter().sum();
        assert!((s - 1.0).abs() < 1e-6, "row {r} sums to {s}");
        let best = p
            .iter()
            .enumerate()
            .fold(0, |b, (i, v)| if *v > p[b] { i } else { b });
        assert_eq!(classes[r] as usize, best);
        seen.insert(classes[r]);
    }
    assert!(
        seen.len() > 1,
        "a random network should not predict a single class for all rows"
    );
    assert_eq!(
        softmax(&[1000.0, 1000.0]),
        vec![0.5, 0.5],
        "large logits do not overflow"
    );
    assert_eq!(arg_max(&[0.1, 0.7, 0.7]), 1);
}

#[test]
fn row_losses_are_squared_error_and_cross_entropy() {
    let scale = TargetScale {
        mean: 10.0,
        std: 2.0,
    };
    // Raw outputs 0.5 and −1 are 11 and 8 in target units.
    let l = row_losses_from_raw(Task::Regression, 1, scale, &[0.5, -1.0], &[12.0, 8.0]);
    assert_eq!(l, vec![1.0, 0.0]);
    let l = row_losses_from_raw(
        Task::Classification,
        2,
        TargetScale::IDENTITY,
        &[0.0, 0.0, 0.0, 0.0],
        &[1.0, 5.0],
    );
    assert!((l[0] - std::f64::consts::LN_2).abs() < 1e-12);
    assert_eq!(
        l[1], MAX_ROW_LOG_LOSS,
        "a class without an output is charged the cap"
    );
}

#[test]
fn predictions_agree_across_backends_and_chunks() {
    let model = Model::new(
        spec(5, Task::Regression, 1),
        &config(vec![32, 32], Activation::Tanh, 1.0),
        TargetScale {
            mean: 3.0,
            std: 0.5,
        },
        Backend::Flex,
        1,
    )
    .expect("valid shape");
    let mut rng = Rng::new(2);
    let n = PREDICT_CHUNK + 123;
    let x: Vec<f32> = (0..n * 5).map(|_| rng.normal() as f32).collect();
    let (Predictions::Regression { values: a }, Predictions::Regression { values: b }) = (
        model.predict_features(&x, Backend::Flex).expect("width"),
        model.predict_features(&x, Backend::Ndarray).expect("width"),
    ) else {
        panic!("regression predictions");
    };
    assert_eq!(a.len(), n);
    for (p, q) in a.iter().zip(&b) {
        assert!((p - q).abs() < 1e-5, "{p} vs {q}");
    }
    // The chunk boundary changes nothing: the last row alone gives the same value.
    let last = model
        .predict_features(&x[(n - 1) * 5..], Backend::Flex)
        .expect("width");
    assert_eq!(
        last,
        Predictions::Regression {
            values: vec![a[n - 1]]
        }
    );
    assert!(matches!(
        model.predict_features(&x[..7], Backend::Flex),
        Err(ModelError::FeatureWidth { len: 7, width: 5 })
    ));
}

fn summary() -> TrainingSummary {
    TrainingSummary {
        kind: RunKind::Cold,
        epochs: 0,
        best_epoch: 0,
        kept_validation_loss: None,
        start_validation_loss: None,
        rows: 0,
        replay_rows: 0,
        validation_rows: 0,
        streamed: None,
        seconds: 0.0,
        epoch_seconds: vec![],
        train_loss: vec![],
        validation_loss: vec![],
        stop: StopReason::EpochLimit,
        learning_rate: 1e-3,
        config: crate::config::TrainingConfig::default(),
    }
}

#[test]
fn checkpoint_round_trip_hash_check_and_schema_check() {
    let dir = tempfile::tempdir().expect("temp dir");
    let models = dir.path().join("models");
    let model = Model::new(
        spec(2, Task::Classification, 3),
        &config(vec![4], Activation::Sigmoid, 1.0),
        TargetScale::IDENTITY,
        Backend::Flex,
        8,
    )
    .expect("valid shape");
    let mut vocabs = Vocabularies::new();
    vocabs.insert(
        2,
        Vocab::from_values(vec!["a".into(), "b".into(), "c".into()]),
    );
    let created = chrono::DateTime::parse_from_rfc3339("2026-01-02T03:04:05Z")
        .expect("date")
        .to_utc();
    let meta = CheckpointMeta {
        id: crate::ids::ModelId(3),
        parent: Some(crate::ids::ModelId(2)),
        created_at: created,
        schema_fingerprint: "abc",
        vocabularies: &vocabs,
    };
    let path = model.save(&models, &summary(), &meta).expect("save");
    assert_eq!(path, models.join("m000003"));
    let names: Vec<String> = std::fs::read_dir(&models)
        .expect("list")
        .map(|e| e.expect("entry").file_name().to_string_lossy().into_owned())
        .collect();
    assert_eq!(
        names,
        vec!["m000003".to_string()],
        "no temp folder left behind"
    );
    assert!(matches!(
        model.save(&models, &summary(), &meta),
        Err(ModelError::Exists { .. })
    ));

    let loaded = Checkpoint::load(&path, "abc").expect("load");
    assert_eq!(loaded.manifest.created_at, "2026-01-02T03:04:05.000Z");
    assert_eq!(loaded.manifest.parent, Some(crate::ids::ModelId(2)));
    assert_eq!(loaded.manifest.vocabularies()[&2].code("c"), Some(2));
    assert_eq!(loaded.model.weights_digest(), model.weights_digest());
    let mut rows = crate::schema::RowMatrix::new(3);
    rows.push_row(&[number_cell(Some(0.3)), number_cell(Some(-1.0)), 1]);
    rows.push_row(&[number_cell(Some(2.0)), number_cell(Some(0.5)), 2]);
    assert_eq!(
        loaded.model.predict(&rows, Backend::Flex).expect("predict"),
        model.predict(&rows, Backend::Flex).expect("predict")
    );
    assert_eq!(
        loaded
            .model
            .row_losses(&rows, Backend::Flex)
            .expect("losses"),
        model.row_losses(&rows, Backend::Flex).expect("losses")
    );

    let err = Checkpoint::load(&path, "other").expect_err("schema differs");
    assert!(matches!(err, ModelError::Schema { .. }));
    assert!(err.to_string().contains("migrate"), "{err}");

    let weights = path.join(checkpoint::WEIGHTS_FILE);
    let mut bytes = std::fs::read(&weights).expect("read");
    let last = bytes.len() - 1;
    bytes[last] ^= 1;
    std::fs::write(&weights, bytes).expect("write");
    let err = Checkpoint::load(&path, "abc").expect_err("tampered");
    assert!(matches!(err, ModelError::Hash { .. }), "{err}");
    assert!(err.to_string().contains("weights.bpk"), "{err}");
    assert!(checkpoint::verify(&path).is_err());

    // A manifest whose weight values digest was edited is refused too.
    let other = model
        .save(
            &models,
            &summary(),
            &CheckpointMeta {
                id: crate::ids::ModelId(4),
                ..meta.clone()
            },
        )
        .expect("save");
    let manifest_path = other.join(checkpoint::MANIFEST_FILE);
    let text = std::fs::read_to_string(&manifest_path).expect("read");
    let digest = model.weights_digest();
    std::fs::write(&manifest_path, text.replace(&digest, &"0".repeat(64))).expect("write");
    let r = Checkpoint::load(&other, "abc");
    assert!(matches!(r, Err(ModelError::Hash { .. })), "{r:?}");
    std::fs::write(&manifest_path, "{").expect("write");
    let err = Checkpoint::load(&other, "abc").expect_err("broken manifest");
    assert!(matches!(err, ModelError::Manifest { .. }), "{err}");

    let err = Checkpoint::load(&models.join("m000009"), "abc").expect_err("missing");
    assert!(matches!(err, ModelError::Missing { .. }), "{err}");
}

#[test]
fn empty_shapes_are_refused() {
    let err = Model::new(
        spec(2, Task::Classification, 0),
        &ModelConfig::default(),
        TargetScale::IDENTITY,
        Backend::Flex,
        1,
    );
    assert!(matches!(err, Err(ModelError::Shape { outputs: 0, .. })));
}

/// A spec of one number column (0) and one category column (1) with
/// `width` known values; the target is column 2.
fn mixed_spec(width: usize) -> FeatureSpec {
    FeatureSpec {
        inputs: vec![
            crate::schema::InputEncoding::Number {
                column: 0,
                mean: 1.0,
                std: 2.0,
            },
            crate::schema::InputEncoding::OneHot { column: 1, width },
            crate::schema::InputEncoding::Number {
                column: 3,
                mean: 0.0,
                std: 1.0,
            },
        ],
        target: 2,
        task: Task::Regression,
        outputs: 1,
    }
}

fn mixed_rows(codes: &[u32]) -> RowMatrix {
    let cells = codes
        .iter()
        .enumerate()
        .flat_map(|(i, &c)| {
            [
                number_cell(Some(i as f32 * 0.37 - 2.0)),
                c,
                number_cell(Some(i as f32)),
                number_cell(Some(1.5 - i as f32 * 0.11)),
            ]
        })
        .collect();
    RowMatrix::from_cells(4, cells)
}

#[test]
fn widening_for_new_categories_keeps_every_prediction_and_trains_on() {
    let cfg = config(vec![16, 8], Activation::Tanh, 0.5);
    let model = Model::new(mixed_spec(3), &cfg, TargetScale::IDENTITY, Backend::Flex, 7).unwrap();
    let mut vocabs = Vocabularies::new();
    vocabs.insert(
        1,
        Vocab::from_values(["a", "b", "c", "d", "e"].map(String::from).to_vec()),
    );
    let (wide, added) = model.widened(&vocabs).unwrap();
    assert_eq!(added.get(&1), Some(&2));
    assert_eq!(wide.spec().width(), model.spec().width() + 2);
    // Known values and the two new ones (scored as "none" before) alike.
    let rows = mixed_rows(&[0, 1, 2, 3, 4, 0, 2, 4]);
    let before = model
        .raw_outputs(&model.spec().encode_inputs(&rows), Backend::Flex)
        .unwrap();
    let after = wide
        .raw_outputs(&wide.spec().encode_inputs(&rows), Backend::Flex)
        .unwrap();
    assert_eq!(before, after, "zero weights for new inputs change nothing");
    // Nothing new: the same model back.
    let (same, none) = wide.widened(&vocabs).unwrap();
    assert!(none.is_empty());
    assert_eq!(same.spec(), wide.spec());
    // The widened model trains on (Adam's state of the first layer was
    // reset to the new shape) and learns something about a new value.
    let cfg_train = crate::config::TrainingConfig {
        warm_epochs: 3,
        patience: 0,
        ..crate::config::TrainingConfig::default()
    };
    let new_rows = mixed_rows(&[3, 4, 3, 4, 3, 4, 3, 4, 3, 4, 3, 4]);
    let old_rows = mixed_rows(&[0, 1, 2, 0, 1, 2]);
    let trained = crate::train::train_warm(
        &wide,
        &cfg_train,
        &new_rows,
        &old_rows,
        crate::train::Control::default(),
    )
    .unwrap();
    let w = trained.model.weights();
    let width = wide.spec().width();
    assert_eq!(w[0].inputs, width);
    // Rows of inputs 4 and 5 (values "d" and "e") are no longer all zero.
    let moved = (4..6).any(|r| {
        w[0].weight[r * w[0].outputs..(r + 1) * w[0].outputs]
            .iter()
            .any(|v| *v != 0.0)
    });
    assert!(moved, "the new inputs' weights were trained");
}

#[test]
fn rescaling_folds_new_standardisation_into_the_first_layer() {
    let cfg = config(vec![16, 8], Activation::Tanh, 0.5);
    let model = Model::new(
        mixed_spec(3),
        &cfg,
        TargetScale::IDENTITY,
        Backend::Flex,
        11,
    )
    .unwrap();
    let rows = mixed_rows(&[0, 1, 2, 0, 1, 2, 0, 1]);
    // Column 0 was standardised with (1, 2); the store now says (5, 4):
    // mean moved 2 old stds, past a threshold of 0.5. Column 3 barely moved.
    let mut stats = crate::schema::ColumnStats::default();
    let mut st0 = crate::schema::RunningStats::default();
    for v in [1.0, 9.0, 1.0, 9.0, 5.0 + 8f64.sqrt(), 5.0 - 8f64.sqrt()] {
        st0.push(v);
    }
    stats.numbers.insert(0, st0);
    let mut st3 = crate::schema::RunningStats::default();
    for v in [-1.01, 1.01] {
        st3.push(v);
    }
    stats.numbers.insert(3, st3);
    let (moved, columns) = model.rescaled(&stats, 0.5).unwrap();
    assert_eq!(columns, vec![0]);
    let crate::schema::InputEncoding::Number { mean, std, .. } = moved.spec().inputs[0] else {
        panic!("column 0 is a number");
    };
    assert!(
        (f64::from(mean) - st0.mean).abs() < 1e-5 && (f64::from(std) - st0.std_dev()).abs() < 1e-5
    );
    let before = model
        .raw_outputs(&model.spec().encode_inputs(&rows), Backend::Flex)
        .unwrap();
    let after = moved
        .raw_outputs(&moved.spec().encode_inputs(&rows), Backend::Flex)
        .unwrap();
    for (a, b) in before.iter().zip(&after) {
        assert!((a - b).abs() <= 1e-5 * (1.0 + a.abs()), "{a} vs {b}");
    }
    // Threshold 0 never refreshes.
    assert!(model.rescaled(&stats, 0.0).unwrap().1.is_empty());
}

#[test]
fn scoring_on_several_threads_matches_one_thread_exactly() {
    let model = Model::new(
        spec(5, Task::Regression, 1),
        &config(vec![16], Activation::Relu, 1.0),
        TargetScale::IDENTITY,
        Backend::Flex,
        3,
    )
    .expect("valid shape");
    let mut rng = Rng::new(4);
    // Several chunks: cut into one stretch per core where there are cores;
    // stretches hold whole chunks, so every row sees the same arithmetic.
    let n = 3 * PREDICT_CHUNK + 17;
    let x: Vec<f32> = (0..n * 5).map(|_| rng.normal() as f32).collect();
    let threaded = model.raw_outputs(&x, Backend::Flex).expect("width");
    let one = forward_in_chunks(&model.net.valid(), &x, 5, 1, &device(Backend::Flex));
    assert_eq!(threaded.len(), n);
    assert_eq!(threaded, one);
}

#[test]
fn the_direct_forward_pass_equals_burns() {
    // Every activation, a regression and a classification head, one-hot
    // inputs (mostly zero) beside numbers, and rows one at a time as the
    // endpoint sends them or several at once.
    let codes: Vec<u32> = (0..40).map(|i| i % 5).collect();
    let rows = mixed_rows(&codes);
    for activation in [Activation::Relu, Activation::Tanh, Activation::Sigmoid] {
        for (task, outputs) in [(Task::Regression, 1), (Task::Classification, 3)] {
            let spec = FeatureSpec {
                task,
                outputs,
                ..mixed_spec(4)
            };
            let model = Model::new(
                spec,
                &config(vec![64, 64], activation, 1.0),
                TargetScale {
                    mean: 5.6,
                    std: 0.8,
                },
                Backend::Flex,
                11,
            )
            .expect("valid shape");
            let direct = model.direct();
            let burn = model.predict(&rows, Backend::Flex).expect("width");
            let all = model.predict_direct(&direct, &rows).expect("width");
            let one_by_one: Vec<Predictions> = (0..rows.n_rows())
                .map(|r| {
                    let cells = rows.cells()[r * 4..(r + 1) * 4].to_vec();
                    let row = RowMatrix::from_cells(4, cells);
                    model.predict_direct(&direct, &row).expect("width")
                })
                .collect();
            let close = |a: f32, b: f32| (a - b).abs() <= 1e-5 * a.abs().max(b.abs()).max(1.0);
            match (&burn, &all) {
                (Predictions::Regression { values: a }, Predictions::Regression { values: b }) => {
                    assert_eq!(a.len(), 40);
                    for (r, (p, q)) in a.iter().zip(b).enumerate() {
                        assert!(close(*p, *q), "{activation:?} row {r}: {p} vs {q}");
                        let Predictions::Regression { values: one } = &one_by_one[r] else {
                            panic!("regression");
                        };
                        assert_eq!(one[0], *q, "one row alone gives the same value");
                    }
                }
                (
                    Predictions::Classification {
                        classes: ca,
                        probabilities: pa,
                        ..
                    },
                    Predictions::Classification {
                        classes: cb,
                        probabilities: pb,
                        ..
                    },
                ) => {
                    assert_eq!(ca, cb, "{activation:?}: the same classes");
                    for (p, q) in pa.iter().zip(pb) {
                        assert!(close(*p, *q), "{activation:?}: {p} vs {q}");
                    }
                }
                _ => panic!("tasks differ"),
            }
        }
    }
    // A network built for another width is refused, never misread.
    let narrow = Model::new(
        mixed_spec(2),
        &config(vec![8], Activation::Relu, 1.0),
        TargetScale::IDENTITY,
        Backend::Flex,
        1,
    )
    .expect("valid shape");
    let wide = Model::new(
        mixed_spec(4),
        &config(vec![8], Activation::Relu, 1.0),
        TargetScale::IDENTITY,
        Backend::Flex,
        1,
    )
    .expect("valid shape");
    assert!(matches!(
        wide.predict_direct(&narrow.direct(), &rows),
        Err(ModelError::FeatureWidth { .. })
    ));
}
