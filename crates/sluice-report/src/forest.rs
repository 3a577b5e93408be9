//! Forest plots: one row per estimate with its confidence interval, and pooled estimates (fixed
//! and random effects) as diamonds. Used for the worst-result paired differences and usable as it
//! is for pooled (meta-analysis) output: one row per site, then the pooled rows.

use crate::charts::{Area, DrawResult, INK, draw_svg, font, padded, text_at};
use crate::view::num;
use plotters::prelude::*;
use plotters::style::text_anchor::{HPos, Pos, VPos};

/// How a forest row is drawn.
#[derive(Clone, Copy, Debug, PartialEq, Eq)]
pub enum ForestKind {
    /// One estimate (a subgroup, a site): a square with its interval as a line.
    Estimate,
    /// Pooled fixed-effect (inverse-variance) estimate: a diamond.
    Fixed,
    /// Pooled random-effects estimate: a diamond.
    Random,
}

/// One row of a forest plot. A row whose estimate or limits are not finite (withheld or not
/// estimable) keeps its label and says "not released".
#[derive(Clone, Debug, PartialEq)]
pub struct ForestRow {
    pub label: String,
    pub estimate: f64,
    pub lower: f64,
    pub upper: f64,
    pub kind: ForestKind,
    /// Relative weight (e.g. inverse variance share) scaling the square; `None`: a fixed size.
    pub weight: Option<f64>,
}

impl ForestRow {
    pub fn estimate(label: &str, estimate: f64, lower: f64, upper: f64) -> Self {
        ForestRow {
            label: label.to_string(),
            estimate,
            lower,
            upper,
            kind: ForestKind::Estimate,
            weight: None,
        }
    }
    fn finite(&self) -> bool {
        self.estimate.is_finite() && self.lower.is_finite() && self.upper.is_finite()
    }
}

/// Title, axis label and the reference line of a forest plot.
#[derive(Clone, Debug, PartialEq)]
pub struct ForestOptions {
    pub title: String,
    pub x_label: String,
    /// The no-effect value (0 for a difference or a log ratio, 1 for a ratio); `None`: no line.
    pub reference: Option<f64>,
    pub width: u32,
}

impl Default for ForestOptions {
    fn default() -> Self {
        ForestOptions {
            title: String::new(),
            x_label: "estimate (confidence interval)".into(),
            reference: Some(0.0),
            width: 760,
        }
    }
}

/// A forest plot as an SVG element, with default options.
pub fn forest_svg(rows: &[ForestRow]) -> String {
    forest_svg_with(rows, &ForestOptions::default())
}

/// A forest plot as an SVG element. Returns an empty string when there are no rows.
pub fn forest_svg_with(rows: &[ForestRow], opts: &ForestOptions) -> String {
    if rows.is_empty() {
        return String::new();
    }
    let row_h = 26u32;
    let top = if opts.title.is_empty() { 16 } else { 40 };
    let height = top + 56 + row_h * rows.len() as u32;
    draw_svg((opts.width.max(400), height), |root| {
        draw(root, rows, opts, top)
    })
    .unwrap_or_default()
}

fn draw(root: &Area<'_>, rows: &[ForestRow], opts: &ForestOptions, top: u32) -> DrawResult {
    let mut xs: Vec<f64> = rows
        .iter()
        .filter(|r| r.finite())
        .flat_map(|r| [r.lower, r.estimate, r.upper])
        .collect();
    if let Some(x) = opts.reference {
        xs.push(x);
    }
    let (x0, x1) = padded(&xs);
    let n = rows.len() as f64;
    let (left, right) = (210u32, 170u32);
    let mut b = ChartBuilder::on(root);
    b.margin_left(left)
        .margin_right(right)
        .margin_top(top)
        .margin_bottom(6)
        .x_label_area_size(44);
    if !opts.title.is_empty() {
        b.caption(&opts.title, font(15));
    }
    let mut chart = b.build_cartesian_2d(x0..x1, 0.0..n + 0.5)?;
    chart
        .configure_mesh()
        .disable_y_mesh()
        .y_labels(0)
        .x_labels(7)
        .x_label_formatter(&|x| num(*x))
        .x_desc(opts.x_label.as_str())
        .label_style(font(12))
        .axis_desc_style(font(12))
        .light_line_style(RGBColor(238, 238, 238))
        .max_light_lines(1)
        .draw()?;
    if let Some(r) = opts.reference {
        chart.draw_series(std::iter::once(PathElement::new(
            vec![(r, 0.0), (r, n + 0.5)],
            RGBColor(120, 120, 120).stroke_width(1),
        )))?;
    }
    let blue = RGBColor(31, 78, 154);
    let red = RGBColor(170, 40, 40);
    let wmax = rows
        .iter()
        .filter_map(|r| r.weight)
        .fold(0.0f64, |a, b| a.max(b));
    let width = root.dim_in_pixel().0 as i32;
    for (i, r) in rows.iter().enumerate() {
        let y = n - i as f64;
        let (_, py) = chart.backend_coord(&(x0, y));
        let style = font(12).into_text_style(root);
        let label_style = if r.kind == ForestKind::Estimate {
            style.clone()
        } else {
            font(12).style(FontStyle::Bold).into_text_style(root)
        };
        root.draw(&Text::new(
            r.label.clone(),
            (8, py),
            label_style.pos(Pos::new(HPos::Left, VPos::Center)),
        ))?;
        if !r.finite() {
            text_at(
                root,
                "not released",
                (width - right as i32 + 10, py),
                12,
                HPos::Left,
            )?;
            continue;
        }
        let ci = format!("{} [{}, {}]", num(r.estimate), num(r.lower), num(r.upper));
        text_at(root, &ci, (width - right as i32 + 10, py), 12, HPos::Left)?;
        match r.kind {
            ForestKind::Estimate => {
                chart.draw_series(std::iter::once(PathElement::new(
                    vec![(r.lower, y), (r.upper, y)],
                    INK.stroke_width(2),
                )))?;
                let size = match (r.weight, wmax > 0.0) {
                    (Some(w), true) => 3 + (6.0 * (w / wmax).sqrt()).round() as i32,
                    _ => 5,
                };
                let (px, py) = chart.backend_coord(&(r.estimate, y));
                root.draw(&Rectangle::new(
                    [(px - size, py - size), (px + size, py + size)],
                    blue.filled(),
                ))?;
            }
            ForestKind::Fixed | ForestKind::Random => {
                let c = if r.kind == ForestKind::Fixed {
                    blue
                } else {
                    red
                };
                chart.draw_series(std::iter::once(Polygon::new(
                    vec![
                        (r.lower, y),
                        (r.estimate, y + 0.32),
                        (r.upper, y),
                        (r.estimate, y - 0.32),
                    ],
                    c.mix(0.85).filled(),
                )))?;
            }
        }
    }
    Ok(())
}
