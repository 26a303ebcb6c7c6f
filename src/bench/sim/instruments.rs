//! A simulated programmable source and reference meter speaking SCPI (IEEE 488.2 common
//! commands and SCPI-style headers), for serving on pseudo-terminals beside simulated meters.
//!
//! Commands without a query produce no reply, as SCPI instruments behave; a command not
//! understood is queued as an error for `SYST:ERR?`, with the standard's code -113
//! ("undefined header").

use super::device::LineDevice;
use crate::bench::{LoadSource, ReferenceMeter, ReferenceRequest};
use crate::plan::{Load, Quantity};

const NO_ERROR: &str = "0,\"No error\"";
pub(super) const UNDEFINED_HEADER: &str = "-113,\"Undefined header\"";

/// The simulated programmable source.
pub struct ScpiSourceDevice {
    source: Box<dyn LoadSource>,
    setpoint: Load,
    output_on: bool,
    errors: Vec<&'static str>,
}

impl ScpiSourceDevice {
    pub fn new(source: Box<dyn LoadSource>) -> ScpiSourceDevice {
        ScpiSourceDevice {
            source,
            setpoint: Load {
                voltage: 0.0,
                current: 0.0,
                phase_deg: 0.0,
                frequency: 50.0,
            },
            output_on: false,
            errors: Vec::new(),
        }
    }

    fn apply_if_on(&mut self) {
        if self.output_on {
            let _ = self.source.apply(&self.setpoint);
        }
    }
}

pub(super) fn common(
    request: &str,
    idn: &str,
    errors: &mut Vec<&'static str>,
) -> Option<Vec<String>> {
    match request.trim().to_ascii_uppercase().as_str() {
        "*IDN?" => Some(vec![idn.to_string()]),
        "*OPC?" => Some(vec!["1".into()]),
        "*CLS" => {
            errors.clear();
            Some(Vec::new())
        }
        "SYST:ERR?" => Some(vec![if errors.is_empty() {
            NO_ERROR.to_string()
        } else {
            errors.remove(0).to_string()
        }]),
        _ => None,
    }
}

impl LineDevice for ScpiSourceDevice {
    fn handle(&mut self, request: &str) -> Vec<String> {
        if let Some(reply) = common(
            request,
            "Tallowmere Test Systems,SIM-SOURCE,0,1.0",
            &mut self.errors,
        ) {
            return reply;
        }
        let mut words = request.split_whitespace();
        let header = words.next().unwrap_or("").to_ascii_uppercase();
        let argument = words.next();
        let number = argument.and_then(|a| a.parse::<f64>().ok());
        match (header.as_str(), number, argument) {
            ("OUTP?", _, _) => return vec![if self.output_on { "1" } else { "0" }.into()],
            ("SOUR:CURR?", _, _) => {
                return vec![format!("{:E}", self.setpoint.current)];
            }
            ("*RST", _, _) => {
                self.output_on = false;
                let _ = self.source.off();
            }
            ("SOUR:VOLT", Some(v), _) => {
                self.setpoint.voltage = v;
                self.apply_if_on();
            }
            ("SOUR:CURR", Some(v), _) => {
                self.setpoint.current = v;
                self.apply_if_on();
            }
            ("SOUR:PHAS", Some(v), _) => {
                self.setpoint.phase_deg = v;
                self.apply_if_on();
            }
            ("SOUR:FREQ", Some(v), _) => {
                self.setpoint.frequency = v;
                self.apply_if_on();
            }
            ("OUTP", _, Some(a)) if a.eq_ignore_ascii_case("ON") => {
                self.output_on = true;
                self.apply_if_on();
            }
            ("OUTP", _, Some(a)) if a.eq_ignore_ascii_case("OFF") => {
                self.output_on = false;
                let _ = self.source.off();
            }
            _ => self.errors.push(UNDEFINED_HEADER),
        }
        Vec::new()
    }
}

/// The simulated reference meter.
pub struct ScpiReferenceDevice {
    reference: Box<dyn ReferenceMeter>,
    errors: Vec<&'static str>,
}

impl ScpiReferenceDevice {
    pub fn new(reference: Box<dyn ReferenceMeter>) -> ScpiReferenceDevice {
        ScpiReferenceDevice {
            reference,
            errors: Vec::new(),
        }
    }
}

/// The measurement queries of the simulated reference, by quantity.
pub const REFERENCE_QUERIES: &[(Quantity, &str)] = &[
    (Quantity::Voltage, "MEAS:VOLT?"),
    (Quantity::Current, "MEAS:CURR?"),
    (Quantity::ActivePower, "MEAS:POW?"),
    (Quantity::ReactivePower, "MEAS:POW:REAC?"),
    (Quantity::ApparentPower, "MEAS:POW:APP?"),
    (Quantity::PowerFactor, "MEAS:PF?"),
    (Quantity::Frequency, "MEAS:FREQ?"),
];

impl LineDevice for ScpiReferenceDevice {
    fn handle(&mut self, request: &str) -> Vec<String> {
        if let Some(reply) = common(
            request,
            "Tallowmere Test Systems,SIM-REFERENCE,SIM-REF-1,1.0",
            &mut self.errors,
        ) {
            return reply;
        }
        let header = request.trim().to_ascii_uppercase();
        let Some((quantity, _)) = REFERENCE_QUERIES.iter().find(|(_, q)| *q == header) else {
            self.errors.push(UNDEFINED_HEADER);
            return Vec::new();
        };
        let off = Load {
            voltage: 0.0,
            current: 0.0,
            phase_deg: 0.0,
            frequency: 50.0,
        };
        let request = ReferenceRequest {
            step_id: "",
            quantity: *quantity,
            load: &off,
            window: (0.0, 0.0),
        };
        match self.reference.read(&request) {
            Ok(r) => vec![format!("{:.6E}", r.value)],
            Err(_) => Vec::new(),
        }
    }
}

#[cfg(test)]
mod tests {
    use super::*;
    use crate::bench::sim::{SimBench, SimConfig};

    #[test]
    fn the_source_applies_its_setpoint_when_the_output_is_on() {
        let sim = SimBench::new(&SimConfig::new(1, 1));
        let (source, reference) = sim.instruments();
        let mut src = ScpiSourceDevice::new(source);
        let mut reference = ScpiReferenceDevice::new(reference);
        for cmd in [
            "*RST",
            "SOUR:VOLT 230",
            "SOUR:CURR 5",
            "SOUR:PHAS 0",
            "SOUR:FREQ 50",
        ] {
            assert!(src.handle(cmd).is_empty());
        }
        assert_eq!(reference.handle("MEAS:CURR?"), vec!["0.000000E0"]);
        src.handle("OUTP ON");
        assert_eq!(src.handle("*OPC?"), vec!["1"]);
        let amps: f64 = reference.handle("MEAS:CURR?")[0].parse().unwrap();
        assert!((amps - 5.0).abs() < 0.02, "{amps}");
        src.handle("VOLT:NONSENSE 3");
        assert_eq!(src.handle("SYST:ERR?"), vec![UNDEFINED_HEADER]);
        assert_eq!(src.handle("SYST:ERR?"), vec![NO_ERROR]);
    }
}
