//! Deterministic number formatting shared by figure captions, the report and its LaTeX
//! tables. Every string depends only on the value (Rust's float formatting is exact and
//! platform independent), so regenerated outputs are byte-identical.

/// Where a number is going to be shown.
#[derive(Clone, Copy, Debug, PartialEq, Eq)]
pub(crate) enum Style {
    /// Markdown / HTML: ASCII minus, powers of ten with Unicode superscripts.
    Text,
    /// Figure text: typographic minus (U+2212), Unicode superscripts.
    Figure,
    /// LaTeX math-mode content (without the surrounding `$`).
    Latex,
}

const NA: &str = "n/a";

fn minus(style: Style) -> &'static str {
    match style {
        Style::Text | Style::Latex => "-",
        Style::Figure => "\u{2212}",
    }
}

fn signed(s: String, style: Style) -> String {
    match s.strip_prefix('-') {
        Some(rest) => format!("{}{rest}", minus(style)),
        None => s,
    }
}

fn power_of_ten(e: i32, style: Style) -> String {
    match style {
        Style::Latex => format!("\\times10^{{{e}}}"),
        Style::Text | Style::Figure => format!("×10{}", super::canvas::superscript(e)),
    }
}

/// Mantissa (with `sig` significant digits) and decimal exponent of `v`.
fn sci_parts(v: f64, sig: usize) -> (String, i32) {
    let s = format!("{:.*e}", sig.max(1) - 1, v);
    match s.split_once('e') {
        Some((m, e)) => (m.to_string(), e.parse().unwrap_or(0)),
        None => (s, 0),
    }
}

/// `v` with a fixed number of decimals; `-0.00` is printed as `0.00`.
pub(crate) fn fixed(v: f64, decimals: usize, style: Style) -> String {
    if !v.is_finite() {
        return NA.to_string();
    }
    let s = format!("{v:.decimals$}");
    if s.starts_with('-') && s[1..].chars().all(|c| c == '0' || c == '.') {
        return s[1..].to_string();
    }
    signed(s, style)
}

/// `v` in scientific notation with `sig` significant digits, e.g. `4.10×10⁻³⁰`.
pub(crate) fn sci(v: f64, sig: usize, style: Style) -> String {
    if !v.is_finite() {
        return NA.to_string();
    }
    if v == 0.0 {
        return "0".to_string();
    }
    let (m, e) = sci_parts(v, sig);
    let m = signed(m, style);
    if e == 0 {
        m
    } else {
        format!("{m}{}", power_of_ten(e, style))
    }
}

/// Fixed notation for moderate magnitudes, scientific otherwise; `sig` significant digits.
pub(crate) fn general(v: f64, sig: usize, style: Style) -> String {
    if !v.is_finite() {
        return NA.to_string();
    }
    if v == 0.0 {
        return "0".to_string();
    }
    let a = v.abs();
    if (1e-3..1e4).contains(&a) {
        let (_, e) = sci_parts(v, sig);
        let decimals = (sig as i32 - 1 - e).max(0) as usize;
        fixed(v, decimals, style)
    } else {
        sci(v, sig, style)
    }
}

/// A value with its uncertainty sharing one power of ten, e.g. `(4.10 ± 1.00)×10⁻³⁰`.
pub(crate) fn plus_minus(v: f64, s: f64, sig: usize, style: Style) -> String {
    if !v.is_finite() || !s.is_finite() {
        return format!("{} ± {}", general(v, sig, style), general(s, sig, style));
    }
    let big = v.abs().max(s.abs());
    let e = if big == 0.0 { 0 } else { sci_parts(big, sig).1 };
    let pm = if style == Style::Latex { "\\pm" } else { "±" };
    let d = sig.max(1) - 1;
    if (-2..=3).contains(&e) {
        let dec = (d as i32 - e).max(0) as usize;
        format!("{} {pm} {}", fixed(v, dec, style), fixed(s, dec, style))
    } else {
        let unit = 10f64.powi(e);
        format!(
            "({} {pm} {}){}",
            fixed(v / unit, d, style),
            fixed(s / unit, d, style),
            power_of_ten(e, style)
        )
    }
}

/// Like [`general`] but without trailing zeros in the mantissa: `0.001`, `2.5×10⁻⁴`.
pub(crate) fn compact(v: f64, sig: usize, style: Style) -> String {
    let s = general(v, sig, style);
    let (mant, rest) = match s.find(['×', '\\']) {
        Some(i) => s.split_at(i),
        None => (s.as_str(), ""),
    };
    if !mant.contains('.') {
        return s;
    }
    let m = mant.trim_end_matches('0').trim_end_matches('.');
    format!("{m}{rest}")
}

/// A probability: two significant digits, scientific below 0.01.
pub(crate) fn prob(v: f64, style: Style) -> String {
    if v.is_finite() && v != 0.0 && v.abs() < 0.01 {
        sci(v, 2, style)
    } else {
        general(v, 2, style)
    }
}

/// A frequency in Hz shown in nHz with three significant digits.
pub(crate) fn nanohertz(f_hz: f64, style: Style) -> String {
    format!("{} nHz", general(f_hz * 1e9, 3, style))
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn scientific_forms() {
        assert_eq!(sci(4.1e-30, 3, Style::Text), "4.10×10⁻³⁰");
        assert_eq!(sci(-4.1e-30, 2, Style::Figure), "\u{2212}4.1×10⁻³⁰");
        assert_eq!(sci(4.1e-30, 3, Style::Latex), "4.10\\times10^{-30}");
        assert_eq!(sci(2.5, 2, Style::Text), "2.5");
        assert_eq!(sci(f64::NAN, 2, Style::Text), "n/a");
    }

    #[test]
    fn general_and_fixed_forms() {
        assert_eq!(general(4.2, 3, Style::Text), "4.20");
        assert_eq!(general(0.0004, 2, Style::Text), "4.0×10⁻⁴");
        assert_eq!(general(123.456, 3, Style::Text), "123");
        assert_eq!(fixed(-0.0001, 2, Style::Figure), "0.00");
        assert_eq!(fixed(-1.5, 1, Style::Figure), "\u{2212}1.5");
    }

    #[test]
    fn compact_and_probability_forms() {
        assert_eq!(compact(0.001, 3, Style::Text), "0.001");
        assert_eq!(compact(2.5e-4, 3, Style::Text), "2.5×10⁻⁴");
        assert_eq!(compact(1.0e-5, 3, Style::Latex), "1\\times10^{-5}");
        assert_eq!(compact(120.0, 3, Style::Text), "120");
        assert_eq!(prob(0.0026, Style::Text), "2.6×10⁻³");
        assert_eq!(prob(0.05, Style::Text), "0.050");
        assert_eq!(prob(0.0, Style::Text), "0");
    }

    #[test]
    fn plus_minus_shares_exponent() {
        assert_eq!(
            plus_minus(4.1e-30, 1.0e-30, 3, Style::Text),
            "(4.10 ± 1.00)×10⁻³⁰"
        );
        assert_eq!(
            plus_minus(4.1e-30, 1.0e-31, 2, Style::Latex),
            "(4.1 \\pm 0.1)\\times10^{-30}"
        );
        assert_eq!(plus_minus(0.52, 0.1, 2, Style::Text), "0.52 ± 0.10");
    }
}
