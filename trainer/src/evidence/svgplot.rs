//! Small, dependency-free SVG line charts for reports: axes with round
//! ticks, axis titles with units, a legend, several series, optional log-y.
//! Text is left to the viewer's fonts, so the charts need no font files at
//! build or run time (plotters' SVG backend needs a system font to measure
//! labels, which a fresh CI machine may lack).

use std::fmt::Write as _;

/// One line or point series.
#[derive(Debug, Clone)]
pub struct Series {
    /// Legend label.
    pub label: String,
    /// Points (x, y); non-finite points break the line.
    pub points: Vec<(f64, f64)>,
    /// Stroke colour (CSS).
    pub color: &'static str,
    /// Dashed stroke.
    pub dashed: bool,
    /// Draw dots instead of a line.
    pub dots: bool,
}

/// A chart description.
#[derive(Debug, Clone)]
pub struct Chart {
    /// Title above the plot.
    pub title: String,
    /// X-axis title with unit.
    pub x_label: String,
    /// Y-axis title with unit.
    pub y_label: String,
    /// Logarithmic y axis (non-positive values are dropped).
    pub log_y: bool,
    /// The series.
    pub series: Vec<Series>,
}

/// Series colours that stay apart for common colour-vision deficiencies
/// (the Okabe-Ito palette, common practice in scientific plotting).
pub const PALETTE: [&str; 6] = [
    "#000000", "#0072B2", "#D55E00", "#009E73", "#CC79A7", "#E69F00",
];

// A report column is about 950 px wide: the chart is drawn at that size and
// scales with the column (width 100 %, the viewBox keeps its proportions).
// The legend sits in its own strip between the title and the plot area.
const W: f64 = 940.0;
const H: f64 = 440.0;
const L: f64 = 84.0;
const R: f64 = 24.0;
const T: f64 = 62.0;
const B: f64 = 56.0;
/// Approximate advance of one 12 px sans-serif character (for laying out
/// legend entries without measuring fonts).
const CHAR_W: f64 = 7.0;

fn nice_step(range: f64, target: usize) -> f64 {
    let raw = range / target.max(1) as f64;
    let mag = 10f64.powf(raw.log10().floor());
    let f = raw / mag;
    let nice = if f < 1.5 {
        1.0
    } else if f < 3.0 {
        2.0
    } else if f < 7.0 {
        5.0
    } else {
        10.0
    };
    nice * mag
}

fn fmt_tick(v: f64) -> String {
    if v == 0.0 {
        "0".into()
    } else if v.abs() >= 1e4 || v.abs() < 1e-3 {
        let s = format!("{v:.2e}");
        match s.split_once('e') {
            Some((m, e)) => format!("{}e{e}", m.trim_end_matches('0').trim_end_matches('.')),
            None => s,
        }
    } else {
        let s = format!("{v:.4}");
        s.trim_end_matches('0').trim_end_matches('.').to_string()
    }
}

fn esc(s: &str) -> String {
    s.replace('&', "&amp;")
        .replace('<', "&lt;")
        .replace('>', "&gt;")
}

/// The data ranges of a chart and their mapping to pixels.
struct Frame {
    x0: f64,
    x1: f64,
    y0: f64,
    y1: f64,
    log_y: bool,
}

impl Frame {
    /// The plotted value of y (its log10 on a log axis).
    fn ty(&self, y: f64) -> f64 {
        if self.log_y {
            y.log10()
        } else {
            y
        }
    }

    /// Whether a point can be drawn on this frame.
    fn drawable(&self, x: f64, y: f64) -> bool {
        x.is_finite() && y.is_finite() && (!self.log_y || y > 0.0)
    }

    fn px(&self, x: f64) -> f64 {
        L + (x - self.x0) / (self.x1 - self.x0) * (W - L - R)
    }

    fn py(&self, y: f64) -> f64 {
        H - B - (y - self.y0) / (self.y1 - self.y0) * (H - T - B)
    }
}

impl Chart {
    /// Render as a standalone `<svg>` element.
    pub fn to_svg(&self) -> String {
        let f = self.frame();
        let mut s = String::new();
        let _ = write!(
            s,
            r#"<svg xmlns="http://www.w3.org/2000/svg" viewBox="0 0 {W} {H}" width="100%" preserveAspectRatio="xMidYMid meet" font-family="sans-serif" font-size="12">"#
        );
        let _ = write!(s, r##"<rect width="{W}" height="{H}" fill="#ffffff"/>"##);
        let _ = write!(
            s,
            r#"<text x="{}" y="22" text-anchor="middle" font-size="{:.1}" font-weight="bold">{}</text>"#,
            W / 2.0,
            title_size(&self.title),
            esc(&self.title)
        );
        self.write_axes(&mut s, &f);
        self.write_series(&mut s, &f);
        self.write_legend(&mut s);
        s.push_str("</svg>");
        s
    }

    /// The ranges of every drawable point, padded; a unit range when empty.
    fn frame(&self) -> Frame {
        let mut f = Frame {
            x0: f64::INFINITY,
            x1: f64::NEG_INFINITY,
            y0: f64::INFINITY,
            y1: f64::NEG_INFINITY,
            log_y: self.log_y,
        };
        for (x, y) in self.series.iter().flat_map(|s| s.points.iter().copied()) {
            if f.drawable(x, y) {
                let y = f.ty(y);
                (f.x0, f.x1) = (f.x0.min(x), f.x1.max(x));
                (f.y0, f.y1) = (f.y0.min(y), f.y1.max(y));
            }
        }
        if !f.x0.is_finite() {
            (f.x0, f.x1, f.y0, f.y1) = (0.0, 1.0, 0.0, 1.0);
        }
        if f.x1 - f.x0 <= 0.0 {
            f.x1 = f.x0 + 1.0;
        }
        if f.y1 - f.y0 <= 0.0 {
            let pad = if f.y0 == 0.0 { 1.0 } else { f.y0.abs() * 0.1 };
            f.y0 -= pad;
            f.y1 += pad;
        }
        // Pad on both axes kinds so no line runs along the frame.
        let pad = 0.05 * (f.y1 - f.y0);
        f.y0 -= pad;
        f.y1 += pad;
        f
    }

    /// The axes box, grid lines with tick labels, and the axis titles.
    fn write_axes(&self, s: &mut String, f: &Frame) {
        let _ = write!(
            s,
            r##"<rect x="{L}" y="{T}" width="{}" height="{}" fill="none" stroke="#444"/>"##,
            W - L - R,
            H - T - B
        );
        let xs = nice_step(f.x1 - f.x0, 6);
        let mut v = (f.x0 / xs).ceil() * xs;
        while v <= f.x1 + 1e-9 * xs {
            let x = f.px(v);
            let _ = write!(
                s,
                r##"<line x1="{x:.1}" y1="{}" x2="{x:.1}" y2="{}" stroke="#ddd"/>"##,
                T,
                H - B
            );
            let _ = write!(
                s,
                r#"<text x="{x:.1}" y="{}" text-anchor="middle">{}</text>"#,
                H - B + 16.0,
                fmt_tick(v)
            );
            v += xs;
        }
        let ys = if self.log_y {
            1.0f64.max(nice_step(f.y1 - f.y0, 5).round())
        } else {
            nice_step(f.y1 - f.y0, 5)
        };
        let mut v = (f.y0 / ys).ceil() * ys;
        while v <= f.y1 + 1e-9 * ys {
            let y = f.py(v);
            let label = if self.log_y {
                format!("1e{}", v.round() as i64)
            } else {
                fmt_tick(v)
            };
            let _ = write!(
                s,
                r##"<line x1="{L}" y1="{y:.1}" x2="{}" y2="{y:.1}" stroke="#ddd"/>"##,
                W - R
            );
            let _ = write!(
                s,
                r#"<text x="{}" y="{:.1}" text-anchor="end">{label}</text>"#,
                L - 6.0,
                y + 4.0
            );
            v += ys;
        }
        let _ = write!(
            s,
            r#"<text x="{}" y="{}" text-anchor="middle">{}</text>"#,
            (L + W - R) / 2.0,
            H - 14.0,
            esc(&self.x_label)
        );
        let _ = write!(
            s,
            r#"<text x="16" y="{}" text-anchor="middle" transform="rotate(-90 16 {})">{}</text>"#,
            (T + H - B) / 2.0,
            (T + H - B) / 2.0,
            esc(&self.y_label)
        );
    }

    /// Each series as dots or as a path broken at undrawable points.
    fn write_series(&self, s: &mut String, f: &Frame) {
        for ser in &self.series {
            if ser.dots {
                for &(x, y) in &ser.points {
                    if f.drawable(x, y) {
                        let _ = write!(
                            s,
                            r#"<circle cx="{:.1}" cy="{:.1}" r="1.6" fill="{}"/>"#,
                            f.px(x),
                            f.py(f.ty(y)),
                            ser.color
                        );
                    }
                }
                continue;
            }
            let mut d = String::new();
            let mut pen = false;
            for &(x, y) in &ser.points {
                if f.drawable(x, y) {
                    let cmd = if pen { "L" } else { "M" };
                    let _ = write!(d, "{cmd}{:.1},{:.1} ", f.px(x), f.py(f.ty(y)));
                    pen = true;
                } else {
                    pen = false;
                }
            }
            let _ = write!(
                s,
                r#"<path d="{d}" fill="none" stroke="{}" stroke-width="1.5"{}/>"#,
                ser.color,
                dash_of(ser)
            );
        }
    }

    /// The legend in one row above the plot area, outside the data: a
    /// line sample (dashed as the series) or, for a dotted series, dots.
    fn write_legend(&self, s: &mut String) {
        let y = 42.0;
        let mut x = L;
        for ser in &self.series {
            if ser.dots {
                for k in 0..4 {
                    let _ = write!(
                        s,
                        r#"<circle cx="{}" cy="{y}" r="1.8" fill="{}"/>"#,
                        x + 2.0 + 6.0 * k as f64,
                        ser.color
                    );
                }
            } else {
                let _ = write!(
                    s,
                    r#"<line x1="{x}" y1="{y}" x2="{}" y2="{y}" stroke="{}" stroke-width="2"{}/>"#,
                    x + 22.0,
                    ser.color,
                    dash_of(ser)
                );
            }
            let _ = write!(
                s,
                r#"<text x="{}" y="{}">{}</text>"#,
                x + 28.0,
                y + 4.0,
                esc(&ser.label)
            );
            x += 28.0 + CHAR_W * ser.label.chars().count() as f64 + 24.0;
        }
    }
}

/// A title's font size: 14 px, smaller for a long title so it fits the
/// width (a bold sans-serif character advances about 0.6 em).
fn title_size(title: &str) -> f64 {
    let chars = title.chars().count().max(1) as f64;
    (14.0f64).min((W - 24.0) / (0.6 * chars)).max(9.0)
}

/// The stroke pattern of a dashed series.
fn dash_of(ser: &Series) -> &'static str {
    if ser.dashed {
        r#" stroke-dasharray="6 4""#
    } else {
        ""
    }
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn renders_axes_series_and_legend() {
        let c = Chart {
            title: "energy <check>".into(),
            x_label: "time (s)".into(),
            y_label: "H (J)".into(),
            log_y: false,
            series: vec![Series {
                label: "model".into(),
                points: (0..50)
                    .map(|k| (k as f64 * 0.1, (k as f64 * 0.1).sin()))
                    .collect(),
                color: PALETTE[1],
                dashed: false,
                dots: false,
            }],
        };
        let svg = c.to_svg();
        assert!(svg.starts_with("<svg") && svg.ends_with("</svg>"));
        assert!(svg.contains("time (s)") && svg.contains("H (J)") && svg.contains(">model<"));
        assert!(svg.contains("energy &lt;check&gt;"));
        assert_eq!(svg.matches("<path").count(), 1);
        // The legend sits above the plot area (y < T), outside the data.
        let legend_y: f64 = svg
            .split("<text x=\"")
            .find(|t| t.contains(">model<"))
            .and_then(|t| t.split("y=\"").nth(1))
            .and_then(|t| t.split('"').next())
            .and_then(|t| t.parse().ok())
            .unwrap();
        assert!(legend_y < T, "legend at y = {legend_y}");
    }

    #[test]
    fn nice_steps_are_round() {
        assert_eq!(nice_step(10.0, 5), 2.0);
        assert_eq!(nice_step(0.7, 6), 0.1);
        assert_eq!(nice_step(3500.0, 6), 500.0);
    }
}
