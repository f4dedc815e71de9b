//! A memo-ready report from one or more ptacorr output folders.
//!
//! [`build_report`] writes into one folder: `report.md`, a self-contained `report.html`
//! (inline SVG figures and inline CSS, no links to anything outside the file), `tables.tex`
//! (LaTeX `tabular` snippets of the tables), and each figure as SVG and PNG with its JSON
//! sidecar. The report states the release title, the program and settings that made each
//! folder, the content hash of the inputs, the results, the figures and, in plain words, what
//! the numbers assume.
//!
//! The output depends only on the input files: no time stamps, no absolute paths (folders
//! are named by their last path component), fixed number formatting and a fixed order of
//! sections (correlate, then null, then inject folders, each kind in the order given). So the
//! same inputs give byte-identical files. Every file is written atomically.

use std::fmt::Write as _;
use std::path::{Path, PathBuf};

use serde_json::Value;

use crate::figure::format::{self, Style};
use crate::figure::{
    self, detect_kinds, folder_label, write_atomic, CorrelateData, Drawn, FigureError,
    FigureFormat, FigureOptions, FolderKind, InjectData, NullData, Provenance,
};

/// Version of the program writing the report.
const GENERATOR_VERSION: &str = env!("CARGO_PKG_VERSION");

/// Builds the report with default figure options plus every pair shown behind the bins.
/// Returns the path of `report.md`.
pub fn build_report(dirs: &[PathBuf], out_dir: &Path) -> Result<PathBuf, FigureError> {
    let opts = FigureOptions {
        show_pairs: true,
        ..FigureOptions::default()
    };
    build_report_with(dirs, out_dir, &opts)
}

/// Builds the report with the given figure options. Returns the path of `report.md`.
pub fn build_report_with(
    dirs: &[PathBuf],
    out_dir: &Path,
    opts: &FigureOptions,
) -> Result<PathBuf, FigureError> {
    if dirs.is_empty() {
        return Err(FigureError::NoInputs);
    }
    std::fs::create_dir_all(out_dir).map_err(|source| FigureError::Write {
        path: out_dir.to_path_buf(),
        source,
    })?;
    let inputs = load_inputs(dirs)?;
    let mut figures = Vec::new();
    let mut per_kind = std::collections::BTreeMap::<FolderKind, usize>::new();
    for input in &inputs {
        let slot = per_kind.entry(input.kind).or_insert(0);
        *slot += 1;
        let suffix = if *slot > 1 {
            format!("-{slot}")
        } else {
            String::new()
        };
        let drawn = figure::draw_kind(input.kind, &input.dir, opts, &suffix)?;
        figures.push(drawn);
    }
    for drawn in figures.iter().flatten() {
        let svg = out_dir.join(format!("{}.svg", drawn.stem));
        write_atomic(&svg, drawn.svg.as_bytes())?;
        let png = figure::encode(drawn, FigureFormat::Png, opts)?;
        write_atomic(&out_dir.join(format!("{}.png", drawn.stem)), &png)?;
        write_atomic(
            &out_dir.join(format!("{}.json", drawn.stem)),
            drawn.sidecar.as_bytes(),
        )?;
    }
    let doc = compose(&inputs, &figures);
    write_atomic(&out_dir.join("tables.tex"), render_tex(&doc).as_bytes())?;
    write_atomic(&out_dir.join("report.html"), render_html(&doc).as_bytes())?;
    let md = out_dir.join("report.md");
    write_atomic(&md, render_md(&doc).as_bytes())?;
    Ok(md)
}

enum Loaded {
    Correlate(Box<CorrelateData>),
    Null(Box<NullData>),
    Inject(Box<InjectData>),
    Noise(Box<figure::noise::NoiseData>),
    Common(Box<figure::common::CommonData>),
}

struct Input {
    kind: FolderKind,
    label: String,
    dir: PathBuf,
    data: Loaded,
}

impl Input {
    fn provenance(&self) -> &Provenance {
        match &self.data {
            Loaded::Correlate(c) => &c.summary.provenance,
            Loaded::Null(n) => &n.provenance,
            Loaded::Inject(i) => &i.provenance,
            Loaded::Noise(n) => &n.provenance,
            Loaded::Common(c) => &c.summary.provenance,
        }
    }
}

fn load_inputs(dirs: &[PathBuf]) -> Result<Vec<Input>, FigureError> {
    let mut inputs = Vec::new();
    for (order, dir) in dirs.iter().enumerate() {
        for kind in detect_kinds(dir)? {
            let data = match kind {
                FolderKind::Correlate => Loaded::Correlate(Box::new(CorrelateData::load(dir)?)),
                FolderKind::Null => Loaded::Null(Box::new(NullData::load(dir)?)),
                FolderKind::Inject => Loaded::Inject(Box::new(InjectData::load(dir)?)),
                FolderKind::Noise => Loaded::Noise(Box::new(figure::noise::NoiseData::load(dir)?)),
                FolderKind::Common => {
                    Loaded::Common(Box::new(figure::common::CommonData::load(dir)?))
                }
            };
            inputs.push((
                kind,
                order,
                Input {
                    kind,
                    label: folder_label(dir),
                    dir: dir.clone(),
                    data,
                },
            ));
        }
    }
    inputs.sort_by_key(|(kind, order, _)| (*kind, *order));
    Ok(inputs.into_iter().map(|(_, _, i)| i).collect())
}

// ---------------------------------------------------------------------------------------
// Document model, rendered three ways.

enum Span {
    Text(String),
    Code(String),
}

enum Cell {
    Text(String),
    Code(String),
    /// A number: its Markdown/HTML form and its LaTeX form.
    Num(String, String),
}

struct Table {
    caption: String,
    /// Column headings: plain form and LaTeX form.
    header: Vec<(String, String)>,
    /// Per column: true when right-aligned (numbers).
    right: Vec<bool>,
    rows: Vec<Vec<Cell>>,
}

enum Block {
    Heading(u8, String),
    Para(Vec<Span>),
    List(Vec<Vec<Span>>),
    Table(Table),
    Figure {
        stem: String,
        title: String,
        caption: String,
        svg: String,
    },
}

struct Doc {
    title: String,
    blocks: Vec<Block>,
}

fn t(s: impl Into<String>) -> Span {
    Span::Text(s.into())
}

fn c(s: impl Into<String>) -> Span {
    Span::Code(s.into())
}

fn num_sci(v: f64, sig: usize) -> Cell {
    Cell::Num(
        format::sci(v, sig, Style::Text),
        latex_num(&format::sci(v, sig, Style::Latex)),
    )
}

fn num_general(v: f64, sig: usize) -> Cell {
    Cell::Num(
        format::general(v, sig, Style::Text),
        latex_num(&format::general(v, sig, Style::Latex)),
    )
}

fn num_prob(v: f64) -> Cell {
    Cell::Num(
        format::prob(v, Style::Text),
        latex_num(&format::prob(v, Style::Latex)),
    )
}

fn num_fixed(v: f64, dec: usize) -> Cell {
    Cell::Num(
        format::fixed(v, dec, Style::Text),
        latex_num(&format::fixed(v, dec, Style::Latex)),
    )
}

fn num_int(v: u64) -> Cell {
    Cell::Num(v.to_string(), format!("${v}$"))
}

fn latex_num(s: &str) -> String {
    if s == "n/a" {
        "n/a".to_string()
    } else {
        format!("${s}$")
    }
}

fn opt_cell(v: Option<f64>, f: impl Fn(f64) -> Cell) -> Cell {
    v.map_or_else(|| Cell::Text("none".to_string()), f)
}

fn method_words(method: &str) -> String {
    match method {
        "scramble" => "sky-scrambled".to_string(),
        "phase" => "phase-shifted".to_string(),
        "simulate" => "simulated".to_string(),
        other => format!("`{other}`"),
    }
}

fn pattern_words(p: &str) -> &str {
    match p {
        "hd" => "Hellings–Downs",
        other => other,
    }
}

/// Flattens a settings object to sorted `key = value` rows (nested keys joined by dots).
fn flatten_settings(v: &Value) -> Vec<(String, String)> {
    fn walk(prefix: &str, v: &Value, out: &mut Vec<(String, String)>) {
        match v {
            Value::Object(m) => {
                for (k, x) in m {
                    let key = if prefix.is_empty() {
                        k.clone()
                    } else {
                        format!("{prefix}.{k}")
                    };
                    walk(&key, x, out);
                }
            }
            Value::String(s) => out.push((prefix.to_string(), s.clone())),
            other => out.push((prefix.to_string(), other.to_string())),
        }
    }
    let mut out = Vec::new();
    walk("", v, &mut out);
    out.sort();
    out
}

fn compose(inputs: &[Input], figures: &[Vec<Drawn>]) -> Doc {
    let title = inputs
        .iter()
        .find_map(|i| match &i.data {
            Loaded::Correlate(c) => Some(c.summary.title.clone()),
            _ => None,
        })
        .unwrap_or_else(|| "ptacorr report".to_string());
    let mut b = Vec::new();
    let n_folders = {
        let mut dirs: Vec<&PathBuf> = inputs.iter().map(|i| &i.dir).collect();
        dirs.dedup();
        dirs.len()
    };
    b.push(Block::Para(vec![t(format!(
        "Summary of {} ptacorr output folder{}, prepared by ptacorr-engine {GENERATOR_VERSION}. \
         The report is regenerated byte for byte from the same folders.",
        n_folders,
        if n_folders == 1 { "" } else { "s" }
    ))]));

    // Inputs and provenance.
    b.push(Block::Heading(2, "Inputs".to_string()));
    let mut rows = Vec::new();
    for i in inputs {
        let p = i.provenance();
        rows.push(vec![
            Cell::Code(i.label.clone()),
            Cell::Text(i.kind.name().to_string()),
            Cell::Text(p.program.clone()),
            Cell::Text(p.version.clone()),
            Cell::Code(p.input_hash.clone()),
        ]);
    }
    b.push(Block::Table(Table {
        caption: "Input folders, the program that wrote them and the content hash of their inputs."
            .to_string(),
        header: vec![
            ("folder".into(), "folder".into()),
            ("kind".into(), "kind".into()),
            ("program".into(), "program".into()),
            ("version".into(), "version".into()),
            ("input hash".into(), "input hash".into()),
        ],
        right: vec![false; 5],
        rows,
    }));

    // Settings, grouping folders whose settings are identical.
    b.push(Block::Heading(2, "Settings".to_string()));
    let mut groups: Vec<(Vec<String>, &Value)> = Vec::new();
    for i in inputs {
        let s = &i.provenance().settings;
        let name = if i.label == i.kind.name() {
            i.label.clone()
        } else {
            format!("{} ({})", i.label, i.kind.name())
        };
        match groups.iter_mut().find(|(_, v)| *v == s) {
            Some((labels, _)) => labels.push(name),
            None => groups.push((vec![name], s)),
        }
    }
    for (labels, settings) in &groups {
        let flat = flatten_settings(settings);
        if flat.is_empty() {
            b.push(Block::Para(vec![t(format!(
                "{}: no settings recorded.",
                labels.join(", ")
            ))]));
            continue;
        }
        b.push(Block::Table(Table {
            caption: format!("Settings of {}.", labels.join(", ")),
            header: vec![
                ("setting".into(), "setting".into()),
                ("value".into(), "value".into()),
            ],
            right: vec![false, false],
            rows: flat
                .into_iter()
                .map(|(k, v)| vec![Cell::Code(k), Cell::Text(v)])
                .collect(),
        }));
    }

    // Results.
    b.push(Block::Heading(2, "Results".to_string()));
    for (i, drawn) in inputs.iter().zip(figures) {
        match &i.data {
            Loaded::Correlate(d) => correlate_section(&mut b, &i.label, d),
            Loaded::Null(d) => null_section(&mut b, &i.label, d),
            Loaded::Inject(d) => inject_section(&mut b, &i.label, d),
            Loaded::Noise(d) => noise_section(&mut b, &i.label, d),
            Loaded::Common(d) => common_section(&mut b, &i.label, d),
        }
        for f in drawn {
            b.push(Block::Figure {
                stem: f.stem.clone(),
                title: f.title.clone(),
                caption: f.caption.clone(),
                svg: f.svg.clone(),
            });
        }
    }

    b.push(Block::Heading(2, "Caveats".to_string()));
    b.push(Block::List(caveats(inputs)));
    Doc { title, blocks: b }
}

fn correlate_section(b: &mut Vec<Block>, label: &str, d: &CorrelateData) {
    let s = &d.summary;
    b.push(Block::Heading(3, format!("Correlation patterns: {label}")));
    let freq = if s.frequencies_hz.is_empty() {
        String::new()
    } else {
        let lo = s
            .frequencies_hz
            .iter()
            .copied()
            .fold(f64::INFINITY, f64::min);
        let hi = s
            .frequencies_hz
            .iter()
            .copied()
            .fold(f64::NEG_INFINITY, f64::max);
        format!(
            " from {} to {}",
            format::nanohertz(lo, Style::Text),
            format::nanohertz(hi, Style::Text)
        )
    };
    b.push(Block::Para(vec![t(format!(
        "{} pulsars, {} pairs, {} frequencies{freq}, spectral index {}, span {} years; {} angular bins.",
        s.n_pulsars,
        s.n_pairs,
        s.n_frequencies,
        format::fixed(s.spectral_index, 3, Style::Text),
        format::general(s.span_years, 3, Style::Text),
        d.bins.len()
    ))]));
    let rows = crate::figure::patterns_in_order(s)
        .into_iter()
        .map(|(name, p)| {
            vec![
                Cell::Text(name.to_string()),
                num_sci(p.amplitude2, 3),
                num_sci(p.amplitude2_sigma, 3),
                num_fixed(p.snr, 2),
            ]
        })
        .collect();
    b.push(Block::Table(Table {
        caption: format!("Single-pattern fits ({label}): estimated A², its sigma and the S/N."),
        header: vec![
            ("pattern".into(), "pattern".into()),
            ("A² estimate".into(), "$\\hat{A}^2$".into()),
            ("sigma".into(), "$\\sigma(\\hat{A}^2)$".into()),
            ("S/N".into(), "S/N".into()),
        ],
        right: vec![false, true, true, true],
        rows,
    }));
    if let Some(m) = &s.multiple_component {
        let rows = m
            .patterns
            .iter()
            .enumerate()
            .map(|(k, name)| {
                let var = m.covariance[k][k];
                vec![
                    Cell::Text(name.name().to_string()),
                    num_sci(m.amplitude2[k], 3),
                    if var >= 0.0 {
                        num_sci(var.sqrt(), 3)
                    } else {
                        Cell::Text("negative variance".to_string())
                    },
                ]
            })
            .collect();
        b.push(Block::Table(Table {
            caption: format!(
                "Joint fit of {} ({label}); sigma is the square root of the covariance diagonal.",
                m.patterns
                    .iter()
                    .map(|p| p.name())
                    .collect::<Vec<_>>()
                    .join(", ")
            ),
            header: vec![
                ("pattern".into(), "pattern".into()),
                ("A² estimate".into(), "$\\hat{A}^2$".into()),
                ("sigma".into(), "$\\sigma(\\hat{A}^2)$".into()),
            ],
            right: vec![false, true, true],
            rows,
        }));
    }
    if let Some(f) = crate::figure::bin_fit(s) {
        let p = f
            .p_value
            .map(|p| format!(", p = {}", format::general(p, 2, Style::Text)))
            .unwrap_or_default();
        b.push(Block::Para(vec![t(format!(
            "Hellings-Downs curve fitted to the {} bins with their full covariance (signal at the measured amplitude): A² = {}, chi-square {} for {} degrees of freedom{p}. The p-value assumes Gaussian bins, the noise model and the template spectrum; it checks the pattern, it is not a detection statistic.",
            d.bins.len(),
            format::plus_minus(f.amplitude2, f.amplitude2_sigma, 3, Style::Text),
            format::fixed(f.chi2, 2, Style::Text),
            f.degrees_of_freedom
        ))]));
    }
    if !d.per_frequency.is_empty() {
        let rows = d
            .per_frequency
            .iter()
            .map(|r| {
                vec![
                    num_int(r.index as u64),
                    Cell::Text(format::nanohertz(r.frequency_hz, Style::Text)),
                    num_sci(r.amplitude2, 3),
                    num_sci(r.amplitude2_sigma, 3),
                    opt_cell(r.amplitude2_sigma_signal, |v| num_sci(v, 3)),
                    num_sci(r.power_s2, 3),
                    num_sci(r.expected_s2, 3),
                ]
            })
            .collect();
        b.push(Block::Table(Table {
            caption: format!(
                "Hellings-Downs statistic at each frequency alone ({label}): A² estimate, its sigma without signal and with the signal at the measured amplitude, the measured power (s²) and the power-law prediction at the broadband amplitude with leakage between frequencies."
            ),
            header: vec![
                ("k".into(), "$k$".into()),
                ("frequency".into(), "frequency".into()),
                ("A² estimate".into(), "$\\hat{A}^2_k$".into()),
                ("sigma (no signal)".into(), "$\\sigma_0$".into()),
                ("sigma (signal)".into(), "$\\sigma$".into()),
                ("power [s²]".into(), "power [s$^2$]".into()),
                ("power law [s²]".into(), "power law [s$^2$]".into()),
            ],
            right: vec![true, true, true, true, true, true, true],
            rows,
        }));
    }
    if let Some(n) = &d.nmos {
        nmos_section(b, label, n);
    }
}

/// The noise-marginalised OS of a correlate folder: median and intervals per pattern.
fn nmos_section(b: &mut Vec<Block>, label: &str, n: &crate::figure::NmosRead) {
    let s = &n.summary;
    let interval = |v: [f64; 2], f: &dyn Fn(f64) -> String| format!("{} to {}", f(v[0]), f(v[1]));
    let sci = |v: f64| format::general(v, 3, Style::Text);
    let fix = |v: f64| format::fixed(v, 2, Style::Text);
    let rows = s
        .patterns
        .iter()
        .map(|(p, x)| {
            vec![
                Cell::Text(p.name().to_string()),
                num_sci(x.amplitude2.median, 3),
                Cell::Text(interval(x.amplitude2.interval_68, &sci)),
                Cell::Text(interval(x.amplitude2.interval_95, &sci)),
                num_fixed(x.snr.median, 2),
                Cell::Text(interval(x.snr.interval_68, &fix)),
                Cell::Text(interval(x.snr.interval_95, &fix)),
            ]
        })
        .collect();
    b.push(Block::Table(Table {
        caption: format!(
            "Noise-marginalised optimal statistic ({label}): median and central 68% and 95% intervals of A² and S/N over {} draws of the noise model ({} pulsars drawn from chain tables, {} kept at noise.toml{}).",
            s.draws,
            s.pulsars_drawn.len(),
            s.pulsars_fixed.len(),
            if s.common_draws.is_some() { "; common amplitude drawn" } else { "" }
        ),
        header: vec![
            ("pattern".into(), "pattern".into()),
            ("median A²".into(), "median $\\hat{A}^2$".into()),
            ("68% of A²".into(), "68\\% of $\\hat{A}^2$".into()),
            ("95% of A²".into(), "95\\% of $\\hat{A}^2$".into()),
            ("median S/N".into(), "median S/N".into()),
            ("68% of S/N".into(), "68\\% of S/N".into()),
            ("95% of S/N".into(), "95\\% of S/N".into()),
        ],
        right: vec![false, true, true, true, true, true, true],
        rows,
    }));
    b.push(Block::Para(vec![t(format!(
        "The spread shows how much the estimate depends on the noise model; it is not a confidence interval of A², and S/N is not a false-alarm probability. It assumes the chain tables sample the noise posteriors (drawn independently per pulsar) and the fixed template spectrum; a detection claim needs the collaboration's full analysis. Chain tables: SHA-256 {}.",
        ptacorr::output::truncate(&s.tables_sha256, 16)
    ))]));
}

fn null_section(b: &mut Vec<Block>, label: &str, d: &NullData) {
    let s = &d.summary;
    b.push(Block::Heading(3, format!("Null distribution: {label}")));
    let mut rows = vec![
        vec![
            Cell::Text("method".into()),
            Cell::Text(s.method.name().to_string()),
        ],
        vec![
            Cell::Text("pattern".into()),
            Cell::Text(s.pattern.name().to_string()),
        ],
        vec![Cell::Text("trials".into()), num_int(s.trials)],
        vec![Cell::Text("seed".into()), Cell::Text(s.seed.to_string())],
        vec![
            Cell::Text("observed S/N".into()),
            num_fixed(s.observed_snr, 2),
        ],
        vec![
            Cell::Text("trials at least as extreme".into()),
            num_int(s.n_at_least_as_extreme),
        ],
        vec![
            Cell::Text("p-value (one-sided)".into()),
            num_prob(s.p_value),
        ],
        vec![
            Cell::Text("p-value 95% interval".into()),
            Cell::Num(
                format!(
                    "{} to {}",
                    format::prob(s.p_value_ci95[0], Style::Text),
                    format::prob(s.p_value_ci95[1], Style::Text)
                ),
                format!(
                    "${}$ to ${}$",
                    format::prob(s.p_value_ci95[0], Style::Latex),
                    format::prob(s.p_value_ci95[1], Style::Latex)
                ),
            ),
        ],
        vec![
            Cell::Text("Gaussian-equivalent sigma (one-sided)".into()),
            opt_cell(s.gaussian_sigma, |g| num_fixed(g, 2)),
        ],
    ];
    if let Some((p, g, is_bound)) = d.analytic() {
        let label = if is_bound {
            "analytic p-value (upper bound: below the inversion's accuracy)"
        } else {
            "analytic p-value"
        };
        rows.push(vec![Cell::Text(label.into()), num_prob(p)]);
        rows.push(vec![
            Cell::Text("analytic Gaussian-equivalent sigma".into()),
            opt_cell(g, |g| num_fixed(g, 2)),
        ]);
    }
    if s.match_threshold.is_some() || s.acceptance_rate.is_some() {
        rows.push(vec![
            Cell::Text("scramble match threshold".into()),
            opt_cell(s.match_threshold, |x| num_general(x, 3)),
        ]);
        rows.push(vec![
            Cell::Text("scramble acceptance rate".into()),
            opt_cell(s.acceptance_rate, |x| num_general(x, 3)),
        ]);
    }
    b.push(Block::Table(Table {
        caption: format!(
            "Null distribution of the {} S/N ({label}).",
            s.pattern.name()
        ),
        header: vec![
            ("quantity".into(), "quantity".into()),
            ("value".into(), "value".into()),
        ],
        right: vec![false, true],
        rows,
    }));
}

fn inject_section(b: &mut Vec<Block>, label: &str, d: &InjectData) {
    b.push(Block::Heading(3, format!("Injection recovery: {label}")));
    b.push(Block::Para(vec![t(format!(
        "Pattern {}, {} mode{}, {} realizations per amplitude; a realization counts as detected when its S/N reaches {} (false-alarm probability {}).",
        d.recovery.pattern,
        d.recovery.mode,
        if d.recovery.target.is_empty() {
            String::new()
        } else {
            format!(" ({})", d.recovery.target)
        },
        d.recovery.realizations,
        format::fixed(d.recovery.detection_threshold_snr, 2, Style::Text),
        format::compact(d.recovery.false_alarm_probability, 3, Style::Text)
    ))]));
    let rows = d
        .rows
        .iter()
        .map(|r| {
            vec![
                num_sci(r.amplitude, 3),
                num_sci(r.amplitude2_injected, 3),
                num_sci(r.amplitude2_mean, 3),
                num_sci(r.amplitude2_std, 2),
                Cell::Num(
                    format::plus_minus(r.bias, r.bias_sem, 2, Style::Text),
                    latex_num(&format::plus_minus(r.bias, r.bias_sem, 2, Style::Latex)),
                ),
                num_fixed(r.snr_mean, 2),
                Cell::Num(
                    format!(
                        "{} / {}",
                        format::fixed(r.coverage68_weak, 2, Style::Text),
                        format::fixed(r.coverage68_full, 2, Style::Text)
                    ),
                    format!(
                        "{} / {}",
                        latex_num(&format::fixed(r.coverage68_weak, 2, Style::Latex)),
                        latex_num(&format::fixed(r.coverage68_full, 2, Style::Latex))
                    ),
                ),
                Cell::Num(
                    format!(
                        "{} / {}",
                        format::fixed(r.coverage95_weak, 2, Style::Text),
                        format::fixed(r.coverage95_full, 2, Style::Text)
                    ),
                    format!(
                        "{} / {}",
                        latex_num(&format::fixed(r.coverage95_weak, 2, Style::Latex)),
                        latex_num(&format::fixed(r.coverage95_full, 2, Style::Latex))
                    ),
                ),
                num_fixed(r.detection_probability, 3),
            ]
        })
        .collect();
    b.push(Block::Table(Table {
        caption: format!(
            "Injection recovery ({label}): mean and standard deviation of the recovered A², bias with its standard error, mean S/N, coverage of the 68% and 95% intervals (weak-signal sigma / full sigma) and detection probability."
        ),
        header: vec![
            ("A".into(), "$A$".into()),
            ("A² injected".into(), "$A^2$".into()),
            ("mean A²".into(), "$\\langle\\hat{A}^2\\rangle$".into()),
            ("std".into(), "std".into()),
            ("bias".into(), "bias".into()),
            ("mean S/N".into(), "$\\langle$S/N$\\rangle$".into()),
            ("cov. 68%".into(), "cov.\\ 68\\%".into()),
            ("cov. 95%".into(), "cov.\\ 95\\%".into()),
            ("P(detect)".into(), "$P_\\mathrm{det}$".into()),
        ],
        right: vec![true; 9],
        rows,
    }));
}

/// The noise section: per pulsar its convergence, then per parameter the posterior median and
/// central 68 % interval with R-hat and effective sample sizes (docs/noise-estimation.md).
fn noise_section(b: &mut Vec<Block>, label: &str, d: &figure::noise::NoiseData) {
    b.push(Block::Heading(3, format!("Noise estimation: {label}")));
    b.push(Block::Para(vec![t(format!(
        "Release {}, mode {}; {} pulsars. Posterior medians and central 68% intervals from the chains (MAP only where a parameter was not sampled); R-hat is the rank-normalised split R-hat, ESS the bulk and tail effective sample sizes (Vehtari et al. 2021). The values assume the priors of the folder's priors.toml and a Gaussian, stationary noise model.",
        d.release_title,
        d.mode,
        d.diagnostics.len()
    ))]));
    // "–" where a value does not exist (a parameter or pulsar that was not sampled).
    let dash =
        |v: Option<f64>, f: &dyn Fn(f64) -> Cell| v.map_or_else(|| Cell::Text("–".into()), f);
    let yes_no = |v: Option<bool>| match v {
        Some(true) => "yes",
        Some(false) => "NO",
        None => "–",
    };
    let rows = d
        .diagnostics
        .iter()
        .map(|r| {
            vec![
                Cell::Code(r.pulsar.clone()),
                num_int(r.n_toa as u64),
                Cell::Text(yes_no(Some(r.map_converged)).to_string()),
                dash(r.max_rhat, &|x| num_fixed(x, 3)),
                dash(r.min_ess_bulk, &|x| num_fixed(x, 0)),
                dash(r.min_ess_tail, &|x| num_fixed(x, 0)),
                r.divergences
                    .map_or_else(|| Cell::Text("–".into()), |x| num_int(x as u64)),
                Cell::Text(yes_no(r.posterior_converged).to_string()),
            ]
        })
        .collect();
    b.push(Block::Table(Table {
        caption: format!("Convergence per pulsar ({label}): MAP search, worst R-hat, smallest bulk and tail ESS over the sampled parameters, divergent draws, and whether the chains meet the thresholds."),
        header: vec![
            ("pulsar".into(), "pulsar".into()),
            ("TOAs".into(), "TOAs".into()),
            ("MAP converged".into(), "MAP converged".into()),
            ("max R-hat".into(), "max $\\hat{R}$".into()),
            ("min bulk ESS".into(), "min bulk ESS".into()),
            ("min tail ESS".into(), "min tail ESS".into()),
            ("divergences".into(), "divergences".into()),
            ("converged".into(), "converged".into()),
        ],
        right: vec![false, true, false, true, true, true, true, false],
        rows,
    }));
    let g = |v: f64| format::general(v, 4, Style::Text);
    let rows = d
        .estimates
        .iter()
        .map(|e| {
            let interval = match (e.q16, e.q84) {
                (Some(a), Some(z)) => Cell::Text(format!("{} to {}", g(a), g(z))),
                _ => Cell::Text("–".into()),
            };
            vec![
                Cell::Code(e.pulsar.clone()),
                Cell::Code(e.parameter.clone()),
                dash(e.median, &|x| num_general(x, 4)),
                interval,
                num_general(e.map, 4),
                dash(d.truth_of(&e.pulsar, &e.parameter), &|x| num_general(x, 4)),
                dash(e.rhat, &|x| num_fixed(x, 3)),
                dash(e.ess_bulk, &|x| num_fixed(x, 0)),
                dash(e.ess_tail, &|x| num_fixed(x, 0)),
            ]
        })
        .collect();
    b.push(Block::Table(Table {
        caption: format!("Noise hyperparameters ({label}): posterior median, central 68% interval, MAP, the simulation's true value where known, R-hat and ESS."),
        header: vec![
            ("pulsar".into(), "pulsar".into()),
            ("parameter".into(), "parameter".into()),
            ("median".into(), "median".into()),
            ("68% interval".into(), "68\\% interval".into()),
            ("MAP".into(), "MAP".into()),
            ("true".into(), "true".into()),
            ("R-hat".into(), "$\\hat{R}$".into()),
            ("bulk ESS".into(), "bulk ESS".into()),
            ("tail ESS".into(), "tail ESS".into()),
        ],
        right: vec![false, false, true, true, true, true, true, true, true],
        rows,
    }));
    if !d.fit_warnings.is_empty() {
        b.push(Block::Para(vec![t(format!(
            "Convergence warnings ({label}):"
        ))]));
        b.push(Block::List(
            d.fit_warnings.iter().map(|w| vec![t(w.clone())]).collect(),
        ));
    }
}

/// Words for a comparison name of summary.json (`hd/curn`, `curn/noise`).
fn comparison_words(c: &str) -> String {
    fn word(m: &str) -> &str {
        match m {
            "hd" => "Hellings–Downs",
            "curn" => "uncorrelated (CURN)",
            "noise" => "noise only",
            other => other,
        }
    }
    match c.split_once('/') {
        Some((a, b)) => format!("{} vs {}", word(a), word(b)),
        None => c.to_string(),
    }
}

fn common_section(b: &mut Vec<Block>, label: &str, d: &figure::common::CommonData) {
    let s = &d.summary;
    b.push(Block::Heading(3, format!("Common process: {label}")));
    b.push(Block::Para(vec![t(format!(
        "A red process common to all {} pulsars ({} frequencies, {} years), fitted under each correlation model with the exact likelihood of the reduced data. Priors: {}; {}. Each evidence and Bayes factor is given with its numerical (quadrature) error only; it does not include the uncertainty of the noise model.",
        s.n_pulsars,
        s.n_frequencies,
        format::fixed(s.span_years, 2, Style::Text),
        s.priors.log10_amplitude,
        s.priors.spectral_index
    ))]));
    let mut rows = Vec::new();
    for (index, list) in [
        (
            format!(
                "fixed, γ = {}",
                format::general(s.priors.fixed_spectral_index, 4, Style::Text)
            ),
            &s.bayes_factors_fixed_index,
        ),
        ("varied".to_string(), &s.bayes_factors_varied_index),
    ] {
        for r in list {
            rows.push(vec![
                Cell::Text(comparison_words(&r.comparison)),
                Cell::Text(index.clone()),
                num_fixed(r.ln_bayes_factor, 3),
                num_general(r.ln_error, 2),
                num_fixed(r.log10_bayes_factor, 3),
            ]);
        }
    }
    b.push(Block::Table(Table {
        caption: format!(
            "Bayes factors of the common process ({label}): ln BF, its numerical error (in ln, from the quadrature), and log10 BF. Each assumes the noise model (every pulsar's own noise fixed) and the priors; fixed-noise Bayes factors are approximations to ones that marginalise the pulsars' noise."
        ),
        header: vec![
            ("comparison".into(), "comparison".into()),
            ("spectral index".into(), "spectral index".into()),
            ("ln BF".into(), "$\\ln \\mathrm{BF}$".into()),
            ("numerical error".into(), "numerical error".into()),
            ("log10 BF".into(), "$\\log_{10} \\mathrm{BF}$".into()),
        ],
        right: vec![false, false, true, true, true],
        rows,
    }));
    let interval = |a: [f64; 2], dec: usize| {
        Cell::Num(
            format!(
                "{} to {}",
                format::fixed(a[0], dec, Style::Text),
                format::fixed(a[1], dec, Style::Text)
            ),
            format!(
                "${}$ to ${}$",
                format::fixed(a[0], dec, Style::Latex),
                format::fixed(a[1], dec, Style::Latex)
            ),
        )
    };
    let rows = s
        .models
        .iter()
        .map(|(m, f)| {
            vec![
                Cell::Text(figure::common::label(m)),
                num_fixed(f.fixed_index.log10_amplitude.median, 3),
                interval(f.fixed_index.log10_amplitude.interval_68, 3),
                num_sci(f.fixed_index.amplitude_upper_limit_95, 3),
                num_fixed(f.varied_index.spectral_index.median, 2),
                interval(f.varied_index.spectral_index.interval_68, 2),
                num_int(f.varied_index.spectral_index_nodes as u64),
            ]
        })
        .collect();
    b.push(Block::Table(Table {
        caption: format!(
            "Posteriors per model ({label}): log10 A at the fixed index (median, central 68% interval, 95% upper limit on A) and the spectral index with the amplitude marginalised (median, central 68% interval), with the number of spectral-index nodes of the adaptive rule."
        ),
        header: vec![
            ("model".into(), "model".into()),
            ("log10 A median".into(), "$\\log_{10} A$ median".into()),
            ("log10 A 68%".into(), "$\\log_{10} A$ 68\\%".into()),
            ("A 95% upper limit".into(), "$A$ 95\\% upper limit".into()),
            ("γ median".into(), "$\\gamma$ median".into()),
            ("γ 68%".into(), "$\\gamma$ 68\\%".into()),
            ("γ nodes".into(), "$\\gamma$ nodes".into()),
        ],
        right: vec![false, true, true, true, true, true, true],
        rows,
    }));
    if let Some(j) = &s.joint_red {
        joint_red_table(b, label, j, &interval);
    }
    b.push(Block::Para(vec![t(format!(
        "What these numbers assume ({label}): {}",
        s.assumptions
    ))]));
}

/// The joint red-noise fit (`common --joint-red`) beside the fixed-noise CURN answer.
fn joint_red_table(
    b: &mut Vec<Block>,
    label: &str,
    j: &ptacorr::common::JointRedSummary,
    interval: &dyn Fn([f64; 2], usize) -> Cell,
) {
    let mut rows = vec![vec![
        Cell::Text("red noise sampled jointly".into()),
        num_fixed(j.log10_amplitude.median, 3),
        interval(j.log10_amplitude.interval_68, 3),
        num_fixed(j.spectral_index.median, 2),
        interval(j.spectral_index.interval_68, 2),
    ]];
    if let (Some(a), Some(g)) = (
        &j.fixed_noise_log10_amplitude,
        &j.fixed_noise_spectral_index,
    ) {
        rows.push(vec![
            Cell::Text("red noise fixed (noise model)".into()),
            num_fixed(a.median, 3),
            interval(a.interval_68, 3),
            num_fixed(g.median, 2),
            interval(g.interval_68, 2),
        ]);
    }
    if let (Some(da), Some(dg)) = (j.log10_amplitude_difference, j.spectral_index_difference) {
        rows.push(vec![
            Cell::Text("difference of medians (joint minus fixed)".into()),
            num_fixed(da, 3),
            Cell::Text(String::new()),
            num_fixed(dg, 2),
            Cell::Text(String::new()),
        ]);
    }
    b.push(Block::Table(Table {
        caption: format!(
            "CURN common process with every pulsar's red noise marginalised jointly ({label}; {} parameters, {} pulsars with red noise, NUTS: largest R-hat {}, smallest bulk ESS {}, {} divergences) beside the answer with red noise fixed: median and central 68% interval of log10 A and of the spectral index, both with the other marginalised. {}",
            j.n_parameters,
            j.red_pulsars.len(),
            format::fixed(j.max_rhat, 3, Style::Text),
            format::fixed(j.min_ess_bulk, 0, Style::Text),
            j.divergences,
            j.assumptions
        ),
        header: vec![
            ("red noise".into(), "red noise".into()),
            ("log10 A median".into(), "$\\log_{10} A$ median".into()),
            ("log10 A 68%".into(), "$\\log_{10} A$ 68\\%".into()),
            ("γ median".into(), "$\\gamma$ median".into()),
            ("γ 68%".into(), "$\\gamma$ 68\\%".into()),
        ],
        right: vec![false, true, true, true, true],
        rows,
    }));
}

fn caveats(inputs: &[Input]) -> Vec<Vec<Span>> {
    let mut out = Vec::new();
    let mut noise: Vec<(String, String)> = Vec::new();
    for i in inputs {
        for (k, v) in flatten_settings(&i.provenance().settings) {
            if k.to_ascii_lowercase().contains("noise")
                && !noise.iter().any(|(a, b)| *a == k && *b == v)
            {
                noise.push((k, v));
            }
        }
    }
    let noise_words: Vec<Span> = if noise.is_empty() {
        vec![t(
            "The settings name no noise model explicitly; the trials assume whatever noise model the run used, listed in the settings above.",
        )]
    } else {
        let mut s = vec![t("The noise model used is given by the settings ")];
        for (n, (k, v)) in noise.iter().enumerate() {
            if n > 0 {
                s.push(t(", "));
            }
            s.push(c(k.clone()));
            s.push(t(format!(" = {v}")));
        }
        s.push(t(
            ". Every p-value below assumes this model describes the pulsars' noise; if it does not, the p-value is wrong by an unknown amount.",
        ));
        s
    };
    out.push(noise_words);

    let nulls: Vec<(&str, &NullData)> = inputs
        .iter()
        .filter_map(|i| match &i.data {
            Loaded::Null(n) => Some((i.label.as_str(), n.as_ref())),
            _ => None,
        })
        .collect();
    if nulls.is_empty() {
        out.push(vec![t(
            "No null distribution was included, so this report gives no p-value. An S/N by itself is not a significance.",
        )]);
    }
    for (label, n) in nulls {
        let s = &n.summary;
        let mut p = vec![
            t("The p-value "),
            t(format::prob(s.p_value, Style::Text)),
            t(" ("),
            c(label.to_string()),
            t(format!(
                ") is the fraction of {} {} trials (seed {}) whose {} S/N was at least the observed {}. \
                 It is one-sided: only a larger S/N counts as more extreme. \
                 It assumes the trials look like the data would without the {} correlation. \
                 With {} trials, a p-value below about {} cannot be resolved; the 95% interval {} to {} shows the uncertainty from the finite number of trials.",
                s.trials,
                method_words(s.method.name()),
                s.seed,
                pattern_words(s.pattern.name()),
                format::fixed(s.observed_snr, 2, Style::Text),
                pattern_words(s.pattern.name()),
                s.trials,
                format::general(1.0 / (s.trials.max(1) as f64), 1, Style::Text),
                format::prob(s.p_value_ci95[0], Style::Text),
                format::prob(s.p_value_ci95[1], Style::Text),
            )),
        ];
        if s.method == ptacorr::null::Method::Scramble {
            if let (Some(m), Some(a)) = (s.match_threshold, s.acceptance_rate) {
                p.push(t(format!(
                    " Sky scrambles were kept only below the match threshold {} (acceptance rate {}).",
                    format::general(m, 3, Style::Text),
                    format::general(a, 3, Style::Text)
                )));
            }
        }
        if !s.assumptions.trim().is_empty() {
            p.push(t(format!(
                " The run recorded these assumptions: \"{}\"",
                s.assumptions.trim()
            )));
        }
        out.push(p);
        let mut g = vec![match s.gaussian_sigma {
            Some(sig) => t(format!(
                "The Gaussian-equivalent significance {} sigma is one-sided: the z for which a standard normal variable exceeds z with probability p. A two-sided convention gives a larger number for the same p, so compare like with like.",
                format::fixed(sig, 2, Style::Text)
            )),
            None => t("No Gaussian-equivalent significance is given for this p-value."),
        }];
        if let Some((ap, _, is_bound)) = n.analytic() {
            g.push(t(format!(
                " The analytic p-value {}{} assumes Gaussian noise described exactly by the noise model and no common signal; it is a cross-check on the trials, not a replacement for them.",
                if is_bound { "below " } else { "" },
                format::prob(ap, Style::Text)
            )));
        }
        out.push(g);
    }
    if inputs.iter().any(|i| i.kind == FolderKind::Correlate) {
        out.push(vec![t(
            "Each binned point is the 1/sigma²-weighted mean of the pairs in its bin, and its error bar treats the pairs as independent. \
             That holds only without a common signal: when a signal is present, pairs that share a pulsar are correlated, so the bins are correlated with one another. \
             Do not judge the fit by counting points within their error bars or by a chi-squared over the bins; use the S/N and the null distribution.",
        )]);
        out.push(vec![t(
            "The monopole and dipole curves in the figure are each that pattern's own single-pattern fit; the joint-fit table gives the patterns fitted together.",
        )]);
    }
    for i in inputs {
        if let Loaded::Inject(d) = &i.data {
            out.push(vec![
                t("The injection results ("),
                c(i.label.clone()),
                t(format!(
                    ") come from {} realizations per amplitude in {} mode; a detection probability near one half is uncertain by about {} from the finite number of realizations.",
                    d.recovery.realizations,
                    d.recovery.mode,
                    format::fixed(0.5 / (d.recovery.realizations.max(1) as f64).sqrt(), 3, Style::Text)
                )),
            ]);
        }
    }
    if inputs.iter().any(|i| i.kind == FolderKind::Common) {
        out.push(vec![t(
            "A Bayes factor assumes the noise model and the priors: another prior range in amplitude or spectral index changes it, by the ratio of the prior volumes where the likelihood is flat. \
             The Bayes factors here hold every pulsar's own noise fixed at the noise model, so they are approximations to Bayes factors that marginalise it. \
             The numerical error in the table is that of the quadrature alone. A Bayes factor is not a detection claim: a detection claim needs the collaboration's full analysis.",
        )]);
    }
    out.push(vec![t(
        "This report summarises one analysis for a memo. A detection claim needs the collaboration's full analysis, including complete noise modelling of every pulsar, tests of other correlation patterns and of systematic effects, and internal review. The numbers here are not such a claim.",
    )]);
    out
}

// ---------------------------------------------------------------------------------------
// Markdown.

fn md_escape(s: &str, in_table: bool) -> String {
    let mut o = String::with_capacity(s.len());
    for ch in s.chars() {
        match ch {
            '\\' | '`' | '*' | '_' | '[' | ']' | '<' | '>' | '#' => {
                o.push('\\');
                o.push(ch);
            }
            '|' if in_table => o.push_str("\\|"),
            '\n' => o.push(' '),
            c => o.push(c),
        }
    }
    o
}

fn md_code(s: &str) -> String {
    let fence = if s.contains('`') { "`` " } else { "`" };
    let close = if s.contains('`') { " ``" } else { "`" };
    format!("{fence}{}{close}", s.replace('|', "\\|"))
}

fn md_spans(spans: &[Span]) -> String {
    spans
        .iter()
        .map(|s| match s {
            Span::Text(x) => md_escape(x, false),
            Span::Code(x) => md_code(x),
        })
        .collect()
}

fn render_md(doc: &Doc) -> String {
    let mut o = String::new();
    let _ = writeln!(o, "# {}\n", md_escape(&doc.title, false));
    let (mut nt, mut nf) = (0, 0);
    for b in &doc.blocks {
        match b {
            Block::Heading(l, s) => {
                let _ = writeln!(
                    o,
                    "{} {}\n",
                    "#".repeat(usize::from(*l)),
                    md_escape(s, false)
                );
            }
            Block::Para(sp) => {
                let _ = writeln!(o, "{}\n", md_spans(sp));
            }
            Block::List(items) => {
                for it in items {
                    let _ = writeln!(o, "- {}", md_spans(it));
                }
                o.push('\n');
            }
            Block::Table(tb) => {
                nt += 1;
                let _ = writeln!(o, "**Table {nt}.** {}\n", md_escape(&tb.caption, false));
                let head: Vec<String> = tb.header.iter().map(|h| md_escape(&h.0, true)).collect();
                let _ = writeln!(o, "| {} |", head.join(" | "));
                let rule: Vec<&str> = tb
                    .right
                    .iter()
                    .map(|r| if *r { "---:" } else { "---" })
                    .collect();
                let _ = writeln!(o, "| {} |", rule.join(" | "));
                for row in &tb.rows {
                    let cells: Vec<String> = row
                        .iter()
                        .map(|cell| match cell {
                            Cell::Text(x) => md_escape(x, true),
                            Cell::Code(x) => md_code(x),
                            Cell::Num(x, _) => md_escape(x, true),
                        })
                        .collect();
                    let _ = writeln!(o, "| {} |", cells.join(" | "));
                }
                o.push('\n');
            }
            Block::Figure {
                stem,
                title,
                caption,
                ..
            } => {
                nf += 1;
                let _ = writeln!(o, "![{}]({stem}.svg)\n", md_escape(title, false));
                let _ = writeln!(
                    o,
                    "**Figure {nf}.** {} (Also `{stem}.png`; plotted numbers in `{stem}.json`.)\n",
                    md_escape(caption, false)
                );
            }
        }
    }
    o
}

// ---------------------------------------------------------------------------------------
// HTML.

fn html_escape(s: &str) -> String {
    let mut o = String::with_capacity(s.len());
    for ch in s.chars() {
        match ch {
            '&' => o.push_str("&amp;"),
            '<' => o.push_str("&lt;"),
            '>' => o.push_str("&gt;"),
            '"' => o.push_str("&quot;"),
            c => o.push(c),
        }
    }
    o
}

fn html_spans(spans: &[Span]) -> String {
    spans
        .iter()
        .map(|s| match s {
            Span::Text(x) => html_escape(x),
            Span::Code(x) => format!("<code>{}</code>", html_escape(x)),
        })
        .collect()
}

/// Our SVG without the XML declaration and namespace declaration (not needed inline in
/// HTML5), so the page carries no URL at all.
fn inline_svg(svg: &str) -> String {
    let body = match svg.find("<svg") {
        Some(i) => &svg[i..],
        None => svg,
    };
    body.replacen(" xmlns=\"http://www.w3.org/2000/svg\"", "", 1)
}

const CSS: &str = "body{font-family:system-ui,-apple-system,'Segoe UI',Roboto,'DejaVu Sans',sans-serif;color:#1f1f1f;max-width:52em;margin:2em auto;padding:0 1em;line-height:1.45}\
h1{font-size:1.6em;border-bottom:2px solid #0072B2;padding-bottom:.2em}\
h2{font-size:1.25em;margin-top:1.8em;color:#0d3b66}\
h3{font-size:1.05em;margin-top:1.4em}\
table{border-collapse:collapse;margin:.6em 0 1.2em;font-size:.9em}\
caption{caption-side:top;text-align:left;font-weight:600;padding-bottom:.3em}\
th,td{border-bottom:1px solid #d6d6d6;padding:.25em .7em;vertical-align:top}\
th{border-bottom:2px solid #5a5a5a;text-align:left}\
td.n,th.n{text-align:right;font-variant-numeric:tabular-nums;white-space:nowrap}\
code{font-family:ui-monospace,'DejaVu Sans Mono',monospace;font-size:.9em;background:#f2f2f2;padding:0 .2em;word-break:break-all}\
figure{margin:1.2em 0}\
figure svg{width:100%;max-width:36em;height:auto;display:block}\
figcaption{font-size:.9em;color:#3a3a3a;margin-top:.4em}\
ul li{margin-bottom:.5em}";

fn render_html(doc: &Doc) -> String {
    let mut o = String::new();
    o.push_str("<!DOCTYPE html>\n<html lang=\"en\">\n<head>\n<meta charset=\"utf-8\">\n");
    let _ = writeln!(o, "<title>{}</title>", html_escape(&doc.title));
    let _ = writeln!(o, "<style>{CSS}</style>\n</head>\n<body>");
    let _ = writeln!(o, "<h1>{}</h1>", html_escape(&doc.title));
    let (mut nt, mut nf) = (0, 0);
    for b in &doc.blocks {
        match b {
            Block::Heading(l, s) => {
                let _ = writeln!(o, "<h{l}>{}</h{l}>", html_escape(s));
            }
            Block::Para(sp) => {
                let _ = writeln!(o, "<p>{}</p>", html_spans(sp));
            }
            Block::List(items) => {
                o.push_str("<ul>\n");
                for it in items {
                    let _ = writeln!(o, "<li>{}</li>", html_spans(it));
                }
                o.push_str("</ul>\n");
            }
            Block::Table(tb) => {
                nt += 1;
                let _ = writeln!(
                    o,
                    "<table>\n<caption>Table {nt}. {}</caption>",
                    html_escape(&tb.caption)
                );
                o.push_str("<thead><tr>");
                for (h, r) in tb.header.iter().zip(&tb.right) {
                    let cls = if *r { " class=\"n\"" } else { "" };
                    let _ = write!(o, "<th{cls}>{}</th>", html_escape(&h.0));
                }
                o.push_str("</tr></thead>\n<tbody>\n");
                for row in &tb.rows {
                    o.push_str("<tr>");
                    for (cell, r) in row
                        .iter()
                        .zip(tb.right.iter().chain(std::iter::repeat(&false)))
                    {
                        let cls = if *r { " class=\"n\"" } else { "" };
                        let inner = match cell {
                            Cell::Text(x) | Cell::Num(x, _) => html_escape(x),
                            Cell::Code(x) => format!("<code>{}</code>", html_escape(x)),
                        };
                        let _ = write!(o, "<td{cls}>{inner}</td>");
                    }
                    o.push_str("</tr>\n");
                }
                o.push_str("</tbody>\n</table>\n");
            }
            Block::Figure { caption, svg, .. } => {
                nf += 1;
                let _ = writeln!(
                    o,
                    "<figure>\n{}<figcaption><strong>Figure {nf}.</strong> {}</figcaption>\n</figure>",
                    inline_svg(svg),
                    html_escape(caption)
                );
            }
        }
    }
    o.push_str("</body>\n</html>\n");
    o
}

// ---------------------------------------------------------------------------------------
// LaTeX.

fn tex_escape(s: &str) -> String {
    let mut o = String::with_capacity(s.len());
    for ch in s.chars() {
        match ch {
            '\\' => o.push_str("\\textbackslash{}"),
            '&' | '%' | '$' | '#' | '_' | '{' | '}' => {
                o.push('\\');
                o.push(ch);
            }
            '~' => o.push_str("\\textasciitilde{}"),
            '^' => o.push_str("\\textasciicircum{}"),
            '²' => o.push_str("$^2$"),
            'σ' => o.push_str("$\\sigma$"),
            'γ' => o.push_str("$\\gamma$"),
            '–' => o.push_str("--"),
            c => o.push(c),
        }
    }
    o
}

fn render_tex(doc: &Doc) -> String {
    let mut o = String::new();
    let _ = writeln!(
        o,
        "% Tables of \"{}\", written by ptacorr-engine {GENERATOR_VERSION}.\n% Each is a plain tabular; wrap it in a table environment with your own caption.",
        doc.title.replace('\n', " ")
    );
    let mut nt = 0;
    for b in &doc.blocks {
        let Block::Table(tb) = b else { continue };
        nt += 1;
        let spec: String = tb
            .right
            .iter()
            .map(|r| if *r { 'r' } else { 'l' })
            .collect();
        let _ = writeln!(o, "\n% Table {nt}. {}", tb.caption.replace('\n', " "));
        let _ = writeln!(o, "\\begin{{tabular}}{{{spec}}}\n\\hline");
        let head: Vec<&str> = tb.header.iter().map(|h| h.1.as_str()).collect();
        let _ = writeln!(o, "{} \\\\\n\\hline", head.join(" & "));
        for row in &tb.rows {
            let cells: Vec<String> = row
                .iter()
                .map(|cell| match cell {
                    Cell::Text(x) => tex_escape(x),
                    Cell::Code(x) => format!("\\texttt{{{}}}", tex_escape(x)),
                    Cell::Num(_, l) => l.clone(),
                })
                .collect();
            let _ = writeln!(o, "{} \\\\", cells.join(" & "));
        }
        o.push_str("\\hline\n\\end{tabular}\n");
    }
    o
}

#[cfg(test)]
mod tests {
    use super::*;
    use crate::figure::fixtures::{self, TempDir};

    fn all_files(dir: &Path) -> Vec<(String, Vec<u8>)> {
        let mut v: Vec<(String, Vec<u8>)> = std::fs::read_dir(dir)
            .unwrap()
            .map(|e| {
                let e = e.unwrap();
                (
                    e.file_name().to_string_lossy().into_owned(),
                    std::fs::read(e.path()).unwrap(),
                )
            })
            .collect();
        v.sort();
        v
    }

    fn three_folders(t: &TempDir) -> Vec<PathBuf> {
        let (c, n, i) = (t.sub("correlate"), t.sub("null"), t.sub("inject"));
        fixtures::write_correlate(&c);
        fixtures::write_null(&n, true);
        fixtures::write_inject(&i);
        // Deliberately out of order: the report orders sections by kind.
        vec![i, c, n]
    }

    #[test]
    fn report_regenerates_byte_identically() {
        let t = TempDir::new("report-det");
        let dirs = three_folders(&t);
        let a = t.sub("a");
        let b = t.sub("b");
        build_report(&dirs, &a).unwrap();
        build_report(&dirs, &b).unwrap();
        let fa = all_files(&a);
        let names: Vec<&str> = fa.iter().map(|f| f.0.as_str()).collect();
        assert_eq!(
            names,
            vec![
                "angular-correlation.json",
                "angular-correlation.png",
                "angular-correlation.svg",
                "injection-recovery.json",
                "injection-recovery.png",
                "injection-recovery.svg",
                "null-distribution.json",
                "null-distribution.png",
                "null-distribution.svg",
                "report.html",
                "report.md",
                "tables.tex",
            ]
        );
        assert!(fa == all_files(&b), "two runs differ");
        // Rebuilding in place gives the same bytes too, and leaves no temporary files.
        build_report(&dirs, &a).unwrap();
        assert!(fa == all_files(&a), "rebuild in place differs");
        // Copies of the inputs elsewhere give the same report: no absolute paths leak in.
        let t2 = TempDir::new("report-det-copy");
        let dirs2 = three_folders(&t2);
        let c = t2.sub("c");
        build_report(&dirs2, &c).unwrap();
        assert!(
            fa == all_files(&c),
            "report depends on where the inputs are"
        );
    }

    #[test]
    fn report_holds_title_hash_tables_figures_and_caveats() {
        let t = TempDir::new("report-content");
        let dirs = three_folders(&t);
        let out = t.sub("out");
        let md_path = build_report(&dirs, &out).unwrap();
        let md = std::fs::read_to_string(&md_path).unwrap();
        assert!(
            md.starts_with("# Fictional release FR\\-1 (demo data)")
                || md.starts_with("# Fictional release FR-1 (demo data)")
        );
        assert!(md.contains("sha256:0f3c9a7e5b21"));
        assert!(md.contains("ptacorr-engine"));
        assert!(
            md.contains("| hd | 4.00×10⁻³⁰ | 1.10×10⁻³⁰ | 3.64 |"),
            "{md}"
        );
        assert!(md.contains("`noise_model`"));
        assert!(md.contains("one-sided"));
        assert!(md.contains("2000 sky-scrambled trials"));
        assert!(md.contains("correlated with one another"));
        assert!(md.contains("collaboration's full analysis"));
        assert!(md.contains("![Angular correlation"));
        // Sections come in kind order although inject was given first.
        let (pc, pn, pi) = (
            md.find("### Correlation patterns").unwrap(),
            md.find("### Null distribution").unwrap(),
            md.find("### Injection recovery").unwrap(),
        );
        assert!(pc < pn && pn < pi);

        let html = std::fs::read_to_string(out.join("report.html")).unwrap();
        assert_eq!(html.matches("<svg").count(), 3);
        assert_eq!(html.matches("<figure>").count(), 3);
        for banned in [
            "http:", "https:", "<link", "<script", " src=", " href=", "@import", "url(http",
        ] {
            assert!(!html.contains(banned), "report.html contains {banned}");
        }
        assert!(html.contains("<style>"));
        // Inline figures keep distinct clip ids.
        let ids: Vec<&str> = html
            .match_indices("<clipPath id=\"")
            .map(|(i, _)| &html[i + 15..i + 40])
            .collect();
        let mut uniq = ids.clone();
        uniq.sort();
        uniq.dedup();
        assert_eq!(ids.len(), uniq.len());

        let tex = std::fs::read_to_string(out.join("tables.tex")).unwrap();
        assert_eq!(
            tex.matches("\\begin{tabular}").count(),
            tex.matches("\\end{tabular}").count()
        );
        assert!(
            tex.contains("hd & $4.00\\times10^{-30}$ & $1.10\\times10^{-30}$ & $3.64$ \\\\"),
            "{tex}"
        );
        assert!(tex.contains("noise\\_model"));
        assert!(tex.contains("p-value (one-sided)"));
        assert!(tex.contains("$P_\\mathrm{det}$"));
        // Balanced braces in every table.
        assert_eq!(
            tex.matches('{').count() - tex.matches("\\{").count(),
            tex.matches('}').count() - tex.matches("\\}").count()
        );
    }

    #[test]
    fn two_folders_of_one_kind_get_distinct_figure_names() {
        let t = TempDir::new("report-two");
        let (a, b) = (t.sub("run-a"), t.sub("run-b"));
        fixtures::write_correlate(&a);
        fixtures::write_correlate(&b);
        let out = t.sub("out");
        build_report(&[a, b], &out).unwrap();
        assert!(out.join("angular-correlation.svg").is_file());
        assert!(out.join("angular-correlation-2.svg").is_file());
        let md = std::fs::read_to_string(out.join("report.md")).unwrap();
        assert!(
            md.contains("Correlation patterns: run\\-a")
                || md.contains("Correlation patterns: run-a")
        );
        assert!(md.contains("No null distribution was included"));
    }

    #[test]
    fn report_errors_are_typed() {
        let t = TempDir::new("report-err");
        assert!(matches!(
            build_report(&[], &t.sub("o")),
            Err(FigureError::NoInputs)
        ));
        let e = build_report(&[t.sub("nothing")], &t.sub("o")).unwrap_err();
        assert!(matches!(e, FigureError::UnknownFolder { .. }));
        let c = t.sub("correlate");
        fixtures::write_correlate(&c);
        fixtures::edit_json(&c.join("summary.json"), |v| {
            v["provenance"]
                .as_object_mut()
                .unwrap()
                .remove("input_hash");
        });
        let e = build_report(&[c], &t.sub("o")).unwrap_err();
        assert!(
            matches!(&e, FigureError::Engine(ptacorr::Error::Input { path, .. }) if path.ends_with("summary.json")),
            "{e}"
        );
        assert!(e.to_string().contains("input_hash"), "{e}");
    }

    #[test]
    fn escaping() {
        assert_eq!(tex_escape("a_b & 50% #1"), "a\\_b \\& 50\\% \\#1");
        assert_eq!(md_escape("a|b*c", true), "a\\|b\\*c");
        assert_eq!(html_escape("<a & \"b\">"), "&lt;a &amp; &quot;b&quot;&gt;");
        let flat = flatten_settings(&serde_json::json!({"b": {"y": 1, "x": "s"}, "a": [1, 2]}));
        assert_eq!(
            flat,
            vec![
                ("a".to_string(), "[1,2]".to_string()),
                ("b.x".to_string(), "s".to_string()),
                ("b.y".to_string(), "1".to_string())
            ]
        );
    }
}
