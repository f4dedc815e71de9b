//! `ptacorr plot` and `ptacorr report`: figures and the memo-ready report from output folders.

use anyhow::{bail, Context, Result};
use ptacorr_present::figure::{plot_folder, ColumnWidth, FigureFormat, FigureOptions};
use ptacorr_present::report::build_report_with;
use std::path::{Path, PathBuf};

/// A figure file format.
#[derive(Clone, Copy, clap::ValueEnum)]
pub enum FormatArg {
    Svg,
    Png,
    Pdf,
}

impl From<FormatArg> for FigureFormat {
    fn from(f: FormatArg) -> Self {
        match f {
            FormatArg::Svg => FigureFormat::Svg,
            FormatArg::Png => FigureFormat::Png,
            FormatArg::Pdf => FigureFormat::Pdf,
        }
    }
}

#[derive(clap::Args)]
pub struct PlotArgs {
    /// An output folder of `correlate`, `null`, `inject` or `noise`.
    pub dir: PathBuf,
    #[arg(long, value_enum, default_value_t = FormatArg::Svg)]
    pub format: FormatArg,
    /// Where to write: a folder, or a file name ending in the format's extension (one figure).
    #[arg(long)]
    pub out: Option<PathBuf>,
    #[command(flatten)]
    pub style: StyleArgs,
}

#[derive(clap::Args)]
pub struct ReportArgs {
    /// Output folders of `correlate`, `null`, `inject` and `noise` to gather.
    #[arg(required = true)]
    pub dirs: Vec<PathBuf>,
    #[arg(long)]
    pub out: PathBuf,
    #[command(flatten)]
    pub style: StyleArgs,
}

#[derive(clap::Args)]
pub struct StyleArgs {
    /// Plot rho divided by the fitted Hellings-Downs amplitude instead of in units of A^2.
    #[arg(long)]
    pub normalised: bool,
    /// Leave out the faint points of individual pairs.
    #[arg(long)]
    pub no_pairs: bool,
    /// Full page width (7.0 in) instead of one column (3.4 in).
    #[arg(long)]
    pub double_column: bool,
    /// PNG resolution in dots per inch.
    #[arg(long, default_value_t = 300.0)]
    pub dpi: f64,
}

impl StyleArgs {
    pub fn options(&self) -> FigureOptions {
        FigureOptions {
            normalised: self.normalised,
            show_pairs: !self.no_pairs,
            width: if self.double_column {
                ColumnWidth::Double
            } else {
                ColumnWidth::Single
            },
            png_dpi: self.dpi,
        }
    }
}

pub fn plot(args: &PlotArgs) -> Result<()> {
    let format = FigureFormat::from(args.format);
    let opts = args.style.options();
    let as_file = args
        .out
        .as_ref()
        .filter(|p| p.extension().is_some_and(|e| e == format.extension()));
    let out_dir: Option<PathBuf> = match (&args.out, as_file) {
        (_, Some(f)) => Some(
            f.parent()
                .filter(|p| !p.as_os_str().is_empty())
                .unwrap_or(Path::new("."))
                .to_path_buf(),
        ),
        (Some(d), None) => Some(d.clone()),
        (None, None) => None,
    };
    let written = plot_folder(&args.dir, format, out_dir.as_deref(), &opts)
        .with_context(|| format!("plotting {}", args.dir.display()))?;
    let figures: Vec<&PathBuf> = written
        .iter()
        .filter(|p| p.extension().is_some_and(|e| e == format.extension()))
        .collect();
    if let Some(target) = as_file {
        if figures.len() != 1 {
            bail!(
                "{} holds {} figures; give --out a folder",
                args.dir.display(),
                figures.len()
            );
        }
        std::fs::rename(figures[0], target)
            .with_context(|| format!("writing {}", target.display()))?;
        outln!("wrote {}", target.display());
    } else {
        for f in written {
            outln!("wrote {}", f.display());
        }
    }
    Ok(())
}

pub fn report(args: &ReportArgs) -> Result<PathBuf> {
    let md = build_report_with(&args.dirs, &args.out, &args.style.options())
        .context("building the report")?;
    outln!(
        "wrote {} (and report.html, tables.tex, figures)",
        md.display()
    );
    Ok(md)
}
