//! Order-free sums: each addend is rounded once to a multiple of 2^-64 and
//! the multiples are added as integers, so a total does not depend on the
//! order of its addends (floating-point addition is not associative).
//!
//! Range: |total| < 2^63 (about 9.2e18), far above any count of
//! conversions or sum of order values; an addend outside it saturates.
//! Resolution: 2^-64 (about 5.4e-20) per addend.

/// 2^64 as f64 (exact).
const SCALE: f64 = 18_446_744_073_709_551_616.0;

/// An exact sum of f64 addends rounded to 2^-64.
#[derive(Debug, Clone, Copy, Default, PartialEq, Eq)]
pub(crate) struct Exact(i128);

impl Exact {
    /// Adds `x` (non-finite addends are ignored: rows are validated before).
    pub(crate) fn add(&mut self, x: f64) {
        if x.is_finite() {
            // Multiplying by a power of two is exact; `as` saturates.
            self.0 = self.0.saturating_add((x * SCALE).round() as i128);
        }
    }

    /// Adds another exact sum.
    pub(crate) fn add_exact(&mut self, other: Exact) {
        self.0 = self.0.saturating_add(other.0);
    }

    /// The sum as f64 (rounded to nearest).
    pub(crate) fn value(self) -> f64 {
        self.0 as f64 / SCALE
    }
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn order_does_not_matter() {
        // 0.1 + 0.2 + 0.3 in f64 differs by order (a textbook example of
        // non-associativity; derived by hand from IEEE 754 rounding).
        let xs = [0.1, 0.2, 0.3, 1e-9, 1e6, -1e6];
        assert_ne!((0.1f64 + 0.2) + 0.3, 0.1 + (0.2 + 0.3));
        let mut a = Exact::default();
        xs.iter().for_each(|&x| a.add(x));
        let mut b = Exact::default();
        xs.iter().rev().for_each(|&x| b.add(x));
        assert_eq!(a, b);
        assert!((a.value() - 0.600000001).abs() < 1e-15);
    }

    #[test]
    fn exact_for_dyadic_values() {
        let mut s = Exact::default();
        for _ in 0..1000 {
            s.add(0.125);
        }
        assert_eq!(s.value(), 125.0);
    }
}
