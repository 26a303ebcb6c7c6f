//! The built-in simulated bench: a load source, a reference meter and N meters, on a virtual
//! clock.
//!
//! The physics is simple but honest about what makes bench testing hard:
//! - the source delivers the set load with a small error of its own, which only the reference
//!   sees truly;
//! - every meter has its own gain and offset errors, a phase error, noise, quantisation to counts,
//!   a first-order settling after each load change (time constant τ) and, after switch-on from
//!   no load, a short surge (lamp filaments are cold), so that a settle time too short shows;
//! - the reference meter has a small fixed error and noise of its own;
//! - one meter carries a planted defect (a phase-compensation error) so that the demo has a unit
//!   to reject: it lies at position `seed mod N` + 1 and is reported by [`SimBench::defects`].
//!
//! The same seed gives the same numbers, bit for bit: every random stream is a ChaCha8 stream
//! derived from the seed and the part it drives.
//!
//! Why one file of this length: the source, the reference and the meters share one `World` (one
//! clock, one load, one lock); its physics reads best in one place. The served devices and
//! instruments are the sibling modules.

pub mod device;
pub mod firmware;
pub mod instruments;
pub mod modbus_device;
pub mod readout_device;
pub mod served;
pub mod test_output;

pub use firmware::FirmwareChange;

use super::{
    Bench, BenchError, Clock, InstrumentInfo, LoadSource, Position, ReferenceMeter,
    ReferenceReading, ReferenceRequest, SourceHandle, StationInfo, VirtualClock,
};
pub use front_end::{FrontEnd, front_end};

/// The simulated meter's front end: each quantity is reported in counts,
/// counts = round(value · gain + offset), as a metering chip does.
mod front_end {
    use crate::plan::Quantity;

    #[derive(Debug, Clone, Copy, PartialEq)]
    pub struct FrontEnd {
        /// Counts per unit of the quantity.
        pub gain: f64,
        /// Counts at zero.
        pub offset: f64,
    }

    impl FrontEnd {
        pub fn to_counts(self, value: f64) -> i64 {
            (value * self.gain + self.offset).round() as i64
        }
        pub fn to_value(self, counts: f64) -> f64 {
            (counts - self.offset) / self.gain
        }
    }

    /// The nominal constants of the simulated TM-16 front end, an invented design of our own:
    /// 2240 counts per ampere on the current channel and 128 counts at zero.
    pub fn front_end(quantity: Quantity) -> FrontEnd {
        let (gain, offset) = match quantity {
            Quantity::Current => (2240.0, 128.0),
            Quantity::Voltage => (100.0, 12.0),
            Quantity::ActivePower | Quantity::ReactivePower | Quantity::ApparentPower => {
                (100.0, 0.0)
            }
            Quantity::PowerFactor => (1000.0, 0.0),
            Quantity::Frequency => (1000.0, 0.0),
            Quantity::ActiveEnergy => (1000.0, 0.0),
        };
        FrontEnd { gain, offset }
    }
}
use crate::link::{DutLink, Identity, LinkError};
use crate::plan::{Load, Quantity};
use rand::SeedableRng;
use rand_chacha::ChaCha8Rng;
use rand_distr::{Distribution, Normal};
use std::sync::{Arc, Mutex, MutexGuard};

/// The simulated product's identity (an invented maker's invented smart plug).
pub const SIM_MODEL: &str = "TM-16";
pub const SIM_FIRMWARE: &str = "2.1.4";

/// The simulated counter's identity and specification.
pub fn sim_counter_info() -> crate::bench::counter::CounterInfo {
    crate::bench::counter::CounterInfo {
        id: "SIM-CNT-1".into(),
        description: "simulated pulse counter, an input per position".into(),
        timebase: Some(1e-6),
        edge_s: Some(1e-6),
        reference_constant: None,
        multiplexer: false,
    }
}

/// The simulated reference meter's data-sheet accuracy and ranges.
pub const SIM_REFERENCE_ACCURACY: &str = "0.01 % of reading + 0.005 % of range";

pub fn sim_reference_ranges() -> std::collections::BTreeMap<String, f64> {
    [
        (Quantity::Voltage, 300.0),
        (Quantity::Current, 20.0),
        (Quantity::ActivePower, 6000.0),
        (Quantity::ReactivePower, 6000.0),
        (Quantity::ApparentPower, 6000.0),
        (Quantity::PowerFactor, 1.0),
        (Quantity::Frequency, 100.0),
    ]
    .into_iter()
    .map(|(q, r)| (q.name().to_string(), r))
    .collect()
}

/// Why a simulated meter refused a constant.
#[derive(Debug, Clone, PartialEq, thiserror::Error)]
pub enum ConstantError {
    #[error("no constant {0}")]
    Unknown(String),
    #[error("{value} is not a valid {name}")]
    Invalid { name: String, value: f64 },
}

/// Readings below this current are suppressed to zero power by the simulated firmware (its
/// no-load threshold), as meters do to keep the energy register from creeping.
const NO_LOAD_THRESHOLD_A: f64 = 0.010;
/// Lamp-bank switch-on surge: the peak is this many times the steady current, decaying with
/// `SURGE_TAU_S` (common practice, no published source: cold filaments draw several times their
/// hot current for tens of milliseconds).
const SURGE_FACTOR: f64 = 4.0;
const SURGE_TAU_S: f64 = 0.05;

/// How the simulated bench is built.
#[derive(Debug, Clone)]
pub struct SimConfig {
    pub seed: u64,
    pub positions: usize,
    /// Serial numbers for the positions; generated from the seed when absent.
    pub serials: Option<Vec<String>>,
    /// Whether to plant the phase defect on one position.
    pub plant_defect: bool,
    /// Spread of the meters' settling time constants, seconds (min, max).
    pub tau_range_s: (f64, f64),
    /// Give every meter a creep fault: no no-load threshold and a 3 mA current offset, so the
    /// register advances with no load.
    pub creep_fault: bool,
    /// A firmware change to simulate: the version the meters report, a gain step on the
    /// current range above a threshold (amperes, relative step), and extra noise.
    pub firmware: FirmwareChange,
    /// Offsets the noise streams: the same meters tested again give other noise.
    pub noise_stream_offset: u64,
    /// The counter also counts the reference standard's pulse output at this constant
    /// (imp/kWh), an error calculator's way.
    pub reference_pulses: Option<f64>,
    /// Faults of the served counter.
    pub counter_faults: test_output::CounterFaults,
}

impl SimConfig {
    pub fn new(seed: u64, positions: usize) -> SimConfig {
        SimConfig {
            seed,
            positions,
            serials: None,
            plant_defect: true,
            tau_range_s: (0.15, 0.45),
            creep_fault: false,
            firmware: FirmwareChange::default(),
            noise_stream_offset: 0,
            reference_pulses: None,
            counter_faults: Default::default(),
        }
    }
}

/// A fault the simulator put into a meter on purpose.
#[derive(Debug, Clone, PartialEq)]
pub struct PlantedDefect {
    pub position: usize,
    pub serial: String,
    /// Extra phase lag of the current measurement, degrees.
    pub phase_error_deg: f64,
}

/// Per-meter error model, fixed for the life of the meter.
#[derive(Debug, Clone)]
struct MeterModel {
    identity: Identity,
    gain_current: f64,
    gain_voltage: f64,
    offset_current_a: f64,
    phase_error_deg: f64,
    noise_relative: f64,
    tau_s: f64,
    /// (threshold A, relative gain step) of a simulated firmware change.
    gain_step_above: Option<(f64, f64)>,
    /// Relative gain step of the voltage channel, of a simulated firmware change.
    voltage_gain_step: f64,
    /// Below this current the firmware reports no power and its register stands still.
    no_load_threshold_a: f64,
}

/// A meter's settling state: what it saw when the load last changed.
#[derive(Debug, Clone)]
struct MeterState {
    model: MeterModel,
    /// The firmware's calibration constants, by quantity: nominal until calibrated.
    constants: Vec<(Quantity, FrontEnd)>,
    seen_at_change: (f64, f64),
    energy_wh: f64,
    energy_until_s: f64,
    noise: ChaCha8Rng,
    /// The part of a pulse the test output's accumulator held when the meter was made, so
    /// that each unit's first pulse comes at a phase of its own.
    pulse_phase: f64,
}

impl MeterModel {
    /// The simulated firmware change's gain factor at current `i`.
    fn gain_step(&self, i: f64) -> f64 {
        match self.gain_step_above {
            Some((threshold, step)) if i.abs() >= threshold => 1.0 + step,
            _ => 1.0,
        }
    }
}

impl MeterState {
    fn constants_for(&self, quantity: Quantity) -> FrontEnd {
        self.constants
            .iter()
            .find(|(q, _)| *q == quantity)
            .map(|(_, fe)| *fe)
            .unwrap_or_else(|| front_end(quantity))
    }
}

/// The firmware constant a name refers to: `offset_<quantity>` or `gain_<quantity>`.
fn constant_name(name: &str) -> Option<(bool, Quantity)> {
    let (is_gain, rest) = match name.split_once('_') {
        Some(("offset", rest)) => (false, rest),
        Some(("gain", rest)) => (true, rest),
        _ => return None,
    };
    Quantity::from_name(rest).map(|q| (is_gain, q))
}

/// The shared physical state of the bench.
struct World {
    clock: Arc<dyn Clock>,
    /// What the source actually delivers now (set load with the source's own error).
    actual: Load,
    changed_at_s: f64,
    from_no_load: bool,
    meters: Vec<MeterState>,
    /// The energy the source really delivered up to the last load change, Wh (what a
    /// reference standard's pulse output counts).
    true_energy_wh: f64,
}

impl World {
    /// What the meter's front end sees of the voltage and current at bench time `t`.
    fn seen(&self, meter: &MeterState, t: f64) -> (f64, f64) {
        let dt = (t - self.changed_at_s).max(0.0);
        let decay = (-dt / meter.model.tau_s).exp();
        let (v0, i0) = meter.seen_at_change;
        let v = self.actual.voltage + (v0 - self.actual.voltage) * decay;
        let mut i = self.actual.current + (i0 - self.actual.current) * decay;
        if self.from_no_load {
            i += self.actual.current * SURGE_FACTOR * (-dt / SURGE_TAU_S).exp();
        }
        (v, i)
    }

    /// The meter's noiseless active power at time `t` (what its energy register integrates).
    fn meter_power(&self, meter: &MeterState, t: f64) -> f64 {
        let (v, i) = self.seen(meter, t);
        let i_meas = i * (1.0 + meter.model.gain_current) * meter.model.gain_step(i)
            + meter.model.offset_current_a;
        if i_meas.abs() < meter.model.no_load_threshold_a {
            return 0.0;
        }
        let phi = (self.actual.phase_deg + meter.model.phase_error_deg).to_radians();
        v * (1.0 + meter.model.gain_voltage)
            * (1.0 + meter.model.voltage_gain_step)
            * i_meas
            * phi.cos()
    }

    /// Integrates meter `index`'s register up to bench time `t`: midpoint steps while the
    /// meter still settles, one exact step once it has.
    fn advance_energy(&mut self, index: usize, t: f64) {
        let meter = &self.meters[index];
        let mut from = meter.energy_until_s;
        let settled_after = self.changed_at_s + 10.0 * meter.model.tau_s.max(SURGE_TAU_S);
        let mut energy = 0.0;
        const STEP_S: f64 = 0.01;
        while from < t {
            let to = if from >= settled_after {
                t
            } else {
                (from + STEP_S).min(t)
            };
            energy += self.meter_power(meter, 0.5 * (from + to)) * (to - from) / 3600.0;
            from = to;
        }
        let meter = &mut self.meters[index];
        meter.energy_wh += energy;
        meter.energy_until_s = t;
    }

    /// The energy the source really delivered up to bench time `t` (at or after the last load
    /// change), Wh.
    fn true_energy_at(&self, t: f64) -> f64 {
        self.true_energy_wh
            + self.actual.nominal(Quantity::ActivePower, 0.0) * (t - self.changed_at_s).max(0.0)
                / 3600.0
    }

    fn apply(&mut self, actual: Load) {
        let now = self.clock.now_s();
        self.true_energy_wh = self.true_energy_at(now);
        for index in 0..self.meters.len() {
            self.advance_energy(index, now);
            let seen = self.seen(&self.meters[index], now);
            self.meters[index].seen_at_change = seen;
        }
        self.from_no_load = self.actual.current < NO_LOAD_THRESHOLD_A && actual.current > 0.0;
        self.actual = actual;
        self.changed_at_s = now;
    }

    /// What meter `index` reports for `quantity` now, in counts of its front end.
    fn read_counts(&mut self, index: usize, quantity: Quantity) -> i64 {
        let fe = front_end(quantity);
        let now = self.clock.now_s();
        if quantity == Quantity::ActiveEnergy {
            self.advance_energy(index, now);
            return fe.to_counts(self.meters[index].energy_wh);
        }
        let (v, i) = self.seen(&self.meters[index], now);
        let actual = self.actual;
        let meter = &mut self.meters[index];
        let m = &meter.model;
        let noise = Normal::new(0.0, m.noise_relative).expect("noise is a finite spread");
        let mut jitter = || 1.0 + noise.sample(&mut meter.noise);
        let step = m.gain_step(i);
        let i_meas = (i * (1.0 + m.gain_current) * step + m.offset_current_a) * jitter();
        let v_meas = v * (1.0 + m.gain_voltage) * (1.0 + m.voltage_gain_step) * jitter();
        let phi = (actual.phase_deg + m.phase_error_deg).to_radians();
        let live = i_meas.abs() >= m.no_load_threshold_a && i_meas != 0.0;
        let value = match quantity {
            Quantity::Current => i_meas,
            Quantity::Voltage => v_meas,
            Quantity::ActivePower if live => v_meas * i_meas * phi.cos(),
            Quantity::ReactivePower if live => v_meas * i_meas * phi.sin(),
            Quantity::ApparentPower if live => v_meas * i_meas,
            Quantity::PowerFactor if live => phi.cos(),
            Quantity::PowerFactor => 1.0,
            // Frequency is counted over many cycles: far less noisy than the rms values.
            Quantity::Frequency => {
                let jitter = Normal::new(0.0, 2e-5)
                    .expect("finite")
                    .sample(&mut meter.noise);
                actual.frequency * (1.0 + jitter)
            }
            _ => 0.0,
        };
        fe.to_counts(value)
    }

    /// What meter `index` reports for `quantity`, converted with its firmware's constants.
    fn read(&mut self, index: usize, quantity: Quantity) -> f64 {
        let counts = self.read_counts(index, quantity) as f64;
        self.meters[index].constants_for(quantity).to_value(counts)
    }
}

fn lock(world: &Mutex<World>) -> MutexGuard<'_, World> {
    world.lock().unwrap_or_else(|p| p.into_inner())
}

/// The built-in simulated bench.
pub struct SimBench {
    world: Arc<Mutex<World>>,
    clock: Arc<dyn Clock>,
    defects: Vec<PlantedDefect>,
    seed: u64,
    reference_pulses: Option<f64>,
}

fn stream(seed: u64, stream: u64) -> ChaCha8Rng {
    let mut rng = ChaCha8Rng::seed_from_u64(seed);
    rng.set_stream(stream);
    rng
}

/// Stream numbers: one per part, so that adding a meter does not change the others' numbers.
const STREAM_SOURCE: u64 = 1;
const STREAM_REFERENCE: u64 = 2;
const STREAM_SERIALS: u64 = 3;
const STREAM_LOAD_CHECK: u64 = 4;
const STREAM_MODEL_BASE: u64 = 1_000;
const STREAM_NOISE_BASE: u64 = 2_000;
const STREAM_PULSE_BASE: u64 = 3_000;
const STREAM_REFERENCE_PULSES: u64 = 5;

/// The simulated reference's fixed relative error.
const SIM_REFERENCE_GAIN: f64 = 0.0001;

impl SimBench {
    /// A simulated bench on a virtual clock: it never waits for real.
    pub fn new(config: &SimConfig) -> SimBench {
        SimBench::with_clock(config, Arc::new(VirtualClock::default()))
    }

    /// A simulated bench on the given clock (a real one when served to another process).
    pub fn with_clock(config: &SimConfig, clock: Arc<dyn Clock>) -> SimBench {
        let serials = config.serials.clone().unwrap_or_else(|| {
            let mut rng = stream(config.seed, STREAM_SERIALS);
            let first = 240_000 + (rand::Rng::next_u32(&mut rng) % 9_000) * 10;
            (0..config.positions)
                .map(|i| format!("TM16-{:06}", first as usize + i))
                .collect()
        });
        let defect_index = (config.seed % config.positions.max(1) as u64) as usize;
        let mut defects = Vec::new();
        let meters = serials
            .iter()
            .enumerate()
            .map(|(i, serial)| {
                let mut model = meter_model(config, i, serial);
                if config.creep_fault {
                    model.no_load_threshold_a = 0.0;
                    model.offset_current_a = 0.003;
                }
                if config.plant_defect && i == defect_index {
                    model.phase_error_deg += 1.2;
                    defects.push(PlantedDefect {
                        position: i + 1,
                        serial: serial.clone(),
                        phase_error_deg: 1.2,
                    });
                }
                MeterState {
                    model,
                    constants: Quantity::ALL.iter().map(|q| (*q, front_end(*q))).collect(),
                    seen_at_change: (0.0, 0.0),
                    energy_wh: 0.0,
                    energy_until_s: 0.0,
                    pulse_phase: {
                        let mut rng = stream(config.seed, STREAM_PULSE_BASE + i as u64);
                        rand::Rng::next_u64(&mut rng) as f64 / (u64::MAX as f64 + 1.0)
                    },
                    noise: stream(
                        config.seed,
                        STREAM_NOISE_BASE + i as u64 + 10_000 * config.noise_stream_offset,
                    ),
                }
            })
            .collect();
        let off = Load {
            voltage: 0.0,
            current: 0.0,
            phase_deg: 0.0,
            frequency: 50.0,
        };
        let world = World {
            clock: clock.clone(),
            actual: off,
            changed_at_s: 0.0,
            from_no_load: false,
            meters,
            true_energy_wh: 0.0,
        };
        SimBench {
            world: Arc::new(Mutex::new(world)),
            clock,
            defects,
            seed: config.seed,
            reference_pulses: config.reference_pulses,
        }
    }

    /// The defects planted, so that a test can check they are the ones found.
    pub fn defects(&self) -> &[PlantedDefect] {
        &self.defects
    }

    /// A handle on meter `index`, for serving it over a port.
    pub fn meter(&self, index: usize) -> SimMeterHandle {
        SimMeterHandle {
            world: self.world.clone(),
            index,
        }
    }

    /// How many meters the bench has.
    pub fn positions(&self) -> usize {
        lock(&self.world).meters.len()
    }

    /// The bench's clock.
    pub fn clock(&self) -> Arc<dyn Clock> {
        self.clock.clone()
    }

    /// The settling time constants of the meters, seconds.
    pub fn time_constants(&self) -> Vec<f64> {
        lock(&self.world)
            .meters
            .iter()
            .map(|m| m.model.tau_s)
            .collect()
    }

    /// The simulated source and reference meter, acting on this bench's world.
    pub fn instruments(&self) -> (Box<dyn LoadSource>, Box<dyn ReferenceMeter>) {
        (
            Box::new(SimSource {
                world: self.world.clone(),
                rng: stream(self.seed, STREAM_SOURCE),
            }),
            Box::new(SimReference {
                world: self.world.clone(),
                rng: stream(self.seed, STREAM_REFERENCE),
                load_rng: stream(self.seed, STREAM_LOAD_CHECK),
                gain: SIM_REFERENCE_GAIN,
            }),
        )
    }

    /// The counter of the simulated meters' test outputs (counting the reference standard's
    /// pulses too where the configuration says so).
    pub fn counter(&self) -> test_output::SimCounter {
        match self.reference_pulses {
            Some(k) => self.counter_with_reference_pulses(k),
            None => test_output::SimCounter::new(self.world.clone(), None),
        }
    }

    /// The counter as a reference standard's error calculator: it counts the standard's own
    /// pulse output (`constant` imp/kWh, with the simulated reference's error) beside each
    /// unit's, over the same interval.
    pub fn counter_with_reference_pulses(&self, constant: f64) -> test_output::SimCounter {
        let mut rng = stream(self.seed, STREAM_REFERENCE_PULSES);
        let phase = rand::Rng::next_u64(&mut rng) as f64 / (u64::MAX as f64 + 1.0);
        test_output::SimCounter::new(
            self.world.clone(),
            Some(test_output::ReferencePulses {
                constant,
                phase,
                gain: SIM_REFERENCE_GAIN,
            }),
        )
    }

    /// Turns the simulator into a [`Bench`] for the executor.
    pub fn into_bench(self) -> Bench {
        let (source, reference) = self.instruments();
        let positions = (0..lock(&self.world).meters.len())
            .map(|i| Position {
                number: i + 1,
                link: Box::new(SimLink {
                    world: self.world.clone(),
                    index: i,
                }) as Box<dyn DutLink>,
                expected_serial: None,
            })
            .collect();
        Bench {
            station: StationInfo {
                id: "sim".into(),
                description: format!("built-in simulated bench, seed {}", self.seed),
                reference: InstrumentInfo {
                    id: "SIM-REF-1".into(),
                    description: "simulated true-RMS reference meter, ±0.02 % typical".into(),
                    certificate: None,
                    calibration_due: None,
                    accuracy: Some(SIM_REFERENCE_ACCURACY.into()),
                    ranges: sim_reference_ranges(),
                },
                source: "simulated lamp-bank load with switch-on surge".into(),
                // The simulated bench sits at the usual reference temperature.
                ambient_c: Some(crate::plan::REFERENCE_AMBIENT_C),
                counter: Some(crate::bench::counter::CounterInfo {
                    reference_constant: self.reference_pulses,
                    ..sim_counter_info()
                }),
            },
            clock: self.clock.clone(),
            source: SourceHandle::new(source),
            reference,
            counter: Some(crate::bench::counter::CounterHandle::new(Box::new(
                self.counter(),
            ))),
            positions,
            parallel: false,
            interrupt: Default::default(),
            rescan: None,
        }
    }
}

fn meter_model(config: &SimConfig, index: usize, serial: &str) -> MeterModel {
    let mut rng = stream(config.seed, STREAM_MODEL_BASE + index as u64);
    let normal = |sd: f64| Normal::new(0.0, sd).expect("finite spread");
    let uniform = |rng: &mut ChaCha8Rng, lo: f64, hi: f64| {
        lo + (hi - lo) * (rand::Rng::next_u64(rng) as f64 / u64::MAX as f64)
    };
    MeterModel {
        identity: Identity {
            model: SIM_MODEL.into(),
            serial: serial.into(),
            firmware: config
                .firmware
                .version
                .clone()
                .unwrap_or_else(|| SIM_FIRMWARE.into()),
        },
        gain_current: normal(0.0012).sample(&mut rng),
        gain_voltage: normal(0.0008).sample(&mut rng),
        offset_current_a: normal(0.0015).sample(&mut rng),
        phase_error_deg: normal(0.05).sample(&mut rng) + config.firmware.phase_shift_deg,
        tau_s: uniform(&mut rng, config.tau_range_s.0, config.tau_range_s.1),
        // Drawn after the others, so that the same seed keeps its gains, offsets and phases.
        noise_relative: uniform(&mut rng, 0.0003, 0.0008) + config.firmware.extra_noise,
        no_load_threshold_a: NO_LOAD_THRESHOLD_A,
        gain_step_above: config.firmware.gain_step_above,
        voltage_gain_step: config.firmware.voltage_gain_step,
    }
}

/// One simulated meter, as a device on a port sees it.
#[derive(Clone)]
pub struct SimMeterHandle {
    world: Arc<Mutex<World>>,
    index: usize,
}

impl SimMeterHandle {
    pub fn identity(&self) -> Identity {
        lock(&self.world).meters[self.index].model.identity.clone()
    }

    /// The meter's calibrated reading of `quantity`, as its firmware reports it.
    pub fn read_value(&self, quantity: Quantity) -> f64 {
        lock(&self.world).read(self.index, quantity)
    }

    /// A firmware constant by name (`offset_current`, `gain_current`...).
    pub fn constant(&self, name: &str) -> Option<f64> {
        let (is_gain, q) = constant_name(name)?;
        let fe = lock(&self.world).meters[self.index].constants_for(q);
        Some(if is_gain { fe.gain } else { fe.offset })
    }

    /// Sets a firmware constant; a gain must not be zero.
    pub fn set_constant(&self, name: &str, value: f64) -> Result<(), ConstantError> {
        let (is_gain, q) =
            constant_name(name).ok_or_else(|| ConstantError::Unknown(name.to_string()))?;
        if !value.is_finite() || (is_gain && value == 0.0) {
            return Err(ConstantError::Invalid {
                name: name.to_string(),
                value,
            });
        }
        let mut world = lock(&self.world);
        let meter = &mut world.meters[self.index];
        let mut fe = meter.constants_for(q);
        if is_gain {
            fe.gain = value;
        } else {
            fe.offset = value;
        }
        meter.constants.retain(|(k, _)| *k != q);
        meter.constants.push((q, fe));
        Ok(())
    }

    /// The meter's reading of `quantity` now, in front-end counts.
    pub fn read_counts(&self, quantity: Quantity) -> i64 {
        lock(&self.world).read_counts(self.index, quantity)
    }
}

/// The link to one simulated meter.
struct SimLink {
    world: Arc<Mutex<World>>,
    index: usize,
}

impl SimLink {
    fn handle(&self) -> SimMeterHandle {
        SimMeterHandle {
            world: self.world.clone(),
            index: self.index,
        }
    }
}

impl DutLink for SimLink {
    fn identify(&mut self) -> Result<Identity, LinkError> {
        Ok(lock(&self.world).meters[self.index].model.identity.clone())
    }

    fn read(&mut self, quantity: Quantity, _channel: &str) -> Result<f64, LinkError> {
        Ok(lock(&self.world).read(self.index, quantity))
    }

    fn read_raw(&mut self, quantity: Quantity, _channel: &str) -> Result<f64, LinkError> {
        Ok(lock(&self.world).read_counts(self.index, quantity) as f64)
    }

    fn write_constant(&mut self, name: &str, channel: &str, value: f64) -> Result<(), LinkError> {
        self.handle()
            .set_constant(name, value)
            .map_err(|why| LinkError::Unsupported {
                quantity: format!("write {name}: {why}"),
                channel: channel.into(),
            })
    }

    fn read_constant(&mut self, name: &str, channel: &str) -> Result<f64, LinkError> {
        self.handle()
            .constant(name)
            .ok_or_else(|| LinkError::Unsupported {
                quantity: format!("read {name}"),
                channel: channel.into(),
            })
    }

    fn resolution(&self, quantity: Quantity) -> Option<f64> {
        Some(1.0 / front_end(quantity).gain)
    }

    fn describe(&self) -> String {
        format!("simulated meter {}", self.index + 1)
    }
}

/// The simulated source: delivers the set load with a small error of its own each time.
struct SimSource {
    world: Arc<Mutex<World>>,
    rng: ChaCha8Rng,
}

impl LoadSource for SimSource {
    fn describe(&self) -> String {
        "simulated source".into()
    }

    fn apply(&mut self, load: &Load) -> Result<(), BenchError> {
        let gain = Normal::new(0.0, 0.001)
            .expect("finite")
            .sample(&mut self.rng);
        let phase = Normal::new(0.0, 0.05)
            .expect("finite")
            .sample(&mut self.rng);
        let actual = Load {
            voltage: load.voltage * (1.0 + gain / 2.0),
            current: load.current * (1.0 + gain),
            phase_deg: load.phase_deg + phase,
            frequency: load.frequency,
        };
        lock(&self.world).apply(actual);
        Ok(())
    }

    fn off(&mut self) -> Result<(), BenchError> {
        let mut world = lock(&self.world);
        let off = Load {
            current: 0.0,
            voltage: 0.0,
            ..world.actual
        };
        world.apply(off);
        Ok(())
    }
}

/// The simulated reference meter: what really flowed, with its own small error.
struct SimReference {
    world: Arc<Mutex<World>>,
    rng: ChaCha8Rng,
    /// The noise of readings that confirm the load.
    load_rng: ChaCha8Rng,
    /// Fixed relative error of the instrument.
    gain: f64,
}

impl SimReference {
    fn reading(&self, request: &ReferenceRequest, noise: f64) -> ReferenceReading {
        let world = lock(&self.world);
        let actual = world.actual;
        let now = world.clock.now_s();
        drop(world);
        let factor = 1.0 + self.gain + noise;
        let (t0, t1) = request.window;
        let value = match request.quantity {
            Quantity::PowerFactor => actual.power_factor(),
            Quantity::Frequency => actual.frequency,
            q => actual.nominal(q, t1 - t0) * factor,
        };
        ReferenceReading {
            power_readings: Vec::new(),
            window_s: None,
            value: round_significant(value, 6),
            source: "instrument".into(),
            taken_at_s: now,
            as_given: None,
            entries: Vec::new(),
        }
    }
}

fn reference_noise(rng: &mut ChaCha8Rng) -> f64 {
    Normal::new(0.0, 0.00005).expect("finite").sample(rng)
}

impl ReferenceMeter for SimReference {
    fn read(&mut self, request: &ReferenceRequest) -> Result<ReferenceReading, BenchError> {
        let noise = reference_noise(&mut self.rng);
        Ok(self.reading(request, noise))
    }

    fn load_quantities(&self) -> Vec<Quantity> {
        super::LOAD_QUANTITIES.to_vec()
    }

    fn read_load(&mut self, request: &ReferenceRequest) -> Result<ReferenceReading, BenchError> {
        let noise = reference_noise(&mut self.load_rng);
        Ok(self.reading(request, noise))
    }
}

/// Rounds to `digits` significant digits, as an instrument's display does.
fn round_significant(x: f64, digits: i32) -> f64 {
    if x == 0.0 || !x.is_finite() {
        return x;
    }
    let scale = 10f64.powi(digits - 1 - x.abs().log10().floor() as i32);
    (x * scale).round() / scale
}

#[cfg(test)]
mod tests {
    use super::*;

    fn load(current: f64, phase_deg: f64) -> Load {
        Load {
            voltage: 230.0,
            current,
            phase_deg,
            frequency: 50.0,
        }
    }

    /// The simulator's random streams are ChaCha8 seeded by the seed alone (rand_chacha): the same
    /// seed gives the same readings.
    #[test]
    fn same_seed_same_numbers() {
        let read_all = || {
            let mut bench = SimBench::new(&SimConfig::new(7, 3)).into_bench();
            bench.source.apply(&load(5.0, 0.0)).unwrap();
            bench.clock.sleep_s(3.0);
            bench
                .positions
                .iter_mut()
                .map(|p| p.link.read(Quantity::ActivePower, "L").unwrap())
                .collect::<Vec<_>>()
        };
        assert_eq!(read_all(), read_all());
    }

    /// A first-order settling leaves e^(−t/τ) of a load change after t (e^(−1) = 36.8 % at one time
    /// constant): read at τ/2 the meter is far from its final reading (common practice).
    #[test]
    fn a_meter_read_too_early_has_not_settled() {
        let sim = SimBench::new(&SimConfig {
            plant_defect: false,
            ..SimConfig::new(1, 1)
        });
        let tau = sim.time_constants()[0];
        let mut bench = sim.into_bench();
        bench.source.apply(&load(5.0, 0.0)).unwrap();
        bench.clock.sleep_s(tau);
        let early = bench.positions[0]
            .link
            .read(Quantity::Current, "L")
            .unwrap();
        bench.clock.sleep_s(20.0 * tau);
        let late = bench.positions[0]
            .link
            .read(Quantity::Current, "L")
            .unwrap();
        // After one time constant a first-order response has covered 1 − 1/e ≈ 63 %.
        assert!(early < 0.75 * late, "early {early}, late {late}");
        assert!((late - 5.0).abs() < 0.05, "late {late}");
    }

    /// Energy is the integral of power, E = P·t (2300 W for 36 s is 23 Wh; SI Brochure, 9th
    /// edition, the watt hour as a derived unit); the meter's own errors are a fraction of a
    /// percent.
    #[test]
    fn the_energy_register_integrates_power() {
        let sim = SimBench::new(&SimConfig {
            plant_defect: false,
            ..SimConfig::new(3, 1)
        });
        let mut bench = sim.into_bench();
        bench.source.apply(&load(10.0, 0.0)).unwrap();
        bench.clock.sleep_s(5.0);
        let e0 = bench.positions[0]
            .link
            .read(Quantity::ActiveEnergy, "L")
            .unwrap();
        bench.clock.sleep_s(36.0);
        let e1 = bench.positions[0]
            .link
            .read(Quantity::ActiveEnergy, "L")
            .unwrap();
        // 2300 W for 36 s is 23 Wh; the meter's own errors are a fraction of a percent.
        assert!(((e1 - e0) - 23.0).abs() < 0.2, "{}", e1 - e0);
    }

    /// Below the no-load threshold nothing registers: IEC 62053-21's no-load condition, at most
    /// one pulse in the test time (from memory); here, over ten minutes, none at all.
    #[test]
    fn no_load_does_not_creep() {
        let mut bench = SimBench::new(&SimConfig::new(5, 2)).into_bench();
        bench.source.apply(&load(0.0, 0.0)).unwrap();
        bench.clock.sleep_s(600.0);
        for p in &mut bench.positions {
            assert_eq!(p.link.read(Quantity::ActiveEnergy, "L").unwrap(), 0.0);
            assert_eq!(p.link.read(Quantity::ActivePower, "L").unwrap(), 0.0);
        }
    }

    /// The simulator's own rule (invented for demos): the planted defect sits at position
    /// seed mod N + 1.
    #[test]
    fn the_defect_lies_where_the_seed_says() {
        let sim = SimBench::new(&SimConfig::new(6, 4));
        assert_eq!(sim.defects().len(), 1);
        assert_eq!(sim.defects()[0].position, 6 % 4 + 1);
    }

    /// Rounding to six significant digits, half away from zero, as a six-digit display shows
    /// (common practice, no published source).
    #[test]
    fn rounds_like_a_six_digit_display() {
        assert_eq!(round_significant(4.987654321, 6), 4.98765);
        assert_eq!(round_significant(1149.87654, 6), 1149.88);
    }
}
