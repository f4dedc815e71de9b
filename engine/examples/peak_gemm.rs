//! The machine's floating-point limit as the benchmark uses it: a large square dgemm through
//! the same OpenBLAS the engine links, on 1 thread and on 2 threads (best of `reps`).
//!
//!     cargo run --release -p ptacorr-engine --example peak_gemm -- [N] [REPS]
//!
//! Prints `threads T: best G GFlop/s` lines (2 N^3 operations per product).

use ndarray::Array2;
use ptacorr::linalg::set_blas_threads;
use std::time::Instant;

fn main() {
    let mut args = std::env::args().skip(1);
    let n: usize = args.next().and_then(|a| a.parse().ok()).unwrap_or(4000);
    let reps: usize = args.next().and_then(|a| a.parse().ok()).unwrap_or(3);
    let a = Array2::from_shape_fn((n, n), |(i, j)| ((i * 7 + j * 13) % 101) as f64 / 101.0);
    let b = Array2::from_shape_fn((n, n), |(i, j)| ((i * 11 + j * 3) % 97) as f64 / 97.0);
    let flops = 2.0 * (n as f64).powi(3);
    for threads in [1, 2] {
        set_blas_threads(threads);
        let _warm = a.dot(&b);
        let mut best = f64::INFINITY;
        for _ in 0..reps {
            let t = Instant::now();
            let c = a.dot(&b);
            best = best.min(t.elapsed().as_secs_f64());
            assert!(c[[0, 0]].is_finite());
        }
        println!(
            "threads {threads}: best {:.1} GFlop/s ({n}^3 dgemm in {best:.3} s)",
            flops / best * 1e-9
        );
    }
}
