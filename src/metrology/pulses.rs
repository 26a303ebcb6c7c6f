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

/// Fixed-pulse method: the time N pulses should take at reference power P (W),
/// T = 3.6·10⁶ · N / (k · P), against the time they took, T_m: e = (T − T_m) / T_m × 100 %.
/// A unit that reads high sends its pulses early, so its T_m is short and e positive.
pub fn fixed_pulse_error_percent(
    pulses: f64,
    meter_constant: f64,
    power_w: f64,
    measured_s: f64,
) -> f64 {
    let expected = pulses * pulse_interval_s(meter_constant, power_w);
    (expected - measured_s) / measured_s * 100.0
}

/// Pulses from a reference standard's own output: the unit's energy N/k against the
/// reference's N_ref/k_ref over the same interval, e = ((N/k) / (N_ref/k_ref) − 1) × 100 %.
pub fn pulse_ratio_error_percent(
    pulses: f64,
    meter_constant: f64,
    reference_pulses: f64,
    reference_constant: f64,
) -> f64 {
    (energy_kwh(pulses, meter_constant) / energy_kwh(reference_pulses, reference_constant) - 1.0)
        * 100.0
}

/// Pulses a unit sends in `t_s` seconds at power P (W): N = P[kW] · k · t / 3600.
pub fn pulses_in(meter_constant: f64, power_w: f64, t_s: f64) -> f64 {
    power_w / 1000.0 * meter_constant * t_s / 3600.0
}

/// The standard uncertainty, relative to the count, of a count of N pulses over a gate that
/// opens and closes at no particular phase of the pulses: off by up to one pulse, taken as
/// rectangular over ±1 pulse, u = 1 / (N · √3).
pub fn quantisation_u_relative(pulses: f64) -> f64 {
    1.0 / (pulses * 3f64.sqrt())
}

/// The standard uncertainty, relative, of a time interval measured by a counter whose time
/// base is within ±a (relative) of its nominal rate: rectangular, u = a / √3.
pub fn timebase_u_relative(accuracy: f64) -> f64 {
    accuracy / 3f64.sqrt()
}

/// The standard uncertainty, relative, of a gate of `gate_s` seconds whose opening and closing
/// are each uncertain by up to ±δ s (rectangular, independent): u = √2 · δ / (√3 · t).
pub fn gate_timing_u_relative(edge_s: f64, gate_s: f64) -> f64 {
    2f64.sqrt() * edge_s / (3f64.sqrt() * gate_s)
}

/// How many pulses, and over how long, a point needs so that one pulse is at most
/// `resolution` (relative) of the count, with at least `min_pulses` pulses and `min_s`
/// seconds (common practice, no published source: about 25 pulses and 30 s). `None` when at
/// power P the pulses do not come within `max_s`.
pub fn pulses_for(
    resolution: f64,
    min_pulses: u64,
    min_s: f64,
    max_s: f64,
    meter_constant: f64,
    power_w: f64,
) -> Option<PulsePlan> {
    if !(resolution > 0.0 && meter_constant > 0.0 && power_w > 0.0) {
        return None;
    }
    let by_resolution = (1.0 / resolution - 1e-9).ceil() as u64;
    let by_time = pulses_in(meter_constant, power_w, min_s).ceil() as u64;
    let pulses = by_resolution.max(min_pulses).max(by_time).max(1);
    let seconds = pulses as f64 * pulse_interval_s(meter_constant, power_w);
    (seconds <= max_s).then_some(PulsePlan { pulses, seconds })
}

/// A point of the pulse method: the pulses to count and the time they take.
#[derive(Debug, Clone, Copy, PartialEq)]
pub struct PulsePlan {
    pub pulses: u64,
    pub seconds: f64,
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

    /// The fixed-pulse method on the same published case (domain notes, section 2: T =
    /// 3.6·10⁶·N/(k·P)): k = 1600, N = 40, P = 2000 W take 45 s; a unit that took 44.55 s
    /// reads (45 − 44.55)/44.55 = +1.0101 % high (computed by hand).
    #[test]
    fn fixed_pulses_and_ratios() {
        assert!(fixed_pulse_error_percent(40.0, 1600.0, 2000.0, 45.0).abs() < 1e-9);
        assert!((fixed_pulse_error_percent(40.0, 1600.0, 2000.0, 44.55) - 1.010101).abs() < 1e-5);
        // The two methods agree on one interval: 40 pulses in 44.55 s at 2000 W, counted over
        // a gate of 44.55 s, is the same +1.0101 %.
        let by_time = fixed_time_error_percent(40.0, 1600.0, 2000.0, 44.55);
        assert!((by_time - 1.010101).abs() < 1e-5);
        // The published check value again, as a ratio of counts: 640 pulses at 3200 imp/kWh
        // against a reference standard's 19,500 pulses at 100,000 imp/kWh (0.195 kWh).
        let e = pulse_ratio_error_percent(640.0, 3200.0, 19_500.0, 100_000.0);
        assert!((e - 2.564).abs() < 0.0005, "{e}");
    }

    /// N = P[kW]·k·t/3600 rounded up (domain notes, section 2): 230 V × 5 A with k = 1000 gives
    /// 24.9 pulses in 78 s, so 25; a resolution of 0.1 % wants 1000 pulses, which at that power
    /// take 3130 s; within an hour it can be done, within ten minutes not.
    #[test]
    fn pulses_chosen_for_a_resolution() {
        assert!((pulses_in(1000.0, 1150.0, 78.0) - 24.916_666).abs() < 1e-5);
        let p = pulses_for(0.04, 25, 30.0, 600.0, 1000.0, 1150.0).unwrap();
        assert_eq!(p.pulses, 25);
        assert!((p.seconds - 78.26).abs() < 0.01, "{p:?}");
        // 30 s at least: at 16 A (3680 W) 25 pulses come in 24.5 s, so 31 are counted.
        let p = pulses_for(0.04, 25, 30.0, 600.0, 1000.0, 3680.0).unwrap();
        assert_eq!(p.pulses, 31);
        assert!(p.seconds >= 30.0);
        let fine = pulses_for(0.001, 25, 30.0, 3600.0, 1000.0, 1150.0).unwrap();
        assert_eq!(fine.pulses, 1000);
        assert!((fine.seconds - 3130.43).abs() < 0.01);
        assert_eq!(pulses_for(0.001, 25, 30.0, 600.0, 1000.0, 1150.0), None);
        assert_eq!(pulses_for(0.01, 25, 30.0, 600.0, 1000.0, 0.0), None);
    }

    /// The budget's terms for counting (GUM 4.3.7: a rectangular distribution of half-width a
    /// has u = a/√3), checked by hand: 25 pulses, ±1 pulse → 2.309 %; a time base of ±50 ppm →
    /// 28.87 ppm; gate edges of ±1 ms on a 78 s gate → 0.00105 %.
    #[test]
    fn counting_terms() {
        assert!((quantisation_u_relative(25.0) * 100.0 - 2.3094).abs() < 1e-4);
        assert!((timebase_u_relative(50e-6) * 1e6 - 28.8675).abs() < 1e-4);
        assert!((gate_timing_u_relative(0.001, 78.0) * 100.0 - 0.0010467).abs() < 1e-6);
    }
}
