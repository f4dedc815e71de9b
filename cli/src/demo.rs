//! `ptacorr demo`: simulate the built-in demo array and analyse it.

use anyhow::Result;
use ptacorr::analysis::CorrelateSettings;
use ptacorr::scenario::{lay_out, Scenario};
use ptacorr::simulate::simulate_scenario;
use std::path::Path;

/// The demo scenario, shipped inside the binary (also at simulations/demo.toml).
pub const DEMO_SCENARIO: &str = include_str!("../../simulations/demo.toml");

pub fn run(out: &Path, seed: u64) -> Result<()> {
    let scenario = Scenario::parse(DEMO_SCENARIO, Path::new("simulations/demo.toml"))?;
    let release_dir = out.join("release");
    let analysis_dir = out.join("correlate");
    let layout = lay_out(&scenario, seed);
    let pulsars = simulate_scenario(&layout, seed, &release_dir)?;
    outln!(
        "simulated the demo array: {} pulsars, {} TOAs (seed {seed}) -> {}",
        pulsars.len(),
        ptacorr::release::total_toas(&pulsars),
        release_dir.display()
    );
    let settings = CorrelateSettings::default();
    let (rel, c) = crate::correlate_release(&release_dir, &settings)?;
    c.write(&analysis_dir, &rel, &settings)?;
    crate::print_summary(&rel, &c);
    let figure_dir = out.join("figures");
    let opts = ptacorr_present::figure::FigureOptions {
        show_pairs: true,
        ..Default::default()
    };
    ptacorr_present::figure::plot_folder(
        &analysis_dir,
        ptacorr_present::figure::FigureFormat::Png,
        Some(&figure_dir),
        &opts,
    )?;
    let report = ptacorr_present::report::build_report(
        std::slice::from_ref(&analysis_dir),
        &out.join("report"),
    )?;
    outln!("wrote the analysis to {}", analysis_dir.display());
    outln!(
        "wrote the figure to {}",
        figure_dir.join("angular-correlation.png").display()
    );
    outln!("wrote the report to {}", report.display());
    Ok(())
}
