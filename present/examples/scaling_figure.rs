//! The scaling figure of `benchmarks/run --full` through the project's figure code:
//!
//!     cargo run --release -p ptacorr-present --example scaling_figure -- SCALING.csv OUT_DIR
//!
//! writes OUT_DIR/scaling.svg, scaling.png and the sidecar scaling.json.

use std::path::PathBuf;

fn main() {
    let args: Vec<PathBuf> = std::env::args_os().skip(1).map(PathBuf::from).collect();
    let [csv, out] = args.as_slice() else {
        eprintln!("usage: scaling_figure SCALING.csv OUT_DIR");
        std::process::exit(2);
    };
    match ptacorr_present::figure::plot_scaling(csv, out) {
        Ok(files) => {
            for f in files {
                println!("wrote {}", f.display());
            }
        }
        Err(e) => {
            eprintln!("error: {e}");
            std::process::exit(1);
        }
    }
}
