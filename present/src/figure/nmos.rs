//! The noise-marginalised OS figure: a density histogram of the Hellings-Downs A^2 over the
//! noise draws, the fixed-noise estimate as a vertical line, the median and the central 68%
//! interval marked, and the S/N spread in the caption (docs/noise-marginalised.md).

use serde::Serialize;

use super::canvas::{
    linear_ticks, single_panel, LegendItem, LineStyle, Sample, Scale, Stroke, Svg, BLACK, BLUE,
    SKY, VERMILLION,
};
use super::format::{self, Style};
use super::input::CorrelateData;
use super::null::{histogram, Histogram};
use super::{Drawn, FigureError, FigureOptions};
use ptacorr::orf::Pattern;

pub(crate) const STEM: &str = "noise-marginalised";

#[derive(Serialize)]
struct Sidecar {
    figure: &'static str,
    source_folder: String,
    draws: usize,
    fixed_noise_amplitude2: f64,
    median_amplitude2: f64,
    interval_68_amplitude2: [f64; 2],
    interval_95_amplitude2: [f64; 2],
    median_snr: f64,
    interval_68_snr: [f64; 2],
    histogram: Histogram,
    x_label: String,
    y_label: String,
    x_axis: [f64; 2],
    y_axis: [f64; 2],
    caption: String,
    size_in: [f64; 2],
    plot_box_pt: [f64; 4],
    caption_box_pt: [f64; 4],
}

pub(crate) fn draw(
    data: &CorrelateData,
    opts: &FigureOptions,
    stem: &str,
    source: &str,
) -> Result<Drawn, FigureError> {
    let n = data.nmos.as_ref().ok_or_else(|| FigureError::Render {
        figure: STEM.to_string(),
        reason: "the folder has no noise draws".to_string(),
    })?;
    let hd = n
        .summary
        .patterns
        .get(&Pattern::Hd)
        .ok_or_else(|| FigureError::MissingField {
            path: data.dir.join("summary.json"),
            field: "noise_marginalised.patterns.hd".to_string(),
        })?;
    let fixed = data
        .summary
        .patterns
        .get("hd")
        .map(|p| p.amplitude2)
        .unwrap_or(f64::NAN);
    let a2: Vec<f64> = n.draws.iter().map(|d| d.estimates[0].amplitude2).collect();
    let hist = histogram(&a2);
    let k = hist.counts.len();
    let mut xlo = hist.edges[0];
    let mut xhi = hist.edges[k];
    if fixed.is_finite() {
        xlo = xlo.min(fixed);
        xhi = xhi.max(fixed);
    }
    let span = (xhi - xlo).max(1e-300);
    let xt = linear_ticks(xlo - 0.03 * span, xhi + 0.03 * span, 6, true);
    let ymax = hist.density.iter().copied().fold(0.0, f64::max);
    let yt = linear_ticks(0.0, ymax * 1.12, 5, true);
    let x_label = if xt.exponent != 0 {
        format!(
            "Hellings–Downs Â² [10{}]",
            super::canvas::superscript(xt.exponent)
        )
    } else {
        "Hellings–Downs Â²".to_string()
    };
    let y_label = if yt.exponent != 0 {
        format!(
            "probability density [10{}]",
            super::canvas::superscript(yt.exponent)
        )
    } else {
        "probability density".to_string()
    };
    let median_stroke = Stroke::new(BLACK, 1.0, LineStyle::Solid);
    let band_stroke = Stroke::new(BLACK, 0.8, LineStyle::Dashed);
    let fixed_stroke = Stroke::new(VERMILLION, 1.2, LineStyle::Solid);
    let items = vec![
        LegendItem {
            label: format!("{} noise draws", n.draws.len()),
            sample: Sample::Patch(SKY, 0.55, BLUE),
        },
        LegendItem {
            label: "median".to_string(),
            sample: Sample::Line(median_stroke),
        },
        LegendItem {
            label: "68% interval".to_string(),
            sample: Sample::Line(band_stroke),
        },
        LegendItem {
            label: "fixed noise model".to_string(),
            sample: Sample::Line(fixed_stroke),
        },
    ];
    let g = |v: f64| format::general(v, 3, Style::Figure);
    let f2 = |v: f64| format::fixed(v, 2, Style::Figure);
    let caption = format!(
        "Noise-marginalised optimal statistic: Hellings–Downs Â² over {} draws of the noise model ({} pulsars drawn from chain tables, {} at noise.toml{}): median {}, 68% interval {} – {}, 95% interval {} – {}; S/N median {} (68% {} – {}). Fixed noise model: Â² = {}. The spread shows the dependence on the noise model, not a confidence interval; S/N is not a false-alarm probability.",
        n.draws.len(),
        n.summary.pulsars_drawn.len(),
        n.summary.pulsars_fixed.len(),
        if n.summary.common_draws.is_some() { "; common amplitude drawn" } else { "" },
        g(hd.amplitude2.median),
        g(hd.amplitude2.interval_68[0]),
        g(hd.amplitude2.interval_68[1]),
        g(hd.amplitude2.interval_95[0]),
        g(hd.amplitude2.interval_95[1]),
        f2(hd.snr.median),
        f2(hd.snr.interval_68[0]),
        f2(hd.snr.interval_68[1]),
        g(fixed),
    );
    let aspect = opts.width.aspect(0.62, 0.40);
    let layout = single_panel(opts.width.inches(), &yt, &items, &caption, aspect)?;
    let plot = layout.plot;
    let xs = Scale::x(&xt, &plot, false);
    let ys = Scale::y(&yt, &plot, false);
    let title = "Noise-marginalised Hellings–Downs Â²".to_string();
    let (mut svg, clip) = layout.open(stem, (&xs, &ys), (&xt, &yt), (&x_label, &y_label))?;
    svg.histogram(&clip, (&xs, &ys), &hist.edges, &hist.density[..k], &|_| {
        false
    });
    let vline = |svg: &mut Svg, x: f64, s: &Stroke, class: &str| {
        if x.is_finite() {
            let px = xs.map(x);
            svg.line(px, plot.y, px, plot.bottom(), s, class);
        }
    };
    vline(
        &mut svg,
        hd.amplitude2.median,
        &median_stroke,
        "median-line",
    );
    vline(
        &mut svg,
        hd.amplitude2.interval_68[0],
        &band_stroke,
        "interval-line",
    );
    vline(
        &mut svg,
        hd.amplitude2.interval_68[1],
        &band_stroke,
        "interval-line",
    );
    vline(&mut svg, fixed, &fixed_stroke, "fixed-line");
    let (svg_text, cap_box) = layout.close(svg, &items, &title)?;
    let sidecar = Sidecar {
        figure: STEM,
        source_folder: source.to_string(),
        draws: n.draws.len(),
        fixed_noise_amplitude2: fixed,
        median_amplitude2: hd.amplitude2.median,
        interval_68_amplitude2: hd.amplitude2.interval_68,
        interval_95_amplitude2: hd.amplitude2.interval_95,
        median_snr: hd.snr.median,
        interval_68_snr: hd.snr.interval_68,
        histogram: hist,
        x_label,
        y_label,
        x_axis: [xt.lo, xt.hi],
        y_axis: [yt.lo, yt.hi],
        caption: caption.clone(),
        size_in: layout.size_in(),
        plot_box_pt: plot.as_array(),
        caption_box_pt: cap_box.as_array(),
    };
    Drawn::new(stem, title, caption, svg_text, &sidecar)
}
