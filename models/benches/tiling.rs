//! Run time of the `tiling` model against tissue size (plain std::time, no
//! harness). Run with `cargo bench -p tessera-worker --bench tiling`; results
//! go to docs/benchmarks.md by hand.
//!
//! Two series: the whole model at the default density and height while the
//! layer grows (cells and voxels grow together), and placement plus spacing
//! statistics alone (no growth time) for many cells.

use std::sync::atomic::AtomicBool;
use std::time::{Duration, Instant};

use tessera_models::tiling::{simulate, Params};

fn time_runs(p: &Params, reps: u64) -> (Duration, usize, usize, u64) {
    let stop = AtomicBool::new(false);
    // One warm-up run (page faults of the first allocation).
    let warm = simulate(p, 0, &stop).expect("valid parameters");
    let t0 = Instant::now();
    for seed in 1..=reps {
        let o = simulate(p, seed, &stop).expect("valid parameters");
        std::hint::black_box(&o.metrics);
    }
    let (nx, ny, nz) = warm.grid;
    (
        t0.elapsed() / reps as u32,
        warm.cells,
        nx * ny * nz,
        warm.attempts,
    )
}

fn main() {
    println!("full model (defaults: density 25 /10^4 um^2, 40 um layer, 2 um voxels, 48 h)");
    println!("| layer width (um) | cells | voxels | claim attempts per voxel | time per run (ms) | ns per voxel |");
    println!("|---:|---:|---:|---:|---:|---:|");
    for (width, reps) in [(100.0, 20), (200.0, 10), (400.0, 5), (800.0, 3)] {
        let p = Params {
            layer_width: width,
            ..Params::default()
        };
        let (t, cells, voxels, attempts) = time_runs(&p, reps);
        println!(
            "| {width} | {cells} | {voxels} | {:.2} | {:.1} | {:.0} |",
            attempts as f64 / voxels as f64,
            t.as_secs_f64() * 1e3,
            t.as_secs_f64() * 1e9 / voxels as f64
        );
    }
    println!();
    println!("placement and spacing statistics only (duration 0 h, exclusion 10 um)");
    println!("| layer width (um) | cells | time per run (ms) | us per cell |");
    println!("|---:|---:|---:|---:|");
    for (width, reps) in [(400.0, 10), (1000.0, 5), (2000.0, 3)] {
        let p = Params {
            layer_width: width,
            duration_h: 0.0,
            layer_thickness: 2.0,
            ..Params::default()
        };
        let (t, cells, _, _) = time_runs(&p, reps);
        println!(
            "| {width} | {cells} | {:.1} | {:.2} |",
            t.as_secs_f64() * 1e3,
            t.as_secs_f64() * 1e6 / cells as f64
        );
    }
}
