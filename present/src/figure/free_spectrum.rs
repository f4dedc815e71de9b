//! The free-spectrum figure of a `ptacorr common` folder that sampled it (free-spectrum.csv;
//! engine/src/common/free_sampling.rs): for each model and analysis frequency the posterior
//! median of log10 rho_j with its central 68% (thick) and 95% (thin) intervals, and the power
//! law of the same model's grid fit (fixed index, posterior median amplitude) as a dashed line
//! through the same frequencies. The figure draws the table's numbers; it computes none.

use std::path::Path;

use serde::Serialize;

use super::canvas::{
    linear_ticks, log_ticks, single_panel, LegendItem, LineStyle, Marker, MarkerStyle, Sample,
    Scale, Stroke,
};
use super::common::{colour, label};
use super::{Drawn, FigureError, FigureOptions};

pub(crate) const STEM: &str = "free-spectrum";
/// The table this figure reads.
pub const FREE_SPECTRUM_CSV: &str = "free-spectrum.csv";

/// One row of free-spectrum.csv: the engine's own schema, read with the type it is written with.
pub use ptacorr::common::free_sampling::FreeSpectrumRow as FreeSpectrumPoint;

/// Read free-spectrum.csv of `dir`: every value finite, ordered intervals.
pub fn read_free_spectrum(dir: &Path) -> Result<Vec<FreeSpectrumPoint>, FigureError> {
    let path = dir.join(FREE_SPECTRUM_CSV);
    let mut out = Vec::new();
    for (line, p) in ptacorr::output::read_csv::<FreeSpectrumPoint>(&path)? {
        let line = line as u64;
        let bad = |column: &str, reason: &str| FigureError::InvalidCell {
            path: path.clone(),
            line,
            column: column.to_string(),
            reason: reason.to_string(),
        };
        let vals = [p.frequency_hz, p.median, p.lo_68, p.hi_68, p.lo_95, p.hi_95];
        if vals.iter().any(|v| !v.is_finite())
            || p.power_law_log10_rho.is_some_and(|v| !v.is_finite())
        {
            return Err(bad("median", "a value is not a finite number"));
        }
        if p.frequency_hz <= 0.0 {
            return Err(bad("frequency_hz", "must be positive"));
        }
        if !(p.lo_95 <= p.lo_68 && p.lo_68 <= p.median && p.median <= p.hi_68 && p.hi_68 <= p.hi_95)
        {
            return Err(bad(
                "lo_95",
                "the intervals are not nested around the median",
            ));
        }
        out.push(p);
    }
    if out.is_empty() {
        return Err(FigureError::InvalidField {
            path,
            field: "rows".to_string(),
            reason: "the table has no rows".to_string(),
        });
    }
    Ok(out)
}

#[derive(Serialize)]
struct Sidecar<'a> {
    figure: &'static str,
    source_folder: String,
    points: &'a [FreeSpectrumPoint],
    y_axis: [f64; 2],
    caption: String,
}

pub(crate) fn draw(
    points: &[FreeSpectrumPoint],
    title_of_data: &str,
    opts: &FigureOptions,
    stem: &str,
    source: &str,
) -> Result<Drawn, FigureError> {
    let mut models: Vec<&str> = Vec::new();
    for p in points {
        if !models.contains(&p.model.as_str()) {
            models.push(&p.model);
        }
    }
    let (mut lo, mut hi) = (f64::INFINITY, f64::NEG_INFINITY);
    let (mut f_lo, mut f_hi) = (f64::INFINITY, 0.0f64);
    for p in points {
        lo = lo.min(p.lo_95);
        hi = hi.max(p.hi_95);
        if let Some(v) = p.power_law_log10_rho {
            lo = lo.min(v);
            hi = hi.max(v);
        }
        f_lo = f_lo.min(p.frequency_hz * 1e9);
        f_hi = f_hi.max(p.frequency_hz * 1e9);
    }
    let span = (hi - lo).max(0.5);
    let yt = linear_ticks(lo - 0.04 * span, hi + 0.04 * span, 6, false);
    let xt = log_ticks(f_lo / 1.15, f_hi * 1.15);
    let y_label = "log₁₀ ρ(f) [s²]".to_string();
    let x_label = "frequency [nHz]".to_string();
    let mut items = Vec::new();
    for m in &models {
        items.push(LegendItem {
            label: format!("{}: median, 68% and 95%", label(m)),
            sample: Sample::Marker(
                MarkerStyle {
                    shape: Marker::Circle,
                    size: 3.2,
                    fill: colour(m),
                    stroke: "#FFFFFF",
                },
                true,
            ),
        });
        if points
            .iter()
            .any(|p| p.model == *m && p.power_law_log10_rho.is_some())
        {
            items.push(LegendItem {
                label: format!("{}: power law of the grid fit", label(m)),
                sample: Sample::Line(Stroke::new(colour(m), 1.0, LineStyle::Dashed)),
            });
        }
    }
    let caption = format!(
        "Free spectrum of the common process: the posterior of the power ρ (variance of each Fourier coefficient, s²) at each of {} frequencies, sampled with NUTS, per correlation model (median, thick bar 68%, thin bar 95%, central intervals; models offset slightly in frequency for legibility). Dashed: the power law at the posterior median amplitude of the same model's fixed-index grid fit. A bar pressed against the bottom of the prior is an upper limit set by the noise, not a measurement. Assumes the noise model and a prior uniform in log10 ρ.",
        points
            .iter()
            .map(|p| p.frequency_index)
            .max()
            .unwrap_or(0)
    );
    let aspect = opts.width.aspect(0.72, 0.45);
    let layout = single_panel(opts.width.inches(), &yt, &items, &caption, aspect)?;
    let plot = layout.plot;
    let xs = Scale::x(&xt, &plot, true);
    let ys = Scale::y(&yt, &plot, false);
    let title = format!("Free spectrum: {title_of_data}");
    let (mut svg, clip) = layout.open(stem, (&xs, &ys), (&xt, &yt), (&x_label, &y_label))?;
    let n_models = models.len() as f64;
    for (mi, m) in models.iter().enumerate() {
        let c = colour(m);
        // Offsets of a few per cent in frequency keep the models' bars apart.
        let shift = 1.0 + 0.035 * (mi as f64 - 0.5 * (n_models - 1.0));
        let mine: Vec<&FreeSpectrumPoint> = points.iter().filter(|p| p.model == *m).collect();
        svg.open("power-law", Some(&clip), "");
        let line: Vec<(f64, f64)> = mine
            .iter()
            .filter_map(|p| {
                p.power_law_log10_rho
                    .map(|v| (xs.map(p.frequency_hz * 1e9), ys.map(v)))
            })
            .collect();
        if line.len() >= 2 {
            svg.polyline(&line, &Stroke::new(c, 1.0, LineStyle::Dashed), "power-law");
        }
        svg.close();
        svg.open("intervals", Some(&clip), "");
        for p in &mine {
            let x = xs.map(p.frequency_hz * 1e9 * shift);
            svg.interval(
                x,
                &ys,
                p.lo_95,
                p.hi_95,
                0.0,
                &Stroke::new(c, 0.7, LineStyle::Solid),
                "interval-95",
            );
            svg.interval(
                x,
                &ys,
                p.lo_68,
                p.hi_68,
                0.0,
                &Stroke::new(c, 2.2, LineStyle::Solid),
                "interval-68",
            );
            svg.marker(
                x,
                ys.map(p.median),
                &MarkerStyle {
                    shape: Marker::Circle,
                    size: 3.2,
                    fill: c,
                    stroke: "#FFFFFF",
                },
                "median",
            );
        }
        svg.close();
    }
    let (svg_text, _) = layout.close(svg, &items, &title)?;
    let sidecar = Sidecar {
        figure: STEM,
        source_folder: source.to_string(),
        points,
        y_axis: [yt.lo, yt.hi],
        caption: caption.clone(),
    };
    Drawn::new(stem, title, caption, svg_text, &sidecar)
}

#[cfg(test)]
mod tests {
    use super::*;

    fn row(model: &str, j: u64, m: f64) -> FreeSpectrumPoint {
        FreeSpectrumPoint {
            model: model.into(),
            frequency_index: j as usize,
            frequency_hz: j as f64 * 2.4e-9,
            median: m,
            lo_68: m - 0.1,
            hi_68: m + 0.1,
            lo_95: m - 0.2,
            hi_95: m + 0.2,
            rhat: 1.0,
            ess_bulk: 1000.0,
            ess_tail: 900.0,
            power_law_log10_rho: Some(m + 0.05),
        }
    }

    /// The figure draws one median marker per (model, frequency), and the same input gives the
    /// same bytes (issue 9.8); the reader refuses intervals that are not nested.
    #[test]
    fn draws_every_point_and_is_deterministic() {
        let pts: Vec<FreeSpectrumPoint> = (1..=5)
            .flat_map(|j| {
                [
                    row("curn", j, -11.0 - j as f64),
                    row("hd", j, -11.1 - j as f64),
                ]
            })
            .collect();
        let opts = FigureOptions::default();
        let a = draw(&pts, "fixture", &opts, STEM, "c").unwrap();
        let b = draw(&pts, "fixture", &opts, STEM, "c").unwrap();
        assert_eq!(a.svg, b.svg);
        assert_eq!(a.svg.matches("class=\"median\"").count(), 10);
        assert!(a.svg.matches("class=\"power-law\"").count() >= 2);
        let dir = ptacorr::testing::temp_dir("fs-fig");
        std::fs::write(
            dir.join(FREE_SPECTRUM_CSV),
            "model,frequency_index,frequency_hz,median,lo_68,hi_68,lo_95,hi_95,rhat,ess_bulk,ess_tail,power_law_log10_rho\n\
             curn,1,2.4e-9,-11,-11.2,-10.9,-11.3,-10.8,1.0,900,800,\n\
             curn,2,4.8e-9,-12,-11.9,-12.1,-12.3,-11.8,1.0,900,800,-12\n",
        )
        .unwrap();
        let e = read_free_spectrum(&dir).unwrap_err().to_string();
        assert!(e.contains("line 3") && e.contains("nested"), "{e}");
        std::fs::remove_dir_all(&dir).ok();
    }
}
