//! Process capability of a lot against a check's limits.

/// Cp = (USL − LSL) / 6σ.
pub fn cp(lsl: f64, usl: f64, sigma: f64) -> Option<f64> {
    (sigma > 0.0).then(|| (usl - lsl) / (6.0 * sigma))
}

/// Cpk = min(USL − μ, μ − LSL) / 3σ.
pub fn cpk(lsl: f64, usl: f64, mean: f64, sigma: f64) -> Option<f64> {
    (sigma > 0.0).then(|| (usl - mean).min(mean - lsl) / (3.0 * sigma))
}

#[cfg(test)]
mod tests {
    use super::*;

    /// Handbook example (from memory, NIST/SEMATECH e-Handbook §6.1.6): USL 20, LSL 8, mean 16,
    /// s 2 → Cp 1.0, Cpk 0.667.
    #[test]
    fn capability_indices() {
        assert!((cp(8.0, 20.0, 2.0).unwrap() - 1.0).abs() < 1e-12);
        assert!((cpk(8.0, 20.0, 16.0, 2.0).unwrap() - 0.6667).abs() < 5e-5);
        assert_eq!(cpk(8.0, 20.0, 16.0, 0.0), None);
    }
}
