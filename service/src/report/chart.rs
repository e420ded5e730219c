//! A frequency plot laid out as drawing primitives (lines, polylines, text, a clip box) in a box of
//! given size, y pointing down. The HTML report writes them as SVG and the PDF writer as page
//! operators, so both show the same plot.

use crate::units::eng;

#[derive(Debug, Clone, PartialEq)]
pub struct Series {
    pub label: String,
    pub x: Vec<f64>,
    pub y: Vec<f64>,
    /// `#rrggbb`.
    pub colour: &'static str,
    pub width: f64,
    pub dashed: bool,
}

#[derive(Debug, Clone, PartialEq)]
pub struct Chart {
    pub title: String,
    /// Unit of the x values (SI prefixes are added to tick labels).
    pub x_unit: String,
    pub y_label: String,
    pub y_unit: String,
    pub y_log: bool,
    /// Fixed y range; `None` fits the data.
    pub y_range: Option<[f64; 2]>,
    pub series: Vec<Series>,
}

#[derive(Debug, Clone, Copy, PartialEq)]
pub enum Anchor {
    Start,
    Middle,
    End,
}

#[derive(Debug, Clone, PartialEq)]
pub enum Prim {
    Line {
        from: (f64, f64),
        to: (f64, f64),
        colour: &'static str,
        width: f64,
    },
    Poly {
        points: Vec<(f64, f64)>,
        colour: &'static str,
        width: f64,
        dashed: bool,
    },
    Text {
        at: (f64, f64),
        size: f64,
        anchor: Anchor,
        text: String,
        colour: &'static str,
    },
    /// Everything until `Unclip` is drawn inside this rectangle (x, y, width, height).
    Clip([f64; 4]),
    Unclip,
}

const GRID: &str = "#d5dbe3";
const INK: &str = "#1f2a37";
const MUTED: &str = "#5b6673";

fn range(values: impl Iterator<Item = f64>, log: bool) -> Option<[f64; 2]> {
    let (mut lo, mut hi) = (f64::INFINITY, f64::NEG_INFINITY);
    for v in values {
        if v.is_finite() && (!log || v > 0.0) {
            lo = lo.min(v);
            hi = hi.max(v);
        }
    }
    (lo <= hi).then_some([lo, hi])
}

/// Ticks of a log axis: every decade, and 2 and 5 when the range spans few decades.
fn log_ticks(lo: f64, hi: f64) -> Vec<f64> {
    let decades = (hi / lo).log10();
    let mult: &[f64] = if decades <= 2.5 {
        &[1.0, 2.0, 5.0]
    } else {
        &[1.0]
    };
    let step = if decades > 8.0 { 2 } else { 1 };
    let mut out = Vec::new();
    let d0 = lo.log10().floor() as i32;
    let d1 = hi.log10().ceil() as i32;
    for d in d0..=d1 {
        if d.rem_euclid(step) != 0 {
            continue;
        }
        for m in mult {
            let v = m * 10f64.powi(d);
            if v >= lo * (1.0 - 1e-9) && v <= hi * (1.0 + 1e-9) {
                out.push(v);
            }
        }
    }
    out
}

/// Ticks of a linear axis at a 1–2–5 step, about five of them.
fn linear_ticks(lo: f64, hi: f64) -> Vec<f64> {
    let raw = (hi - lo) / 5.0;
    if raw.is_nan() || raw <= 0.0 {
        return vec![lo];
    }
    let mag = 10f64.powf(raw.log10().floor());
    let step = [1.0, 2.0, 2.5, 5.0, 10.0]
        .iter()
        .map(|m| m * mag)
        .find(|s| *s >= raw)
        .unwrap_or(10.0 * mag);
    // Multiples of the step counted in integers, so 3 × 10 is 30 and not 30.000000000000004.
    let first = (lo / step - 1e-9).ceil() as i64;
    let last = (hi / step + 1e-9).floor() as i64;
    (first..=last).map(|k| k as f64 * step).collect()
}

/// The plot area inside the margins and the value ranges its edges stand for: x on a log scale, y
/// on a log or a linear one.
struct Axes {
    x0: f64,
    x1: f64,
    y0: f64,
    y1: f64,
    xlo: f64,
    xhi: f64,
    ylo: f64,
    yhi: f64,
    y_log: bool,
}

impl Axes {
    fn px(&self, x: f64) -> f64 {
        self.x0 + (x / self.xlo).log10() / (self.xhi / self.xlo).log10() * (self.x1 - self.x0)
    }

    fn py(&self, y: f64) -> f64 {
        if self.y_log {
            self.y1 - (y / self.ylo).log10() / (self.yhi / self.ylo).log10() * (self.y1 - self.y0)
        } else {
            self.y1 - (y - self.ylo) / (self.yhi - self.ylo) * (self.y1 - self.y0)
        }
    }
}

/// The x range of the data, widened to an octave each side when it is a single frequency.
fn x_span(chart: &Chart) -> (f64, f64) {
    let xr =
        range(chart.series.iter().flat_map(|s| s.x.iter().copied()), true).unwrap_or([1.0, 10.0]);
    if xr[0] == xr[1] {
        (xr[0] / 2.0, xr[1] * 2.0)
    } else {
        (xr[0], xr[1])
    }
}

/// The y range: the chart's fixed one as given, else the data's with 5 % room (in decades on a log
/// axis); a single value is widened around itself.
fn y_span(chart: &Chart) -> (f64, f64) {
    let yr = chart
        .y_range
        .or_else(|| {
            range(
                chart.series.iter().flat_map(|s| s.y.iter().copied()),
                chart.y_log,
            )
        })
        .unwrap_or([1.0, 10.0]);
    if chart.y_log {
        let (a, b) = if yr[0] == yr[1] {
            (yr[0] / 2.0, yr[1] * 2.0)
        } else {
            (yr[0], yr[1])
        };
        let pad = (b / a).log10() * 0.05;
        (a / 10f64.powf(pad), b * 10f64.powf(pad))
    } else if yr[0] == yr[1] {
        (
            yr[0] - yr[0].abs().max(1.0) * 0.5,
            yr[1] + yr[1].abs().max(1.0) * 0.5,
        )
    } else if chart.y_range.is_some() {
        (yr[0], yr[1])
    } else {
        let pad = (yr[1] - yr[0]) * 0.05;
        (yr[0] - pad, yr[1] + pad)
    }
}

/// The chart in a `width` × `height` box at the origin.
pub fn layout(chart: &Chart, width: f64, height: f64) -> Vec<Prim> {
    let (left, right, top, bottom) = (62.0, 12.0, 22.0, 34.0);
    let (x0, x1, y0, y1) = (left, width - right, top, height - bottom);
    let mut out = vec![Prim::Text {
        at: (x0, 14.0),
        size: 10.0,
        anchor: Anchor::Start,
        text: chart.title.clone(),
        colour: INK,
    }];
    let (xlo, xhi) = x_span(chart);
    let (ylo, yhi) = y_span(chart);
    let axes = Axes {
        x0,
        x1,
        y0,
        y1,
        xlo,
        xhi,
        ylo,
        yhi,
        y_log: chart.y_log,
    };
    grid(&mut out, chart, &axes);
    frame(&mut out, &axes, height);
    out.push(Prim::Clip([x0, y0, x1 - x0, y1 - y0]));
    for s in &chart.series {
        for points in drawable_runs(s, &axes) {
            out.push(Prim::Poly {
                points,
                colour: s.colour,
                width: s.width,
                dashed: s.dashed,
            });
        }
    }
    out.push(Prim::Unclip);
    legend(&mut out, chart, &axes);
    out.push(Prim::Text {
        at: (12.0, (y0 + y1) / 2.0),
        size: 8.0,
        anchor: Anchor::Middle,
        text: chart.y_label.clone(),
        colour: INK,
    });
    out
}

/// Grid lines with their tick labels: the frequency ticks, then the y ticks.
fn grid(out: &mut Vec<Prim>, chart: &Chart, axes: &Axes) {
    let Axes { x0, x1, y0, y1, .. } = *axes;
    for t in log_ticks(axes.xlo, axes.xhi) {
        let x = axes.px(t);
        out.push(Prim::Line {
            from: (x, y0),
            to: (x, y1),
            colour: GRID,
            width: 0.5,
        });
        out.push(Prim::Text {
            at: (x, y1 + 12.0),
            size: 7.5,
            anchor: Anchor::Middle,
            text: eng(t, &chart.x_unit),
            colour: MUTED,
        });
    }
    let yticks = if chart.y_log {
        log_ticks(axes.ylo, axes.yhi)
    } else {
        linear_ticks(axes.ylo, axes.yhi)
    };
    for t in yticks {
        let y = axes.py(t);
        out.push(Prim::Line {
            from: (x0, y),
            to: (x1, y),
            colour: GRID,
            width: 0.5,
        });
        out.push(Prim::Text {
            at: (x0 - 4.0, y + 3.0),
            size: 7.5,
            anchor: Anchor::End,
            text: if chart.y_unit.is_empty() {
                trim_number(t)
            } else {
                eng(t, &chart.y_unit)
            },
            colour: MUTED,
        });
    }
}

/// The border of the plot area and the frequency axis' caption below it.
fn frame(out: &mut Vec<Prim>, axes: &Axes, height: f64) {
    let Axes { x0, x1, y0, y1, .. } = *axes;
    for (a, b) in [
        ((x0, y0), (x1, y0)),
        ((x1, y0), (x1, y1)),
        ((x1, y1), (x0, y1)),
        ((x0, y1), (x0, y0)),
    ] {
        out.push(Prim::Line {
            from: a,
            to: b,
            colour: MUTED,
            width: 0.8,
        });
    }
    out.push(Prim::Text {
        at: ((x0 + x1) / 2.0, height - 6.0),
        size: 8.0,
        anchor: Anchor::Middle,
        text: "Frequency".into(),
        colour: INK,
    });
}

/// A series as runs of drawable points (of two points or more), broken where a value cannot be
/// drawn; a point far outside the box is clamped just outside it, so a line leaving the box keeps
/// its direction and the clip cuts it cleanly.
fn drawable_runs(s: &Series, axes: &Axes) -> Vec<Vec<(f64, f64)>> {
    let (cx0, cx1, cy0, cy1) = (
        axes.x0 - 50.0,
        axes.x1 + 50.0,
        axes.y0 - 50.0,
        axes.y1 + 50.0,
    );
    let mut run: Vec<(f64, f64)> = Vec::new();
    let mut runs = Vec::new();
    for (&x, &y) in s.x.iter().zip(&s.y) {
        let ok = x.is_finite() && x > 0.0 && y.is_finite() && (!axes.y_log || y > 0.0);
        if !ok {
            if run.len() > 1 {
                runs.push(std::mem::take(&mut run));
            }
            run.clear();
            continue;
        }
        run.push((axes.px(x).clamp(cx0, cx1), axes.py(y).clamp(cy0, cy1)));
    }
    if run.len() > 1 {
        runs.push(run);
    }
    runs
}

/// The legend, top right inside the frame.
fn legend(out: &mut Vec<Prim>, chart: &Chart, axes: &Axes) {
    let (x1, y0) = (axes.x1, axes.y0);
    let mut lx = x1 - 6.0;
    for s in chart.series.iter().rev() {
        let w = crate::report::pdf::text_width(&s.label, 7.5) + 22.0;
        lx -= w;
        out.push(Prim::Line {
            from: (lx, y0 + 9.0),
            to: (lx + 14.0, y0 + 9.0),
            colour: s.colour,
            width: 1.6,
        });
        out.push(Prim::Text {
            at: (lx + 17.0, y0 + 12.0),
            size: 7.5,
            anchor: Anchor::Start,
            text: s.label.clone(),
            colour: INK,
        });
    }
}

fn trim_number(v: f64) -> String {
    let t = format!("{v:.3}");
    t.trim_end_matches('0').trim_end_matches('.').to_string()
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn log_ticks_fall_on_decades_inside_the_range() {
        assert_eq!(log_ticks(1e3, 2e8), vec![1e3, 1e4, 1e5, 1e6, 1e7, 1e8]);
        assert_eq!(log_ticks(1e7, 3e8), vec![1e7, 2e7, 5e7, 1e8, 2e8]);
        assert_eq!(log_ticks(1e2, 1e12), vec![1e2, 1e4, 1e6, 1e8, 1e10, 1e12]);
        assert_eq!(log_ticks(2e7, 3e8), vec![2e7, 5e7, 1e8, 2e8]);
    }

    #[test]
    fn linear_ticks_use_a_round_step() {
        assert_eq!(
            linear_ticks(0.0, 50.0),
            vec![0.0, 10.0, 20.0, 30.0, 40.0, 50.0]
        );
        let t = linear_ticks(8.8e-6, 10.4e-6);
        assert_eq!(t.len(), 3, "{t:?}");
        assert!((t[1] - 9.5e-6).abs() < 1e-15, "{t:?}");
    }

    #[test]
    fn a_series_is_drawn_inside_a_clip_box_and_breaks_at_missing_values() {
        let chart = Chart {
            title: "t".into(),
            x_unit: "Hz".into(),
            y_label: "Q".into(),
            y_unit: String::new(),
            y_log: false,
            y_range: Some([0.0, 10.0]),
            series: vec![Series {
                label: "model".into(),
                x: vec![1e3, 1e4, 1e5, 1e6, 1e7],
                y: vec![1.0, 2.0, f64::NAN, 4.0, 5.0],
                colour: "#000000",
                width: 1.0,
                dashed: false,
            }],
        };
        let prims = layout(&chart, 400.0, 200.0);
        let polys: Vec<_> = prims
            .iter()
            .filter_map(|p| match p {
                Prim::Poly { points, .. } => Some(points.len()),
                _ => None,
            })
            .collect();
        assert_eq!(polys, vec![2, 2]);
        assert!(prims.iter().any(|p| matches!(p, Prim::Clip(_))));
    }
}
