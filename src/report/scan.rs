//! What the serving model does, computed for the report: a grid scan over
//! two number inputs with every other input held at a typical value, and
//! the permutation importance of each input column on the holdout rows
//! (the pure part is `importance`).

use super::importance;
use crate::config::{Backend, ColumnKind};
use crate::model::{Model, Predictions};
use crate::rng::Rng;
use crate::schema::{InputEncoding, MISSING_CODE, RowMatrix, Schema, number_cell};

/// Grid points per axis of the response map.
pub const GRID: usize = 40;

/// Stored rows drawn on the map at most (thinned evenly beyond that).
pub const MAX_POINTS: usize = 1500;

/// The model's output over a grid of two inputs.
#[derive(Debug, Clone, PartialEq)]
pub struct ResponseMap {
    pub x_name: String,
    pub y_name: String,
    /// Grid cell centres along each axis.
    pub xs: Vec<f64>,
    pub ys: Vec<f64>,
    /// Cell width along each axis.
    pub dx: f64,
    pub dy: f64,
    /// Output at (xs[i], ys[j]) is `values[j * xs.len() + i]`.
    pub values: Vec<f64>,
    /// What the values are ("predicted loaves_sold", "p(class)").
    pub value_label: String,
    /// Stored rows with both inputs present.
    pub points: Vec<(f64, f64)>,
    /// The other inputs and the value each was held at.
    pub held: Vec<(String, String)>,
}

/// Number input columns of the schema, in schema order.
pub fn number_inputs(schema: &Schema) -> Vec<&str> {
    schema
        .inputs()
        .filter(|&c| schema.columns[c].kind == ColumnKind::Number)
        .map(|c| schema.columns[c].name.as_str())
        .collect()
}

/// Checks the two columns the user asked for (or picks the first two
/// number inputs); the error says which columns can be used.
pub fn pick_axes(
    schema: &Schema,
    x: Option<&str>,
    y: Option<&str>,
) -> Result<(usize, usize), String> {
    let numbers = number_inputs(schema);
    let allowed = || {
        if numbers.is_empty() {
            "the schema has no number input columns".to_string()
        } else {
            format!("number input columns: {}", numbers.join(", "))
        }
    };
    let check = |flag: &str, name: &str| -> Result<usize, String> {
        match schema.index_of(name) {
            None => Err(format!("{flag} {name:?}: no such column; {}", allowed())),
            Some(c) if c == schema.target => Err(format!(
                "{flag} {name:?} is the target column; pick an input ({})",
                allowed()
            )),
            Some(c) if schema.columns[c].kind != ColumnKind::Number => Err(format!(
                "{flag} {name:?} is a category column; the map needs number inputs ({})",
                allowed()
            )),
            Some(c) => Ok(c),
        }
    };
    let xi = match x {
        Some(n) => check("--x", n)?,
        None => match numbers.first() {
            Some(n) => check("--x", n)?,
            None => return Err(allowed()),
        },
    };
    let yi = match y {
        Some(n) => check("--y", n)?,
        None => match numbers
            .iter()
            .map(|n| schema.index_of(n).unwrap_or(usize::MAX))
            .find(|&c| c != xi)
        {
            Some(c) => c,
            None => {
                return Err(format!(
                    "the map needs two number inputs besides the target; {}",
                    allowed()
                ));
            }
        },
    };
    if xi == yi {
        return Err(format!(
            "--x and --y both name {:?}; pick two different columns ({})",
            schema.columns[xi].name,
            allowed()
        ));
    }
    Ok((xi, yi))
}

/// Median of the present values (the lower middle value for an even count).
pub fn median(values: &mut [f32]) -> Option<f32> {
    if values.is_empty() {
        return None;
    }
    values.sort_by(f32::total_cmp);
    Some(values[(values.len() - 1) / 2])
}

/// Most frequent present code (the smallest code on ties).
pub fn mode(codes: impl Iterator<Item = u32>) -> Option<u32> {
    let mut counts: std::collections::BTreeMap<u32, usize> = Default::default();
    for c in codes.filter(|&c| c != MISSING_CODE) {
        *counts.entry(c).or_default() += 1;
    }
    let best = counts.values().copied().max()?;
    counts.into_iter().find(|&(_, n)| n == best).map(|(c, _)| c)
}

/// Scans `model` over a `GRID`×`GRID` grid spanning the stored values of
/// columns `xi` and `yi`; every other input is held at its median (number)
/// or most frequent value (category). `None` when a column has no values.
pub fn response_map(
    model: &Model,
    schema: &Schema,
    vocabs: &crate::schema::Vocabularies,
    rows: &RowMatrix,
    (xi, yi): (usize, usize),
    backend: Backend,
) -> Result<Option<ResponseMap>, crate::model::ModelError> {
    let n = rows.n_rows();
    let column_values =
        |c: usize| -> Vec<f32> { (0..n).filter_map(|r| rows.number(r, c)).collect() };
    let (xv, yv) = (column_values(xi), column_values(yi));
    let Some(xr) = span(&xv) else {
        return Ok(None);
    };
    let Some(yr) = span(&yv) else {
        return Ok(None);
    };
    let mut base = vec![0u32; schema.width()];
    let mut held = Vec::new();
    for (c, col) in schema.columns.iter().enumerate() {
        base[c] = match col.kind {
            ColumnKind::Number => {
                let m = median(&mut column_values(c));
                if c != xi && c != yi && c != schema.target {
                    held.push((
                        col.name.clone(),
                        m.map_or_else(|| "missing".into(), |v| format!("{v} (median)")),
                    ));
                }
                number_cell(m)
            }
            ColumnKind::Category => {
                let m = mode((0..n).map(|r| rows.row(r)[c]));
                if c != schema.target {
                    let name = m
                        .and_then(|code| vocabs.get(&c).and_then(|v| v.value(code)))
                        .map_or_else(|| "missing".to_string(), |v| format!("{v} (most frequent)"));
                    held.push((col.name.clone(), name));
                }
                m.unwrap_or(MISSING_CODE)
            }
        };
    }
    // The target cell is never read by the encoding; keep it missing.
    base[schema.target] = match schema.columns[schema.target].kind {
        ColumnKind::Number => number_cell(None),
        ColumnKind::Category => MISSING_CODE,
    };
    let axis = |(lo, hi): (f64, f64)| -> (Vec<f64>, f64) {
        let d = (hi - lo) / GRID as f64;
        ((0..GRID).map(|i| lo + d * (i as f64 + 0.5)).collect(), d)
    };
    let (xs, dx) = axis(xr);
    let (ys, dy) = axis(yr);
    let mut grid = RowMatrix::with_capacity(schema.width(), GRID * GRID);
    let mut row = base.clone();
    for &y in &ys {
        for &x in &xs {
            row[xi] = number_cell(Some(x as f32));
            row[yi] = number_cell(Some(y as f32));
            grid.push_row(&row);
        }
    }
    let (values, value_label) = match model.predict(&grid, backend)? {
        Predictions::Regression { values } => (
            values.into_iter().map(f64::from).collect(),
            format!("predicted {}", schema.columns[schema.target].name),
        ),
        Predictions::Classification {
            probabilities,
            n_classes,
            ..
        } => {
            // The probability of the class stored most often.
            let k = mode((0..n).map(|r| rows.row(r)[schema.target]))
                .map_or(0, |c| c as usize)
                .min(n_classes.saturating_sub(1));
            let name = vocabs
                .get(&schema.target)
                .and_then(|v| v.value(k as u32))
                .map_or_else(|| k.to_string(), str::to_string);
            (
                probabilities
                    .chunks_exact(n_classes.max(1))
                    .map(|p| f64::from(p[k]))
                    .collect(),
                format!("p({} = {name})", schema.columns[schema.target].name),
            )
        }
    };
    let step = n.div_ceil(MAX_POINTS).max(1);
    let points = (0..n)
        .step_by(step)
        .filter_map(|r| {
            Some((
                f64::from(rows.number(r, xi)?),
                f64::from(rows.number(r, yi)?),
            ))
        })
        .collect();
    Ok(Some(ResponseMap {
        x_name: schema.columns[xi].name.clone(),
        y_name: schema.columns[yi].name.clone(),
        xs,
        ys,
        dx,
        dy,
        values,
        value_label,
        points,
        held,
    }))
}

/// Smallest and largest value, widened when they are equal.
fn span(values: &[f32]) -> Option<(f64, f64)> {
    let lo = values.iter().copied().map(f64::from).reduce(f64::min)?;
    let hi = values.iter().copied().map(f64::from).reduce(f64::max)?;
    Some(if hi > lo {
        (lo, hi)
    } else {
        (lo - 0.5, hi + 0.5)
    })
}

/// Seed of the report's row sample and shuffles, so the same state dir
/// gives the same numbers.
pub const IMPORTANCE_SEED: u64 = 0x7469_6465_5f70_6931;

/// Permutation importance of `model`'s input columns on a seeded sample of
/// at most `importance::MAX_ROWS` of the stored holdout `rows` (batch of
/// each in `batches`), scored by the same per-row losses the retrain cycle
/// uses. Only the columns the model was given are shuffled. `None` with
/// fewer than two holdout rows.
pub fn importance(
    model: &Model,
    schema: &Schema,
    rows: &RowMatrix,
    batches: &[u64],
    backend: Backend,
) -> Result<Option<importance::Outcome>, crate::model::ModelError> {
    let mut rng = Rng::new(IMPORTANCE_SEED);
    let pick = importance::sample(rows.n_rows(), importance::MAX_ROWS, &mut rng);
    let sample = rows.select(&pick);
    let groups: Vec<u64> = pick.iter().map(|&r| batches[r]).collect();
    let columns: Vec<importance::Column> = model
        .spec()
        .inputs
        .iter()
        .map(|enc| {
            let index = match *enc {
                InputEncoding::Number { column, .. } | InputEncoding::OneHot { column, .. } => {
                    column
                }
            };
            importance::Column {
                index,
                name: schema
                    .columns
                    .get(index)
                    .map_or_else(|| format!("column {index}"), |c| c.name.clone()),
            }
        })
        .collect();
    importance::permutation_importance(
        &sample,
        &groups,
        &columns,
        importance::REPEATS,
        IMPORTANCE_SEED,
        |m| crate::cycle::row_losses(model, m, backend),
    )
}

#[cfg(test)]
mod tests {
    use super::*;
    use crate::config::Task;
    use crate::schema::Column;

    /// A regression schema whose last column is the target.
    fn schema_of(columns: &[(&str, ColumnKind)]) -> Schema {
        Schema {
            columns: columns
                .iter()
                .map(|&(name, kind)| Column {
                    name: name.into(),
                    kind,
                    min: None,
                    max: None,
                    required: true,
                })
                .collect(),
            target: columns.len() - 1,
            task: Task::Regression,
        }
    }

    fn schema() -> Schema {
        schema_of(&[
            ("shop", ColumnKind::Category),
            ("temp", ColumnKind::Number),
            ("rain", ColumnKind::Number),
            ("sold", ColumnKind::Number),
        ])
    }

    #[test]
    fn axes_default_to_the_first_two_number_inputs_and_bad_names_are_explained() {
        let s = schema();
        assert_eq!(pick_axes(&s, None, None), Ok((1, 2)));
        assert_eq!(pick_axes(&s, Some("rain"), None), Ok((2, 1)));
        let e = pick_axes(&s, Some("shop"), None).unwrap_err();
        assert!(e.contains("category") && e.contains("temp, rain"), "{e}");
        let e = pick_axes(&s, Some("sold"), None).unwrap_err();
        assert!(e.contains("target"), "{e}");
        let e = pick_axes(&s, Some("wind"), None).unwrap_err();
        assert!(e.contains("no such column"), "{e}");
        let e = pick_axes(&s, Some("temp"), Some("temp")).unwrap_err();
        assert!(e.contains("different"), "{e}");
    }

    #[test]
    fn median_and_mode() {
        assert_eq!(median(&mut [3.0, 1.0, 2.0]), Some(2.0));
        assert_eq!(median(&mut [4.0, 1.0, 3.0, 2.0]), Some(2.0));
        assert_eq!(median(&mut []), None);
        assert_eq!(mode([2, 1, 2, MISSING_CODE, 1].into_iter()), Some(1));
        assert_eq!(mode([5, 5, 0].into_iter()), Some(5));
        assert_eq!(mode([MISSING_CODE].into_iter()), None);
    }

    /// x, z (numbers) and a shop code of `shops` values, then the target
    /// y = 2x + 0.2·effect[shop] + 0.5ε; x, z, ε ~ N(0, 1) independent.
    /// Rows come in batches of `per_batch`; returns rows and batch labels.
    fn bakery(n: usize, shops: u32, per_batch: usize, seed: u64) -> (RowMatrix, Vec<u64>) {
        let mut rng = Rng::new(seed);
        let mut shop_rng = Rng::new(99);
        let effect: Vec<f64> = (0..shops).map(|_| shop_rng.normal()).collect();
        let mut rows = RowMatrix::new(4);
        for _ in 0..n {
            let x = rng.normal();
            let z = rng.normal();
            let shop = rng.below(shops as usize) as u32;
            let y = 2.0 * x + 0.2 * effect[shop as usize] + 0.5 * rng.normal();
            rows.push_row(&[
                number_cell(Some(x as f32)),
                number_cell(Some(z as f32)),
                shop,
                number_cell(Some(y as f32)),
            ]);
        }
        (rows, (0..n).map(|r| (r / per_batch) as u64).collect())
    }

    fn bakery_schema() -> Schema {
        schema_of(&[
            ("x", ColumnKind::Number),
            ("z", ColumnKind::Number),
            ("shop", ColumnKind::Category),
            ("y", ColumnKind::Number),
        ])
    }

    fn bakery_spec(shops: usize) -> crate::schema::FeatureSpec {
        let number = |column| InputEncoding::Number {
            column,
            mean: 0.0,
            std: 1.0,
        };
        crate::schema::FeatureSpec {
            inputs: vec![
                number(0),
                number(1),
                InputEncoding::OneHot {
                    column: 2,
                    width: shops,
                },
            ],
            target: 3,
            task: Task::Regression,
            outputs: 1,
        }
    }

    fn train(hidden: Vec<usize>, shops: usize, rows: &RowMatrix) -> Model {
        let model = crate::config::ModelConfig {
            hidden,
            ..crate::config::ModelConfig::default()
        };
        let cfg = crate::config::TrainingConfig {
            batch_size: 64,
            learning_rate: 1e-2,
            cold_epochs: 40,
            patience: 5,
            ..crate::config::TrainingConfig::default()
        };
        let control = crate::train::Control {
            cancel: None,
            progress: None,
        };
        crate::train::train_cold(&bakery_spec(shops), &model, &cfg, rows, control)
            .expect("trains")
            .model
    }

    fn find<'a>(out: &'a importance::Outcome, name: &str) -> &'a importance::Importance {
        out.columns.iter().find(|c| c.column == name).unwrap()
    }

    #[test]
    fn a_trained_linear_network_relies_on_x_as_the_derivation_says() {
        let (train_rows, _) = bakery(4_000, 5, 100, 1);
        let model = train(vec![], 5, &train_rows);
        let (holdout, batches) = bakery(6_000, 5, 500, 2);
        let out = importance(&model, &bakery_schema(), &holdout, &batches, Backend::Flex)
            .unwrap()
            .unwrap();
        // The row sample is capped; every batch is still represented.
        assert_eq!(out.rows, importance::MAX_ROWS);
        assert_eq!(out.batches, 12);
        // Linear truth y = βx + ε with x ~ N(0, 1) independent of the other
        // inputs, squared error: permuting x raises the expected MSE by
        // 2β²·Var(x) (by derivation, no source; see Fisher, Rudin &
        // Dominici 2019). β = 2; the fitted slope is within a few percent.
        let x = find(&out, "x");
        assert!((x.rise - 8.0).abs() / 8.0 < 0.1, "{x:?}");
        let (lo, hi) = x.interval.unwrap();
        assert!(lo > 6.0 && hi < 10.0, "{x:?}");
        // z plays no part in y: the model's small weight on it gives an
        // interval that covers 0.
        let z = find(&out, "z");
        let (lo, hi) = z.interval.unwrap();
        assert!(lo <= 0.0 && 0.0 <= hi, "{z:?}");
        assert_eq!(out.columns[0].column, "x", "largest first");
    }

    #[test]
    fn a_category_with_many_values_does_not_outrank_the_number_that_drives_the_target() {
        let shops = 100;
        let (train_rows, _) = bakery(4_000, shops as u32, 100, 3);
        let model = train(vec![32], shops, &train_rows);
        // The defect this replaces: the first-layer |weight| sum over
        // shop's 100 one-hot inputs is larger than x's one input.
        let first = &model.weights()[0];
        let sum = |inputs: std::ops::Range<usize>| -> f64 {
            inputs
                .flat_map(|i| &first.weight[i * first.outputs..(i + 1) * first.outputs])
                .map(|w| f64::from(w.abs()))
                .sum()
        };
        assert!(sum(2..2 + shops) > sum(0..1), "the weight sum favours shop");
        let (holdout, batches) = bakery(2_000, shops as u32, 200, 4);
        let out = importance(&model, &bakery_schema(), &holdout, &batches, Backend::Flex)
            .unwrap()
            .unwrap();
        assert_eq!(out.columns[0].column, "x", "{out:?}");
        let (x, shop) = (find(&out, "x"), find(&out, "shop"));
        // Not only ranked first: its interval lies above shop's.
        assert!(x.interval.unwrap().0 > shop.interval.unwrap().1, "{out:?}");
    }
}
