//! The bench: its clock, its load source, its reference instrument and its positions.
//!
//! Each piece of hardware sits behind a trait, so that the built-in simulator and a real station
//! drive the same executor.

pub mod counter;
pub mod operator;
pub mod reference_file;
pub mod scpi;
pub mod sim;
pub mod station;

use crate::link::DutLink;
use crate::plan::{Load, Quantity};
use serde::{Deserialize, Serialize};
use std::sync::{Arc, Mutex};
use std::time::{Duration, Instant};

/// Bench time: seconds since the bench was set up.
pub trait Clock: Send + Sync {
    fn now_s(&self) -> f64;
    fn sleep_s(&self, seconds: f64);
    /// Whether time passes only when asked to (the simulator), or for real.
    fn is_virtual(&self) -> bool;
    /// Bench seconds per real second: 1 on a real bench.
    fn scale(&self) -> f64 {
        1.0
    }
    /// The bench time of a real moment (a link's exchange), for a clock that runs in real
    /// time; `None` for one that does not (the simulator's, where no exchange is timed).
    fn at_s(&self, _when: Instant) -> Option<f64> {
        None
    }
}

/// A clock that jumps instead of waiting: the simulator never sleeps for real.
#[derive(Debug, Default)]
pub struct VirtualClock {
    now: Mutex<f64>,
}

impl Clock for VirtualClock {
    fn now_s(&self) -> f64 {
        *self.now.lock().unwrap_or_else(|p| p.into_inner())
    }
    fn sleep_s(&self, seconds: f64) {
        if seconds > 0.0 {
            *self.now.lock().unwrap_or_else(|p| p.into_inner()) += seconds;
        }
    }
    fn is_virtual(&self) -> bool {
        true
    }
}

/// Wall-clock time, for real benches; a simulated station may run it faster (`scale` bench
/// seconds per real second).
#[derive(Debug)]
pub struct RealClock {
    start: Instant,
    scale: f64,
}

impl Default for RealClock {
    fn default() -> Self {
        RealClock::scaled(1.0)
    }
}

impl RealClock {
    pub fn scaled(scale: f64) -> RealClock {
        RealClock {
            start: Instant::now(),
            scale,
        }
    }
}

impl Clock for RealClock {
    fn now_s(&self) -> f64 {
        self.start.elapsed().as_secs_f64() * self.scale
    }
    fn sleep_s(&self, seconds: f64) {
        if seconds > 0.0 {
            std::thread::sleep(Duration::from_secs_f64(seconds / self.scale));
        }
    }
    fn is_virtual(&self) -> bool {
        false
    }
    fn scale(&self) -> f64 {
        self.scale
    }
    fn at_s(&self, when: Instant) -> Option<f64> {
        let s = match when.checked_duration_since(self.start) {
            Some(after) => after.as_secs_f64(),
            None => -self.start.duration_since(when).as_secs_f64(),
        };
        Some(s * self.scale)
    }
}

/// A failure of the source or the reference instrument.
#[derive(Debug, Clone, PartialEq, thiserror::Error)]
pub enum BenchError {
    #[error("load source: {0}")]
    Source(String),
    #[error("reference: {0}")]
    Reference(String),
    #[error("pulse counter: {0}")]
    Counter(String),
    /// The operator skipped the step.
    #[error("skipped by the operator: {0}")]
    Skipped(String),
    /// The run was stopped: by the operator, Ctrl-C or the end of input.
    #[error("aborted: {0}")]
    Aborted(String),
}

/// What drives the current through the positions.
pub trait LoadSource: Send {
    fn describe(&self) -> String;
    fn apply(&mut self, load: &Load) -> Result<(), BenchError>;
    fn off(&mut self) -> Result<(), BenchError>;
}

/// The load source, shared: the engine drives it, and a second stop signal may switch its
/// output off from the signal handler's thread while the engine still holds the bench. Every
/// operation takes the lock for its own length only (an SCPI transaction, an operator's
/// answer), so `off_within` gets its turn quickly.
#[derive(Clone)]
pub struct SourceHandle(Arc<Mutex<Box<dyn LoadSource>>>);

impl SourceHandle {
    pub fn new(source: Box<dyn LoadSource>) -> SourceHandle {
        SourceHandle(Arc::new(Mutex::new(source)))
    }

    fn lock(&self) -> std::sync::MutexGuard<'_, Box<dyn LoadSource>> {
        self.0.lock().unwrap_or_else(|p| p.into_inner())
    }

    pub fn describe(&self) -> String {
        self.lock().describe()
    }

    pub fn apply(&self, load: &Load) -> Result<(), BenchError> {
        self.lock().apply(load)
    }

    pub fn off(&self) -> Result<(), BenchError> {
        self.lock().off()
    }

    /// Switches the output off from another thread, waiting at most `wait` for an operation
    /// in progress to finish; says so when it could not get its turn.
    pub fn off_within(&self, wait: Duration) -> Result<(), BenchError> {
        let start = Instant::now();
        loop {
            match self.0.try_lock() {
                Ok(mut s) => return s.off(),
                Err(std::sync::TryLockError::Poisoned(p)) => return p.into_inner().off(),
                Err(std::sync::TryLockError::WouldBlock) if start.elapsed() < wait => {
                    std::thread::sleep(Duration::from_millis(10));
                }
                Err(std::sync::TryLockError::WouldBlock) => {
                    return Err(BenchError::Source(format!(
                        "the source was busy for {} ms and could not be switched off",
                        wait.as_millis()
                    )));
                }
            }
        }
    }

    /// Replaces the source (to wrap it, as the operator's hand-set load wraps the simulator's).
    pub fn wrap(&self, f: impl FnOnce(Box<dyn LoadSource>) -> Box<dyn LoadSource>) {
        let mut slot = self.lock();
        let inner = std::mem::replace(&mut *slot, Box::new(NoSource));
        *slot = f(inner);
    }
}

/// A source that does nothing: a placeholder while a source is being wrapped.
pub struct NoSource;

impl LoadSource for NoSource {
    fn describe(&self) -> String {
        "none".into()
    }
    fn apply(&mut self, _: &Load) -> Result<(), BenchError> {
        Ok(())
    }
    fn off(&mut self) -> Result<(), BenchError> {
        Ok(())
    }
}

/// A request for the reference value of one quantity over a step's sampling window.
#[derive(Debug, Clone)]
pub struct ReferenceRequest<'a> {
    pub step_id: &'a str,
    pub quantity: Quantity,
    pub load: &'a Load,
    /// Bench times of the first and last sample.
    pub window: (f64, f64),
}

/// A reference value and where it came from.
#[derive(Debug, Clone, PartialEq, Serialize, Deserialize)]
pub struct ReferenceReading {
    pub value: f64,
    /// "instrument", "operator" or "file".
    pub source: String,
    /// Bench time the reading was taken or entered.
    pub taken_at_s: f64,
    /// The text as typed or imported, where a person or a file gave it.
    #[serde(skip_serializing_if = "Option::is_none", default)]
    pub as_given: Option<String>,
    /// Everything the operator typed for this reading, refused entries and corrections included.
    #[serde(skip_serializing_if = "Vec::is_empty", default)]
    pub entries: Vec<operator::TypedEntry>,
    /// Bench times of the first and last sample of the window the reading stands for, so that
    /// a reference energy (and its scaling to a register's span) can be redone from the record.
    #[serde(skip_serializing_if = "Option::is_none", default)]
    pub window_s: Option<(f64, f64)>,
    /// For an energy the reference did not count itself but inferred from its power readings:
    /// those readings, as (bench time s, watts), at the window's start and end.
    #[serde(skip_serializing_if = "Vec::is_empty", default)]
    pub power_readings: Vec<(f64, f64)>,
}

/// The instrument (or person, or file) that says what really flowed.
pub trait ReferenceMeter: Send {
    fn read(&mut self, request: &ReferenceRequest) -> Result<ReferenceReading, BenchError>;

    /// The quantities of the load itself (current, voltage, power factor, frequency) that this
    /// reference reads without troubling anybody: an instrument's, not an operator's. The
    /// engine reads them at every step to prove the load is the one the plan asked for.
    fn load_quantities(&self) -> Vec<Quantity> {
        Vec::new()
    }

    /// Reads one of [`load_quantities`](Self::load_quantities) to confirm the load (by default
    /// as any other reading; the simulator draws its noise from a stream of its own, so that
    /// the checks' readings stay those of a bench that does not confirm).
    fn read_load(&mut self, request: &ReferenceRequest) -> Result<ReferenceReading, BenchError> {
        self.read(request)
    }

    /// The engine is about to take the first sample of a window over which an energy will be
    /// asked for. A reference that infers energy from power reads its power now, so that the
    /// energy stands on the power at both ends of the window and the drift between them is
    /// known.
    fn window_starts(&mut self, _at_s: f64) -> Result<(), BenchError> {
        Ok(())
    }

    /// Whether a reading can be taken again over another window without troubling anybody (an
    /// instrument or a file, not a person): a step sampled until decided then reads its
    /// references again over the window it finally sampled, instead of scaling an earlier one.
    fn reads_again_freely(&self) -> bool {
        !self.load_quantities().is_empty()
    }
}

/// The quantities that describe a load, as a reference can confirm it.
pub const LOAD_QUANTITIES: [Quantity; 4] = [
    Quantity::Current,
    Quantity::Voltage,
    Quantity::PowerFactor,
    Quantity::Frequency,
];

/// Identity and traceability of a reference instrument.
#[derive(Debug, Clone, PartialEq, Serialize, Deserialize)]
pub struct InstrumentInfo {
    pub id: String,
    pub description: String,
    /// Calibration certificate number.
    #[serde(default)]
    pub certificate: Option<String>,
    /// Date the calibration is due, YYYY-MM-DD.
    #[serde(default)]
    pub calibration_due: Option<String>,
    /// Accuracy specification as the data sheet states it.
    #[serde(default)]
    pub accuracy: Option<String>,
    /// The instrument's range for each quantity (for the range term of its accuracy), base units.
    #[serde(default)]
    pub ranges: std::collections::BTreeMap<String, f64>,
}

/// The bench as recorded: which station, which reference.
#[derive(Debug, Clone, PartialEq, Serialize, Deserialize)]
pub struct StationInfo {
    pub id: String,
    pub description: String,
    pub reference: InstrumentInfo,
    pub source: String,
    /// The bench's stated ambient temperature, °C (class limits by temperature band use it).
    #[serde(default, skip_serializing_if = "Option::is_none")]
    pub ambient_c: Option<f64>,
    /// The counter of the units' test outputs, where the station has one.
    #[serde(default, skip_serializing_if = "Option::is_none")]
    pub counter: Option<counter::CounterInfo>,
}

/// One test position and the link to the unit in it.
pub struct Position {
    /// 1-based, as the positions are labelled on the bench.
    pub number: usize,
    pub link: Box<dyn DutLink>,
    /// The serial number scanned or given for this position, to cross-check with the unit's.
    pub expected_serial: Option<String>,
}

/// Everything the executor needs to run a plan.
pub struct Bench {
    pub station: StationInfo,
    pub clock: Arc<dyn Clock>,
    pub source: SourceHandle,
    pub reference: Box<dyn ReferenceMeter>,
    /// The counter of the units' test outputs, where the station has one.
    pub counter: Option<counter::CounterHandle>,
    pub positions: Vec<Position>,
    /// Whether positions are read concurrently (links that wait on real ports).
    pub parallel: bool,
    /// Set by Ctrl-C: the run stops at the next reading, keeps what it took, and ends.
    pub interrupt: Arc<std::sync::atomic::AtomicBool>,
    /// Who to ask when a unit reports another serial than the one scanned for its position
    /// (before any load): the operator, who may scan it again. None: the unit sits out.
    pub rescan: Option<Box<dyn operator::Rescan>>,
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn the_virtual_clock_jumps_and_never_goes_back() {
        let c = VirtualClock::default();
        c.sleep_s(2.5);
        c.sleep_s(-1.0);
        assert_eq!(c.now_s(), 2.5);
        assert!(c.is_virtual());
    }
}
