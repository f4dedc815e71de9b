//! Figures drawn from ptacorr's output folders.
//!
//! [`plot_folder`] looks at a folder, decides what ptacorr wrote there and draws:
//! - a correlate folder (summary.json, bins.csv, pairs.csv): the angular correlation,
//!   binned cross-correlations against angular separation with the fitted Hellings-Downs,
//!   monopole and dipole curves ([`angular`]);
//! - a null folder (null.json, trials.csv): the distribution of trial S/N with the observed
//!   value and its p-value ([`null`]);
//! - an inject folder (recovery.json, recovery.csv): recovered against injected amplitude
//!   and the detection probability ([`recovery`]);
//! - a common folder (posterior-fixed-index.csv, summary.json, posterior-grid.csv): the
//!   posterior of log10 A at the fixed index for every correlation model and the joint
//!   (log10 A, gamma) credible regions ([`common`]); with free-spectrum.csv also the
//!   per-frequency posteriors with the grid fit's power law ([`free_spectrum`]);
//! - a noise folder (estimates.csv, diagnostics.csv, chains/): one figure per pulsar with the
//!   marginal posteriors of its noise hyperparameters ([`noise`]).
//!
//! Each figure is written as SVG, PNG or PDF together with a JSON sidecar holding exactly
//! the numbers that were drawn. All text is drawn as vector outlines of an embedded font,
//! so output does not depend on the fonts of the machine. Rendering is deterministic: the
//! same inputs give byte-identical files.

mod angular;
mod canvas;
pub mod common;
pub(crate) mod format;
pub mod free_spectrum;
mod input;
mod nmos;
pub mod noise;
mod null;
mod recovery;
pub mod scaling;
mod spectrum;

use std::path::{Path, PathBuf};

pub use scaling::plot_scaling;

pub use input::{
    bin_fit, detect_kinds, patterns_in_order, Bin, CorrelateData, FolderKind, InjectData, NmosRead,
    NullData, NullReport, Pair, Provenance, RecoveryFile, RecoveryRow, Summary, Trial,
};

use resvg::{tiny_skia, usvg};

/// Errors of figure and report generation. Each names the file (and field) concerned.
#[derive(Debug, thiserror::Error)]
pub enum FigureError {
    #[error("cannot read {path}: {source}")]
    Read {
        path: PathBuf,
        source: std::io::Error,
    },
    #[error("cannot write {path}: {source}")]
    Write {
        path: PathBuf,
        source: std::io::Error,
    },
    #[error("{path}: cannot read CSV: {source}")]
    Csv { path: PathBuf, source: csv::Error },
    #[error("{path}: field `{field}` is missing")]
    MissingField { path: PathBuf, field: String },
    #[error("{path}: field `{field}`: {reason}")]
    InvalidField {
        path: PathBuf,
        field: String,
        reason: String,
    },
    #[error("{path}, line {line}, column `{column}`: {reason}")]
    InvalidCell {
        path: PathBuf,
        line: u64,
        column: String,
        reason: String,
    },
    #[error("{dir}: not a ptacorr output folder: {reason}")]
    UnknownFolder { dir: PathBuf, reason: String },
    #[error("{dir}: {file} is missing (a {kind} folder needs it)")]
    MissingFile {
        dir: PathBuf,
        file: &'static str,
        kind: &'static str,
    },
    #[error("option `{option}`: {reason}")]
    InvalidOption {
        option: &'static str,
        reason: String,
    },
    #[error("{format} output is not supported: {reason}")]
    Unsupported {
        format: &'static str,
        reason: String,
    },
    #[error("rendering {figure} failed: {reason}")]
    Render { figure: String, reason: String },
    #[error("no input folders were given")]
    NoInputs,
    /// An error of the engine's readers and writers (manifest check, atomic writes).
    #[error(transparent)]
    Engine(#[from] ptacorr::Error),
}

/// Output file format of a figure.
#[derive(Clone, Copy, Debug, PartialEq, Eq, Hash)]
pub enum FigureFormat {
    Svg,
    Png,
    Pdf,
}

impl FigureFormat {
    pub fn extension(self) -> &'static str {
        match self {
            FigureFormat::Svg => "svg",
            FigureFormat::Png => "png",
            FigureFormat::Pdf => "pdf",
        }
    }
}

impl std::str::FromStr for FigureFormat {
    type Err = FigureError;
    fn from_str(s: &str) -> Result<Self, Self::Err> {
        match s.to_ascii_lowercase().as_str() {
            "svg" => Ok(FigureFormat::Svg),
            "png" => Ok(FigureFormat::Png),
            "pdf" => Ok(FigureFormat::Pdf),
            _ => Err(FigureError::InvalidOption {
                option: "format",
                reason: format!("`{s}` is not one of svg, png, pdf"),
            }),
        }
    }
}

/// Figure width for a journal page.
#[derive(Clone, Copy, Debug, PartialEq, Eq, Hash, Default)]
pub enum ColumnWidth {
    /// One column, 3.4 in.
    #[default]
    Single,
    /// Full page width, 7.0 in.
    Double,
}

impl ColumnWidth {
    /// Height over width of a one-panel figure at this width (`single` or `double`).
    pub(crate) fn aspect(self, single: f64, double: f64) -> f64 {
        match self {
            ColumnWidth::Single => single,
            ColumnWidth::Double => double,
        }
    }

    pub fn inches(self) -> f64 {
        match self {
            ColumnWidth::Single => 3.4,
            ColumnWidth::Double => 7.0,
        }
    }
}

/// How figures are drawn.
#[derive(Clone, Debug, PartialEq)]
pub struct FigureOptions {
    /// Angular correlation in units of the fitted Hellings-Downs amplitude (rho / A2_hat)
    /// instead of correlated power.
    pub normalised: bool,
    /// Show every pulsar pair as a faint point behind the bins.
    pub show_pairs: bool,
    pub width: ColumnWidth,
    /// Resolution of PNG output, dots per inch (36 to 1200).
    pub png_dpi: f64,
}

impl Default for FigureOptions {
    fn default() -> Self {
        Self {
            normalised: false,
            show_pairs: false,
            width: ColumnWidth::Single,
            png_dpi: 300.0,
        }
    }
}

/// A drawn figure before it is encoded.
#[derive(Clone, Debug)]
pub(crate) struct Drawn {
    /// File name without extension, e.g. `angular-correlation`.
    pub stem: String,
    /// One-line description (the SVG title and the report's alt text).
    pub title: String,
    /// The caption printed under the figure.
    pub caption: String,
    pub svg: String,
    /// The sidecar JSON text (pretty-printed, newline-terminated).
    pub sidecar: String,
}

impl Drawn {
    /// A drawn figure with its sidecar serialised ([`sidecar_json`]).
    pub(crate) fn new<T: serde::Serialize>(
        stem: &str,
        title: String,
        caption: String,
        svg: String,
        sidecar: &T,
    ) -> Result<Drawn, FigureError> {
        Ok(Drawn {
            stem: stem.to_string(),
            title,
            caption,
            svg,
            sidecar: sidecar_json(sidecar, stem)?,
        })
    }
}

/// Draws every figure of one folder kind. `stem_suffix` is appended to the file stems (the
/// report uses it to keep two folders of one kind apart).
pub(crate) fn draw_kind(
    kind: FolderKind,
    dir: &Path,
    opts: &FigureOptions,
    stem_suffix: &str,
) -> Result<Vec<Drawn>, FigureError> {
    check_options(opts)?;
    let source = folder_label(dir);
    Ok(match kind {
        FolderKind::Correlate => {
            let data = CorrelateData::load(dir)?;
            let mut v = vec![angular::draw(
                &data,
                opts,
                &format!("{}{stem_suffix}", angular::STEM),
                &source,
            )?];
            // The noise-marginalised histogram, when the run had noise draws.
            if data.nmos.is_some() {
                v.push(nmos::draw(
                    &data,
                    opts,
                    &format!("{}{stem_suffix}", nmos::STEM),
                    &source,
                )?);
            }
            // The per-frequency figure, when the folder has per-frequency.csv.
            if !data.per_frequency.is_empty() {
                v.push(spectrum::draw(
                    &data,
                    opts,
                    &format!("{}{stem_suffix}", spectrum::STEM),
                    &source,
                )?);
            }
            v
        }
        FolderKind::Null => {
            let data = NullData::load(dir)?;
            vec![null::draw(
                &data,
                opts,
                &format!("{}{stem_suffix}", null::STEM),
                &source,
            )?]
        }
        FolderKind::Inject => {
            let data = InjectData::load(dir)?;
            vec![recovery::draw(
                &data,
                opts,
                &format!("{}{stem_suffix}", recovery::STEM),
                &source,
            )?]
        }
        FolderKind::Noise => {
            noise::draw_all(&noise::NoiseData::load(dir)?, opts, stem_suffix, &source)?
        }
        FolderKind::Common => {
            common::draw_all(&common::CommonData::load(dir)?, opts, stem_suffix, &source)?
        }
    })
}

/// The last component of a folder path, used to name it in sidecars and the report
/// (never the full path, so outputs do not depend on where the inputs sit).
pub(crate) fn folder_label(dir: &Path) -> String {
    dir.components()
        .next_back()
        .map(|c| c.as_os_str().to_string_lossy().into_owned())
        .filter(|s| !s.is_empty() && s != "." && s != "..")
        .unwrap_or_else(|| "input".to_string())
}

fn check_options(opts: &FigureOptions) -> Result<(), FigureError> {
    if !(opts.png_dpi.is_finite() && (36.0..=1200.0).contains(&opts.png_dpi)) {
        return Err(FigureError::InvalidOption {
            option: "png_dpi",
            reason: format!("{} is outside 36-1200", opts.png_dpi),
        });
    }
    Ok(())
}

/// Detects the kind of `dir`, draws its figure(s) and writes each in `format` together with
/// a `<stem>.json` sidecar into `out` (default: `dir` itself). Returns the paths written,
/// figure then sidecar for each figure.
pub fn plot_folder(
    dir: &Path,
    format: FigureFormat,
    out: Option<&Path>,
    opts: &FigureOptions,
) -> Result<Vec<PathBuf>, FigureError> {
    check_options(opts)?;
    let kinds = detect_kinds(dir)?;
    let out_dir = out.unwrap_or(dir);
    std::fs::create_dir_all(out_dir).map_err(|source| FigureError::Write {
        path: out_dir.to_path_buf(),
        source,
    })?;
    let mut written = Vec::new();
    for kind in kinds {
        for d in draw_kind(kind, dir, opts, "")? {
            let bytes = encode(&d, format, opts)?;
            let fig = out_dir.join(format!("{}.{}", d.stem, format.extension()));
            write_atomic(&fig, &bytes)?;
            let side = out_dir.join(format!("{}.json", d.stem));
            write_atomic(&side, d.sidecar.as_bytes())?;
            written.push(fig);
            written.push(side);
        }
    }
    Ok(written)
}

/// Encodes a drawn figure in `format`.
pub(crate) fn encode(
    d: &Drawn,
    format: FigureFormat,
    opts: &FigureOptions,
) -> Result<Vec<u8>, FigureError> {
    match format {
        FigureFormat::Svg => Ok(d.svg.clone().into_bytes()),
        FigureFormat::Png => render_png(&d.svg, opts.png_dpi, &d.stem),
        FigureFormat::Pdf => render_pdf(&d.svg, &d.stem),
    }
}

fn render_err(figure: &str, reason: impl std::fmt::Display) -> FigureError {
    FigureError::Render {
        figure: figure.to_string(),
        reason: reason.to_string(),
    }
}

/// Serialises a figure's sidecar as pretty JSON ending in a newline.
pub(crate) fn sidecar_json<T: serde::Serialize>(
    v: &T,
    figure: &str,
) -> Result<String, FigureError> {
    serde_json::to_string_pretty(v)
        .map(|s| s + "\n")
        .map_err(|e| render_err(figure, e))
}

/// Parses our own SVG. No font database is consulted: all text is already outlines.
fn parse_svg(svg: &str, figure: &str) -> Result<usvg::Tree, FigureError> {
    usvg::Tree::from_str(svg, &usvg::Options::default()).map_err(|e| render_err(figure, e))
}

/// Rasterises an SVG at `dpi` onto white and encodes it as an RGB PNG with its resolution
/// recorded (pHYs chunk).
pub(crate) fn render_png(svg: &str, dpi: f64, figure: &str) -> Result<Vec<u8>, FigureError> {
    let tree = parse_svg(svg, figure)?;
    // usvg sizes the tree in CSS pixels (96 per inch).
    let scale = dpi / 96.0;
    let w = (f64::from(tree.size().width()) * scale).round();
    let h = (f64::from(tree.size().height()) * scale).round();
    if !(w >= 1.0 && h >= 1.0 && w * h <= 1.0e8) {
        return Err(render_err(
            figure,
            format!("image size {w} x {h} px is out of range"),
        ));
    }
    let (w, h) = (w as u32, h as u32);
    let mut pixmap = tiny_skia::Pixmap::new(w, h)
        .ok_or_else(|| render_err(figure, "cannot allocate the image"))?;
    pixmap.fill(tiny_skia::Color::WHITE);
    let sx = w as f32 / tree.size().width();
    let sy = h as f32 / tree.size().height();
    resvg::render(
        &tree,
        tiny_skia::Transform::from_scale(sx, sy),
        &mut pixmap.as_mut(),
    );
    // Opaque white background: premultiplied RGBA equals straight RGBA; drop alpha.
    let rgb: Vec<u8> = pixmap
        .data()
        .chunks_exact(4)
        .flat_map(|p| [p[0], p[1], p[2]])
        .collect();
    let mut out = Vec::new();
    {
        let mut enc = png::Encoder::new(&mut out, w, h);
        enc.set_color(png::ColorType::Rgb);
        enc.set_depth(png::BitDepth::Eight);
        let ppm = (dpi / 0.0254).round() as u32;
        enc.set_pixel_dims(Some(png::PixelDimensions {
            xppu: ppm,
            yppu: ppm,
            unit: png::Unit::Meter,
        }));
        let mut wr = enc.write_header().map_err(|e| render_err(figure, e))?;
        wr.write_image_data(&rgb)
            .map_err(|e| render_err(figure, e))?;
        wr.finish().map_err(|e| render_err(figure, e))?;
    }
    Ok(out)
}

/// Converts an SVG to a one-page vector PDF of the same physical size, with its resource
/// dictionaries in a fixed order ([`sort_pdf_resources`]) so the bytes are the same in every run.
pub(crate) fn render_pdf(svg: &str, figure: &str) -> Result<Vec<u8>, FigureError> {
    let tree = parse_svg(svg, figure)?;
    svg2pdf::to_pdf(
        &tree,
        svg2pdf::ConversionOptions::default(),
        svg2pdf::PageOptions { dpi: 96.0 },
    )
    .map(|pdf| sort_pdf_resources(&pdf))
    .map_err(|e| render_err(figure, e))
}

/// Puts the entries of every resource sub-dictionary of a PDF in one order (by name, numbers
/// compared as numbers), so the same figure gives the same bytes in every run (issue 9.8).
///
/// svg2pdf writes the graphics states, patterns and XObjects of a page from a hash map, whose
/// iteration order changes from run to run; nothing else in its output depends on it (the
/// objects themselves are numbered in drawing order). Each entry is one line `/name N 0 R`, so
/// sorting the lines of a dictionary keeps its length and every offset in the cross-reference
/// table stays right. Stream contents are skipped.
pub(crate) fn sort_pdf_resources(pdf: &[u8]) -> Vec<u8> {
    const KEYS: &[&[u8]] = &[
        b"/ExtGState <<",
        b"/Pattern <<",
        b"/XObject <<",
        b"/Shading <<",
        b"/Font <<",
        b"/ColorSpace <<",
    ];
    let lines: Vec<&[u8]> = pdf.split_inclusive(|&b| b == b'\n').collect();
    let mut out = Vec::with_capacity(pdf.len());
    let mut in_stream = false;
    let mut i = 0;
    while i < lines.len() {
        let line = lines[i];
        let t = line.trim_ascii();
        if in_stream {
            in_stream = t != b"endstream";
            out.extend_from_slice(line);
            i += 1;
            continue;
        }
        if t == b"stream" {
            in_stream = true;
        }
        out.extend_from_slice(line);
        i += 1;
        if !KEYS.contains(&t) {
            continue;
        }
        // The entries up to the closing `>>`, each one reference on its own line.
        let start = i;
        while i < lines.len() && lines[i].trim_ascii() != b">>" {
            i += 1;
        }
        let mut entries: Vec<&[u8]> = lines[start..i].to_vec();
        let simple = entries.iter().all(|e| {
            let e = e.trim_ascii();
            e.starts_with(b"/") && e.ends_with(b" 0 R")
        });
        if simple {
            entries.sort_by_key(|e| resource_key(e));
        }
        for e in entries {
            out.extend_from_slice(e);
        }
    }
    out
}

/// Sort key of a resource line `/gs12 18 0 R`: the name's letters, then its number.
fn resource_key(line: &[u8]) -> (Vec<u8>, u64, Vec<u8>) {
    let t = line.trim_ascii();
    let name = t.split(|&b| b == b' ').next().unwrap_or(t);
    let letters: Vec<u8> = name
        .iter()
        .copied()
        .filter(|b| !b.is_ascii_digit())
        .collect();
    let digits: String = name
        .iter()
        .filter(|b| b.is_ascii_digit())
        .map(|&b| b as char)
        .collect();
    (letters, digits.parse().unwrap_or(0), t.to_vec())
}

/// Writes `bytes` atomically with the engine's one writer (temporary name, fsync, rename), so
/// a reader never sees a half-written file.
pub(crate) fn write_atomic(path: &Path, bytes: &[u8]) -> Result<(), FigureError> {
    Ok(ptacorr::output::write_atomic(path, bytes)?)
}

#[cfg(test)]
pub(crate) mod fixtures;

#[cfg(test)]
mod tests {
    use super::fixtures::{self, TempDir};
    use super::*;
    use resvg::usvg::roxmltree;

    fn class_count(svg: &str, class: &str) -> usize {
        let doc = roxmltree::Document::parse(svg).expect("SVG parses as XML");
        doc.descendants()
            .filter(|n| {
                n.attribute("class")
                    .is_some_and(|c| c.split_whitespace().any(|w| w == class))
            })
            .count()
    }

    fn sidecar(path: &Path) -> serde_json::Value {
        serde_json::from_str(&std::fs::read_to_string(path).unwrap()).unwrap()
    }

    fn png_size(bytes: &[u8]) -> (u32, u32, Vec<u8>) {
        let dec = png::Decoder::new(std::io::Cursor::new(bytes));
        let mut r = dec.read_info().expect("PNG header decodes");
        let mut buf = vec![0; r.output_buffer_size()];
        let info = r.next_frame(&mut buf).expect("PNG data decodes");
        assert_eq!(info.color_type, png::ColorType::Rgb);
        buf.truncate(info.buffer_size());
        (info.width, info.height, buf)
    }

    /// Non-white pixels inside a box given in points.
    fn ink_in(rgb: &[u8], width: u32, dpi: f64, b: &[f64]) -> usize {
        let s = dpi / 72.0;
        let (x0, y0) = ((b[0] * s) as usize, (b[1] * s) as usize);
        let (x1, y1) = (((b[0] + b[2]) * s) as usize, ((b[1] + b[3]) * s) as usize);
        let mut k = 0;
        for y in y0..y1 {
            for x in x0..x1.min(width as usize) {
                let i = (y * width as usize + x) * 3;
                if i + 2 < rgb.len() && rgb[i..i + 3].iter().any(|&c| c < 200) {
                    k += 1;
                }
            }
        }
        k
    }

    #[test]
    fn detects_folder_kinds_and_reports_missing_files() {
        let t = TempDir::new("detect");
        let c = t.sub("corr");
        fixtures::write_correlate(&c);
        assert_eq!(detect_kinds(&c).unwrap(), vec![FolderKind::Correlate]);
        std::fs::remove_file(c.join("pairs.csv")).unwrap();
        let e = detect_kinds(&c).unwrap_err();
        assert!(
            matches!(
                e,
                FigureError::MissingFile {
                    file: "pairs.csv",
                    ..
                }
            ),
            "{e}"
        );
        let empty = t.sub("empty");
        let e =
            plot_folder(&empty, FigureFormat::Svg, None, &FigureOptions::default()).unwrap_err();
        assert!(matches!(e, FigureError::UnknownFolder { .. }), "{e}");
        assert!(e.to_string().contains("empty"));
    }

    #[test]
    fn angular_svg_has_one_marker_and_error_bar_per_bin() {
        let t = TempDir::new("angular-svg");
        let c = t.sub("corr");
        fixtures::write_correlate(&c);
        let opts = FigureOptions {
            show_pairs: true,
            ..Default::default()
        };
        let out = plot_folder(&c, FigureFormat::Svg, Some(&t.sub("out")), &opts).unwrap();
        assert_eq!(out.len(), 2);
        assert!(out[0].ends_with("angular-correlation.svg"));
        let svg = std::fs::read_to_string(&out[0]).unwrap();
        let tree = usvg::Tree::from_str(&svg, &usvg::Options::default()).expect("usvg parses");
        assert!((tree.size().width() - 3.4 * 96.0).abs() < 0.01);
        let side = sidecar(&out[1]);
        let n_rows = fixtures::correlate_bin_rows(&c);
        assert_eq!(side["bins"].as_array().unwrap().len(), n_rows);
        assert_eq!(class_count(&svg, "bin-marker"), n_rows);
        assert_eq!(class_count(&svg, "bin-errorbar"), n_rows);
        assert_eq!(class_count(&svg, "pair-point"), fixtures::CORRELATE_PAIRS);
        assert_eq!(class_count(&svg, "curve-hd"), 1);
        assert_eq!(class_count(&svg, "curve-monopole"), 1);
        assert_eq!(class_count(&svg, "curve-dipole"), 1);
        // No font is needed to show this file.
        assert_eq!(svg.matches("<text").count(), 0);
        // The sidecar holds what was drawn: the bins of bins.csv and G(zeta) scaled by A2.
        let a2 = side["curves"][0]["amplitude2"].as_f64().unwrap();
        assert_eq!(side["curves"][0]["pattern"], "hd");
        let ys = side["curves"][0]["y"].as_array().unwrap();
        assert!((ys[0].as_f64().unwrap() - 0.5 * a2).abs() < 1e-12 * a2);
        assert!((ys[180].as_f64().unwrap() - a2 * -0.144_860_2).abs() < 1e-6 * a2);
        let b0 = &side["bins"][0];
        assert_eq!(b0["y"].as_f64(), b0["rho"].as_f64());
    }

    #[test]
    fn normalised_mode_divides_by_hd_amplitude() {
        let t = TempDir::new("angular-norm");
        let c = t.sub("corr");
        fixtures::write_correlate(&c);
        let opts = FigureOptions {
            normalised: true,
            ..Default::default()
        };
        let out = plot_folder(&c, FigureFormat::Svg, Some(&t.sub("out")), &opts).unwrap();
        let side = sidecar(&out[1]);
        let a2 = fixtures::CORRELATE_A2_HD;
        assert_eq!(side["y_divisor"].as_f64().unwrap(), a2);
        let b = &side["bins"][2];
        let want = b["rho"].as_f64().unwrap() / a2;
        assert!((b["y"].as_f64().unwrap() - want).abs() < 1e-12);
        assert!((side["curves"][0]["y"][0].as_f64().unwrap() - 0.5).abs() < 1e-12);
        assert!(side["y_label"].as_str().unwrap().contains("Â²"));
    }

    #[test]
    fn normalising_by_a_negative_amplitude_is_a_typed_error() {
        let t = TempDir::new("angular-neg");
        let c = t.sub("corr");
        fixtures::write_correlate(&c);
        fixtures::edit_json(&c.join("summary.json"), |v| {
            v["patterns"]["hd"]["amplitude2"] = serde_json::json!(-1.0e-30);
        });
        let opts = FigureOptions {
            normalised: true,
            ..Default::default()
        };
        let e = plot_folder(&c, FigureFormat::Svg, None, &opts).unwrap_err();
        match &e {
            FigureError::InvalidField { path, field, .. } => {
                assert!(path.ends_with("summary.json"));
                assert_eq!(field, "patterns.hd.amplitude2");
            }
            other => panic!("unexpected error {other}"),
        }
        // In units of A^2 the same folder draws fine.
        assert!(plot_folder(&c, FigureFormat::Svg, None, &FigureOptions::default()).is_ok());
    }

    #[test]
    fn bad_cells_and_fields_name_file_line_and_column() {
        let t = TempDir::new("bad-input");
        let c = t.sub("corr");
        fixtures::write_correlate(&c);
        let bins = std::fs::read_to_string(c.join("bins.csv")).unwrap();
        let mut lines: Vec<String> = bins.lines().map(str::to_string).collect();
        let cells: Vec<&str> = lines[3].split(',').collect();
        let mut cells: Vec<String> = cells.iter().map(|s| s.to_string()).collect();
        cells[5] = "abc".to_string();
        lines[3] = cells.join(",");
        std::fs::write(c.join("bins.csv"), lines.join("\n")).unwrap();
        fixtures::seal(&c);
        let e = plot_folder(&c, FigureFormat::Svg, None, &FigureOptions::default()).unwrap_err();
        // Read by the engine's own reader of bins.csv (output::read_csv).
        match &e {
            FigureError::Engine(ptacorr::Error::Input {
                path, line, field, ..
            }) => {
                assert!(path.ends_with("bins.csv"));
                assert_eq!(*line, Some(4));
                assert_eq!(field.as_deref(), Some("sigma"));
            }
            other => panic!("unexpected error {other}"),
        }
        let n = t.sub("null");
        fixtures::write_null(&n, true);
        std::fs::write(n.join("null.json"), "{\"method\": \"phase\"").unwrap();
        fixtures::seal(&n);
        let e = plot_folder(&n, FigureFormat::Svg, None, &FigureOptions::default()).unwrap_err();
        assert!(
            matches!(&e, FigureError::Engine(ptacorr::Error::Input { path, line: Some(1), .. }) if path.ends_with("null.json")),
            "{e}"
        );
        fixtures::write_null(&n, true);
        fixtures::edit_json(&n.join("null.json"), |v| {
            v.as_object_mut().unwrap().remove("observed_snr");
        });
        let e = plot_folder(&n, FigureFormat::Svg, None, &FigureOptions::default()).unwrap_err();
        assert!(e.to_string().contains("observed_snr"), "{e}");
        let i = t.sub("inject");
        fixtures::write_inject(&i);
        let rec = std::fs::read_to_string(i.join("recovery.csv")).unwrap();
        std::fs::write(
            i.join("recovery.csv"),
            rec.replace("detection_probability", "p_det"),
        )
        .unwrap();
        fixtures::seal(&i);
        let e = plot_folder(&i, FigureFormat::Svg, None, &FigureOptions::default()).unwrap_err();
        assert!(
            matches!(&e, FigureError::Engine(ptacorr::Error::Input { field: Some(f), line: Some(1), .. }) if f == "detection_probability"),
            "{e}"
        );
    }

    #[test]
    fn out_of_range_angles_and_non_finite_values_are_refused() {
        let t = TempDir::new("bad-angles");
        let c = t.sub("corr");
        fixtures::write_correlate(&c);
        let pairs = std::fs::read_to_string(c.join("pairs.csv")).unwrap();
        let mut lines: Vec<String> = pairs.lines().map(str::to_string).collect();
        let mut cells: Vec<String> = lines[1].split(',').map(str::to_string).collect();
        cells[2] = "181.5".to_string();
        lines[1] = cells.join(",");
        std::fs::write(c.join("pairs.csv"), lines.join("\n")).unwrap();
        fixtures::seal(&c);
        let e = plot_folder(&c, FigureFormat::Svg, None, &FigureOptions::default()).unwrap_err();
        assert!(
            matches!(&e, FigureError::InvalidCell { line: 2, column, .. } if column == "angle_deg"),
            "{e}"
        );
        fixtures::write_correlate(&c);
        let bins = std::fs::read_to_string(c.join("bins.csv")).unwrap();
        let mut lines: Vec<String> = bins.lines().map(str::to_string).collect();
        let mut cells: Vec<String> = lines[2].split(',').map(str::to_string).collect();
        cells[4] = "NaN".to_string();
        lines[2] = cells.join(",");
        std::fs::write(c.join("bins.csv"), lines.join("\n")).unwrap();
        fixtures::seal(&c);
        let e = plot_folder(&c, FigureFormat::Svg, None, &FigureOptions::default()).unwrap_err();
        assert!(
            matches!(&e, FigureError::InvalidCell { line: 3, column, .. } if column == "rho"),
            "{e}"
        );
    }

    #[test]
    fn png_has_the_column_size_and_text_renders_without_system_fonts() {
        let t = TempDir::new("angular-png");
        let c = t.sub("corr");
        fixtures::write_correlate(&c);
        for (width, dpi) in [(ColumnWidth::Single, 300.0), (ColumnWidth::Double, 150.0)] {
            let opts = FigureOptions {
                width,
                png_dpi: dpi,
                show_pairs: true,
                ..Default::default()
            };
            let out = plot_folder(&c, FigureFormat::Png, Some(&t.sub("out")), &opts).unwrap();
            let bytes = std::fs::read(&out[0]).unwrap();
            let (w, h, rgb) = png_size(&bytes);
            assert_eq!(w, (width.inches() * dpi).round() as u32);
            let side = sidecar(&out[1]);
            let h_in = side["size_in"][1].as_f64().unwrap();
            assert_eq!(h, (h_in * dpi).round() as u32);
            // usvg is given no font database at all; the caption box must still hold ink.
            let cap: Vec<f64> = side["caption_box_pt"]
                .as_array()
                .unwrap()
                .iter()
                .map(|v| v.as_f64().unwrap())
                .collect();
            assert!(cap[2] > 20.0 && cap[3] > 4.0, "caption box {cap:?}");
            let ink = ink_in(&rgb, w, dpi, &cap);
            let area = (cap[2] * cap[3]) * (dpi / 72.0).powi(2);
            assert!(
                ink as f64 > 0.02 * area,
                "caption has {ink} inked pixels of {area}"
            );
            // The strip just below the caption is blank (the check can tell ink from none).
            let margin = [cap[0], cap[1] + cap[3] + 1.0, cap[2], 2.0];
            assert_eq!(ink_in(&rgb, w, dpi, &margin), 0);
        }
    }

    #[test]
    fn null_figure_marks_observed_and_overlays_analytic_density() {
        let t = TempDir::new("null-fig");
        let n = t.sub("null");
        fixtures::write_null(&n, true);
        let out = plot_folder(&n, FigureFormat::Svg, None, &FigureOptions::default()).unwrap();
        assert!(out[0].ends_with("null-distribution.svg"));
        let svg = std::fs::read_to_string(&out[0]).unwrap();
        let side = sidecar(&out[1]);
        let counts = side["histogram"]["counts"].as_array().unwrap();
        let total: u64 = counts.iter().map(|c| c.as_u64().unwrap()).sum();
        assert_eq!(total as usize, fixtures::NULL_TRIALS);
        assert_eq!(class_count(&svg, "hist-bar"), counts.len());
        assert_eq!(class_count(&svg, "observed-line"), 1);
        assert_eq!(class_count(&svg, "analytic-density"), 1);
        // Densities integrate to one over the histogram.
        let edges = side["histogram"]["edges"].as_array().unwrap();
        let dens = side["histogram"]["density"].as_array().unwrap();
        let integral: f64 = (0..dens.len())
            .map(|i| {
                dens[i].as_f64().unwrap()
                    * (edges[i + 1].as_f64().unwrap() - edges[i].as_f64().unwrap())
            })
            .sum();
        assert!((integral - 1.0).abs() < 1e-9);
        assert!(side["caption"].as_str().unwrap().contains("one-sided"));
        // Without analytic density there is no curve.
        fixtures::write_null(&n, false);
        let out = plot_folder(&n, FigureFormat::Svg, None, &FigureOptions::default()).unwrap();
        let svg = std::fs::read_to_string(&out[0]).unwrap();
        assert_eq!(class_count(&svg, "analytic-density"), 0);
    }

    #[test]
    fn recovery_figure_plots_each_positive_row_in_both_panels() {
        let t = TempDir::new("inject-fig");
        let i = t.sub("inject");
        fixtures::write_inject(&i);
        for width in [ColumnWidth::Single, ColumnWidth::Double] {
            let opts = FigureOptions {
                width,
                ..Default::default()
            };
            let out = plot_folder(&i, FigureFormat::Svg, None, &opts).unwrap();
            let svg = std::fs::read_to_string(&out[0]).unwrap();
            let side = sidecar(&out[1]);
            let positive = fixtures::INJECT_ROWS - 1;
            assert_eq!(side["recovery"].as_array().unwrap().len(), positive);
            assert_eq!(side["omitted_zero_rows"].as_u64(), Some(1));
            assert_eq!(class_count(&svg, "recovery-marker"), positive);
            assert_eq!(class_count(&svg, "recovery-errorbar"), positive);
            assert_eq!(class_count(&svg, "detection-marker"), positive);
            assert_eq!(class_count(&svg, "identity-line"), 1);
            assert_eq!(class_count(&svg, "fap-label"), 1);
            let below = side["recovery"]
                .as_array()
                .unwrap()
                .iter()
                .filter(|r| r["placement"] == "below_axis")
                .count();
            assert_eq!(below, 1, "the fixture's weakest row has a negative mean");
            let det = &side["detection"][0];
            let p = det["detection_probability"].as_f64().unwrap();
            let n = det["realizations"].as_f64().unwrap();
            assert!((det["error"].as_f64().unwrap() - (p * (1.0 - p) / n).sqrt()).abs() < 1e-12);
        }
    }

    #[test]
    fn pdf_output_is_a_deterministic_pdf() {
        let t = TempDir::new("pdf");
        let i = t.sub("inject");
        fixtures::write_inject(&i);
        let a = plot_folder(
            &i,
            FigureFormat::Pdf,
            Some(&t.sub("a")),
            &FigureOptions::default(),
        )
        .unwrap();
        let b = plot_folder(
            &i,
            FigureFormat::Pdf,
            Some(&t.sub("b")),
            &FigureOptions::default(),
        )
        .unwrap();
        let pa = std::fs::read(&a[0]).unwrap();
        assert!(pa.starts_with(b"%PDF-"));
        assert_eq!(pa, std::fs::read(&b[0]).unwrap());
        // 3.4 in = 244.8 pt page width.
        let text = String::from_utf8_lossy(&pa);
        assert!(text.contains("/MediaBox [0 0 244.8"), "media box missing");
    }

    /// Issue 9.8: every figure of every kind, in every format, twice over, gives the same
    /// bytes. Each draw builds new hash maps inside the PDF writer (new random keys), so a
    /// resource dictionary written in hash order differs between the two; the correlate figure
    /// with its pairs has dozens of graphics states, so the check can fail.
    #[test]
    fn every_figure_in_every_format_is_byte_identical_twice() {
        let t = TempDir::new("twice");
        let dirs = [t.sub("corr"), t.sub("null"), t.sub("inject")];
        fixtures::write_correlate(&dirs[0]);
        fixtures::write_null(&dirs[1], true);
        fixtures::write_inject(&dirs[2]);
        let opts = FigureOptions {
            show_pairs: true,
            ..Default::default()
        };
        let mut n_files = 0;
        for (k, dir) in dirs.iter().enumerate() {
            for format in [FigureFormat::Svg, FigureFormat::Png, FigureFormat::Pdf] {
                let ext = format.extension();
                let a =
                    plot_folder(dir, format, Some(&t.sub(&format!("{k}-{ext}-a"))), &opts).unwrap();
                let b =
                    plot_folder(dir, format, Some(&t.sub(&format!("{k}-{ext}-b"))), &opts).unwrap();
                assert_eq!(a.len(), b.len());
                for (x, y) in a.iter().zip(&b) {
                    let (bx, by) = (std::fs::read(x).unwrap(), std::fs::read(y).unwrap());
                    assert!(bx == by, "{} and {} differ", x.display(), y.display());
                    n_files += 1;
                }
            }
        }
        assert_eq!(
            n_files, 18,
            "three kinds x three formats x (figure, sidecar)"
        );
        // The correlate PDF holds a resource dictionary with many entries (so order matters).
        let pdf = std::fs::read(t.sub("0-pdf-a").join("angular-correlation.pdf")).unwrap();
        let text = String::from_utf8_lossy(&pdf);
        let gs = text.lines().filter(|l| l.trim().starts_with("/gs")).count();
        assert!(gs >= 2, "only {gs} graphics states in the correlate PDF");
    }

    #[test]
    fn pdf_resources_are_sorted_without_moving_any_offset() {
        let pdf = b"%PDF-1.7\n1 0 obj\n<<\n  /Resources <<\n    /ExtGState <<\n      /gs10 12 0 R\n      /gs2 4 0 R\n      /gs1 3 0 R\n    >>\n  >>\n>>\nendobj\n2 0 obj\n<< /Length 3 >>\nstream\n/ExtGState <<\n/b 1 0 R\n/a 2 0 R\n>>\nendstream\nendobj\n";
        let sorted = sort_pdf_resources(pdf);
        assert_eq!(sorted.len(), pdf.len());
        let text = String::from_utf8(sorted).unwrap();
        let want =
            "    /ExtGState <<\n      /gs1 3 0 R\n      /gs2 4 0 R\n      /gs10 12 0 R\n    >>\n";
        assert!(text.contains(want), "{text}");
        // Inside a stream nothing moves.
        assert!(text.contains("stream\n/ExtGState <<\n/b 1 0 R\n/a 2 0 R\n>>\nendstream"));
        // Sorting twice changes nothing.
        assert_eq!(sort_pdf_resources(text.as_bytes()), text.as_bytes());
    }

    /// Issue 9.2: a folder whose files do not match its manifest (mixed runs, an edit) or that
    /// has no manifest is refused before anything is drawn, with the file named.
    #[test]
    fn folders_that_are_not_one_output_set_are_refused() {
        let t = TempDir::new("manifest");
        let c = t.sub("corr");
        fixtures::write_correlate(&c);
        let bins = std::fs::read_to_string(c.join("bins.csv")).unwrap();
        std::fs::write(c.join("bins.csv"), bins.replace(",", ", ")).unwrap();
        let e = plot_folder(&c, FigureFormat::Svg, None, &FigureOptions::default()).unwrap_err();
        assert!(matches!(e, FigureError::Engine(_)), "{e}");
        assert!(e.to_string().contains("bins.csv"), "{e}");
        std::fs::remove_file(c.join("manifest.json")).unwrap();
        let e = plot_folder(&c, FigureFormat::Svg, None, &FigureOptions::default()).unwrap_err();
        assert!(e.to_string().contains("manifest.json"), "{e}");
        let out = t.sub("report");
        let e = crate::report::build_report(std::slice::from_ref(&c), &out).unwrap_err();
        assert!(e.to_string().contains("manifest.json"), "{e}");
    }

    #[test]
    fn options_are_checked() {
        let t = TempDir::new("opts");
        let c = t.sub("corr");
        fixtures::write_correlate(&c);
        let opts = FigureOptions {
            png_dpi: 0.0,
            ..Default::default()
        };
        let e = plot_folder(&c, FigureFormat::Png, None, &opts).unwrap_err();
        assert!(matches!(
            e,
            FigureError::InvalidOption {
                option: "png_dpi",
                ..
            }
        ));
        assert!("tiff".parse::<FigureFormat>().is_err());
        assert_eq!("PNG".parse::<FigureFormat>().unwrap(), FigureFormat::Png);
    }

    #[test]
    fn atomic_write_replaces_and_leaves_no_temporary() {
        let t = TempDir::new("atomic");
        let p = t.path().join("f.txt");
        write_atomic(&p, b"one").unwrap();
        write_atomic(&p, b"two").unwrap();
        assert_eq!(std::fs::read(&p).unwrap(), b"two");
        let names: Vec<_> = std::fs::read_dir(t.path())
            .unwrap()
            .map(|e| e.unwrap().file_name())
            .collect();
        assert_eq!(names.len(), 1, "{names:?}");
        // The engine's writer creates a missing folder; a parent that is a file is an error.
        write_atomic(&t.path().join("missing").join("x"), b"x").unwrap();
        let e = write_atomic(&p.join("x"), b"x").unwrap_err();
        assert!(
            matches!(e, FigureError::Engine(ptacorr::Error::Io { .. })),
            "{e}"
        );
    }
}
