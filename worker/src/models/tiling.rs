//! The built-in `tiling` model (being written).

use std::sync::atomic::AtomicBool;

use super::{InputInfo, Inputs, MetricInfo, ModelInfo};
use crate::runner::{FailureKind, Metrics, RunFailure};

/// Model name.
pub const NAME: &str = "tiling";

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
    let m = |name, unit, lo, hi, description| MetricInfo {
        name,
        unit,
        lo,
        hi,
        description,
    };
    ModelInfo {
        name: NAME,
        description: "glia-like cells grow processes that claim territory in a 3-D layer of tissue",
        inputs: vec![
            i("density", 1.0, 400.0, 25.0, "cells/10^4 um^2", "cell bodies per 10,000 um^2 of layer"),
            i("exclusion", 0.0, 50.0, 10.0, "um", "mean minimal distance between cell bodies (0 = random placement)"),
            i("exclusion_sd", 0.0, 20.0, 2.0, "um", "cell-to-cell spread of the minimal distance"),
            i("height_mean", 2.0, 200.0, 30.0, "um", "mean mature height of a cell's territory"),
            i("height_sd", 0.0, 50.0, 5.0, "um", "cell-to-cell sd of the mature height"),
            i("growth_rate", 0.1, 100.0, 2.0, "um/h", "speed at which a free process front advances"),
            i("duration_h", 0.1, 1000.0, 48.0, "h", "simulated time"),
            i("contact_inhibition", 0.0, 10.0, 1.0, "", "slowing of growth per face-neighbouring foreign voxel: factor exp(-k n)"),
            i("reach", 2.0, 500.0, 30.0, "um", "largest lateral distance of a process from its cell body"),
            i("layer_width", 20.0, 2000.0, 200.0, "um", "side of the square layer (periodic in x and y)"),
            i("layer_thickness", 2.0, 400.0, 40.0, "um", "thickness of the layer; heights are capped to it"),
            i("voxel", 0.5, 20.0, 2.0, "um", "edge of a voxel of the occupancy grid"),
        ],
        metrics: vec![
            m("territory_cv", "", 0.0, 100.0, "sd / mean of territory volumes"),
            m("coverage", "", 0.0, 1.0, "fraction of the layer's volume claimed by some cell"),
            m("mean_territory", "um^3", 0.0, 1e12, "mean territory volume"),
            m("nn_regularity", "", 0.0, 1e6, "mean / sd of nearest-neighbour distances between cell bodies"),
            m("clark_evans", "", 0.0, 2.2, "Clark-Evans index: mean nearest-neighbour distance over its Poisson expectation"),
            m("placement_relaxed", "", 0.0, 1.0, "fraction of cells placed closer than their minimal distance because the layer was crowded"),
        ],
    }
}

/// Runs the model (not yet written).
pub(crate) fn run(_inputs: &Inputs, _seed: u64, _stop: &AtomicBool) -> Result<Metrics, RunFailure> {
    Err(RunFailure::new(
        FailureKind::BadInput,
        "the tiling model is not written yet",
    ))
}
