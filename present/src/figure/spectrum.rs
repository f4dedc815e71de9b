//! The per-frequency figure of a correlate folder: the Hellings-Downs optimal statistic at
//! each analysis frequency alone (per-frequency.csv; engine/src/per_frequency.rs, after
//! Sardesai & Vigeland 2023 and Gersbach et al. 2024), in units of the template's A^2, with
//! error bars without and with the signal, and the power law at the broadband amplitude (a flat
//! line in these units) with its prediction including the leakage between frequencies.

use serde::Serialize;

use super::canvas::{
    linear_ticks, log_ticks, single_panel, superscript, LegendItem, LineStyle, Marker, MarkerStyle,
    Sample, Scale, Stroke, BLACK, INK, MUTED, PAIR_GREY, VERMILLION,
};
use super::format::{self, Style};
use super::input::{CorrelateData, SUMMARY_JSON};
use super::{Drawn, FigureError, FigureOptions};

pub(crate) const STEM: &str = "per-frequency";

#[derive(Serialize)]
struct SidePoint {
    index: u64,
    frequency_nhz: f64,
    amplitude2: f64,
    sigma: f64,
    sigma_signal: Option<f64>,
    expected: f64,
}

#[derive(Serialize)]
struct Sidecar {
    figure: &'static str,
    source_folder: String,
    broadband_amplitude2: f64,
    points: Vec<SidePoint>,
    y_axis: [f64; 2],
    caption: String,
}

const POINT: MarkerStyle = MarkerStyle {
    shape: Marker::Circle,
    size: 3.6,
    fill: BLACK,
    stroke: "#FFFFFF",
};
const EXPECTED: MarkerStyle = MarkerStyle {
    shape: Marker::Diamond,
    size: 3.2,
    fill: VERMILLION,
    stroke: "#FFFFFF",
};
const SIGNAL_BAR: Stroke = Stroke::new(PAIR_GREY, 2.2, LineStyle::Solid);

pub(crate) fn draw(
    data: &CorrelateData,
    opts: &FigureOptions,
    stem: &str,
    source: &str,
) -> Result<Drawn, FigureError> {
    let s = &data.summary;
    let hd = s
        .patterns
        .get("hd")
        .ok_or_else(|| FigureError::MissingField {
            path: data.dir.join(SUMMARY_JSON),
            field: "patterns.hd".to_string(),
        })?;
    // Each frequency's estimate of A^2 and the power law at the broadband amplitude.
    let points: Vec<SidePoint> = data
        .per_frequency
        .iter()
        .map(|r| {
            let phi = if r.amplitude2 != 0.0 {
                r.power_s2 / r.amplitude2
            } else {
                f64::NAN
            };
            SidePoint {
                index: r.index as u64,
                frequency_nhz: r.frequency_hz * 1e9,
                amplitude2: r.amplitude2,
                sigma: r.amplitude2_sigma,
                sigma_signal: r.amplitude2_sigma_signal,
                expected: if phi.is_finite() && phi > 0.0 {
                    r.expected_s2 / phi
                } else {
                    hd.amplitude2
                },
            }
        })
        .collect();
    let (mut lo, mut hi) = (hd.amplitude2.min(0.0), hd.amplitude2.max(0.0));
    for p in &points {
        let e = p.sigma.max(p.sigma_signal.unwrap_or(0.0));
        lo = lo.min(p.amplitude2 - e).min(p.expected);
        hi = hi.max(p.amplitude2 + e).max(p.expected);
    }
    let span = (hi - lo).max(f64::MIN_POSITIVE);
    let yt = linear_ticks(lo - 0.04 * span, hi + 0.04 * span, 5, true);
    let (f_lo, f_hi) = points.iter().fold((f64::INFINITY, 0.0f64), |(a, b), p| {
        (a.min(p.frequency_nhz), b.max(p.frequency_nhz))
    });
    let xt = log_ticks(f_lo, f_hi);
    let unit = if yt.exponent != 0 {
        format!("10{} ", superscript(yt.exponent))
    } else {
        String::new()
    };
    let y_label = format!("Â² at one frequency [{unit}A²]");
    let x_label = "frequency [nHz]".to_string();

    let mut items = vec![LegendItem {
        label: "Â²(f) ± 1σ without signal".to_string(),
        sample: Sample::Marker(POINT, true),
    }];
    if points.iter().any(|p| p.sigma_signal.is_some()) {
        items.push(LegendItem {
            label: "± 1σ with signal".to_string(),
            sample: Sample::Line(SIGNAL_BAR),
        });
    }
    items.push(LegendItem {
        label: format!(
            "power law, Â² = {}",
            format::sci(hd.amplitude2, 2, Style::Figure)
        ),
        sample: Sample::Line(Stroke::new(VERMILLION, 1.0, LineStyle::Solid)),
    });
    items.push(LegendItem {
        label: "with leakage".to_string(),
        sample: Sample::Marker(EXPECTED, false),
    });
    let caption = format!(
        "Hellings–Downs optimal statistic at each of {} frequencies alone, in units of the template's A² (power = A² φ(f)). Black bars: 1σ without signal; wide grey bars: 1σ with the signal at the broadband Â²(HD) = {}. The line is the power law at that amplitude (flat in these units); diamonds add the leakage between frequencies from the timing model and sampling. The estimates are correlated (per-frequency-covariance.csv); their generalised least-squares combination equals the broadband statistic.",
        points.len(),
        format::plus_minus(hd.amplitude2, hd.amplitude2_sigma, 3, Style::Figure),
    );

    let aspect = opts.width.aspect(0.64, 0.42);
    let layout = single_panel(opts.width.inches(), &yt, &items, &caption, aspect)?;
    let plot = layout.plot;
    let xs = Scale::x(&xt, &plot, true);
    let ys = Scale::y(&yt, &plot, false);
    let title = format!("Per-frequency statistic: {}", s.title);
    let (mut svg, clip) = layout.open(stem, (&xs, &ys), (&xt, &yt), (&x_label, &y_label))?;
    svg.open("lines", Some(&clip), "");
    svg.line(
        plot.x,
        ys.map(0.0),
        plot.right(),
        ys.map(0.0),
        &Stroke::new(MUTED, 0.5, LineStyle::Dotted),
        "zero-line",
    );
    svg.line(
        plot.x,
        ys.map(hd.amplitude2),
        plot.right(),
        ys.map(hd.amplitude2),
        &Stroke::new(VERMILLION, 1.0, LineStyle::Solid),
        "power-law",
    );
    svg.close();
    svg.open("points", Some(&clip), "");
    let bar = Stroke::new(INK, 0.7, LineStyle::Solid);
    for p in &points {
        let x = xs.map(p.frequency_nhz);
        if let Some(e) = p.sigma_signal {
            svg.interval(
                x,
                &ys,
                p.amplitude2 - e,
                p.amplitude2 + e,
                2.4,
                &SIGNAL_BAR,
                "errorbar-signal",
            );
        }
    }
    for p in &points {
        let x = xs.map(p.frequency_nhz);
        svg.interval(
            x,
            &ys,
            p.amplitude2 - p.sigma,
            p.amplitude2 + p.sigma,
            1.3,
            &bar,
            "errorbar",
        );
        svg.marker(x, ys.map(p.expected), &EXPECTED, "expected");
        svg.marker(x, ys.map(p.amplitude2), &POINT, "estimate");
    }
    svg.close();
    let (svg_text, _) = layout.close(svg, &items, &title)?;
    let sidecar = Sidecar {
        figure: STEM,
        source_folder: source.to_string(),
        broadband_amplitude2: hd.amplitude2,
        points,
        y_axis: [yt.lo, yt.hi],
        caption: caption.clone(),
    };
    Drawn::new(stem, title, caption, svg_text, &sidecar)
}
