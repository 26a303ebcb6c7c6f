//! Process capability of a lot against a check's limits.

/// Cp = (USL − LSL) / 6σ.
pub fn cp(lsl: f64, usl: f64, sigma: f64) -> Option<f64> {
    (sigma > 0.0).then(|| (usl - lsl) / (6.0 * sigma))
}

/// Cpk = min(USL − μ, μ − LSL) / 3σ.
pub fn cpk(lsl: f64, usl: f64, mean: f64, sigma: f64) -> Option<f64> {
    (sigma > 0.0).then(|| (usl - mean).min(mean - lsl) / (3.0 * sigma))
}

/// One-sided against an upper limit: CPU = (USL − μ) / 3σ.
pub fn cpu(usl: f64, mean: f64, sigma: f64) -> Option<f64> {
    (sigma > 0.0).then(|| (usl - mean) / (3.0 * sigma))
}

/// One-sided against a lower limit: CPL = (μ − LSL) / 3σ.
pub fn cpl(lsl: f64, mean: f64, sigma: f64) -> Option<f64> {
    (sigma > 0.0).then(|| (mean - lsl) / (3.0 * sigma))
}

/// Below this Cpk a process is commonly taken as not capable (common practice, no published
/// source: 1.33 is the usual figure for an ongoing process).
pub const CPK_WARNING_BELOW: f64 = 1.33;

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
        // Its two one-sided indices (same example): CPU (20 − 16)/6 = 0.667, CPL (16 − 8)/6
        // = 1.333; Cpk is the smaller.
        assert!((cpu(20.0, 16.0, 2.0).unwrap() - 0.6667).abs() < 5e-5);
        assert!((cpl(8.0, 16.0, 2.0).unwrap() - 1.3333).abs() < 5e-5);
    }
}
