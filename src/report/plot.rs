//! Depth profiles for the HTML report: one value per block on a log scale.
//!
//! plotters draws the frame (axes, ticks, grid, stage bands and boundaries,
//! thresholds and the line through the values) as SVG; the marks themselves
//! are placed at plotters' own coordinate mapping and written by the page
//! template, so each one can carry its block number, finding and a tooltip.
//! Only our own words and numbers reach plotters: names from the model are
//! written by the template, which escapes them.

use std::io;

use plotters::coord::Shift;
use plotters::prelude::*;
use plotters::style::FontFamily;
use plotters::style::text_anchor::{HPos, Pos, VPos};

use crate::report::marks::{self, Mark};

/// Width and height of a plot, in SVG user units (CSS pixels at 100%).
const WIDTH: u32 = 960;
const HEIGHT: u32 = 300;

const AXIS: RGBColor = RGBColor(0x55, 0x55, 0x55);
const GRID: RGBColor = RGBColor(0xE4, 0xE4, 0xE4);
const BAND: RGBColor = RGBColor(0xF3, 0xF3, 0xF0);
const LINE: RGBColor = RGBColor(0x9A, 0x9A, 0x9A);

/// One block on the x axis.
#[derive(Debug, Clone)]
pub(crate) struct Point {
    /// Block id (its x position).
    pub(crate) block: usize,
    /// The value, or `None` when the block was not measured.
    pub(crate) value: Option<f64>,
    /// How the block's mark looks.
    pub(crate) mark: Mark,
    /// Text label beside a flagged mark (empty for none).
    pub(crate) label: String,
    /// Tooltip text.
    pub(crate) title: String,
}

/// A horizontal threshold line with the zone beyond it tinted.
#[derive(Debug, Clone)]
pub(crate) struct Threshold {
    /// Where the line is.
    pub(crate) value: f64,
    /// Words drawn beside the line.
    pub(crate) label: String,
    /// Colour of the line and the tint.
    pub(crate) colour: RGBColor,
    /// Tint the zone below the line (true) or above it (false).
    pub(crate) below: bool,
}

/// A run of consecutive blocks of one stage.
#[derive(Debug, Clone)]
pub(crate) struct StageSpan {
    /// First and last block id.
    pub(crate) first: usize,
    /// Last block id.
    pub(crate) last: usize,
    /// Our own label (`stage 2`); never a name from the model.
    pub(crate) label: String,
}

/// What to draw.
#[derive(Debug, Clone)]
pub(crate) struct PlotSpec {
    /// `ratio`, `rms`: the element id suffix.
    pub(crate) id: &'static str,
    /// The y axis description.
    pub(crate) y_desc: &'static str,
    /// One point per block, in block order.
    pub(crate) points: Vec<Point>,
    /// Threshold lines.
    pub(crate) thresholds: Vec<Threshold>,
    /// Stage runs, in order.
    pub(crate) stages: Vec<StageSpan>,
    /// A second series drawn as a dashed line without marks (the RMS beside
    /// the largest |x|), with its legend words.
    pub(crate) companion: Option<Companion>,
}

/// A second series of a plot: a dashed line and its legend.
#[derive(Debug, Clone)]
pub(crate) struct Companion {
    /// Our own words for the legend.
    pub(crate) label: &'static str,
    /// Words for the marked series in the legend.
    pub(crate) main_label: &'static str,
    /// One value per block, in block order.
    pub(crate) values: Vec<Option<f64>>,
}

/// Okabe–Ito blue, the companion series' colour.
const BLUE: RGBColor = RGBColor(0x00, 0x72, 0xB2);

/// A drawn plot: plotters' SVG of the frame and the marks' positions.
#[derive(Debug, Clone)]
pub(crate) struct Plot {
    /// `ratio` or `rms`.
    pub(crate) id: &'static str,
    /// Width in SVG units.
    pub(crate) width: u32,
    /// Height in SVG units.
    pub(crate) height: u32,
    /// The frame as a complete `<svg>` element written by plotters.
    pub(crate) frame: String,
    /// One mark per block.
    pub(crate) marks: Vec<PlacedMark>,
}

/// A mark at its place in the plot.
#[derive(Debug, Clone)]
pub(crate) struct PlacedMark {
    /// Block id.
    pub(crate) block: usize,
    /// Its look.
    pub(crate) mark: Mark,
    /// Position in SVG units.
    pub(crate) x: i32,
    /// Position in SVG units.
    pub(crate) y: i32,
    /// Whether the value was zero or missing and is drawn on the axis floor.
    pub(crate) on_floor: bool,
    /// Tooltip.
    pub(crate) title: String,
    /// Label beside the mark, if flagged.
    pub(crate) label: Option<Label>,
}

/// A text label in SVG units.
#[derive(Debug, Clone)]
pub(crate) struct Label {
    /// The words.
    pub(crate) text: String,
    /// Anchor point.
    pub(crate) x: i32,
    /// Anchor point.
    pub(crate) y: i32,
    /// `start` or `end`.
    pub(crate) anchor: &'static str,
}

fn drawing_error<E: std::error::Error + Send + Sync>(e: DrawingAreaErrorKind<E>) -> io::Error {
    io::Error::other(format!("drawing a plot failed: {e}"))
}

/// The y range: whole decades around the positive values and thresholds,
/// with room above and below.
fn y_range(spec: &PlotSpec) -> (f64, f64) {
    let values = spec
        .points
        .iter()
        .filter_map(|p| p.value)
        .chain(spec.companion.iter().flat_map(|c| c.values.iter().flatten().copied()))
        .chain(spec.thresholds.iter().map(|t| t.value))
        .filter(|v| v.is_finite() && *v > 0.0);
    let (lo, hi) =
        values.fold((f64::INFINITY, f64::NEG_INFINITY), |(lo, hi), v| (lo.min(v), hi.max(v)));
    if !lo.is_finite() {
        return (1e-3, 1e1);
    }
    let lo = 10f64.powf((lo / 2.0).log10().floor());
    let mut hi = 10f64.powf((hi * 2.0).log10().ceil());
    if hi <= lo * 10.0 {
        hi = lo * 100.0;
    }
    (lo, hi)
}

/// Tick labels on a log axis: plain numbers near 1, powers of ten elsewhere.
fn decade_label(v: f64) -> String {
    if v <= 0.0 || !v.is_finite() {
        return String::new();
    }
    let exp = v.log10().round();
    if (v.log10() - exp).abs() > 1e-6 {
        return String::new();
    }
    match exp as i32 {
        e @ -3..=-1 => format!("{:.*}", (-e) as usize, v),
        e @ 0..=4 => format!("{:.0}", 10f64.powi(e)),
        e => format!("1e{e}"),
    }
}

/// Draws one profile.
pub(crate) fn draw(spec: &PlotSpec) -> io::Result<Plot> {
    let n = spec.points.len().max(1);
    let (lo, hi) = y_range(spec);
    let mut frame = String::new();
    let mut marks = Vec::with_capacity(spec.points.len());
    {
        let root: DrawingArea<SVGBackend, Shift> =
            SVGBackend::with_string(&mut frame, (WIDTH, HEIGHT)).into_drawing_area();
        let font = |size: f64| (FontFamily::SansSerif, size).into_font();
        let mut chart = ChartBuilder::on(&root)
            .margin_top(26)
            .margin_right(24)
            .margin_left(6)
            .margin_bottom(4)
            .x_label_area_size(40)
            .y_label_area_size(62)
            .build_cartesian_2d(0.5f64..(n as f64 + 0.5), (lo..hi).log_scale())
            .map_err(drawing_error)?;

        // Every other stage gets a light band, so stages read as columns.
        for (k, s) in spec.stages.iter().enumerate() {
            if k % 2 == 1 {
                let area = [(s.first as f64 - 0.5, lo), (s.last as f64 + 0.5, hi)];
                chart
                    .draw_series(std::iter::once(Rectangle::new(area, BAND.filled())))
                    .map_err(drawing_error)?;
            }
        }
        // Tinted zones beyond the thresholds.
        for t in &spec.thresholds {
            let (a, b) = if t.below { (lo, t.value) } else { (t.value, hi) };
            let area = [(0.5, a), (n as f64 + 0.5, b)];
            chart
                .draw_series(std::iter::once(Rectangle::new(area, t.colour.mix(0.09).filled())))
                .map_err(drawing_error)?;
        }

        let x_labels = n.min(24);
        chart
            .configure_mesh()
            .disable_x_mesh()
            .x_labels(x_labels)
            .x_label_formatter(&|x: &f64| {
                let r = x.round();
                if (x - r).abs() < 1e-6 && r >= 1.0 { format!("{r:.0}") } else { String::new() }
            })
            .y_label_formatter(&|y: &f64| decade_label(*y))
            .x_desc("block, in graph order (depth)")
            .y_desc(spec.y_desc)
            .label_style(font(13.0).color(&AXIS))
            .axis_desc_style(font(14.0).color(&AXIS))
            .bold_line_style(GRID)
            .light_line_style(TRANSPARENT)
            .axis_style(AXIS)
            .draw()
            .map_err(drawing_error)?;

        // Stage boundaries and names.
        for (k, s) in spec.stages.iter().enumerate() {
            if k > 0 {
                let x = s.first as f64 - 0.5;
                chart
                    .draw_series(DashedLineSeries::new(
                        [(x, lo), (x, hi)],
                        5,
                        4,
                        AXIS.stroke_width(1),
                    ))
                    .map_err(drawing_error)?;
            }
            let mid = (s.first + s.last) as f64 / 2.0;
            let (px, py) = chart.backend_coord(&(mid, hi));
            root.draw(&Text::new(
                s.label.clone(),
                (px, py - 16),
                font(13.0).color(&AXIS).pos(Pos::new(HPos::Center, VPos::Top)),
            ))
            .map_err(drawing_error)?;
        }

        for t in &spec.thresholds {
            chart
                .draw_series(DashedLineSeries::new(
                    [(0.5, t.value), (n as f64 + 0.5, t.value)],
                    8,
                    5,
                    t.colour.stroke_width(2),
                ))
                .map_err(drawing_error)?;
            let (px, py) = chart.backend_coord(&(n as f64 + 0.5, t.value));
            let (dy, v) = if t.below { (5, VPos::Top) } else { (-5, VPos::Bottom) };
            root.draw(&Text::new(
                t.label.clone(),
                (px - 4, py + dy),
                font(13.0).color(&t.colour).pos(Pos::new(HPos::Right, v)),
            ))
            .map_err(drawing_error)?;
        }

        // The line through the measured values; it breaks at a zero or missing one.
        let mut run: Vec<(f64, f64)> = Vec::new();
        let mut runs = Vec::new();
        for p in &spec.points {
            match p.value.filter(|v| v.is_finite() && *v > 0.0) {
                Some(v) => run.push((p.block as f64, v)),
                None => runs.push(std::mem::take(&mut run)),
            }
        }
        runs.push(run);
        for r in runs.into_iter().filter(|r| r.len() > 1) {
            chart.draw_series(LineSeries::new(r, LINE.stroke_width(2))).map_err(drawing_error)?;
        }

        if let Some(c) = &spec.companion {
            let mut run: Vec<(f64, f64)> = Vec::new();
            let mut runs = Vec::new();
            for (k, v) in c.values.iter().enumerate() {
                match v.filter(|v| v.is_finite() && *v > 0.0) {
                    Some(v) => run.push(((k + 1) as f64, v)),
                    None => runs.push(std::mem::take(&mut run)),
                }
            }
            runs.push(run);
            for r in runs.into_iter().filter(|r| r.len() > 1) {
                chart
                    .draw_series(DashedLineSeries::new(r, 6, 4, BLUE.stroke_width(2)))
                    .map_err(drawing_error)?;
            }
            // The legend, top left inside the plot.
            let (px, py) = chart.backend_coord(&(0.5, hi));
            root.draw(&Text::new(
                format!("solid: {}", c.main_label),
                (px + 8, py + 6),
                font(13.0).color(&LINE).pos(Pos::new(HPos::Left, VPos::Top)),
            ))
            .map_err(drawing_error)?;
            root.draw(&Text::new(
                format!("dashed: {}", c.label),
                (px + 8, py + 22),
                font(13.0).color(&BLUE).pos(Pos::new(HPos::Left, VPos::Top)),
            ))
            .map_err(drawing_error)?;
        }

        let mut flagged = 0usize;
        for p in &spec.points {
            let known = p.value.filter(|v| v.is_finite() && *v > 0.0);
            let (x, y) = chart.backend_coord(&(p.block as f64, known.unwrap_or(lo)));
            let mark = if p.value.is_some() { p.mark } else { marks::UNMEASURED };
            let label = (!p.label.is_empty()).then(|| {
                // Alternate above and below so neighbouring labels do not collide.
                flagged += 1;
                let above = known.is_none() || flagged % 2 == 1;
                let right = x < (WIDTH as i32) * 3 / 4;
                Label {
                    text: p.label.clone(),
                    x: if right { x + 11 } else { x - 11 },
                    y: if above { y - 11 } else { y + 20 },
                    anchor: if right { "start" } else { "end" },
                }
            });
            marks.push(PlacedMark {
                block: p.block,
                mark,
                x,
                y,
                on_floor: known.is_none(),
                title: p.title.clone(),
                label,
            });
        }
        root.present().map_err(drawing_error)?;
    }
    Ok(Plot { id: spec.id, width: WIDTH, height: HEIGHT, frame, marks })
}

#[cfg(test)]
mod tests {
    use super::*;

    fn point(block: usize, value: Option<f64>) -> Point {
        Point { block, value, mark: marks::OK, label: String::new(), title: String::new() }
    }

    #[test]
    fn decades_are_labelled_plainly_near_one() {
        assert_eq!(decade_label(0.01), "0.01");
        assert_eq!(decade_label(1.0), "1");
        assert_eq!(decade_label(1000.0), "1000");
        assert_eq!(decade_label(1e-7), "1e-7");
        assert_eq!(decade_label(3.0), "");
    }

    #[test]
    fn every_block_gets_one_mark_and_zero_sits_on_the_floor() {
        let spec = PlotSpec {
            id: "ratio",
            y_desc: "ratio",
            points: vec![point(1, Some(1.0)), point(2, Some(0.0)), point(3, None)],
            thresholds: vec![],
            stages: vec![StageSpan { first: 1, last: 3, label: "stage 1".into() }],
            companion: None,
        };
        let plot = draw(&spec).unwrap();
        assert_eq!(plot.marks.len(), 3);
        assert!(!plot.marks[0].on_floor);
        assert!(plot.marks[1].on_floor && plot.marks[2].on_floor);
        assert_eq!(plot.marks[1].y, plot.marks[2].y, "both on the floor");
        assert!(plot.marks[0].y < plot.marks[1].y, "1 is above the floor");
        assert_eq!(plot.marks[2].mark, marks::UNMEASURED);
        assert!(plot.frame.starts_with("<svg") && plot.frame.trim_end().ends_with("</svg>"));
    }

    #[test]
    fn the_range_covers_values_and_thresholds() {
        let spec = PlotSpec {
            id: "ratio",
            y_desc: "ratio",
            points: vec![point(1, Some(0.5)), point(2, Some(31.9))],
            thresholds: vec![Threshold {
                value: 0.01,
                label: String::new(),
                colour: BLACK,
                below: true,
            }],
            stages: vec![],
            companion: Some(Companion {
                label: "rms",
                main_label: "max",
                values: vec![Some(1e-3), None],
            }),
        };
        let (lo, hi) = y_range(&spec);
        assert!(lo < 1e-3 && hi > 31.9, "{lo} {hi}");
    }
}
