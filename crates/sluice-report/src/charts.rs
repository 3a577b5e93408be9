//! Charts drawn from released tables only, as inline SVG (plotters, SVG backend).
//!
//! | chart | table | drawn |
//! |---|---|---|
//! | intervals over time | `intervals_by_month` | q10–q90 and q25–q75 bands, median line, by month |
//! | histograms | `histograms` | per analyte (and other dimension margins), windows overlaid, share of results per standard bin width; the caller's [`ShadeZone`]s shaded; merged bins marked "M" |
//! | paired differences | `worst_paired` | a forest plot per analyte and statistic, one row per subgroup |
//! | critical results | `critical_results` | bars per window (or month) and context: the rate per 100 patient-years with its interval where released, else the number of results |
//! | travel | `travel` | bars per subgroup of each released magnitude (miles, kg CO2e saved per year) |
//! | medians by month | `distributions` with `month` and `setting` | the median by month, one line per setting, per analyte |
//!
//! Dimensions a chart does not draw are restricted to their `all` margin where the table has
//! one. A withheld row, or a value disclosure control set to null, is never drawn: a line or band
//! is broken there, and a bar is replaced by a "w" mark. A chart with nothing released is
//! replaced by a note. Nothing is computed from patient-level data; the only arithmetic is on
//! released values (a histogram bar's share of the released results of its window).

use crate::ShadeZone;
use crate::forest::{ForestOptions, ForestRow, forest_svg_with};
use crate::html::escape;
use crate::view::{View, distinct, num};
use plotters::coord::Shift;
use plotters::prelude::*;
use plotters::style::text_anchor::{HPos, Pos, VPos};
use sluice_aggregate::{ALL, Role};
use sluice_disclose::{CheckedTable, Status};
use std::fmt::Write as _;

pub(crate) type Area<'a> = DrawingArea<SVGBackend<'a>, Shift>;
pub(crate) type DrawResult = Result<(), Box<dyn std::error::Error>>;

pub(crate) const INK: RGBColor = RGBColor(40, 40, 40);
const PALETTE: [RGBColor; 6] = [
    RGBColor(31, 119, 180),
    RGBColor(230, 120, 20),
    RGBColor(44, 150, 44),
    RGBColor(148, 103, 189),
    RGBColor(140, 86, 75),
    RGBColor(200, 60, 140),
];
const ZONE: RGBColor = RGBColor(214, 39, 40);
const WIDTH: u32 = 760;
/// At most this many panels of one chart kind; beyond it the tables stand alone.
const MAX_PANELS: usize = 24;

fn colour(i: usize) -> RGBColor {
    PALETTE[i % PALETTE.len()]
}

pub(crate) fn font(size: u32) -> FontDesc<'static> {
    ("sans-serif", size).into_font()
}

/// Draws into a fresh SVG string; `None` if plotters reports an error.
pub(crate) fn draw_svg(
    size: (u32, u32),
    f: impl FnOnce(&Area<'_>) -> DrawResult,
) -> Option<String> {
    let mut buf = String::new();
    {
        let root = SVGBackend::with_string(&mut buf, size).into_drawing_area();
        root.fill(&WHITE).ok()?;
        f(&root).ok()?;
        root.present().ok()?;
    }
    Some(buf)
}

pub(crate) fn text_at(root: &Area<'_>, s: &str, pos: (i32, i32), size: u32, h: HPos) -> DrawResult {
    let style = TextStyle::from(font(size))
        .color(&INK)
        .pos(Pos::new(h, VPos::Center));
    root.draw(&Text::new(s.to_string(), pos, style))?;
    Ok(())
}

/// The range of `xs` widened by 5 % on each side (and to a unit range when flat).
pub(crate) fn padded(xs: &[f64]) -> (f64, f64) {
    let lo = xs.iter().copied().fold(f64::INFINITY, f64::min);
    let hi = xs.iter().copied().fold(f64::NEG_INFINITY, f64::max);
    if !lo.is_finite() || !hi.is_finite() {
        return (0.0, 1.0);
    }
    if hi - lo < 1e-12 {
        return (lo - 0.5, hi + 0.5);
    }
    let pad = (hi - lo) * 0.05;
    (lo - pad, hi + pad)
}

/// A chart, or the note saying why it is not drawn.
#[derive(Clone, Debug, PartialEq)]
pub struct Figure {
    pub title: String,
    /// The released table it is drawn from.
    pub source: String,
    pub svg: Option<String>,
    pub caption: String,
}

impl Figure {
    fn note(title: String, source: &str, why: &str) -> Figure {
        Figure {
            title,
            source: source.into(),
            svg: None,
            caption: why.into(),
        }
    }

    pub(crate) fn write(&self, out: &mut String) {
        let _ = writeln!(out, "<h3>{}</h3>", escape(&self.title));
        match &self.svg {
            Some(svg) => {
                let _ = writeln!(
                    out,
                    "<figure>\n{svg}\n<figcaption>{} Drawn from released table <a href=\"#t-{}\"><code>{}</code></a>.</figcaption>\n</figure>",
                    escape(&self.caption),
                    escape(&self.source),
                    escape(&self.source)
                );
            }
            None => {
                let _ = writeln!(
                    out,
                    "<p class=\"note\">Not drawn: {} (table <a href=\"#t-{}\"><code>{}</code></a>).</p>",
                    escape(&self.caption),
                    escape(&self.source),
                    escape(&self.source)
                );
            }
        }
    }
}

/// Every chart the tables allow, in a fixed order.
pub fn all(tables: &[CheckedTable], zones: &[ShadeZone]) -> Vec<Figure> {
    let get = |n: &str| tables.iter().find(|t| t.name() == n);
    let mut out = Vec::new();
    if let Some(t) = get("intervals_by_month") {
        out.push(intervals_over_time(t));
    }
    if let Some(t) = get("histograms") {
        out.extend(histograms(t, zones));
    }
    if let Some(t) = get("worst_paired") {
        out.extend(paired_forests(t));
    }
    if let Some(t) = get("critical_results") {
        out.push(critical(t));
    }
    if let Some(t) = get("travel") {
        out.extend(travel(t));
    }
    if let Some(t) = get("distributions")
        && t.column("month").is_some()
        && t.column("setting").is_some()
    {
        out.extend(medians_by_month(t));
    }
    out
}

fn all_withheld(t: &CheckedTable) -> bool {
    t.status().iter().all(Status::is_withheld)
}

// ---------------------------------------------------------------------------------------------
// Time charts: bands and lines by month.

struct Band {
    label: String,
    colour: RGBColor,
    alpha: f64,
    values: Vec<Option<(f64, f64)>>,
}

struct Line {
    label: String,
    colour: RGBColor,
    values: Vec<Option<f64>>,
}

/// Runs of consecutive indices where `present` holds.
fn runs(n: usize, present: impl Fn(usize) -> bool) -> Vec<Vec<usize>> {
    let mut out: Vec<Vec<usize>> = Vec::new();
    let mut cur: Vec<usize> = Vec::new();
    for i in 0..n {
        if present(i) {
            cur.push(i);
        } else if !cur.is_empty() {
            out.push(std::mem::take(&mut cur));
        }
    }
    if !cur.is_empty() {
        out.push(cur);
    }
    out
}

/// `zero`: the y axis starts at 0 (counts, days); otherwise it fits the values (medians).
fn time_chart(
    title: &str,
    months: &[String],
    bands: &[Band],
    lines: &[Line],
    y_desc: &str,
    zero: bool,
) -> Option<String> {
    let mut ys: Vec<f64> = bands
        .iter()
        .flat_map(|b| b.values.iter().flatten().flat_map(|(l, h)| [*l, *h]))
        .collect();
    ys.extend(
        lines
            .iter()
            .flat_map(|l| l.values.iter().flatten().copied()),
    );
    if ys.is_empty() {
        return None;
    }
    if zero {
        ys.push(0.0);
    }
    let (y0, y1) = padded(&ys);
    let y0 = if zero {
        y0.max(0.0).min(ys.iter().copied().fold(0.0, f64::min))
    } else {
        y0
    };
    // Headroom for the legend.
    let y1 = y1 + 0.3 * (y1 - y0);
    let n = months.len();
    draw_svg((WIDTH, 380), |root| {
        let mut chart = ChartBuilder::on(root)
            .caption(title, font(15))
            .margin(12)
            .x_label_area_size(40)
            .y_label_area_size(56)
            .build_cartesian_2d(-0.5..(n as f64 - 0.5), y0..y1)?;
        chart
            .configure_mesh()
            .x_labels(0)
            .disable_x_mesh()
            .y_labels(6)
            .y_label_formatter(&|y| num(*y))
            .y_desc(y_desc)
            .label_style(font(12))
            .axis_desc_style(font(12))
            .light_line_style(RGBColor(238, 238, 238))
            .max_light_lines(1)
            .draw()?;
        let step = n.div_ceil(10).max(1);
        for (i, m) in months.iter().enumerate() {
            if i % step == 0 {
                let (px, py) = chart.backend_coord(&(i as f64, y0));
                text_at(root, m, (px, py + 14), 11, HPos::Center)?;
            }
        }
        for b in bands {
            let c = b.colour;
            for run in runs(n, |i| b.values[i].is_some()) {
                let mut pts: Vec<(f64, f64)> = run
                    .iter()
                    .map(|&i| (i as f64, b.values[i].expect("run").1))
                    .collect();
                pts.extend(
                    run.iter()
                        .rev()
                        .map(|&i| (i as f64, b.values[i].expect("run").0)),
                );
                if run.len() == 1 {
                    // A single month: a short bar so the band is visible.
                    let i = run[0] as f64;
                    let (lo, hi) = b.values[run[0]].expect("run");
                    pts = vec![(i - 0.2, hi), (i + 0.2, hi), (i + 0.2, lo), (i - 0.2, lo)];
                }
                chart.draw_series(std::iter::once(Polygon::new(pts, c.mix(b.alpha).filled())))?;
            }
            // Legend entry (an empty series carries it).
            let alpha = b.alpha;
            chart
                .draw_series(std::iter::empty::<Polygon<(f64, f64)>>())?
                .label(b.label.as_str())
                .legend(move |(x, y)| {
                    Rectangle::new([(x, y - 5), (x + 16, y + 5)], c.mix(alpha).filled())
                });
        }
        for l in lines {
            let c = l.colour;
            for run in runs(n, |i| l.values[i].is_some()) {
                let pts: Vec<(f64, f64)> = run
                    .iter()
                    .map(|&i| (i as f64, l.values[i].expect("run")))
                    .collect();
                chart.draw_series(LineSeries::new(pts.clone(), c.stroke_width(2)))?;
                chart.draw_series(pts.into_iter().map(|p| Circle::new(p, 2, c.filled())))?;
            }
            let label = if l.values.iter().all(Option::is_none) {
                format!("{} (withheld)", l.label)
            } else {
                l.label.clone()
            };
            chart
                .draw_series(std::iter::empty::<Circle<(f64, f64), i32>>())?
                .label(label)
                .legend(move |(x, y)| {
                    PathElement::new(vec![(x, y), (x + 16, y)], c.stroke_width(2))
                });
        }
        chart
            .configure_series_labels()
            .position(SeriesLabelPosition::UpperRight)
            .label_font(font(12))
            .background_style(WHITE.mix(0.85))
            .border_style(RGBColor(160, 160, 160))
            .draw()?;
        Ok(())
    })
}

/// Months of the rows in ascending order, without the `all` margin.
fn months_of(v: &View<'_>, rows: &[usize], mc: usize) -> Vec<String> {
    let mut ms = distinct(
        rows.iter()
            .map(|&r| v.text(r, mc))
            .filter(|m| m != ALL && !m.is_empty()),
    );
    ms.sort();
    ms
}

fn intervals_over_time(t: &CheckedTable) -> Figure {
    let title = "Monitoring intervals over time".to_string();
    let v = View::new(t);
    let (Some(mc), Some(q50)) = (v.col("month"), v.quantile(0.5)) else {
        return Figure::note(title, t.name(), "the table has no month or median column");
    };
    if all_withheld(t) {
        return Figure::note(title, t.name(), "every row is withheld");
    }
    let rows = v.margin_rows(&["month"]);
    let months = months_of(&v, &rows, mc);
    let row_of = |m: &str| rows.iter().copied().find(|&r| v.text(r, mc) == m);
    let series = |c: Option<usize>| -> Vec<Option<f64>> {
        months
            .iter()
            .map(|m| c.and_then(|c| row_of(m).and_then(|r| v.num(r, c))))
            .collect()
    };
    let pair = |a: Vec<Option<f64>>, b: Vec<Option<f64>>| -> Vec<Option<(f64, f64)>> {
        a.into_iter().zip(b).map(|(a, b)| Some((a?, b?))).collect()
    };
    let mut bands = Vec::new();
    let blue = colour(0);
    if let (Some(a), Some(b)) = (v.quantile(0.1), v.quantile(0.9)) {
        bands.push(Band {
            label: "10th–90th percentile".into(),
            colour: blue,
            alpha: 0.18,
            values: pair(series(Some(a)), series(Some(b))),
        });
    }
    if let (Some(a), Some(b)) = (v.quantile(0.25), v.quantile(0.75)) {
        bands.push(Band {
            label: "25th–75th percentile".into(),
            colour: blue,
            alpha: 0.38,
            values: pair(series(Some(a)), series(Some(b))),
        });
    }
    let lines = [Line {
        label: "median".into(),
        colour: RGBColor(15, 50, 110),
        values: series(Some(q50)),
    }];
    if lines[0].values.iter().all(Option::is_none)
        && bands.iter().all(|b| b.values.iter().all(Option::is_none))
    {
        return Figure::note(title, t.name(), "no quantile of any month is released");
    }
    match time_chart(&title, &months, &bands, &lines, "days between monitoring events", true) {
        Some(svg) => Figure {
            title,
            source: t.name().into(),
            svg: Some(svg),
            caption: "Quantile bands of the days between successive monitoring events, by the month of the event ending each interval. Months where a quantile is withheld break the band or line.".into(),
        },
        None => Figure::note(title, t.name(), "the chart could not be drawn"),
    }
}

fn medians_by_month(t: &CheckedTable) -> Vec<Figure> {
    let v = View::new(t);
    let (Some(mc), Some(sc), Some(ac), Some(q50)) = (
        v.col("month"),
        v.col("setting"),
        v.col("analyte"),
        v.quantile(0.5),
    ) else {
        return Vec::new();
    };
    if all_withheld(t) {
        return vec![Figure::note(
            "Median result by month and setting".into(),
            t.name(),
            "every row is withheld",
        )];
    }
    let rows = v.margin_rows(&["month", "setting", "analyte"]);
    let months = months_of(&v, &rows, mc);
    let analytes = distinct(rows.iter().map(|&r| v.text(r, ac)));
    let mut out = Vec::new();
    for a in analytes.iter().take(MAX_PANELS) {
        let title = format!("Median {a} by month and setting");
        let ar: Vec<usize> = rows
            .iter()
            .copied()
            .filter(|&r| &v.text(r, ac) == a)
            .collect();
        let settings = distinct(ar.iter().map(|&r| v.text(r, sc)));
        let lines: Vec<Line> = settings
            .iter()
            .enumerate()
            .map(|(i, s)| Line {
                label: if s == ALL {
                    "all settings".into()
                } else {
                    s.clone()
                },
                colour: colour(i),
                values: months
                    .iter()
                    .map(|m| {
                        ar.iter()
                            .copied()
                            .find(|&r| &v.text(r, mc) == m && &v.text(r, sc) == s)
                            .and_then(|r| v.num(r, q50))
                    })
                    .collect(),
            })
            .collect();
        if lines.iter().all(|l| l.values.iter().all(Option::is_none)) {
            out.push(Figure::note(title, t.name(), "no median is released"));
            continue;
        }
        match time_chart(&title, &months, &[], &lines, &format!("median {a}"), false) {
            Some(svg) => out.push(Figure {
                title,
                source: t.name().into(),
                svg: Some(svg),
                caption: "The released median (type 7) of the results in each month, one line per setting; a withheld median breaks its line.".into(),
            }),
            None => out.push(Figure::note(title, t.name(), "the chart could not be drawn")),
        }
    }
    out
}

// ---------------------------------------------------------------------------------------------
// Histograms.

struct Bin {
    lower: Option<f64>,
    upper: Option<f64>,
    n: Option<f64>,
    merged: bool,
}

fn histograms(t: &CheckedTable, zones: &[ShadeZone]) -> Vec<Figure> {
    let v = View::new(t);
    let title0 = "Histograms".to_string();
    let (Some(lc), Some(uc)) = (v.col("bin_lower"), v.col("bin_upper")) else {
        return vec![Figure::note(title0, t.name(), "the table has no bin edges")];
    };
    let Some(nc) = v
        .col("n_results")
        .or_else(|| v.col(sluice_disclose::PATIENTS))
    else {
        return vec![Figure::note(title0, t.name(), "the table has no counts")];
    };
    if all_withheld(t) {
        return vec![Figure::note(title0, t.name(), "every row is withheld")];
    }
    let wc = v.col("window");
    let rows = v.margin_rows(&["analyte", "window", "bin_lower", "bin_upper"]);
    let panel_dims: Vec<usize> = v
        .dims()
        .into_iter()
        .filter(|&c| c != lc && c != uc && Some(c) != wc)
        .collect();
    let key = |r: usize| -> Vec<String> { panel_dims.iter().map(|&c| v.text(r, c)).collect() };
    let panels = distinct(rows.iter().map(|&r| key(r).join("\u{1f}")));
    if panels.len() > MAX_PANELS {
        return vec![Figure::note(
            title0,
            t.name(),
            &format!(
                "{} histograms are too many to draw; they are in the table",
                panels.len()
            ),
        )];
    }
    let ac = v.col("analyte");
    let mut out = Vec::new();
    for p in &panels {
        let pr: Vec<usize> = rows
            .iter()
            .copied()
            .filter(|&r| &key(r).join("\u{1f}") == p)
            .collect();
        let label = key(pr[0])
            .into_iter()
            .zip(&panel_dims)
            .filter(|(x, _)| x != ALL)
            .map(|(x, &c)| {
                if Some(c) == ac {
                    x
                } else {
                    format!("{} {x}", t.columns()[c].name)
                }
            })
            .collect::<Vec<_>>()
            .join(", ");
        let title = format!("Histogram: {label}");
        let analyte = ac.map(|c| v.text(pr[0], c)).unwrap_or_default();
        let windows = match wc {
            Some(wc) => distinct(pr.iter().map(|&r| v.text(r, wc))),
            None => vec![String::new()],
        };
        let series: Vec<(String, Vec<Bin>)> = windows
            .iter()
            .map(|w| {
                let bins = pr
                    .iter()
                    .copied()
                    .filter(|&r| wc.is_none_or(|wc| &v.text(r, wc) == w))
                    .map(|r| Bin {
                        lower: t.rows()[r][lc].as_f64(),
                        upper: t.rows()[r][uc].as_f64(),
                        n: v.num(r, nc),
                        merged: t.status()[r] == Status::Merged,
                    })
                    .collect();
                (w.clone(), bins)
            })
            .collect();
        if series.iter().all(|(_, b)| b.iter().all(|b| b.n.is_none())) {
            out.push(Figure::note(title, t.name(), "every bin is withheld"));
            continue;
        }
        let zone: Vec<&ShadeZone> = zones.iter().filter(|z| z.analyte == analyte).collect();
        match histogram_svg(&title, &series, &zone) {
            Some(svg) => out.push(Figure {
                title,
                source: t.name().into(),
                svg: Some(svg),
                caption: histogram_caption(&zone),
            }),
            None => out.push(Figure::note(
                title,
                t.name(),
                "the chart could not be drawn",
            )),
        }
    }
    out
}

fn histogram_caption(zone: &[&ShadeZone]) -> String {
    let mut s = String::from(
        "Each window's released results as a share of that window's released results, per standard bin width (a merged or open bin is spread over its width; M marks merged bins; open tails are drawn one standard width wide). Withheld bins are not drawn.",
    );
    for z in zone {
        let mut parts = Vec::new();
        if let Some(b) = z.below {
            parts.push(format!("below {}", num(b)));
        }
        if let Some(a) = z.above {
            parts.push(format!("above {}", num(a)));
        }
        let _ = write!(
            s,
            " Shaded: {} ({}), from local policy.",
            z.label,
            parts.join(" and ")
        );
    }
    s
}

fn histogram_svg(
    title: &str,
    series: &[(String, Vec<Bin>)],
    zones: &[&ShadeZone],
) -> Option<String> {
    let mut widths: Vec<f64> = series
        .iter()
        .flat_map(|(_, b)| b.iter())
        .filter(|b| !b.merged)
        .filter_map(|b| Some(b.upper? - b.lower?))
        .filter(|w| *w > 0.0)
        .collect();
    widths.sort_by(f64::total_cmp);
    let w = widths.get(widths.len() / 2).copied().unwrap_or(1.0);
    let edges: Vec<f64> = series
        .iter()
        .flat_map(|(_, b)| b.iter())
        .flat_map(|b| [b.lower, b.upper])
        .flatten()
        .collect();
    if edges.is_empty() {
        return None;
    }
    let lo = edges.iter().copied().fold(f64::INFINITY, f64::min) - w;
    let hi = edges.iter().copied().fold(f64::NEG_INFINITY, f64::max) + w;
    // Bars: (x0, x1, height %, merged) per series.
    let bars: Vec<Vec<(f64, f64, f64, bool)>> = series
        .iter()
        .map(|(_, bins)| {
            let total: f64 = bins.iter().filter_map(|b| b.n).sum();
            bins.iter()
                .filter_map(|b| {
                    let n = b.n?;
                    let x0 = b.lower.unwrap_or(lo);
                    let x1 = b.upper.unwrap_or(hi);
                    let width = if b.lower.is_none() || b.upper.is_none() {
                        w
                    } else {
                        (x1 - x0).max(1e-12)
                    };
                    (total > 0.0).then(|| (x0, x1, 100.0 * n / total * w / width, b.merged))
                })
                .collect()
        })
        .collect();
    let ymax = bars
        .iter()
        .flatten()
        .map(|b| b.2)
        .fold(0.0f64, f64::max)
        .max(1.0)
        * 1.3;
    draw_svg((WIDTH, 380), |root| {
        let mut chart = ChartBuilder::on(root)
            .caption(title, font(15))
            .margin(12)
            .x_label_area_size(40)
            .y_label_area_size(56)
            .build_cartesian_2d(lo..hi, 0.0..ymax)?;
        chart
            .configure_mesh()
            .x_labels(9)
            .y_labels(6)
            .x_label_formatter(&|x| num(*x))
            .y_label_formatter(&|y| num(*y))
            .y_desc(format!("% of results per bin of width {}", num(w)))
            .x_desc("result")
            .label_style(font(12))
            .axis_desc_style(font(12))
            .light_line_style(RGBColor(238, 238, 238))
            .max_light_lines(1)
            .draw()?;
        for z in zones {
            let mut shaded = false;
            for (a, b) in [
                (z.below.map(|b| (lo, b.min(hi)))),
                (z.above.map(|a| (a.max(lo), hi))),
            ]
            .into_iter()
            .flatten()
            .map(|p| (p.0, p.1))
            {
                if b > a {
                    chart.draw_series(std::iter::once(Rectangle::new(
                        [(a, 0.0), (b, ymax)],
                        ZONE.mix(0.10).filled(),
                    )))?;
                    shaded = true;
                }
            }
            if shaded {
                chart
                    .draw_series(std::iter::empty::<Rectangle<(f64, f64)>>())?
                    .label(z.label.as_str())
                    .legend(|(x, y)| {
                        Rectangle::new([(x, y - 5), (x + 16, y + 5)], ZONE.mix(0.25).filled())
                    });
            }
        }
        for (i, ((name, _), bs)) in series.iter().zip(&bars).enumerate() {
            let c = colour(i);
            chart.draw_series(bs.iter().map(|&(x0, x1, h, _)| {
                Rectangle::new([(x0, 0.0), (x1, h)], c.mix(0.40).filled())
            }))?;
            chart
                .draw_series(bs.iter().map(|&(x0, x1, h, _)| {
                    Rectangle::new([(x0, 0.0), (x1, h)], c.stroke_width(1))
                }))?;
            let label = if name.is_empty() {
                "results".to_string()
            } else {
                name.clone()
            };
            chart
                .draw_series(std::iter::empty::<Rectangle<(f64, f64)>>())?
                .label(label)
                .legend(move |(x, y)| {
                    Rectangle::new([(x, y - 5), (x + 16, y + 5)], c.mix(0.5).filled())
                });
            for &(x0, x1, h, merged) in bs {
                if merged {
                    let (px, py) = chart.backend_coord(&((x0 + x1) / 2.0, h));
                    text_at(root, "M", (px, py - 8), 11, HPos::Center)?;
                }
            }
        }
        chart
            .configure_series_labels()
            .position(SeriesLabelPosition::UpperRight)
            .label_font(font(12))
            .background_style(WHITE.mix(0.85))
            .border_style(RGBColor(160, 160, 160))
            .draw()?;
        Ok(())
    })
}

// ---------------------------------------------------------------------------------------------
// Forest plots of the paired differences.

fn paired_forests(t: &CheckedTable) -> Vec<Figure> {
    let v = View::new(t);
    let title0 = "Worst results: paired differences".to_string();
    let (Some(ac), Some(ec), Some(lc), Some(uc)) = (
        v.col("analyte"),
        v.col("estimate"),
        v.col("lower"),
        v.col("upper"),
    ) else {
        return vec![Figure::note(
            title0,
            t.name(),
            "the table has no analyte, estimate or limits",
        )];
    };
    if all_withheld(t) {
        return vec![Figure::note(title0, t.name(), "every row is withheld")];
    }
    let gc = v.col("subgroup");
    let sc = v.col("statistic");
    let key = |r: usize| (v.text(r, ac), sc.map(|c| v.text(r, c)).unwrap_or_default());
    let panels = distinct((0..v.n()).map(|r| {
        let (a, s) = key(r);
        format!("{a}\u{1f}{s}")
    }));
    let mut out = Vec::new();
    for p in panels.iter().take(MAX_PANELS) {
        let (a, s) = p.split_once('\u{1f}').unwrap_or((p, ""));
        let title = if s.is_empty() {
            format!("{a}: paired difference")
        } else {
            format!("{a}: {}", s.replace('_', " "))
        };
        let rows: Vec<ForestRow> = (0..v.n())
            .filter(|&r| key(r) == (a.to_string(), s.to_string()))
            .map(|r| {
                let label = gc.map(|c| v.text(r, c)).unwrap_or_else(|| a.to_string());
                let label = if label == ALL {
                    "all patients".into()
                } else {
                    label
                };
                ForestRow::estimate(
                    &label,
                    v.num(r, ec).unwrap_or(f64::NAN),
                    v.num(r, lc).unwrap_or(f64::NAN),
                    v.num(r, uc).unwrap_or(f64::NAN),
                )
            })
            .collect();
        if rows.iter().all(|r| !r.estimate.is_finite()) {
            out.push(Figure::note(title, t.name(), "no estimate is released"));
            continue;
        }
        let svg = forest_svg_with(
            &rows,
            &ForestOptions {
                title: title.clone(),
                x_label: format!("{a}: second window minus first (confidence interval)"),
                reference: Some(0.0),
                width: WIDTH,
            },
        );
        out.push(Figure {
            title,
            source: t.name().into(),
            svg: Some(svg),
            caption: "Per subgroup, the paired difference of each patient's worst result (second window minus first) with its confidence interval; the vertical line is no change.".into(),
        });
    }
    out
}

// ---------------------------------------------------------------------------------------------
// Bar charts: critical results and travel.

struct BarSeries {
    label: String,
    values: Vec<Option<f64>>,
    intervals: Vec<Option<(f64, f64)>>,
}

fn bar_chart(title: &str, cats: &[String], series: &[BarSeries], y_desc: &str) -> Option<String> {
    let mut ys: Vec<f64> = series
        .iter()
        .flat_map(|s| s.values.iter().flatten().copied())
        .collect();
    ys.extend(
        series
            .iter()
            .flat_map(|s| s.intervals.iter().flatten().map(|i| i.1)),
    );
    if ys.is_empty() {
        return None;
    }
    ys.push(0.0);
    let ymax = ys.iter().copied().fold(0.0f64, f64::max).max(1e-9) * 1.3;
    let ymin = ys.iter().copied().fold(0.0f64, f64::min) * 1.15;
    let n = cats.len();
    let k = series.len().max(1);
    draw_svg((WIDTH, 380), |root| {
        let mut chart = ChartBuilder::on(root)
            .caption(title, font(15))
            .margin(12)
            .x_label_area_size(40)
            .y_label_area_size(64)
            .build_cartesian_2d(-0.5..(n as f64 - 0.5), ymin..ymax)?;
        chart
            .configure_mesh()
            .x_labels(0)
            .disable_x_mesh()
            .y_labels(6)
            .y_label_formatter(&|y| num(*y))
            .y_desc(y_desc)
            .label_style(font(12))
            .axis_desc_style(font(12))
            .light_line_style(RGBColor(238, 238, 238))
            .max_light_lines(1)
            .draw()?;
        let step = n.div_ceil(12).max(1);
        for (i, c) in cats.iter().enumerate() {
            if i % step == 0 {
                let (px, py) = chart.backend_coord(&(i as f64, ymin));
                text_at(root, c, (px, py + 14), 11, HPos::Center)?;
            }
        }
        let group = 0.8;
        let bw = group / k as f64;
        for (j, s) in series.iter().enumerate() {
            let c = colour(j);
            let x = |i: usize| i as f64 - group / 2.0 + bw * j as f64;
            chart.draw_series(s.values.iter().enumerate().filter_map(|(i, y)| {
                let y = (*y)?;
                Some(Rectangle::new(
                    [(x(i), 0.0), (x(i) + bw * 0.92, y)],
                    c.mix(0.75).filled(),
                ))
            }))?;
            chart.draw_series(s.intervals.iter().enumerate().filter_map(|(i, ci)| {
                let (lo, hi) = (*ci)?;
                let m = x(i) + bw * 0.46;
                Some(PathElement::new(
                    vec![(m, lo), (m, hi)],
                    INK.stroke_width(1),
                ))
            }))?;
            for (i, y) in s.values.iter().enumerate() {
                if y.is_none() {
                    let (px, py) = chart.backend_coord(&(x(i) + bw * 0.46, 0.0));
                    text_at(root, "w", (px, py - 8), 11, HPos::Center)?;
                }
            }
            chart
                .draw_series(std::iter::empty::<Rectangle<(f64, f64)>>())?
                .label(s.label.as_str())
                .legend(move |(x, y)| {
                    Rectangle::new([(x, y - 5), (x + 16, y + 5)], c.mix(0.75).filled())
                });
        }
        chart
            .configure_series_labels()
            .position(SeriesLabelPosition::UpperRight)
            .label_font(font(12))
            .background_style(WHITE.mix(0.85))
            .border_style(RGBColor(160, 160, 160))
            .draw()?;
        Ok(())
    })
}

fn critical(t: &CheckedTable) -> Figure {
    let title = "Critical results".to_string();
    let v = View::new(t);
    if all_withheld(t) {
        return Figure::note(title, t.name(), "every row is withheld");
    }
    let ctx = v.col("context");
    let dims: Vec<usize> = v.dims().into_iter().filter(|&c| Some(c) != ctx).collect();
    let name = |c: usize| t.columns()[c].name.as_str();
    let primary = ["window", "month"]
        .iter()
        .find_map(|n| dims.iter().copied().find(|&c| name(c) == *n))
        .or_else(|| dims.first().copied());
    let keep: Vec<&str> = primary.map(name).into_iter().chain(["context"]).collect();
    let rows = v.margin_rows(&keep);
    let cat_dims: Vec<usize> = dims
        .iter()
        .copied()
        .filter(|&c| rows.iter().any(|&r| v.text(r, c) != ALL))
        .collect();
    let cat = |r: usize| {
        cat_dims
            .iter()
            .map(|&c| v.text(r, c))
            .collect::<Vec<_>>()
            .join(" · ")
    };
    let mut cats = distinct(rows.iter().map(|&r| cat(r)));
    if primary.is_some_and(|c| name(c) == "month") {
        cats.sort();
    }
    let mut contexts = match ctx {
        Some(c) => distinct(rows.iter().map(|&r| v.text(r, c))),
        None => vec![String::new()],
    };
    if contexts.len() > 1 {
        contexts.retain(|c| c != ALL);
    }
    let rate = v.col("rate_per_100py");
    let use_rate = rate.is_some_and(|c| rows.iter().any(|&r| v.num(r, c).is_some()));
    let (vc, lc, uc, y_desc) = if use_rate {
        (
            rate,
            v.col("lower"),
            v.col("upper"),
            "critical results per 100 patient-years",
        )
    } else {
        (v.col("n_events"), None, None, "critical results")
    };
    let Some(vc) = vc else {
        return Figure::note(
            title,
            t.name(),
            "the table has no rate or count of critical results",
        );
    };
    let series: Vec<BarSeries> = contexts
        .iter()
        .map(|cx| {
            let find = |k: &str| {
                rows.iter()
                    .copied()
                    .find(|&r| cat(r) == k && ctx.is_none_or(|c| &v.text(r, c) == cx))
            };
            BarSeries {
                label: if cx.is_empty() {
                    "results".into()
                } else if cx == ALL {
                    "all contexts".into()
                } else {
                    cx.clone()
                },
                values: cats
                    .iter()
                    .map(|k| find(k).and_then(|r| v.num(r, vc)))
                    .collect(),
                intervals: cats
                    .iter()
                    .map(|k| {
                        let r = find(k)?;
                        Some((v.num(r, lc?)?, v.num(r, uc?)?))
                    })
                    .collect(),
            }
        })
        .collect();
    match bar_chart(&title, &cats, &series, y_desc) {
        Some(svg) => Figure {
            title,
            source: t.name().into(),
            svg: Some(svg),
            caption: if use_rate {
                "Critical results per 100 patient-years by window and context, with exact Poisson intervals; w: withheld."
            } else {
                "Critical results by category and context; w: withheld."
            }
            .into(),
        },
        None => Figure::note(title, t.name(), "no value is released"),
    }
}

fn travel(t: &CheckedTable) -> Vec<Figure> {
    let v = View::new(t);
    if all_withheld(t) {
        return vec![Figure::note(
            "Travel saved".into(),
            t.name(),
            "every row is withheld",
        )];
    }
    let gc = v.col("subgroup");
    let sc = v.col("scenario");
    let scenarios = sc
        .map(|c| distinct((0..v.n()).map(|r| v.text(r, c))))
        .unwrap_or_default();
    let cat = |r: usize| {
        let g = gc.map(|c| v.text(r, c)).unwrap_or_default();
        let g = if g == ALL {
            "all patients".to_string()
        } else {
            g
        };
        match sc {
            Some(c) if scenarios.len() > 1 => format!("{g} · {}", v.text(r, c)),
            _ => g,
        }
    };
    let cats: Vec<String> = (0..v.n()).map(cat).collect();
    let mut out = Vec::new();
    for (c, col) in t.columns().iter().enumerate() {
        if !matches!(col.role, Role::Magnitude { .. }) {
            continue;
        }
        let title = format!("Travel saved: {}", col.name.replace('_', " "));
        let values: Vec<Option<f64>> = (0..v.n()).map(|r| v.num(r, c)).collect();
        if values.iter().all(Option::is_none) {
            out.push(Figure::note(title, t.name(), "no value is released"));
            continue;
        }
        let s = [BarSeries {
            label: col.name.replace('_', " "),
            intervals: vec![None; values.len()],
            values,
        }];
        match bar_chart(&title, &cats, &s, &col.name.replace('_', " ")) {
            Some(svg) => out.push(Figure {
                title,
                source: t.name().into(),
                svg: Some(svg),
                caption: format!(
                    "{} per subgroup{}, under the study's scenario; w: withheld (too few patients, or dominated by a few patients).",
                    col.name.replace('_', " "),
                    if scenarios.len() == 1 { format!(" (scenario {})", scenarios[0]) } else { String::new() }
                ),
            }),
            None => out.push(Figure::note(title, t.name(), "the chart could not be drawn")),
        }
    }
    out
}
