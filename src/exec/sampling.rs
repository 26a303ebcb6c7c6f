//! Taking a step's samples from every position at once.
//!
//! On a real clock each position follows the step's sample schedule in its own thread, so a slow
//! or dead unit delays nobody else. On the simulator's virtual clock the positions are read in
//! rounds (time only moves between rounds), concurrently when their links are real ports.

use crate::bench::Clock;
use crate::link::DutLink;
use crate::plan::{Quantity, Step};
use crate::record::Sample;

/// One position's readings over a step's window: a series per wanted reading, and the fault that
/// stopped it early, if one did.
#[derive(Debug, Default)]
pub(super) struct Series {
    pub samples: Vec<Vec<Sample>>,
    pub fault: Option<String>,
}

/// One reading taken from each unit at every sample.
#[derive(Debug, Clone, PartialEq)]
pub(super) struct Wanted {
    pub quantity: Quantity,
    pub channel: String,
    /// The front end's counts (for calibration) instead of the converted value.
    pub raw: bool,
}

/// A position to sample: its link, or `None` when the unit is not being tested.
pub(super) type Slot<'a> = Option<&'a mut Box<dyn DutLink>>;

/// Samples every slot over the step's window; returns the series and the window's bench times.
pub(super) fn sample_step(
    step: &Step,
    wanted: &[Wanted],
    clock: &dyn Clock,
    slots: Vec<Slot>,
    parallel: bool,
) -> (Vec<Series>, (f64, f64)) {
    let t0 = clock.now_s();
    let series = if clock.is_virtual() {
        in_rounds(step, wanted, clock, slots, parallel)
    } else if parallel {
        std::thread::scope(|scope| {
            let handles: Vec<_> = slots
                .into_iter()
                .map(|slot| {
                    scope.spawn(move || {
                        slot.map(|link| on_schedule(step, wanted, clock, t0, link))
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
                    })
                })
                .collect()
        })
    } else {
        slots
            .into_iter()
            .map(|slot| {
                slot.map(|link| on_schedule(step, wanted, clock, t0, link))
                    .unwrap_or_default()
            })
            .collect()
    };
    (series, (t0, clock.now_s()))
}

/// Reads every wanted quantity once from one unit. Each reading is stamped with the time its
/// reply arrived: after a retry that can be well after the sample was due, and a register's
/// advance must be set against the time it really covers.
fn read_once(
    link: &mut dyn DutLink,
    wanted: &[Wanted],
    k: u32,
    step: &Step,
    clock: &dyn Clock,
) -> Result<Vec<Sample>, (Vec<Sample>, String)> {
    let mut values = Vec::with_capacity(wanted.len());
    for Wanted {
        quantity,
        channel,
        raw,
    } in wanted
    {
        let reading = if *raw {
            link.read_raw(*quantity, channel)
        } else {
            link.read(*quantity, channel)
        };
        match reading {
            Ok(value) => values.push(Sample {
                t_s: clock.now_s(),
                value,
            }),
            Err(e) => {
                let why = format!(
                    "sample {} of {}: reading {} on channel {channel}: {e}",
                    k + 1,
                    step.samples,
                    quantity.name()
                );
                return Err((values, why));
            }
        }
    }
    Ok(values)
}

fn push(series: &mut Series, values: &[Sample]) {
    for (s, &sample) in series.samples.iter_mut().zip(values) {
        s.push(sample);
    }
}

fn empty(wanted: usize) -> Series {
    Series {
        samples: vec![Vec::new(); wanted],
        fault: None,
    }
}

/// One unit on its own thread, sample k at t0 + k·interval.
fn on_schedule(
    step: &Step,
    wanted: &[Wanted],
    clock: &dyn Clock,
    t0: f64,
    link: &mut Box<dyn DutLink>,
) -> Series {
    let mut series = empty(wanted.len());
    for k in 0..step.samples {
        let due = t0 + f64::from(k) * step.interval_s;
        clock.sleep_s(due - clock.now_s());
        match read_once(link.as_mut(), wanted, k, step, clock) {
            Ok(values) => push(&mut series, &values),
            Err((partial, why)) => {
                push(&mut series, &partial);
                series.fault = Some(why);
                break;
            }
        }
    }
    series
}

/// Every unit per round; the virtual clock moves between rounds.
fn in_rounds(
    step: &Step,
    wanted: &[Wanted],
    clock: &dyn Clock,
    mut slots: Vec<Slot>,
    parallel: bool,
) -> Vec<Series> {
    let mut all: Vec<Series> = slots
        .iter()
        .map(|s| {
            if s.is_some() {
                empty(wanted.len())
            } else {
                Series::default()
            }
        })
        .collect();
    for k in 0..step.samples {
        let live = slots
            .iter_mut()
            .zip(all.iter_mut())
            .filter(|(slot, series)| slot.is_some() && series.fault.is_none());
        let round = |(slot, series): (&mut Slot, &mut Series)| {
            let link = slot.as_mut().expect("filtered to live slots");
            match read_once(link.as_mut(), wanted, k, step, clock) {
                Ok(values) => push(series, &values),
                Err((partial, why)) => {
                    push(series, &partial);
                    series.fault = Some(why);
                }
            }
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
        if k + 1 < step.samples {
            clock.sleep_s(step.interval_s);
        }
    }
    all
}
