//! The simulated meters' test outputs and the counter that counts them.
//!
//! Each meter sends a pulse each time its own energy register (which integrates the power it
//! measures, with its errors) passes another 1/k kWh, starting from a first-pulse phase of its
//! own (a meter's pulse accumulator holds a part of a pulse when the load comes on). So the
//! counts carry the unit's energy error, the ±1-pulse quantisation of a gate and the phase at
//! which a count starts, as a real test output does.

use super::{World, lock};
use crate::bench::BenchError;
use crate::bench::counter::{CounterMode, CounterReading, PulseCounter};
use crate::bench::sim::device::LineDevice;
use std::sync::{Arc, Mutex};

/// The simulated meters' constant, imp/kWh (the TM-16's, as the demo plans rate it).
pub const SIM_METER_CONSTANT: f64 = 1000.0;

/// A reference standard's pulse output, counted by the simulated counter beside the units':
/// it pulses from the energy the source really delivered, with the simulated reference's error.
#[derive(Debug, Clone, Copy)]
pub struct ReferencePulses {
    /// imp/kWh.
    pub constant: f64,
    /// The part of a pulse its accumulator held at the start.
    pub phase: f64,
    /// Its fixed relative error.
    pub gain: f64,
}

/// One input's state since its start.
#[derive(Debug, Clone, Copy, Default)]
struct Input {
    active: bool,
    /// The whole pulses the meter had sent when the input started.
    base: f64,
    /// (bench time, pulse level) at the last look: edges between two looks are placed by
    /// interpolation, exact while the power is steady.
    last: (f64, f64),
    first_s: Option<f64>,
    /// Pulses counted since the first edge and the time of the latest.
    latest: (u64, f64),
    /// The reference standard's pulse level at the start.
    reference_start: f64,
}

/// The simulated counter: an input per meter, acting on the simulated world.
pub struct SimCounter {
    world: Arc<Mutex<World>>,
    mode: CounterMode,
    inputs: Vec<Input>,
    reference: Option<ReferencePulses>,
}

impl SimCounter {
    pub(super) fn new(world: Arc<Mutex<World>>, reference: Option<ReferencePulses>) -> SimCounter {
        let n = lock(&world).meters.len();
        SimCounter {
            world,
            mode: CounterMode::Totalize,
            inputs: vec![Input::default(); n],
            reference,
        }
    }

    /// The reference standard's pulse level at bench time `t` (since the last load change).
    fn reference_level(&self, t: f64) -> f64 {
        let Some(r) = self.reference else {
            return 0.0;
        };
        let energy = lock(&self.world).true_energy_at(t);
        energy * (1.0 + r.gain) * r.constant / 1000.0 + r.phase
    }

    /// The reference's whole pulses between two bench times.
    fn reference_pulses(&self, from: f64, to: f64) -> Option<u64> {
        self.reference?;
        Some(
            (self.reference_level(to).floor() - self.reference_level(from).floor()).max(0.0) as u64,
        )
    }

    /// Bench time now and meter `index`'s pulse level: pulses sent (with the fraction under
    /// way) since it was made.
    fn level(&self, index: usize) -> (f64, f64) {
        let mut world = lock(&self.world);
        let now = world.clock.now_s();
        world.advance_energy(index, now);
        let meter = &world.meters[index];
        let level = meter.energy_wh * SIM_METER_CONSTANT / 1000.0 + meter.pulse_phase;
        (now, level)
    }

    fn index(&self, position: usize) -> Result<usize, BenchError> {
        (1..=self.inputs.len())
            .contains(&position)
            .then(|| position - 1)
            .ok_or_else(|| BenchError::Counter(format!("no input for position {position}")))
    }
}

impl PulseCounter for SimCounter {
    fn describe(&self) -> String {
        format!("simulated counter, {} inputs", self.inputs.len())
    }

    fn start(&mut self, positions: &[usize], mode: CounterMode) -> Result<(), BenchError> {
        self.mode = mode;
        for input in &mut self.inputs {
            input.active = false;
        }
        for &p in positions {
            let i = self.index(p)?;
            let (now, level) = self.level(i);
            self.inputs[i] = Input {
                active: true,
                base: level.floor(),
                last: (now, level),
                first_s: None,
                latest: (0, now),
                reference_start: self.reference_level(now),
            };
        }
        Ok(())
    }

    fn read(&mut self, position: usize) -> Result<CounterReading, BenchError> {
        let i = self.index(position)?;
        if !self.inputs[i].active {
            return Err(BenchError::Counter(format!(
                "input {position} was not started"
            )));
        }
        let (now, level) = self.level(i);
        let reference_now = self.reference_level(now);
        let reference = self.reference.is_some();
        let input = &mut self.inputs[i];
        let whole = (level.floor() - input.base).max(0.0) as u64;
        let CounterMode::TimePulses { pulses: wanted } = self.mode else {
            return Ok(CounterReading {
                pulses: whole,
                edges_s: None,
                reference_pulses: reference.then(|| {
                    (reference_now.floor() - input.reference_start.floor()).max(0.0) as u64
                }),
            });
        };
        let ((t0, l0), base) = (input.last, input.base);
        let edge_at = |pulse: u64| {
            let m = base + pulse as f64;
            if level > l0 {
                t0 + (m - l0) / (level - l0) * (now - t0)
            } else {
                now
            }
        };
        if input.first_s.is_none() && whole >= 1 {
            input.first_s = Some(edge_at(1));
        }
        if let Some(first) = input.first_s {
            let counted = (whole - 1).min(wanted);
            if counted > input.latest.0 {
                input.latest = (counted, edge_at(counted + 1));
            } else if counted == 0 {
                input.latest = (0, first);
            }
        }
        // Once the count is complete the input holds it.
        if input.latest.0 < wanted {
            input.last = (now, level);
        }
        let edges_s = input.first_s.map(|f| (f, input.latest.1));
        Ok(CounterReading {
            pulses: input.latest.0,
            edges_s,
            // Counted from the unit's first edge to its latest, as an error calculator gates it.
            reference_pulses: match edges_s {
                Some((a, b)) => self.reference_pulses(a, b),
                None => self.reference.map(|_| 0),
            },
        })
    }

    fn stop(&mut self) -> Result<(), BenchError> {
        for input in &mut self.inputs {
            input.active = false;
        }
        Ok(())
    }
}

/// Faults the served counter can be told to have.
#[derive(Debug, Clone, Copy, Default, PartialEq)]
pub struct CounterFaults {
    /// Every Nth query is answered with noise.
    pub garble_every: Option<u64>,
    /// After N requests the counter answers nothing more.
    pub die_after: Option<u64>,
}

impl CounterFaults {
    /// Reads `garble-every=N` or `die-after=N`.
    pub fn parse(text: &str) -> Result<CounterFaults, String> {
        let help = "write a counter fault as garble-every=N or die-after=N";
        let (kind, n) = text
            .split_once('=')
            .ok_or_else(|| format!("\"{text}\": {help}"))?;
        let n: u64 = n
            .trim()
            .parse()
            .ok()
            .filter(|n| *n > 0)
            .ok_or_else(|| format!("\"{n}\" is not a count above 0: {help}"))?;
        let mut f = CounterFaults::default();
        match kind.trim() {
            "garble-every" => f.garble_every = Some(n),
            "die-after" => f.die_after = Some(n),
            other => return Err(format!("unknown counter fault \"{other}\": {help}")),
        }
        Ok(f)
    }
}

/// The simulated counter on a port, speaking this project's SCPI-style commands:
/// `TOT:STAR (@1,2)`, `TOT:COUN? (@1)`, `TINT:ARM (@1,2),25`, `TINT:STAT? (@1)`, `ABOR`, and
/// `REF:COUN? (@1)` (the reference standard's pulses latched with input 1's last reading).
pub struct ScpiCounterDevice {
    counter: SimCounter,
    armed_at_s: f64,
    errors: Vec<&'static str>,
    /// The reference's pulses latched with each input's last reading.
    latched: std::collections::BTreeMap<usize, u64>,
    faults: CounterFaults,
    requests: u64,
}

/// The station file's counter commands for the simulated counter.
pub const COUNTER_COMMANDS: [(&str, &str); 5] = [
    ("totalize", "TOT:STAR (@{inputs})"),
    ("count", "TOT:COUN? (@{input})"),
    ("time_pulses", "TINT:ARM (@{inputs}),{pulses}"),
    ("pulse_times", "TINT:STAT? (@{input})"),
    ("stop", "ABOR"),
];

impl ScpiCounterDevice {
    pub fn new(counter: SimCounter, faults: CounterFaults) -> ScpiCounterDevice {
        ScpiCounterDevice {
            counter,
            armed_at_s: 0.0,
            errors: Vec::new(),
            latched: Default::default(),
            faults,
            requests: 0,
        }
    }

    fn now(&self) -> f64 {
        lock(&self.counter.world).clock.now_s()
    }

    fn latch(&mut self, input: usize, reference: Option<u64>) {
        match reference {
            Some(n) => self.latched.insert(input, n),
            None => self.latched.remove(&input),
        };
    }
}

/// The inputs of a channel list `(@1,2,3)`.
fn channel_list(text: &str) -> Option<Vec<usize>> {
    let inner = text.trim().strip_prefix("(@")?.strip_suffix(')')?;
    inner
        .split(',')
        .map(|p| p.trim().parse::<usize>().ok().filter(|n| *n >= 1))
        .collect()
}

impl LineDevice for ScpiCounterDevice {
    fn handle(&mut self, request: &str) -> Vec<String> {
        self.requests += 1;
        if self.faults.die_after.is_some_and(|n| self.requests > n) {
            return Vec::new();
        }
        let reply = self.answer(request);
        match self.faults.garble_every {
            Some(n) if self.requests.is_multiple_of(n) && !reply.is_empty() => {
                vec!["#?!\u{7f}".to_string()]
            }
            _ => reply,
        }
    }
}

impl ScpiCounterDevice {
    fn answer(&mut self, request: &str) -> Vec<String> {
        if let Some(reply) = super::instruments::common(
            request,
            "Tallowmere Test Systems,SIM-COUNTER,SIM-CNT-1,1.0",
            &mut self.errors,
        ) {
            return reply;
        }
        let text = request.trim().to_ascii_uppercase();
        let (header, args) = text.split_once(' ').unwrap_or((text.as_str(), ""));
        let result: Result<Vec<String>, BenchError> = match header {
            "TOT:STAR" => match channel_list(args) {
                Some(inputs) => {
                    self.armed_at_s = self.now();
                    self.counter
                        .start(&inputs, CounterMode::Totalize)
                        .map(|_| Vec::new())
                }
                None => Err(BenchError::Counter(String::new())),
            },
            "TINT:ARM" => {
                let (list, pulses) = args.rsplit_once(',').unwrap_or((args, ""));
                match (channel_list(list), pulses.trim().parse::<u64>()) {
                    (Some(inputs), Ok(pulses)) if pulses >= 1 => {
                        self.armed_at_s = self.now();
                        self.counter
                            .start(&inputs, CounterMode::TimePulses { pulses })
                            .map(|_| Vec::new())
                    }
                    _ => Err(BenchError::Counter(String::new())),
                }
            }
            "TOT:COUN?" => match channel_list(args).as_deref() {
                Some([input]) => self.counter.read(*input).map(|r| {
                    self.latch(*input, r.reference_pulses);
                    vec![r.pulses.to_string()]
                }),
                _ => Err(BenchError::Counter(String::new())),
            },
            "REF:COUN?" => match channel_list(args).as_deref() {
                Some([input]) => self
                    .latched
                    .get(input)
                    .map(|n| vec![n.to_string()])
                    .ok_or_else(|| BenchError::Counter(String::new())),
                _ => Err(BenchError::Counter(String::new())),
            },
            "TINT:STAT?" => match channel_list(args).as_deref() {
                Some([input]) => self.counter.read(*input).map(|r| {
                    self.latch(*input, r.reference_pulses);
                    let since = |t: f64| format!("{:.6}", t - self.armed_at_s);
                    vec![match r.edges_s {
                        Some((a, b)) => format!("{},{},{}", r.pulses, since(a), since(b)),
                        None => format!("{},9.91E37,9.91E37", r.pulses),
                    }]
                }),
                _ => Err(BenchError::Counter(String::new())),
            },
            "ABOR" => self.counter.stop().map(|_| Vec::new()),
            _ => Err(BenchError::Counter(String::new())),
        };
        result.unwrap_or_else(|_| {
            self.errors.push(super::instruments::UNDEFINED_HEADER);
            Vec::new()
        })
    }
}

#[cfg(test)]
mod tests {
    use super::*;

    /// The served counter's faults read as written; anything else is refused and says how to
    /// write one.
    #[test]
    fn counter_faults_read_as_written() {
        assert_eq!(
            CounterFaults::parse("garble-every=9").unwrap().garble_every,
            Some(9)
        );
        assert_eq!(
            CounterFaults::parse("die-after=30").unwrap().die_after,
            Some(30)
        );
        for bad in ["garble-every", "die-after=0", "explode=3", "die-after=x"] {
            let e = CounterFaults::parse(bad).unwrap_err();
            assert!(e.contains("garble-every=N or die-after=N"), "{bad}: {e}");
        }
    }

    /// The built-in counter's inputs are the positions: a position it lacks, or one not
    /// started, is named.
    #[test]
    fn a_position_without_an_input_is_named() {
        let sim = super::super::SimBench::new(&super::super::SimConfig::new(1, 2));
        let mut counter = sim.counter();
        assert!(
            counter
                .start(&[3], CounterMode::Totalize)
                .unwrap_err()
                .to_string()
                .contains("no input for position 3")
        );
        counter.start(&[1], CounterMode::Totalize).unwrap();
        assert!(
            counter
                .read(2)
                .unwrap_err()
                .to_string()
                .contains("input 2 was not started")
        );
        assert_eq!(counter.read(1).unwrap().pulses, 0);
    }
}
