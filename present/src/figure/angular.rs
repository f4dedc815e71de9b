//! Figure 1: the angular correlation. Binned cross-correlations with 1σ error bars against
//! angular separation, the Hellings-Downs curve scaled by its fitted amplitude, the monopole
//! and dipole curves scaled by theirs, a zero line and, optionally, every pair as a faint
//! point behind the bins. When the folder has them: the expected spread of a Gaussian
//! background around the Hellings-Downs curve as shaded bands (hd-spread.csv; cosmic and total
//! variance, Allen 2023, engine/src/hd_spread.rs) and each bin's error bar from the full
//! covariance of the bins with the signal (bins-covariance.csv, engine/src/bin_covariance.rs).

use ptacorr::orf;
use serde::Serialize;

use super::canvas::{
    fixed_ticks, linear_ticks, single_panel, superscript, LegendItem, LineStyle, Marker,
    MarkerStyle, Sample, Scale, Stroke, BLACK, BLUE, GREEN, INK, MUTED, PAIR_GREY, VERMILLION,
};
use super::format::{self, Style};
use super::input::{CorrelateData, SUMMARY_JSON};
use super::{Drawn, FigureError, FigureOptions};

pub(crate) const STEM: &str = "angular-correlation";

const CURVE_STEP_DEG: f64 = 0.5;

#[derive(Serialize)]
struct SideBin {
    angle_lo_deg: f64,
    angle_hi_deg: f64,
    angle_mean_deg: f64,
    n_pairs: u64,
    rho: f64,
    sigma: f64,
    /// Weighted mean of G over the bin's pairs, from bins.csv.
    hd: f64,
    /// Plotted value and error bar half-length (rho and sigma divided by `y_divisor`).
    y: f64,
    y_err: f64,
    /// The full-covariance error bar (plotted units), when the folder has bins-covariance.csv.
    y_err_full: Option<f64>,
}

#[derive(Serialize)]
struct SideBand {
    angle_deg: Vec<f64>,
    /// A2 G(zeta) and the cosmic and total standard deviations, in plotted units.
    y: Vec<f64>,
    cosmic: Vec<f64>,
    total: Vec<f64>,
}

#[derive(Serialize)]
struct SideCurve {
    pattern: String,
    amplitude2: f64,
    shape: &'static str,
    angle_deg: Vec<f64>,
    y: Vec<f64>,
}

#[derive(Serialize)]
struct Sidecar {
    figure: &'static str,
    source_folder: String,
    normalised: bool,
    /// Plotted y = value / y_divisor (1 in units of A², the hd amplitude2 when normalised).
    y_divisor: f64,
    x_label: String,
    y_label: String,
    y_axis: [f64; 2],
    bins: Vec<SideBin>,
    curves: Vec<SideCurve>,
    band: Option<SideBand>,
    pairs_shown: bool,
    pairs_in_file: usize,
    pairs_outside_axes: usize,
    caption: String,
    size_in: [f64; 2],
    plot_box_pt: [f64; 4],
    caption_box_pt: [f64; 4],
}

struct CurveSpec {
    pattern: &'static str,
    label: &'static str,
    shape: &'static str,
    stroke: Stroke,
    f: fn(f64) -> f64,
}

const CURVES: [CurveSpec; 3] = [
    CurveSpec {
        pattern: "hd",
        label: "Hellings–Downs",
        shape: "G(zeta)",
        stroke: Stroke::new(VERMILLION, 1.1, LineStyle::Solid),
        f: orf::hellings_downs,
    },
    CurveSpec {
        pattern: "monopole",
        label: "monopole",
        shape: "1",
        stroke: Stroke::new(BLUE, 0.9, LineStyle::Dashed),
        f: orf::monopole,
    },
    CurveSpec {
        pattern: "dipole",
        label: "dipole",
        shape: "cos(zeta)",
        stroke: Stroke::new(GREEN, 0.9, LineStyle::DashDot),
        f: orf::dipole,
    },
];

const BIN_MARKER: MarkerStyle = MarkerStyle {
    shape: Marker::Circle,
    size: 3.8,
    fill: BLACK,
    stroke: "#FFFFFF",
};

/// The full-covariance error bar: wide, grey, drawn behind the independent-pair bar.
const FULL_BAR: Stroke = Stroke::new(PAIR_GREY, 2.2, LineStyle::Solid);
const COSMIC_OPACITY: f64 = 0.35;
const TOTAL_OPACITY: f64 = 0.13;

fn quantile(sorted: &[f64], q: f64) -> f64 {
    let i = ((sorted.len() - 1) as f64 * q).round() as usize;
    sorted[i.min(sorted.len() - 1)]
}

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
    let div = if opts.normalised {
        if hd.amplitude2 <= 0.0 {
            return Err(FigureError::InvalidField {
                path: data.dir.join(SUMMARY_JSON),
                field: "patterns.hd.amplitude2".to_string(),
                reason: format!(
                    "a normalised figure divides by the hd amplitude2, which must be positive (it is {})",
                    hd.amplitude2
                ),
            });
        }
        hd.amplitude2
    } else {
        1.0
    };

    // Data in plotted units.
    let bins: Vec<SideBin> = data
        .bins
        .iter()
        .enumerate()
        .map(|(i, b)| SideBin {
            angle_lo_deg: b.angle_lo_deg,
            angle_hi_deg: b.angle_hi_deg,
            angle_mean_deg: b.angle_mean_deg,
            n_pairs: b.n_pairs as u64,
            rho: b.rho,
            sigma: b.sigma,
            hd: b.hd,
            y: b.rho / div,
            y_err: b.sigma / div,
            y_err_full: data.bin_sigma_full.as_ref().map(|f| f[i] / div),
        })
        .collect();
    let band = (!data.spread.is_empty()).then(|| SideBand {
        angle_deg: data.spread.iter().map(|r| r.angle_deg).collect(),
        y: data.spread.iter().map(|r| r.hd / div).collect(),
        cosmic: data.spread.iter().map(|r| r.cosmic_sigma / div).collect(),
        total: data.spread.iter().map(|r| r.total_sigma / div).collect(),
    });
    let n_steps = (180.0 / CURVE_STEP_DEG).round() as usize;
    let angles: Vec<f64> = (0..=n_steps).map(|i| i as f64 * CURVE_STEP_DEG).collect();
    let mut curves = Vec::new();
    let mut curve_specs = Vec::new();
    for spec in &CURVES {
        if let Some(fit) = s.patterns.get(spec.pattern) {
            let y = angles
                .iter()
                .map(|a| fit.amplitude2 * (spec.f)(a.to_radians().cos()) / div)
                .collect();
            curves.push(SideCurve {
                pattern: spec.pattern.to_string(),
                amplitude2: fit.amplitude2,
                shape: spec.shape,
                angle_deg: angles.clone(),
                y,
            });
            curve_specs.push(spec);
        }
    }

    // Vertical range: bins with error bars, curves, zero, and the central 96 % of pairs.
    let mut lo: f64 = 0.0;
    let mut hi: f64 = 0.0;
    for b in &bins {
        let e = b.y_err.max(b.y_err_full.unwrap_or(0.0));
        lo = lo.min(b.y - e);
        hi = hi.max(b.y + e);
    }
    if let Some(bd) = &band {
        for (y, t) in bd.y.iter().zip(&bd.total) {
            lo = lo.min(y - t);
            hi = hi.max(y + t);
        }
    }
    for c in &curves {
        for y in &c.y {
            lo = lo.min(*y);
            hi = hi.max(*y);
        }
    }
    let pair_ys: Vec<(f64, f64)> = data
        .pairs
        .iter()
        .map(|p| (p.angle_deg, p.rho / div))
        .collect();
    if opts.show_pairs && !pair_ys.is_empty() {
        let mut ys: Vec<f64> = pair_ys.iter().map(|p| p.1).collect();
        ys.sort_by(f64::total_cmp);
        lo = lo.min(quantile(&ys, 0.02));
        hi = hi.max(quantile(&ys, 0.98));
    }
    let span = (hi - lo).max(f64::MIN_POSITIVE);
    let yt = linear_ticks(lo - 0.04 * span, hi + 0.04 * span, 5, true);
    let xt = fixed_ticks(0.0, 180.0, 30.0, 3);
    let unit = if yt.exponent != 0 {
        format!("10{} ", superscript(yt.exponent))
    } else {
        String::new()
    };
    let y_label = if opts.normalised {
        if unit.is_empty() {
            "correlation ρ / Â²(HD)".to_string()
        } else {
            format!("correlation ρ / Â²(HD) [{}]", unit.trim_end())
        }
    } else {
        // rho estimates A^2 G: it is in units of the (dimensionless) squared amplitude.
        if unit.is_empty() {
            "cross-correlation ρ [A²]".to_string()
        } else {
            format!("cross-correlation ρ [{}A²]", unit)
        }
    };
    let x_label = "angular separation ζ [deg]".to_string();

    // Legend.
    let mut items = vec![LegendItem {
        label: if bins.iter().any(|b| b.y_err_full.is_some()) {
            "binned ρ ± 1σ (independent pairs)".to_string()
        } else {
            "binned ρ ± 1σ".to_string()
        },
        sample: Sample::Marker(BIN_MARKER, true),
    }];
    if bins.iter().any(|b| b.y_err_full.is_some()) {
        items.push(LegendItem {
            label: "± 1σ full covariance".to_string(),
            sample: Sample::Line(FULL_BAR),
        });
    }
    if band.is_some() {
        items.push(LegendItem {
            label: "HD spread: cosmic".to_string(),
            sample: Sample::Patch(VERMILLION, COSMIC_OPACITY, VERMILLION),
        });
        items.push(LegendItem {
            label: "total (one pair)".to_string(),
            sample: Sample::Patch(VERMILLION, TOTAL_OPACITY, VERMILLION),
        });
    }
    for (spec, c) in curve_specs.iter().zip(&curves) {
        let label = if opts.normalised && spec.pattern == "hd" {
            format!("{} G(ζ)", spec.label)
        } else {
            format!(
                "{}, Â² = {}",
                spec.label,
                format::sci(c.amplitude2, 2, Style::Figure)
            )
        };
        items.push(LegendItem {
            label,
            sample: Sample::Line(spec.stroke),
        });
    }
    if opts.show_pairs {
        items.push(LegendItem {
            label: "pairs".to_string(),
            sample: Sample::Dot(PAIR_GREY, 0.7),
        });
    }

    // Caption.
    let fy = if s.frequencies_hz.is_empty() {
        format!("{} frequencies", s.n_frequencies)
    } else {
        let fmin = s
            .frequencies_hz
            .iter()
            .copied()
            .fold(f64::INFINITY, f64::min);
        let fmax = s
            .frequencies_hz
            .iter()
            .copied()
            .fold(f64::NEG_INFINITY, f64::max);
        format!(
            "{} frequencies, {}–{}",
            s.n_frequencies,
            format::general(fmin * 1e9, 3, Style::Figure),
            format::nanohertz(fmax, Style::Figure)
        )
    };
    let pairs_outside = if opts.show_pairs {
        pair_ys
            .iter()
            .filter(|(_, y)| *y < yt.lo || *y > yt.hi)
            .count()
    } else {
        0
    };
    let mut caption = format!(
        "Â²(HD) = {}, S/N = {}. {} pulsars, {} pairs in {} bins; {} (spectral index {}, span {} yr). Each curve is that pattern's own fit.",
        format::plus_minus(hd.amplitude2, hd.amplitude2_sigma, 3, Style::Figure),
        format::fixed(hd.snr, 2, Style::Figure),
        s.n_pulsars,
        s.n_pairs,
        bins.len(),
        fy,
        format::fixed(s.spectral_index, 2, Style::Figure),
        format::general(s.span_years, 3, Style::Figure),
    );
    if bins.iter().any(|b| b.y_err_full.is_some()) {
        caption.push_str(
            " Black error bars: independent-pair 1σ; wide grey bars: 1σ from the full covariance of the bins with the signal at Â²(HD) (pairs sharing a pulsar and the signal's own scatter included).",
        );
    }
    if band.is_some() {
        caption.push_str(
            " Shaded: expected spread of a Gaussian background around the HD curve at Â²(HD) (Allen 2023), dark the cosmic variance of the pair-averaged correlation, light the total variance of one pair with pulsar terms; noise not included.",
        );
    }
    if let Some(f) = super::input::bin_fit(s) {
        let p = f
            .p_value
            .map(|p| format!(", p = {}", format::general(p, 2, Style::Figure)))
            .unwrap_or_default();
        caption.push_str(&format!(
            " HD curve fitted to the bins with their full covariance: χ² = {} for {} degrees of freedom{p} (assumes Gaussian bins and the noise model).",
            format::fixed(f.chi2, 1, Style::Figure),
            f.degrees_of_freedom
        ));
    }
    if pairs_outside > 0 {
        caption.push_str(&format!(
            " {pairs_outside} pair points lie outside the axes."
        ));
    }

    // Layout in points.
    let aspect = opts.width.aspect(0.64, 0.42);
    let layout = single_panel(opts.width.inches(), &yt, &items, &caption, aspect)?;
    let plot = layout.plot;

    let xs = Scale {
        lo: 0.0,
        hi: 180.0,
        log: false,
        a: plot.x,
        b: plot.right(),
    };
    let ys = Scale::y(&yt, &plot, false);

    let title = format!("Angular correlation: {}", s.title);
    let (mut svg, clip) = layout.open(stem, (&xs, &ys), (&xt, &yt), (&x_label, &y_label))?;
    svg.open("zero", Some(&clip), "");
    svg.line(
        plot.x,
        ys.map(0.0),
        plot.right(),
        ys.map(0.0),
        &Stroke::new(MUTED, 0.5, LineStyle::Dotted),
        "zero-line",
    );
    svg.close();
    if opts.show_pairs {
        svg.open(
            "pairs",
            Some(&clip),
            &format!(" fill=\"{PAIR_GREY}\" fill-opacity=\"0.45\""),
        );
        for (a, y) in &pair_ys {
            svg.dot(xs.map(*a), ys.map(*y), 0.75, "pair-point");
        }
        svg.close();
    }
    if let Some(bd) = &band {
        svg.open("hd-spread", Some(&clip), "");
        for (sig, op, class) in [
            (&bd.total, TOTAL_OPACITY, "band-total"),
            (&bd.cosmic, COSMIC_OPACITY, "band-cosmic"),
        ] {
            let mut pts: Vec<(f64, f64)> = bd
                .angle_deg
                .iter()
                .zip(&bd.y)
                .zip(sig)
                .map(|((a, y), e)| (xs.map(*a), ys.map(y + e)))
                .collect();
            pts.extend(
                bd.angle_deg
                    .iter()
                    .zip(&bd.y)
                    .zip(sig)
                    .rev()
                    .map(|((a, y), e)| (xs.map(*a), ys.map(y - e))),
            );
            svg.area(&pts, VERMILLION, op, class);
        }
        svg.close();
    }
    svg.open("curves", Some(&clip), "");
    for (spec, c) in curve_specs.iter().zip(&curves) {
        let pts: Vec<(f64, f64)> = c
            .angle_deg
            .iter()
            .zip(&c.y)
            .map(|(a, y)| (xs.map(*a), ys.map(*y)))
            .collect();
        svg.polyline(&pts, &spec.stroke, &format!("curve curve-{}", spec.pattern));
    }
    svg.close();
    svg.open("bins", Some(&clip), "");
    let bar = Stroke::new(INK, 0.7, LineStyle::Solid);
    for b in &bins {
        if let Some(e) = b.y_err_full {
            let x = xs.map(b.angle_mean_deg);
            svg.interval(
                x,
                &ys,
                b.y - e,
                b.y + e,
                2.4,
                &FULL_BAR,
                "bin-errorbar-full",
            );
        }
    }
    for b in &bins {
        let x = xs.map(b.angle_mean_deg);
        svg.interval(
            x,
            &ys,
            b.y - b.y_err,
            b.y + b.y_err,
            1.3,
            &bar,
            "bin-errorbar",
        );
    }
    for b in &bins {
        svg.marker(
            xs.map(b.angle_mean_deg),
            ys.map(b.y),
            &BIN_MARKER,
            "bin-marker",
        );
    }
    svg.close();
    let (svg_text, cap_box) = layout.close(svg, &items, &title)?;

    let sidecar = Sidecar {
        figure: STEM,
        source_folder: source.to_string(),
        normalised: opts.normalised,
        y_divisor: div,
        x_label,
        y_label,
        y_axis: [yt.lo, yt.hi],
        bins,
        curves,
        band,
        pairs_shown: opts.show_pairs,
        pairs_in_file: data.pairs.len(),
        pairs_outside_axes: pairs_outside,
        caption: caption.clone(),
        size_in: layout.size_in(),
        plot_box_pt: plot.as_array(),
        caption_box_pt: cap_box.as_array(),
    };
    Drawn::new(stem, title, caption, svg_text, &sidecar)
}
