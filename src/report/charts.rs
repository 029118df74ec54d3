//! The report's charts as SVG text, drawn with plotters' SVG backend.
//! Text is written as SVG `<text>` and laid out by the browser, so no font
//! is loaded here. Each function returns one `<svg>` element, or `None`
//! when there is nothing to draw (the page then says what is missing).

use plotters::coord::Shift;
use plotters::prelude::*;

use super::gather::{Arrival, Fate, Timeline};
use super::importance::Importance;
use super::scan::ResponseMap;
use crate::model::TrainingSummary;

type DrawResult = Result<(), DrawingAreaErrorKind<std::io::Error>>;

/// Legend label, marker and the test that picks the files it marks.
type ArrivalMarker = (&'static str, Shape, RGBColor, fn(&Arrival) -> bool);

pub const WIDTH: u32 = 1000;

const INK: RGBColor = RGBColor(0x1d, 0x2b, 0x36);
const GRID_LINE: RGBColor = RGBColor(0xe3, 0xe6, 0xe8);
const FAINT_LINE: RGBColor = RGBColor(0xf3, 0xf4, 0xf5);
const TRIVIAL: RGBColor = RGBColor(0xb0, 0x7d, 0x2b);
const RIDGE: RGBColor = RGBColor(0x6b, 0x4f, 0xa0);
const TREES: RGBColor = RGBColor(0x2e, 0x86, 0x8c);
const GREEN: RGBColor = RGBColor(0x2a, 0x9d, 0x6f);
const GREY: RGBColor = RGBColor(0x8a, 0x8f, 0x98);
const RED: RGBColor = RGBColor(0xc8, 0x45, 0x3b);
const BLUE: RGBColor = RGBColor(0x38, 0x66, 0xc4);
const AMBER: RGBColor = RGBColor(0xd8, 0x8a, 0x1e);
const PURPLE: RGBColor = RGBColor(0x7b, 0x5a, 0xb8);
/// Line colours of the training curves, one per model shown.
const SERIES: [RGBColor; 4] = [
    RGBColor(0x1f, 0x6f, 0x8b),
    RGBColor(0xd0, 0x5a, 0x3c),
    RGBColor(0x4a, 0x8c, 0x3f),
    RGBColor(0x8e, 0x4f, 0x9e),
];
/// Stops of the response map's colour scale, low to high.
const SCALE: [(f64, (u8, u8, u8)); 3] = [
    (0.0, (0x1f, 0x3b, 0x5a)),
    (0.5, (0x3f, 0x9e, 0x8f)),
    (1.0, (0xf2, 0xd9, 0x8c)),
];

/// A text style of about `px` CSS pixels (the SVG backend writes a font
/// size of the given size / 1.24).
fn font(px: u32) -> TextStyle<'static> {
    ("sans-serif", f64::from(px) * 1.24).into_font().color(&INK)
}

/// An axis value with about four significant digits.
fn number(v: &f64) -> String {
    let a = v.abs();
    if a >= 1000.0 {
        format!("{v:.0}")
    } else if a >= 10.0 {
        format!("{v:.1}")
    } else if a >= 0.1 || a == 0.0 {
        format!("{v:.3}")
    } else {
        format!("{v:.2e}")
    }
}

/// Marker outlines in pixels around the point. Each fate has a shape of
/// its own, so a marker is told apart without its colour.
#[derive(Debug, Clone, Copy, PartialEq, Eq)]
enum Shape {
    Disc,
    Square,
    Triangle,
    Diamond,
    Cross,
    /// Two triangles tip to tip: a candidate waiting for a person.
    Hourglass,
    /// A flat bar: no decision logged.
    Bar,
}

fn outline(shape: Shape) -> Vec<(i32, i32)> {
    match shape {
        Shape::Disc => (0..12)
            .map(|k| {
                let a = std::f64::consts::PI * 2.0 * f64::from(k) / 12.0;
                (
                    (5.0 * a.cos()).round() as i32,
                    (5.0 * a.sin()).round() as i32,
                )
            })
            .collect(),
        Shape::Square => vec![(-4, -4), (4, -4), (4, 4), (-4, 4)],
        Shape::Triangle => vec![(0, -6), (6, 5), (-6, 5)],
        Shape::Diamond => vec![(0, -6), (6, 0), (0, 6), (-6, 0)],
        Shape::Hourglass => vec![(-5, -6), (5, -6), (1, 0), (5, 6), (-5, 6), (-1, 0)],
        Shape::Bar => vec![(-6, -2), (6, -2), (6, 2), (-6, 2)],
        Shape::Cross => vec![
            (-5, -6),
            (0, -1),
            (5, -6),
            (6, -5),
            (1, 0),
            (6, 5),
            (5, 6),
            (0, 1),
            (-5, 6),
            (-6, 5),
            (-1, 0),
            (-6, -5),
        ],
    }
}

fn fate_style(f: Fate) -> (Shape, RGBColor) {
    match f {
        Fate::Promoted => (Shape::Disc, GREEN),
        Fate::Shelved => (Shape::Cross, GREY),
        Fate::RolledBack => (Shape::Triangle, RED),
        Fate::Approved => (Shape::Square, BLUE),
        Fate::Declined => (Shape::Diamond, AMBER),
        Fate::Awaiting => (Shape::Hourglass, PURPLE),
        Fate::Undecided => (Shape::Bar, INK),
    }
}

/// Draws into an SVG string of the given size.
fn render(
    size: (u32, u32),
    what: &str,
    draw: impl FnOnce(&DrawingArea<SVGBackend<'_>, Shift>) -> DrawResult,
) -> anyhow::Result<String> {
    let mut buf = String::new();
    {
        let root = SVGBackend::with_string(&mut buf, size).into_drawing_area();
        let fail = |e: DrawingAreaErrorKind<std::io::Error>| {
            anyhow::anyhow!("cannot draw the {what} chart: {e}")
        };
        root.fill(&WHITE).map_err(fail)?;
        draw(&root).map_err(fail)?;
        root.present().map_err(fail)?;
    }
    // Inline SVG in HTML needs no namespace; leaving it out keeps the page
    // free of any URL.
    Ok(buf.replacen(" xmlns=\"http://www.w3.org/2000/svg\"", "", 1))
}

/// Lower and upper bounds for a log axis over positive finite values.
fn log_bounds(values: impl Iterator<Item = f64>) -> Option<(f64, f64)> {
    let v: Vec<f64> = values.filter(|x| x.is_finite() && *x > 0.0).collect();
    let lo = v.iter().copied().reduce(f64::min)?;
    let hi = v.iter().copied().reduce(f64::max)?;
    Some((lo / 1.4, hi * 1.4))
}

fn integer_label(v: &f64) -> String {
    if (v - v.round()).abs() < 1e-9 {
        format!("{}", v.round() as i64)
    } else {
        String::new()
    }
}

/// Holdout loss of every candidate per cycle, marked by what became of it,
/// with the cycle's ridge, boosted-trees and trivial baselines as
/// reference lines.
pub fn holdout(t: &Timeline) -> anyhow::Result<Option<String>> {
    let Some((lo, hi)) = log_bounds(
        t.candidates
            .iter()
            .map(|c| c.holdout_loss)
            .chain(t.baselines.iter().map(|b| b.trivial_loss))
            .chain(t.baselines.iter().filter_map(|b| b.ridge_loss))
            .chain(t.baselines.iter().filter_map(|b| b.trees_loss)),
    ) else {
        return Ok(None);
    };
    if t.candidates.is_empty() {
        return Ok(None);
    }
    let last = t
        .candidates
        .iter()
        .map(|c| c.cycle)
        .chain(t.baselines.iter().map(|b| b.cycle))
        .max()
        .unwrap_or(1);
    let svg =
        render((WIDTH, 440), "holdout loss", |root| {
            let mut chart = ChartBuilder::on(root)
                .margin(16)
                .x_label_area_size(44)
                .y_label_area_size(76)
                .build_cartesian_2d(0.5f64..last as f64 + 0.5, (lo..hi).log_scale())?;
            chart
                .configure_mesh()
                .x_desc("retrain cycle")
                .y_desc("mean holdout loss (log scale)")
                .x_labels((last as usize + 1).min(20))
                .x_label_formatter(&integer_label)
                .y_label_formatter(&number)
                .label_style(font(13))
                .axis_desc_style(font(14))
                .light_line_style(FAINT_LINE)
                .bold_line_style(GRID_LINE)
                .draw()?;
            let trivial: Vec<(f64, f64)> = t
                .baselines
                .iter()
                .filter(|b| b.trivial_loss > 0.0)
                .map(|b| (b.cycle as f64, b.trivial_loss))
                .collect();
            let ridge: Vec<(f64, f64)> = t
                .baselines
                .iter()
                .filter_map(|b| Some((b.cycle as f64, b.ridge_loss.filter(|l| *l > 0.0)?)))
                .collect();
            let trees: Vec<(f64, f64)> = t
                .baselines
                .iter()
                .filter_map(|b| Some((b.cycle as f64, b.trees_loss.filter(|l| *l > 0.0)?)))
                .collect();
            for (points, colour, name) in [
                (trivial, TRIVIAL, "trivial predictor"),
                (ridge, RIDGE, "ridge baseline"),
                (trees, TREES, "boosted trees"),
            ] {
                if points.is_empty() {
                    continue;
                }
                chart
                    .draw_series(DashedLineSeries::new(
                        points.clone(),
                        7,
                        4,
                        colour.stroke_width(2),
                    ))?
                    .label(name)
                    .legend(move |(x, y)| PathElement::new(vec![(x, y), (x + 18, y)], colour));
                chart.draw_series(points.iter().map(|&p| Circle::new(p, 3, colour.filled())))?;
            }
            for fate in Fate::ALL {
                let points: Vec<(f64, f64)> = t
                    .candidates
                    .iter()
                    .filter(|c| c.fate == fate && c.holdout_loss > 0.0)
                    .map(|c| (c.cycle as f64, c.holdout_loss))
                    .collect();
                if points.is_empty() {
                    continue;
                }
                let (shape, colour) = fate_style(fate);
                let pts = outline(shape);
                let legend_pts = pts.clone();
                chart
                    .draw_series(points.iter().map(|&p| {
                        EmptyElement::at(p) + Polygon::new(pts.clone(), colour.filled())
                    }))?
                    .label(fate.label())
                    .legend(move |c| {
                        EmptyElement::at(c) + Polygon::new(legend_pts.clone(), colour.filled())
                    });
            }
            // Model ids beside their points, while they stay readable.
            if t.candidates.len() <= 40 {
                chart.draw_series(t.candidates.iter().filter(|c| c.holdout_loss > 0.0).map(
                    |c| {
                        EmptyElement::at((c.cycle as f64, c.holdout_loss))
                            + Text::new(c.model.to_string(), (8, -4), font(11))
                    },
                ))?;
            }
            chart
                .configure_series_labels()
                .position(SeriesLabelPosition::UpperRight)
                .background_style(WHITE.mix(0.9))
                .border_style(GRID_LINE)
                .label_font(font(12))
                .draw()
        })?;
    Ok(Some(svg))
}

/// Training and validation loss per epoch of the given models.
pub fn curves(models: &[(String, &TrainingSummary)]) -> anyhow::Result<Option<String>> {
    let Some((lo, hi)) = log_bounds(
        models
            .iter()
            .flat_map(|(_, s)| s.train_loss.iter().chain(&s.validation_loss).copied()),
    ) else {
        return Ok(None);
    };
    let epochs = models
        .iter()
        .map(|(_, s)| s.train_loss.len().max(s.validation_loss.len()))
        .max()
        .unwrap_or(1)
        .max(2);
    let svg = render((WIDTH, 420), "training curves", |root| {
        let mut chart = ChartBuilder::on(root)
            .margin(16)
            .x_label_area_size(44)
            .y_label_area_size(76)
            .build_cartesian_2d(1f64..epochs as f64, (lo..hi).log_scale())?;
        chart
            .configure_mesh()
            .x_desc("epoch")
            .y_desc("loss (log scale)")
            .x_label_formatter(&integer_label)
            .y_label_formatter(&number)
            .label_style(font(13))
            .axis_desc_style(font(14))
            .light_line_style(FAINT_LINE)
            .bold_line_style(GRID_LINE)
            .draw()?;
        for (k, (name, s)) in models.iter().enumerate() {
            let colour = SERIES[k % SERIES.len()];
            let series = |v: &[f64]| -> Vec<(f64, f64)> {
                v.iter()
                    .enumerate()
                    .filter(|(_, l)| l.is_finite() && **l > 0.0)
                    .map(|(i, l)| (i as f64 + 1.0, *l))
                    .collect()
            };
            chart
                .draw_series(LineSeries::new(
                    series(&s.train_loss),
                    colour.stroke_width(2),
                ))?
                .label(format!("{name} training"))
                .legend(move |(x, y)| {
                    PathElement::new(vec![(x, y), (x + 18, y)], colour.stroke_width(2))
                });
            let validation = series(&s.validation_loss);
            if !validation.is_empty() {
                chart
                    .draw_series(DashedLineSeries::new(
                        validation,
                        5,
                        4,
                        colour.stroke_width(2),
                    ))?
                    .label(format!("{name} validation (dashed)"))
                    .legend(move |(x, y)| {
                        PathElement::new(vec![(x, y), (x + 6, y)], colour.stroke_width(2))
                    });
            }
            if s.best_epoch > 0
                && let Some(&l) = s.validation_loss.get(s.best_epoch - 1)
                && l > 0.0
            {
                chart.draw_series(std::iter::once(Circle::new(
                    (s.best_epoch as f64, l),
                    4,
                    colour.stroke_width(2),
                )))?;
            }
        }
        chart
            .configure_series_labels()
            .position(SeriesLabelPosition::UpperRight)
            .background_style(WHITE.mix(0.9))
            .border_style(GRID_LINE)
            .label_font(font(12))
            .draw()
    })?;
    Ok(Some(svg))
}

/// Rows stored after each arriving file, with refused, duplicate and
/// drift-flagged files marked.
pub fn rows(t: &Timeline) -> anyhow::Result<Option<String>> {
    if t.files.is_empty() {
        return Ok(None);
    }
    let n = t.files.len();
    let top = t
        .files
        .iter()
        .map(|f| f.rows_stored)
        .max()
        .unwrap_or(0)
        .max(1) as f64
        * 1.1;
    let svg =
        render((WIDTH, 400), "rows stored", |root| {
            let mut chart = ChartBuilder::on(root)
                .margin(16)
                .x_label_area_size(44)
                .y_label_area_size(76)
                .build_cartesian_2d(0.5f64..n as f64 + 0.5, 0f64..top)?;
            chart
                .configure_mesh()
                .x_desc("file, in order of arrival")
                .y_desc("rows stored")
                .x_labels(n.min(25))
                .x_label_formatter(&integer_label)
                .y_label_formatter(&|v| format!("{v:.0}"))
                .label_style(font(13))
                .axis_desc_style(font(14))
                .light_line_style(FAINT_LINE)
                .bold_line_style(GRID_LINE)
                .draw()?;
            let line: Vec<(f64, f64)> = t
                .files
                .iter()
                .enumerate()
                .map(|(i, f)| (i as f64 + 1.0, f.rows_stored as f64))
                .collect();
            chart.draw_series(LineSeries::new(line, INK.stroke_width(2)))?;
            let kinds: [ArrivalMarker; 4] = [
                (
                    "accepted",
                    Shape::Disc,
                    INK,
                    |a| matches!(a, Arrival::Accepted { drifted, .. } if drifted.is_empty()),
                ),
                (
                    "accepted, drift flagged",
                    Shape::Triangle,
                    AMBER,
                    |a| matches!(a, Arrival::Accepted { drifted, .. } if !drifted.is_empty()),
                ),
                ("refused", Shape::Cross, RED, |a| {
                    matches!(a, Arrival::Refused { .. })
                }),
                ("duplicate (nothing stored)", Shape::Diamond, GREY, |a| {
                    matches!(a, Arrival::Duplicate { .. })
                }),
            ];
            for (name, shape, colour, test) in kinds {
                let points: Vec<(f64, f64)> = t
                    .files
                    .iter()
                    .enumerate()
                    .filter(|(_, f)| test(&f.what))
                    .map(|(i, f)| (i as f64 + 1.0, f.rows_stored as f64))
                    .collect();
                if points.is_empty() {
                    continue;
                }
                let pts = outline(shape);
                let legend_pts = pts.clone();
                chart
                    .draw_series(points.iter().map(|&p| {
                        EmptyElement::at(p) + Polygon::new(pts.clone(), colour.filled())
                    }))?
                    .label(name)
                    .legend(move |c| {
                        EmptyElement::at(c) + Polygon::new(legend_pts.clone(), colour.filled())
                    });
            }
            chart
                .configure_series_labels()
                .position(SeriesLabelPosition::LowerRight)
                .background_style(WHITE.mix(0.9))
                .border_style(GRID_LINE)
                .label_font(font(12))
                .draw()
        })?;
    Ok(Some(svg))
}

/// The colour of `v` on the map's scale, `v` in [0, 1].
pub fn scale_colour(v: f64) -> RGBColor {
    let v = if v.is_finite() {
        v.clamp(0.0, 1.0)
    } else {
        0.0
    };
    let k = if v <= SCALE[1].0 { 0 } else { 1 };
    let (a, ca) = SCALE[k];
    let (b, cb) = SCALE[k + 1];
    let f = (v - a) / (b - a);
    let mix = |x: u8, y: u8| (f64::from(x) + (f64::from(y) - f64::from(x)) * f).round() as u8;
    RGBColor(mix(ca.0, cb.0), mix(ca.1, cb.1), mix(ca.2, cb.2))
}

/// The serving model's output over two inputs as a heat map with the
/// stored rows on top, and a colour bar.
pub fn response(map: &ResponseMap) -> anyhow::Result<String> {
    let finite = || map.values.iter().copied().filter(|v| v.is_finite());
    let vmin = finite().reduce(f64::min).unwrap_or(0.0);
    let vmax = finite().reduce(f64::max).unwrap_or(1.0);
    let (vmin, vmax) = if vmax > vmin {
        (vmin, vmax)
    } else {
        (vmin - 0.5, vmax + 0.5)
    };
    let unit = |v: f64| (v - vmin) / (vmax - vmin);
    let (x0, x1) = (
        map.xs.first().copied().unwrap_or(0.0) - map.dx / 2.0,
        map.xs.last().copied().unwrap_or(1.0) + map.dx / 2.0,
    );
    let (y0, y1) = (
        map.ys.first().copied().unwrap_or(0.0) - map.dy / 2.0,
        map.ys.last().copied().unwrap_or(1.0) + map.dy / 2.0,
    );
    render((WIDTH, 560), "response map", |root| {
        let (left, right) = root.split_horizontally(WIDTH - 150);
        let mut chart = ChartBuilder::on(&left)
            .margin(16)
            .x_label_area_size(44)
            .y_label_area_size(70)
            .build_cartesian_2d(x0..x1, y0..y1)?;
        chart
            .configure_mesh()
            .disable_mesh()
            .x_desc(map.x_name.as_str())
            .y_desc(map.y_name.as_str())
            .label_style(font(13))
            .axis_desc_style(font(14))
            .draw()?;
        let nx = map.xs.len();
        chart.draw_series(map.values.iter().enumerate().map(|(k, &v)| {
            let (x, y) = (map.xs[k % nx], map.ys[k / nx]);
            Rectangle::new(
                [
                    (x - map.dx / 2.0, y - map.dy / 2.0),
                    (x + map.dx / 2.0, y + map.dy / 2.0),
                ],
                scale_colour(unit(v)).filled(),
            )
        }))?;
        chart.draw_series(map.points.iter().map(|&p| {
            EmptyElement::at(p)
                + Circle::new((0, 0), 3, WHITE.filled())
                + Circle::new((0, 0), 2, INK.filled())
        }))?;
        let mut bar = ChartBuilder::on(&right)
            .margin_top(16)
            .margin_bottom(60)
            .margin_right(10)
            .y_label_area_size(70)
            .caption(map.value_label.as_str(), font(12))
            .build_cartesian_2d(0f64..1f64, vmin..vmax)?;
        bar.configure_mesh()
            .disable_mesh()
            .disable_x_axis()
            .y_label_formatter(&number)
            .label_style(font(12))
            .draw()?;
        let steps = 60;
        bar.draw_series((0..steps).map(|i| {
            let a = vmin + (vmax - vmin) * i as f64 / steps as f64;
            let b = vmin + (vmax - vmin) * (i + 1) as f64 / steps as f64;
            Rectangle::new(
                [(0.0, a), (1.0, b)],
                scale_colour((i as f64 + 0.5) / steps as f64).filled(),
            )
        }))?;
        Ok(())
    })
}

/// Width of the permutation-importance chart, which sits beside its text.
pub const IMPORTANCE_WIDTH: u32 = 720;

/// Permutation importance per input column as horizontal bars (mean rise
/// in holdout loss), largest at the top, with the interval as a whisker and
/// a line at 0.
pub fn importance(items: &[Importance]) -> anyhow::Result<Option<String>> {
    if items.is_empty() {
        return Ok(None);
    }
    let n = items.len();
    let ends = items.iter().flat_map(|i| {
        let (lo, hi) = i.interval.unwrap_or((i.rise, i.rise));
        [i.rise, lo, hi]
    });
    let (lo, hi) = ends
        .filter(|v| v.is_finite())
        .fold((0.0f64, 0.0f64), |(a, b), v| (a.min(v), b.max(v)));
    let pad = (hi - lo).max(1e-12) * 0.06;
    let (lo, hi) = (if lo < 0.0 { lo - pad } else { 0.0 }, hi + pad);
    let names: Vec<String> = items.iter().map(|i| i.column.clone()).collect();
    let height = (80 + 34 * n as u32).max(220);
    let svg = render((IMPORTANCE_WIDTH, height), "input influence", |root| {
        let mut chart = ChartBuilder::on(root)
            .margin(16)
            .x_label_area_size(44)
            .y_label_area_size(150)
            .build_cartesian_2d(lo..hi, (0..n).into_segmented())?;
        chart
            .configure_mesh()
            .disable_y_mesh()
            .x_desc("rise in mean holdout loss when shuffled")
            .x_label_formatter(&number)
            .y_labels(n)
            .y_label_formatter(&|v| match v {
                SegmentValue::CenterOf(i) if *i < n => names[n - 1 - *i].clone(),
                _ => String::new(),
            })
            .label_style(font(13))
            .axis_desc_style(font(14))
            .light_line_style(FAINT_LINE)
            .bold_line_style(GRID_LINE)
            .draw()?;
        chart.draw_series(items.iter().enumerate().map(|(k, item)| {
            let slot = n - 1 - k;
            let (a, b) = if item.rise >= 0.0 {
                (0.0, item.rise)
            } else {
                (item.rise, 0.0)
            };
            let mut r = Rectangle::new(
                [
                    (a, SegmentValue::Exact(slot)),
                    (b, SegmentValue::Exact(slot + 1)),
                ],
                SERIES[0].mix(0.75).filled(),
            );
            r.set_margin(7, 7, 0, 0);
            r
        }))?;
        // Whiskers: the interval, with short caps at both ends.
        for (k, item) in items.iter().enumerate() {
            let Some((a, b)) = item.interval else {
                continue;
            };
            let slot = n - 1 - k;
            let at = SegmentValue::CenterOf(slot);
            chart.draw_series(std::iter::once(PathElement::new(
                vec![(a, at.clone()), (b, at.clone())],
                INK.stroke_width(2),
            )))?;
            for end in [a, b] {
                chart.draw_series(std::iter::once(
                    EmptyElement::at((end, at.clone()))
                        + PathElement::new(vec![(0, -7), (0, 7)], INK.stroke_width(2)),
                ))?;
            }
        }
        chart.draw_series(std::iter::once(PathElement::new(
            vec![(0.0, SegmentValue::Exact(0)), (0.0, SegmentValue::Exact(n))],
            INK.stroke_width(1),
        )))?;
        Ok(())
    })?;
    Ok(Some(svg))
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn colour_scale_runs_through_its_stops() {
        assert_eq!(scale_colour(0.0), RGBColor(0x1f, 0x3b, 0x5a));
        assert_eq!(scale_colour(0.5), RGBColor(0x3f, 0x9e, 0x8f));
        assert_eq!(scale_colour(1.0), RGBColor(0xf2, 0xd9, 0x8c));
        assert_eq!(scale_colour(7.0), scale_colour(1.0));
        assert_eq!(scale_colour(f64::NAN), scale_colour(0.0));
    }

    #[test]
    fn every_fate_has_a_marker_shape_of_its_own() {
        // Fate::ALL lists every fate (a new one must be added to it).
        for f in Fate::ALL {
            match f {
                Fate::Promoted
                | Fate::Shelved
                | Fate::RolledBack
                | Fate::Approved
                | Fate::Declined
                | Fate::Awaiting
                | Fate::Undecided => {}
            }
        }
        let shapes: Vec<Shape> = Fate::ALL.iter().map(|&f| fate_style(f).0).collect();
        for (i, a) in shapes.iter().enumerate() {
            for (j, b) in shapes.iter().enumerate().skip(i + 1) {
                assert_ne!(a, b, "{:?} and {:?}", Fate::ALL[i], Fate::ALL[j]);
                assert_ne!(outline(*a), outline(*b), "{a:?} and {b:?} are drawn alike");
            }
        }
        // Drawn: one candidate of each fate gives one legend entry each,
        // and every outline appears among the chart's polygons.
        let t = Timeline {
            candidates: Fate::ALL
                .iter()
                .enumerate()
                .map(|(i, &fate)| super::super::gather::Candidate {
                    cycle: i as u64 + 1,
                    model: crate::ids::ModelId(i as u64 + 1),
                    run: "warm".into(),
                    holdout_loss: 1.0 + i as f64,
                    time: String::new(),
                    fate,
                })
                .collect(),
            ..Timeline::default()
        };
        let svg = holdout(&t).unwrap().unwrap();
        for f in Fate::ALL {
            // plotters writes a label as `>\nLABEL\n</text>`.
            assert!(
                svg.contains(&format!("\n{}\n</text>", f.label())),
                "{}",
                f.label()
            );
        }
        let drawn: std::collections::BTreeSet<Vec<(i32, i32)>> = svg
            .split("<polygon ")
            .skip(1)
            .filter_map(|tag| tag.split("points=\"").nth(1)?.split('"').next())
            .map(|points| {
                let xy: Vec<(i32, i32)> = points
                    .split_whitespace()
                    .filter_map(|p| {
                        let (x, y) = p.split_once(',')?;
                        Some((x.parse::<f64>().ok()? as i32, y.parse::<f64>().ok()? as i32))
                    })
                    .collect();
                // Relative to the first point, as the outline is to its own.
                let (x0, y0) = xy.first().copied().unwrap_or_default();
                xy.iter().map(|(x, y)| (x - x0, y - y0)).collect()
            })
            .collect();
        for s in &shapes {
            let o = outline(*s);
            let rel: Vec<(i32, i32)> = o.iter().map(|(x, y)| (x - o[0].0, y - o[0].1)).collect();
            assert!(drawn.contains(&rel), "{s:?} not drawn: {drawn:?}");
        }
    }

    #[test]
    fn axis_numbers_keep_about_four_digits() {
        assert_eq!(number(&12345.6), "12346");
        assert_eq!(number(&46.0047), "46.0");
        assert_eq!(number(&0.25), "0.250");
        assert_eq!(number(&0.0), "0.000");
        assert_eq!(number(&0.00123), "1.23e-3");
    }

    #[test]
    fn charts_are_plain_svg_without_urls() {
        let items = vec![
            Importance {
                column: "a<b>".into(),
                rise: 2.0,
                repeat_sd: 0.1,
                interval: Some((1.5, 2.5)),
                ratio: Some(3.0),
            },
            Importance {
                column: "unused".into(),
                rise: -0.01,
                repeat_sd: 0.01,
                interval: None,
                ratio: Some(0.99),
            },
        ];
        let svg = importance(&items).unwrap().unwrap();
        assert!(svg.starts_with("<svg"), "{}", &svg[..40.min(svg.len())]);
        assert!(!svg.contains("http"));
        // plotters escapes text it writes.
        assert!(svg.contains("a&lt;b&gt;"));
        assert!(!svg.contains("a<b>"));
        assert!(importance(&[]).unwrap().is_none());
        assert!(rows(&Timeline::default()).unwrap().is_none());
        assert!(holdout(&Timeline::default()).unwrap().is_none());
    }
}
