//! The counter that counts each unit's test output: the pulses a meter sends at its meter
//! constant (an LED or an S0 contact), one counter input per position.
//!
//! Two ways of counting, as the trade does (see `metrology::pulses`): totalizing from a start
//! (the count over a fixed time is the difference of two readings, like a register's), and
//! timing a fixed number of pulses from one pulse edge to another, which the counter does on
//! its own time base so that the host's reading times do not enter.

use super::{BenchError, Clock};
use crate::link::LinkError;
use crate::link::line::{LineChannel, LineSettings, Wire};
use regex::Regex;
use serde::{Deserialize, Serialize};
use std::sync::{Arc, LazyLock, Mutex};

/// What the counter is asked to do from its start.
#[derive(Debug, Clone, Copy, PartialEq)]
pub enum CounterMode {
    /// Count every pulse from the start.
    Totalize,
    /// Wait for the next pulse edge, then time `pulses` more.
    TimePulses { pulses: u64 },
}

/// One input's state.
#[derive(Debug, Clone, Copy, PartialEq, Default)]
pub struct CounterReading {
    /// Totalize: pulses since the start. Timing pulses: pulses since the first edge, at most
    /// the number asked for.
    pub pulses: u64,
    /// Timing pulses: bench times of the first edge and of the latest edge counted.
    pub edges_s: Option<(f64, f64)>,
    /// Where the counter also counts a reference standard's pulse output: its pulses over the
    /// same interval (since the start; or from the first edge to the latest), latched with the
    /// unit's count.
    pub reference_pulses: Option<u64>,
}

/// A counter with an input per position.
pub trait PulseCounter: Send {
    fn describe(&self) -> String;
    /// Starts the inputs of the given positions (1-based numbers) in `mode`, now.
    fn start(&mut self, positions: &[usize], mode: CounterMode) -> Result<(), BenchError>;
    /// The state of one position's input.
    fn read(&mut self, position: usize) -> Result<CounterReading, BenchError>;
    /// Ends counting on every input.
    fn stop(&mut self) -> Result<(), BenchError>;
    /// The attempt that answered the last read: after a retry the count was latched then,
    /// not when the first attempt was sent. `None` when instant.
    fn last_exchange(&self) -> Option<crate::link::Exchange> {
        None
    }
}

/// The counter, shared by the positions' sampling threads: every operation takes the lock for
/// one transaction.
#[derive(Clone)]
pub struct CounterHandle(Arc<Mutex<Box<dyn PulseCounter>>>);

impl CounterHandle {
    pub fn new(counter: Box<dyn PulseCounter>) -> CounterHandle {
        CounterHandle(Arc::new(Mutex::new(counter)))
    }

    fn lock(&self) -> std::sync::MutexGuard<'_, Box<dyn PulseCounter>> {
        self.0.lock().unwrap_or_else(|p| p.into_inner())
    }

    pub fn describe(&self) -> String {
        self.lock().describe()
    }

    pub fn start(&self, positions: &[usize], mode: CounterMode) -> Result<(), BenchError> {
        self.lock().start(positions, mode)
    }

    pub fn read(&self, position: usize) -> Result<CounterReading, BenchError> {
        self.lock().read(position)
    }

    /// A read with the exchange its answered attempt was, under one lock.
    pub fn read_timed(
        &self,
        position: usize,
    ) -> Result<(CounterReading, Option<crate::link::Exchange>), BenchError> {
        let mut counter = self.lock();
        let reading = counter.read(position)?;
        Ok((reading, counter.last_exchange()))
    }

    pub fn stop(&self) -> Result<(), BenchError> {
        self.lock().stop()
    }
}

/// Identity and specification of the counter, as records keep it.
#[derive(Debug, Clone, PartialEq, Serialize, Deserialize)]
pub struct CounterInfo {
    pub id: String,
    pub description: String,
    /// The time base's accuracy, ± relative (5 ppm is 5·10⁻⁶).
    #[serde(default)]
    pub timebase: Option<f64>,
    /// How closely an edge is timed, ± seconds.
    #[serde(default)]
    pub edge_s: Option<f64>,
    /// Where the counter also counts the reference standard's pulse output: its constant,
    /// imp/kWh. The reference energy of a count is then the standard's pulses over the same
    /// interval, N_ref / k_ref.
    #[serde(default, skip_serializing_if = "Option::is_none")]
    pub reference_constant: Option<f64>,
    /// One measuring input switched from position to position (a scanning multiplexer): the
    /// units are counted one after another.
    #[serde(default, skip_serializing_if = "std::ops::Not::not")]
    pub multiplexer: bool,
}

/// The commands of a counter with a line interface; `{inputs}` is a comma-separated list of
/// inputs, `{input}` one input, `{pulses}` the number of pulses to time.
#[derive(Debug, Clone, PartialEq)]
pub struct CounterCommands {
    /// Starts totalizing on `{inputs}`.
    pub totalize: String,
    /// Asks one input's count: one number back.
    pub count: String,
    /// Arms `{inputs}` to time `{pulses}` pulses from the next edge.
    pub time_pulses: String,
    /// Asks one input's timing: `pulses,first,latest` back, the two times in seconds since it
    /// was armed, 9.91E37 (SCPI's not-a-number) while there is none.
    pub pulse_times: String,
    pub stop: String,
    /// Asks the reference standard's pulses latched with `{input}`'s last reading: one number.
    pub reference_count: Option<String>,
}

/// The placeholders each command may hold.
pub const COUNTER_PLACEHOLDERS: [(&str, &[&str]); 6] = [
    ("totalize", &["inputs"]),
    ("count", &["input"]),
    ("time_pulses", &["inputs", "pulses"]),
    ("pulse_times", &["input"]),
    ("stop", &[]),
    ("reference_count", &["input"]),
];

/// SCPI's not-a-number, sent for a value not (yet) measured (SCPI-99, vol. 1, 7.2.1.5; from
/// memory).
const SCPI_NAN: f64 = 9.91e37;

static NUMBER: LazyLock<Regex> = LazyLock::new(|| {
    Regex::new(r"^\s*[-+]?(\d+\.?\d*|\.\d+)([eE][-+]?\d+)?\s*$").expect("a valid pattern")
});
static THREE_NUMBERS: LazyLock<Regex> = LazyLock::new(|| {
    let n = r"\s*[-+]?(?:\d+\.?\d*|\.\d+)(?:[eE][-+]?\d+)?\s*";
    Regex::new(&format!("^{n},{n},{n}$")).expect("a valid pattern")
});

/// A counter on a line channel, its commands from the station file.
pub struct ScpiCounter<W: Wire> {
    channel: LineChannel<W>,
    commands: CounterCommands,
    /// Each position's input (position number, input number).
    inputs: Vec<(usize, u32)>,
    clock: Arc<dyn Clock>,
    /// Bench time of the last arming, which the counter's times count from.
    armed_at_s: f64,
    mode: CounterMode,
}

fn counter_error(e: LinkError) -> BenchError {
    BenchError::Counter(e.to_string())
}

impl<W: Wire> ScpiCounter<W> {
    pub fn new(
        wire: W,
        settings: LineSettings,
        (commands, inputs): (CounterCommands, Vec<(usize, u32)>),
        clock: Arc<dyn Clock>,
        name: &str,
    ) -> Self {
        ScpiCounter {
            channel: LineChannel::new(settings, wire, name),
            commands,
            inputs,
            clock,
            armed_at_s: 0.0,
            mode: CounterMode::Totalize,
        }
    }

    fn input(&self, position: usize) -> u32 {
        self.inputs
            .iter()
            .find(|(p, _)| *p == position)
            .map_or(position as u32, |(_, i)| *i)
    }

    /// The reference standard's pulses latched with `input`'s last reading, where the station
    /// has the counter count them.
    fn reference_count(&mut self, input: &str) -> Result<Option<u64>, BenchError> {
        let Some(query) = self.commands.reference_count.clone() else {
            return Ok(None);
        };
        let query = query.replace("{input}", input);
        let line = self
            .channel
            .transact(&query, &NUMBER)
            .map_err(counter_error)?;
        parse_count(&line).map(Some).ok_or_else(|| {
            BenchError::Counter(format!(
                "input {input}: \"{}\" is not a count of the reference's pulses",
                line.trim()
            ))
        })
    }

    fn inputs_of(&self, positions: &[usize]) -> String {
        positions
            .iter()
            .map(|p| self.input(*p).to_string())
            .collect::<Vec<_>>()
            .join(",")
    }
}

impl<W: Wire> PulseCounter for ScpiCounter<W> {
    fn describe(&self) -> String {
        format!("counter on {}", self.channel.name())
    }

    fn start(&mut self, positions: &[usize], mode: CounterMode) -> Result<(), BenchError> {
        let inputs = self.inputs_of(positions);
        let command = match mode {
            CounterMode::Totalize => self.commands.totalize.replace("{inputs}", &inputs),
            CounterMode::TimePulses { pulses } => self
                .commands
                .time_pulses
                .replace("{inputs}", &inputs)
                .replace("{pulses}", &pulses.to_string()),
        };
        self.armed_at_s = self.clock.now_s();
        self.mode = mode;
        self.channel.send_only(&command).map_err(counter_error)
    }

    fn read(&mut self, position: usize) -> Result<CounterReading, BenchError> {
        let input = self.input(position).to_string();
        if self.mode == CounterMode::Totalize {
            let query = self.commands.count.replace("{input}", &input);
            let line = self
                .channel
                .transact(&query, &NUMBER)
                .map_err(counter_error)?;
            let pulses = parse_count(&line).ok_or_else(|| {
                BenchError::Counter(format!(
                    "input {input}: \"{}\" is not a count of pulses",
                    line.trim()
                ))
            })?;
            let reference_pulses = self.reference_count(&input)?;
            return Ok(CounterReading {
                pulses,
                edges_s: None,
                reference_pulses,
            });
        }
        let query = self.commands.pulse_times.replace("{input}", &input);
        let line = self
            .channel
            .transact(&query, &THREE_NUMBERS)
            .map_err(counter_error)?;
        let (pulses, edges) = parse_pulse_times(&line).ok_or_else(|| {
            BenchError::Counter(format!(
                "input {input}: \"{}\" is not pulses,first,latest",
                line.trim()
            ))
        })?;
        // Before the first edge there is nothing of the reference's to count.
        let reference_pulses = if edges.is_some() {
            self.reference_count(&input)?
        } else {
            None
        };
        Ok(CounterReading {
            pulses,
            edges_s: edges.map(|(a, b)| (self.armed_at_s + a, self.armed_at_s + b)),
            reference_pulses,
        })
    }

    fn stop(&mut self) -> Result<(), BenchError> {
        let stop = self.commands.stop.clone();
        self.channel.send_only(&stop).map_err(counter_error)
    }

    fn last_exchange(&self) -> Option<crate::link::Exchange> {
        self.channel.last_exchange()
    }
}

/// Reads a totalized count: one number.
pub fn parse_count(line: &str) -> Option<u64> {
    if !NUMBER.is_match(line) {
        return None;
    }
    let v: f64 = line.trim().parse().ok()?;
    (v >= 0.0 && v.fract() == 0.0 && v < SCPI_NAN / 10.0).then_some(v as u64)
}

/// Reads `pulses,first,latest`: the count and, once an edge came, the two times (seconds since
/// arming; SCPI's not-a-number while there is none).
pub fn parse_pulse_times(line: &str) -> Option<(u64, Option<(f64, f64)>)> {
    if !THREE_NUMBERS.is_match(line) {
        return None;
    }
    let v: Vec<f64> = line
        .split(',')
        .map(|p| p.trim().parse::<f64>())
        .collect::<Result<_, _>>()
        .ok()?;
    let pulses = parse_count(&v[0].to_string())?;
    let known = |x: f64| x.is_finite() && x < SCPI_NAN / 10.0;
    let edges = match (known(v[1]), known(v[2])) {
        (true, true) if v[1] >= 0.0 && v[2] >= v[1] => Some((v[1], v[2])),
        (false, false) if pulses == 0 => None,
        _ => return None,
    };
    Some((pulses, edges))
}

#[cfg(test)]
mod tests {
    use super::*;

    /// Replies as the counter sends them; a time running backwards, a fractional count or a
    /// count with no times are refused.
    #[test]
    fn counter_replies() {
        assert_eq!(parse_count("25"), Some(25));
        assert_eq!(parse_count(" 2.5E+01 "), Some(25));
        assert_eq!(parse_count("2.5"), None);
        assert_eq!(parse_count("-1"), None);
        assert_eq!(parse_count("9.91E37"), None);
        assert_eq!(parse_pulse_times("0,9.91E37,9.91E37"), Some((0, None)));
        assert_eq!(
            parse_pulse_times("25,0.75,78.5"),
            Some((25, Some((0.75, 78.5))))
        );
        assert_eq!(parse_pulse_times("25,9.91E37,9.91E37"), None);
        assert_eq!(parse_pulse_times("3,5.0,4.0"), None);
        assert_eq!(parse_pulse_times("3,5.0"), None);
    }

    proptest::proptest! {
        /// Any line at all is either read as a count with ordered times or refused; never a
        /// panic.
        #[test]
        fn any_reply_is_read_or_refused(line in ".{0,40}") {
            if let Some((_, Some((a, b)))) = parse_pulse_times(&line) {
                proptest::prop_assert!(a >= 0.0 && b >= a);
            }
            let _ = parse_count(&line);
        }
    }
}
