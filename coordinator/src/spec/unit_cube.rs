//! Mapping one parameter between the unit interval and its natural units.
//!
//! Continuous parameters map linearly, or linearly in the logarithm for
//! `scale = "log"`. An integer parameter with `m` allowed values splits the
//! unit interval into `m` equal cells, one per value (cell `k` holds the
//! natural interval `[k - 0.5, k + 0.5]`, measured in the logarithm for a log
//! scale), so a Latin hypercube over the unit interval spreads the integers
//! as evenly as the range allows. For a linear scale this is
//! `floor(lo + u * (hi - lo + 1))`, clamped to `hi`.

use super::{ParamSpec, Scale};

impl ParamSpec {
    /// Number of whole numbers in the range (integer parameters only).
    fn cells(&self) -> f64 {
        self.hi - self.lo + 1.0
    }

    /// Natural value of a unit-interval coordinate `u` (clamped to `[0, 1]`).
    pub fn to_natural(&self, u: f64) -> f64 {
        let u = if u.is_nan() { 0.5 } else { u.clamp(0.0, 1.0) };
        match (self.scale, self.integer) {
            (Scale::Linear, false) => self.lo + u * (self.hi - self.lo),
            (Scale::Log, false) => {
                let (a, b) = (self.lo.ln(), self.hi.ln());
                (a + u * (b - a)).exp().clamp(self.lo, self.hi)
            }
            (Scale::Linear, true) => (self.lo + u * self.cells()).floor().min(self.hi),
            (Scale::Log, true) => {
                let (a, b) = self.log_edges();
                let x = (a + u * (b - a)).exp();
                (x + 0.5).floor().clamp(self.lo, self.hi)
            }
        }
    }

    /// Unit-interval coordinate of a natural value (clamped to the range).
    /// An integer parameter's value is rounded and mapped to the centre of its cell.
    pub fn to_unit(&self, x: f64) -> f64 {
        let x = if x.is_nan() {
            self.lo
        } else {
            x.clamp(self.lo, self.hi)
        };
        match (self.scale, self.integer) {
            (Scale::Linear, false) => (x - self.lo) / (self.hi - self.lo),
            (Scale::Log, false) => (x.ln() - self.lo.ln()) / (self.hi.ln() - self.lo.ln()),
            (Scale::Linear, true) => (x.round() - self.lo + 0.5) / self.cells(),
            (Scale::Log, true) => {
                let k = x.round();
                let (a, b) = self.log_edges();
                let centre = 0.5 * ((k - 0.5).ln() + (k + 0.5).ln());
                (centre - a) / (b - a)
            }
        }
    }

    /// Logarithms of the outer cell edges of an integer log-scale parameter
    /// (`lo >= 1` is guaranteed by validation, so `lo - 0.5 > 0`).
    fn log_edges(&self) -> (f64, f64) {
        ((self.lo - 0.5).ln(), (self.hi + 0.5).ln())
    }
}

#[cfg(test)]
mod tests {
    use super::*;

    fn param(lo: f64, hi: f64, scale: Scale, integer: bool) -> ParamSpec {
        ParamSpec {
            name: "x".into(),
            lo,
            hi,
            scale,
            integer,
            unit: String::new(),
            description: String::new(),
        }
    }

    // Analytic: the linear map sends 0, 1/2, 1 to lo, midpoint, hi.
    #[test]
    fn linear_maps_ends_and_middle() {
        let p = param(20.0, 60.0, Scale::Linear, false);
        assert_eq!(p.to_natural(0.0), 20.0);
        assert_eq!(p.to_natural(0.5), 40.0);
        assert_eq!(p.to_natural(1.0), 60.0);
        assert!((p.to_unit(30.0) - 0.25).abs() < 1e-15);
    }

    // Analytic: on a log scale the middle of [5, 50] is the geometric mean sqrt(250).
    #[test]
    fn log_middle_is_geometric_mean() {
        let p = param(5.0, 50.0, Scale::Log, false);
        assert!((p.to_natural(0.5) - 250f64.sqrt()).abs() < 1e-12);
        assert!((p.to_unit(250f64.sqrt()) - 0.5).abs() < 1e-12);
        assert!((p.to_natural(1.0) - 50.0).abs() < 1e-12);
    }

    // Analytic: 8 values in [1, 8] get cells of width 1/8 each.
    #[test]
    fn integer_cells_are_equal() {
        let p = param(1.0, 8.0, Scale::Linear, true);
        for k in 0..8 {
            let lo_edge = k as f64 / 8.0;
            assert_eq!(p.to_natural(lo_edge + 1e-9), 1.0 + k as f64);
            assert_eq!(p.to_natural(lo_edge + 0.125 - 1e-9), 1.0 + k as f64);
            assert!((p.to_unit(1.0 + k as f64) - (lo_edge + 0.0625)).abs() < 1e-15);
        }
        assert_eq!(p.to_natural(1.0), 8.0);
    }

    #[test]
    fn integer_log_round_trips_every_value() {
        let p = param(1.0, 64.0, Scale::Log, true);
        for k in 1..=64 {
            let u = p.to_unit(k as f64);
            assert!((0.0..=1.0).contains(&u));
            assert_eq!(p.to_natural(u), k as f64);
        }
        assert_eq!(p.to_natural(0.0), 1.0);
        assert_eq!(p.to_natural(1.0), 64.0);
    }
}
