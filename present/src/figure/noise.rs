//! The figures of a `ptacorr noise` output folder and its reader (docs/noise-estimation.md): for
//! every pulsar with posterior draws, one panel per sampled hyperparameter with the histogram
//! of its draws (all chains), the posterior median and central 68 % interval from
//! `estimates.csv`, the MAP, and the true value when the release was simulated (`truth.csv`).
//!
//! The folder is read with the engine's own types (`noise_fit::Estimate`,
//! `noise_fit::DiagnosticsRow`, `noise_fit::NoiseProvenance`, `chains::ChainTable`,
//! `noise_fit::truth::TruthValue`), so the reader follows the writer.

use std::collections::BTreeMap;
use std::path::{Path, PathBuf};

use ptacorr::chains::ChainTable;
use ptacorr::noise_fit::truth::{TruthValue, TRUTH_FILE};
use ptacorr::noise_fit::{
    DiagnosticsRow, Estimate, NoiseProvenance, CHAINS_DIR, DIAGNOSTICS_FILE, ESTIMATES_FILE,
    PROVENANCE_FILE,
};
use serde::Serialize;

use super::canvas::{
    bottom_gutter, draw_axes, draw_caption, draw_legend, left_gutter, legend_height, linear_ticks,
    wrap, LegendItem, LineStyle, Rect, Sample, Scale, Stroke, Svg, Ticks, BLACK, BLUE,
    CAPTION_LINE, FS_SMALL, SKY, VERMILLION,
};
use super::format::{self, Style};
use super::input::Provenance;
use super::null::{histogram, Histogram};
use super::{ColumnWidth, Drawn, FigureError, FigureOptions};

/// File stem of a pulsar's figure: `noise-posterior-LABEL`.
pub(crate) const STEM: &str = "noise-posterior";

/// Everything a noise folder holds that the figures and the report show.
#[derive(Clone, Debug)]
pub struct NoiseData {
    pub dir: PathBuf,
    pub provenance: Provenance,
    pub release_title: String,
    /// `full`, `fixed-white` or `map-only`.
    pub mode: String,
    pub estimates: Vec<Estimate>,
    pub diagnostics: Vec<DiagnosticsRow>,
    /// Chain tables by pulsar label (pulsars with posterior draws only).
    pub chains: BTreeMap<String, ChainTable>,
    /// True values of a simulated release (empty otherwise).
    pub truth: Vec<TruthValue>,
    pub fit_warnings: Vec<String>,
}

/// A CSV table read with the engine row type it is written with (the engine's reader).
fn read_rows<T: serde::de::DeserializeOwned>(path: &Path) -> Result<Vec<T>, FigureError> {
    Ok(ptacorr::output::read_csv::<T>(path)?
        .into_iter()
        .map(|(_, r)| r)
        .collect())
}

impl NoiseData {
    /// Reads a noise folder (its manifest already checked by `detect_kinds`).
    pub fn load(dir: &Path) -> Result<Self, FigureError> {
        let prov: NoiseProvenance = ptacorr::output::read_json(&dir.join(PROVENANCE_FILE))?;
        let mode = prov
            .settings
            .get("mode")
            .and_then(|m| m.as_str())
            .unwrap_or("unknown")
            .to_string();
        let estimates: Vec<Estimate> = read_rows(&dir.join(ESTIMATES_FILE))?;
        let diagnostics: Vec<DiagnosticsRow> = read_rows(&dir.join(DIAGNOSTICS_FILE))?;
        let mut chains = BTreeMap::new();
        for d in &diagnostics {
            if d.chains.is_some() {
                let p = dir.join(CHAINS_DIR).join(format!("{}.csv", d.pulsar));
                chains.insert(d.pulsar.clone(), ChainTable::read(&p)?);
            }
        }
        let truth_path = dir.join(TRUTH_FILE);
        let truth = if truth_path.is_file() {
            read_rows(&truth_path)?
        } else {
            Vec::new()
        };
        Ok(NoiseData {
            dir: dir.to_path_buf(),
            provenance: Provenance {
                program: prov.program.clone(),
                version: prov.version.clone(),
                release_title: prov.release_title.clone(),
                input_hash: prov.input_hash.clone(),
                settings: prov.settings.clone(),
                warnings: prov.warnings.clone(),
            },
            release_title: prov.release_title.clone(),
            mode,
            estimates,
            diagnostics,
            chains,
            truth,
            fit_warnings: prov.fit_warnings,
        })
    }

    /// The true value of a pulsar's parameter, if the release was simulated.
    pub fn truth_of(&self, pulsar: &str, parameter: &str) -> Option<f64> {
        self.truth
            .iter()
            .find(|t| t.pulsar == pulsar && t.parameter == parameter)
            .map(|t| t.value)
    }

    fn estimate(&self, pulsar: &str, parameter: &str) -> Option<&Estimate> {
        self.estimates
            .iter()
            .find(|e| e.pulsar == pulsar && e.parameter == parameter)
    }
}

#[derive(Serialize)]
struct PanelSidecar {
    parameter: String,
    draws: usize,
    histogram: Histogram,
    median: Option<f64>,
    interval_68: Option<[f64; 2]>,
    map: Option<f64>,
    truth: Option<f64>,
    x_axis: [f64; 2],
    plot_box_pt: [f64; 4],
}

#[derive(Serialize)]
struct Sidecar {
    figure: &'static str,
    source_folder: String,
    pulsar: String,
    mode: String,
    chains: usize,
    panels: Vec<PanelSidecar>,
    caption: String,
    size_in: [f64; 2],
    caption_box_pt: [f64; 4],
}

/// One figure per pulsar with posterior draws, in the order of `diagnostics.csv`.
pub(crate) fn draw_all(
    data: &NoiseData,
    opts: &FigureOptions,
    stem_suffix: &str,
    source: &str,
) -> Result<Vec<Drawn>, FigureError> {
    let mut out = Vec::new();
    for d in &data.diagnostics {
        if let Some(table) = data.chains.get(&d.pulsar) {
            let stem = format!("{STEM}-{}{stem_suffix}", d.pulsar);
            out.push(draw(data, d, table, opts, &stem, source)?);
        }
    }
    Ok(out)
}

fn draw(
    data: &NoiseData,
    diag: &DiagnosticsRow,
    table: &ChainTable,
    opts: &FigureOptions,
    stem: &str,
    source: &str,
) -> Result<Drawn, FigureError> {
    let label = &diag.pulsar;
    let k = table.parameters.len();
    if k == 0 || table.draws.is_empty() {
        return Err(FigureError::Render {
            figure: stem.to_string(),
            reason: format!("pulsar {label}: the chain table has no draws"),
        });
    }
    let n_chains = table
        .draws
        .iter()
        .map(|d| d.chain)
        .collect::<std::collections::BTreeSet<_>>()
        .len();
    let has_truth = (0..k).any(|j| {
        data.truth_of(label, &table.parameters[j].to_string())
            .is_some()
    });
    let median_stroke = Stroke::new(BLACK, 1.0, LineStyle::Solid);
    let band_stroke = Stroke::new(BLACK, 0.8, LineStyle::Dashed);
    let map_stroke = Stroke::new(BLUE, 1.0, LineStyle::Dotted);
    let truth_stroke = Stroke::new(VERMILLION, 1.2, LineStyle::Solid);
    let mut items = vec![
        LegendItem {
            label: format!("{} draws", table.draws.len()),
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
            label: "MAP".to_string(),
            sample: Sample::Line(map_stroke),
        },
    ];
    if has_truth {
        items.push(LegendItem {
            label: "true value".to_string(),
            sample: Sample::Line(truth_stroke),
        });
    }
    let mut caption = format!(
        "Marginal posteriors of the noise hyperparameters of pulsar {label} ({} draws from {n_chains} chain{}, {} mode): histogram of the draws, posterior median and central 68% interval, and the MAP{}. Worst R-hat {}, smallest bulk ESS {}, {} divergent draws.",
        table.draws.len(),
        if n_chains == 1 { "" } else { "s" },
        data.mode,
        if has_truth {
            "; the true value of the simulation in vermillion"
        } else {
            ""
        },
        diag.max_rhat.map_or("–".to_string(), |r| format::fixed(r, 3, Style::Figure)),
        diag.min_ess_bulk.map_or("–".to_string(), |e| format::fixed(e, 0, Style::Figure)),
        diag.divergences.unwrap_or(0),
    );
    if diag.posterior_converged == Some(false) {
        caption.push_str(" The chains have NOT converged (R-hat or ESS outside the thresholds): read these posteriors with care.");
    }
    let cols = match opts.width {
        ColumnWidth::Single => 2,
        ColumnWidth::Double => 3,
    }
    .min(k);
    let rows = k.div_ceil(cols);
    let w = opts.width.inches() * 72.0;
    let pad = 4.0;
    let leg_h = legend_height(&items, w - 2.0 * pad)?;
    // Every panel has the same y gutter: density axes without numbers.
    let y_ticks_of = |hi: f64| Ticks {
        lo: 0.0,
        hi,
        major: Vec::new(),
        minor: Vec::new(),
        exponent: 0,
    };
    let gutter = left_gutter(&y_ticks_of(1.0))?;
    let cell_w = (w - 2.0 * pad) / cols as f64;
    let plot_w = cell_w - gutter - 6.0;
    let plot_h = plot_w * 0.62;
    let cell_h = plot_h + bottom_gutter() + 6.0;
    let top = pad + leg_h + 5.0;
    let lines = wrap(&caption, w - 2.0 * pad, FS_SMALL)?;
    let cap_y = top + rows as f64 * cell_h + 2.0;
    let h = cap_y + lines.len() as f64 * CAPTION_LINE + pad;
    let title = format!("Noise posteriors of pulsar {label}");
    let mut svg = Svg::new(w, h, stem);
    let mut panels = Vec::new();
    for j in 0..k {
        let name = table.parameters[j].to_string();
        let values: Vec<f64> = table.draws.iter().map(|d| d.values[j]).collect();
        let hist = histogram(&values);
        let est = data.estimate(label, &name);
        let median = est.and_then(|e| e.median);
        let interval = est.and_then(|e| Some([e.q16?, e.q84?]));
        let map = est.map(|e| e.map);
        let truth = data.truth_of(label, &name);
        let nb = hist.counts.len();
        let (mut xlo, mut xhi) = (hist.edges[0], hist.edges[nb]);
        for v in [map, truth].into_iter().flatten() {
            if v.is_finite() {
                xlo = xlo.min(v);
                xhi = xhi.max(v);
            }
        }
        let span = (xhi - xlo).max(1e-12 * xhi.abs().max(1.0));
        let xt = linear_ticks(xlo - 0.03 * span, xhi + 0.03 * span, 4, true);
        let ymax = hist.density.iter().copied().fold(0.0, f64::max);
        let yt = y_ticks_of(if ymax > 0.0 { ymax * 1.1 } else { 1.0 });
        let (r, c) = (j / cols, j % cols);
        let plot = Rect {
            x: pad + c as f64 * cell_w + gutter,
            y: top + r as f64 * cell_h,
            w: plot_w,
            h: plot_h,
        };
        let xs = Scale::x(&xt, &plot, false);
        let ys = Scale::y(&yt, &plot, false);
        let x_label = if xt.exponent != 0 {
            format!("{name} [10{}]", super::canvas::superscript(xt.exponent))
        } else {
            name.clone()
        };
        draw_axes(&mut svg, plot, &xs, &ys, &xt, &yt, &x_label, "density")?;
        let clip = svg.clip(plot);
        svg.histogram(&clip, (&xs, &ys), &hist.edges, &hist.density[..nb], &|_| {
            false
        });
        let mut vline = |v: Option<f64>, s: &Stroke, class: &str| {
            if let Some(v) = v.filter(|v| v.is_finite()) {
                let px = xs.map(v);
                svg.line(px, plot.y, px, plot.bottom(), s, class);
            }
        };
        vline(median, &median_stroke, "median-line");
        if let Some([a, b]) = interval {
            vline(Some(a), &band_stroke, "interval-line");
            vline(Some(b), &band_stroke, "interval-line");
        }
        vline(map, &map_stroke, "map-line");
        vline(truth, &truth_stroke, "truth-line");
        panels.push(PanelSidecar {
            parameter: name,
            draws: values.len(),
            histogram: hist,
            median,
            interval_68: interval,
            map,
            truth,
            x_axis: [xt.lo, xt.hi],
            plot_box_pt: plot.as_array(),
        });
    }
    draw_legend(&mut svg, &items, pad, pad, w - 2.0 * pad)?;
    let cap_box = draw_caption(&mut svg, &lines, pad, cap_y)?;
    let svg_text = svg.finish(&title);
    let sidecar = Sidecar {
        figure: STEM,
        source_folder: source.to_string(),
        pulsar: label.clone(),
        mode: data.mode.clone(),
        chains: n_chains,
        panels,
        caption: caption.clone(),
        size_in: [w / 72.0, h / 72.0],
        caption_box_pt: cap_box.as_array(),
    };
    Drawn::new(stem, title, caption, svg_text, &sidecar)
}

#[cfg(test)]
pub(crate) mod tests {
    use super::super::fixtures::TempDir;
    use super::super::{detect_kinds, plot_folder, FigureFormat, FolderKind};
    use super::*;
    use ptacorr::chains::{ChainDraw, Parameter};

    fn csv_of<T: Serialize>(rows: &[T]) -> Vec<u8> {
        let mut w = csv::Writer::from_writer(Vec::new());
        for r in rows {
            w.serialize(r).unwrap();
        }
        w.into_inner().unwrap()
    }

    fn estimate(pulsar: &str, parameter: &str, map: f64, draws: Option<&[f64]>) -> Estimate {
        let q = |p: f64| {
            draws.map(|d| {
                let mut v = d.to_vec();
                v.sort_by(f64::total_cmp);
                v[((v.len() - 1) as f64 * p).round() as usize]
            })
        };
        Estimate {
            pulsar: pulsar.into(),
            parameter: parameter.into(),
            map,
            prior_low: -20.0,
            prior_high: 10.0,
            map_at_edge: false,
            sampled: draws.is_some(),
            median: q(0.5),
            mean: q(0.5),
            sd: draws.map(|_| 0.1),
            q05: q(0.05),
            q16: q(0.16),
            q84: q(0.84),
            q95: q(0.95),
            rhat: draws.map(|_| 1.002),
            ess_bulk: draws.map(|_| 812.0),
            ess_tail: draws.map(|_| 640.0),
        }
    }

    fn diagnostics(pulsar: &str, sampled: bool) -> DiagnosticsRow {
        DiagnosticsRow {
            pulsar: pulsar.into(),
            n_toa: 120,
            n_parameters: 3,
            map_log_posterior: 1234.5,
            map_converged: true,
            map_starts: 4,
            map_agreeing_starts: 4,
            map_iterations: 20,
            map_stop_reason: "Solver converged".into(),
            mode: "full".into(),
            sampled_parameters: if sampled { 3 } else { 0 },
            chains: sampled.then_some(2),
            draws_per_chain: sampled.then_some(150),
            divergences: sampled.then_some(1),
            warmup_divergences: sampled.then_some(0),
            max_depth_hits: sampled.then_some(0),
            gradient_evaluations: sampled.then_some(9000),
            max_rhat: sampled.then_some(1.002),
            min_ess_bulk: sampled.then_some(640.0),
            min_ess_tail: sampled.then_some(512.0),
            posterior_converged: sampled.then_some(true),
            posterior_diverging: sampled.then_some(false),
        }
    }

    /// A sealed noise folder as `ptacorr noise` writes it (through the engine's own types and
    /// an output set): pulsar P01 sampled (two chains of 150 draws of three parameters, a fixed
    /// pseudo-random sequence) with true values, P02 with its MAP only.
    pub(crate) fn write_noise(dir: &Path) {
        let names = ["efac.KRK-L", "red.log10_amplitude", "red.spectral_index"];
        let centre = [1.1, -13.5, 3.2];
        let mut table =
            ChainTable::new(names.iter().map(|n| Parameter::parse(n).unwrap()).collect()).unwrap();
        let mut columns = vec![Vec::new(); 3];
        let mut state = 0x2545_F491_4F6C_DD1Du64;
        let mut next = || {
            // xorshift64 (Marsaglia 2003) mapped to [-0.5, 0.5): a fixed sequence.
            state ^= state << 13;
            state ^= state >> 7;
            state ^= state << 17;
            (state >> 11) as f64 / (1u64 << 53) as f64 - 0.5
        };
        for chain in 0..2u32 {
            for draw in 0..150u64 {
                let values: Vec<f64> = (0..3)
                    .map(|j| centre[j] + 0.4 * (next() + next() + next()))
                    .collect();
                for j in 0..3 {
                    columns[j].push(values[j]);
                }
                table
                    .push(ChainDraw {
                        chain,
                        draw,
                        log_posterior: Some(-10.0),
                        diverging: chain == 1 && draw == 7,
                        values,
                    })
                    .unwrap();
            }
        }
        let mut estimates: Vec<Estimate> = (0..3)
            .map(|j| estimate("P01", names[j], centre[j] + 0.05, Some(&columns[j])))
            .collect();
        estimates.extend((0..3).map(|j| estimate("P02", names[j], centre[j], None)));
        let truth = vec![
            TruthValue {
                pulsar: "P01".into(),
                parameter: names[1].into(),
                value: -13.3,
            },
            TruthValue {
                pulsar: "P01".into(),
                parameter: names[2].into(),
                value: 3.0,
            },
        ];
        let prov = NoiseProvenance {
            program: "ptacorr".into(),
            version: "0.1.0".into(),
            release_title: "Fixture array (fictional)".into(),
            input_hash: "sha256:00ff".into(),
            priors_hash: "sha256:11ee".into(),
            priors_source: "built-in defaults".into(),
            settings: serde_json::json!({ "mode": "full", "seed": 1 }),
            shard_index: 1,
            shard_count: 1,
            pulsars: vec!["P01".into(), "P02".into()],
            n_pulsars_in_release: 2,
            warnings: Vec::new(),
            fit_warnings: vec!["pulsar P02: fictional warning".into()],
        };
        let mut set = ptacorr::output::OutputSet::begin(dir, "noise").unwrap();
        set.write(ESTIMATES_FILE, &csv_of(&estimates)).unwrap();
        set.write(
            DIAGNOSTICS_FILE,
            &csv_of(&[diagnostics("P01", true), diagnostics("P02", false)]),
        )
        .unwrap();
        set.write(TRUTH_FILE, &csv_of(&truth)).unwrap();
        set.write("noise.toml", b"# fixture\n").unwrap();
        set.write(
            &format!("{CHAINS_DIR}/P01.csv"),
            table.to_csv().unwrap().as_bytes(),
        )
        .unwrap();
        set.write_json(PROVENANCE_FILE, &prov).unwrap();
        set.commit().unwrap();
    }

    fn class_count(svg: &str, class: &str) -> usize {
        svg.matches(&format!("class=\"{class}\"")).count()
            + svg.matches(&format!("class=\"{class} ")).count()
    }

    #[test]
    fn noise_folder_gives_one_figure_per_sampled_pulsar_with_truth_and_estimates() {
        let t = TempDir::new("noise-fig");
        let dir = t.sub("noise");
        write_noise(&dir);
        assert_eq!(detect_kinds(&dir).unwrap(), vec![FolderKind::Noise]);
        let out = t.sub("out");
        let written = plot_folder(
            &dir,
            FigureFormat::Svg,
            Some(&out),
            &FigureOptions::default(),
        )
        .unwrap();
        // P02 has no draws: one figure and its sidecar.
        let names: Vec<String> = written
            .iter()
            .map(|p| p.file_name().unwrap().to_string_lossy().into_owned())
            .collect();
        assert_eq!(
            names,
            vec!["noise-posterior-P01.svg", "noise-posterior-P01.json"]
        );
        let svg = std::fs::read_to_string(&written[0]).unwrap();
        assert_eq!(class_count(&svg, "median-line"), 3);
        assert_eq!(class_count(&svg, "map-line"), 3);
        assert_eq!(class_count(&svg, "interval-line"), 6);
        assert_eq!(class_count(&svg, "truth-line"), 2, "two true values");
        let side: serde_json::Value =
            serde_json::from_str(&std::fs::read_to_string(&written[1]).unwrap()).unwrap();
        let panels = side["panels"].as_array().unwrap();
        assert_eq!(panels.len(), 3);
        assert_eq!(panels[1]["truth"], -13.3);
        assert!(panels[0]["truth"].is_null());
        assert_eq!(side["chains"], 2);
        for p in panels {
            // Every draw is in the histogram, and the axis holds the histogram and the MAP.
            let counts: u64 = p["histogram"]["counts"]
                .as_array()
                .unwrap()
                .iter()
                .map(|c| c.as_u64().unwrap())
                .sum();
            assert_eq!(counts, 300);
            let [lo, hi] = [
                p["x_axis"][0].as_f64().unwrap(),
                p["x_axis"][1].as_f64().unwrap(),
            ];
            let map = p["map"].as_f64().unwrap();
            assert!(lo <= map && map <= hi);
        }
    }

    #[test]
    fn noise_figures_are_byte_identical_in_every_format() {
        let t = TempDir::new("noise-twice");
        let dir = t.sub("noise");
        write_noise(&dir);
        for format in [FigureFormat::Svg, FigureFormat::Png, FigureFormat::Pdf] {
            let ext = format.extension();
            let opts = FigureOptions::default();
            let a = plot_folder(&dir, format, Some(&t.sub(&format!("{ext}-a"))), &opts).unwrap();
            let b = plot_folder(&dir, format, Some(&t.sub(&format!("{ext}-b"))), &opts).unwrap();
            assert_eq!(a.len(), 2);
            for (x, y) in a.iter().zip(&b) {
                assert!(std::fs::read(x).unwrap() == std::fs::read(y).unwrap());
            }
        }
    }

    #[test]
    fn a_damaged_noise_folder_is_a_typed_error() {
        let t = TempDir::new("noise-bad");
        let dir = t.sub("noise");
        write_noise(&dir);
        // A chain table that no longer matches the manifest is refused before it is read.
        let chain = dir.join(CHAINS_DIR).join("P01.csv");
        let mut bytes = std::fs::read(&chain).unwrap();
        bytes.extend_from_slice(b"0,150,-1,false,1,2,3\n");
        std::fs::write(&chain, bytes).unwrap();
        let e = plot_folder(
            &dir,
            FigureFormat::Svg,
            Some(&t.sub("o")),
            &FigureOptions::default(),
        )
        .unwrap_err();
        assert!(matches!(e, FigureError::Engine(_)), "{e}");
    }

    #[test]
    fn the_report_gains_a_noise_section_with_both_tables_and_the_figure() {
        let t = TempDir::new("noise-report");
        let dir = t.sub("noise");
        write_noise(&dir);
        let out = t.sub("report");
        let md = crate::report::build_report(std::slice::from_ref(&dir), &out).unwrap();
        let text = std::fs::read_to_string(md).unwrap();
        assert!(text.contains("### Noise estimation: noise"), "{text}");
        assert!(text.contains("| `P01` | 120 | yes | 1.002 | 640 | 512 | 1 | yes |"));
        // P02 was not sampled: its convergence cells are empty, its MAP is there.
        assert!(text.contains("| `P02` | 120 | yes | – | – | – | – | – |"));
        assert!(text.contains("| `P01` | `red.log10_amplitude` |"));
        assert!(text.contains("| `P02` | `red.spectral_index` | – | – | 3.200 | – |"));
        assert!(text.contains("pulsar P02: fictional warning"));
        assert!(out.join("noise-posterior-P01.svg").is_file());
        // Regenerated byte for byte.
        let again = t.sub("report-2");
        crate::report::build_report(&[dir], &again).unwrap();
        for f in [
            "report.md",
            "report.html",
            "tables.tex",
            "noise-posterior-P01.png",
        ] {
            assert!(std::fs::read(out.join(f)).unwrap() == std::fs::read(again.join(f)).unwrap());
        }
    }
}
