//! What the serving model does, computed for the report: a grid scan over
//! two number inputs with every other input held at a typical value, and
//! how much weight the first layer gives each input column.

use crate::config::{Backend, ColumnKind};
use crate::model::{LayerWeights, Model, Predictions};
use crate::schema::{FeatureSpec, InputEncoding, MISSING_CODE, RowMatrix, Schema, number_cell};

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

/// First-layer weight magnitude of one input column.
#[derive(Debug, Clone, PartialEq)]
pub struct Influence {
    pub column: String,
    /// Σ |w| over the column's encoded inputs and every first-layer unit.
    pub total: f64,
    /// Encoded inputs of the column (1 for a number, one per known value
    /// for a category).
    pub inputs: usize,
}

/// Sums |w| of the first layer per input column, largest first. Number
/// inputs are standardised, so their weights are comparable.
pub fn influence(spec: &FeatureSpec, first: &LayerWeights, schema: &Schema) -> Vec<Influence> {
    let mut out = Vec::new();
    let mut at = 0;
    for enc in &spec.inputs {
        let (column, width) = match *enc {
            InputEncoding::Number { column, .. } => (column, 1),
            InputEncoding::OneHot { column, width } => (column, width),
        };
        let mut total = 0.0;
        for i in at..(at + width).min(first.inputs) {
            let row = &first.weight[i * first.outputs..(i + 1) * first.outputs];
            total += row.iter().map(|w| f64::from(w.abs())).sum::<f64>();
        }
        at += width;
        out.push(Influence {
            column: schema
                .columns
                .get(column)
                .map_or_else(|| format!("column {column}"), |c| c.name.clone()),
            total,
            inputs: width,
        });
    }
    out.sort_by(|a, b| b.total.total_cmp(&a.total));
    out
}

#[cfg(test)]
mod tests {
    use super::*;
    use crate::config::Task;
    use crate::schema::Column;

    fn schema() -> Schema {
        let col = |name: &str, kind| Column {
            name: name.into(),
            kind,
            min: None,
            max: None,
            required: true,
        };
        Schema {
            columns: vec![
                col("shop", ColumnKind::Category),
                col("temp", ColumnKind::Number),
                col("rain", ColumnKind::Number),
                col("sold", ColumnKind::Number),
            ],
            target: 3,
            task: Task::Regression,
        }
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

    #[test]
    fn influence_sums_absolute_weights_per_column() {
        let s = schema();
        let spec = FeatureSpec {
            inputs: vec![
                InputEncoding::OneHot {
                    column: 0,
                    width: 2,
                },
                InputEncoding::Number {
                    column: 1,
                    mean: 0.0,
                    std: 1.0,
                },
                InputEncoding::Number {
                    column: 2,
                    mean: 0.0,
                    std: 1.0,
                },
            ],
            target: 3,
            task: Task::Regression,
            outputs: 1,
        };
        // 4 encoded inputs × 2 units, row-major by input.
        let first = LayerWeights {
            inputs: 4,
            outputs: 2,
            weight: vec![1.0, -1.0, 0.5, 0.0, 3.0, -4.0, 0.25, 0.25],
            bias: vec![0.0, 0.0],
        };
        let got: Vec<(String, f64, usize)> = influence(&spec, &first, &s)
            .into_iter()
            .map(|i| (i.column, i.total, i.inputs))
            .collect();
        assert_eq!(
            got,
            vec![
                ("temp".to_string(), 7.0, 1),
                ("shop".to_string(), 2.5, 2),
                ("rain".to_string(), 0.5, 1),
            ]
        );
    }
}
