//! SVG charts drawn with plotters. A chart is a [`Frame`] (title, axes, units, ranges) and
//! [`Layer`]s of marks (bars, lines, bands, dots, heat-map cells); the result is one `<svg>`
//! element with `role="img"`, a `<title>` and a `<desc>`, the axes in `<g class="axes">`
//! and each layer in its own `<g class="data ...">`, so tests and assistive tools can find
//! the data. Only rendering lives here; the numbers come shaped from `shape`.
//!
//! Text: plotters is built without a font backend (no `ttf`), and its SVG backend still
//! writes titles, axis descriptions and tick labels as SVG `<text>`; layout uses plotters'
//! built-in width estimate, which is good enough for short labels, and the browser draws
//! the glyphs. So plotters draws everything, text included (decided after reading
//! plotters' `naive` font and its SVG `draw_text`).
//!
//! Layers: plotters writes into one string per drawing, with no way to group elements, so
//! each layer is drawn in a pass of its own over an identical chart (same size, margins,
//! label areas and ranges, with the caption drawn transparent so the plot area is the
//! same) and the passes' elements are put into one `<svg>`.

use std::ops::Range;

use plotters::coord::Shift;
use plotters::coord::types::RangedCoordf64;
use plotters::prelude::*;
use plotters::style::RGBAColor;

use super::page::escape;

/// Chart size in SVG user units; the page scales it to the column width.
pub const WIDTH: u32 = 760;
pub const HEIGHT: u32 = 340;

/// What was wrong when a chart could not be drawn (plotters' own error, as text).
#[derive(Debug, thiserror::Error)]
#[error("drawing chart {chart}: {message}")]
pub struct ChartError {
    pub chart: String,
    pub message: String,
}

/// Title, axis descriptions (with units) and ranges of a chart.
pub struct Frame<'a> {
    /// The chart's id in the page (letters, digits and dashes).
    pub id: &'a str,
    pub title: &'a str,
    /// The text alternative: one or two sentences on what the chart shows.
    pub desc: &'a str,
    pub x_desc: &'a str,
    pub y_desc: &'a str,
    pub x: Range<f64>,
    pub y: Range<f64>,
    pub x_label: &'a dyn Fn(f64) -> String,
    pub y_label: &'a dyn Fn(f64) -> String,
    /// Roughly how many tick labels on each axis.
    pub x_ticks: usize,
    pub y_ticks: usize,
    /// Width of the room for the y tick labels (long field names need more).
    pub y_label_area: u32,
}

impl std::fmt::Debug for Frame<'_> {
    fn fmt(&self, f: &mut std::fmt::Formatter<'_>) -> std::fmt::Result {
        f.debug_struct("Frame").field("id", &self.id).field("title", &self.title).finish()
    }
}

/// One mark in data coordinates.
#[derive(Debug, Clone, PartialEq)]
pub enum Mark {
    /// A filled rectangle from (x0, y0) to (x1, y1).
    Bar { x0: f64, x1: f64, y0: f64, y1: f64 },
    /// A filled rectangle with its own colour (heat-map cells).
    Cell { x0: f64, x1: f64, y0: f64, y1: f64, fill: (u8, u8, u8) },
    /// A polyline through the points.
    Line(Vec<(f64, f64)>),
    /// A filled band between lower and upper values: (x, lower, upper).
    Band(Vec<(f64, f64, f64)>),
    /// A dot.
    Dot(f64, f64),
    /// A vertical rule at x.
    Rule(f64),
}

/// Marks drawn together, in one colour, grouped under `class`.
#[derive(Debug, Clone, PartialEq)]
pub struct Layer {
    /// CSS class of the group besides `data` (e.g. `observed`, `nowcast-band`).
    pub class: &'static str,
    pub color: (u8, u8, u8),
    /// Opacity of filled marks.
    pub opacity: f64,
    pub marks: Vec<Mark>,
}

type Chart<'a, 'b> = ChartContext<'a, SVGBackend<'b>, Cartesian2d<RangedCoordf64, RangedCoordf64>>;

/// Draws the chart: axes first, then the layers in order (later ones on top).
pub fn render(frame: &Frame<'_>, layers: &[Layer]) -> Result<String, ChartError> {
    let fail = |err: String| ChartError { chart: frame.id.to_string(), message: err };
    let axes = draw_pass(frame, true, |chart| {
        chart
            .configure_mesh()
            .x_desc(frame.x_desc)
            .y_desc(frame.y_desc)
            .x_labels(frame.x_ticks)
            .y_labels(frame.y_ticks)
            .x_label_formatter(&|x| (frame.x_label)(*x))
            .y_label_formatter(&|y| (frame.y_label)(*y))
            .light_line_style(RGBColor(235, 235, 235))
            .label_style(("sans-serif", 12))
            .axis_desc_style(("sans-serif", 13))
            .draw()
            .map_err(|e| e.to_string())
    })
    .map_err(fail)?;
    let mut svg = format!(
        "<svg xmlns=\"http://www.w3.org/2000/svg\" class=\"chart\" id=\"chart-{id}\" viewBox=\"0 0 {WIDTH} {HEIGHT}\" \
         width=\"{WIDTH}\" height=\"{HEIGHT}\" role=\"img\" aria-labelledby=\"{id}-title {id}-desc\">\
         <title id=\"{id}-title\">{title}</title><desc id=\"{id}-desc\">{desc}</desc>\n<g class=\"axes\">{axes}</g>\n",
        id = frame.id,
        title = escape(frame.title),
        desc = escape(frame.desc),
    );
    for layer in layers {
        let body = draw_pass(frame, false, |chart| draw_layer(chart, layer)).map_err(fail)?;
        svg.push_str(&format!("<g class=\"data {}\">{body}</g>\n", layer.class));
    }
    svg.push_str("</svg>");
    Ok(svg)
}

/// Builds the frame's chart on a fresh SVG string, runs `draw` on it, and returns the
/// elements drawn (the string without its `<svg>` wrapper). `visible_caption` false draws
/// the caption transparent: it takes the same room, so every pass has the same plot area.
fn draw_pass(
    frame: &Frame<'_>,
    visible_caption: bool,
    draw: impl FnOnce(&mut Chart<'_, '_>) -> Result<(), String>,
) -> Result<String, String> {
    let mut buffer = String::new();
    {
        let root: DrawingArea<SVGBackend<'_>, Shift> =
            SVGBackend::with_string(&mut buffer, (WIDTH, HEIGHT)).into_drawing_area();
        let caption_color: RGBAColor = if visible_caption { BLACK.to_rgba() } else { BLACK.mix(0.0) };
        let caption = ("sans-serif", 16).into_font().color(&caption_color);
        let mut chart = ChartBuilder::on(&root)
            .caption(frame.title, caption)
            .margin(10)
            .x_label_area_size(48)
            .y_label_area_size(frame.y_label_area)
            .build_cartesian_2d(frame.x.clone(), frame.y.clone())
            .map_err(|e| e.to_string())?;
        draw(&mut chart)?;
        root.present().map_err(|e| e.to_string())?;
    }
    Ok(strip_svg_wrapper(&buffer).to_string())
}

fn draw_layer(chart: &mut Chart<'_, '_>, layer: &Layer) -> Result<(), String> {
    let (r, g, b) = layer.color;
    let color = RGBColor(r, g, b);
    let fill = color.mix(layer.opacity).filled();
    let err = |e: DrawingAreaErrorKind<_>| e.to_string();
    for mark in &layer.marks {
        match mark {
            Mark::Bar { x0, x1, y0, y1 } => {
                chart
                    .draw_series(std::iter::once(Rectangle::new([(*x0, *y0), (*x1, *y1)], fill)))
                    .map_err(err)?;
            }
            Mark::Cell { x0, x1, y0, y1, fill: (r, g, b) } => {
                let style = RGBColor(*r, *g, *b).filled();
                chart
                    .draw_series(std::iter::once(Rectangle::new([(*x0, *y0), (*x1, *y1)], style)))
                    .map_err(err)?;
            }
            Mark::Line(points) => {
                chart
                    .draw_series(LineSeries::new(points.iter().copied(), color.stroke_width(2)))
                    .map_err(err)?;
            }
            Mark::Band(points) => {
                let outline: Vec<(f64, f64)> = points
                    .iter()
                    .map(|(x, lo, _)| (*x, *lo))
                    .chain(points.iter().rev().map(|(x, _, hi)| (*x, *hi)))
                    .collect();
                chart.draw_series(std::iter::once(Polygon::new(outline, fill))).map_err(err)?;
            }
            Mark::Dot(x, y) => {
                chart.draw_series(std::iter::once(Circle::new((*x, *y), 3, color.filled()))).map_err(err)?;
            }
            Mark::Rule(x) => {
                let (y0, y1) = (chart.y_range().start, chart.y_range().end);
                let style = color.stroke_width(1);
                chart.draw_series(LineSeries::new([(*x, y0), (*x, y1)], style)).map_err(err)?;
            }
        }
    }
    Ok(())
}

/// The elements of an SVG document written by plotters, without the `<svg ...>` and
/// `</svg>` around them.
fn strip_svg_wrapper(document: &str) -> &str {
    let start = document.find("<svg").and_then(|at| document[at..].find('>').map(|end| at + end + 1));
    let end = document.rfind("</svg>");
    match (start, end) {
        (Some(start), Some(end)) if start <= end => &document[start..end],
        _ => document,
    }
}

#[cfg(test)]
mod tests {
    use super::*;

    fn frame<'a>(label: &'a dyn Fn(f64) -> String) -> Frame<'a> {
        Frame {
            id: "test",
            title: "Cases <by> day",
            desc: "A test chart & its description",
            x_desc: "Day",
            y_desc: "Cases (count)",
            x: 0.0..10.0,
            y: 0.0..5.0,
            x_label: label,
            y_label: label,
            x_ticks: 5,
            y_ticks: 5,
            y_label_area: 64,
        }
    }

    #[test]
    fn a_chart_has_a_text_alternative_axes_and_one_group_per_layer() {
        let label = |x: f64| format!("{x:.0}");
        let layers = [
            Layer {
                class: "observed",
                color: (40, 90, 160),
                opacity: 0.8,
                marks: vec![
                    Mark::Bar { x0: 1.0, x1: 2.0, y0: 0.0, y1: 3.0 },
                    Mark::Bar { x0: 2.0, x1: 3.0, y0: 0.0, y1: 4.0 },
                ],
            },
            Layer {
                class: "median",
                color: (200, 60, 30),
                opacity: 1.0,
                marks: vec![Mark::Line(vec![(1.0, 1.0), (2.0, 2.0)]), Mark::Dot(2.0, 2.0)],
            },
            Layer {
                class: "band",
                color: (200, 60, 30),
                opacity: 0.3,
                marks: vec![Mark::Band(vec![(1.0, 0.5, 1.5), (2.0, 1.0, 3.0)])],
            },
        ];
        let svg = render(&frame(&label), &layers).unwrap();
        assert!(svg.starts_with("<svg") && svg.ends_with("</svg>"));
        assert_eq!(svg.matches("<svg").count(), 1, "one svg element: {svg}");
        assert!(svg.contains("role=\"img\""));
        assert!(svg.contains("<title id=\"test-title\">Cases &lt;by&gt; day</title>"));
        assert!(svg.contains("<desc id=\"test-desc\">A test chart &amp; its description</desc>"));
        let axes = &svg[svg.find("<g class=\"axes\">").unwrap()..svg.find("<g class=\"data").unwrap()];
        assert!(
            axes.contains("<text") && axes.contains("Cases (count)") && axes.contains("Day"),
            "axis descriptions drawn: {svg}"
        );
        let group = |class: &str| {
            let start = svg.find(&format!("<g class=\"data {class}\">")).unwrap();
            let end = start + svg[start..].find("</g>").unwrap();
            svg[start..end].to_string()
        };
        assert_eq!(group("observed").matches("<rect").count(), 2);
        assert_eq!(group("median").matches("<polyline").count(), 1);
        assert_eq!(group("median").matches("<circle").count(), 1);
        assert_eq!(group("band").matches("<polygon").count(), 1);
        // The layers' passes draw no text of their own (their caption is transparent).
        assert!(!group("observed").contains("<text"));
    }

    #[test]
    fn the_wrapper_is_stripped_from_a_plotters_document() {
        let doc = "<svg width=\"1\" height=\"1\" xmlns=\"x\">\n<rect x=\"0\"/>\n</svg>\n";
        assert_eq!(strip_svg_wrapper(doc), "\n<rect x=\"0\"/>\n");
    }
}
