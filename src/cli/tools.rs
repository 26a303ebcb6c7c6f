//! The bench-side helpers: `sim-meter` (a simulated station on pseudo-terminals), `templates`
//! (the report templates exported for editing) and `ports` (the serial ports, told apart).

use super::*;

pub(super) fn sim_meter(args: &SimMeterArgs) -> Result<i32, CliError> {
    use crate::bench::sim::device::Faults;
    use crate::bench::sim::served::{Protocol, SimStation, merge_faults, parse_fault};
    if args.positions == 0 {
        return Err(CliError::Usage("--positions must be at least 1".into()));
    }
    if !(args.time_scale > 0.0 && args.time_scale <= 1000.0) {
        return Err(CliError::Usage(
            "--time-scale must be greater than zero and at most 1000".into(),
        ));
    }
    let mut faults = vec![
        Faults {
            console: args.console,
            ..Faults::default()
        };
        args.positions
    ];
    for text in &args.faults {
        let (position, f) = parse_fault(text).map_err(|e| CliError::Usage(e.to_string()))?;
        let slot = faults.get_mut(position - 1).ok_or_else(|| {
            CliError::Usage(format!(
                "--fault {text}: there are only {}",
                counted(args.positions, "position")
            ))
        })?;
        merge_faults(slot, f);
    }
    let duration = match &args.duration {
        None => None,
        Some(t) => Some(
            crate::plan::units::parse(t, Dimension::Time)
                .map_err(|e| CliError::Usage(format!("--for: {e}")))?,
        ),
    };
    let mut config = SimConfig::new(args.seed, args.positions);
    config.plant_defect = !args.no_defect;
    if let Some(k) = args.reference_pulses {
        if !(k > 0.0 && k.is_finite()) {
            return Err(CliError::Usage(
                "--reference-pulses: a constant above 0 imp/kWh".into(),
            ));
        }
        config.reference_pulses = Some(k);
    }
    if let Some(text) = &args.counter_fault {
        config.counter_faults = crate::bench::sim::test_output::CounterFaults::parse(text)
            .map_err(|e| CliError::Usage(format!("--counter-fault: {e}")))?;
    }
    if let Some(text) = &args.firmware {
        config.firmware = crate::bench::sim::FirmwareChange::parse(text)
            .map_err(|e| CliError::Usage(format!("--firmware: {e}")))?;
    }
    let protocol = match args.protocol.as_str() {
        "modbus" => Protocol::Modbus { buses: args.buses },
        "iec62056_21" => Protocol::Readout,
        _ => Protocol::Text,
    };
    if args.buses == 0 || args.buses > args.positions {
        return Err(CliError::Usage(format!(
            "--buses must be from 1 to the number of positions ({})",
            args.positions
        )));
    }
    let station = SimStation::serve_speaking(&config, args.time_scale, &faults, protocol)
        .map_err(|e| CliError::Run(format!("cannot create pseudo-terminals: {e}")))?;
    out!(
        "simulated bench, seed {}, {} meters, time scale {}",
        args.seed,
        args.positions,
        args.time_scale
    );
    for (i, ((port, address), serial)) in station.ports.iter().zip(&station.serials).enumerate() {
        let address = address.map(|a| format!(" address {a}")).unwrap_or_default();
        out!("  position {}: {port}{address}  serial {serial}", i + 1);
    }
    out!("  source:     {}  (SCPI)", station.source.path);
    out!("  reference:  {}  (SCPI)", station.reference.path);
    out!(
        "  counter:    {}  (SCPI, the test outputs)",
        station.counter.path
    );
    if let Some(path) = &args.station {
        let dir = path
            .parent()
            .filter(|d| !d.as_os_str().is_empty())
            .unwrap_or(Path::new("."));
        let name = path
            .file_name()
            .ok_or_else(|| CliError::Usage("--station needs a file name".into()))?
            .to_string_lossy()
            .into_owned();
        let _ = std::fs::remove_file(path);
        record::write_new_file(dir, &name, station.station_yaml().as_bytes())
            .map_err(|e| CliError::Run(e.to_string()))?;
        out!("station file: {}", path.display());
    }
    out!("serving until stopped");
    let _ = std::io::stdout().flush();
    let started = Instant::now();
    loop {
        std::thread::sleep(std::time::Duration::from_millis(100));
        if duration.is_some_and(|d| started.elapsed().as_secs_f64() >= d) {
            return Ok(0);
        }
        // A stop signal (Ctrl-C, `kill`) ends serving; the devices stop as they are dropped.
        if INTERRUPT.load(Ordering::SeqCst) {
            return Ok(0);
        }
    }
}

pub(super) fn export_templates(dir: &Path) -> Result<i32, CliError> {
    std::fs::create_dir_all(dir)
        .map_err(|e| CliError::Run(format!("cannot create {}: {e}", dir.display())))?;
    for (name, text) in report::DEFAULT_TEMPLATES {
        record::write_new_file(dir, name, text.as_bytes())
            .map_err(|e| CliError::Run(format!("{e} (templates already there are kept)")))?;
        out!("{}", dir.join(name).display());
    }
    Ok(0)
}

pub(super) fn ports() -> Result<i32, CliError> {
    let ports = serialport::available_ports()
        .map_err(|e| CliError::Run(format!("cannot list serial ports: {e}")))?;
    out_part!("{}", ports_text(&ports));
    Ok(0)
}

/// The serial ports as `ports` lists them: path, kind, and for USB adapters the vendor and
/// product ids, serial number and product name (what tells two adapters of one model apart).
fn ports_text(ports: &[serialport::SerialPortInfo]) -> String {
    if ports.is_empty() {
        return "no serial ports found (pseudo-terminals are never listed)\n".into();
    }
    let mut s = format!(
        "{:<24} {:<10} {:<10} {:<18} product\n",
        "port", "type", "vid:pid", "serial"
    );
    for p in ports {
        let name = terminal_safe(&p.port_name);
        let line = match &p.port_type {
            serialport::SerialPortType::UsbPort(u) => format!(
                "{name:<24} {:<10} {:04x}:{:04x}  {:<18} {}",
                "usb",
                u.vid,
                u.pid,
                terminal_safe(u.serial_number.as_deref().unwrap_or_default()),
                terminal_safe(u.product.as_deref().unwrap_or_default())
            ),
            serialport::SerialPortType::PciPort => format!("{name:<24} {:<10}", "pci"),
            serialport::SerialPortType::BluetoothPort => format!("{name:<24} {:<10}", "bluetooth"),
            serialport::SerialPortType::Unknown => format!("{name:<24} {:<10}", "other"),
        };
        s.push_str(line.trim_end());
        s.push('\n');
    }
    s
}

#[cfg(test)]
mod tests {
    use super::*;
    use serialport::{SerialPortInfo, SerialPortType, UsbPortInfo};

    /// Two USB-UART adapters of one model (vendor 0403, product 6001: the ids a common
    /// USB-serial bridge reports; common practice, no published source) are told apart by
    /// their serial numbers; a serial number with a terminal escape in it is shown harmless.
    #[test]
    fn ports_are_listed_with_what_tells_adapters_apart() {
        let usb = |path: &str, serial: &str| SerialPortInfo {
            port_name: path.into(),
            port_type: SerialPortType::UsbPort(UsbPortInfo {
                vid: 0x0403,
                pid: 0x6001,
                serial_number: Some(serial.into()),
                manufacturer: None,
                product: Some("USB-UART bench adapter".into()),
            }),
        };
        let text = ports_text(&[
            usb("/dev/ttyUSB0", "A10K3X"),
            usb("/dev/ttyUSB1", "B2\u{1b}[2J"),
            SerialPortInfo {
                port_name: "/dev/ttyS0".into(),
                port_type: SerialPortType::Unknown,
            },
        ]);
        let lines: Vec<&str> = text.lines().collect();
        assert_eq!(lines.len(), 4, "{text}");
        assert!(lines[1].starts_with("/dev/ttyUSB0") && lines[1].contains("0403:6001"));
        assert!(lines[1].contains("A10K3X") && lines[1].ends_with("USB-UART bench adapter"));
        assert!(!lines[2].contains('\u{1b}'), "{:?}", lines[2]);
        assert!(lines[3].starts_with("/dev/ttyS0") && lines[3].ends_with("other"));
        assert!(ports_text(&[]).starts_with("no serial ports found"));
    }

    #[test]
    fn counts_are_said_in_the_singular_or_the_plural() {
        assert_eq!(counted(1, "position"), "1 position");
        assert_eq!(counted(4, "position"), "4 positions");
        assert_eq!(counted(0, "serial number"), "0 serial numbers");
    }
}
