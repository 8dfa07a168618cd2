//! Charts over time as inline SVG, for the report: bars (counts per hour
//! or day), lines (percentiles, drift statistics and their thresholds)
//! and a timeline (which model ran when). Pure: numbers in, SVG text out.
//!
//! Written here rather than taken from a plotting crate because what the
//! report needs is narrow and particular: charts that scale with the page
//! (a `viewBox`, no fixed pixel size), text as real SVG text in the
//! page's font, times on a UTC axis with day and hour ticks, lines broken
//! where the daemon was not running, and nothing but the SVG elements any
//! browser and printer draws.
//!
//! Invariants: every chart is one well-formed `<svg>` element with a
//! `<title>` (its name, for screen readers) and a `viewBox` of
//! [`WIDTH`] by its height; every text from outside is escaped; values
//! outside the axes are clipped to the plot, never drawn over the labels.

use std::fmt::Write;

use crate::review::{format_time, Millis, HOUR};

/// Width of every chart in SVG units (the page scales it).
pub const WIDTH: f64 = 640.0;
const LEFT: f64 = 56.0;
const RIGHT: f64 = 14.0;
const TOP: f64 = 28.0;
const BOTTOM: f64 = 28.0;
const FONT: f64 = 13.0;
const DAY: Millis = 24 * HOUR;

/// Okabe-Ito colours (as in `render`), for series.
pub const BLUE: &str = "#0072b2";
pub const VERMILLION: &str = "#d55e00";
pub const GREEN: &str = "#009e73";
pub const ORANGE: &str = "#e69f00";
pub const SKY: &str = "#56b4e9";
pub const PURPLE: &str = "#cc79a7";
pub const GREY: &str = "#777777";

/// Escapes text for XML and HTML content and attribute values.
pub fn esc(s: &str) -> String {
    let mut out = String::with_capacity(s.len());
    for c in s.chars() {
        match c {
            '&' => out.push_str("&amp;"),
            '<' => out.push_str("&lt;"),
            '>' => out.push_str("&gt;"),
            '"' => out.push_str("&quot;"),
            '\'' => out.push_str("&#39;"),
            c if c.is_control() && c != '\n' && c != '\t' => out.push('\u{fffd}'),
            c => out.push(c),
        }
    }
    out
}

/// A step of 1, 2 or 5 times a power of ten that splits `max` into at
/// most about five intervals, and the axis top (a multiple of it).
pub fn nice_axis(max: f64) -> (f64, f64) {
    let max = if max.is_finite() && max > 0.0 {
        max
    } else {
        1.0
    };
    let raw = max / 4.0;
    let p = 10f64.powf(raw.log10().floor());
    let step = [1.0, 2.0, 5.0, 10.0]
        .iter()
        .map(|m| m * p)
        .find(|s| *s >= raw)
        .unwrap_or(10.0 * p);
    (step, (max / step).ceil() * step)
}

/// A number for an axis label with as many decimals as `step` needs;
/// thousands as `k`, millions as `M`.
pub fn label_number(v: f64, step: f64) -> String {
    let a = v.abs();
    if a >= 1e6 && step >= 1e5 {
        return format!("{}M", trim(v / 1e6, 1));
    }
    if a >= 1e4 && step >= 1e3 {
        return format!("{}k", trim(v / 1e3, 1));
    }
    let decimals = if step >= 1.0 {
        0
    } else {
        (-step.log10().floor()) as usize
    };
    format!("{v:.decimals$}")
}

fn trim(v: f64, decimals: usize) -> String {
    let s = format!("{v:.decimals$}");
    if s.contains('.') {
        s.trim_end_matches('0').trim_end_matches('.').to_string()
    } else {
        s
    }
}

/// The span of time a chart shows, `from` to `to` (exclusive).
#[derive(Clone, Copy, Debug, PartialEq, Eq)]
pub struct Span {
    pub from: Millis,
    pub to: Millis,
}

impl Span {
    fn len(&self) -> Millis {
        (self.to - self.from).max(1)
    }
}

/// Ticks of the time axis: whole hours or days (UTC), at most about
/// eight, each with its label.
pub fn time_ticks(span: Span) -> Vec<(Millis, String)> {
    const STEPS: [Millis; 11] = [
        HOUR,
        2 * HOUR,
        3 * HOUR,
        6 * HOUR,
        12 * HOUR,
        DAY,
        2 * DAY,
        7 * DAY,
        14 * DAY,
        28 * DAY,
        91 * DAY,
    ];
    let step = STEPS
        .iter()
        .copied()
        .find(|s| span.len() / s <= 8)
        .unwrap_or(182 * DAY);
    let mut t = span.from.div_euclid(step) * step;
    if t < span.from {
        t += step;
    }
    let mut ticks = Vec::new();
    while t <= span.to {
        let s = format_time(t);
        let label = if step >= DAY || t.rem_euclid(DAY) == 0 {
            s[5..10].to_string()
        } else {
            s[11..16].to_string()
        };
        ticks.push((t, label));
        t += step;
    }
    ticks
}

/// The plot area and its scales.
struct Frame {
    height: f64,
    span: Span,
    top: f64,
}

impl Frame {
    fn plot_h(&self) -> f64 {
        self.height - TOP - BOTTOM
    }

    fn x(&self, t: Millis) -> f64 {
        let f = (t - self.span.from) as f64 / self.span.len() as f64;
        LEFT + f.clamp(0.0, 1.0) * (WIDTH - LEFT - RIGHT)
    }

    fn y(&self, v: f64) -> f64 {
        let f = if self.top > 0.0 { v / self.top } else { 0.0 };
        TOP + (1.0 - f.clamp(0.0, 1.0)) * self.plot_h()
    }

    /// The opening tag, title, grid, axes and legend.
    fn open(&self, title: &str, unit: &str, step: f64, legend: &[(&str, &str, bool)]) -> String {
        let mut s = String::new();
        let _ = write!(
            s,
            "<svg xmlns=\"http://www.w3.org/2000/svg\" viewBox=\"0 0 {WIDTH} {h}\" class=\"chart\" role=\"img\" font-family=\"sans-serif\" font-size=\"{FONT}\"><title>{t}</title>",
            h = self.height,
            t = esc(title)
        );
        // Horizontal grid and value labels.
        let mut v = 0.0;
        while v <= self.top + step * 1e-9 {
            let y = self.y(v);
            let _ = write!(
                s,
                "<line x1=\"{LEFT}\" y1=\"{y:.1}\" x2=\"{x2}\" y2=\"{y:.1}\" stroke=\"#e4e4e4\"/><text x=\"{lx}\" y=\"{ty:.1}\" text-anchor=\"end\" fill=\"#444\">{l}</text>",
                x2 = WIDTH - RIGHT,
                lx = LEFT - 5.0,
                ty = y + FONT * 0.35,
                l = label_number(v, step)
            );
            v += step;
        }
        // Time ticks.
        for (t, label) in time_ticks(self.span) {
            let x = self.x(t);
            let _ = write!(
                s,
                "<line x1=\"{x:.1}\" y1=\"{TOP}\" x2=\"{x:.1}\" y2=\"{y2:.1}\" stroke=\"#f0f0f0\"/><line x1=\"{x:.1}\" y1=\"{y2:.1}\" x2=\"{x:.1}\" y2=\"{y3:.1}\" stroke=\"#444\"/><text x=\"{x:.1}\" y=\"{ty:.1}\" text-anchor=\"middle\" fill=\"#444\">{label}</text>",
                y2 = TOP + self.plot_h(),
                y3 = TOP + self.plot_h() + 4.0,
                ty = TOP + self.plot_h() + 4.0 + FONT
            );
        }
        // Axes.
        let _ = write!(
            s,
            "<line x1=\"{LEFT}\" y1=\"{TOP}\" x2=\"{LEFT}\" y2=\"{b:.1}\" stroke=\"#444\"/><line x1=\"{LEFT}\" y1=\"{b:.1}\" x2=\"{r}\" y2=\"{b:.1}\" stroke=\"#444\"/>",
            b = TOP + self.plot_h(),
            r = WIDTH - RIGHT
        );
        // The unit at the top left, the legend along the top.
        let _ = write!(
            s,
            "<text x=\"4\" y=\"{y}\" fill=\"#444\">{u}</text>",
            y = FONT + 2.0,
            u = esc(unit)
        );
        let mut x = LEFT + 70.0;
        for (name, colour, dashed) in legend {
            let dash = if *dashed {
                " stroke-dasharray=\"5 3\""
            } else {
                ""
            };
            let _ = write!(
                s,
                "<line x1=\"{x:.1}\" y1=\"{y:.1}\" x2=\"{x2:.1}\" y2=\"{y:.1}\" stroke=\"{colour}\" stroke-width=\"3\"{dash}/><text x=\"{tx:.1}\" y=\"{ty:.1}\" fill=\"#222\">{n}</text>",
                y = FONT * 0.75 + 2.0,
                x2 = x + 18.0,
                tx = x + 22.0,
                ty = FONT + 2.0,
                n = esc(name)
            );
            x += 22.0 + name.chars().count() as f64 * FONT * 0.55 + 14.0;
        }
        s
    }
}

/// Bars of counts per bin (`bin` long, starting at each point's time).
pub fn bars(
    title: &str,
    unit: &str,
    span: Span,
    bin: Millis,
    values: &[(Millis, f64)],
    colour: &str,
) -> String {
    let max = values.iter().map(|v| v.1).fold(0.0, f64::max);
    let (step, top) = nice_axis(max);
    let f = Frame {
        height: 190.0,
        span,
        top,
    };
    let mut s = f.open(title, unit, step, &[]);
    let _ = write!(s, "<g fill=\"{colour}\">");
    for &(t, v) in values {
        if v <= 0.0 || t + bin <= span.from || t >= span.to {
            continue;
        }
        let (x0, x1) = (f.x(t), f.x(t + bin));
        let gap = if x1 - x0 > 3.0 { 0.6 } else { 0.0 };
        let y = f.y(v);
        let _ = write!(
            s,
            "<rect x=\"{x:.2}\" y=\"{y:.2}\" width=\"{w:.2}\" height=\"{h:.2}\"/>",
            x = x0 + gap / 2.0,
            w = (x1 - x0 - gap).max(0.3),
            h = (TOP + f.plot_h() - y).max(0.0)
        );
    }
    s.push_str("</g></svg>");
    s
}

/// One line of a line chart.
#[derive(Clone, Debug, PartialEq)]
pub struct Series {
    pub name: String,
    pub colour: &'static str,
    pub dashed: bool,
    /// (time, value), by time.
    pub points: Vec<(Millis, f64)>,
}

/// Lines over time, each broken where two points are more than `gap`
/// apart (no data between them); a point alone is drawn as a dot. The
/// value axis runs from 0 to at least `least_top`.
pub fn lines(
    title: &str,
    unit: &str,
    span: Span,
    series: &[Series],
    gap: Millis,
    least_top: f64,
) -> String {
    let max = series
        .iter()
        .flat_map(|s| s.points.iter().map(|p| p.1))
        .filter(|v| v.is_finite())
        .fold(least_top, f64::max);
    let (step, top) = nice_axis(max);
    let f = Frame {
        height: 210.0,
        span,
        top,
    };
    let legend: Vec<(&str, &str, bool)> = series
        .iter()
        .map(|s| (s.name.as_str(), s.colour, s.dashed))
        .collect();
    let mut s = f.open(title, unit, step, &legend);
    for se in series {
        let dash = if se.dashed {
            " stroke-dasharray=\"5 3\""
        } else {
            ""
        };
        let mut runs: Vec<Vec<(f64, f64)>> = Vec::new();
        let mut last: Option<Millis> = None;
        for &(t, v) in &se.points {
            if !v.is_finite() || t < span.from || t > span.to {
                last = None;
                continue;
            }
            if last.is_none_or(|l| t - l > gap) {
                runs.push(Vec::new());
            }
            runs.last_mut().expect("pushed").push((f.x(t), f.y(v)));
            last = Some(t);
        }
        for run in runs {
            if run.len() == 1 {
                let _ = write!(
                    s,
                    "<circle cx=\"{:.1}\" cy=\"{:.1}\" r=\"2\" fill=\"{}\"/>",
                    run[0].0, run[0].1, se.colour
                );
                continue;
            }
            s.push_str("<polyline fill=\"none\" stroke-width=\"1.6\" stroke-linejoin=\"round\"");
            let _ = write!(s, " stroke=\"{}\"{dash} points=\"", se.colour);
            for (k, (x, y)) in run.iter().enumerate() {
                if k > 0 {
                    s.push(' ');
                }
                let _ = write!(s, "{x:.1},{y:.1}");
            }
            s.push_str("\"/>");
        }
    }
    s.push_str("</svg>");
    s
}

/// One row of a timeline: a label and the spans it covers.
#[derive(Clone, Debug, PartialEq)]
pub struct Row {
    pub label: String,
    pub colour: &'static str,
    pub spans: Vec<(Millis, Millis)>,
}

/// Rows of spans over time (which model ran when), with a labelled tick
/// for each mark (a model put in service).
pub fn timeline(title: &str, span: Span, rows: &[Row], marks: &[(Millis, String)]) -> String {
    let row_h = 26.0;
    let height = TOP + BOTTOM + row_h * rows.len().max(1) as f64;
    let f = Frame {
        height,
        span,
        top: 1.0,
    };
    let mut s = String::new();
    let _ = write!(
        s,
        "<svg xmlns=\"http://www.w3.org/2000/svg\" viewBox=\"0 0 {WIDTH} {height}\" class=\"chart\" role=\"img\" font-family=\"sans-serif\" font-size=\"{FONT}\"><title>{t}</title>",
        t = esc(title)
    );
    let bottom = TOP + row_h * rows.len().max(1) as f64;
    for (t, label) in time_ticks(span) {
        let x = f.x(t);
        let _ = write!(
            s,
            "<line x1=\"{x:.1}\" y1=\"{TOP}\" x2=\"{x:.1}\" y2=\"{bottom:.1}\" stroke=\"#e4e4e4\"/><text x=\"{x:.1}\" y=\"{ty:.1}\" text-anchor=\"middle\" fill=\"#444\">{label}</text>",
            ty = bottom + 4.0 + FONT
        );
    }
    for (i, r) in rows.iter().enumerate() {
        let y = TOP + row_h * i as f64;
        for &(a, b) in &r.spans {
            if b < span.from || a > span.to {
                continue;
            }
            let (x0, x1) = (f.x(a), f.x(b));
            let _ = write!(
                s,
                "<rect x=\"{x0:.1}\" y=\"{y0:.1}\" width=\"{w:.1}\" height=\"{h:.1}\" fill=\"{c}\" fill-opacity=\"0.75\"/>",
                y0 = y + 4.0,
                w = (x1 - x0).max(2.0),
                h = row_h - 8.0,
                c = r.colour
            );
        }
        let _ = write!(
            s,
            "<text x=\"{x}\" y=\"{ty:.1}\" fill=\"#222\">{l}</text>",
            x = 4.0,
            ty = y + row_h / 2.0 + FONT * 0.35,
            l = esc(&r.label)
        );
    }
    for (t, label) in marks {
        if *t < span.from || *t > span.to {
            continue;
        }
        let x = f.x(*t);
        let _ = write!(
            s,
            "<line x1=\"{x:.1}\" y1=\"{y0}\" x2=\"{x:.1}\" y2=\"{bottom:.1}\" stroke=\"#222\" stroke-dasharray=\"2 2\"/><text x=\"{x:.1}\" y=\"{ty}\" text-anchor=\"middle\" fill=\"#222\">{l}</text>",
            y0 = TOP - 6.0,
            ty = TOP - 9.0,
            l = esc(label)
        );
    }
    let _ = write!(
        s,
        "<line x1=\"{LEFT}\" y1=\"{bottom:.1}\" x2=\"{r}\" y2=\"{bottom:.1}\" stroke=\"#444\"/></svg>",
        r = WIDTH - RIGHT
    );
    s
}

#[cfg(test)]
mod tests {
    use super::*;
    use crate::review::parse_time;

    #[test]
    fn axes_step_by_one_two_or_five() {
        assert_eq!(nice_axis(37.0), (10.0, 40.0));
        assert_eq!(nice_axis(100.0), (50.0, 100.0));
        assert_eq!(nice_axis(0.27), (0.1, 0.30000000000000004));
        assert_eq!(nice_axis(0.0), (0.5, 1.0));
        assert_eq!(nice_axis(36_000.0), (10_000.0, 40_000.0));
        assert_eq!(label_number(40_000.0, 10_000.0), "40k");
        assert_eq!(label_number(0.2, 0.1), "0.2");
        assert_eq!(label_number(2.5, 0.5), "2.5");
        assert_eq!(label_number(12.0, 5.0), "12");
    }

    #[test]
    fn time_ticks_fall_on_whole_hours_and_days() {
        let from = parse_time("2026-11-25T07:30:00.000Z").unwrap();
        let week = time_ticks(Span {
            from,
            to: from + 7 * DAY,
        });
        assert_eq!(week.first().unwrap().1, "11-26");
        assert_eq!(week.len(), 7);
        assert!(week.iter().all(|(t, _)| t % DAY == 0));
        let day = time_ticks(Span {
            from,
            to: from + DAY,
        });
        assert_eq!(day[0].1, "09:00");
        assert!(day.iter().any(|(_, l)| l == "11-26"));
        assert!(day.len() <= 8);
    }

    #[test]
    fn text_is_escaped() {
        assert_eq!(esc("a<b & \"c\""), "a&lt;b &amp; &quot;c&quot;");
        let svg = bars(
            "frames <per> hour",
            "frames",
            Span { from: 0, to: HOUR },
            HOUR,
            &[(0, 3.0)],
            BLUE,
        );
        assert!(svg.contains("<title>frames &lt;per&gt; hour</title>"));
    }

    #[test]
    fn lines_break_at_gaps_and_a_lone_point_is_a_dot() {
        let s = Series {
            name: "p50".into(),
            colour: BLUE,
            dashed: false,
            points: vec![
                (0, 1.0),
                (HOUR, 2.0),
                (5 * HOUR, 3.0),
                (6 * HOUR, 1.0),
                (9 * HOUR, 2.0),
            ],
        };
        let svg = lines(
            "t",
            "ms",
            Span {
                from: 0,
                to: 10 * HOUR,
            },
            &[s],
            HOUR,
            0.0,
        );
        assert_eq!(svg.matches("<polyline").count(), 2);
        assert_eq!(svg.matches("<circle").count(), 1);
    }
}
