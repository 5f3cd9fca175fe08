//! A small SVG chart writer of our own: line and point charts on linear or log₁₀ axes,
//! and horizontal bar charts. Output is plain SVG 1.1 text (no scripts, no external
//! references), meant to be inlined in an HTML page.
//!
//! Log axes put their ticks at powers of ten and label them `10ᵏ` (a superscript
//! `tspan`); linear axes use 1-2-5 steps.

use std::fmt::Write;

/// Width and height of a chart in CSS pixels (it scales with the page).
pub const WIDTH: f64 = 720.0;
/// See [`WIDTH`].
pub const HEIGHT: f64 = 400.0;
const LEFT: f64 = 108.0;
const RIGHT: f64 = 24.0;
const TOP: f64 = 36.0;
const BOTTOM: f64 = 58.0;

/// Series colours: print-safe, distinguishable in greyscale by their dash patterns too.
pub const COLOURS: [&str; 4] = ["#1b5e8c", "#c0562b", "#3f7f3a", "#7a4f9a"];

/// Escapes text for XML.
pub fn esc(s: &str) -> String {
    s.replace('&', "&amp;")
        .replace('<', "&lt;")
        .replace('>', "&gt;")
        .replace('"', "&quot;")
}

/// An axis scale.
#[derive(Debug, Clone, Copy, PartialEq)]
pub enum Scale {
    /// Linear from `lo` to `hi`.
    Linear {
        /// Low end.
        lo: f64,
        /// High end.
        hi: f64,
    },
    /// Log₁₀ from `lo` to `hi` (both positive).
    Log {
        /// Low end.
        lo: f64,
        /// High end.
        hi: f64,
    },
}

impl Scale {
    /// A linear scale covering `values`, widened to nice round ends.
    pub fn linear_for(values: impl IntoIterator<Item = f64>) -> Scale {
        let (lo, hi) = range(values);
        let (lo, hi) = if lo == hi {
            (lo - 0.5 * lo.abs().max(1.0), hi + 0.5 * hi.abs().max(1.0))
        } else {
            (lo, hi)
        };
        let step = nice_step((hi - lo) / 5.0);
        Scale::Linear {
            lo: (lo / step).floor() * step,
            hi: (hi / step).ceil() * step,
        }
    }

    /// A log scale covering the positive `values`, widened to whole powers of ten.
    pub fn log_for(values: impl IntoIterator<Item = f64>) -> Scale {
        let (lo, hi) = range(values.into_iter().filter(|v| *v > 0.0 && v.is_finite()));
        let (lo, hi) = if lo.is_finite() {
            (lo, hi)
        } else {
            (1.0, 10.0)
        };
        let mut lo = 10f64.powf(lo.log10().floor());
        let mut hi = 10f64.powf(hi.log10().ceil());
        if lo >= hi {
            lo /= 10.0;
            hi *= 10.0;
        }
        Scale::Log { lo, hi }
    }

    /// Position of `v` in `[0, 1]` along the axis.
    pub fn unit(&self, v: f64) -> f64 {
        match *self {
            Scale::Linear { lo, hi } => (v - lo) / (hi - lo),
            Scale::Log { lo, hi } => (v.log10() - lo.log10()) / (hi.log10() - lo.log10()),
        }
    }

    /// Tick positions and their labels (SVG text content).
    fn ticks(&self) -> Vec<(f64, String)> {
        match *self {
            Scale::Linear { lo, hi } => {
                let step = nice_step((hi - lo) / 5.0);
                let mut out = Vec::new();
                let mut k = (lo / step).ceil() as i64;
                while (k as f64) * step <= hi + step * 1e-9 {
                    let v = k as f64 * step;
                    out.push((v, esc(&tick_label(v, step))));
                    k += 1;
                }
                out
            }
            Scale::Log { lo, hi } => {
                let (a, b) = (lo.log10().round() as i32, hi.log10().round() as i32);
                // At most about eight labelled decades.
                let every = ((b - a) / 8 + 1).max(1);
                (a..=b)
                    .filter(|k| (k - a) % every == 0)
                    .map(|k| {
                        (
                            10f64.powi(k),
                            format!("10<tspan dy=\"-7\" font-size=\"10\">{k}</tspan>"),
                        )
                    })
                    .collect()
            }
        }
    }
}

fn range(values: impl IntoIterator<Item = f64>) -> (f64, f64) {
    values
        .into_iter()
        .filter(|v| v.is_finite())
        .fold((f64::INFINITY, f64::NEG_INFINITY), |(lo, hi), v| {
            (lo.min(v), hi.max(v))
        })
}

/// A 1, 2 or 5 times a power of ten near `raw`.
fn nice_step(raw: f64) -> f64 {
    if !(raw.is_finite() && raw > 0.0) {
        return 1.0;
    }
    let p = 10f64.powf(raw.log10().floor());
    let m = raw / p;
    p * if m < 1.5 {
        1.0
    } else if m < 3.5 {
        2.0
    } else if m < 7.5 {
        5.0
    } else {
        10.0
    }
}

fn tick_label(v: f64, step: f64) -> String {
    if v == 0.0 {
        return "0".into();
    }
    let digits = (-step.log10().floor()).max(0.0) as usize;
    if v.abs() >= 1e5 || v.abs() < 1e-4 {
        format!("{v:.1e}")
    } else {
        format!("{v:.digits$}")
    }
}

/// How a series is drawn.
#[derive(Debug, Clone, Copy, PartialEq, Eq)]
pub enum Mark {
    /// A polyline through the points.
    Line,
    /// A dashed polyline.
    Dashed,
    /// Circles at the points.
    Points,
    /// A polyline with circles.
    LinePoints,
}

/// One data series.
#[derive(Debug, Clone)]
pub struct Series {
    /// Legend text.
    pub label: String,
    /// `(x, y)` points.
    pub points: Vec<(f64, f64)>,
    /// Drawing style.
    pub mark: Mark,
    /// Index into [`COLOURS`].
    pub colour: usize,
    /// Vertical error bars: half-widths per point (same length as `points`), if any.
    pub errors: Option<Vec<f64>>,
}

/// A marked point with a text label (e.g. the chosen strength).
#[derive(Debug, Clone)]
pub struct Callout {
    /// Where.
    pub at: (f64, f64),
    /// What it says.
    pub text: String,
}

/// An x–y chart.
#[derive(Debug, Clone)]
pub struct Chart {
    /// Identifier (the `id` of the `<svg>`).
    pub id: String,
    /// Accessible title.
    pub title: String,
    /// X axis label with unit.
    pub x_label: String,
    /// Y axis label with unit.
    pub y_label: String,
    /// X scale.
    pub x: Scale,
    /// Y scale.
    pub y: Scale,
    /// The data.
    pub series: Vec<Series>,
    /// Marked points.
    pub callouts: Vec<Callout>,
    /// Draw the diagonal y = x (ROC, calibration).
    pub diagonal: bool,
}

impl Chart {
    /// Pixel coordinates of a data point.
    pub fn to_px(&self, (x, y): (f64, f64)) -> (f64, f64) {
        let pw = WIDTH - LEFT - RIGHT;
        let ph = HEIGHT - TOP - BOTTOM;
        (
            LEFT + self.x.unit(x) * pw,
            TOP + (1.0 - self.y.unit(y)) * ph,
        )
    }

    fn visible(&self, (x, y): (f64, f64)) -> bool {
        let ok = |s: &Scale, v: f64| {
            v.is_finite()
                && match s {
                    Scale::Log { .. } => v > 0.0,
                    Scale::Linear { .. } => true,
                }
        };
        ok(&self.x, x) && ok(&self.y, y)
    }

    /// The SVG text.
    pub fn render(&self) -> String {
        let mut s = String::new();
        let (x0, x1) = (LEFT, WIDTH - RIGHT);
        let (y0, y1) = (TOP, HEIGHT - BOTTOM);
        let _ = write!(
            s,
            "<svg id=\"{}\" class=\"chart\" xmlns=\"http://www.w3.org/2000/svg\" viewBox=\"0 0 {WIDTH} {HEIGHT}\" role=\"img\" aria-labelledby=\"{}-title\"><title id=\"{}-title\">{}</title>",
            esc(&self.id),
            esc(&self.id),
            esc(&self.id),
            esc(&self.title)
        );
        let _ = write!(
            s,
            "<rect x=\"{x0}\" y=\"{y0}\" width=\"{}\" height=\"{}\" fill=\"#ffffff\" stroke=\"#8a8a8a\"/>",
            x1 - x0,
            y1 - y0
        );
        let _ = write!(
            s,
            "<clipPath id=\"{}-plot\"><rect x=\"{x0}\" y=\"{y0}\" width=\"{}\" height=\"{}\"/></clipPath>",
            esc(&self.id),
            x1 - x0,
            y1 - y0
        );
        // Grid lines and tick labels.
        s.push_str("<g class=\"ticks\" font-size=\"12\" fill=\"#333\">");
        for (v, label) in self.x.ticks() {
            let (px, _) = self.to_px((v, 1.0_f64.max(self.y_low())));
            if !(x0 - 0.5..=x1 + 0.5).contains(&px) {
                continue;
            }
            let _ = write!(
                s,
                "<line x1=\"{px:.1}\" y1=\"{y0}\" x2=\"{px:.1}\" y2=\"{y1}\" stroke=\"#e2e2e2\"/><text x=\"{px:.1}\" y=\"{:.1}\" text-anchor=\"middle\">{label}</text>",
                y1 + 18.0
            );
        }
        for (v, label) in self.y.ticks() {
            let (_, py) = self.to_px((self.x_low(), v));
            if !(y0 - 0.5..=y1 + 0.5).contains(&py) {
                continue;
            }
            let _ = write!(
                s,
                "<line x1=\"{x0}\" y1=\"{py:.1}\" x2=\"{x1}\" y2=\"{py:.1}\" stroke=\"#e2e2e2\"/><text x=\"{:.1}\" y=\"{:.1}\" text-anchor=\"end\">{label}</text>",
                x0 - 6.0,
                py + 4.0
            );
        }
        s.push_str("</g>");
        // Axis labels.
        let _ = write!(
            s,
            "<text x=\"{:.1}\" y=\"{:.1}\" text-anchor=\"middle\" font-size=\"13\" fill=\"#222\">{}</text>",
            (x0 + x1) / 2.0,
            HEIGHT - 14.0,
            esc(&self.x_label)
        );
        let _ = write!(
            s,
            "<text transform=\"translate(16 {:.1}) rotate(-90)\" text-anchor=\"middle\" font-size=\"13\" fill=\"#222\">{}</text>",
            (y0 + y1) / 2.0,
            esc(&self.y_label)
        );
        if self.diagonal {
            let a = self.to_px((0.0, 0.0));
            let b = self.to_px((1.0, 1.0));
            let _ = write!(
                s,
                "<line class=\"diagonal\" x1=\"{:.1}\" y1=\"{:.1}\" x2=\"{:.1}\" y2=\"{:.1}\" stroke=\"#9a9a9a\" stroke-dasharray=\"4 4\"/>",
                a.0, a.1, b.0, b.1
            );
        }
        let _ = write!(s, "<g clip-path=\"url(#{}-plot)\">", esc(&self.id));
        for (k, series) in self.series.iter().enumerate() {
            let colour = COLOURS[series.colour % COLOURS.len()];
            let pts: Vec<(f64, f64)> = series
                .points
                .iter()
                .copied()
                .filter(|p| self.visible(*p))
                .map(|p| self.to_px(p))
                .collect();
            if let Some(errors) = &series.errors {
                for (p, e) in series.points.iter().zip(errors) {
                    if !self.visible(*p) || !e.is_finite() {
                        continue;
                    }
                    let (px, lo) = self.to_px((p.0, p.1 - e));
                    let (_, hi) = self.to_px((p.0, p.1 + e));
                    let _ = write!(
                        s,
                        "<line class=\"error-bar\" x1=\"{px:.2}\" y1=\"{lo:.2}\" x2=\"{px:.2}\" y2=\"{hi:.2}\" stroke=\"{colour}\" stroke-width=\"1\"/>"
                    );
                }
            }
            let list = pts
                .iter()
                .map(|(x, y)| format!("{x:.2},{y:.2}"))
                .collect::<Vec<_>>()
                .join(" ");
            if matches!(series.mark, Mark::Line | Mark::Dashed | Mark::LinePoints) && pts.len() > 1
            {
                let dash = if series.mark == Mark::Dashed || k % 2 == 1 {
                    " stroke-dasharray=\"7 4\""
                } else {
                    ""
                };
                let _ = write!(
                    s,
                    "<polyline class=\"series\" data-series=\"{}\" fill=\"none\" stroke=\"{colour}\" stroke-width=\"2\"{dash} points=\"{list}\"/>",
                    esc(&series.label)
                );
            }
            if matches!(series.mark, Mark::Points | Mark::LinePoints) || pts.len() == 1 {
                let _ = write!(
                    s,
                    "<g class=\"points\" data-series=\"{}\" fill=\"{colour}\">",
                    esc(&series.label)
                );
                for (x, y) in &pts {
                    let _ = write!(s, "<circle cx=\"{x:.2}\" cy=\"{y:.2}\" r=\"3.5\"/>");
                }
                s.push_str("</g>");
            }
        }
        s.push_str("</g>");
        for c in &self.callouts {
            if !self.visible(c.at) {
                continue;
            }
            let (px, py) = self.to_px(c.at);
            let anchor = if px > (x0 + x1) / 2.0 { "end" } else { "start" };
            let dx = if anchor == "end" { -10.0 } else { 10.0 };
            let _ = write!(
                s,
                "<g class=\"callout\"><circle cx=\"{px:.2}\" cy=\"{py:.2}\" r=\"7\" fill=\"none\" stroke=\"#111\" stroke-width=\"2\"/><text x=\"{:.1}\" y=\"{:.1}\" text-anchor=\"{anchor}\" font-size=\"12\" fill=\"#111\">{}</text></g>",
                px + dx,
                py - 10.0,
                esc(&c.text)
            );
        }
        // Legend above the plot, left to right, when more than one series.
        if self.series.len() > 1 {
            s.push_str("<g class=\"legend\" font-size=\"12\" fill=\"#222\">");
            let mut lx = x0;
            for (k, series) in self.series.iter().enumerate() {
                let colour = COLOURS[series.colour % COLOURS.len()];
                let ly = y0 - 14.0;
                let dash = if series.mark == Mark::Dashed || k % 2 == 1 {
                    " stroke-dasharray=\"7 4\""
                } else {
                    ""
                };
                let _ = write!(
                    s,
                    "<line x1=\"{lx:.1}\" y1=\"{ly:.1}\" x2=\"{:.1}\" y2=\"{ly:.1}\" stroke=\"{colour}\" stroke-width=\"2\"{dash}/><text x=\"{:.1}\" y=\"{:.1}\">{}</text>",
                    lx + 26.0,
                    lx + 32.0,
                    ly + 4.0,
                    esc(&series.label)
                );
                lx += 48.0 + 7.0 * series.label.chars().count() as f64;
            }
            s.push_str("</g>");
        }
        s.push_str("</svg>");
        s
    }

    fn x_low(&self) -> f64 {
        match self.x {
            Scale::Linear { lo, .. } | Scale::Log { lo, .. } => lo,
        }
    }

    fn y_low(&self) -> f64 {
        match self.y {
            Scale::Linear { lo, .. } | Scale::Log { lo, .. } => lo,
        }
    }
}

/// A horizontal bar chart of signed values (largest first, top to bottom).
#[derive(Debug, Clone)]
pub struct Bars {
    /// Identifier.
    pub id: String,
    /// Accessible title.
    pub title: String,
    /// Label of the value axis, with unit.
    pub x_label: String,
    /// `(name, value)`, drawn in this order.
    pub bars: Vec<(String, f64)>,
}

impl Bars {
    /// Row height in pixels.
    pub const ROW: f64 = 22.0;

    /// The SVG text. Each bar is a `<rect class="bar" data-name=… data-value=…>`.
    pub fn render(&self) -> String {
        let label_w = 230.0;
        let (x0, x1) = (label_w, WIDTH - RIGHT);
        let top = 16.0;
        let height = top + Self::ROW * self.bars.len() as f64 + 52.0;
        let max = self
            .bars
            .iter()
            .map(|b| b.1.abs())
            .fold(0.0, f64::max)
            .max(f64::MIN_POSITIVE);
        let any_negative = self.bars.iter().any(|b| b.1 < 0.0);
        let any_positive = self.bars.iter().any(|b| b.1 > 0.0);
        let step = nice_step(max / 3.0);
        let lim = (max / step).ceil() * step;
        let (lo, hi) = (
            if any_negative { -lim } else { 0.0 },
            if any_positive || !any_negative {
                lim
            } else {
                0.0
            },
        );
        let px = |v: f64| x0 + (v - lo) / (hi - lo) * (x1 - x0);
        let mut s = String::new();
        let _ = write!(
            s,
            "<svg id=\"{}\" class=\"chart\" xmlns=\"http://www.w3.org/2000/svg\" viewBox=\"0 0 {WIDTH} {height:.0}\" role=\"img\" aria-labelledby=\"{}-title\"><title id=\"{}-title\">{}</title>",
            esc(&self.id),
            esc(&self.id),
            esc(&self.id),
            esc(&self.title)
        );
        let bottom = top + Self::ROW * self.bars.len() as f64;
        s.push_str("<g class=\"ticks\" font-size=\"12\" fill=\"#333\">");
        let mut k = (lo / step).round() as i64;
        while k as f64 * step <= hi + step * 1e-9 {
            let v = k as f64 * step;
            let x = px(v);
            let _ = write!(
                s,
                "<line x1=\"{x:.1}\" y1=\"{top}\" x2=\"{x:.1}\" y2=\"{bottom}\" stroke=\"{}\"/><text x=\"{x:.1}\" y=\"{:.1}\" text-anchor=\"middle\">{}</text>",
                if v == 0.0 { "#777" } else { "#e2e2e2" },
                bottom + 16.0,
                esc(&tick_label(v, step))
            );
            k += 1;
        }
        s.push_str("</g>");
        for (i, (name, v)) in self.bars.iter().enumerate() {
            let y = top + Self::ROW * i as f64;
            let (a, b) = (px(0.0), px(*v));
            let (left, w) = if b >= a { (a, b - a) } else { (b, a - b) };
            let colour = if *v >= 0.0 { COLOURS[0] } else { COLOURS[1] };
            let _ = write!(
                s,
                "<text x=\"{:.1}\" y=\"{:.1}\" text-anchor=\"end\" font-size=\"12\" fill=\"#222\">{}</text><rect class=\"bar\" data-name=\"{}\" data-value=\"{v:e}\" x=\"{left:.2}\" y=\"{:.1}\" width=\"{w:.2}\" height=\"{:.1}\" fill=\"{colour}\"/>",
                label_w - 8.0,
                y + Self::ROW * 0.68,
                esc(&shorten(name, 34)),
                esc(name),
                y + 3.0,
                Self::ROW - 6.0
            );
        }
        let _ = write!(
            s,
            "<text x=\"{:.1}\" y=\"{:.1}\" text-anchor=\"middle\" font-size=\"13\" fill=\"#222\">{}</text></svg>",
            (x0 + x1) / 2.0,
            bottom + 38.0,
            esc(&self.x_label)
        );
        s
    }
}

fn shorten(s: &str, n: usize) -> String {
    if s.chars().count() <= n {
        s.to_string()
    } else {
        let mut t: String = s.chars().take(n - 1).collect();
        t.push('…');
        t
    }
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn log_ticks_are_powers_of_ten() {
        let s = Scale::log_for([3e-9, 0.2]);
        assert_eq!(s, Scale::Log { lo: 1e-9, hi: 1.0 });
        let t = s.ticks();
        assert_eq!(t.first().map(|t| t.0), Some(1e-9));
        assert!(t[0].1.contains(">-9<"));
    }

    #[test]
    fn linear_ticks_are_round() {
        let s = Scale::linear_for([0.0, 0.87]);
        assert_eq!(s, Scale::Linear { lo: 0.0, hi: 1.0 });
        let labels: Vec<String> = s.ticks().into_iter().map(|t| t.1).collect();
        assert_eq!(labels, ["0", "0.2", "0.4", "0.6", "0.8", "1.0"]);
    }

    #[test]
    fn text_is_escaped() {
        assert_eq!(esc("a<b & \"c\""), "a&lt;b &amp; &quot;c&quot;");
    }
}
