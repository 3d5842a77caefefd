//! Replicate seeds derived from the sweep seed.
//!
//! Every run gets its own seed, computed (not drawn) from the sweep seed, the
//! point index and the replicate number, so the sweep seed alone fixes every
//! run and a run handed out again after a lost lease uses the same seed.
//!
//! The hash is the 64-bit finaliser of SplitMix64 (Steele, Lea & Flood 2014,
//! "Fast splittable pseudorandom number generators", OOPSLA; the constants of
//! Vigna's `splitmix64.c`), applied once per component with the golden-ratio
//! increment between components. The finaliser is a bijection on 64-bit
//! words, so two runs share their seed only by a chance clash of the final
//! 63-bit values (about one in 10^19 per pair).
//! Hand-written because it is eight lines and no crate offers exactly this.

/// The golden-ratio increment of SplitMix64 (`0x9e3779b97f4a7c15`).
const GAMMA: u64 = 0x9e37_79b9_7f4a_7c15;

/// The SplitMix64 output function ("mix64", variant 13 of Stafford's finalisers).
pub fn splitmix64_mix(mut z: u64) -> u64 {
    z = (z ^ (z >> 30)).wrapping_mul(0xbf58_476d_1ce4_e5b9);
    z = (z ^ (z >> 27)).wrapping_mul(0x94d0_49bb_1331_11eb);
    z ^ (z >> 31)
}

/// The `k`-th output (from 1) of a SplitMix64 generator started at `state`.
pub fn splitmix64_nth(state: u64, k: u64) -> u64 {
    splitmix64_mix(state.wrapping_add(GAMMA.wrapping_mul(k)))
}

/// Seed of replicate `replicate` of point `point_index` in a sweep with seed `sweep_seed`.
///
/// The result has its top bit clear (it is below 2^63), so it survives
/// storage as a signed 64-bit integer (SQLite, Java, many simulators).
pub fn replicate_seed(sweep_seed: u64, point_index: u64, replicate: u32) -> u64 {
    let mut h = splitmix64_nth(sweep_seed, 1);
    h = splitmix64_mix(h ^ splitmix64_nth(point_index, 2));
    h = splitmix64_mix(h ^ splitmix64_nth(u64::from(replicate), 3));
    h >> 1
}

/// Seed of attempt `attempt` (from 1) of a run whose replicate seed is
/// `seed`: the replicate seed itself on the first attempt; after a failure,
/// a new seed derived from both, because a simulator that is deterministic
/// in its seed would only fail the same way again. Still fixed by the sweep
/// seed, so a sweep stays reproducible.
pub fn attempt_seed(seed: u64, attempt: u32) -> u64 {
    if attempt <= 1 {
        return seed;
    }
    splitmix64_mix(seed ^ splitmix64_nth(u64::from(attempt), 4)) >> 1
}
