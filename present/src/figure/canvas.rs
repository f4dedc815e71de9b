//! The drawing layer shared by every figure: an SVG builder working in points (1/72 in),
//! text turned into vector outlines from an embedded font, axes with tick marks, a legend
//! and caption wrapping.
//!
//! Text is never written as an SVG `<text>` element: every string is converted to a `<path>`
//! from the glyph outlines of DejaVu Sans (embedded from the `dejavu` crate, Bitstream Vera
//! licence), so a figure looks the same in a browser, in the PNG rasteriser and in the PDF
//! converter on a machine with no fonts installed. The string itself is kept in the path's
//! `aria-label` so the SVG stays searchable and accessible.

use std::fmt::Write as _;
use std::sync::OnceLock;

use ttf_parser::{Face, OutlineBuilder};

use super::FigureError;

// Colours from the Okabe & Ito colour-blind-safe palette (black, sky blue, bluish green,
// blue, vermillion), plus neutral greys for ink and grid.
pub(crate) const BLACK: &str = "#000000";
pub(crate) const SKY: &str = "#56B4E9";
pub(crate) const GREEN: &str = "#009E73";
pub(crate) const BLUE: &str = "#0072B2";
pub(crate) const VERMILLION: &str = "#D55E00";
pub(crate) const INK: &str = "#1F1F1F";
pub(crate) const MUTED: &str = "#5A5A5A";
pub(crate) const PAIR_GREY: &str = "#8C8C8C";
pub(crate) const GRID: &str = "#E3E3E3";

/// Type sizes in points, the same for single- and double-column figures so that text
/// matches the body text of a journal page at 100 % scale.
pub(crate) const FS_LABEL: f64 = 8.0;
pub(crate) const FS_TICK: f64 = 7.0;
pub(crate) const FS_SMALL: f64 = 6.5;
pub(crate) const TICK_LEN: f64 = 3.0;

/// Formats a coordinate with two decimals, trimming trailing zeros; never prints `-0`.
pub(crate) fn n(x: f64) -> String {
    if !x.is_finite() {
        return "0".to_string();
    }
    let mut s = format!("{x:.2}");
    if s.contains('.') {
        while s.ends_with('0') {
            s.pop();
        }
        if s.ends_with('.') {
            s.pop();
        }
    }
    if s == "-0" {
        s = "0".to_string();
    }
    s
}

/// Escapes text for an XML attribute or element body.
pub(crate) fn xml_escape(s: &str) -> String {
    let mut out = String::with_capacity(s.len());
    for c in s.chars() {
        match c {
            '&' => out.push_str("&amp;"),
            '<' => out.push_str("&lt;"),
            '>' => out.push_str("&gt;"),
            '"' => out.push_str("&quot;"),
            '\'' => out.push_str("&apos;"),
            c => out.push(c),
        }
    }
    out
}

fn font() -> Result<&'static Face<'static>, FigureError> {
    static FONT: OnceLock<Option<Face<'static>>> = OnceLock::new();
    FONT.get_or_init(|| Face::parse(dejavu::sans::regular(), 0).ok())
        .as_ref()
        .ok_or_else(|| FigureError::Render {
            figure: "text".to_string(),
            reason: "the embedded DejaVu Sans font could not be parsed".to_string(),
        })
}

fn glyph_for(face: &Face<'_>, c: char) -> ttf_parser::GlyphId {
    face.glyph_index(c)
        .or_else(|| face.glyph_index('?'))
        .unwrap_or(ttf_parser::GlyphId(0))
}

/// Advance width of `s` at `size` points.
pub(crate) fn text_width(s: &str, size: f64) -> Result<f64, FigureError> {
    let face = font()?;
    let scale = size / f64::from(face.units_per_em());
    let units: f64 = s
        .chars()
        .map(|c| f64::from(face.glyph_hor_advance(glyph_for(face, c)).unwrap_or(0)))
        .sum();
    Ok(units * scale)
}

struct PathSink<'a> {
    d: &'a mut String,
    x0: f64,
    y0: f64,
    s: f64,
}

impl PathSink<'_> {
    fn pt(&mut self, x: f32, y: f32) {
        let px = self.x0 + f64::from(x) * self.s;
        let py = self.y0 - f64::from(y) * self.s;
        let _ = write!(self.d, "{} {}", n(px), n(py));
    }
}

impl OutlineBuilder for PathSink<'_> {
    fn move_to(&mut self, x: f32, y: f32) {
        self.d.push('M');
        self.pt(x, y);
    }
    fn line_to(&mut self, x: f32, y: f32) {
        self.d.push('L');
        self.pt(x, y);
    }
    fn quad_to(&mut self, x1: f32, y1: f32, x: f32, y: f32) {
        self.d.push('Q');
        self.pt(x1, y1);
        self.d.push(' ');
        self.pt(x, y);
    }
    fn curve_to(&mut self, x1: f32, y1: f32, x2: f32, y2: f32, x: f32, y: f32) {
        self.d.push('C');
        self.pt(x1, y1);
        self.d.push(' ');
        self.pt(x2, y2);
        self.d.push(' ');
        self.pt(x, y);
    }
    fn close(&mut self) {
        self.d.push('Z');
    }
}

/// Path data of `s` set at `size` points with its baseline starting at (x, y).
fn text_outline(s: &str, x: f64, y: f64, size: f64) -> Result<String, FigureError> {
    let face = font()?;
    let scale = size / f64::from(face.units_per_em());
    let mut d = String::new();
    let mut pen = x;
    for c in s.chars() {
        let g = glyph_for(face, c);
        let mut sink = PathSink {
            d: &mut d,
            x0: pen,
            y0: y,
            s: scale,
        };
        let _ = face.outline_glyph(g, &mut sink);
        pen += f64::from(face.glyph_hor_advance(g).unwrap_or(0)) * scale;
    }
    Ok(d)
}

#[derive(Clone, Copy, Debug, PartialEq)]
pub(crate) enum Anchor {
    Start,
    Middle,
    End,
}

#[derive(Clone, Copy, Debug, PartialEq)]
pub(crate) enum LineStyle {
    Solid,
    Dashed,
    DashDot,
    Dotted,
}

#[derive(Clone, Copy, Debug)]
pub(crate) struct Stroke {
    pub color: &'static str,
    pub width: f64,
    pub dash: LineStyle,
    pub opacity: f64,
}

impl Stroke {
    pub(crate) const fn new(color: &'static str, width: f64, dash: LineStyle) -> Self {
        Self {
            color,
            width,
            dash,
            opacity: 1.0,
        }
    }

    fn attrs(&self) -> String {
        let mut a = format!(
            " fill=\"none\" stroke=\"{}\" stroke-width=\"{}\"",
            self.color,
            n(self.width)
        );
        let w = self.width.max(0.5);
        let pattern = match self.dash {
            LineStyle::Solid => None,
            LineStyle::Dashed => Some(format!("{} {}", n(4.5 * w), n(2.2 * w))),
            LineStyle::DashDot => Some(format!(
                "{} {} {} {}",
                n(5.0 * w),
                n(1.8 * w),
                n(1.0 * w),
                n(1.8 * w)
            )),
            LineStyle::Dotted => Some(format!("{} {}", n(1.0 * w), n(1.6 * w))),
        };
        if let Some(p) = pattern {
            let _ = write!(a, " stroke-dasharray=\"{p}\"");
        }
        if self.opacity < 1.0 {
            let _ = write!(a, " stroke-opacity=\"{}\"", n(self.opacity));
        }
        a
    }
}

#[derive(Clone, Copy, Debug, PartialEq)]
pub(crate) enum Marker {
    Circle,
    Square,
    Diamond,
    TriangleDown,
}

#[derive(Clone, Copy, Debug)]
pub(crate) struct MarkerStyle {
    pub shape: Marker,
    pub size: f64,
    pub fill: &'static str,
    pub stroke: &'static str,
}

/// A rectangle in points: left, top, width, height.
#[derive(Clone, Copy, Debug, PartialEq)]
pub(crate) struct Rect {
    pub x: f64,
    pub y: f64,
    pub w: f64,
    pub h: f64,
}

impl Rect {
    pub(crate) fn right(&self) -> f64 {
        self.x + self.w
    }
    pub(crate) fn bottom(&self) -> f64 {
        self.y + self.h
    }
    pub(crate) fn as_array(&self) -> [f64; 4] {
        [self.x, self.y, self.w, self.h]
    }
}

/// An SVG document being written, in points.
pub(crate) struct Svg {
    pub w: f64,
    pub h: f64,
    prefix: String,
    defs: String,
    body: String,
    clips: usize,
}

impl Svg {
    pub(crate) fn new(w: f64, h: f64, prefix: &str) -> Self {
        let prefix: String = prefix
            .chars()
            .map(|c| if c.is_ascii_alphanumeric() { c } else { '-' })
            .collect();
        let mut s = Self {
            w,
            h,
            prefix,
            defs: String::new(),
            body: String::new(),
            clips: 0,
        };
        s.rect(
            Rect {
                x: 0.0,
                y: 0.0,
                w,
                h,
            },
            Some(("#FFFFFF", 1.0)),
            None,
            "background",
        );
        s
    }

    /// Registers a rectangular clip region and returns its id.
    pub(crate) fn clip(&mut self, r: Rect) -> String {
        self.clips += 1;
        let id = format!("{}-clip{}", self.prefix, self.clips);
        let _ = write!(
            self.defs,
            "<clipPath id=\"{id}\"><rect x=\"{}\" y=\"{}\" width=\"{}\" height=\"{}\"/></clipPath>",
            n(r.x),
            n(r.y),
            n(r.w),
            n(r.h)
        );
        id
    }

    /// Opens a group; `attrs` are extra presentation attributes (e.g. a shared fill).
    pub(crate) fn open(&mut self, class: &str, clip: Option<&str>, attrs: &str) {
        let _ = write!(self.body, "<g class=\"{class}\"");
        if let Some(id) = clip {
            let _ = write!(self.body, " clip-path=\"url(#{id})\"");
        }
        let _ = writeln!(self.body, "{attrs}>");
    }

    pub(crate) fn close(&mut self) {
        self.body.push_str("</g>\n");
    }

    pub(crate) fn line(&mut self, x1: f64, y1: f64, x2: f64, y2: f64, st: &Stroke, class: &str) {
        let _ = writeln!(
            self.body,
            "<path class=\"{class}\" d=\"M{} {}L{} {}\"{}/>",
            n(x1),
            n(y1),
            n(x2),
            n(y2),
            st.attrs()
        );
    }

    pub(crate) fn polyline(&mut self, pts: &[(f64, f64)], st: &Stroke, class: &str) {
        if pts.len() < 2 {
            return;
        }
        let mut d = String::new();
        for (i, (x, y)) in pts.iter().enumerate() {
            d.push(if i == 0 { 'M' } else { 'L' });
            let _ = write!(d, "{} {}", n(*x), n(*y));
        }
        let _ = writeln!(
            self.body,
            "<path class=\"{class}\" d=\"{d}\"{} stroke-linejoin=\"round\"/>",
            st.attrs()
        );
    }

    /// A filled closed polygon without outline (shaded bands).
    pub(crate) fn area(&mut self, pts: &[(f64, f64)], fill: &str, opacity: f64, class: &str) {
        if pts.len() < 3 {
            return;
        }
        let mut d = String::new();
        for (i, (x, y)) in pts.iter().enumerate() {
            d.push(if i == 0 { 'M' } else { 'L' });
            let _ = write!(d, "{} {}", n(*x), n(*y));
        }
        d.push('Z');
        let _ = writeln!(
            self.body,
            "<path class=\"{class}\" d=\"{d}\" fill=\"{fill}\" fill-opacity=\"{}\" stroke=\"none\"/>",
            n(opacity)
        );
    }

    /// A vertical error bar from y1 to y2 at x with end caps of half-width `cap`.
    pub(crate) fn error_bar(
        &mut self,
        x: f64,
        y1: f64,
        y2: f64,
        cap: f64,
        st: &Stroke,
        class: &str,
    ) {
        let _ = writeln!(
            self.body,
            "<path class=\"{class}\" d=\"M{x} {a}L{x} {b}M{l} {a}L{r} {a}M{l} {b}L{r} {b}\"{}/>",
            st.attrs(),
            x = n(x),
            a = n(y1),
            b = n(y2),
            l = n(x - cap),
            r = n(x + cap),
        );
    }

    /// The interval `lo..hi` (data units of `ys`) as a vertical bar at x: [`Svg::error_bar`].
    #[allow(clippy::too_many_arguments)]
    pub(crate) fn interval(
        &mut self,
        x: f64,
        ys: &Scale,
        lo: f64,
        hi: f64,
        cap: f64,
        st: &Stroke,
        class: &str,
    ) {
        self.error_bar(x, ys.map(lo), ys.map(hi), cap, st, class);
    }

    /// A density histogram in a group `histogram` clipped by `clip`: bar i spans
    /// `edges[i]..edges[i + 1]` from zero to `density[i]`, with a thin BLUE edge, filled SKY
    /// (class `hist-bar`) or, where `tail(i)`, BLUE (class `hist-bar tail`).
    pub(crate) fn histogram(
        &mut self,
        clip: &str,
        (xs, ys): (&Scale, &Scale),
        edges: &[f64],
        density: &[f64],
        tail: &dyn Fn(usize) -> bool,
    ) {
        self.open("histogram", Some(clip), "");
        let edge = Stroke::new(BLUE, 0.3, LineStyle::Solid);
        for (i, &d) in density.iter().enumerate() {
            let (x0, x1) = (xs.map(edges[i]), xs.map(edges[i + 1]));
            let y = ys.map(d);
            let (fill, opacity, class) = if tail(i) {
                (BLUE, 0.9, "hist-bar tail")
            } else {
                (SKY, 0.55, "hist-bar")
            };
            self.rect(
                Rect {
                    x: x0,
                    y,
                    w: x1 - x0,
                    h: ys.map(0.0) - y,
                },
                Some((fill, opacity)),
                Some(&edge),
                class,
            );
        }
        self.close();
    }

    pub(crate) fn rect(
        &mut self,
        r: Rect,
        fill: Option<(&str, f64)>,
        stroke: Option<&Stroke>,
        class: &str,
    ) {
        let _ = write!(
            self.body,
            "<rect class=\"{class}\" x=\"{}\" y=\"{}\" width=\"{}\" height=\"{}\"",
            n(r.x),
            n(r.y),
            n(r.w.max(0.0)),
            n(r.h.max(0.0))
        );
        match fill {
            Some((c, o)) => {
                let _ = write!(self.body, " fill=\"{c}\"");
                if o < 1.0 {
                    let _ = write!(self.body, " fill-opacity=\"{}\"", n(o));
                }
            }
            None => self.body.push_str(" fill=\"none\""),
        }
        if let Some(st) = stroke {
            let a = st.attrs().replace(" fill=\"none\"", "");
            self.body.push_str(&a);
        }
        self.body.push_str("/>\n");
    }

    /// A circle inheriting its paint from the enclosing group (used for many faint points).
    pub(crate) fn dot(&mut self, x: f64, y: f64, r: f64, class: &str) {
        let _ = writeln!(
            self.body,
            "<circle class=\"{class}\" cx=\"{}\" cy=\"{}\" r=\"{}\"/>",
            n(x),
            n(y),
            n(r)
        );
    }

    pub(crate) fn marker(&mut self, x: f64, y: f64, m: &MarkerStyle, class: &str) {
        let s = m.size / 2.0;
        let paint = format!(
            " fill=\"{}\" stroke=\"{}\" stroke-width=\"0.5\"",
            m.fill, m.stroke
        );
        let _ = match m.shape {
            Marker::Circle => writeln!(
                self.body,
                "<circle class=\"{class}\" cx=\"{}\" cy=\"{}\" r=\"{}\"{paint}/>",
                n(x),
                n(y),
                n(s)
            ),
            Marker::Square => {
                let h = s * 0.9;
                writeln!(
                    self.body,
                    "<rect class=\"{class}\" x=\"{}\" y=\"{}\" width=\"{}\" height=\"{}\"{paint}/>",
                    n(x - h),
                    n(y - h),
                    n(2.0 * h),
                    n(2.0 * h)
                )
            }
            Marker::Diamond => {
                let h = s * 1.2;
                writeln!(
                    self.body,
                    "<path class=\"{class}\" d=\"M{} {}L{} {}L{} {}L{} {}Z\"{paint}/>",
                    n(x),
                    n(y - h),
                    n(x + h),
                    n(y),
                    n(x),
                    n(y + h),
                    n(x - h),
                    n(y)
                )
            }
            Marker::TriangleDown => {
                let h = s * 1.15;
                writeln!(
                    self.body,
                    "<path class=\"{class}\" d=\"M{} {}L{} {}L{} {}Z\"{paint}/>",
                    n(x - h),
                    n(y - h * 0.6),
                    n(x + h),
                    n(y - h * 0.6),
                    n(x),
                    n(y + h)
                )
            }
        };
    }

    /// Sets `s` as vector outlines with its baseline at y; `anchor` places it horizontally.
    #[allow(clippy::too_many_arguments)]
    pub(crate) fn text(
        &mut self,
        s: &str,
        x: f64,
        y: f64,
        size: f64,
        anchor: Anchor,
        color: &str,
        class: &str,
    ) -> Result<(), FigureError> {
        let x0 = aligned_start(s, x, size, anchor)?;
        let d = text_outline(s, x0, y, size)?;
        let _ = writeln!(
            self.body,
            "<path class=\"text {class}\" aria-label=\"{}\" fill=\"{color}\" d=\"{d}\"/>",
            xml_escape(s)
        );
        Ok(())
    }

    /// Like [`Svg::text`] but rotated a quarter turn anticlockwise about (x, y), for y labels.
    #[allow(clippy::too_many_arguments)]
    pub(crate) fn text_vertical(
        &mut self,
        s: &str,
        x: f64,
        y: f64,
        size: f64,
        anchor: Anchor,
        color: &str,
        class: &str,
    ) -> Result<(), FigureError> {
        let x0 = aligned_start(s, x, size, anchor)?;
        let d = text_outline(s, x0, y, size)?;
        let _ = writeln!(
            self.body,
            "<path class=\"text {class}\" aria-label=\"{}\" fill=\"{color}\" transform=\"rotate(-90 {} {})\" d=\"{d}\"/>",
            xml_escape(s),
            n(x),
            n(y)
        );
        Ok(())
    }

    pub(crate) fn finish(self, title: &str) -> String {
        let w_in = self.w / 72.0;
        let h_in = self.h / 72.0;
        let mut out = String::with_capacity(self.body.len() + self.defs.len() + 512);
        out.push_str("<?xml version=\"1.0\" encoding=\"UTF-8\"?>\n");
        let _ = writeln!(
            out,
            "<svg xmlns=\"http://www.w3.org/2000/svg\" width=\"{}in\" height=\"{}in\" viewBox=\"0 0 {} {}\" role=\"img\" aria-label=\"{}\">",
            fmt_in(w_in),
            fmt_in(h_in),
            n(self.w),
            n(self.h),
            xml_escape(title)
        );
        let _ = writeln!(out, "<title>{}</title>", xml_escape(title));
        if !self.defs.is_empty() {
            let _ = writeln!(out, "<defs>{}</defs>", self.defs);
        }
        out.push_str(&self.body);
        out.push_str("</svg>\n");
        out
    }
}

fn fmt_in(x: f64) -> String {
    let mut s = format!("{x:.4}");
    while s.ends_with('0') {
        s.pop();
    }
    if s.ends_with('.') {
        s.pop();
    }
    s
}

fn aligned_start(s: &str, x: f64, size: f64, anchor: Anchor) -> Result<f64, FigureError> {
    Ok(match anchor {
        Anchor::Start => x,
        Anchor::Middle => x - text_width(s, size)? / 2.0,
        Anchor::End => x - text_width(s, size)?,
    })
}

/// Maps data values to page coordinates along one axis.
#[derive(Clone, Copy, Debug)]
pub(crate) struct Scale {
    pub lo: f64,
    pub hi: f64,
    pub log: bool,
    /// Page coordinate of `lo`.
    pub a: f64,
    /// Page coordinate of `hi`.
    pub b: f64,
}

impl Scale {
    /// The horizontal scale of `ticks` across `plot`.
    pub(crate) fn x(ticks: &Ticks, plot: &Rect, log: bool) -> Scale {
        Scale {
            lo: ticks.lo,
            hi: ticks.hi,
            log,
            a: plot.x,
            b: plot.right(),
        }
    }

    /// The vertical scale of `ticks` up `plot` (`lo` at the bottom).
    pub(crate) fn y(ticks: &Ticks, plot: &Rect, log: bool) -> Scale {
        Scale {
            lo: ticks.lo,
            hi: ticks.hi,
            log,
            a: plot.bottom(),
            b: plot.y,
        }
    }

    pub(crate) fn map(&self, v: f64) -> f64 {
        let t = if self.log {
            let v = v.max(f64::MIN_POSITIVE);
            (v.log10() - self.lo.log10()) / (self.hi.log10() - self.lo.log10())
        } else {
            (v - self.lo) / (self.hi - self.lo)
        };
        self.a + t * (self.b - self.a)
    }
}

/// Tick positions and labels of one axis. Labels of a linear axis are in units of
/// 10^`exponent`, which the axis label then states.
#[derive(Clone, Debug)]
pub(crate) struct Ticks {
    pub lo: f64,
    pub hi: f64,
    pub major: Vec<(f64, String)>,
    pub minor: Vec<f64>,
    pub exponent: i32,
}

/// Unicode superscript digits for an exponent, e.g. -30 -> "⁻³⁰".
pub(crate) fn superscript(e: i32) -> String {
    const DIGITS: [char; 10] = ['⁰', '¹', '²', '³', '⁴', '⁵', '⁶', '⁷', '⁸', '⁹'];
    let mut s = String::new();
    if e < 0 {
        s.push('⁻');
    }
    for c in e.unsigned_abs().to_string().chars() {
        if let Some(d) = c.to_digit(10) {
            s.push(DIGITS[d as usize]);
        }
    }
    s
}

/// Replaces an ASCII minus with the typographic minus for figure labels.
pub(crate) fn typographic(s: &str) -> String {
    s.replace('-', "\u{2212}")
}

fn nice_step(raw: f64) -> f64 {
    let mag = 10f64.powf(raw.log10().floor());
    let norm = raw / mag;
    let k = if norm <= 1.0 {
        1.0
    } else if norm <= 2.0 {
        2.0
    } else if norm <= 2.5 {
        2.5
    } else if norm <= 5.0 {
        5.0
    } else {
        10.0
    };
    k * mag
}

/// Linear ticks covering [lo, hi] with about `target` intervals; the range is widened to
/// whole steps. With `scaled`, labels are divided by a power of ten when values are large
/// or small, and that power is returned in `exponent`.
pub(crate) fn linear_ticks(lo: f64, hi: f64, target: usize, scaled: bool) -> Ticks {
    let (mut lo, mut hi) = if lo <= hi { (lo, hi) } else { (hi, lo) };
    if !(lo.is_finite() && hi.is_finite()) {
        lo = 0.0;
        hi = 1.0;
    }
    if hi - lo <= f64::EPSILON * hi.abs().max(lo.abs()).max(f64::MIN_POSITIVE) {
        let pad = if lo == 0.0 { 1.0 } else { lo.abs() * 0.1 };
        lo -= pad;
        hi += pad;
    }
    let step = nice_step((hi - lo) / target.max(1) as f64);
    let k0 = (lo / step + 1e-9).floor() as i64;
    let k1 = (hi / step - 1e-9).ceil() as i64;
    let maxabs = (k0 as f64 * step).abs().max((k1 as f64 * step).abs());
    let exponent = if scaled && maxabs > 0.0 && !(1e-2..1e4).contains(&maxabs) {
        maxabs.log10().floor() as i32
    } else {
        0
    };
    let unit = 10f64.powi(exponent);
    let decimals = decimals_for(step / unit);
    let mut major = Vec::new();
    for k in k0..=k1 {
        let v = k as f64 * step;
        let label = fixed_label(v / unit, decimals);
        major.push((v, label));
    }
    let mut minor = Vec::new();
    for k in k0..k1 {
        minor.push((k as f64 + 0.5) * step);
    }
    Ticks {
        lo: k0 as f64 * step,
        hi: k1 as f64 * step,
        major,
        minor,
        exponent,
    }
}

/// Ticks at fixed multiples of `step` between lo and hi (both assumed multiples).
pub(crate) fn fixed_ticks(lo: f64, hi: f64, step: f64, minor_per: usize) -> Ticks {
    let k0 = (lo / step).round() as i64;
    let k1 = (hi / step).round() as i64;
    let major = (k0..=k1)
        .map(|k| {
            let v = k as f64 * step;
            (v, fixed_label(v, 0))
        })
        .collect();
    let mut minor = Vec::new();
    for k in k0..k1 {
        for j in 1..minor_per {
            minor.push((k as f64 + j as f64 / minor_per as f64) * step);
        }
    }
    Ticks {
        lo,
        hi,
        major,
        minor,
        exponent: 0,
    }
}

/// Logarithmic ticks for data in [lo, hi] (both > 0). The axis extends a little beyond the
/// data (6 % of the span in log10, and at least one decade in all); whole decades are
/// labelled, thinned to about seven, and 2× and 5× are labelled too when fewer than three
/// decades fall inside.
pub(crate) fn log_ticks(lo: f64, hi: f64) -> Ticks {
    let (lo, hi) = if lo <= hi { (lo, hi) } else { (hi, lo) };
    let (lo, hi) = if lo > 0.0 && hi.is_finite() {
        (lo, hi)
    } else {
        (1.0, 10.0)
    };
    let (mut l, mut h) = (lo.log10(), hi.log10());
    let pad = 0.06 * (h - l).max(0.5);
    l -= pad;
    h += pad;
    if h - l < 1.0 {
        let grow = (1.0 - (h - l)) / 2.0;
        l -= grow;
        h += grow;
    }
    let e0 = (l - 1e-9).ceil() as i32;
    let e1 = (h + 1e-9).floor() as i32;
    let every = ((e1 - e0 + 1) as f64 / 7.0).ceil().max(1.0) as i32;
    let label_mantissas: &[i32] = if e1 - e0 + 1 < 3 { &[1, 2, 5] } else { &[1] };
    let (alo, ahi) = (10f64.powf(l), 10f64.powf(h));
    let mut major = Vec::new();
    let mut minor = Vec::new();
    for e in (e0 - 1)..=e1 {
        let v = 10f64.powi(e);
        for m in 1..10 {
            let x = f64::from(m) * v;
            if x < alo * (1.0 - 1e-9) || x > ahi * (1.0 + 1e-9) {
                continue;
            }
            let labelled = label_mantissas.contains(&m) && (m != 1 || e.rem_euclid(every) == 0);
            if labelled {
                let label = if m == 1 {
                    format!("10{}", superscript(e))
                } else {
                    format!("{m}×10{}", superscript(e))
                };
                major.push((x, label));
            } else if every == 1 || m == 1 {
                minor.push(x);
            }
        }
    }
    Ticks {
        lo: alo,
        hi: ahi,
        major,
        minor,
        exponent: 0,
    }
}

/// Fewest decimals (up to 6) that show `step` exactly.
fn decimals_for(step: f64) -> usize {
    (0..6)
        .find(|&d| {
            let v = step * 10f64.powi(d as i32);
            (v - v.round()).abs() < 1e-6 * v.abs().max(1.0)
        })
        .unwrap_or(6)
}

fn fixed_label(v: f64, decimals: usize) -> String {
    let s = format!("{v:.decimals$}");
    let s = if s
        .trim_start_matches('-')
        .chars()
        .all(|c| c == '0' || c == '.')
    {
        s.trim_start_matches('-').to_string()
    } else {
        s
    };
    typographic(&s)
}

/// Widest tick label of `t` at the tick type size.
pub(crate) fn max_label_width(t: &Ticks) -> Result<f64, FigureError> {
    let mut w: f64 = 0.0;
    for (_, l) in &t.major {
        w = w.max(text_width(l, FS_TICK)?);
    }
    Ok(w)
}

/// Space reserved left of the plot for y tick labels and a rotated y label.
pub(crate) fn left_gutter(yt: &Ticks) -> Result<f64, FigureError> {
    Ok(3.0 + FS_LABEL + 4.0 + max_label_width(yt)? + 2.0 + TICK_LEN)
}

/// Space reserved below the plot for x tick labels and the x label.
pub(crate) fn bottom_gutter() -> f64 {
    TICK_LEN + 2.0 + FS_TICK + 4.0 + FS_LABEL + 2.0
}

/// Draws grid lines, axes (left and bottom), ticks, tick labels and axis labels.
#[allow(clippy::too_many_arguments)]
pub(crate) fn draw_axes(
    svg: &mut Svg,
    plot: Rect,
    xs: &Scale,
    ys: &Scale,
    xt: &Ticks,
    yt: &Ticks,
    xlabel: &str,
    ylabel: &str,
) -> Result<(), FigureError> {
    let grid = Stroke::new(GRID, 0.4, LineStyle::Solid);
    let axis = Stroke::new(INK, 0.6, LineStyle::Solid);
    let tick = Stroke::new(INK, 0.5, LineStyle::Solid);
    let minor = Stroke::new(INK, 0.4, LineStyle::Solid);
    svg.open("grid", None, "");
    for (v, _) in &yt.major {
        let y = ys.map(*v);
        if y > plot.y + 0.1 && y < plot.bottom() - 0.1 {
            svg.line(plot.x, y, plot.right(), y, &grid, "grid-line");
        }
    }
    svg.close();
    svg.open("axes", None, "");
    svg.line(
        plot.x,
        plot.bottom(),
        plot.right(),
        plot.bottom(),
        &axis,
        "axis-x",
    );
    svg.line(plot.x, plot.y, plot.x, plot.bottom(), &axis, "axis-y");
    for (v, label) in &xt.major {
        let x = xs.map(*v);
        svg.line(x, plot.bottom(), x, plot.bottom() + TICK_LEN, &tick, "tick");
        svg.text(
            label,
            x,
            plot.bottom() + TICK_LEN + 1.5 + FS_TICK * 0.8,
            FS_TICK,
            Anchor::Middle,
            INK,
            "tick-label",
        )?;
    }
    for v in &xt.minor {
        let x = xs.map(*v);
        if x >= plot.x - 0.01 && x <= plot.right() + 0.01 {
            svg.line(
                x,
                plot.bottom(),
                x,
                plot.bottom() + TICK_LEN * 0.55,
                &minor,
                "tick-minor",
            );
        }
    }
    for (v, label) in &yt.major {
        let y = ys.map(*v);
        svg.line(plot.x - TICK_LEN, y, plot.x, y, &tick, "tick");
        svg.text(
            label,
            plot.x - TICK_LEN - 2.0,
            y + FS_TICK * 0.36,
            FS_TICK,
            Anchor::End,
            INK,
            "tick-label",
        )?;
    }
    for v in &yt.minor {
        let y = ys.map(*v);
        if y >= plot.y - 0.01 && y <= plot.bottom() + 0.01 {
            svg.line(plot.x - TICK_LEN * 0.55, y, plot.x, y, &minor, "tick-minor");
        }
    }
    svg.text(
        xlabel,
        plot.x + plot.w / 2.0,
        plot.bottom() + TICK_LEN + 2.0 + FS_TICK + 4.0 + FS_LABEL * 0.8,
        FS_LABEL,
        Anchor::Middle,
        INK,
        "axis-label x-label",
    )?;
    let ywidest = max_label_width(yt)?;
    svg.text_vertical(
        ylabel,
        plot.x - TICK_LEN - 2.0 - ywidest - 4.0,
        plot.y + plot.h / 2.0,
        FS_LABEL,
        Anchor::Middle,
        INK,
        "axis-label y-label",
    )?;
    svg.close();
    Ok(())
}

/// What a legend entry shows next to its label.
#[derive(Clone, Debug)]
pub(crate) enum Sample {
    Line(Stroke),
    Marker(MarkerStyle, bool),
    Patch(&'static str, f64, &'static str),
    Dot(&'static str, f64),
}

#[derive(Clone, Debug)]
pub(crate) struct LegendItem {
    pub label: String,
    pub sample: Sample,
}

const SAMPLE_W: f64 = 15.0;
const ITEM_GAP: f64 = 9.0;
const LEGEND_ROW: f64 = FS_SMALL * 1.55;

fn legend_flow(items: &[LegendItem], max_w: f64) -> Result<Vec<Vec<(usize, f64)>>, FigureError> {
    let mut rows: Vec<Vec<(usize, f64)>> = vec![Vec::new()];
    let mut x = 0.0;
    for (i, it) in items.iter().enumerate() {
        let w = SAMPLE_W + 3.0 + text_width(&it.label, FS_SMALL)?;
        let row_empty = rows.last().is_none_or(|r| r.is_empty());
        if !row_empty && x + w > max_w {
            rows.push(Vec::new());
            x = 0.0;
        }
        if let Some(r) = rows.last_mut() {
            r.push((i, x));
        }
        x += w + ITEM_GAP;
    }
    Ok(rows)
}

/// Height of the legend strip for `items` laid out in rows of at most `max_w`.
pub(crate) fn legend_height(items: &[LegendItem], max_w: f64) -> Result<f64, FigureError> {
    Ok(legend_flow(items, max_w)?.len() as f64 * LEGEND_ROW)
}

/// Draws the legend strip with its top-left corner at (x, y).
pub(crate) fn draw_legend(
    svg: &mut Svg,
    items: &[LegendItem],
    x: f64,
    y: f64,
    max_w: f64,
) -> Result<(), FigureError> {
    svg.open("legend", None, "");
    for (r, row) in legend_flow(items, max_w)?.iter().enumerate() {
        let cy = y + (r as f64 + 0.5) * LEGEND_ROW;
        for (i, dx) in row {
            let it = &items[*i];
            let sx = x + dx;
            match &it.sample {
                Sample::Line(st) => svg.line(sx, cy, sx + SAMPLE_W, cy, st, "legend-sample"),
                Sample::Marker(m, bar) => {
                    if *bar {
                        let st = Stroke::new(m.stroke, 0.6, LineStyle::Solid);
                        svg.error_bar(
                            sx + SAMPLE_W / 2.0,
                            cy - 3.2,
                            cy + 3.2,
                            1.2,
                            &st,
                            "legend-sample",
                        );
                    }
                    svg.marker(sx + SAMPLE_W / 2.0, cy, m, "legend-sample");
                }
                Sample::Patch(fill, op, edge) => {
                    let st = Stroke::new(edge, 0.5, LineStyle::Solid);
                    svg.rect(
                        Rect {
                            x: sx + 2.0,
                            y: cy - 2.6,
                            w: SAMPLE_W - 4.0,
                            h: 5.2,
                        },
                        Some((fill, *op)),
                        Some(&st),
                        "legend-sample",
                    );
                }
                Sample::Dot(color, op) => {
                    for k in 0..3 {
                        let _ = writeln!(
                            svg.body,
                            "<circle class=\"legend-sample\" cx=\"{}\" cy=\"{}\" r=\"0.8\" fill=\"{color}\" fill-opacity=\"{}\"/>",
                            n(sx + 3.5 + 4.0 * f64::from(k)),
                            n(cy + if k == 1 { -1.2 } else { 1.0 }),
                            n(*op)
                        );
                    }
                }
            }
            svg.text(
                &it.label,
                sx + SAMPLE_W + 3.0,
                cy + FS_SMALL * 0.35,
                FS_SMALL,
                Anchor::Start,
                INK,
                "legend-label",
            )?;
        }
    }
    svg.close();
    Ok(())
}

/// Splits `text` into lines no wider than `max_w` at `size` points, breaking at spaces.
pub(crate) fn wrap(text: &str, max_w: f64, size: f64) -> Result<Vec<String>, FigureError> {
    let mut lines = Vec::new();
    let mut cur = String::new();
    for word in text.split(' ').filter(|w| !w.is_empty()) {
        let trial = if cur.is_empty() {
            word.to_string()
        } else {
            format!("{cur} {word}")
        };
        if !cur.is_empty() && text_width(&trial, size)? > max_w {
            lines.push(std::mem::take(&mut cur));
            cur = word.to_string();
        } else {
            cur = trial;
        }
    }
    if !cur.is_empty() {
        lines.push(cur);
    }
    Ok(lines)
}

pub(crate) const CAPTION_LINE: f64 = FS_SMALL * 1.3;

/// Draws caption lines starting with the first baseline at `y`; returns the box covered.
pub(crate) fn draw_caption(
    svg: &mut Svg,
    lines: &[String],
    x: f64,
    y_top: f64,
) -> Result<Rect, FigureError> {
    svg.open("caption", None, "");
    let mut widest: f64 = 0.0;
    for (i, l) in lines.iter().enumerate() {
        let base = y_top + FS_SMALL * 0.95 + i as f64 * CAPTION_LINE;
        svg.text(l, x, base, FS_SMALL, Anchor::Start, MUTED, "caption-line")?;
        widest = widest.max(text_width(l, FS_SMALL)?);
    }
    svg.close();
    Ok(Rect {
        x,
        y: y_top,
        w: widest,
        h: lines.len() as f64 * CAPTION_LINE,
    })
}

/// The layout of a one-panel figure: legend strip on top, plot, caption below (sizes in pt).
pub(crate) struct PanelLayout {
    pub w: f64,
    pub h: f64,
    pub pad: f64,
    pub plot: Rect,
    pub legend_w: f64,
    pub lines: Vec<String>,
    pub cap_y: f64,
}

/// Lay out a one-panel figure `width_in` inches wide whose plot has height `aspect` x width.
pub(crate) fn single_panel(
    width_in: f64,
    yt: &Ticks,
    items: &[LegendItem],
    caption: &str,
    aspect: f64,
) -> Result<PanelLayout, FigureError> {
    let w = width_in * 72.0;
    let pad = 4.0;
    let plot_x = pad + left_gutter(yt)?;
    let plot_w = w - 9.0 - plot_x;
    let legend_w = w - pad - plot_x;
    let leg_h = legend_height(items, legend_w)?;
    let plot = Rect {
        x: plot_x,
        y: pad + leg_h + 5.0,
        w: plot_w,
        h: plot_w * aspect,
    };
    let lines = wrap(caption, w - 2.0 * pad, FS_SMALL)?;
    let cap_y = plot.bottom() + bottom_gutter() + 4.0;
    let h = cap_y + lines.len() as f64 * CAPTION_LINE + pad;
    Ok(PanelLayout {
        w,
        h,
        pad,
        plot,
        legend_w,
        lines,
        cap_y,
    })
}

impl PanelLayout {
    /// Open the figure: the canvas, the clip path of the plot (its id) and the axes, grid and
    /// tick labels (`scales`, `ticks` and `labels` are x, then y). The opening every one-panel
    /// figure shares, in the order that fixes the SVG's bytes.
    pub(crate) fn open(
        &self,
        stem: &str,
        scales: (&Scale, &Scale),
        ticks: (&Ticks, &Ticks),
        labels: (&str, &str),
    ) -> Result<(Svg, String), FigureError> {
        let mut svg = Svg::new(self.w, self.h, stem);
        let clip = svg.clip(self.plot);
        draw_axes(
            &mut svg, self.plot, scales.0, scales.1, ticks.0, ticks.1, labels.0, labels.1,
        )?;
        Ok((svg, clip))
    }

    /// Close the figure: the legend strip above the plot, the caption below it, and the SVG
    /// text under `title`, with the caption's box (pt).
    pub(crate) fn close(
        &self,
        mut svg: Svg,
        items: &[LegendItem],
        title: &str,
    ) -> Result<(String, Rect), FigureError> {
        draw_legend(&mut svg, items, self.plot.x, self.pad, self.legend_w)?;
        let caption_box = draw_caption(&mut svg, &self.lines, self.pad, self.cap_y)?;
        Ok((svg.finish(title), caption_box))
    }

    /// The figure's size in inches (the sidecar's `size_in`).
    pub(crate) fn size_in(&self) -> [f64; 2] {
        [self.w / 72.0, self.h / 72.0]
    }
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn coordinates_are_trimmed_and_never_negative_zero() {
        assert_eq!(n(1.5), "1.5");
        assert_eq!(n(2.0), "2");
        assert_eq!(n(-0.001), "0");
        assert_eq!(n(-3.256), "-3.26");
        assert_eq!(n(f64::NAN), "0");
    }

    #[test]
    fn superscripts() {
        assert_eq!(superscript(-30), "⁻³⁰");
        assert_eq!(superscript(7), "⁷");
    }

    #[test]
    fn linear_ticks_cover_range_with_scaled_labels() {
        let t = linear_ticks(-1.3e-30, 5.2e-30, 5, true);
        assert!(t.lo <= -1.3e-30 && t.hi >= 5.2e-30);
        assert_eq!(t.exponent, -30);
        let labels: Vec<&str> = t.major.iter().map(|(_, l)| l.as_str()).collect();
        assert_eq!(labels, vec!["\u{2212}2", "0", "2", "4", "6"]);
        let u = linear_ticks(0.0, 0.87, 5, true);
        assert_eq!(u.exponent, 0);
        assert_eq!(u.major.last().map(|m| m.1.as_str()), Some("1.0"));
        let q = linear_ticks(0.0, 1.0, 4, false);
        assert_eq!(q.major[1].1, "0.25");
    }

    #[test]
    fn log_ticks_pad_the_data_and_label_decades() {
        let t = log_ticks(3e-32, 2e-29);
        assert!(t.lo < 3e-32 && t.lo > 1e-32, "{}", t.lo);
        assert!(t.hi > 2e-29 && t.hi < 1e-28, "{}", t.hi);
        let labels: Vec<&str> = t.major.iter().map(|m| m.1.as_str()).collect();
        assert_eq!(labels, vec!["10⁻³¹", "10⁻³⁰", "10⁻²⁹"]);
        assert!(t.minor.iter().any(|m| (m / 5e-30 - 1.0).abs() < 1e-9));
        // Less than a decade of data: the axis spans a decade and labels 2× and 5× as well.
        let n = log_ticks(2.5e-15, 4.0e-15);
        assert!((n.hi / n.lo - 10.0).abs() < 1e-6);
        assert!(n.major.len() >= 2, "{:?}", n.major);
        assert!(n.major.iter().any(|m| m.1 == "2×10⁻¹⁵" || m.1 == "5×10⁻¹⁵"));
        // Many decades are thinned.
        let w = log_ticks(1e-40, 1e-10);
        assert!(w.major.len() <= 8, "{:?}", w.major);
    }

    #[test]
    fn text_has_width_and_outlines() {
        let w1 = text_width("ab", 10.0).unwrap();
        let w2 = text_width("abab", 10.0).unwrap();
        assert!(w1 > 5.0 && (w2 - 2.0 * w1).abs() < 1e-9);
        let d = text_outline("ρ ζ Â² 10⁻³⁰ −", 0.0, 10.0, 8.0).unwrap();
        assert!(d.matches('M').count() >= 8, "glyph outlines missing: {d}");
    }

    #[test]
    fn wrapping_respects_width() {
        let text = "one two three four five six seven eight nine ten eleven twelve";
        let lines = wrap(text, 60.0, 7.0).unwrap();
        assert!(lines.len() > 2);
        for l in &lines {
            assert!(text_width(l, 7.0).unwrap() <= 60.0 || !l.contains(' '));
        }
        assert_eq!(lines.join(" "), text);
    }
}
