//! Figure 2: the null distribution. A density histogram of the trials' S/N, the observed S/N
//! as a vertical line, the trials at least as extreme shaded darker, the analytic null
//! density when the folder has one, and the p-value in the caption.

use serde::Serialize;

use super::canvas::{
    linear_ticks, single_panel, text_width, Anchor, LegendItem, LineStyle, Sample, Scale, Stroke,
    BLACK, BLUE, FS_SMALL, SKY, VERMILLION,
};
use super::format::{self, Style};
use super::input::NullData;
use super::{Drawn, FigureError, FigureOptions};

pub(crate) const STEM: &str = "null-distribution";

#[derive(Serialize, Debug, PartialEq)]
pub(crate) struct Histogram {
    pub edges: Vec<f64>,
    pub counts: Vec<u64>,
    /// counts / (total × bin width): integrates to one.
    pub density: Vec<f64>,
}

/// Equal-width histogram over the range of `values` with 2 n^(1/3) bins, between 10 and 60.
pub(crate) fn histogram(values: &[f64]) -> Histogram {
    let n = values.len().max(1);
    let k = ((2.0 * (n as f64).cbrt()).ceil() as usize).clamp(10, 60);
    let mn = values.iter().copied().fold(f64::INFINITY, f64::min);
    let mx = values.iter().copied().fold(f64::NEG_INFINITY, f64::max);
    let (mn, mx) = if !(mn.is_finite() && mx.is_finite()) {
        (0.0, 1.0)
    } else if mx - mn <= 1e-12 * mx.abs().max(1.0) {
        (mn - 0.5, mx + 0.5)
    } else {
        (mn, mx)
    };
    let width = (mx - mn) / k as f64;
    let edges: Vec<f64> = (0..=k)
        .map(|i| if i == k { mx } else { mn + i as f64 * width })
        .collect();
    let mut counts = vec![0u64; k];
    for v in values {
        let i = (((v - mn) / width).floor().max(0.0) as usize).min(k - 1);
        counts[i] += 1;
    }
    let density = counts
        .iter()
        .enumerate()
        .map(|(i, c)| *c as f64 / (n as f64 * (edges[i + 1] - edges[i])))
        .collect();
    Histogram {
        edges,
        counts,
        density,
    }
}

fn method_words(method: &str) -> &str {
    match method {
        "scramble" => "sky-scrambled",
        "phase" => "phase-shifted",
        "simulate" => "simulated",
        other => other,
    }
}

pub(crate) fn pattern_words(pattern: &str) -> &str {
    match pattern {
        "hd" => "Hellings–Downs",
        other => other,
    }
}

#[derive(Serialize)]
struct Density {
    snr: Vec<f64>,
    density: Vec<f64>,
}

#[derive(Serialize)]
struct Sidecar {
    figure: &'static str,
    source_folder: String,
    method: String,
    pattern: String,
    trials_reported: u64,
    trials_in_file: usize,
    observed_snr: f64,
    n_at_least_as_extreme: u64,
    p_value: f64,
    p_value_ci95: [f64; 2],
    gaussian_sigma: Option<f64>,
    histogram: Histogram,
    analytic_density: Option<Density>,
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
    data: &NullData,
    opts: &FigureOptions,
    stem: &str,
    source: &str,
) -> Result<Drawn, FigureError> {
    let s = &data.summary;
    let snrs: Vec<f64> = data.trials.iter().map(|t| t.snr).collect();
    let hist = histogram(&snrs);
    let k = hist.counts.len();
    let obs = s.observed_snr;

    let xlo = hist.edges[0].min(obs);
    let xhi = hist.edges[k].max(obs);
    let span = (xhi - xlo).max(1e-9);
    let xt = linear_ticks(xlo - 0.03 * span, xhi + 0.03 * span, 6, false);
    let mut ymax = hist.density.iter().copied().fold(0.0, f64::max);
    if let Some((x, d)) = s.analytic_density.as_ref().map(|g| (&g.snr, &g.density)) {
        for (xi, di) in x.iter().zip(d) {
            if *xi >= xt.lo && *xi <= xt.hi {
                ymax = ymax.max(*di);
            }
        }
    }
    let yt = linear_ticks(0.0, ymax * 1.12, 5, true);
    let x_label = format!("S/N of the {} pattern", pattern_words(s.pattern.name()));
    let y_label = if yt.exponent != 0 {
        format!(
            "probability density [10{}]",
            super::canvas::superscript(yt.exponent)
        )
    } else {
        "probability density".to_string()
    };

    let mut items = vec![
        LegendItem {
            label: format!(
                "{} trials ({})",
                data.trials.len(),
                method_words(s.method.name())
            ),
            sample: Sample::Patch(SKY, 0.55, BLUE),
        },
        LegendItem {
            label: "at least as extreme".to_string(),
            sample: Sample::Patch(BLUE, 0.9, BLUE),
        },
        LegendItem {
            label: "observed".to_string(),
            sample: Sample::Line(Stroke::new(VERMILLION, 1.2, LineStyle::Solid)),
        },
    ];
    let analytic_stroke = Stroke::new(BLACK, 0.9, LineStyle::Dashed);
    if s.analytic_density.is_some() {
        items.push(LegendItem {
            label: "analytic null density".to_string(),
            sample: Sample::Line(analytic_stroke),
        });
    }

    let sigma = match s.gaussian_sigma {
        Some(g) => format!(
            "Gaussian-equivalent {}σ, one-sided",
            format::fixed(g, 2, Style::Figure)
        ),
        None => "no finite Gaussian equivalent".to_string(),
    };
    let mut caption = format!(
        "One-sided p = {} (95% interval {} – {}): {} of {} {} trials reach S/N ≥ {} (observed); {}.",
        format::prob(s.p_value, Style::Figure),
        format::prob(s.p_value_ci95[0], Style::Figure),
        format::prob(s.p_value_ci95[1], Style::Figure),
        s.n_at_least_as_extreme,
        s.trials,
        method_words(s.method.name()),
        format::fixed(obs, 2, Style::Figure),
        sigma
    );
    if let Some((p, g, is_bound)) = data.analytic() {
        let rel = if is_bound { "<" } else { "=" };
        caption.push_str(&format!(
            " Analytic: p {rel} {}",
            format::general(p, 2, Style::Figure)
        ));
        if let Some(g) = g {
            caption.push_str(&format!(", {}σ", format::fixed(g, 2, Style::Figure)));
        }
        caption.push('.');
    }
    if data.trials.len() as u64 != s.trials {
        caption.push_str(&format!(
            " trials.csv holds {} rows, null.json reports {}.",
            data.trials.len(),
            s.trials
        ));
    }

    let aspect = opts.width.aspect(0.62, 0.40);
    let layout = single_panel(opts.width.inches(), &yt, &items, &caption, aspect)?;
    let plot = layout.plot;
    let xs = Scale::x(&xt, &plot, false);
    let ys = Scale::y(&yt, &plot, false);

    let title = format!(
        "Null distribution of the {} S/N",
        pattern_words(s.pattern.name())
    );
    let (mut svg, clip) = layout.open(stem, (&xs, &ys), (&xt, &yt), (&x_label, &y_label))?;
    svg.histogram(&clip, (&xs, &ys), &hist.edges, &hist.density[..k], &|i| {
        hist.edges[i] >= obs
    });
    if let Some((x, d)) = s.analytic_density.as_ref().map(|g| (&g.snr, &g.density)) {
        svg.open("analytic", Some(&clip), "");
        let pts: Vec<(f64, f64)> = x
            .iter()
            .zip(d)
            .map(|(a, b)| (xs.map(*a), ys.map(*b)))
            .collect();
        svg.polyline(&pts, &analytic_stroke, "analytic-density");
        svg.close();
    }
    let ox = xs.map(obs);
    svg.line(
        ox,
        plot.y,
        ox,
        plot.bottom(),
        &Stroke::new(VERMILLION, 1.2, LineStyle::Solid),
        "observed-line",
    );
    let label = format!("S/N = {}", format::fixed(obs, 2, Style::Figure));
    let lw = text_width(&label, FS_SMALL)?;
    let (lx, anchor) = if ox + 2.5 + lw <= plot.right() {
        (ox + 2.5, Anchor::Start)
    } else {
        (ox - 2.5, Anchor::End)
    };
    svg.text(
        &label,
        lx,
        plot.y + FS_SMALL + 1.5,
        FS_SMALL,
        anchor,
        VERMILLION,
        "observed-label",
    )?;
    let (svg_text, cap_box) = layout.close(svg, &items, &title)?;

    let sidecar = Sidecar {
        figure: STEM,
        source_folder: source.to_string(),
        method: s.method.name().to_string(),
        pattern: s.pattern.name().to_string(),
        trials_reported: s.trials,
        trials_in_file: data.trials.len(),
        observed_snr: obs,
        n_at_least_as_extreme: s.n_at_least_as_extreme,
        p_value: s.p_value,
        p_value_ci95: s.p_value_ci95,
        gaussian_sigma: s.gaussian_sigma,
        histogram: hist,
        analytic_density: s.analytic_density.as_ref().map(|g| Density {
            snr: g.snr.clone(),
            density: g.density.clone(),
        }),
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

#[cfg(test)]
mod tests {
    use super::histogram;

    #[test]
    fn histogram_counts_every_value_once() {
        let v: Vec<f64> = (0..1000).map(|i| (i as f64 * 0.37).sin() * 3.0).collect();
        let h = histogram(&v);
        assert_eq!(h.counts.len(), 20);
        assert_eq!(h.counts.iter().sum::<u64>(), 1000);
        assert_eq!(
            h.edges.first(),
            Some(&v.iter().copied().fold(f64::INFINITY, f64::min))
        );
        let single = histogram(&[2.0; 5]);
        assert_eq!(single.counts.iter().sum::<u64>(), 5);
        assert!(single.edges[0] < 2.0 && *single.edges.last().unwrap() > 2.0);
    }
}
