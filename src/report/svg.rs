//! A small hand-written SVG writer: plot areas with linear axes, ticks,
//! text, rectangles, lines, paths and point markers. Numbers are printed
//! with fixed decimals so that the same data always gives the same bytes.

use std::fmt::Write as _;

/// Shared look of every plot. Shapes and dash patterns carry the meaning,
/// so that a grey-scale print still tells the series apart.
pub const STYLE: &str = "\
.riffle-plot{font-family:sans-serif;font-size:12px;fill:#222}\
.riffle-plot .frame{fill:none;stroke:#333;stroke-width:1}\
.riffle-plot .tick{stroke:#333;stroke-width:1}\
.riffle-plot .grid{stroke:#e4e4e4;stroke-width:1}\
.riffle-plot .title{font-size:14px;font-weight:bold}\
.riffle-plot .note{font-size:11px;fill:#444}\
.riffle-plot .bar{fill:#a7c4b5;stroke:#2e4a3f;stroke-width:0.6}\
.riffle-plot .bar-alt{fill:#d8c7a3;stroke:#5a4a2a;stroke-width:0.6}\
.riffle-plot .ref-density{fill:none;stroke:#1b2f4d;stroke-width:2;stroke-dasharray:7 4}\
.riffle-plot .observed{stroke:#8c1c13;stroke-width:2.5}\
.riffle-plot .observed-mirror{stroke:#8c1c13;stroke-width:1.5;stroke-dasharray:2 3}\
.riffle-plot .pi0{stroke:#3d2b56;stroke-width:2;stroke-dasharray:10 3 2 3}\
.riffle-plot .diagonal{stroke:#333;stroke-width:1;stroke-dasharray:4 3}\
.riffle-plot .band{fill:#d4d4d4;stroke:none}\
.riffle-plot .qq-perm{fill:#2e4a3f;stroke:none}\
.riffle-plot .qq-param{fill:none;stroke:#8a5a00;stroke-width:1}\
.riffle-plot .volcano-other{fill:none;stroke:#8d8d8d;stroke-width:0.8}\
.riffle-plot .volcano-hit{fill:#8c1c13;stroke:#3a0a06;stroke-width:0.5}\
.riffle-plot .threshold{stroke:#555;stroke-width:1;stroke-dasharray:3 3}\
.riffle-plot .legend-box{fill:#fff;stroke:#999;stroke-width:0.8}";

pub fn escape(text: &str) -> String {
    let mut out = String::with_capacity(text.len());
    for c in text.chars() {
        match c {
            '&' => out.push_str("&amp;"),
            '<' => out.push_str("&lt;"),
            '>' => out.push_str("&gt;"),
            '"' => out.push_str("&quot;"),
            '\'' => out.push_str("&#39;"),
            _ => out.push(c),
        }
    }
    out
}

/// Pixel coordinates to two decimals: finer than any screen, and stable.
fn px(v: f64) -> String {
    let v = if v.is_finite() { v } else { 0.0 };
    let r = (v * 100.0).round() / 100.0;
    if r == 0.0 {
        "0".into()
    } else {
        let s = format!("{r:.2}");
        s.trim_end_matches('0').trim_end_matches('.').to_string()
    }
}

/// A number for a tick label: as few digits as the tick step needs.
pub fn tick_label(v: f64, step: f64) -> String {
    if v == 0.0 {
        return "0".into();
    }
    let magnitude = v.abs().max(step.abs());
    if !(1e-3..1e6).contains(&magnitude) {
        return format!("{v:.1e}");
    }
    let decimals = if step >= 1.0 {
        0
    } else {
        (-step.log10().floor()) as usize
    };
    format!("{v:.decimals$}")
}

/// Evenly spaced "round" ticks (1, 2, 5 x 10^k) covering [lo, hi].
pub fn nice_ticks(lo: f64, hi: f64, about: usize) -> (Vec<f64>, f64) {
    if !(lo.is_finite() && hi.is_finite()) || hi <= lo {
        return (vec![lo], 1.0);
    }
    let raw = (hi - lo) / about.max(1) as f64;
    let power = 10f64.powf(raw.log10().floor());
    let step = [1.0, 2.0, 5.0, 10.0]
        .iter()
        .map(|m| m * power)
        .find(|s| *s >= raw)
        .unwrap_or(10.0 * power);
    let first = (lo / step).ceil() as i64;
    let last = (hi / step).floor() as i64;
    let ticks = (first..=last).map(|k| k as f64 * step).collect();
    (ticks, step)
}

pub struct Svg {
    width: f64,
    height: f64,
    body: String,
}

impl Svg {
    pub fn new(width: f64, height: f64) -> Self {
        Svg {
            width,
            height,
            body: String::new(),
        }
    }

    pub fn rect(&mut self, class: &str, x: f64, y: f64, w: f64, h: f64, data: &str) {
        let _ = writeln!(
            self.body,
            r#"<rect class="{class}" x="{}" y="{}" width="{}" height="{}"{data}/>"#,
            px(x),
            px(y),
            px(w.max(0.0)),
            px(h.max(0.0))
        );
    }

    pub fn line(&mut self, class: &str, x1: f64, y1: f64, x2: f64, y2: f64) {
        let _ = writeln!(
            self.body,
            r#"<line class="{class}" x1="{}" y1="{}" x2="{}" y2="{}"/>"#,
            px(x1),
            px(y1),
            px(x2),
            px(y2)
        );
    }

    /// A polyline through the points (a closed polygon with `close`).
    pub fn polyline(&mut self, class: &str, points: &[(f64, f64)], close: bool) {
        if points.is_empty() {
            return;
        }
        let mut d = String::with_capacity(points.len() * 14);
        for (i, (x, y)) in points.iter().enumerate() {
            d.push(if i == 0 { 'M' } else { 'L' });
            let _ = write!(d, "{},{}", px(*x), px(*y));
        }
        if close {
            d.push('Z');
        }
        let _ = writeln!(self.body, r#"<path class="{class}" d="{d}"/>"#);
    }

    /// A circle marker.
    pub fn circle(&mut self, class: &str, x: f64, y: f64, r: f64) {
        let _ = writeln!(
            self.body,
            r#"<circle class="{class}" cx="{}" cy="{}" r="{}"/>"#,
            px(x),
            px(y),
            px(r)
        );
    }

    /// An upward triangle marker, optionally with a hover title.
    pub fn triangle(&mut self, class: &str, x: f64, y: f64, size: f64, title: Option<&str>) {
        let h = size * 0.866;
        let d = format!(
            "M{},{}l{},{}h{}Z",
            px(x),
            px(y - h * 0.66),
            px(size / 2.0),
            px(h),
            px(-size)
        );
        match title {
            Some(t) => {
                let _ = writeln!(
                    self.body,
                    r#"<path class="{class}" d="{d}"><title>{}</title></path>"#,
                    escape(t)
                );
            }
            None => {
                let _ = writeln!(self.body, r#"<path class="{class}" d="{d}"/>"#);
            }
        }
    }

    pub fn text(&mut self, class: &str, x: f64, y: f64, anchor: &str, text: &str) {
        let _ = writeln!(
            self.body,
            r#"<text class="{class}" x="{}" y="{}" text-anchor="{anchor}">{}</text>"#,
            px(x),
            px(y),
            escape(text)
        );
    }

    /// Text turned a quarter anticlockwise (y-axis labels).
    pub fn vertical_text(&mut self, class: &str, x: f64, y: f64, text: &str) {
        let _ = writeln!(
            self.body,
            r#"<text class="{class}" x="0" y="0" text-anchor="middle" transform="translate({},{}) rotate(-90)">{}</text>"#,
            px(x),
            px(y),
            escape(text)
        );
    }

    /// A small legend: (marker kind, class, label) rows in a box.
    pub fn legend(&mut self, x: f64, y: f64, rows: &[(LegendMark, &str, &str)]) {
        let width = 18.0
            + rows
                .iter()
                .map(|(_, _, l)| l.chars().count() as f64 * 6.6)
                .fold(0.0, f64::max)
            + 30.0;
        let height = rows.len() as f64 * 18.0 + 8.0;
        let _ = writeln!(self.body, r#"<g class="legend">"#);
        self.rect("legend-box", x, y, width, height, "");
        for (i, (mark, class, label)) in rows.iter().enumerate() {
            let cy = y + 13.0 + i as f64 * 18.0;
            match mark {
                LegendMark::Line => self.line(class, x + 6.0, cy, x + 30.0, cy),
                LegendMark::Box => self.rect(class, x + 8.0, cy - 5.0, 18.0, 10.0, ""),
                LegendMark::Circle => self.circle(class, x + 18.0, cy, 3.0),
                LegendMark::Triangle => self.triangle(class, x + 18.0, cy + 1.0, 8.0, None),
            }
            self.text("note", x + 36.0, cy + 4.0, "start", label);
        }
        let _ = writeln!(self.body, "</g>");
    }

    /// Opens a group; the caller closes it with [`Svg::end_group`].
    pub fn group(&mut self, id: &str) {
        let _ = writeln!(self.body, r#"<g id="{}">"#, escape(id));
    }

    pub fn end_group(&mut self) {
        self.body.push_str("</g>\n");
    }

    /// The document as a standalone .svg file.
    pub fn to_file(&self, label: &str) -> String {
        self.render(r#" xmlns="http://www.w3.org/2000/svg""#, label)
    }

    /// The same drawing for inline use in HTML, where the namespace is implied.
    pub fn to_inline(&self, label: &str) -> String {
        self.render("", label)
    }

    fn render(&self, namespace: &str, label: &str) -> String {
        format!(
            "<svg{namespace} class=\"riffle-plot\" role=\"img\" aria-label=\"{}\" \
             viewBox=\"0 0 {} {}\" width=\"{}\" height=\"{}\">\n<style>{STYLE}</style>\n{}</svg>\n",
            escape(label),
            px(self.width),
            px(self.height),
            px(self.width),
            px(self.height),
            self.body
        )
    }
}

#[derive(Clone, Copy)]
pub enum LegendMark {
    Line,
    Box,
    Circle,
    Triangle,
}

/// A rectangular plot area with linear data ranges.
#[derive(Clone, Copy)]
pub struct Axes {
    pub left: f64,
    pub top: f64,
    pub width: f64,
    pub height: f64,
    pub x_range: (f64, f64),
    pub y_range: (f64, f64),
}

impl Axes {
    pub fn x(&self, v: f64) -> f64 {
        let (lo, hi) = self.x_range;
        self.left + (v - lo) / (hi - lo) * self.width
    }

    pub fn y(&self, v: f64) -> f64 {
        let (lo, hi) = self.y_range;
        self.top + self.height - (v - lo) / (hi - lo) * self.height
    }

    pub fn bottom(&self) -> f64 {
        self.top + self.height
    }

    pub fn right(&self) -> f64 {
        self.left + self.width
    }

    /// Grid, frame, ticks and axis labels.
    pub fn draw(&self, svg: &mut Svg, x_label: &str, y_label: &str) {
        let (x_ticks, x_step) = nice_ticks(self.x_range.0, self.x_range.1, 6);
        let (y_ticks, y_step) = nice_ticks(self.y_range.0, self.y_range.1, 5);
        for &t in &y_ticks {
            let y = self.y(t);
            svg.line("grid", self.left, y, self.right(), y);
        }
        svg.rect("frame", self.left, self.top, self.width, self.height, "");
        for &t in &x_ticks {
            let x = self.x(t);
            svg.line("tick", x, self.bottom(), x, self.bottom() + 5.0);
            svg.text(
                "tick-label",
                x,
                self.bottom() + 18.0,
                "middle",
                &tick_label(t, x_step),
            );
        }
        for &t in &y_ticks {
            let y = self.y(t);
            svg.line("tick", self.left - 5.0, y, self.left, y);
            svg.text(
                "tick-label",
                self.left - 8.0,
                y + 4.0,
                "end",
                &tick_label(t, y_step),
            );
        }
        svg.text(
            "axis-label",
            self.left + self.width / 2.0,
            self.bottom() + 36.0,
            "middle",
            x_label,
        );
        svg.vertical_text(
            "axis-label",
            self.left - 46.0,
            self.top + self.height / 2.0,
            y_label,
        );
    }
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn ticks_are_round_and_inside() {
        let (t, step) = nice_ticks(0.0, 1.0, 5);
        assert_eq!(step, 0.2);
        assert_eq!(t.len(), 6);
        let (t, _) = nice_ticks(-3.7, 4.2, 6);
        assert!(t.iter().all(|v| (-3.7..=4.2).contains(v)));
        assert_eq!(tick_label(0.4, 0.2), "0.4");
        assert_eq!(tick_label(20.0, 5.0), "20");
    }

    #[test]
    fn text_is_escaped_and_numbers_are_stable() {
        assert_eq!(escape("a<b & \"c\""), "a&lt;b &amp; &quot;c&quot;");
        assert_eq!(px(1.005_000_1), "1.01");
        assert_eq!(px(2.0), "2");
        assert_eq!(px(-0.001), "0");
    }
}
