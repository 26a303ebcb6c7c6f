//! A whole simulated station on pseudo-terminals: one port per simulated meter, one for a SCPI
//! source and one for a SCPI reference meter, all acting on one simulated world, and the station
//! file that wires them. `meterproof sim-meter` serves it; the tests use it to drive the real
//! binary through real ports.

use super::device::{Device, Faults, PtyDevice};
use super::instruments::{REFERENCE_QUERIES, ScpiReferenceDevice, ScpiSourceDevice};
use super::modbus_device::{self, BusUnit, ModbusBus};
use super::readout_device::{self, ReadoutMeter};
use super::test_output::{COUNTER_COMMANDS, ScpiCounterDevice};
use super::{SimBench, SimConfig};
use crate::bench::RealClock;
use std::io;
use std::sync::Arc;
use std::time::Duration;

/// What the simulated meters speak.
#[derive(Debug, Clone, Copy, PartialEq, Eq)]
pub enum Protocol {
    /// The TM-16 text protocol, a port per meter.
    Text,
    /// Modbus RTU, the meters spread over this many buses (ports), in position order, each at
    /// its position number as address.
    Modbus { buses: usize },
    /// The IEC 62056-21 readout, a port (an optical probe) per meter.
    Readout,
}

/// The served station; dropping it stops every device.
pub struct SimStation {
    /// The devices on pseudo-terminals: a meter each, or a bus each.
    pub meters: Vec<PtyDevice>,
    /// Each position's port and address on it.
    pub ports: Vec<(String, Option<u8>)>,
    pub serials: Vec<String>,
    pub source: PtyDevice,
    pub reference: PtyDevice,
    /// The counter of the meters' test outputs, an input per position.
    pub counter: PtyDevice,
    /// The reference standard's pulse constant, where the counter counts its pulses too.
    pub reference_pulses: Option<f64>,
    pub seed: u64,
    pub time_scale: f64,
}

impl SimStation {
    /// Serves `config`'s meters, with `faults[i]` injected into meter i, on a clock running
    /// `time_scale` bench seconds per real second.
    pub fn serve(config: &SimConfig, time_scale: f64, faults: &[Faults]) -> io::Result<SimStation> {
        SimStation::serve_speaking(config, time_scale, faults, Protocol::Text)
    }

    /// As [`SimStation::serve`], the meters speaking `protocol`.
    pub fn serve_speaking(
        config: &SimConfig,
        time_scale: f64,
        faults: &[Faults],
        protocol: Protocol,
    ) -> io::Result<SimStation> {
        let sim = SimBench::with_clock(config, Arc::new(RealClock::scaled(time_scale)));
        let mut meters = Vec::new();
        let mut ports = Vec::new();
        let mut serials = Vec::new();
        let n = sim.positions();
        let fault = |i: usize| faults.get(i).cloned().unwrap_or_default();
        match protocol {
            Protocol::Text => {
                for i in 0..n {
                    let handle = sim.meter(i);
                    serials.push(handle.identity().serial);
                    let device = PtyDevice::spawn(Device::new(handle, fault(i)))?;
                    ports.push((device.path.clone(), None));
                    meters.push(device);
                }
            }
            Protocol::Readout => {
                for i in 0..n {
                    let handle = sim.meter(i);
                    serials.push(handle.identity().serial);
                    let device = readout_device::spawn(ReadoutMeter::new(handle, fault(i)))?;
                    ports.push((device.path.clone(), None));
                    meters.push(device);
                }
            }
            Protocol::Modbus { buses } => {
                let buses = buses.clamp(1, n.max(1));
                let per_bus = n.div_ceil(buses);
                for bus in 0..buses {
                    let range = bus * per_bus..((bus + 1) * per_bus).min(n);
                    let units = range
                        .clone()
                        .map(|i| BusUnit::new((i + 1) as u8, sim.meter(i), fault(i)))
                        .collect();
                    let device = modbus_device::spawn(ModbusBus { units })?;
                    for i in range {
                        serials.push(sim.meter(i).identity().serial);
                        ports.push((device.path.clone(), Some((i + 1) as u8)));
                    }
                    meters.push(device);
                }
            }
        }
        let (source, reference) = sim.instruments();
        let counter =
            PtyDevice::spawn(ScpiCounterDevice::new(sim.counter(), config.counter_faults))?;
        Ok(SimStation {
            meters,
            ports,
            serials,
            source: PtyDevice::spawn(ScpiSourceDevice::new(source))?,
            reference: PtyDevice::spawn(ScpiReferenceDevice::new(reference))?,
            counter,
            reference_pulses: config.reference_pulses,
            seed: config.seed,
            time_scale,
        })
    }

    /// The station file that wires this simulated bench.
    pub fn station_yaml(&self) -> String {
        let mut s = format!(
            "# Station file written by `meterproof sim-meter`: a simulated bench on pseudo-terminals.\n\
             station: SIM-PTY\n\
             description: simulated bench on pseudo-terminals, seed {}, {} positions\n\
             simulation: {{ time_scale: {} }}\n\
             positions:\n",
            self.seed,
            self.ports.len(),
            self.time_scale
        );
        for (i, (port, address)) in self.ports.iter().enumerate() {
            let address = address
                .map(|a| format!(", address: {a}"))
                .unwrap_or_default();
            s.push_str(&format!(
                "  - {{ position: {}, port: {port}{address} }}\n",
                i + 1,
            ));
        }
        s.push_str(&format!(
            "source:\n  kind: scpi\n  port: {}\n  timeout: 2 s\n  commands:\n    setup: ['*RST', '*CLS']\n    voltage: 'SOUR:VOLT {{value}}'\n    current: 'SOUR:CURR {{value}}'\n    phase: 'SOUR:PHAS {{value}}'\n    frequency: 'SOUR:FREQ {{value}}'\n    output_on: 'OUTP ON'\n    output_off: 'OUTP OFF'\n    sync: '*OPC?'\n    error_query: 'SYST:ERR?'\n",
            self.source.path
        ));
        s.push_str(&format!(
            "reference:\n  id: SIM-REF-1\n  description: simulated true-RMS reference meter\n  certificate: SIM-0001\n  calibration_due: 2099-12-31\n  accuracy: 0.01 % of reading + 0.005 % of range\n  ranges: {{ voltage: 300 V, current: 20 A, active_power: 6 kW, reactive_power: 6 kvar, apparent_power: 6 kVA, power_factor: 1, frequency: 100 Hz }}\n  read:\n    kind: scpi\n    port: {}\n    timeout: 2 s\n    queries:\n",
            self.reference.path
        ));
        for (q, query) in REFERENCE_QUERIES {
            s.push_str(&format!("      {}: '{}'\n", q.name(), query));
        }
        s.push_str(&format!(
            "counter:\n  id: SIM-CNT-1\n  description: simulated pulse counter, an input per position\n  timebase: 1 ppm\n  edge: 1 µs\n  read:\n    kind: scpi\n    port: {}\n    timeout: 500 ms\n    commands:\n",
            self.counter.path
        ));
        for (name, command) in COUNTER_COMMANDS {
            s.push_str(&format!("      {name}: '{command}'\n"));
        }
        if let Some(k) = self.reference_pulses {
            s.push_str("      reference_count: 'REF:COUN? (@{input})'\n");
            s.push_str(&format!("  reference_pulses: {k} imp/kWh\n"));
        }
        s
    }
}

/// Reads a fault given as `POSITION:KIND[=VALUE]`: `2:drop-every=5`, `3:die-after=60`,
/// `1:slow=300ms`, `4:reboot-after=30`, `2:firmware=2.0.9`, `1:garble-every=4`, `3:echo`.
pub fn parse_fault(text: &str) -> Result<(usize, Faults), FaultError> {
    parse_fault_text(text).map_err(FaultError)
}

/// A fault given to `sim-meter --fault` that cannot be read, and how to write one.
#[derive(Debug, Clone, PartialEq, thiserror::Error)]
#[error("{0}")]
pub struct FaultError(String);

fn parse_fault_text(text: &str) -> Result<(usize, Faults), String> {
    let help = "write a fault as POSITION:KIND[=VALUE], KIND one of drop-every, garble-every, \
                slow, reboot-after, firmware, die-after, echo, ignore-writes, busy-every, bad-crc-every, \
                console";
    let (position, rest) = text
        .split_once(':')
        .ok_or_else(|| format!("\"{text}\": {help}"))?;
    let position: usize = position
        .parse()
        .ok()
        .filter(|p| *p >= 1)
        .ok_or_else(|| format!("\"{position}\" is not a position number"))?;
    let (kind, value) = match rest.split_once('=') {
        Some((k, v)) => (k, Some(v)),
        None => (rest, None),
    };
    let count = || -> Result<u64, String> {
        value
            .and_then(|v| v.parse::<u64>().ok())
            .filter(|n| *n > 0)
            .ok_or_else(|| format!("{kind} needs a count, as {kind}=5"))
    };
    let mut f = Faults::default();
    match kind {
        "drop-every" => f.drop_every = Some(count()?),
        // A line device garbles its reply; a framed one sends it with a wrong checksum.
        "garble-every" | "bad-crc-every" => f.garble_every = Some(count()?),
        "busy-every" => f.busy_every = Some(count()?),
        "reboot-after" => f.reboot_after = Some(count()?),
        "die-after" => f.die_after = Some(count()?),
        "slow" => {
            let v = value.ok_or("slow needs a time, as slow=300ms")?;
            let s = crate::plan::units::parse(v, crate::plan::units::Dimension::Time)
                .map_err(|e| e.to_string())?;
            f.slow = Duration::from_secs_f64(s.max(0.0));
        }
        "firmware" => f.firmware = Some(value.ok_or("firmware needs a version")?.to_string()),
        "echo" => f.echo = true,
        "console" => f.console = true,
        "ignore-writes" => f.ignore_writes = true,
        _ => return Err(format!("unknown fault \"{kind}\": {help}")),
    }
    Ok((position, f))
}

/// Combines faults given for the same position.
pub fn merge_faults(into: &mut Faults, f: Faults) {
    into.drop_every = f.drop_every.or(into.drop_every);
    into.garble_every = f.garble_every.or(into.garble_every);
    into.busy_every = f.busy_every.or(into.busy_every);
    into.reboot_after = f.reboot_after.or(into.reboot_after);
    into.die_after = f.die_after.or(into.die_after);
    into.firmware = f.firmware.or(into.firmware.take());
    into.echo |= f.echo;
    into.console |= f.console;
    into.ignore_writes |= f.ignore_writes;
    if !f.slow.is_zero() {
        into.slow = f.slow;
    }
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn faults_read_as_written() {
        assert_eq!(parse_fault("2:drop-every=5").unwrap().1.drop_every, Some(5));
        assert_eq!(
            parse_fault("1:slow=300 ms").unwrap().1.slow,
            Duration::from_millis(300)
        );
        assert!(parse_fault("3:echo").unwrap().1.echo);
        assert!(parse_fault("0:echo").is_err());
        assert!(parse_fault("1:explode").is_err());
        assert!(parse_fault("1:die-after").is_err());
    }

    #[test]
    fn the_station_file_it_writes_is_valid() {
        let station = SimStation::serve(&SimConfig::new(1, 2), 10.0, &[]).unwrap();
        let parsed = crate::bench::station::Station::from_text("x", &station.station_yaml())
            .unwrap_or_else(|e| panic!("{e}\n{}", station.station_yaml()));
        assert_eq!(parsed.positions.len(), 2);
        assert_eq!(parsed.time_scale, 10.0);
        let counter = parsed.counter.expect("the counter is wired");
        assert_eq!(counter.info.timebase, Some(1e-6));
        assert_eq!(counter.commands.count, "TOT:COUN? (@{input})");
    }
}
