//! Taking a step's samples from every position at once.
//!
//! On a real clock each position follows the step's sample schedule in its own thread, so a slow
//! or dead unit delays nobody else. On the simulator's virtual clock the positions are read in
//! rounds (time only moves between rounds), concurrently when their links are real ports.
//! Every reading is handed to `on_reading` as soon as it is taken, so the archive can commit it.

use crate::bench::Clock;
use crate::bench::counter::CounterHandle;
use crate::link::{DutLink, Exchange};
use crate::plan::{PulseMethod, Quantity, Step};
use crate::record::Sample;

/// One position's readings over a step's window: a series per wanted reading, and the fault that
/// stopped it early, if one did.
#[derive(Debug, Default)]
pub(super) struct Series {
    pub samples: Vec<Vec<Sample>>,
    pub fault: Option<String>,
    /// For a count of the test output where the counter also counts the reference standard's
    /// pulses: the standard's count latched with each sample.
    pub reference_counts: Vec<Vec<u64>>,
}

/// One reading taken from each unit at every sample.
#[derive(Debug, Clone, PartialEq)]
pub struct Wanted {
    pub quantity: Quantity,
    pub channel: String,
    /// The front end's counts (for calibration) instead of the converted value.
    pub raw: bool,
}

/// A position to sample: its link, or `None` when the unit is not being sampled.
pub(super) type Slot<'a> = Option<&'a mut Box<dyn DutLink>>;

/// Called with (slot index, wanted index, sample) for every reading taken.
pub(super) type OnReading<'a> = &'a (dyn Fn(usize, usize, Sample) + Sync);

/// What every position's sampling of one step shares.
#[derive(Clone, Copy)]
pub(super) struct Sampler<'a> {
    pub step: &'a Step,
    pub wanted: &'a [Wanted],
    pub clock: &'a dyn Clock,
    pub on_reading: OnReading<'a>,
    /// Set by Ctrl-C: sampling stops before the next sample.
    pub interrupt: &'a std::sync::atomic::AtomicBool,
    /// The counter of the test outputs and each slot's position number, for the readings on
    /// channel `test_output`.
    pub counter: Option<&'a CounterHandle>,
    pub numbers: &'a [usize],
}

const INTERRUPTED: &str = "interrupted (stop signal) before this sample";

impl Sampler<'_> {
    fn interrupted(&self) -> bool {
        self.interrupt.load(std::sync::atomic::Ordering::SeqCst)
    }
}

/// Decides after each round (with the number of samples taken and the bench times of the
/// window so far) whether sampling may stop.
pub(super) type StopRule<'a> = &'a mut dyn FnMut(u32, &[Series], (f64, f64)) -> bool;

/// Samples every slot over the step's window; returns the series and the window's bench times.
/// With a stop rule the positions are sampled in rounds, so that they stop together.
pub(super) fn sample_step(
    s: Sampler,
    slots: Vec<Slot>,
    parallel: bool,
    stop: Option<StopRule>,
) -> (Vec<Series>, (f64, f64)) {
    let t0 = s.clock.now_s();
    // One unit after another (links that cannot be read at once, as on a shared bus) is read
    // in rounds: unit by unit within each round, every unit's readings spread over the window.
    // Each unit's whole schedule in turn would read the first over the window and every other
    // back to back after it, outside the window the reference covers.
    let series = if s.clock.is_virtual() || stop.is_some() || !parallel {
        in_rounds(s, slots, parallel, t0, stop)
    } else {
        std::thread::scope(|scope| {
            let handles: Vec<_> = slots
                .into_iter()
                .enumerate()
                .map(|(i, slot)| {
                    scope.spawn(move || {
                        slot.map(|link| on_schedule(s, i, t0, link))
                            .unwrap_or_default()
                    })
                })
                .collect();
            handles
                .into_iter()
                .map(|h| {
                    h.join().unwrap_or_else(|_| Series {
                        samples: Vec::new(),
                        fault: Some("the sampling thread failed".into()),
                        reference_counts: Vec::new(),
                    })
                })
                .collect()
        })
    };
    (series, (t0, s.clock.now_s()))
}

/// Reads every wanted quantity once from one unit, keeping each reading as it arrives. Each
/// reading is stamped with the middle of the attempt that was answered, and how long that
/// attempt took: after a retry that can be well after the sample was due, and a register's
/// advance must be set against the time it really covers, with the uncertainty of when each
/// end was read.
/// Returns the fault that stopped the series, if one did.
fn read_once(
    s: Sampler,
    slot: usize,
    link: &mut dyn DutLink,
    k: u32,
    series: &mut Series,
) -> Option<String> {
    link.begin_sample();
    for (w, want) in s.wanted.iter().enumerate() {
        if want.channel == crate::plan::TEST_OUTPUT {
            if let Err(e) = read_counter(s, slot, w, series) {
                return Some(format!(
                    "sample {} of {}: counting the test output: {e}",
                    k + 1,
                    s.step.samples
                ));
            }
            continue;
        }
        let asked = s.clock.now_s();
        let reading = if want.raw {
            link.read_raw(want.quantity, &want.channel)
        } else {
            link.read(want.quantity, &want.channel)
        };
        // A value that is not a number (a link that let "NaN" or "inf" through) is never
        // kept: the archive could not store it, and no arithmetic can use it.
        let reading = reading.and_then(|v| {
            if v.is_finite() {
                Ok(v)
            } else {
                Err(crate::link::LinkError::Garbled {
                    request: format!("read {}", want.quantity.name()),
                    reply: v.to_string(),
                    why: "not a finite number".into(),
                })
            }
        });
        match reading {
            Ok(value) => {
                let (t_s, took) = stamp(s.clock, link.last_exchange(), asked);
                let sample = Sample {
                    t_s,
                    value,
                    took_s: (took > 0.0).then_some(took),
                };
                series.samples[w].push(sample);
                (s.on_reading)(slot, w, sample);
            }
            Err(e) => {
                return Some(format!(
                    "sample {} of {}: reading {} on channel {}: {e}",
                    k + 1,
                    s.step.samples,
                    want.quantity.name(),
                    want.channel
                ));
            }
        }
    }
    None
}

/// When a reading was taken (bench seconds, the middle of the exchange it was taken in) and
/// within how long (the exchange's length): the unit took it somewhere in between. From the
/// link's own instants where it timed the exchange, so that time this thread spent waiting
/// for the processor after the reply came is not counted; after a retry only the attempt
/// that was answered counts. Otherwise (a link that does not time its exchanges, the
/// simulator's clock) the whole call, from `asked` to now.
fn stamp(clock: &dyn Clock, exchange: Option<Exchange>, asked: f64) -> (f64, f64) {
    let timed = exchange.and_then(|x| Some((clock.at_s(x.sent)?, clock.at_s(x.answered)?)));
    match timed {
        Some((sent, answered)) => {
            let took = (answered - sent).max(0.0);
            (sent + took / 2.0, took)
        }
        None => {
            let answered = clock.now_s();
            let took = (answered - asked).max(0.0);
            (answered - took / 2.0, took)
        }
    }
}

/// Reads one position's counter input. Counting over a gate, every reading is a sample (the
/// count as energy, N/k, stamped at the middle of the transaction, like a register's). Timing
/// a number of pulses, the first edge is the first sample and each later edge the counter has
/// seen is one more: the series ends at the edge that completes the count.
fn read_counter(s: Sampler, slot: usize, w: usize, series: &mut Series) -> Result<(), String> {
    let (Some(counter), Some(pulses)) = (s.counter, s.step.pulses.as_ref()) else {
        return Err("the station has no counter for the units' test outputs".into());
    };
    let position = s.numbers.get(slot).copied().unwrap_or(slot + 1);
    let asked = s.clock.now_s();
    let (reading, exchange) = counter.read_timed(position).map_err(|e| e.to_string())?;
    // After a retry the count was latched during the attempt that was answered.
    let (latched, took) = stamp(s.clock, exchange, asked);
    let wh = |n: u64| n as f64 * pulses.pulse_wh();
    let taken = &mut series.samples[w];
    // Each new sample with the reference standard's count latched with it, where there is one.
    let mut new: Vec<(Sample, Option<u64>)> = Vec::new();
    match pulses.method {
        PulseMethod::FixedTime { .. } => new.push((
            Sample {
                t_s: latched,
                value: wh(reading.pulses),
                took_s: (took > 0.0).then_some(took),
            },
            reading.reference_pulses,
        )),
        PulseMethod::FixedPulses { .. } => {
            if let Some((first, latest)) = reading.edges_s {
                if taken.is_empty() {
                    new.push((Sample::at(first, 0.0), reading.reference_pulses.map(|_| 0)));
                }
                let last = taken.last().map_or(0.0, |x| x.value);
                if reading.pulses > 0 && wh(reading.pulses) > last {
                    new.push((
                        Sample::at(latest, wh(reading.pulses)),
                        reading.reference_pulses,
                    ));
                }
            }
        }
    }
    for (sample, reference) in new {
        taken.push(sample);
        if let Some(n) = reference
            && let Some(counts) = series.reference_counts.get_mut(w)
        {
            counts.push(n);
        }
        (s.on_reading)(slot, w, sample);
    }
    Ok(())
}

/// Whether a slot's count of pulses is complete (timing a fixed number of pulses).
pub(super) fn count_complete(step: &Step, wanted: &[Wanted], series: &Series) -> bool {
    let Some(spec) = step.pulses.as_ref() else {
        return true;
    };
    let PulseMethod::FixedPulses { count, .. } = spec.method else {
        return true;
    };
    wanted
        .iter()
        .zip(&series.samples)
        .filter(|(w, _)| w.channel == crate::plan::TEST_OUTPUT)
        .all(|(_, samples)| {
            samples
                .last()
                .is_some_and(|x| x.value >= (count as f64 - 0.5) * spec.pulse_wh())
        })
}

fn empty(wanted: usize) -> Series {
    Series {
        samples: vec![Vec::new(); wanted],
        fault: None,
        reference_counts: vec![Vec::new(); wanted],
    }
}

/// One unit on its own thread, sample k at t0 + k·interval.
fn on_schedule(s: Sampler, slot: usize, t0: f64, link: &mut Box<dyn DutLink>) -> Series {
    let mut series = empty(s.wanted.len());
    for k in 0..s.step.samples {
        let due = t0 + f64::from(k) * s.step.interval_s;
        s.clock.sleep_s(due - s.clock.now_s());
        if s.interrupted() {
            series.fault = Some(INTERRUPTED.into());
            break;
        }
        if let Some(fault) = read_once(s, slot, link.as_mut(), k, &mut series) {
            series.fault = Some(fault);
            break;
        }
    }
    series
}

/// Every unit per round, round k due at t0 + k·interval (on the virtual clock time only moves
/// between rounds); after each round the stop rule, if any, may end the sampling.
fn in_rounds(
    s: Sampler,
    mut slots: Vec<Slot>,
    parallel: bool,
    t0: f64,
    mut stop: Option<StopRule>,
) -> Vec<Series> {
    let mut all: Vec<Series> = slots
        .iter()
        .map(|slot| {
            if slot.is_some() {
                empty(s.wanted.len())
            } else {
                Series::default()
            }
        })
        .collect();
    let mut due = t0;
    for k in 0..s.step.samples {
        if s.interrupted() {
            for (slot, series) in slots.iter().zip(all.iter_mut()) {
                if slot.is_some() && series.fault.is_none() {
                    series.fault = Some(INTERRUPTED.into());
                }
            }
            break;
        }
        let live = slots
            .iter_mut()
            .zip(all.iter_mut())
            .enumerate()
            .filter(|(_, (slot, series))| slot.is_some() && series.fault.is_none());
        let round = |(i, (slot, series)): (usize, (&mut Slot, &mut Series))| {
            let link = slot.as_mut().expect("filtered to live slots");
            series.fault = read_once(s, i, link.as_mut(), k, series);
        };
        if parallel {
            std::thread::scope(|scope| {
                for pair in live {
                    scope.spawn(move || round(pair));
                }
            });
        } else {
            live.for_each(round);
        }
        if let Some(stop) = stop.as_mut()
            && stop(k + 1, &all, (t0, s.clock.now_s()))
        {
            break;
        }
        if k + 1 < s.step.samples {
            if s.clock.is_virtual() {
                s.clock.sleep_s(s.step.interval_s);
            } else {
                // On schedule, so that reading times do not add up; but after a round that ran
                // a whole interval late (the stop rule waited for an operator's reference) the
                // schedule starts again from now, so no samples are taken back to back.
                due = (due + s.step.interval_s).max(s.clock.now_s());
                s.clock.sleep_s(due - s.clock.now_s());
            }
        }
    }
    all
}

#[cfg(test)]
mod tests {
    use super::*;
    use crate::bench::{RealClock, VirtualClock};
    use std::time::{Duration, Instant};

    /// A reading is stamped from the link's own timing of the exchange: a sampling thread
    /// that gets the processor back only 80 ms after the reply came (a loaded machine) still
    /// stamps it within the exchange, not 80 ms later where the uncertainty of its timing
    /// would not reach. Bench time runs ten times real time here, as on a served simulator.
    #[test]
    fn a_reading_is_stamped_within_its_exchange_however_late_the_thread_looks() {
        let clock = RealClock::scaled(10.0);
        let asked = clock.now_s();
        let sent = Instant::now();
        std::thread::sleep(Duration::from_millis(10));
        let exchange = Exchange::since(sent);
        std::thread::sleep(Duration::from_millis(80));
        let (t, took) = stamp(&clock, Some(exchange), asked);
        let (from, to) = (
            clock.at_s(exchange.sent).unwrap(),
            clock.at_s(exchange.answered).unwrap(),
        );
        assert!((took - (to - from)).abs() < 1e-9, "{took} vs {from}..{to}");
        assert!(took >= 0.1, "10 ms real is 0.1 s of bench time: {took}");
        assert!(from <= t && t <= to, "{t} outside {from}..{to}");
        assert!(
            clock.now_s() - t > 0.8,
            "the 80 ms the thread waited after the reply are not in the stamp"
        );
    }

    /// Without timed exchanges (the simulator's virtual clock) a reading stands for the whole
    /// call: its middle, and its length.
    #[test]
    fn without_a_timed_exchange_the_whole_call_counts() {
        let clock = VirtualClock::default();
        clock.sleep_s(5.0);
        let asked = clock.now_s();
        clock.sleep_s(0.2);
        let (t, took) = stamp(&clock, Some(Exchange::since(Instant::now())), asked);
        assert!(
            (t - 5.1).abs() < 1e-12 && (took - 0.2).abs() < 1e-12,
            "{t} {took}"
        );
        let (t, took) = stamp(&clock, None, asked);
        assert!(
            (t - 5.1).abs() < 1e-12 && (took - 0.2).abs() < 1e-12,
            "{t} {took}"
        );
    }
}
