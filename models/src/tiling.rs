//! The built-in `tiling` model: glia-like cells grow processes that claim
//! territory in a 3-D layer of tissue, competing for space.
//!
//! Our own design; the full description (equations, units, defaults, limits)
//! is in `docs/tiling-model.md`. In short:
//!
//! 1. **Placement.** `N = round(density * W^2 / 10^4)` cell bodies are placed
//!    on the basal face of a `W x W x T` layer (periodic in x and y) by random
//!    sequential adsorption: each new cell draws its own minimal distance
//!    `d_i ~ Normal(exclusion, exclusion_sd)` (clipped to `[0, exclusion +
//!    3 exclusion_sd]`) and is accepted at a uniform random position only if
//!    no placed body is closer than `d_i`. After 100 rejected tries `d_i`
//!    shrinks by 10% (the cell is counted as "relaxed").
//! 2. **Heights.** Each cell's mature height `h_i ~ Normal(height_mean,
//!    height_sd)`, clipped to `[voxel, T]`.
//! 3. **Growth.** The layer is a voxel grid; a voxel belongs to at most one
//!    cell (contact inhibition: claimed space blocks others). Time advances in
//!    steps `dt = voxel / (2 growth_rate)`. In each step, in a fresh random
//!    order of cells, every free voxel that shares a face with a cell's
//!    territory and is admissible for that cell (below its height, within
//!    `reach` of its body laterally) is claimed with probability
//!    `p = 1/2 * exp(-contact_inhibition * n_foreign)`, where `n_foreign` is
//!    the number of its face neighbours owned by other cells. With no
//!    neighbours a front thus advances on average `growth_rate` um/h along the
//!    grid axes.
//! 4. **Readouts** after `duration_h`: territory volumes, coverage of the
//!    layer, and the spacing statistics of the bodies.
//!
//! Spatial indexes: the voxel occupancy grid (a flat array) for growth, and a
//! hash grid of cell bodies (bins at least as large as the largest minimal
//! distance) for placement and nearest-neighbour distances. Cost is linear
//! in the number of voxels plus the number of cells.

use std::f64::consts::PI;
use std::sync::atomic::AtomicBool;

use rand::seq::SliceRandom;
use rand::{Rng, SeedableRng};
use rand_chacha::ChaCha8Rng;
use rand_distr::{Distribution, StandardNormal};

use super::{is_stopped, stopped, InputInfo, Inputs, Limit, MetricInfo, ModelInfo};
use crate::outcome::{FailureKind, Metrics, RunFailure};

/// Model name.
pub const NAME: &str = "tiling";

/// Largest voxel grid a run may allocate (8 bytes per voxel).
pub const MAX_VOXELS: usize = 20_000_000;
/// Largest number of cells in a layer.
pub const MAX_CELLS: usize = 200_000;
/// Rejected placement tries before a cell's minimal distance shrinks.
const TRIES_BEFORE_RELAXING: u32 = 100;
/// Factor by which a crowded cell's minimal distance shrinks.
const RELAX_FACTOR: f64 = 0.9;
/// Claim probability per step for an uninhibited free neighbour.
const P_STEP: f64 = 0.5;

/// Largest packing fraction of the bodies' exclusion discs at which placement
/// stays as drawn: at 0.45 and below, at most 5% of cells had their minimal
/// distance relaxed in our own runs at densities 25 to 60 per 10^4 um^2
/// (docs/tiling-model.md); the jamming limit of random sequential adsorption,
/// about 0.547 (from memory), is the hard ceiling.
pub const MAX_PACKING: f64 = 0.45;

/// Packing fraction of the exclusion discs: density * pi * exclusion^2 / (4 * 10^4).
pub fn packing_fraction(density: f64, exclusion: f64) -> f64 {
    density * PI * exclusion * exclusion / 4e4
}

/// Inputs and metrics of the tiling model.
pub fn info() -> ModelInfo {
    let i = |name, lo, hi, default, unit, description| InputInfo {
        name,
        lo,
        hi,
        default,
        unit,
        integer: false,
        description,
    };
    // Every metric is non-negative; fractions are also at most 1.
    let m = |name, unit, lo, hi: f64, description| MetricInfo {
        name,
        unit,
        lo,
        hi,
        bounds: [Some(0.0), (hi == 1.0).then_some(1.0)],
        description,
    };
    ModelInfo {
        name: NAME,
        description: "glia-like cells grow processes that claim territory in a 3-D layer of tissue (our own model, see docs/tiling-model.md)",
        inputs: vec![
            i("density", 0.5, 400.0, 25.0, "cells/10^4 um^2", "cell bodies per 10,000 um^2 of layer"),
            i("exclusion", 0.0, 50.0, 10.0, "um", "mean minimal distance between cell bodies (0 = random placement)"),
            i("exclusion_sd", 0.0, 20.0, 2.0, "um", "cell-to-cell sd of the minimal distance"),
            i("height_mean", 1.0, 400.0, 30.0, "um", "mean mature height of a cell's territory"),
            i("height_sd", 0.0, 100.0, 5.0, "um", "cell-to-cell sd of the mature height"),
            i("growth_rate", 0.1, 100.0, 2.0, "um/h", "speed at which a free process front advances"),
            i("duration_h", 0.0, 1000.0, 48.0, "h", "simulated time of growth"),
            i("contact_inhibition", 0.0, 10.0, 1.0, "", "slowing of growth next to foreign territory: factor exp(-k n) for n foreign face neighbours"),
            i("reach", 1.0, 500.0, 30.0, "um", "largest lateral distance of a process from its cell body"),
            i("layer_width", 10.0, 2000.0, 200.0, "um", "side of the square layer (periodic in x and y)"),
            i("layer_thickness", 1.0, 400.0, 40.0, "um", "thickness of the layer; heights are capped to it"),
            i("voxel", 0.5, 20.0, 2.0, "um", "edge of a voxel of the occupancy grid"),
        ],
        metrics: vec![
            m("territory_cv", "", 0.0, 100.0, "sd / mean of territory volumes"),
            m("coverage", "", 0.0, 1.0, "fraction of the layer's volume claimed by some cell"),
            m("mean_territory", "um^3", 0.0, 1.6e9, "mean territory volume"),
            m("nn_regularity", "", 0.0, 1e6, "regularity index: mean / sd of nearest-neighbour distances between cell bodies"),
            m("clark_evans", "", 0.0, 2.2, "Clark-Evans index: mean nearest-neighbour distance over its value for a random pattern"),
            m("placement_relaxed", "", 0.0, 1.0, "fraction of cells placed closer than their drawn minimal distance because the layer was crowded"),
        ],
        limits: vec![Limit {
            what: "packing fraction of the cell bodies' exclusion discs, density * pi * exclusion^2 / (4 * 10^4)",
            inputs: &["density", "exclusion"],
            value: |get| packing_fraction(get("density"), get("exclusion")),
            max: MAX_PACKING,
            beyond: "the layer is crowded: many cells are placed closer than drawn (placement_relaxed above 5%), so the model measures a different placement rule there (docs/tiling-model.md, 'Crowded placement')",
        }],
    }
}

/// The inputs of one run, in the units of [`info`].
#[derive(Clone, Debug, PartialEq)]
pub struct Params {
    /// Cells per 10^4 um^2.
    pub density: f64,
    /// Mean minimal distance between bodies, um.
    pub exclusion: f64,
    /// Sd of the minimal distance, um.
    pub exclusion_sd: f64,
    /// Mean mature height, um.
    pub height_mean: f64,
    /// Sd of the mature height, um.
    pub height_sd: f64,
    /// Front speed, um/h.
    pub growth_rate: f64,
    /// Simulated time, h.
    pub duration_h: f64,
    /// Inhibition per foreign face neighbour (dimensionless).
    pub contact_inhibition: f64,
    /// Lateral reach of processes, um.
    pub reach: f64,
    /// Side of the layer, um.
    pub layer_width: f64,
    /// Thickness of the layer, um.
    pub layer_thickness: f64,
    /// Voxel edge, um.
    pub voxel: f64,
}

impl Default for Params {
    /// The defaults of [`info`].
    fn default() -> Self {
        let info = info();
        let d = |n: &str| info.input(n).map(|i| i.default).unwrap_or(f64::NAN);
        Params::from_fn(d)
    }
}

impl Params {
    fn from_fn(g: impl Fn(&str) -> f64) -> Self {
        Params {
            density: g("density"),
            exclusion: g("exclusion"),
            exclusion_sd: g("exclusion_sd"),
            height_mean: g("height_mean"),
            height_sd: g("height_sd"),
            growth_rate: g("growth_rate"),
            duration_h: g("duration_h"),
            contact_inhibition: g("contact_inhibition"),
            reach: g("reach"),
            layer_width: g("layer_width"),
            layer_thickness: g("layer_thickness"),
            voxel: g("voxel"),
        }
    }

    /// From validated inputs.
    pub fn from_inputs(inputs: &Inputs) -> Self {
        Params::from_fn(|n| inputs.get(n))
    }
}

/// What a run produced, beyond the metrics: for tests and benchmarks.
#[derive(Clone, Debug, PartialEq)]
pub struct Outcome {
    /// The metrics as reported.
    pub metrics: Metrics,
    /// Number of cells.
    pub cells: usize,
    /// Grid size (x, y, z) in voxels.
    pub grid: (usize, usize, usize),
    /// Territory volume of each cell, um^3.
    pub volumes: Vec<f64>,
    /// Mature height of each cell, um (after clipping).
    pub heights: Vec<f64>,
    /// Cell body positions (x, y), um.
    pub bodies: Vec<(f64, f64)>,
    /// Growth steps taken.
    pub steps: usize,
    /// Claim attempts made (a measure of the work done).
    pub attempts: u64,
}

/// Runs the model from validated inputs.
pub(crate) fn run(inputs: &Inputs, seed: u64, stop: &AtomicBool) -> Result<Metrics, RunFailure> {
    simulate(&Params::from_inputs(inputs), seed, stop).map(|o| o.metrics)
}

fn bad(reason: String) -> RunFailure {
    RunFailure::new(FailureKind::BadInput, reason)
}

/// Runs the model. Deterministic for `(params, seed)`. Returns
/// [`FailureKind::BadInput`] for a layer that is too large or holds fewer
/// than 3 cells, [`FailureKind::Cancelled`] when `stop` is set.
pub fn simulate(p: &Params, seed: u64, stop: &AtomicBool) -> Result<Outcome, RunFailure> {
    let nx = ((p.layer_width / p.voxel).round() as usize).max(1);
    let nz = ((p.layer_thickness / p.voxel).round() as usize).max(1);
    let voxels = nx.saturating_mul(nx).saturating_mul(nz);
    if voxels > MAX_VOXELS {
        return Err(bad(format!(
            "the layer is {nx} x {nx} x {nz} = {voxels} voxels, more than {MAX_VOXELS}: \
             use a larger voxel, a smaller layer_width or a thinner layer"
        )));
    }
    let width = nx as f64 * p.voxel;
    let n_cells = (p.density * width * width / 1e4).round() as usize;
    if n_cells < 3 {
        return Err(bad(format!(
            "a {width} um layer at density {} holds {n_cells} cell(s); at least 3 are needed: \
             raise density or layer_width",
            p.density
        )));
    }
    if n_cells > MAX_CELLS {
        return Err(bad(format!(
            "a {width} um layer at density {} holds {n_cells} cells, more than {MAX_CELLS}",
            p.density
        )));
    }
    let mut rng = ChaCha8Rng::seed_from_u64(seed);

    let placement = place_bodies(p, width, n_cells, &mut rng, stop)?;
    let bodies = placement.bodies;

    let thickness = nz as f64 * p.voxel;
    let heights: Vec<f64> = (0..n_cells)
        .map(|_| {
            let z: f64 = StandardNormal.sample(&mut rng);
            (p.height_mean + p.height_sd * z).clamp(p.voxel, thickness)
        })
        .collect();

    let grown = grow(p, nx, nz, &bodies, &heights, &mut rng, stop)?;

    let vox_vol = p.voxel.powi(3);
    let volumes: Vec<f64> = grown.counts.iter().map(|&c| c as f64 * vox_vol).collect();
    let (vol_mean, vol_sd) = mean_sd(&volumes);
    let nn = nearest_neighbour_distances(&bodies, width, &placement.grid);
    let (nn_mean, nn_sd) = mean_sd(&nn);
    let rho = n_cells as f64 / (width * width);

    let mut metrics = Metrics::new();
    metrics.insert("territory_cv".into(), vol_sd / vol_mean);
    metrics.insert("coverage".into(), grown.claimed as f64 / voxels as f64);
    metrics.insert("mean_territory".into(), vol_mean);
    metrics.insert("nn_regularity".into(), nn_mean / nn_sd);
    // Clark & Evans (1954): R = mean NN distance / (1 / (2 sqrt(rho))).
    metrics.insert("clark_evans".into(), nn_mean * 2.0 * rho.sqrt());
    metrics.insert(
        "placement_relaxed".into(),
        placement.relaxed as f64 / n_cells as f64,
    );
    if let Some((name, v)) = metrics.iter().find(|(_, v)| !v.is_finite()) {
        return Err(RunFailure::new(
            FailureKind::NonFinite,
            format!("metric {name:?} came out as {v} (degenerate layer: no territory grew, or all spacings equal)"),
        ));
    }
    Ok(Outcome {
        metrics,
        cells: n_cells,
        grid: (nx, nx, nz),
        volumes,
        heights,
        bodies,
        steps: grown.steps,
        attempts: grown.attempts,
    })
}

/// Mean and sample sd (n - 1).
fn mean_sd(x: &[f64]) -> (f64, f64) {
    let n = x.len() as f64;
    let mean = x.iter().sum::<f64>() / n;
    let var = x.iter().map(|v| (v - mean).powi(2)).sum::<f64>() / (n - 1.0);
    (mean, var.sqrt())
}

/// A hash grid of points on a periodic square of side `width`: `m x m` bins
/// of side `width / m`, each listing the indices of its points.
#[derive(Clone, Debug)]
struct BodyGrid {
    m: usize,
    bin: f64,
    bins: Vec<Vec<u32>>,
}

impl BodyGrid {
    /// Bins no smaller than `min_bin` (so a search of the 3 x 3 bins around
    /// a point finds every point within `min_bin`).
    fn new(width: f64, min_bin: f64, n_expected: usize) -> Self {
        // About 2 points per bin, but never bins smaller than `min_bin`.
        let by_count = ((n_expected as f64 / 2.0).sqrt().floor() as usize).max(1);
        let by_size = if min_bin > 0.0 {
            ((width / min_bin).floor() as usize).max(1)
        } else {
            by_count
        };
        let m = by_count.min(by_size).max(1);
        BodyGrid {
            m,
            bin: width / m as f64,
            bins: vec![Vec::new(); m * m],
        }
    }

    fn bin_of(&self, x: f64, y: f64) -> (usize, usize) {
        let bx = ((x / self.bin) as usize).min(self.m - 1);
        let by = ((y / self.bin) as usize).min(self.m - 1);
        (bx, by)
    }

    fn insert(&mut self, i: u32, x: f64, y: f64) {
        let (bx, by) = self.bin_of(x, y);
        self.bins[by * self.m + bx].push(i);
    }

    /// Distinct bins within `r` bins of `(bx, by)` (periodic), as indices.
    fn ring_bins(&self, bx: usize, by: usize, r: usize, out: &mut Vec<usize>) {
        out.clear();
        let m = self.m as isize;
        let r = r as isize;
        for dy in -r..=r {
            for dx in -r..=r {
                if dx.abs().max(dy.abs()) != r {
                    continue;
                }
                let x = (bx as isize + dx).rem_euclid(m) as usize;
                let y = (by as isize + dy).rem_euclid(m) as usize;
                out.push(y * self.m + x);
            }
        }
        out.sort_unstable();
        out.dedup();
    }
}

/// Squared distance on the periodic square of side `w`.
fn torus_d2(a: (f64, f64), b: (f64, f64), w: f64) -> f64 {
    let mut dx = (a.0 - b.0).abs();
    let mut dy = (a.1 - b.1).abs();
    if dx > 0.5 * w {
        dx = w - dx;
    }
    if dy > 0.5 * w {
        dy = w - dy;
    }
    dx * dx + dy * dy
}

struct Placement {
    bodies: Vec<(f64, f64)>,
    relaxed: usize,
    grid: BodyGrid,
}

/// Random sequential adsorption with a minimal distance per cell.
fn place_bodies(
    p: &Params,
    width: f64,
    n: usize,
    rng: &mut ChaCha8Rng,
    stop: &AtomicBool,
) -> Result<Placement, RunFailure> {
    let d_max = if p.exclusion > 0.0 {
        p.exclusion + 3.0 * p.exclusion_sd
    } else {
        0.0
    };
    let mut grid = BodyGrid::new(width, d_max, n);
    let mut bodies: Vec<(f64, f64)> = Vec::with_capacity(n);
    let mut relaxed = 0;
    let mut near = Vec::new();
    let search_rings = if grid.m >= 3 { 1 } else { grid.m };
    for i in 0..n {
        if is_stopped(stop) {
            return Err(stopped(NAME));
        }
        let mut d = if p.exclusion > 0.0 {
            let z: f64 = StandardNormal.sample(rng);
            (p.exclusion + p.exclusion_sd * z).clamp(0.0, d_max)
        } else {
            0.0
        };
        let mut tries = 0;
        let mut was_relaxed = false;
        let pos = loop {
            let c = (rng.random::<f64>() * width, rng.random::<f64>() * width);
            if d <= 0.0 {
                break c;
            }
            let (bx, by) = grid.bin_of(c.0, c.1);
            let d2 = d * d;
            let mut clash = false;
            'rings: for r in 0..=search_rings {
                grid.ring_bins(bx, by, r, &mut near);
                for &b in &near {
                    if grid.bins[b]
                        .iter()
                        .any(|&j| torus_d2(c, bodies[j as usize], width) < d2)
                    {
                        clash = true;
                        break 'rings;
                    }
                }
            }
            if !clash {
                break c;
            }
            tries += 1;
            if tries == TRIES_BEFORE_RELAXING {
                tries = 0;
                d *= RELAX_FACTOR;
                was_relaxed = true;
            }
        };
        if was_relaxed {
            relaxed += 1;
        }
        grid.insert(i as u32, pos.0, pos.1);
        bodies.push(pos);
    }
    Ok(Placement {
        bodies,
        relaxed,
        grid,
    })
}

/// Distance from each body to its nearest other body (periodic), found by
/// searching rings of bins outwards until no closer body can exist.
fn nearest_neighbour_distances(bodies: &[(f64, f64)], width: f64, grid: &BodyGrid) -> Vec<f64> {
    let mut near = Vec::new();
    bodies
        .iter()
        .enumerate()
        .map(|(i, &a)| {
            let (bx, by) = grid.bin_of(a.0, a.1);
            let mut best = f64::INFINITY;
            let mut r = 0;
            loop {
                grid.ring_bins(bx, by, r, &mut near);
                for &b in &near {
                    for &j in &grid.bins[b] {
                        if j as usize != i {
                            best = best.min(torus_d2(a, bodies[j as usize], width));
                        }
                    }
                }
                // Bodies in ring r + 1 are at least r * bin away; once the
                // rings cover the whole square every body has been seen.
                let covered = 2 * r + 1 >= grid.m;
                if covered || best.sqrt() <= r as f64 * grid.bin {
                    break;
                }
                r += 1;
            }
            best.sqrt()
        })
        .collect()
}

struct Grown {
    counts: Vec<u64>,
    claimed: u64,
    steps: usize,
    attempts: u64,
}

/// A voxel by its grid coordinates (x, y periodic; z = 0 at the basal face).
#[derive(Clone, Copy, Debug, PartialEq, Eq)]
struct Vox {
    x: u16,
    y: u16,
    z: u16,
}

/// The voxel grid's shape; maps coordinates to a flat index (no divisions in
/// the growth loop).
#[derive(Clone, Copy, Debug)]
struct Shape {
    nx: u16,
    ny: u16,
    nz: u16,
}

impl Shape {
    /// z varies fastest, so a cell's territory (a few columns) lies in a few
    /// contiguous runs of memory.
    #[inline]
    fn index(&self, v: Vox) -> usize {
        (v.y as usize * self.nx as usize + v.x as usize) * self.nz as usize + v.z as usize
    }

    /// The 6 face neighbours of `v` (periodic in x and y; none beyond the
    /// basal and apical faces).
    #[inline]
    fn face_neighbours(&self, v: Vox) -> [Option<Vox>; 6] {
        let xm = if v.x == 0 { self.nx - 1 } else { v.x - 1 };
        let xp = if v.x + 1 == self.nx { 0 } else { v.x + 1 };
        let ym = if v.y == 0 { self.ny - 1 } else { v.y - 1 };
        let yp = if v.y + 1 == self.ny { 0 } else { v.y + 1 };
        [
            Some(Vox { x: xm, ..v }),
            Some(Vox { x: xp, ..v }),
            Some(Vox { y: ym, ..v }),
            Some(Vox { y: yp, ..v }),
            (v.z > 0).then(|| Vox { z: v.z - 1, ..v }),
            (v.z + 1 < self.nz).then(|| Vox { z: v.z + 1, ..v }),
        ]
    }

    /// Squared lateral distance (in voxels, periodic) from the centre of
    /// column (x, y) to a body at (bx, by) in voxel units.
    #[inline]
    fn lateral_d2(&self, v: Vox, bx: f64, by: f64) -> f64 {
        let (nx, ny) = (f64::from(self.nx), f64::from(self.ny));
        let mut dx = (f64::from(v.x) + 0.5 - bx).abs();
        let mut dy = (f64::from(v.y) + 0.5 - by).abs();
        if dx > 0.5 * nx {
            dx = nx - dx;
        }
        if dy > 0.5 * ny {
            dy = ny - dy;
        }
        dx * dx + dy * dy
    }
}

/// Territory growth on the voxel grid (see the module docs, step 3).
fn grow(
    p: &Params,
    nx: usize,
    nz: usize,
    bodies: &[(f64, f64)],
    heights: &[f64],
    rng: &mut ChaCha8Rng,
    stop: &AtomicBool,
) -> Result<Grown, RunFailure> {
    // Bounded by the input ranges: layer_width / voxel <= 4000 and
    // layer_thickness / voxel <= 800, so u16 coordinates suffice.
    let to16 = |n: usize| u16::try_from(n).unwrap_or(u16::MAX);
    let shape = Shape {
        nx: to16(nx),
        ny: to16(nx),
        nz: to16(nz),
    };
    let n = bodies.len();
    let total_voxels = nx * nx * nz;
    // Each voxel: the owning cell + 1 (0 = free), and the id of the
    // (cell, step) visit that last tried to claim it, so that each free voxel
    // gets one try per cell per step. Kept side by side for cache locality.
    let mut cells = vec![(0u32, 0u32); total_voxels];
    let mut visit: u32 = 0;
    let mut counts = vec![0u64; n];
    let mut claimed = 0u64;
    let top: Vec<u16> = heights
        .iter()
        .map(|h| to16(((h / p.voxel).round() as usize).clamp(1, nz)))
        .collect();
    let reach2 = (p.reach / p.voxel).powi(2);
    let body_vox: Vec<(f64, f64)> = bodies
        .iter()
        .map(|&(x, y)| (x / p.voxel, y / p.voxel))
        .collect();
    let inhibit: [f64; 7] = std::array::from_fn(|k| (-p.contact_inhibition * k as f64).exp());

    // Seed voxels: the body's own voxel at the basal face or, when another
    // cell already holds it, the first free one of its 8 lateral neighbours.
    let mut boundary: Vec<Vec<Vox>> = vec![Vec::new(); n];
    for (c, &(bx, by)) in body_vox.iter().enumerate() {
        let (ix, iy) = ((bx as usize).min(nx - 1), (by as usize).min(nx - 1));
        let mut candidates = vec![(ix, iy)];
        for (dx, dy) in [
            (-1, 0),
            (1, 0),
            (0, -1),
            (0, 1),
            (-1, -1),
            (1, -1),
            (-1, 1),
            (1, 1),
        ] {
            candidates.push((wrap(ix, dx, nx), wrap(iy, dy, nx)));
        }
        let free = candidates.iter().find_map(|&(x, y)| {
            let v = Vox {
                x: to16(x),
                y: to16(y),
                z: 0,
            };
            (cells[shape.index(v)].0 == 0).then_some(v)
        });
        if let Some(v) = free {
            cells[shape.index(v)].0 = c as u32 + 1;
            counts[c] += 1;
            claimed += 1;
            boundary[c].push(v);
        }
    }

    // A free front advances one voxel per 1 / P_STEP steps on average.
    let dt = P_STEP * p.voxel / p.growth_rate;
    let total = p.duration_h / dt;
    let full_steps = total.floor() as usize;
    let last_fraction = total - full_steps as f64;
    let n_steps = full_steps + usize::from(last_fraction > 1e-12);
    let mut order: Vec<usize> = (0..n).collect();
    let mut kept: Vec<Vox> = Vec::new();
    let mut fresh: Vec<Vox> = Vec::new();
    let mut steps = 0;
    let mut attempts = 0u64;
    for step in 0..n_steps {
        if is_stopped(stop) {
            return Err(stopped(NAME));
        }
        if boundary.iter().all(Vec::is_empty) {
            break;
        }
        steps += 1;
        let p_step = if step < full_steps {
            P_STEP
        } else {
            P_STEP * last_fraction
        };
        order.shuffle(rng);
        for &c in &order {
            if boundary[c].is_empty() {
                continue;
            }
            if visit == u32::MAX {
                cells.iter_mut().for_each(|s| s.1 = 0);
                visit = 0;
            }
            visit += 1;
            let me = c as u32 + 1;
            let (bx, by) = body_vox[c];
            let top_c = top[c];
            kept.clear();
            fresh.clear();
            for &v in &boundary[c] {
                let mut keep = false;
                for w in shape.face_neighbours(v).into_iter().flatten() {
                    let wi = shape.index(w);
                    if cells[wi].0 != 0 || w.z >= top_c || shape.lateral_d2(w, bx, by) > reach2 {
                        continue;
                    }
                    if cells[wi].1 == visit {
                        // Already tried in this visit, and still free.
                        keep = true;
                        continue;
                    }
                    cells[wi].1 = visit;
                    attempts += 1;
                    let foreign = shape
                        .face_neighbours(w)
                        .into_iter()
                        .flatten()
                        .filter(|&u| {
                            let o = cells[shape.index(u)].0;
                            o != 0 && o != me
                        })
                        .count();
                    if rng.random::<f64>() < p_step * inhibit[foreign] {
                        cells[wi].0 = me;
                        counts[c] += 1;
                        claimed += 1;
                        fresh.push(w);
                    } else {
                        keep = true;
                    }
                }
                if keep {
                    kept.push(v);
                }
            }
            let b = &mut boundary[c];
            b.clear();
            b.extend_from_slice(&kept);
            b.extend_from_slice(&fresh);
        }
    }
    Ok(Grown {
        counts,
        claimed,
        steps,
        attempts,
    })
}

fn wrap(i: usize, d: isize, n: usize) -> usize {
    (i as isize + d).rem_euclid(n as isize) as usize
}

/// Expected regularity index of a 2-D Poisson pattern, sqrt(pi / (4 - pi)):
/// nearest-neighbour distances are Rayleigh distributed (Clark & Evans 1954).
pub fn poisson_regularity_index() -> f64 {
    (PI / (4.0 - PI)).sqrt()
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn face_neighbours_wrap_in_x_and_y_only() {
        let shape = Shape {
            nx: 4,
            ny: 3,
            nz: 2,
        };
        let v = |x, y, z| Vox { x, y, z };
        assert_eq!(
            shape.face_neighbours(v(0, 0, 0)),
            [
                Some(v(3, 0, 0)),
                Some(v(1, 0, 0)),
                Some(v(0, 2, 0)),
                Some(v(0, 1, 0)),
                None,
                Some(v(0, 0, 1))
            ]
        );
        assert_eq!(
            shape.face_neighbours(v(3, 2, 1)),
            [
                Some(v(2, 2, 1)),
                Some(v(0, 2, 1)),
                Some(v(3, 1, 1)),
                Some(v(3, 0, 1)),
                Some(v(3, 2, 0)),
                None
            ]
        );
        // Flat indices are distinct and cover the grid.
        let mut seen = [false; 24];
        for z in 0..2 {
            for y in 0..3 {
                for x in 0..4 {
                    seen[shape.index(v(x, y, z))] = true;
                }
            }
        }
        assert!(seen.iter().all(|&b| b));
        // Periodic lateral distance: column 0 is 0.5 + 0.5 voxels from a body
        // at x = 3.5 on a 4-wide grid... through the wrap, 1 voxel.
        assert_eq!(shape.lateral_d2(v(0, 0, 0), 3.5, 0.5), 1.0);
    }

    #[test]
    fn nearest_neighbours_match_brute_force() {
        let mut rng = ChaCha8Rng::seed_from_u64(3);
        let w = 100.0;
        let pts: Vec<(f64, f64)> = (0..300)
            .map(|_| (rng.random::<f64>() * w, rng.random::<f64>() * w))
            .collect();
        for min_bin in [0.0, 7.0, 40.0, 100.0] {
            let mut g = BodyGrid::new(w, min_bin, pts.len());
            for (i, &(x, y)) in pts.iter().enumerate() {
                g.insert(i as u32, x, y);
            }
            let fast = nearest_neighbour_distances(&pts, w, &g);
            for (i, &a) in pts.iter().enumerate() {
                let brute = pts
                    .iter()
                    .enumerate()
                    .filter(|(j, _)| *j != i)
                    .map(|(_, &b)| torus_d2(a, b, w))
                    .fold(f64::INFINITY, f64::min)
                    .sqrt();
                assert_eq!(fast[i], brute, "point {i}, min_bin {min_bin}");
            }
        }
    }

    #[test]
    fn placement_respects_minimal_distances_when_not_crowded() {
        let p = Params {
            exclusion: 12.0,
            exclusion_sd: 0.0,
            ..Params::default()
        };
        let mut rng = ChaCha8Rng::seed_from_u64(9);
        let pl =
            place_bodies(&p, 200.0, 100, &mut rng, &AtomicBool::new(false)).expect("placement");
        assert_eq!(pl.relaxed, 0);
        let nn = nearest_neighbour_distances(&pl.bodies, 200.0, &pl.grid);
        assert!(
            nn.iter().all(|&d| d >= 12.0),
            "{:?}",
            nn.iter().fold(f64::INFINITY, |a, &b| a.min(b))
        );
    }
}
