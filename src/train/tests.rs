use super::*;
use crate::config::{Activation, Backend};
use crate::schema::number_cell;
use std::cell::RefCell;

use crate::model::test_spec as spec;

/// y = 2·x0 − x1 + 0.5 + small noise, inputs standard normal.
fn linear_rows(n: usize, seed: u64) -> RowMatrix {
    let mut rng = Rng::new(seed);
    let mut rows = RowMatrix::new(3);
    for _ in 0..n {
        let (a, b) = (rng.normal() as f32, rng.normal() as f32);
        let y = 2.0 * a - b + 0.5 + 0.01 * rng.normal() as f32;
        rows.push_row(&[
            number_cell(Some(a)),
            number_cell(Some(b)),
            number_cell(Some(y)),
        ]);
    }
    rows
}

fn small_cfg() -> TrainingConfig {
    TrainingConfig {
        // Mini-batches of 32 whatever the rows: tests here count steps.
        batch_size: 32,
        min_batches_per_epoch: 1,
        learning_rate: 1e-2,
        cold_epochs: 30,
        warm_epochs: 5,
        patience: 5,
        ..TrainingConfig::default()
    }
}

fn linear_model() -> ModelConfig {
    ModelConfig {
        hidden: vec![],
        ..ModelConfig::default()
    }
}

#[test]
fn split_keeps_every_row_once() {
    let (t, v) = split(10, 0.25, &mut Rng::new(1));
    assert_eq!((t.len(), v.len()), (7, 3));
    let mut all: Vec<usize> = t.iter().chain(&v).copied().collect();
    all.sort_unstable();
    assert_eq!(all, (0..10).collect::<Vec<_>>());
    assert_eq!(split(10, 0.0, &mut Rng::new(1)).1.len(), 0);
    assert_eq!(
        split(1, 0.5, &mut Rng::new(1)).1.len(),
        0,
        "a single row is never all validation"
    );
    assert_eq!(
        split(3, 0.99, &mut Rng::new(1)).0.len(),
        1,
        "one row is always left to train on"
    );
}

#[test]
fn cold_run_learns_a_linear_rule_and_records_curves() {
    let rows = linear_rows(400, 1);
    let seen = RefCell::new(Vec::new());
    let progress = |p: Progress| seen.borrow_mut().push(p);
    let control = Control {
        cancel: None,
        progress: Some(&progress),
    };
    let t = train_cold(
        &spec(2, Task::Regression, 1),
        &linear_model(),
        &small_cfg(),
        &rows,
        control,
    )
    .expect("trains");
    let s = &t.summary;
    assert_eq!(s.kind, RunKind::Cold);
    assert_eq!((s.rows, s.validation_rows), (360, 40));
    assert_eq!(s.train_loss.len(), s.epochs);
    assert_eq!(s.validation_loss.len(), s.epochs);
    assert!(
        s.validation_loss[s.epochs - 1] < 1e-3,
        "{:?}",
        s.validation_loss
    );
    assert!(s.train_loss[0] > 10.0 * s.train_loss[s.epochs - 1]);
    let seen = seen.borrow();
    let epoch_ends = seen.iter().filter(|p| p.train_loss.is_some()).count();
    assert_eq!(epoch_ends, s.epochs);
    assert_eq!(seen.len(), s.epochs * (360usize.div_ceil(32) + 1));
    // y(1, 1) = 2 − 1 + 0.5.
    let mut probe = RowMatrix::new(3);
    probe.push_row(&[
        number_cell(Some(1.0)),
        number_cell(Some(1.0)),
        number_cell(None),
    ]);
    let crate::model::Predictions::Regression { values } =
        t.model.predict(&probe, Backend::Flex).expect("predict")
    else {
        panic!("regression");
    };
    assert!((values[0] - 1.5).abs() < 0.05, "{values:?}");
}

#[test]
fn early_stopping_keeps_the_best_epoch() {
    // Pure noise: validation loss cannot keep improving, so patience ends the run.
    let mut rng = Rng::new(5);
    let mut rows = RowMatrix::new(3);
    for _ in 0..200 {
        rows.push_row(&[
            number_cell(Some(rng.normal() as f32)),
            number_cell(Some(rng.normal() as f32)),
            number_cell(Some(rng.normal() as f32)),
        ]);
    }
    let cfg = TrainingConfig {
        cold_epochs: 200,
        patience: 3,
        learning_rate: 0.05,
        ..small_cfg()
    };
    let model = ModelConfig {
        hidden: vec![32],
        ..ModelConfig::default()
    };
    let t = train_cold(
        &spec(2, Task::Regression, 1),
        &model,
        &cfg,
        &rows,
        Control::default(),
    )
    .expect("trains");
    let s = &t.summary;
    assert_eq!(s.stop, StopReason::EarlyStop);
    assert!(s.epochs < 200);
    assert_eq!(s.epochs - s.best_epoch, 3);
    let best = s
        .validation_loss
        .iter()
        .copied()
        .fold(f64::INFINITY, f64::min);
    assert_eq!(s.validation_loss[s.best_epoch - 1], best);
    // The kept weights are the best epoch's: their validation loss is the minimum.
    let again = train_cold(
        &spec(2, Task::Regression, 1),
        &model,
        &TrainingConfig {
            cold_epochs: s.best_epoch,
            patience: 1000,
            ..cfg.clone()
        },
        &rows,
        Control::default(),
    )
    .expect("trains");
    assert_eq!(again.model.weights_digest(), t.model.weights_digest());
}

#[test]
fn cancel_and_time_budget_stop_a_run() {
    let rows = linear_rows(100, 2);
    let flag = AtomicBool::new(true);
    let control = Control {
        cancel: Some(&flag),
        progress: None,
    };
    let r = train_cold(
        &spec(2, Task::Regression, 1),
        &linear_model(),
        &small_cfg(),
        &rows,
        control,
    );
    assert!(matches!(r, Err(TrainError::Cancelled)));
    // A budget that is spent before the first mini-batch: no epoch runs.
    let cfg = TrainingConfig {
        max_seconds: 1e-12,
        ..small_cfg()
    };
    let t = train_cold(
        &spec(2, Task::Regression, 1),
        &linear_model(),
        &cfg,
        &rows,
        Control::default(),
    )
    .expect("a run that used up its budget still returns its model");
    assert_eq!(
        (t.summary.stop, t.summary.epochs),
        (StopReason::TimeBudget, 0)
    );
}

#[test]
fn rows_without_targets_are_refused() {
    let mut rows = RowMatrix::new(3);
    rows.push_row(&[
        number_cell(Some(1.0)),
        number_cell(Some(1.0)),
        number_cell(None),
    ]);
    let r = train_cold(
        &spec(2, Task::Regression, 1),
        &linear_model(),
        &small_cfg(),
        &rows,
        Control::default(),
    );
    assert!(matches!(r, Err(TrainError::NoRows { .. })));
}

#[test]
fn classification_learns_separable_classes() {
    // Class = which quadrant-half x0 + x1 falls into, three bands.
    let mut rng = Rng::new(4);
    let mut rows = RowMatrix::new(3);
    for _ in 0..600 {
        let (a, b) = (rng.normal() as f32, rng.normal() as f32);
        let s = a + b;
        let class = if s < -0.7 {
            0
        } else if s < 0.7 {
            1
        } else {
            2
        };
        rows.push_row(&[number_cell(Some(a)), number_cell(Some(b)), class]);
    }
    let cfg = TrainingConfig {
        cold_epochs: 40,
        learning_rate: 2e-2,
        ..small_cfg()
    };
    let model = ModelConfig {
        hidden: vec![16],
        activation: Activation::Tanh,
        ..ModelConfig::default()
    };
    let t = train_cold(
        &spec(2, Task::Classification, 3),
        &model,
        &cfg,
        &rows,
        Control::default(),
    )
    .expect("trains");
    let crate::model::Predictions::Classification { classes, .. } =
        t.model.predict(&rows, Backend::Flex).expect("predict")
    else {
        panic!("classification");
    };
    let right = classes
        .iter()
        .enumerate()
        .filter(|(r, c)| rows.row(*r)[2] == **c)
        .count();
    assert!(
        right as f64 / 600.0 > 0.93,
        "accuracy {}",
        right as f64 / 600.0
    );
    let losses = t.model.row_losses(&rows, Backend::Flex).expect("losses");
    let mean = losses.iter().sum::<f64>() / 600.0;
    assert!(mean < 0.25, "mean log loss {mean}");
}

#[test]
fn penalties_and_dropout_change_the_result() {
    let rows = linear_rows(300, 3);
    let base = ModelConfig {
        hidden: vec![16],
        ..ModelConfig::default()
    };
    let cfg = TrainingConfig {
        cold_epochs: 10,
        ..small_cfg()
    };
    let plain = train_cold(
        &spec(2, Task::Regression, 1),
        &base,
        &cfg,
        &rows,
        Control::default(),
    )
    .expect("trains");
    let norm = |m: &Model| {
        m.weights()
            .iter()
            .flat_map(|l| l.weight.clone())
            .map(|w| f64::from(w).abs())
            .sum::<f64>()
    };
    for penalised in [
        ModelConfig {
            l2: 0.05,
            ..base.clone()
        },
        ModelConfig {
            l1: 0.05,
            ..base.clone()
        },
    ] {
        let t = train_cold(
            &spec(2, Task::Regression, 1),
            &penalised,
            &cfg,
            &rows,
            Control::default(),
        )
        .expect("trains");
        assert!(
            norm(&t.model) < 0.8 * norm(&plain.model),
            "a penalty shrinks the weights"
        );
    }
    let dropped = train_cold(
        &spec(2, Task::Regression, 1),
        &ModelConfig {
            dropout: 0.3,
            ..base.clone()
        },
        &cfg,
        &rows,
        Control::default(),
    )
    .expect("trains");
    assert_ne!(dropped.model.weights_digest(), plain.model.weights_digest());
    let again = train_cold(
        &spec(2, Task::Regression, 1),
        &ModelConfig {
            dropout: 0.3,
            ..base
        },
        &cfg,
        &rows,
        Control::default(),
    )
    .expect("trains");
    assert_eq!(
        dropped.model.weights_digest(),
        again.model.weights_digest(),
        "dropout masks are seeded"
    );
}

#[test]
fn warm_run_replays_old_rows_and_can_shrink_and_perturb() {
    let old = linear_rows(300, 6);
    let new = linear_rows(100, 7);
    let cfg = small_cfg();
    let cold = train_cold(
        &spec(2, Task::Regression, 1),
        &linear_model(),
        &cfg,
        &old,
        Control::default(),
    )
    .expect("trains");
    let warm_cfg = TrainingConfig {
        replay_ratio: 2.0,
        ..cfg.clone()
    };
    let warm = train_warm(&cold.model, &warm_cfg, &new, &old, Control::default()).expect("trains");
    let s = &warm.summary;
    assert_eq!(s.kind, RunKind::Warm);
    assert_eq!((s.rows, s.replay_rows), (90, 180));
    assert_eq!(s.validation_rows, 10 + 20);
    assert_eq!(
        warm.model.target_scale(),
        cold.model.target_scale(),
        "warm runs keep the parent's scale"
    );
    // Shrink-and-perturb with shrink 1 and perturb 0 is a no-op; otherwise the start point moves.
    let sp = shrink_perturb(&cold.model.weights(), &cold.model.weights(), 0.5, 0.5);
    assert_eq!(sp, cold.model.weights());
    let moved = train_warm(
        &cold.model,
        &TrainingConfig {
            shrink: 0.5,
            perturb: 0.1,
            ..warm_cfg.clone()
        },
        &new,
        &old,
        Control::default(),
    )
    .expect("trains");
    assert_ne!(moved.model.weights_digest(), warm.model.weights_digest());
    assert!(
        moved.summary.train_loss[0] > warm.summary.train_loss[0],
        "a shrunk start fits worse at first"
    );
}

#[test]
fn least_squares_recovers_an_exact_plane() {
    let x = [1.0, 0.0, 0.0, 1.0, 1.0, 1.0, 2.0, 3.0];
    let y: Vec<f64> = x.chunks(2).map(|r| 1.0 + 2.0 * r[0] - 3.0 * r[1]).collect();
    let b = least_squares(&x, &y, 2, 0.0).expect("full rank");
    for (got, want) in b.iter().zip([1.0, 2.0, -3.0]) {
        assert!((got - want).abs() < 1e-12, "{b:?}");
    }
    assert!(
        least_squares(&[1.0, 1.0, 1.0], &[1.0, 2.0, 3.0], 1, 0.0).is_none(),
        "a constant column is singular"
    );
}

#[test]
fn a_warm_run_never_hands_back_worse_than_its_parent_on_validation() {
    // A converged linear fit meets new rows of the same law; a warm run at
    // a rate far too high only makes it worse, so no epoch beats the
    // parent and the parent's weights come back unchanged (best epoch 0).
    let spec = spec(2, Task::Regression, 1);
    let cold = train_cold(
        &spec,
        &linear_model(),
        &small_cfg(),
        &linear_rows(400, 1),
        Control::default(),
    )
    .expect("trains");
    let reckless = TrainingConfig {
        warm_learning_rate: Some(5.0),
        warm_epochs: 5,
        patience: 5,
        ..small_cfg()
    };
    let warm = train_warm(
        &cold.model,
        &reckless,
        &linear_rows(200, 2),
        &linear_rows(200, 3),
        Control::default(),
    )
    .expect("trains");
    let s = &warm.summary;
    assert_eq!(s.best_epoch, 0, "{:?}", s.validation_loss);
    let start = s
        .start_validation_loss
        .expect("a warm run records its start");
    assert!(s.validation_loss.iter().all(|v| *v >= start), "{s:?}");
    assert_eq!(warm.model.weights_digest(), cold.model.weights_digest());

    // At a sane rate on rows of a changed law, epochs beat the parent and
    // the kept epoch's validation loss is below where the run started.
    let mut moved = RowMatrix::new(3);
    let mut rng = Rng::new(4);
    for _ in 0..300 {
        let (a, b) = (rng.normal() as f32, rng.normal() as f32);
        let y = 2.0 * a - b + 3.0;
        moved.push_row(&[
            number_cell(Some(a)),
            number_cell(Some(b)),
            number_cell(Some(y)),
        ]);
    }
    let sane = TrainingConfig {
        warm_learning_rate: Some(1e-2),
        warm_epochs: 20,
        ..small_cfg()
    };
    let warm = train_warm(
        &cold.model,
        &sane,
        &moved,
        &linear_rows(50, 5),
        Control::default(),
    )
    .expect("trains");
    let s = &warm.summary;
    assert!(s.best_epoch >= 1, "{s:?}");
    assert!(s.validation_loss[s.best_epoch - 1] < s.start_validation_loss.unwrap());
}

#[test]
fn few_rows_take_smaller_batches_and_many_rows_keep_the_configured_one() {
    let cfg = TrainingConfig::default();
    assert_eq!((cfg.batch_size, cfg.min_batches_per_epoch), (256, 16));
    for rows in [1, 10, 50, 300, 1_000, 4_000, 4_096, 5_000, 100_000] {
        let b = batch_size(&cfg, rows);
        let steps = rows.div_ceil(b);
        assert!(b <= 256, "{rows} rows: batch {b}");
        assert!(
            b >= 16 || b == 256,
            "{rows} rows: batch {b} is under the floor"
        );
        assert!(
            steps >= 16 || b == 16,
            "{rows} rows: {steps} steps an epoch with batch {b}"
        );
        if rows >= 16 * 256 {
            assert_eq!(b, 256, "{rows} rows keep the configured batch");
        }
    }
    // 1 turns the rule off; a configured batch under the floor stays.
    let off = TrainingConfig {
        min_batches_per_epoch: 1,
        ..cfg.clone()
    };
    assert_eq!(batch_size(&off, 300), 256);
    let tiny = TrainingConfig {
        batch_size: 8,
        ..cfg
    };
    assert_eq!(batch_size(&tiny, 1_000), 8);
}

#[test]
fn a_run_on_few_rows_takes_at_least_the_minimum_steps_an_epoch() {
    // 400 rows, no validation split: 16 steps an epoch with the rule, 2
    // with mini-batches of 256 alone. Steps are counted by the progress
    // callback.
    let rows = linear_rows(400, 3);
    let s = spec(2, Task::Regression, 1);
    let steps = RefCell::new(Vec::new());
    let progress = |p: Progress| {
        if p.train_loss.is_none() {
            steps.borrow_mut().push(p.batches);
        }
    };
    for (min_batches, want) in [(16, 16), (1, 2)] {
        steps.borrow_mut().clear();
        let cfg = TrainingConfig {
            cold_epochs: 1,
            patience: 0,
            min_batches_per_epoch: min_batches,
            ..TrainingConfig::default()
        };
        train_cold(
            &s,
            &linear_model(),
            &cfg,
            &rows,
            Control {
                cancel: None,
                progress: Some(&progress),
            },
        )
        .expect("trains");
        assert_eq!(
            steps.borrow().len(),
            want,
            "min_batches_per_epoch {min_batches}"
        );
        assert!(steps.borrow().iter().all(|&b| b == want));
    }
}

/// Noisy rows: a weak linear law under noise, where a run soon circles a
/// plateau of validation loss.
fn noisy_rows(n: usize, seed: u64) -> RowMatrix {
    let mut rng = Rng::new(seed);
    let mut rows = RowMatrix::new(3);
    for _ in 0..n {
        let (a, b) = (rng.normal() as f32, rng.normal() as f32);
        let y = 0.5 * a - 0.3 * b + rng.normal() as f32;
        rows.push_row(&[
            number_cell(Some(a)),
            number_cell(Some(b)),
            number_cell(Some(y)),
        ]);
    }
    rows
}

#[test]
fn a_weight_average_judges_the_epochs_without_changing_the_steps() {
    // The average only watches the steps: with it and without it, a run
    // takes the same steps (the same training loss, epoch for epoch), but
    // epochs are judged, and the kept weights chosen, by the average.
    let spec = spec(2, Task::Regression, 1);
    let model = ModelConfig {
        hidden: vec![32],
        ..ModelConfig::default()
    };
    for seed in 1..=3 {
        let rows = noisy_rows(300, seed);
        let base = TrainingConfig {
            cold_epochs: 40,
            patience: 6,
            learning_rate: 0.02,
            seed,
            ..small_cfg()
        };
        let run = |weight_average_decay| {
            train_cold(
                &spec,
                &model,
                &TrainingConfig {
                    weight_average_decay,
                    ..base.clone()
                },
                &rows,
                Control::default(),
            )
            .expect("trains")
        };
        let (raw, averaged) = (run(0.0), run(0.9));
        let (a, b) = (&raw.summary, &averaged.summary);
        let common = a.epochs.min(b.epochs);
        assert_eq!(
            a.train_loss[..common],
            b.train_loss[..common],
            "seed {seed}"
        );
        assert_ne!(a.validation_loss[..common], b.validation_loss[..common]);
        for s in [a, b] {
            let best = s
                .validation_loss
                .iter()
                .copied()
                .fold(f64::INFINITY, f64::min);
            assert_eq!(s.kept_validation_loss, Some(best), "seed {seed}");
            assert_eq!(s.validation_loss[s.best_epoch - 1], best, "seed {seed}");
        }
        assert_ne!(raw.model.weights_digest(), averaged.model.weights_digest());
    }
}

#[test]
fn a_warm_run_with_a_weight_average_never_hands_back_worse_than_its_parent() {
    let spec = spec(2, Task::Regression, 1);
    let cold = train_cold(
        &spec,
        &linear_model(),
        &small_cfg(),
        &noisy_rows(400, 11),
        Control::default(),
    )
    .expect("trains");
    for (rate, seed) in [(5.0, 1), (1e-2, 2), (1e-3, 3)] {
        let cfg = TrainingConfig {
            warm_learning_rate: Some(rate),
            warm_epochs: 10,
            weight_average_decay: 0.9,
            seed,
            ..small_cfg()
        };
        let warm = train_warm(
            &cold.model,
            &cfg,
            &noisy_rows(200, 20 + seed),
            &noisy_rows(200, 30 + seed),
            Control::default(),
        )
        .expect("trains");
        let s = &warm.summary;
        let start = s
            .start_validation_loss
            .expect("a warm run records its start");
        let kept = s.kept_validation_loss.expect("a validation split");
        assert!(
            kept <= start,
            "rate {rate}: kept {kept} against start {start}"
        );
        if s.best_epoch == 0 {
            assert_eq!(warm.model.weights_digest(), cold.model.weights_digest());
        }
    }
}
