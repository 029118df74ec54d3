//! The prediction endpoint's request and answer bodies, without any I/O.
//!
//! A request is `{"rows": [{"column": value, …}, …]}`. Its rows are written
//! out as CSV (header from the first row's keys) and handed to the same
//! parser and checks `tidegate predict` uses, so a value is refused or taken
//! the same way on both paths. The parser's problems name a CSV line; they
//! are mapped back to the row's index in `rows` here.

use std::collections::BTreeMap;

use serde_json::{Map, Value, json};

use crate::ingest::{Problem, Refusal};
use crate::model::Predictions;

/// A request refused before or while its rows were read: the HTTP status,
/// one sentence, and the problems by row and column.
#[derive(Debug, Clone, PartialEq)]
pub struct Refused {
    pub status: u16,
    pub error: String,
    pub problems: Vec<RowProblem>,
}

/// One problem of a request's rows.
#[derive(Debug, Clone, PartialEq)]
pub struct RowProblem {
    /// Index in the request's `rows` (from 0); `None` for the columns as a whole.
    pub row: Option<usize>,
    pub column: Option<String>,
    pub value: Option<String>,
    pub reason: String,
}

impl Refused {
    fn whole(status: u16, error: impl Into<String>) -> Refused {
        Refused {
            status,
            error: error.into(),
            problems: Vec::new(),
        }
    }

    fn one(row: Option<usize>, column: &str, reason: String) -> Refused {
        Refused {
            status: 400,
            error: match row {
                Some(r) => format!("row {r}, column {column:?}: {reason}"),
                None => format!("column {column:?}: {reason}"),
            },
            problems: vec![RowProblem {
                row,
                column: Some(column.to_string()),
                value: None,
                reason,
            }],
        }
    }

    /// The answer body.
    pub fn to_json(&self) -> Value {
        let problems: Vec<Value> = self
            .problems
            .iter()
            .map(|p| {
                let mut o = Map::new();
                if let Some(r) = p.row {
                    o.insert("row".into(), json!(r));
                }
                if let Some(c) = &p.column {
                    o.insert("column".into(), json!(c));
                }
                if let Some(v) = &p.value {
                    o.insert("value".into(), json!(v));
                }
                o.insert("reason".into(), json!(p.reason));
                Value::Object(o)
            })
            .collect();
        let mut o = Map::new();
        o.insert("error".into(), json!(self.error));
        if !problems.is_empty() {
            o.insert("problems".into(), Value::Array(problems));
        }
        Value::Object(o)
    }
}

/// The rows of a request as CSV, and where each row starts.
#[derive(Debug, Clone, PartialEq)]
pub struct CsvRows {
    pub bytes: Vec<u8>,
    /// Line (from 1; the header is line 1) on which each row starts.
    pub first_lines: Vec<u64>,
}

impl CsvRows {
    pub fn len(&self) -> usize {
        self.first_lines.len()
    }

    pub fn is_empty(&self) -> bool {
        self.first_lines.is_empty()
    }

    /// The row (index in the request) that a CSV line belongs to; `None`
    /// for the header.
    pub fn row_of_line(&self, line: u64) -> Option<usize> {
        self.first_lines
            .partition_point(|&first| first <= line)
            .checked_sub(1)
    }

    /// The parser's refusal in the request's terms: rows by index.
    pub fn refusal(&self, refusal: &Refusal) -> Refused {
        let problems: Vec<RowProblem> = refusal
            .problems
            .iter()
            .map(|p: &Problem| RowProblem {
                row: if p.line == 0 {
                    None
                } else {
                    self.row_of_line(p.line)
                },
                column: p.column.clone(),
                value: p.value.clone(),
                // The CSV's header is made from the rows' keys.
                reason: match p.reason.strip_prefix(crate::ingest::HEADER_MISMATCH) {
                    Some(rest) if p.line <= 1 => {
                        format!("the rows' keys do not match the config's columns{rest}")
                    }
                    _ => p.reason.clone(),
                },
            })
            .collect();
        let first = problems.first().map_or_else(String::new, |p| {
            let at = match (p.row, &p.column) {
                (Some(r), Some(c)) => format!("row {r}, column {c:?}: "),
                (Some(r), None) => format!("row {r}: "),
                (None, Some(c)) => format!("column {c:?}: "),
                (None, None) => String::new(),
            };
            format!("; first: {at}{}", p.reason)
        });
        Refused {
            status: 400,
            error: format!(
                "{} problem{} in the rows, nothing was scored{first}",
                refusal.total,
                if refusal.total == 1 { "" } else { "s" }
            ),
            problems,
        }
    }
}

/// Reads a request body into CSV rows: at least one row, at most `max_rows`,
/// every row with the same columns, every value a string, a number or null.
pub fn rows_to_csv(body: &[u8], max_rows: usize) -> Result<CsvRows, Refused> {
    let value: Value = serde_json::from_slice(body).map_err(|e| {
        Refused::whole(
            400,
            format!("the body is not JSON ({e}); send {{\"rows\": [{{\"column\": value, …}}]}}"),
        )
    })?;
    let Value::Object(mut top) = value else {
        return Err(Refused::whole(
            400,
            "the body must be a JSON object: {\"rows\": [{\"column\": value, …}]}",
        ));
    };
    if let Some(other) = top.keys().find(|k| *k != "rows") {
        return Err(Refused::whole(
            400,
            format!("unknown field {other:?}; the body has one field, \"rows\""),
        ));
    }
    let rows = match top.remove("rows") {
        Some(Value::Array(rows)) => rows,
        Some(_) => {
            return Err(Refused::whole(
                400,
                "\"rows\" must be an array of objects, one per row",
            ));
        }
        None => {
            return Err(Refused::whole(
                400,
                "the body has no \"rows\"; send {\"rows\": [{\"column\": value, …}]}",
            ));
        }
    };
    if rows.is_empty() {
        return Err(Refused::whole(
            400,
            "\"rows\" is empty; send at least one row",
        ));
    }
    if rows.len() > max_rows {
        return Err(Refused::whole(
            413,
            format!(
                "{} rows in one request, over the limit of {max_rows} ([daemon] predict_max_rows); split the rows over several requests",
                rows.len()
            ),
        ));
    }
    let mut objects = Vec::with_capacity(rows.len());
    for (i, row) in rows.into_iter().enumerate() {
        match row {
            Value::Object(o) => objects.push(o),
            _ => {
                return Err(Refused {
                    status: 400,
                    error: format!("row {i} is not a JSON object of column names and values"),
                    problems: vec![RowProblem {
                        row: Some(i),
                        column: None,
                        value: None,
                        reason: "not a JSON object".into(),
                    }],
                });
            }
        }
    }
    let header: Vec<&String> = objects[0].keys().collect();
    let mut w = csv::WriterBuilder::new()
        .terminator(csv::Terminator::Any(b'\n'))
        .from_writer(Vec::new());
    let written = |w: &csv::Writer<Vec<u8>>| w.get_ref().iter().filter(|&&b| b == b'\n').count();
    w.write_record(header.iter().map(|h| h.as_bytes()))
        .map_err(|e| Refused::whole(500, format!("cannot write the rows: {e}")))?;
    let mut first_lines = Vec::with_capacity(objects.len());
    let mut fields: Vec<String> = Vec::with_capacity(header.len());
    for (i, row) in objects.iter().enumerate() {
        if let Some(extra) = row.keys().find(|k| !objects[0].contains_key(*k)) {
            return Err(Refused::one(
                Some(i),
                extra,
                "row 0 has no such column; every row must have the same columns".into(),
            ));
        }
        fields.clear();
        for h in &header {
            let text = match row.get(*h) {
                None => {
                    return Err(Refused::one(
                        Some(i),
                        h,
                        "missing; row 0 has this column, and every row must have the same columns (null for an empty value)".into(),
                    ));
                }
                Some(Value::Null) => String::new(),
                Some(Value::String(s)) => s.clone(),
                Some(Value::Number(n)) => n.to_string(),
                Some(other @ Value::Bool(_)) => {
                    return Err(Refused::one(
                        Some(i),
                        h,
                        format!(
                            "{other} is not a value of a column; send a number, a string or null"
                        ),
                    ));
                }
                Some(Value::Array(_) | Value::Object(_)) => {
                    return Err(Refused::one(
                        Some(i),
                        h,
                        "a list or object is not a value of a column; send a number, a string or null".into(),
                    ));
                }
            };
            fields.push(text);
        }
        if fields.len() == 1 && fields[0].is_empty() {
            // A row of one empty field reads back as a blank line, which
            // carries no row; say so instead of scoring one row fewer.
            return Err(Refused::one(
                Some(i),
                header[0],
                "the row's only value is empty; a row needs at least one value".into(),
            ));
        }
        w.flush()
            .map_err(|e| Refused::whole(500, format!("cannot write the rows: {e}")))?;
        first_lines.push(1 + written(&w) as u64);
        w.write_record(&fields)
            .map_err(|e| Refused::whole(500, format!("cannot write the rows: {e}")))?;
    }
    let bytes = w
        .into_inner()
        .map_err(|e| Refused::whole(500, format!("cannot write the rows: {e}")))?;
    Ok(CsvRows { bytes, first_lines })
}

/// A number for JSON: a finite f32 as the shortest decimal that reads back
/// to it; a non-finite one as "NaN", "inf" or "-inf" (JSON has no such numbers).
fn number(v: f32) -> Value {
    if v.is_finite() {
        let shortest: f64 = v.to_string().parse().unwrap_or(f64::from(v));
        serde_json::Number::from_f64(shortest).map_or(Value::Null, Value::Number)
    } else if v.is_nan() {
        json!("NaN")
    } else if v > 0.0 {
        json!("inf")
    } else {
        json!("-inf")
    }
}

/// The answer to scored rows: the model that answered, one prediction per
/// row in request order, and the category values the model had not seen.
pub fn answer(
    model: &str,
    target: &str,
    predictions: &Predictions,
    class_name: &dyn Fn(u32) -> String,
    unseen: &BTreeMap<String, Vec<String>>,
) -> Value {
    let list: Vec<Value> = match predictions {
        Predictions::Regression { values } => values.iter().map(|&v| number(v)).collect(),
        Predictions::Classification {
            classes,
            probabilities,
            n_classes,
        } => classes
            .iter()
            .zip(probabilities.chunks_exact((*n_classes).max(1)))
            .map(|(&c, p)| {
                let mut probs = Map::new();
                for (k, &v) in p.iter().enumerate() {
                    probs.insert(class_name(k as u32), number(v));
                }
                json!({"class": class_name(c), "probabilities": probs})
            })
            .collect(),
    };
    let mut o = Map::new();
    o.insert("model".into(), json!(model));
    o.insert("target".into(), json!(target));
    o.insert("predictions".into(), Value::Array(list));
    if !unseen.is_empty() {
        o.insert("unseen".into(), json!(unseen));
    }
    Value::Object(o)
}

#[cfg(test)]
mod tests {
    use super::*;

    fn csv_of(body: &str) -> Result<CsvRows, Refused> {
        rows_to_csv(body.as_bytes(), 32)
    }

    #[test]
    fn rows_become_csv_with_their_start_lines() {
        let rows = csv_of(
            r#"{"rows": [{"shop": "Corrin", "price": 2.5, "note": null},
                         {"shop": "a, \"b\"", "price": -1e-3, "note": "x"}]}"#,
        )
        .unwrap();
        let text = String::from_utf8(rows.bytes.clone()).unwrap();
        // serde_json's map is ordered by key (no order-preserving feature).
        assert_eq!(
            text,
            "note,price,shop\n,2.5,Corrin\nx,-0.001,\"a, \"\"b\"\"\"\n"
        );
        assert_eq!(rows.first_lines, vec![2, 3]);
        assert_eq!(rows.row_of_line(1), None);
        assert_eq!(rows.row_of_line(2), Some(0));
        assert_eq!(rows.row_of_line(3), Some(1));
    }

    #[test]
    fn a_value_over_a_line_break_keeps_later_rows_in_place() {
        let rows = csv_of(r#"{"rows": [{"a": "one\ntwo"}, {"a": "three"}]}"#).unwrap();
        // The first row spans lines 2 and 3; the second starts on line 4.
        assert_eq!(rows.first_lines, vec![2, 4]);
        assert_eq!(rows.row_of_line(3), Some(0));
        assert_eq!(rows.row_of_line(4), Some(1));
    }

    #[test]
    fn shape_problems_are_refused_with_the_row_and_column() {
        let cases: &[(&str, u16, &str)] = &[
            ("", 400, "not JSON"),
            ("[1]", 400, "JSON object"),
            (r#"{"row": []}"#, 400, "unknown field \"row\""),
            (r#"{"rows": {}}"#, 400, "must be an array"),
            (r#"{"rows": []}"#, 400, "empty"),
            (r#"{"rows": [1]}"#, 400, "row 0 is not a JSON object"),
            (
                r#"{"rows": [{"a": 1, "b": 2}, {"a": 1}]}"#,
                400,
                "row 1, column \"b\": missing",
            ),
            (
                r#"{"rows": [{"a": 1}, {"a": 1, "c": 2}]}"#,
                400,
                "row 1, column \"c\": row 0 has no such column",
            ),
            (
                r#"{"rows": [{"a": 1, "b": true}]}"#,
                400,
                "row 0, column \"b\": true is not a value",
            ),
            (
                r#"{"rows": [{"a": [1]}]}"#,
                400,
                "row 0, column \"a\": a list",
            ),
            (r#"{"rows": [{"a": null}]}"#, 400, "only value is empty"),
        ];
        for (body, status, words) in cases {
            let r = csv_of(body).expect_err(body);
            assert_eq!(r.status, *status, "{body}: {r:?}");
            assert!(r.error.contains(words), "{body}: {}", r.error);
        }
        let many = format!(r#"{{"rows": [{}]}}"#, vec![r#"{"a": 1}"#; 33].join(","));
        let r = csv_of(&many).unwrap_err();
        assert_eq!(r.status, 413);
        assert!(r.error.contains("33 rows"), "{}", r.error);
        assert!(csv_of(&many.replacen(r#"{"a": 1},"#, "", 1)).is_ok());
    }

    #[test]
    fn parser_problems_name_the_request_row() {
        let rows = csv_of(r#"{"rows": [{"a": "x\ny"}, {"a": "1"}, {"a": "z"}]}"#).unwrap();
        let refusal = Refusal {
            problems: vec![
                Problem {
                    line: 5,
                    column: Some("a".into()),
                    field: Some(1),
                    value: Some("z".into()),
                    reason: "not a number".into(),
                },
                Problem {
                    line: 1,
                    column: None,
                    field: None,
                    value: None,
                    reason: "unknown column".into(),
                },
            ],
            total: 2,
        };
        let r = rows.refusal(&refusal);
        assert_eq!(r.status, 400);
        assert_eq!(r.problems[0].row, Some(2));
        assert_eq!(r.problems[1].row, None);
        assert!(
            r.error
                .starts_with("2 problems in the rows, nothing was scored; first: row 2, column \"a\": not a number"),
            "{}",
            r.error
        );
        // A header that names the wrong columns is the rows' keys here.
        let keys = rows.refusal(&Refusal {
            problems: vec![Problem {
                line: 1,
                column: None,
                field: None,
                value: None,
                reason: format!("{}: missing column(s): b", crate::ingest::HEADER_MISMATCH),
            }],
            total: 1,
        });
        assert_eq!(
            keys.problems[0].reason,
            "the rows' keys do not match the config's columns: missing column(s): b"
        );
        let body = r.to_json();
        assert_eq!(body["problems"][0]["row"], 2);
        assert_eq!(body["problems"][0]["column"], "a");
        assert!(body["problems"][1].get("row").is_none());
    }

    #[test]
    fn answers_carry_the_model_and_one_prediction_per_row() {
        let reg = Predictions::Regression {
            values: vec![1.1, f32::INFINITY],
        };
        let a = answer("m7", "y", &reg, &|c| c.to_string(), &BTreeMap::new());
        assert_eq!(a["model"], "m7");
        assert_eq!(a["predictions"][0], 1.1);
        assert_eq!(a["predictions"][1], "inf");
        assert!(a.get("unseen").is_none());
        let cls = Predictions::Classification {
            classes: vec![1],
            probabilities: vec![0.25, 0.75],
            n_classes: 2,
        };
        let names = |c: u32| ["late", "on_time"][c as usize].to_string();
        let unseen = BTreeMap::from([("shop".to_string(), vec!["Brynmoor".to_string()])]);
        let a = answer("m8", "arrival", &cls, &names, &unseen);
        assert_eq!(a["predictions"][0]["class"], "on_time");
        assert_eq!(a["predictions"][0]["probabilities"]["late"], 0.25);
        assert_eq!(a["unseen"]["shop"][0], "Brynmoor");
    }
}
