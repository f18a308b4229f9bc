//! The report's charts, drawn with `plotters` into inline SVG strings.
//!
//! Each function takes plain numbers (no JSON) and returns the `<svg>` element, or a short
//! reason when the chart cannot be drawn (the caller then writes the reason instead of the
//! chart). Text is written as SVG `<text>` in the page's sans-serif font; nothing refers to a
//! file or address.

use super::read::ArrivalSummary;
use plotters::coord::types::{RangedCoordf64, RangedCoordi32};
use plotters::coord::Shift;
use plotters::prelude::*;
use plotters::style::text_anchor::{HPos, Pos, VPos};
use std::error::Error;

/// Line colours of the series, in order; chosen to stay apart in print and for common
/// colour-vision deficiencies.
const SERIES: [RGBColor; 8] = [
    RGBColor(0x1f, 0x5f, 0x8b),
    RGBColor(0xc2, 0x57, 0x1a),
    RGBColor(0x2e, 0x7d, 0x4f),
    RGBColor(0x7b, 0x4e, 0xa3),
    RGBColor(0x9a, 0x73, 0x0a),
    RGBColor(0x4f, 0x5d, 0x6b),
    RGBColor(0xa2, 0x3b, 0x5a),
    RGBColor(0x2a, 0x8a, 0x98),
];
/// The well-mixed reference and other reference lines.
const REFERENCE: RGBColor = RGBColor(0x33, 0x33, 0x33);
/// Axis and label ink.
const INK: RGBColor = RGBColor(0x1d, 0x23, 0x2a);
/// Light grid lines.
const GRID: RGBColor = RGBColor(0xe3, 0xe7, 0xea);
/// A cell without a value.
const EMPTY_CELL: RGBColor = RGBColor(0xd4, 0xd8, 0xdc);
/// A flagged change.
const FLAGGED: RGBColor = RGBColor(0xb0, 0x45, 0x00);

/// The colour of series `i`.
fn series_colour(i: usize) -> RGBColor {
    SERIES[i % SERIES.len()]
}

type Area<'a> = DrawingArea<SVGBackend<'a>, Shift>;
type DrawError = Box<dyn Error>;

/// Draws into a `width x height` SVG and labels it for assistive technology.
fn svg(
    width: u32,
    height: u32,
    label: &str,
    draw: impl FnOnce(&Area<'_>) -> Result<(), DrawError>,
) -> Result<String, String> {
    let mut text = String::new();
    {
        let root = SVGBackend::with_string(&mut text, (width, height)).into_drawing_area();
        root.fill(&WHITE).map_err(|e| e.to_string())?;
        draw(&root).map_err(|e| e.to_string())?;
        root.present().map_err(|e| e.to_string())?;
    }
    let label = super::html::esc(label);
    Ok(text.replacen(
        "<svg ",
        &format!("<svg role=\"img\" aria-label=\"{label}\" class=\"chart\" "),
        1,
    ))
}

fn font(size: u32) -> TextStyle<'static> {
    TextStyle::from((FontFamily::SansSerif, size).into_font()).color(&INK)
}

/// Headroom above the data, so that a legend in an upper corner stays clear of it.
const HEADROOM: f64 = 1.4;

/// An upper bound for a probability axis holding `values`: headroom for the legend, never 0.
fn probability_top(values: impl Iterator<Item = f64>) -> f64 {
    let max = values.filter(|x| x.is_finite()).fold(0.0f64, f64::max);
    if max <= 0.0 {
        1.0
    } else {
        max * HEADROOM
    }
}

/// The legend sample of a dashed reference line at `(x, y)`: three short strokes.
macro_rules! dashed_sample {
    ($x:expr, $y:expr) => {
        EmptyElement::at(($x, $y))
            + PathElement::new(vec![(0, 0), (5, 0)], REFERENCE.stroke_width(2))
            + PathElement::new(vec![(8, 0), (13, 0)], REFERENCE.stroke_width(2))
            + PathElement::new(vec![(16, 0), (21, 0)], REFERENCE.stroke_width(2))
    };
}

/// Category names under a horizontal axis, written upwards and ending just below the axis
/// (plotters centres rotated tick labels on the tick, across the axis line).
fn rotated_labels<'a>(
    root: &Area<'_>,
    at: impl Iterator<Item = ((i32, i32), &'a str)>,
    size: u32,
) -> Result<(), DrawError> {
    let style = font(size)
        .transform(FontTransform::Rotate270)
        .pos(Pos::new(HPos::Right, VPos::Center));
    for ((x, y), text) in at {
        root.draw(&Text::new(text.to_owned(), (x, y + 8), style.clone()))?;
    }
    Ok(())
}

/// Whether category labels must be written upwards to fit: many, or long.
fn needs_rotation(labels: &[String], width: u32) -> bool {
    let longest = labels.iter().map(String::len).max().unwrap_or(0) as u32;
    let per_label = width.saturating_sub(160) / labels.len().max(1) as u32;
    longest * 8 > per_label
}

/// Pixels under the axis that upward labels need.
fn rotated_area(labels: &[String]) -> u32 {
    let longest = labels.iter().map(String::len).max().unwrap_or(4) as u32;
    (longest * 6 + 44).clamp(60, 190)
}

/// A chart over categories (starts, demes): each category has an inner range `0..1` where
/// several marks can stand side by side.
type CategoryChart<'a, 'b> = ChartContext<
    'a,
    SVGBackend<'b>,
    Cartesian2d<NestedRange<RangedCoordi32, RangedCoordf64>, RangedCoordf64>,
>;

/// Size and label placement of a category chart.
struct CategoryLayout {
    width: u32,
    height: u32,
    rotate: bool,
    x_area: u32,
}

impl CategoryLayout {
    /// `per_category` pixels for each of `labels`, a plot `plot_height` high.
    fn new(labels: &[String], per_category: u32, plot_height: u32) -> Self {
        let width = (200 + per_category * labels.len() as u32).clamp(600, 980);
        let rotate = needs_rotation(labels, width);
        let x_area = if rotate { rotated_area(labels) } else { 50 };
        Self {
            width,
            height: plot_height + x_area,
            rotate,
            x_area,
        }
    }
}

/// The axes of a category chart with `labels` under the x axis, `0..top` on the y axis.
fn category_chart<'a, 'b>(
    root: &'a Area<'b>,
    labels: &[String],
    layout: &CategoryLayout,
    top: f64,
    (x_desc, y_desc): (&str, &str),
) -> Result<CategoryChart<'a, 'b>, DrawError> {
    let mut chart = ChartBuilder::on(root)
        .margin(14)
        .x_label_area_size(layout.x_area)
        .y_label_area_size(80)
        .build_cartesian_2d(
            (0..category_count(labels.len())).nested_coord(|_| 0.0..1.0),
            0.0..top,
        )?;
    let name = |v: &NestedValue<i32, f64>| match v {
        NestedValue::Category(i) if !layout.rotate => {
            labels.get(*i as usize).cloned().unwrap_or_default()
        }
        _ => String::new(),
    };
    chart
        .configure_mesh()
        .disable_x_mesh()
        .light_line_style(TRANSPARENT)
        .bold_line_style(GRID)
        .x_labels(labels.len())
        .x_label_formatter(&name)
        .x_label_style(font(13))
        .y_label_style(font(13))
        .y_label_formatter(&|v| super::html::num(*v))
        .y_desc(y_desc)
        .x_desc(x_desc)
        .axis_desc_style(font(14))
        .draw()?;
    if layout.rotate {
        rotated_labels(
            root,
            labels.iter().enumerate().map(|(i, l)| {
                (
                    chart.backend_coord(&(NestedValue::Category(i as i32), 0.0)),
                    l.as_str(),
                )
            }),
            13,
        )?;
    }
    Ok(chart)
}

/// A dashed horizontal reference line at `value` across every category, with its legend.
fn reference_across<'a, 'b: 'a>(
    chart: &mut CategoryChart<'a, 'b>,
    categories: usize,
    value: f64,
    label: &str,
) -> Result<(), DrawError> {
    let last = category_count(categories);
    chart
        .draw_series(DashedLineSeries::new(
            [NestedValue::Value(0, 0.0), NestedValue::Value(last, 1.0)]
                .into_iter()
                .map(|x| (x, value)),
            8,
            5,
            REFERENCE.stroke_width(2),
        ))?
        .label(label)
        .legend(|(x, y)| dashed_sample!(x, y));
    Ok(())
}

/// The series legend, in a box at `position`.
fn legend<'a, 'b: 'a, CT: CoordTranslate>(
    chart: &mut ChartContext<'a, SVGBackend<'b>, CT>,
    position: SeriesLabelPosition,
) -> Result<(), DrawError> {
    chart
        .configure_series_labels()
        .position(position)
        .background_style(WHITE.mix(0.92))
        .border_style(GRID)
        .label_font(font(13))
        .draw()?;
    Ok(())
}

/// One start's estimate in [`fixation_by_start`].
#[derive(Debug, Clone)]
pub struct StartPoint {
    /// Deme id, `uniform` or `at_birth`.
    pub label: String,
    /// Fixation probability.
    pub p: f64,
    /// 95% interval, when the method gives one.
    pub ci95: Option<(f64, f64)>,
}

fn category_count(n: usize) -> i32 {
    i32::try_from(n).unwrap_or(i32::MAX).max(1) - 1
}

/// Fixation probability by start with its 95% interval, against the well-mixed reference.
pub fn fixation_by_start(points: &[StartPoint], well_mixed: Option<f64>) -> Result<String, String> {
    if points.is_empty() {
        return Err("no result to draw".to_owned());
    }
    let labels: Vec<String> = points.iter().map(|p| p.label.clone()).collect();
    let layout = CategoryLayout::new(&labels, 90, 300);
    let top = probability_top(
        points
            .iter()
            .flat_map(|p| [p.p, p.ci95.map_or(p.p, |c| c.1)])
            .chain(well_mixed),
    );
    svg(
        layout.width,
        layout.height,
        "fixation probability by start, with 95% intervals and the well-mixed reference",
        |root| {
            let mut chart = category_chart(
                root,
                &labels,
                &layout,
                top,
                ("start", "fixation probability"),
            )?;
            if let Some(wm) = well_mixed {
                reference_across(&mut chart, labels.len(), wm, "well-mixed reference")?;
            }
            let colour = series_colour(0);
            chart.draw_series(points.iter().enumerate().filter_map(|(i, p)| {
                let (lo, hi) = p.ci95?;
                Some(ErrorBar::new_vertical(
                    NestedValue::Value(i as i32, 0.5),
                    lo,
                    p.p,
                    hi,
                    colour.stroke_width(2),
                    12,
                ))
            }))?;
            chart
                .draw_series(points.iter().enumerate().map(|(i, p)| {
                    Circle::new((NestedValue::Value(i as i32, 0.5), p.p), 5, colour.filled())
                }))?
                .label("estimate (bars: 95% interval, when given)")
                .legend(move |(x, y)| Circle::new((x + 10, y), 5, colour.filled()));
            legend(&mut chart, SeriesLabelPosition::UpperRight)
        },
    )
}

/// One point of a curve against `s`: `s`, the fixation probability, its 95% interval.
pub type SPoint = (f64, f64, Option<(f64, f64)>);

/// One start's curve in [`fixation_against_s`].
#[derive(Debug, Clone)]
pub struct SCurve {
    /// Deme id, `uniform` or `at_birth`.
    pub label: String,
    /// `(s, fixation probability, 95% interval)` in increasing `s`.
    pub points: Vec<SPoint>,
}

/// Fixation probability against `s`, one curve per start, with the well-mixed reference.
pub fn fixation_against_s(curves: &[SCurve], well_mixed: &[(f64, f64)]) -> Result<String, String> {
    let all_s: Vec<f64> = curves
        .iter()
        .flat_map(|c| c.points.iter().map(|p| p.0))
        .chain(well_mixed.iter().map(|p| p.0))
        .collect();
    let lo = all_s.iter().copied().fold(f64::INFINITY, f64::min);
    let hi = all_s.iter().copied().fold(f64::NEG_INFINITY, f64::max);
    if !(lo.is_finite() && hi.is_finite() && hi > lo) {
        return Err("fewer than two values of s".to_owned());
    }
    let pad = (hi - lo) * 0.04;
    let top = probability_top(
        curves
            .iter()
            .flat_map(|c| c.points.iter().map(|p| p.2.map_or(p.1, |c| c.1).max(p.1)))
            .chain(well_mixed.iter().map(|p| p.1)),
    );
    svg(
        820,
        420,
        "fixation probability against the selection coefficient s, per start",
        |root| {
            let mut chart = ChartBuilder::on(root)
                .margin(14)
                .x_label_area_size(46)
                .y_label_area_size(72)
                .build_cartesian_2d((lo - pad)..(hi + pad), 0.0..top)?;
            chart
                .configure_mesh()
                .light_line_style(TRANSPARENT)
                .bold_line_style(GRID)
                .label_style(font(13))
                .y_label_formatter(&|v| super::html::num(*v))
                .x_label_formatter(&|v| super::html::num(*v))
                .x_desc("selection coefficient s")
                .y_desc("fixation probability")
                .axis_desc_style(font(14))
                .draw()?;
            if well_mixed.len() >= 2 {
                chart
                    .draw_series(DashedLineSeries::new(
                        well_mixed.iter().copied(),
                        8,
                        5,
                        REFERENCE.stroke_width(2),
                    ))?
                    .label("well-mixed reference")
                    .legend(|(x, y)| dashed_sample!(x, y));
            }
            for (i, curve) in curves.iter().enumerate() {
                let colour = series_colour(i);
                chart.draw_series(curve.points.iter().filter_map(|&(s, p, ci)| {
                    let (lo, hi) = ci?;
                    Some(ErrorBar::new_vertical(
                        s,
                        lo,
                        p,
                        hi,
                        colour.stroke_width(1),
                        8,
                    ))
                }))?;
                chart
                    .draw_series(LineSeries::new(
                        curve.points.iter().map(|&(s, p, _)| (s, p)),
                        colour.stroke_width(2),
                    ))?
                    .label(curve.label.clone())
                    .legend(move |(x, y)| {
                        PathElement::new(vec![(x, y), (x + 20, y)], colour.stroke_width(2))
                    });
                chart.draw_series(
                    curve
                        .points
                        .iter()
                        .map(|&(s, p, _)| Circle::new((s, p), 4, colour.filled())),
                )?;
            }
            legend(&mut chart, SeriesLabelPosition::UpperLeft)
        },
    )
}

/// Arrival times per deme in [`arrival_by_deme`]: for each deme (in order), the summary at
/// each fraction (in the order of `fractions`).
#[derive(Debug, Clone)]
pub struct ArrivalChart {
    /// Deme ids.
    pub demes: Vec<String>,
    /// The arrival fractions, as the document writes them.
    pub fractions: Vec<String>,
    /// `values[deme][fraction]`.
    pub values: Vec<Vec<Option<ArrivalSummary>>>,
    /// `generations` or `days`.
    pub unit: &'static str,
    /// The mean conditional fixation time of the result, as a reference line.
    pub mean_fixation: Option<f64>,
}

/// First-arrival time per deme: medians (and means, when given) with 5%-95% bars, one colour
/// per arrival fraction, and the mean fixation time as a reference line.
pub fn arrival_by_deme(chart_data: &ArrivalChart) -> Result<String, String> {
    let ArrivalChart {
        demes,
        fractions,
        values,
        unit,
        mean_fixation,
    } = chart_data;
    if demes.is_empty() || fractions.is_empty() {
        return Err("no arrival times to draw".to_owned());
    }
    let top = values
        .iter()
        .flatten()
        .flatten()
        .flat_map(|a| [a.q95, a.median, a.mean])
        .flatten()
        .chain(*mean_fixation)
        .fold(0.0f64, f64::max);
    let top = if top > 0.0 { top * HEADROOM } else { 1.0 };
    let layout = CategoryLayout::new(demes, 110, 320);
    svg(
        layout.width,
        layout.height,
        "first-arrival time per deme, medians with 5% to 95% bars per arrival fraction",
        |root| {
            let y_desc = format!("first arrival, {unit}");
            let mut chart = category_chart(root, demes, &layout, top, ("deme", &y_desc))?;
            if let Some(t) = mean_fixation {
                reference_across(
                    &mut chart,
                    demes.len(),
                    *t,
                    "mean fixation time (whole population)",
                )?;
            }
            let k = fractions.len();
            let offset = |f: usize| (f as f64 + 0.5) / k as f64 * 0.8 + 0.1;
            for (f, fraction) in fractions.iter().enumerate() {
                let colour = series_colour(f);
                let at = |d: usize| NestedValue::Value(d as i32, offset(f));
                chart.draw_series(values.iter().enumerate().filter_map(|(d, row)| {
                    let a = row.get(f).copied().flatten()?;
                    let (lo, hi) = (a.q05?, a.q95?);
                    let mid = a.median.or(a.mean)?;
                    Some(ErrorBar::new_vertical(
                        at(d),
                        lo,
                        mid,
                        hi,
                        colour.stroke_width(2),
                        8,
                    ))
                }))?;
                chart
                    .draw_series(values.iter().enumerate().filter_map(|(d, row)| {
                        let m = row.get(f).copied().flatten()?.median?;
                        Some(Circle::new((at(d), m), 4, colour.filled()))
                    }))?
                    .label(format!("fraction {fraction}: median, 5%-95%"))
                    .legend(move |(x, y)| Circle::new((x + 10, y), 4, colour.filled()));
                let means: Vec<_> = values
                    .iter()
                    .enumerate()
                    .filter_map(|(d, row)| Some((at(d), row.get(f).copied().flatten()?.mean?)))
                    .collect();
                if !means.is_empty() {
                    chart
                        .draw_series(
                            means
                                .into_iter()
                                .map(|p| TriangleMarker::new(p, 6, colour.stroke_width(2))),
                        )?
                        .label(format!("fraction {fraction}: mean"))
                        .legend(move |(x, y)| {
                            TriangleMarker::new((x + 10, y), 6, colour.stroke_width(2))
                        });
                }
            }
            legend(&mut chart, SeriesLabelPosition::UpperLeft)
        },
    )
}

/// The colour of effect `x` on a diverging scale symmetric about 0 with bound `bound`:
/// blue for negative (reducing the link lowers the fixation probability), orange for
/// positive, near white at 0.
pub fn diverging(x: f64, bound: f64) -> RGBColor {
    let t = if bound > 0.0 {
        (x / bound).clamp(-1.0, 1.0)
    } else {
        0.0
    };
    let mid = (0xf7, 0xf7, 0xf5);
    let end = if t < 0.0 {
        (0x1d, 0x4f, 0x91)
    } else {
        (0xb3, 0x4a, 0x0c)
    };
    let a = t.abs().powf(0.8);
    let mix = |m: u8, e: u8| (m as f64 + (e as f64 - m as f64) * a).round() as u8;
    RGBColor(mix(mid.0, end.0), mix(mid.1, end.1), mix(mid.2, end.2))
}

/// The matrix heatmap of link effects: row = source deme (the lineage moves from), column =
/// target deme (it moves to), colour = effect on the fixation probability; grey = no value.
/// A colour bar beside it is the legend.
pub fn sensitivity_heatmap(
    demes: &[String],
    cells: &[(usize, usize, f64)],
) -> Result<String, String> {
    let m = demes.len();
    if m == 0 || cells.is_empty() {
        return Err("no link effects to draw".to_owned());
    }
    let bound = cells.iter().map(|c| c.2.abs()).fold(0.0f64, f64::max);
    let longest = demes.iter().map(String::len).max().unwrap_or(4) as u32;
    let label_area = (longest * 6 + 30).clamp(50, 190);
    let cell = (520 / m as u32).clamp(12, 64);
    let grid = cell * m as u32;
    let legend_width = 150;
    let width = label_area + grid + legend_width + 40;
    let height = label_area + grid + 70;
    svg(
        width,
        height,
        "heatmap of link effects on the fixation probability, rows = source deme, columns = target deme",
        |root| {
            let (left, right) = root.split_horizontally(width - legend_width);
            let last = category_count(m);
            let label_size = if cell < 18 { 10 } else { 13 };
            let mut chart = ChartBuilder::on(&left)
                .margin(14)
                .margin_top(20)
                .x_label_area_size(label_area)
                .y_label_area_size(label_area)
                .build_cartesian_2d((0..last).into_segmented(), (0..last).into_segmented())?;
            let y_name = |v: &SegmentValue<i32>| match v {
                SegmentValue::CenterOf(k) => (m as i32 - 1 - *k)
                    .try_into()
                    .ok()
                    .and_then(|i: usize| demes.get(i).cloned())
                    .unwrap_or_default(),
                _ => String::new(),
            };
            chart
                .configure_mesh()
                .disable_mesh()
                .x_labels(m)
                .y_labels(m)
                .x_label_formatter(&|_| String::new())
                .y_label_formatter(&y_name)
                .y_label_style(font(label_size))
                .x_desc("target deme (the lineage moves to)")
                .y_desc("source deme (the lineage moves from)")
                .axis_desc_style(font(14))
                .draw()?;
            rotated_labels(
                root,
                demes.iter().enumerate().map(|(j, d)| {
                    (
                        chart.backend_coord(&(
                            SegmentValue::CenterOf(j as i32),
                            SegmentValue::Exact(0),
                        )),
                        d.as_str(),
                    )
                }),
                label_size,
            )?;
            let mut value = vec![None; m * m];
            for &(i, j, x) in cells {
                if i < m && j < m {
                    value[i * m + j] = Some(x);
                }
            }
            chart.draw_series((0..m).flat_map(|i| (0..m).map(move |j| (i, j))).map(
                |(i, j)| {
                    let y = (m - 1 - i) as i32;
                    let colour = value[i * m + j].map_or(EMPTY_CELL, |x| diverging(x, bound));
                    Rectangle::new(
                        [
                            (SegmentValue::Exact(j as i32), SegmentValue::Exact(y)),
                            (SegmentValue::Exact(j as i32 + 1), SegmentValue::Exact(y + 1)),
                        ],
                        colour.filled(),
                    )
                },
            ))?;
            // thin white separators between cells
            chart.draw_series((0..m).flat_map(|i| (0..m).map(move |j| (i, j))).map(
                |(i, j)| {
                    let y = (m - 1 - i) as i32;
                    Rectangle::new(
                        [
                            (SegmentValue::Exact(j as i32), SegmentValue::Exact(y)),
                            (SegmentValue::Exact(j as i32 + 1), SegmentValue::Exact(y + 1)),
                        ],
                        WHITE.stroke_width(1),
                    )
                },
            ))?;
            let bound = if bound > 0.0 { bound } else { 1.0 };
            let mut bar = ChartBuilder::on(&right)
                .margin(14)
                .margin_top(20)
                .margin_bottom(label_area as i32 + 14)
                .y_label_area_size(78)
                .build_cartesian_2d(0.0..1.0, -bound..bound)?;
            bar.configure_mesh()
                .disable_mesh()
                .disable_x_axis()
                .y_labels(7)
                .y_label_formatter(&|v| {
                    // a tick at 0 may come out as a rounding residue of the bounds
                    super::html::num(if v.abs() < bound * 1e-9 { 0.0 } else { *v })
                })
                .y_label_style(font(12))
                .y_desc("effect on fixation probability")
                .axis_desc_style(font(13))
                .draw()?;
            let steps = 60;
            let step = 2.0 * bound / steps as f64;
            bar.draw_series((0..steps).map(|k| {
                let a = -bound + step * k as f64;
                // each band overlaps the next a little, so no seam shows between them
                let b = (a + step * 1.5).min(bound);
                Rectangle::new(
                    [(0.0, a), (1.0, b)],
                    diverging(a + step / 2.0, bound).filled(),
                )
            }))?;
            let (x_mid, y_top) = bar.backend_coord(&(0.5, bound));
            let (_, y_bottom) = bar.backend_coord(&(0.5, -bound));
            let end = font(11).pos(Pos::new(HPos::Center, VPos::Bottom));
            root.draw(&Text::new("raises", (x_mid, y_top - 3), end.clone()))?;
            root.draw(&Text::new(
                "lowers",
                (x_mid, y_bottom + 4),
                font(11).pos(Pos::new(HPos::Center, VPos::Top)),
            ))?;
            Ok(())
        },
    )
}

/// One bar of [`change_intervals`].
#[derive(Debug, Clone)]
pub struct ChangeBar {
    /// What changed (`s = 0.02, deme-a`).
    pub label: String,
    /// The change.
    pub change: f64,
    /// Its 95% interval.
    pub ci95: Option<(f64, f64)>,
    /// Whether the change report flags it.
    pub flagged: bool,
}

/// Changes with their 95% intervals as horizontal bars, flagged ones in their own colour, and
/// the flagging threshold as dashed lines at `±threshold`.
pub fn change_intervals(bars: &[ChangeBar], threshold: Option<f64>) -> Result<String, String> {
    if bars.is_empty() {
        return Err("no changes to draw".to_owned());
    }
    let reach = bars
        .iter()
        .flat_map(|b| {
            let (lo, hi) = b.ci95.unwrap_or((b.change, b.change));
            [b.change.abs(), lo.abs(), hi.abs()]
        })
        .chain(threshold)
        .fold(0.0f64, f64::max);
    let reach = if reach > 0.0 { reach * 1.15 } else { 1.0 };
    let longest = bars.iter().map(|b| b.label.len()).max().unwrap_or(4) as u32;
    let label_area = (longest * 7 + 20).clamp(60, 260);
    let height = 90 + 26 * bars.len() as u32;
    svg(
        820,
        height,
        "changes of the fixation probability between two runs, with 95% intervals",
        |root| {
            let last = category_count(bars.len());
            let mut chart = ChartBuilder::on(root)
                .margin(14)
                .x_label_area_size(44)
                .y_label_area_size(label_area)
                .build_cartesian_2d(-reach..reach, (0..last).into_segmented())?;
            let name = |v: &SegmentValue<i32>| match v {
                SegmentValue::CenterOf(k) => (last - *k)
                    .try_into()
                    .ok()
                    .and_then(|i: usize| bars.get(i))
                    .map(|b| b.label.clone())
                    .unwrap_or_default(),
                _ => String::new(),
            };
            chart
                .configure_mesh()
                .disable_y_mesh()
                .light_line_style(TRANSPARENT)
                .bold_line_style(GRID)
                .y_labels(bars.len())
                .y_label_formatter(&name)
                .label_style(font(12))
                .x_label_formatter(&|v| {
                    // a tick at 0 may come out as a rounding residue of the bounds
                    super::html::num(if v.abs() < reach * 1e-9 { 0.0 } else { *v })
                })
                .x_desc("change of the fixation probability (to minus from)")
                .axis_desc_style(font(13))
                .draw()?;
            let row = |i: usize| SegmentValue::CenterOf(last - i as i32);
            chart.draw_series(DashedLineSeries::new(
                [
                    (0.0, SegmentValue::Exact(0)),
                    (0.0, SegmentValue::Exact(last + 1)),
                ],
                4,
                3,
                REFERENCE.stroke_width(1),
            ))?;
            if let Some(t) = threshold.filter(|t| *t > 0.0) {
                for x in [-t, t] {
                    chart.draw_series(DashedLineSeries::new(
                        [
                            (x, SegmentValue::Exact(0)),
                            (x, SegmentValue::Exact(last + 1)),
                        ],
                        8,
                        5,
                        FLAGGED.stroke_width(1),
                    ))?;
                }
            }
            for (i, b) in bars.iter().enumerate() {
                let colour = if b.flagged { FLAGGED } else { series_colour(0) };
                if let Some((lo, hi)) = b.ci95 {
                    chart.draw_series(std::iter::once(ErrorBar::new_horizontal(
                        row(i),
                        lo,
                        b.change,
                        hi,
                        colour.stroke_width(2),
                        10,
                    )))?;
                }
                chart.draw_series(std::iter::once(Circle::new(
                    (b.change, row(i)),
                    5,
                    colour.filled(),
                )))?;
            }
            Ok(())
        },
    )
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn a_chart_is_one_labelled_svg_element_with_text_and_no_addresses_but_the_namespace() {
        let svg = fixation_by_start(
            &[
                StartPoint {
                    label: "north".to_owned(),
                    p: 0.1,
                    ci95: Some((0.08, 0.12)),
                },
                StartPoint {
                    label: "uniform".to_owned(),
                    p: 0.05,
                    ci95: None,
                },
            ],
            Some(0.07),
        )
        .unwrap();
        assert!(svg.starts_with("<svg role=\"img\""), "{svg}");
        assert_eq!(svg.matches("<svg").count(), 1);
        assert!(svg.contains(">\nnorth\n</text>") || svg.contains("north"));
        assert_eq!(svg.matches("http").count(), 1, "only xmlns");
        assert!(svg.contains("fixation probability"));
    }

    #[test]
    fn the_diverging_scale_is_white_at_zero_and_saturates_at_the_bound() {
        assert_eq!(diverging(0.0, 1.0), RGBColor(0xf7, 0xf7, 0xf5));
        assert_eq!(diverging(-1.0, 1.0), RGBColor(0x1d, 0x4f, 0x91));
        assert_eq!(diverging(5.0, 1.0), RGBColor(0xb3, 0x4a, 0x0c));
        assert_eq!(diverging(0.3, 0.0), RGBColor(0xf7, 0xf7, 0xf5));
    }

    #[test]
    fn empty_inputs_are_reasons_not_panics() {
        assert!(fixation_by_start(&[], None).is_err());
        assert!(fixation_against_s(&[], &[(0.1, 0.2)]).is_err());
        assert!(sensitivity_heatmap(&[], &[]).is_err());
        assert!(change_intervals(&[], Some(0.01)).is_err());
    }
}
