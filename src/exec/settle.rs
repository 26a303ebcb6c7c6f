//! Settling until stable: read every position's watched quantity at a steady pace and go on as
//! soon as the last few readings of every position agree within the band.

use crate::bench::{Clock, Position};
use crate::plan::SettleRule;
use serde::{Deserialize, Serialize};
use std::collections::VecDeque;
use std::sync::atomic::{AtomicBool, Ordering};

/// How settling went, for the record.
#[derive(Debug, Clone, Copy, PartialEq, Serialize, Deserialize)]
pub struct SettleOutcome {
    /// Bench seconds from the load change to the first sample.
    pub actual_s: f64,
    /// Whether every position was stable; false when the rule's maximum ran out.
    pub settled: bool,
}

/// Whether a window of readings lies within the band.
pub(super) fn stable(window: &VecDeque<f64>, rule: &SettleRule) -> bool {
    if window.len() < rule.readings as usize {
        return false;
    }
    let (lo, hi) = window
        .iter()
        .fold((f64::INFINITY, f64::NEG_INFINITY), |(lo, hi), &v| {
            (lo.min(v), hi.max(v))
        });
    let allowed = if rule.relative {
        let mean = window.iter().sum::<f64>() / window.len() as f64;
        rule.band * mean.abs()
    } else {
        rule.band
    };
    hi - lo <= allowed
}

/// Waits until every active position is stable (or the rule's maximum), reading each one every
/// `every_s`. A position whose link fails stops being waited for: its fault shows when sampled.
pub(super) fn settle_until(
    rule: &SettleRule,
    clock: &dyn Clock,
    positions: &mut [Position],
    active: &[bool],
    interrupt: &AtomicBool,
) -> SettleOutcome {
    let t0 = clock.now_s();
    let mut windows: Vec<VecDeque<f64>> = vec![VecDeque::new(); positions.len()];
    let mut waiting: Vec<bool> = active.to_vec();
    loop {
        for (i, p) in positions.iter_mut().enumerate() {
            if !waiting[i] {
                continue;
            }
            match p.link.read(rule.quantity, &rule.channel) {
                Ok(v) => {
                    let w = &mut windows[i];
                    w.push_back(v);
                    if w.len() > rule.readings as usize {
                        w.pop_front();
                    }
                }
                Err(_) => waiting[i] = false,
            }
        }
        let elapsed = clock.now_s() - t0;
        let all_stable = windows
            .iter()
            .zip(&waiting)
            .all(|(w, waiting)| !waiting || stable(w, rule));
        if (all_stable && elapsed >= rule.min_s) || interrupt.load(Ordering::SeqCst) {
            return SettleOutcome {
                actual_s: elapsed,
                settled: all_stable,
            };
        }
        if elapsed + rule.every_s > rule.max_s + 1e-9 {
            clock.sleep_s(rule.max_s - elapsed);
            return SettleOutcome {
                actual_s: clock.now_s() - t0,
                settled: false,
            };
        }
        clock.sleep_s(rule.every_s);
    }
}

#[cfg(test)]
mod tests {
    use super::*;
    use crate::plan::Quantity;

    fn rule(relative: bool, band: f64) -> SettleRule {
        SettleRule {
            quantity: Quantity::Current,
            channel: "L".into(),
            band,
            relative,
            readings: 3,
            every_s: 0.1,
            min_s: 0.0,
            max_s: 5.0,
        }
    }

    #[test]
    fn the_band_is_relative_or_absolute() {
        let w: VecDeque<f64> = [5.000, 5.002, 5.001].into_iter().collect();
        assert!(stable(&w, &rule(true, 0.0005))); // 2 mA in 5 A is 0.04 %
        assert!(!stable(&w, &rule(true, 0.0003)));
        assert!(stable(&w, &rule(false, 0.002)));
        assert!(!stable(&w, &rule(false, 0.0019)));
        let short: VecDeque<f64> = [5.0, 5.0].into_iter().collect();
        assert!(
            !stable(&short, &rule(true, 0.01)),
            "a window not yet full is not stable"
        );
    }
}
