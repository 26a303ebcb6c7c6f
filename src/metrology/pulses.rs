//! A meter's test output: pulses at its meter constant k (imp/kWh).

/// Energy in kWh that N pulses stand for: E = N / k.
pub fn energy_kwh(pulses: f64, meter_constant: f64) -> f64 {
    pulses / meter_constant
}

/// Seconds between pulses at a steady power P (W): 3.6·10⁶ / (k · P).
pub fn pulse_interval_s(meter_constant: f64, power_w: f64) -> f64 {
    3.6e6 / (meter_constant * power_w)
}

/// Fixed-time method: N pulses counted over t seconds at reference power P (W) give the error
/// e = (3.6·10⁶ · N / (k · P · t) − 1) × 100 %.
pub fn fixed_time_error_percent(pulses: f64, meter_constant: f64, power_w: f64, t_s: f64) -> f64 {
    (3.6e6 * pulses / (meter_constant * power_w * t_s) - 1.0) * 100.0
}

#[cfg(test)]
mod tests {
    use super::*;
    use crate::metrology::tolerance::percent_error;

    /// Check values computed by hand from the pulse formulas of IEC 62053-21:2003 / IEC 62052-11
    /// (E = N/k; fixed-time error e = (3.6·10⁶·N/(k·P·t) − 1)·100; from memory).
    #[test]
    fn pulse_formulas() {
        // k = 1600 imp/kWh, N = 40, P = 2000 W, t = 45 s → e = 0.00 %.
        assert!(fixed_time_error_percent(40.0, 1600.0, 2000.0, 45.0).abs() < 1e-9);
        // k = 3200 imp/kWh, N = 640, E_ref = 0.195 kWh → e = +2.564 %.
        let e = percent_error(energy_kwh(640.0, 3200.0), 0.195).unwrap();
        assert!((e - 2.564).abs() < 0.0005);
        // 3200 imp/kWh is 0.3125 Wh per pulse.
        assert!((energy_kwh(1.0, 3200.0) * 1000.0 - 0.3125).abs() < 1e-12);
        // k = 1600 imp/kWh at 100 W: one pulse every 22.5 s.
        assert!((pulse_interval_s(1600.0, 100.0) - 22.5).abs() < 1e-9);
        // 230 V, 5 A, PF 1, k = 1000: one pulse every 3.13 s; 25 pulses take 78 s.
        let every = pulse_interval_s(1000.0, 230.0 * 5.0);
        assert!((every - 3.13).abs() < 0.005);
        assert!((25.0 * every - 78.0).abs() < 0.5);
    }
}
