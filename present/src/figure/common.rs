//! The figures of a `ptacorr common` folder (engine/src/common/write.rs): the posterior of
//! log10 A at the fixed spectral index for every correlation model on one axis
//! (posterior-fixed-index.csv), and the 68% and 95% highest-density credible regions of the
//! joint (log10 A, gamma) posterior with the fixed-index line (posterior-grid.csv, contour
//! levels from summary.json). Every number drawn is read from the folder with the engine's own
//! types; the figures compute no statistic (the contour lines are traced through the tabulated
//! posterior at the levels the engine wrote).

use std::collections::BTreeMap;
use std::path::{Path, PathBuf};

use ptacorr::common::{
    CommonSummary, FixedRow, GridRow, COMMON_SUMMARY_FILE, FIXED_INDEX_FILE, GRID_FILE,
};
use serde::Serialize;

use super::canvas::{
    draw_axes, draw_caption, draw_legend, linear_ticks, single_panel, LegendItem, LineStyle,
    PanelLayout, Sample, Scale, Stroke, Svg, BLACK, BLUE, GREEN, MUTED, SKY, VERMILLION,
};
use super::free_spectrum::{read_free_spectrum, FreeSpectrumPoint, FREE_SPECTRUM_CSV};
use super::{ColumnWidth, Drawn, FigureError, FigureOptions};

pub(crate) const AMPLITUDE_STEM: &str = "common-amplitude";
pub(crate) const CONTOUR_STEM: &str = "common-contours";

/// Everything a common folder holds for its figures and its report section.
pub struct CommonData {
    pub dir: PathBuf,
    pub summary: CommonSummary,
    pub fixed: Vec<FixedRow>,
    pub grid: Vec<GridRow>,
    /// free-spectrum.csv, when the run sampled the free spectrum.
    pub free_spectrum: Option<Vec<FreeSpectrumPoint>>,
}

fn csv_rows<T: serde::de::DeserializeOwned>(path: &Path) -> Result<Vec<(u64, T)>, FigureError> {
    let rows = ptacorr::output::read_csv::<T>(path)?;
    if rows.is_empty() {
        return Err(FigureError::InvalidCell {
            path: path.to_path_buf(),
            line: 2,
            column: "*".to_string(),
            reason: "the file has a header but no rows".to_string(),
        });
    }
    Ok(rows.into_iter().map(|(l, r)| (l as u64, r)).collect())
}

fn cell(path: &Path, line: u64, column: &str, reason: &str) -> FigureError {
    FigureError::InvalidCell {
        path: path.to_path_buf(),
        line,
        column: column.to_string(),
        reason: reason.to_string(),
    }
}

impl CommonData {
    /// Read a common folder (the manifest is checked by `detect_kinds` before this).
    pub fn load(dir: &Path) -> Result<Self, FigureError> {
        let summary: CommonSummary = ptacorr::output::read_json(&dir.join(COMMON_SUMMARY_FILE))?;
        let path = dir.join(FIXED_INDEX_FILE);
        let mut fixed = Vec::new();
        for (line, r) in csv_rows::<FixedRow>(&path)? {
            if ![r.log10_amplitude, r.density, r.cdf]
                .iter()
                .all(|v| v.is_finite())
            {
                return Err(cell(&path, line, "density", "not a finite number"));
            }
            if r.density < 0.0 {
                return Err(cell(&path, line, "density", "negative"));
            }
            fixed.push(r);
        }
        let path = dir.join(GRID_FILE);
        let mut grid = Vec::new();
        for (line, r) in csv_rows::<GridRow>(&path)? {
            if ![r.spectral_index, r.log10_amplitude, r.log_posterior]
                .iter()
                .all(|v| v.is_finite())
            {
                return Err(cell(&path, line, "log_posterior", "not a finite number"));
            }
            grid.push(r);
        }
        let free_spectrum = if dir.join(FREE_SPECTRUM_CSV).is_file() {
            Some(read_free_spectrum(dir)?)
        } else {
            None
        };
        Ok(CommonData {
            dir: dir.to_path_buf(),
            summary,
            fixed,
            grid,
            free_spectrum,
        })
    }
}

pub(crate) fn colour(model: &str) -> &'static str {
    match model {
        "curn" => BLACK,
        "hd" => VERMILLION,
        "monopole" => BLUE,
        "dipole" => GREEN,
        _ => SKY,
    }
}

pub(crate) fn label(model: &str) -> String {
    match model {
        "curn" => "uncorrelated (CURN)".to_string(),
        "hd" => "Hellings–Downs".to_string(),
        other => other.to_string(),
    }
}

/// The models of a table in their order of first appearance.
fn models_in<'a>(names: impl Iterator<Item = &'a str>) -> Vec<&'a str> {
    let mut v: Vec<&str> = Vec::new();
    for n in names {
        if !v.contains(&n) {
            v.push(n);
        }
    }
    v
}

fn layout_aspect(opts: &FigureOptions) -> f64 {
    match opts.width {
        ColumnWidth::Single => 0.72,
        ColumnWidth::Double => 0.45,
    }
}

fn sub(s: f64) -> String {
    // Spectral index as a fraction when it is 13/3, else a short decimal.
    if (s - 13.0 / 3.0).abs() < 1e-12 {
        "13/3".to_string()
    } else {
        format!("{}", (s * 1000.0).round() / 1000.0)
    }
}

#[derive(Serialize)]
struct AmplitudeCurveSide<'a> {
    model: &'a str,
    log10_amplitude: Vec<f64>,
    density: Vec<f64>,
    upper_limit_95_log10: f64,
}

#[derive(Serialize)]
struct AmplitudeSidecar<'a> {
    figure: &'static str,
    source_folder: String,
    spectral_index: f64,
    curves: Vec<AmplitudeCurveSide<'a>>,
    y_axis: [f64; 2],
    caption: String,
}

/// The posterior of log10 A at the fixed index, one curve per model, with each model's 95%
/// upper limit as a dotted vertical line.
pub(crate) fn draw_amplitude(
    data: &CommonData,
    title_of_data: &str,
    opts: &FigureOptions,
    stem: &str,
    source: &str,
) -> Result<Drawn, FigureError> {
    let models = models_in(data.fixed.iter().map(|r| r.model.as_str()));
    let gamma = data.summary.priors.fixed_spectral_index;
    // The x range: where some model's density is above 1e-4 of its peak, with a margin (the
    // whole prior range for a flat posterior).
    let (mut x_lo, mut x_hi) = (f64::INFINITY, f64::NEG_INFINITY);
    for m in &models {
        let rows: Vec<&FixedRow> = data.fixed.iter().filter(|r| r.model == *m).collect();
        let peak = rows.iter().map(|r| r.density).fold(0.0, f64::max);
        for r in rows.iter().filter(|r| r.density >= 1e-4 * peak) {
            x_lo = x_lo.min(r.log10_amplitude);
            x_hi = x_hi.max(r.log10_amplitude);
        }
    }
    let (p_lo, p_hi) = data
        .fixed
        .iter()
        .fold((f64::INFINITY, f64::NEG_INFINITY), |a, r| {
            (a.0.min(r.log10_amplitude), a.1.max(r.log10_amplitude))
        });
    let margin = 0.1 * (x_hi - x_lo).max(0.05);
    let (x_lo, x_hi) = ((x_lo - margin).max(p_lo), (x_hi + margin).min(p_hi));
    let y_hi = data.fixed.iter().map(|r| r.density).fold(0.0, f64::max);
    let xt = linear_ticks(x_lo, x_hi, 7, false);
    let yt = linear_ticks(0.0, (y_hi * 1.05).max(1e-300), 5, false);
    let mut items = Vec::new();
    let mut curves = Vec::new();
    for m in &models {
        let rows: Vec<&FixedRow> = data.fixed.iter().filter(|r| r.model == *m).collect();
        let ul = data
            .summary
            .models
            .get(*m)
            .map(|s| s.fixed_index.log10_amplitude.upper_limit_95)
            .ok_or_else(|| FigureError::MissingField {
                path: data.dir.join(COMMON_SUMMARY_FILE),
                field: format!("models.{m}"),
            })?;
        items.push(LegendItem {
            label: label(m),
            sample: Sample::Line(Stroke::new(colour(m), 1.3, LineStyle::Solid)),
        });
        curves.push(AmplitudeCurveSide {
            model: m,
            log10_amplitude: rows.iter().map(|r| r.log10_amplitude).collect(),
            density: rows.iter().map(|r| r.density).collect(),
            upper_limit_95_log10: ul,
        });
    }
    items.push(LegendItem {
        label: "95% upper limit".to_string(),
        sample: Sample::Line(Stroke::new(MUTED, 0.8, LineStyle::Dotted)),
    });
    let caption = format!(
        "Posterior density of log₁₀ A of the common process at the fixed spectral index γ = {} for each correlation model ({} pulsars, {} frequencies), from the exact likelihood of the reduced data; dotted: each model's 95% upper limit. Prior: {}. Assumes the noise model (every pulsar's own noise held fixed) and the prior.",
        sub(gamma),
        data.summary.n_pulsars,
        data.summary.n_frequencies,
        data.summary.priors.log10_amplitude
    );
    let PanelLayout {
        w,
        h,
        pad,
        plot,
        legend_w,
        lines,
        cap_y,
    } = single_panel(
        opts.width.inches(),
        &yt,
        &items,
        &caption,
        layout_aspect(opts),
    )?;
    let xs = Scale::x(&xt, &plot, false);
    let ys = Scale::y(&yt, &plot, false);
    let title = format!("Posterior of the common amplitude: {title_of_data}");
    let mut svg = Svg::new(w, h, stem);
    let clip = svg.clip(plot);
    draw_axes(
        &mut svg,
        plot,
        &xs,
        &ys,
        &xt,
        &yt,
        "log₁₀ A",
        "posterior density",
    )?;
    for c in &curves {
        let col = colour(c.model);
        svg.open("posterior", Some(&clip), "");
        let pts: Vec<(f64, f64)> = c
            .log10_amplitude
            .iter()
            .zip(&c.density)
            .map(|(&u, &d)| (xs.map(u), ys.map(d)))
            .collect();
        svg.polyline(&pts, &Stroke::new(col, 1.3, LineStyle::Solid), "density");
        let x = xs.map(c.upper_limit_95_log10);
        svg.line(
            x,
            plot.y,
            x,
            plot.bottom(),
            &Stroke::new(col, 0.8, LineStyle::Dotted),
            "upper-limit",
        );
        svg.close();
    }
    draw_legend(&mut svg, &items, plot.x, pad, legend_w)?;
    draw_caption(&mut svg, &lines, pad, cap_y)?;
    let svg_text = svg.finish(&title);
    let side = AmplitudeSidecar {
        figure: AMPLITUDE_STEM,
        source_folder: source.to_string(),
        spectral_index: gamma,
        curves,
        y_axis: [yt.lo, yt.hi],
        caption: caption.clone(),
    };
    Ok(Drawn {
        stem: stem.to_string(),
        title,
        caption,
        svg: svg_text,
        sidecar: super::sidecar_json(&side, stem)?,
    })
}

/// One model's joint posterior on its rectangular grid: `z[j][i]` at (gamma_j, u_i).
struct Surface<'a> {
    model: &'a str,
    gammas: Vec<f64>,
    amplitudes: Vec<f64>,
    z: Vec<Vec<f64>>,
}

fn surfaces<'a>(data: &'a CommonData) -> Result<Vec<Surface<'a>>, FigureError> {
    let path = data.dir.join(GRID_FILE);
    let mut by: BTreeMap<&str, Vec<&GridRow>> = BTreeMap::new();
    for r in &data.grid {
        by.entry(r.model.as_str()).or_default().push(r);
    }
    let mut out = Vec::new();
    for m in models_in(data.grid.iter().map(|r| r.model.as_str())) {
        let rows = &by[m];
        let mut gammas: Vec<f64> = Vec::new();
        for r in rows {
            if gammas.last() != Some(&r.spectral_index) {
                gammas.push(r.spectral_index);
            }
        }
        let na = rows.len() / gammas.len();
        let amplitudes: Vec<f64> = rows[..na].iter().map(|r| r.log10_amplitude).collect();
        let ok = na >= 2
            && gammas.len() >= 2
            && na * gammas.len() == rows.len()
            && gammas.windows(2).all(|w| w[0] < w[1])
            && amplitudes.windows(2).all(|w| w[0] < w[1])
            && rows
                .iter()
                .enumerate()
                .all(|(k, r)| r.log10_amplitude == amplitudes[k % na]);
        if !ok {
            return Err(FigureError::InvalidField {
                path,
                field: format!("rows of model {m}"),
                reason: "not a rectangular grid ordered by spectral index, then log10 A"
                    .to_string(),
            });
        }
        let z = rows
            .chunks(na)
            .map(|c| c.iter().map(|r| r.log_posterior).collect())
            .collect();
        out.push(Surface {
            model: m,
            gammas,
            amplitudes,
            z,
        });
    }
    Ok(out)
}

/// The contour of `z` at `level` on a rectangular grid by marching squares (Lorensen & Cline
/// 1987, SIGGRAPH 21, 163, in two dimensions), with linear interpolation along cell edges and
/// saddles resolved by the cell-centre mean. Segments are joined into polylines in (x, y) grid
/// coordinates; the order is fixed by the grid, so the output is deterministic.
pub(crate) fn contour_lines(
    x: &[f64],
    y: &[f64],
    z: &[Vec<f64>],
    level: f64,
) -> Vec<Vec<(f64, f64)>> {
    // An edge is identified by (row, column, horizontal?) of its first corner.
    type Edge = (usize, usize, bool);
    let point = |e: Edge| -> (f64, f64) {
        let (j, i, horiz) = e;
        let (j2, i2) = if horiz { (j, i + 1) } else { (j + 1, i) };
        let (a, b) = (z[j][i], z[j2][i2]);
        let t = if b != a { (level - a) / (b - a) } else { 0.5 };
        let t = t.clamp(0.0, 1.0);
        (x[i] + t * (x[i2] - x[i]), y[j] + t * (y[j2] - y[j]))
    };
    let mut segs: Vec<(Edge, Edge)> = Vec::new();
    for j in 0..y.len().saturating_sub(1) {
        for i in 0..x.len().saturating_sub(1) {
            let c = [z[j][i], z[j][i + 1], z[j + 1][i + 1], z[j + 1][i]];
            let code = c
                .iter()
                .enumerate()
                .fold(0u8, |acc, (k, v)| acc | (u8::from(*v >= level) << k));
            // Edges: bottom (j, i, h), right (j, i+1, v), top (j+1, i, h), left (j, i, v).
            let bottom = (j, i, true);
            let right = (j, i + 1, false);
            let top = (j + 1, i, true);
            let left = (j, i, false);
            let centre_high = c.iter().sum::<f64>() / 4.0 >= level;
            let pairs: &[(Edge, Edge)] = match code {
                0 | 15 => &[],
                1 | 14 => &[(left, bottom)],
                2 | 13 => &[(bottom, right)],
                3 | 12 => &[(left, right)],
                4 | 11 => &[(right, top)],
                6 | 9 => &[(bottom, top)],
                7 | 8 => &[(left, top)],
                5 => {
                    if centre_high {
                        &[(left, top), (bottom, right)]
                    } else {
                        &[(left, bottom), (right, top)]
                    }
                }
                10 => {
                    if centre_high {
                        &[(left, bottom), (right, top)]
                    } else {
                        &[(left, top), (bottom, right)]
                    }
                }
                _ => &[],
            };
            segs.extend_from_slice(pairs);
        }
    }
    // Join segments that share an edge into chains.
    let mut at: BTreeMap<Edge, Vec<usize>> = BTreeMap::new();
    for (k, (a, b)) in segs.iter().enumerate() {
        at.entry(*a).or_default().push(k);
        at.entry(*b).or_default().push(k);
    }
    let mut used = vec![false; segs.len()];
    let mut lines = Vec::new();
    let other = |k: usize, e: Edge| if segs[k].0 == e { segs[k].1 } else { segs[k].0 };
    for start in 0..segs.len() {
        if used[start] {
            continue;
        }
        used[start] = true;
        let mut chain: std::collections::VecDeque<Edge> =
            [segs[start].0, segs[start].1].into_iter().collect();
        // Extend at the back, then at the front.
        for back in [true, false] {
            loop {
                let end = if back {
                    chain[chain.len() - 1]
                } else {
                    chain[0]
                };
                let next = at[&end].iter().copied().find(|&k| !used[k]);
                let Some(k) = next else { break };
                used[k] = true;
                let e = other(k, end);
                if back {
                    chain.push_back(e);
                } else {
                    chain.push_front(e);
                }
            }
        }
        lines.push(chain.into_iter().map(point).collect());
    }
    lines
}

#[derive(Serialize)]
struct ContourSide<'a> {
    model: &'a str,
    /// `log_posterior` levels of the 68.3% and 95% regions (summary.json).
    levels: [f64; 2],
    /// Polylines (log10 A, gamma) of each level.
    region_68: Vec<Vec<(f64, f64)>>,
    region_95: Vec<Vec<(f64, f64)>>,
}

#[derive(Serialize)]
struct ContourSidecar<'a> {
    figure: &'static str,
    source_folder: String,
    fixed_spectral_index: f64,
    models: Vec<ContourSide<'a>>,
    x_axis: [f64; 2],
    y_axis: [f64; 2],
    caption: String,
}

/// The 68% and 95% highest-density credible regions of (log10 A, gamma) per model, with the
/// fixed-index line.
pub(crate) fn draw_contours(
    data: &CommonData,
    title_of_data: &str,
    opts: &FigureOptions,
    stem: &str,
    source: &str,
) -> Result<Drawn, FigureError> {
    let surf = surfaces(data)?;
    let gamma_fixed = data.summary.priors.fixed_spectral_index;
    let mut sides = Vec::new();
    let (mut ux, mut gx) = (
        [f64::INFINITY, f64::NEG_INFINITY],
        [f64::INFINITY, f64::NEG_INFINITY],
    );
    for s in &surf {
        let levels = data
            .summary
            .models
            .get(s.model)
            .map(|m| m.varied_index.credible_region_log_posterior)
            .ok_or_else(|| FigureError::MissingField {
                path: data.dir.join(COMMON_SUMMARY_FILE),
                field: format!("models.{}.varied_index", s.model),
            })?;
        if !levels.iter().all(|v| v.is_finite()) {
            return Err(FigureError::InvalidField {
                path: data.dir.join(COMMON_SUMMARY_FILE),
                field: format!(
                    "models.{}.varied_index.credible_region_log_posterior",
                    s.model
                ),
                reason: "not finite numbers".to_string(),
            });
        }
        // Rows are gamma (y), columns log10 A (x): the polylines are (log10 A, gamma).
        let r68 = contour_lines(&s.amplitudes, &s.gammas, &s.z, levels[0]);
        let r95 = contour_lines(&s.amplitudes, &s.gammas, &s.z, levels[1]);
        for l in r68.iter().chain(&r95) {
            for &(u, g) in l {
                ux = [ux[0].min(u), ux[1].max(u)];
                gx = [gx[0].min(g), gx[1].max(g)];
            }
        }
        sides.push(ContourSide {
            model: s.model,
            levels,
            region_68: r68,
            region_95: r95,
        });
    }
    // Axes: the credible regions with a margin, the fixed index always in view; the whole prior
    // range when nothing was traced (a flat posterior).
    let (a_lo, a_hi, g_lo, g_hi) = if ux[0].is_finite() {
        let du = (ux[1] - ux[0]).max(0.2);
        let dg = (gx[1] - gx[0]).max(0.5);
        (
            ux[0] - 0.15 * du,
            ux[1] + 0.15 * du,
            (gx[0] - 0.15 * dg).min(gamma_fixed - 0.2),
            (gx[1] + 0.15 * dg).max(gamma_fixed + 0.2),
        )
    } else {
        let s0 = &surf[0];
        (
            s0.amplitudes[0],
            s0.amplitudes[s0.amplitudes.len() - 1],
            s0.gammas[0],
            s0.gammas[s0.gammas.len() - 1],
        )
    };
    let xt = linear_ticks(a_lo, a_hi, 6, false);
    let yt = linear_ticks(g_lo, g_hi, 6, false);
    let mut items = Vec::new();
    for s in &sides {
        items.push(LegendItem {
            label: label(s.model),
            sample: Sample::Line(Stroke::new(colour(s.model), 1.4, LineStyle::Solid)),
        });
    }
    items.push(LegendItem {
        label: "95% region".to_string(),
        sample: Sample::Line(Stroke::new(MUTED, 0.8, LineStyle::Dashed)),
    });
    items.push(LegendItem {
        label: format!("γ = {}", sub(gamma_fixed)),
        sample: Sample::Line(Stroke::new(MUTED, 0.8, LineStyle::Dotted)),
    });
    let caption = format!(
        "Joint posterior of the amplitude and spectral index of the common process: the 68% (solid) and 95% (dashed) highest-density credible regions for each correlation model, traced through the tabulated posterior at the levels the fit computed; dotted: γ = {} ({} pulsars, {} frequencies). Priors: {}; γ uniform on [{}, {}]. Assumes the noise model (every pulsar's own noise held fixed) and the priors.",
        sub(gamma_fixed),
        data.summary.n_pulsars,
        data.summary.n_frequencies,
        data.summary.priors.log10_amplitude,
        surf[0].gammas[0],
        surf[0].gammas[surf[0].gammas.len() - 1],
    );
    let PanelLayout {
        w,
        h,
        pad,
        plot,
        legend_w,
        lines,
        cap_y,
    } = single_panel(
        opts.width.inches(),
        &yt,
        &items,
        &caption,
        layout_aspect(opts),
    )?;
    let xs = Scale::x(&xt, &plot, false);
    let ys = Scale::y(&yt, &plot, false);
    let title = format!("Joint posterior of the common process: {title_of_data}");
    let mut svg = Svg::new(w, h, stem);
    let clip = svg.clip(plot);
    draw_axes(
        &mut svg,
        plot,
        &xs,
        &ys,
        &xt,
        &yt,
        "log₁₀ A",
        "spectral index γ",
    )?;
    svg.open("fixed-index", Some(&clip), "");
    svg.line(
        plot.x,
        ys.map(gamma_fixed),
        plot.right(),
        ys.map(gamma_fixed),
        &Stroke::new(MUTED, 0.8, LineStyle::Dotted),
        "fixed-index",
    );
    svg.close();
    for s in &sides {
        let col = colour(s.model);
        svg.open("credible-regions", Some(&clip), "");
        for (ls, st, class) in [
            (
                &s.region_95,
                Stroke::new(col, 0.8, LineStyle::Dashed),
                "region-95",
            ),
            (
                &s.region_68,
                Stroke::new(col, 1.4, LineStyle::Solid),
                "region-68",
            ),
        ] {
            for l in ls {
                let pts: Vec<(f64, f64)> = l.iter().map(|&(u, g)| (xs.map(u), ys.map(g))).collect();
                svg.polyline(&pts, &st, class);
            }
        }
        svg.close();
    }
    draw_legend(&mut svg, &items, plot.x, pad, legend_w)?;
    draw_caption(&mut svg, &lines, pad, cap_y)?;
    let svg_text = svg.finish(&title);
    let side = ContourSidecar {
        figure: CONTOUR_STEM,
        source_folder: source.to_string(),
        fixed_spectral_index: gamma_fixed,
        models: sides,
        x_axis: [xt.lo, xt.hi],
        y_axis: [yt.lo, yt.hi],
        caption: caption.clone(),
    };
    Ok(Drawn {
        stem: stem.to_string(),
        title,
        caption,
        svg: svg_text,
        sidecar: super::sidecar_json(&side, stem)?,
    })
}

/// Every figure of a common folder: the amplitude posterior, the credible regions, and the
/// free spectrum when the run sampled it.
pub(crate) fn draw_all(
    data: &CommonData,
    opts: &FigureOptions,
    stem_suffix: &str,
    source: &str,
) -> Result<Vec<Drawn>, FigureError> {
    let title = data.summary.title.clone();
    let mut v = vec![
        draw_amplitude(
            data,
            &title,
            opts,
            &format!("{AMPLITUDE_STEM}{stem_suffix}"),
            source,
        )?,
        draw_contours(
            data,
            &title,
            opts,
            &format!("{CONTOUR_STEM}{stem_suffix}"),
            source,
        )?,
    ];
    if let Some(points) = &data.free_spectrum {
        v.push(super::free_spectrum::draw(
            points,
            &title,
            opts,
            &format!("{}{stem_suffix}", super::free_spectrum::STEM),
            source,
        )?);
    }
    Ok(v)
}

#[cfg(test)]
mod tests {
    use super::super::fixtures::{common_folder, seal, TempDir};
    use super::super::{plot_folder, FigureFormat};
    use super::*;

    fn sidecar(path: &Path) -> serde_json::Value {
        serde_json::from_str(&std::fs::read_to_string(path).unwrap()).unwrap()
    }

    /// `plot` on a common folder draws the amplitude posterior and the credible regions (no
    /// free-spectrum.csv needed), byte-identically on a second run in every format (issue
    /// 9.8); the traced regions of the fixture's bivariate Gaussian lie on its ellipses
    /// Q = -2 ln(1 - content) (chi-square with two degrees of freedom: 2.2957 for 68.27%,
    /// 5.9915 for 95%), to the error of linear interpolation on the grid (below 3% of Q for
    /// spacings of a tenth and a sixth of the standard deviations; the bound is this test's
    /// own estimate); the free spectrum joins them when the folder has it.
    #[test]
    fn common_folder_figures_are_drawn_deterministically_and_trace_the_regions() {
        let t = TempDir::new("common");
        let dir = t.sub("com");
        common_folder(&dir);
        for format in [FigureFormat::Svg, FigureFormat::Png, FigureFormat::Pdf] {
            let a =
                plot_folder(&dir, format, Some(&t.sub("a")), &FigureOptions::default()).unwrap();
            let b =
                plot_folder(&dir, format, Some(&t.sub("b")), &FigureOptions::default()).unwrap();
            let names: Vec<String> = a
                .iter()
                .map(|p| p.file_name().unwrap().to_string_lossy().into_owned())
                .collect();
            let ext = format.extension();
            assert_eq!(
                names,
                vec![
                    format!("common-amplitude.{ext}"),
                    "common-amplitude.json".to_string(),
                    format!("common-contours.{ext}"),
                    "common-contours.json".to_string()
                ]
            );
            for (x, y) in a.iter().zip(&b) {
                assert_eq!(
                    std::fs::read(x).unwrap(),
                    std::fs::read(y).unwrap(),
                    "{x:?}"
                );
            }
        }
        let svg = std::fs::read_to_string(t.path().join("a/common-contours.svg")).unwrap();
        assert!(svg.contains("class=\"region-68\"") && svg.contains("class=\"region-95\""));
        assert!(svg.contains("class=\"fixed-index\""));
        let amp = std::fs::read_to_string(t.path().join("a/common-amplitude.svg")).unwrap();
        assert_eq!(amp.matches("class=\"density\"").count(), 2);
        let side = sidecar(&t.path().join("a/common-contours.json"));
        let (mu_u, mu_g, su, sg, rho): (f64, f64, f64, f64, f64) =
            (-14.0, 13.0 / 3.0, 0.05, 0.3, -0.6);
        for (m, shift) in [(0, 0.0), (1, 0.01)] {
            for (key, qc) in [("region_68", 2.295_749), ("region_95", 5.991_465)] {
                let lines = side["models"][m][key].as_array().unwrap();
                assert_eq!(lines.len(), 1, "one closed region");
                let pts = lines[0].as_array().unwrap();
                assert!(pts.len() > 40);
                for p in pts {
                    let (u, g) = (p[0].as_f64().unwrap(), p[1].as_f64().unwrap());
                    let (x, y) = ((u - mu_u - shift) / su, (g - mu_g) / sg);
                    let q = (x * x - 2.0 * rho * x * y + y * y) / (1.0 - rho * rho);
                    assert!(
                        (q / qc - 1.0).abs() < 0.03,
                        "{key}: Q {q} vs {qc} at ({u}, {g})"
                    );
                }
            }
        }
        // With a sampled free spectrum the folder has a third figure.
        let rows: Vec<FreeSpectrumPoint> = (1..=4)
            .map(|j| FreeSpectrumPoint {
                model: "curn".into(),
                frequency_index: j,
                frequency_hz: j as f64 * 2.5e-9,
                median: -12.0 - j as f64,
                lo_68: -12.2 - j as f64,
                hi_68: -11.8 - j as f64,
                lo_95: -12.4 - j as f64,
                hi_95: -11.6 - j as f64,
                rhat: 1.0,
                ess_bulk: 900.0,
                ess_tail: 800.0,
                power_law_log10_rho: Some(-12.0 - j as f64),
            })
            .collect();
        std::fs::write(
            dir.join(FREE_SPECTRUM_CSV),
            ptacorr::output::csv_table(&rows, "free").unwrap(),
        )
        .unwrap();
        seal(&dir);
        let c = plot_folder(
            &dir,
            FigureFormat::Svg,
            Some(&t.sub("c")),
            &FigureOptions::default(),
        )
        .unwrap();
        assert_eq!(c.len(), 6);
        assert!(t.path().join("c/free-spectrum.svg").is_file());
        // A folder without its grid is refused by name.
        std::fs::remove_file(dir.join(GRID_FILE)).unwrap();
        let e = plot_folder(
            &dir,
            FigureFormat::Svg,
            Some(&t.sub("d")),
            &FigureOptions::default(),
        )
        .unwrap_err()
        .to_string();
        assert!(
            e.contains("posterior-grid.csv") && e.contains("common"),
            "{e}"
        );
    }

    /// The report's common section: both Bayes-factor tables with their numerical errors, the
    /// per-model posteriors, the figures, and the cautions (issue 12.5, house rule 5); the same
    /// folder gives the same bytes.
    #[test]
    fn report_has_the_bayes_factor_table_and_its_cautions() {
        let t = TempDir::new("common-report");
        let dir = t.sub("com");
        common_folder(&dir);
        let md = crate::report::build_report(std::slice::from_ref(&dir), &t.sub("r1")).unwrap();
        crate::report::build_report(std::slice::from_ref(&dir), &t.sub("r2")).unwrap();
        for f in [
            "report.md",
            "report.html",
            "tables.tex",
            "common-contours.svg",
        ] {
            assert_eq!(
                std::fs::read(t.path().join("r1").join(f)).unwrap(),
                std::fs::read(t.path().join("r2").join(f)).unwrap(),
                "{f}"
            );
        }
        let text = std::fs::read_to_string(md).unwrap();
        for want in [
            "### Common process: com",
            "Bayes factors of the common process",
            "| Hellings–Downs vs uncorrelated (CURN) | fixed, γ = 4.333 | 1.000 | 2.0×10⁻⁵ | 0.434 |",
            "| uncorrelated (CURN) vs noise only | varied | 99.000 |",
            "A Bayes factor assumes the noise model and the priors",
            "approximations",
            "A detection claim needs the collaboration's full analysis",
        ] {
            assert!(text.contains(want), "missing {want:?} in\n{text}");
        }
        let tex = std::fs::read_to_string(t.path().join("r1/tables.tex")).unwrap();
        assert!(tex.contains("$\\ln \\mathrm{BF}$"));
    }

    /// With a joint red-noise fit in summary.json, the common section shows it beside the
    /// fixed-noise answer and their difference (the numbers of the fixture, printed as given).
    #[test]
    fn report_shows_the_joint_red_noise_fit_beside_the_fixed_noise_answer() {
        use ptacorr::common::{
            CommonSummary, Interval1d, JointParameter, JointRedSettings, JointRedSummary,
        };
        let t = TempDir::new("common-joint-report");
        let dir = t.sub("com");
        common_folder(&dir);
        let path = dir.join("summary.json");
        let mut summary: CommonSummary =
            serde_json::from_str(&std::fs::read_to_string(&path).unwrap()).unwrap();
        let par = |m: f64, w: f64| JointParameter {
            median: m,
            interval_68: [m - w, m + w],
            interval_95: [m - 2.0 * w, m + 2.0 * w],
            rhat: 1.002,
            ess_bulk: 900.0,
            ess_tail: 800.0,
        };
        let fixed = |m: f64, w: f64| Interval1d {
            median: m,
            map: m,
            interval_68: [m - w, m + w],
            interval_95: [m - 2.0 * w, m + 2.0 * w],
            upper_limit_95: m + 1.6 * w,
        };
        summary.joint_red = Some(JointRedSummary {
            settings: JointRedSettings {
                sampler: ptacorr::sampler::SamplerSettings::default(),
                seed: 1,
                priors: "(built-in priors)".into(),
            },
            n_parameters: 26,
            red_pulsars: (1..=12).map(|i| format!("P{i:02}")).collect(),
            priors: "uniform".into(),
            chain_table: "joint-red-chains.csv".into(),
            log10_amplitude: par(-13.95, 0.04),
            spectral_index: par(4.2, 0.1),
            fixed_noise_log10_amplitude: Some(fixed(-14.0, 0.05)),
            fixed_noise_spectral_index: Some(fixed(4.333, 0.3)),
            log10_amplitude_difference: Some(0.05),
            spectral_index_difference: Some(-0.133),
            max_rhat: 1.02,
            min_ess_bulk: 150.0,
            min_ess_tail: 200.0,
            divergences: 0,
            converged: false,
            assumptions: ptacorr::common::JOINT_RED_ASSUMPTIONS.into(),
        });
        std::fs::write(
            &path,
            serde_json::to_string_pretty(&summary).unwrap() + "\n",
        )
        .unwrap();
        seal(&dir);
        let md = crate::report::build_report(std::slice::from_ref(&dir), &t.sub("r")).unwrap();
        let text = std::fs::read_to_string(md).unwrap();
        for want in [
            "every pulsar's red noise marginalised jointly (com; 26 parameters, 12 pulsars with red noise",
            "| red noise sampled jointly | -13.950 | -13.990 to -13.910 | 4.20 | 4.10 to 4.30 |",
            "| red noise fixed (noise model) | -14.000 | -14.050 to -13.950 | 4.33 | 4.03 to 4.63 |",
            "| difference of medians (joint minus fixed) | 0.050 |  | -0.13 |  |",
            "A detection claim needs the collaboration's full analysis",
        ] {
            assert!(text.contains(want), "missing {want:?} in\n{text}");
        }
    }

    /// A circle x^2 + y^2 = r^2 traced from z = -(x^2 + y^2) at level -r^2 on a fine grid: one
    /// closed polyline whose points lie on the circle to the grid's interpolation error (the
    /// chord error of linear interpolation, below h^2 = 1e-3 here; a circle is the textbook
    /// closed-form case), and the same bytes on every call.
    #[test]
    fn marching_squares_traces_a_circle() {
        let g: Vec<f64> = (0..=60).map(|i| -1.5 + 0.05 * i as f64).collect();
        let z: Vec<Vec<f64>> = g
            .iter()
            .map(|y| g.iter().map(|x| -(x * x + y * y)).collect())
            .collect();
        let lines = contour_lines(&g, &g, &z, -1.0);
        assert_eq!(lines.len(), 1, "one closed curve");
        let l = &lines[0];
        assert!(l.len() > 100);
        assert_eq!(l.first(), l.last(), "closed");
        for &(x, y) in l {
            assert!(((x * x + y * y).sqrt() - 1.0).abs() < 1e-3, "({x}, {y})");
        }
        assert_eq!(lines, contour_lines(&g, &g, &z, -1.0));
        // A level above everything traces nothing.
        assert!(contour_lines(&g, &g, &z, 1.0).is_empty());
    }
}
