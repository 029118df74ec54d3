//! A strict reader of the OpenMetrics 1.0 text format, for the tests of the
//! daemon's `/metrics` output (the integration suite reads the real
//! endpoint; `daemon::metrics`'s unit tests include this file for `render`).
//!
//! It takes the parts of the format tidegate writes and refuses what the
//! format forbids: a text that does not end in `# EOF`, a line ending in
//! CR, a family declared twice or interleaved with another, a sample of a
//! family that was not declared just before it, a sample name the family's
//! type does not allow (a counter's must end in `_total`), a bad metric or
//! label name, an unescaped label value, a repeated label, a value that is
//! not a number, and a negative or NaN counter. Exemplars, timestamps,
//! histograms and state sets are refused too: tidegate writes none, so one
//! appearing is a change to look at.

#![allow(dead_code)]

use std::collections::BTreeSet;

/// One sample line.
#[derive(Debug, Clone, PartialEq)]
pub struct Sample {
    pub name: String,
    pub labels: Vec<(String, String)>,
    pub value: f64,
}

/// One metric family: its metadata and samples.
#[derive(Debug, Clone, PartialEq)]
pub struct Family {
    pub name: String,
    pub kind: String,
    pub help: Option<String>,
    pub samples: Vec<Sample>,
}

/// Parses a whole exposition, or says which line breaks the format and why.
pub fn parse(text: &str) -> Result<Vec<Family>, String> {
    let body = text
        .strip_suffix("# EOF\n")
        .or_else(|| text.strip_suffix("# EOF"))
        .ok_or("the text does not end with the line `# EOF`")?;
    if !body.is_empty() && !body.ends_with('\n') {
        return Err("the line before `# EOF` does not end with a newline".into());
    }
    let mut families: Vec<Family> = Vec::new();
    let mut closed: BTreeSet<String> = BTreeSet::new();
    for (i, line) in body.split_terminator('\n').enumerate() {
        let at = |why: String| format!("line {}: {why}: {line:?}", i + 1);
        if line.ends_with('\r') {
            return Err(at("ends with CR; lines end with LF alone".into()));
        }
        if let Some(meta) = line.strip_prefix("# ") {
            let mut parts = meta.splitn(3, ' ');
            let (what, name) = (parts.next().unwrap_or(""), parts.next().unwrap_or(""));
            let rest = parts.next();
            check_name(name).map_err(at)?;
            let open = families
                .last_mut()
                .filter(|f| f.name == name && f.samples.is_empty());
            let family = match open {
                Some(f) => f,
                None => {
                    if let Some(prev) = families.last() {
                        closed.insert(prev.name.clone());
                    }
                    if closed.contains(name) || families.iter().any(|f| f.name == name) {
                        return Err(at(format!("family {name} is declared again")));
                    }
                    families.push(Family {
                        name: name.to_string(),
                        kind: "unknown".into(),
                        help: None,
                        samples: Vec::new(),
                    });
                    families.last_mut().expect("just pushed")
                }
            };
            match (what, rest) {
                ("TYPE", Some(kind)) => {
                    if !["counter", "gauge", "summary", "unknown", "info"].contains(&kind) {
                        return Err(at(format!("type {kind:?} is not one this reader takes")));
                    }
                    family.kind = kind.to_string();
                }
                ("HELP", Some(help)) => family.help = Some(unescape(help, false).map_err(at)?),
                ("HELP", None) => family.help = Some(String::new()),
                ("UNIT", _) => return Err(at("UNIT is not written by tidegate".into())),
                _ => return Err(at("not a TYPE, HELP or UNIT line".into())),
            }
            continue;
        }
        if line.starts_with('#') {
            return Err(at("a comment other than TYPE, HELP, UNIT or EOF".into()));
        }
        let sample = parse_sample(line).map_err(at)?;
        let family = families
            .last_mut()
            .ok_or_else(|| at("a sample before any family was declared".into()))?;
        let allowed: &[&str] = match family.kind.as_str() {
            "counter" => &["_total", "_created"],
            "gauge" | "unknown" => &[""],
            "info" => &["_info"],
            _ => &["", "_sum", "_count", "_created"],
        };
        let suffix = sample
            .name
            .strip_prefix(family.name.as_str())
            .filter(|s| allowed.contains(s));
        let Some(suffix) = suffix else {
            return Err(at(format!(
                "sample {} does not belong to the {} family {} declared before it",
                sample.name, family.kind, family.name
            )));
        };
        if family.kind == "summary"
            && suffix.is_empty()
            && !sample.labels.iter().any(|(k, _)| k == "quantile")
        {
            return Err(at("a summary's bare sample needs a quantile label".into()));
        }
        if (family.kind == "counter" || suffix == "_count" || suffix == "_sum")
            && (sample.value.is_nan() || sample.value < 0.0)
        {
            return Err(at(format!("{} must be a non-negative number", sample.name)));
        }
        let mut key = sample.labels.clone();
        key.sort();
        if family.samples.iter().any(|s| {
            let mut other = s.labels.clone();
            other.sort();
            s.name == sample.name && other == key
        }) {
            return Err(at("the same sample twice".into()));
        }
        family.samples.push(sample);
    }
    if let Some(empty) = families.iter().find(|f| f.samples.is_empty()) {
        return Err(format!("family {} has no samples", empty.name));
    }
    Ok(families)
}

fn check_name(name: &str) -> Result<(), String> {
    let mut chars = name.chars();
    let first_ok = chars
        .next()
        .is_some_and(|c| c.is_ascii_alphabetic() || c == '_' || c == ':');
    if first_ok && chars.all(|c| c.is_ascii_alphanumeric() || c == '_' || c == ':') {
        Ok(())
    } else {
        Err(format!("{name:?} is not a metric name"))
    }
}

/// Undoes `\\`, `\n` and (in label values) `\"`.
fn unescape(s: &str, quotes: bool) -> Result<String, String> {
    let mut out = String::new();
    let mut chars = s.chars();
    while let Some(c) = chars.next() {
        match c {
            '\\' => match chars.next() {
                Some('\\') => out.push('\\'),
                Some('n') => out.push('\n'),
                Some('"') if quotes => out.push('"'),
                other => return Err(format!("bad escape \\{other:?}")),
            },
            '"' if quotes => return Err("an unescaped quote in a label value".into()),
            c => out.push(c),
        }
    }
    Ok(out)
}

fn parse_sample(line: &str) -> Result<Sample, String> {
    let name_end = line
        .find(['{', ' '])
        .ok_or("a sample needs a value after its name")?;
    let name = &line[..name_end];
    check_name(name)?;
    let mut rest = &line[name_end..];
    let mut labels: Vec<(String, String)> = Vec::new();
    if let Some(inner) = rest.strip_prefix('{') {
        rest = inner;
        loop {
            if let Some(after) = rest.strip_prefix('}') {
                rest = after;
                break;
            }
            let eq = rest.find('=').ok_or("a label without `=`")?;
            let label = &rest[..eq];
            let first_ok = label
                .chars()
                .next()
                .is_some_and(|c| c.is_ascii_alphabetic() || c == '_');
            if !first_ok || !label.chars().all(|c| c.is_ascii_alphanumeric() || c == '_') {
                return Err(format!("{label:?} is not a label name"));
            }
            let quoted = rest[eq + 1..]
                .strip_prefix('"')
                .ok_or("a label value must be in double quotes")?;
            // The closing quote is the first one not escaped by a backslash.
            let mut end = None;
            let mut escaped = false;
            for (i, c) in quoted.char_indices() {
                match c {
                    '\\' if !escaped => escaped = true,
                    '"' if !escaped => {
                        end = Some(i);
                        break;
                    }
                    _ => escaped = false,
                }
            }
            let end = end.ok_or("a label value without its closing quote")?;
            let value = unescape(&quoted[..end], true)?;
            if labels.iter().any(|(k, _)| k == label) {
                return Err(format!("label {label} is given twice"));
            }
            labels.push((label.to_string(), value));
            rest = &quoted[end + 1..];
            if let Some(after) = rest.strip_prefix(',') {
                rest = after;
                if rest.starts_with('}') {
                    return Err("a comma before `}`".into());
                }
            } else if !rest.starts_with('}') {
                return Err("labels are separated by commas".into());
            }
        }
    }
    let value_text = rest
        .strip_prefix(' ')
        .ok_or("one space between the name (or labels) and the value")?;
    if value_text.contains(' ') || value_text.contains('#') {
        return Err("timestamps and exemplars are not written by tidegate".into());
    }
    Ok(Sample {
        name: name.to_string(),
        labels,
        value: number(value_text)?,
    })
}

/// A number as the format spells it: a decimal or `+Inf`, `-Inf`, `NaN`.
fn number(s: &str) -> Result<f64, String> {
    match s {
        "+Inf" => return Ok(f64::INFINITY),
        "-Inf" => return Ok(f64::NEG_INFINITY),
        "NaN" => return Ok(f64::NAN),
        _ => {}
    }
    let digits_ok = !s.is_empty()
        && s.chars()
            .all(|c| c.is_ascii_digit() || matches!(c, '.' | 'e' | 'E' | '+' | '-'))
        && s.chars().any(|c| c.is_ascii_digit());
    if !digits_ok {
        return Err(format!("{s:?} is not a number"));
    }
    s.parse::<f64>()
        .map_err(|_| format!("{s:?} is not a number"))
}

/// The reader itself: what it must refuse, so a pass means something.
pub fn self_check() {
    let good = "# HELP a_files Files.\n# TYPE a_files counter\na_files_total 2\n\
                # TYPE a_level gauge\na_level{m=\"x\\\"y\"} -1.5e3\n# EOF\n";
    let families = parse(good).unwrap();
    assert_eq!(families.len(), 2);
    assert_eq!(families[0].samples[0].name, "a_files_total");
    assert_eq!(families[1].samples[0].labels[0].1, "x\"y");
    let bad = [
        ("# TYPE a counter\na_total 1\n", "EOF"),
        ("# TYPE a counter\na 1\n# EOF\n", "does not belong"),
        ("# TYPE a gauge\na_total 1\n# EOF\n", "does not belong"),
        ("# TYPE a counter\na_total -1\n# EOF\n", "non-negative"),
        (
            "# TYPE a gauge\na 1\n# TYPE b gauge\nb 1\n# TYPE a gauge\na 2\n# EOF\n",
            "again",
        ),
        ("# TYPE a gauge\na one\n# EOF\n", "not a number"),
        ("# TYPE a gauge\na inf\n# EOF\n", "not a number"),
        ("# TYPE a gauge\na{x=\"1\",x=\"2\"} 1\n# EOF\n", "twice"),
        ("# TYPE a gauge\na{x=1} 1\n# EOF\n", "double quotes"),
        ("# TYPE a gauge\na 1\r\n# EOF\n", "CR"),
        ("b 1\n# EOF\n", "before any family"),
        ("# TYPE a gauge\na 1 1700000000\n# EOF\n", "timestamps"),
        ("# TYPE 1a gauge\n1a 1\n# EOF\n", "metric name"),
    ];
    for (text, why) in bad {
        let err = parse(text).expect_err(text);
        assert!(err.contains(why), "{text:?}: {err}");
    }
}
