//! The real binary reading simulated meters as production meters are read, on pseudo-terminals
//! served by `meterproof sim-meter`: over Modbus RTU (several units on one bus) and through the
//! IEC 62056-21 readout. The same verdicts as the built-in simulator, protocol faults retried
//! and counted, a unit's refusals and a readout's defects named, a silent unit not stalling its
//! bus.

mod common;
use common::{bin, records_in, serve_at, temp_dir};

use meterproof::record::{CheckVerdict, UnitRecord, UnitStatus};
use std::path::Path;

/// Bench seconds per real second. Ten, not the 25 of other station tests: a readout is two
/// exchanges a sample, and with eight of these tests (sixteen processes) sharing two cores, a
/// late thread at 25 times real time moves an energy window's ends by a large share of it.
const SCALE: &str = "10";

/// Runs `plan` (its energy window stretched, `common::stretched`, on a station and on the
/// built-in simulator alike) and reads its records.
fn run(plan: &str, station: Option<&Path>, out: &Path) -> (i32, String, Vec<UnitRecord>) {
    let plan = common::stretched(plan, out.parent().unwrap());
    let mut cmd = bin();
    cmd.arg("run")
        .arg(&plan)
        .args(["--quiet", "--unattended", "--out"])
        .arg(out);
    if let Some(station) = station {
        cmd.arg("--bench").arg(station);
    }
    let output = cmd.output().unwrap();
    let text = format!(
        "{}{}",
        String::from_utf8_lossy(&output.stdout),
        String::from_utf8_lossy(&output.stderr)
    );
    let mut records = if out.exists() {
        records_in(out)
    } else {
        Vec::new()
    };
    records.sort_by_key(|r| r.position);
    (output.status.code().unwrap(), text, records)
}

/// A check's verdict, by step and quantity.
type CheckVerdicts = Vec<(String, String, CheckVerdict)>;

/// The built-in simulator's unit verdicts for seed 1 and four positions: its planted defect
/// rejects position 2, the others pass.
fn assert_builtin_statuses(records: &[UnitRecord], text: &str) {
    let statuses: Vec<UnitStatus> = records.iter().map(|r| r.verdict.status).collect();
    assert_eq!(
        statuses,
        [
            UnitStatus::Accepted,
            UnitStatus::Rejected,
            UnitStatus::Accepted,
            UnitStatus::Accepted
        ],
        "{text}"
    );
}

/// Each position's verdict and every check's verdict, step by step.
fn verdicts(records: &[UnitRecord]) -> Vec<(UnitStatus, CheckVerdicts)> {
    records
        .iter()
        .map(|r| {
            let checks = r
                .steps
                .iter()
                .flat_map(|s| {
                    s.checks
                        .iter()
                        .map(|c| (s.id.clone(), c.quantity.name().to_string(), c.verdict))
                })
                .collect();
            (r.verdict.status, checks)
        })
        .collect()
}

#[test]
fn units_on_two_buses_get_the_builtin_verdicts() {
    let dir = temp_dir("modbus-same");
    let served = serve_at(&dir, SCALE, &["--protocol", "modbus", "--buses", "2"]);
    let station = std::fs::read_to_string(&served.station).unwrap();
    assert!(station.contains("address: 2"), "{station}");
    let (code, text, over_modbus) = run(
        "test-plans/demo-modbus.yaml",
        Some(&served.station),
        &dir.join("m"),
    );
    assert_eq!(code, 1, "{text}");
    // The built-in simulator, same seed and positions: the same meters.
    let (_, text_b, builtin) = run("test-plans/demo.yaml", None, &dir.join("b"));
    assert_eq!(builtin.len(), 4, "{text_b}");
    assert_eq!(verdicts(&over_modbus), verdicts(&builtin));
    assert_eq!(over_modbus[1].verdict.status, UnitStatus::Rejected);
    for r in &over_modbus {
        assert!(r.link.contains("Modbus RTU"), "{}", r.link);
        assert!(
            r.link.contains(&format!("address {}", r.position)),
            "{}",
            r.link
        );
        let h = r
            .link_health
            .expect("a Modbus link counts its transactions");
        assert_eq!((h.retries, h.exceptions, h.crc_errors), (0, 0, 0));
    }
    // Two positions a bus: positions 1 and 2 share a port, 3 and 4 another.
    let port = |r: &UnitRecord| r.link.split(' ').next().unwrap().to_string();
    assert_eq!(port(&over_modbus[0]), port(&over_modbus[1]));
    assert_ne!(port(&over_modbus[1]), port(&over_modbus[2]));
    std::fs::remove_dir_all(&dir).unwrap();
}

#[test]
fn silent_and_busy_units_and_bad_checksums_are_retried_counted_and_shown() {
    let dir = temp_dir("modbus-faults");
    let served = serve_at(
        &dir,
        SCALE,
        &[
            "--protocol",
            "modbus",
            "--fault",
            "1:drop-every=6",
            "--fault",
            "2:slow=20ms",
            "--fault",
            "2:reboot-after=10",
            "--fault",
            "3:busy-every=7",
            "--fault",
            "4:bad-crc-every=5",
        ],
    );
    let (code, text, records) = run(
        "test-plans/demo-modbus.yaml",
        Some(&served.station),
        &dir.join("out"),
    );
    assert_eq!(code, 1, "{text}");
    assert_builtin_statuses(&records, &text);
    // A request that got no reply is sent again (after the timeout).
    let h1 = records[0].link_health.unwrap();
    assert!(
        h1.retries > 0 && h1.exceptions == 0 && h1.crc_errors == 0,
        "{h1:?}"
    );
    let h3 = records[2].link_health.unwrap();
    assert!(h3.exceptions > 0 && h3.retries == h3.exceptions, "{h3:?}");
    assert_eq!(h3.crc_errors, 0);
    let h4 = records[3].link_health.unwrap();
    assert!(h4.crc_errors > 0 && h4.retries == h4.crc_errors, "{h4:?}");
    // The report says so beside the unit's link.
    let html = std::fs::read_dir(dir.join("out"))
        .unwrap()
        .map(|d| d.unwrap().path())
        .filter(|d| d.is_dir())
        .flat_map(|d| std::fs::read_dir(d).unwrap())
        .map(|f| f.unwrap().path())
        .find(|p| p.to_string_lossy().ends_with("-p4.html"))
        .unwrap();
    let html = std::fs::read_to_string(html).unwrap();
    assert!(
        html.contains(&format!("{} frames failing the checksum", h4.crc_errors)),
        "report lacks the CRC count"
    );
    std::fs::remove_dir_all(&dir).unwrap();
}

#[test]
fn a_register_the_unit_does_not_have_is_named_with_its_exception() {
    let dir = temp_dir("modbus-illegal");
    let served = serve_at(&dir, SCALE, &["--protocol", "modbus"]);
    let plan = std::fs::read_to_string("test-plans/demo-modbus.yaml")
        .unwrap()
        .replace(
            "voltage:        { register: 0x0000",
            "voltage:        { register: 0x0040",
        );
    let plan_path = dir.join("wrong-register.yaml");
    std::fs::write(&plan_path, plan).unwrap();
    let (code, text, records) = run(
        plan_path.to_str().unwrap(),
        Some(&served.station),
        &dir.join("out"),
    );
    assert_ne!(code, 0, "{text}");
    // Voltage is checked at basic-Ib only: that step cannot be finished, so no unit is accepted.
    for r in &records {
        assert_ne!(r.verdict.status, UnitStatus::Accepted);
        let step = r.steps.iter().find(|s| s.id == "basic-Ib").unwrap();
        let reason = step.reason.clone().unwrap_or_default();
        assert!(
            reason.contains("refused read voltage")
                && reason.contains("exception 02 (Illegal data address)"),
            "{reason}"
        );
        // Not retried: the answer would not change.
        assert_eq!(r.link_health.unwrap().retries, 0);
    }
    std::fs::remove_dir_all(&dir).unwrap();
}

#[test]
fn a_silent_unit_does_not_stall_the_others_on_its_bus() {
    let dir = temp_dir("modbus-silent");
    // All four on one bus; the unit at address 1 stops answering after identifying itself.
    let served = serve_at(
        &dir,
        SCALE,
        &["--protocol", "modbus", "--fault", "1:die-after=3"],
    );
    let (code, text, records) = run(
        "test-plans/demo-modbus.yaml",
        Some(&served.station),
        &dir.join("out"),
    );
    assert_ne!(code, 0, "{text}");
    assert_eq!(records[0].verdict.status, UnitStatus::Incomplete, "{text}");
    // The others finish every step with every sample: the silent unit held the bus for its
    // timeouts, not for good. (Their verdicts are not asserted: readings that waited for the
    // bus are stamped when they were answered, and an energy register's span that no longer
    // matches the window widens U, which the guarded rule may then refuse.)
    for r in &records[1..] {
        assert_ne!(r.verdict.status, UnitStatus::Incomplete, "{text}");
        for s in &r.steps {
            for c in &s.checks {
                let wanted = s.samples_planned as usize;
                assert_eq!(
                    c.samples.len(),
                    wanted,
                    "{} {} {}",
                    r.serial,
                    s.id,
                    c.quantity.name()
                );
            }
        }
    }
    // Position 2's phase defect is still found.
    assert_eq!(records[1].verdict.status, UnitStatus::Rejected, "{text}");
    let reason = records[0]
        .steps
        .iter()
        .find_map(|s| s.reason.clone())
        .unwrap_or_default();
    assert!(
        reason.contains("no reply") && reason.contains("200 ms"),
        "{reason}"
    );
    std::fs::remove_dir_all(&dir).unwrap();
}

#[test]
fn a_shared_port_needs_an_address_per_unit_and_a_bus_link() {
    let dir = temp_dir("modbus-station");
    let served = serve_at(&dir, SCALE, &["--protocol", "modbus"]);
    let station = std::fs::read_to_string(&served.station).unwrap();
    // The text link cannot share a port.
    let (code, text, _) = run(
        "test-plans/demo-serial.yaml",
        Some(&served.station),
        &dir.join("t"),
    );
    assert_eq!(code, 2, "{text}");
    assert!(
        text.contains("only units on a bus (a `modbus` link) can share a port"),
        "{text}"
    );
    // Two units at one address, or one without an address, on one port.
    let same = station.replace("address: 2", "address: 1");
    std::fs::write(dir.join("same.yaml"), same).unwrap();
    let o = bin()
        .args(["run", "test-plans/demo-modbus.yaml", "--out"])
        .arg(dir.join("o"))
        .arg("--bench")
        .arg(dir.join("same.yaml"))
        .output()
        .unwrap();
    let e = String::from_utf8_lossy(&o.stderr);
    assert!(
        e.contains("positions[2].address") && e.contains("is position 1's already"),
        "{e}"
    );
    let none = station.replace(", address: 3", "");
    std::fs::write(dir.join("none.yaml"), none).unwrap();
    let o = bin()
        .args(["run", "test-plans/demo-modbus.yaml", "--out"])
        .arg(dir.join("o"))
        .arg("--bench")
        .arg(dir.join("none.yaml"))
        .output()
        .unwrap();
    let e = String::from_utf8_lossy(&o.stderr);
    assert!(
        e.contains("positions[3].port") && e.contains("each need an address"),
        "{e}"
    );
    std::fs::remove_dir_all(&dir).unwrap();
}

// ---- The IEC 62056-21 readout ----

#[test]
fn units_read_through_their_optical_port_get_the_builtin_verdicts() {
    let dir = temp_dir("readout-same");
    let served = serve_at(&dir, SCALE, &["--protocol", "iec62056_21"]);
    let (code, text, by_readout) = run(
        "test-plans/demo-readout.yaml",
        Some(&served.station),
        &dir.join("r"),
    );
    assert_eq!(code, 1, "{text}");
    let (_, text_b, builtin) = run("test-plans/demo.yaml", None, &dir.join("b"));
    assert_eq!(builtin.len(), 4, "{text_b}");
    // Check by check: an energy register read from a readout taken before the load (at
    // identification, or in the step before) would show here as a wrong energy error.
    assert_eq!(verdicts(&by_readout), verdicts(&builtin));
    for r in &by_readout {
        assert!(r.link.contains("IEC 62056-21"), "{}", r.link);
        let id = r.identity.as_ref().unwrap();
        assert_eq!(
            (id.model.as_str(), id.firmware.as_str()),
            ("TM-16", "2.1.4")
        );
        assert!(id.serial.starts_with("TM16-"), "{}", id.serial);
    }
    std::fs::remove_dir_all(&dir).unwrap();
}

#[test]
fn a_wrong_block_check_and_a_silent_meter_are_retried_and_counted() {
    let dir = temp_dir("readout-faults");
    let served = serve_at(
        &dir,
        SCALE,
        &[
            "--protocol",
            "iec62056_21",
            "--fault",
            "3:bad-crc-every=6",
            "--fault",
            "4:drop-every=9",
        ],
    );
    let (code, text, records) = run(
        "test-plans/demo-readout.yaml",
        Some(&served.station),
        &dir.join("out"),
    );
    assert_eq!(code, 1, "{text}");
    assert_builtin_statuses(&records, &text);
    let h3 = records[2].link_health.unwrap();
    assert!(h3.crc_errors > 0 && h3.retries >= h3.crc_errors, "{h3:?}");
    let h4 = records[3].link_health.unwrap();
    assert!(h4.retries > 0 && h4.crc_errors == 0, "{h4:?}");
    std::fs::remove_dir_all(&dir).unwrap();
}

#[test]
fn a_value_in_another_unit_than_the_plan_says_names_its_line() {
    let dir = temp_dir("readout-unit");
    let served = serve_at(&dir, SCALE, &["--protocol", "iec62056_21"]);
    let plan = std::fs::read_to_string("test-plans/demo-readout.yaml")
        .unwrap()
        .replace("{ obis: 31.7.0, unit: A,", "{ obis: 31.7.0, unit: mA,");
    let plan_path = dir.join("wrong-unit.yaml");
    std::fs::write(&plan_path, plan).unwrap();
    let (code, text, records) = run(
        plan_path.to_str().unwrap(),
        Some(&served.station),
        &dir.join("out"),
    );
    assert_ne!(code, 0, "{text}");
    for r in &records {
        assert_eq!(r.verdict.status, UnitStatus::Incomplete, "{text}");
        let reason = r
            .steps
            .iter()
            .find_map(|s| s.reason.clone())
            .unwrap_or_default();
        // The current is the fifth data line of the simulated readout.
        assert!(
            reason.contains("line 5: the unit is A, the plan says mA"),
            "{reason}"
        );
    }
    std::fs::remove_dir_all(&dir).unwrap();
}

/// The sign-on goes at 300 baud and the data come at the rate the meter offered, once
/// acknowledged: the simulated meter checks the rate the link set on the pseudo-terminal and
/// sends noise to a reader at another rate, as a real line would deliver it.
#[test]
fn the_baud_rate_switch_is_followed_and_a_wrong_rate_gets_noise() {
    let dir = temp_dir("readout-baud");
    let served = serve_at(&dir, SCALE, &["--protocol", "iec62056_21"]);
    let text = std::fs::read_to_string("test-plans/demo-readout.yaml").unwrap();
    // Staying at 300 baud (acknowledging with rate character 0) works too, only slower.
    let stay = dir.join("stay.yaml");
    std::fs::write(
        &stay,
        text.replace("baud_switch: true", "baud_switch: false"),
    )
    .unwrap();
    let (code, out, records) = run(
        stay.to_str().unwrap(),
        Some(&served.station),
        &dir.join("s"),
    );
    assert_eq!(code, 1, "{out}");
    assert_eq!(records[0].verdict.status, UnitStatus::Accepted, "{out}");
    // A sign-on with a device address reaches only the meter of that address (the simulated
    // meters' address is their serial).
    let other = dir.join("other.yaml");
    std::fs::write(
        &other,
        text.replace("device_address: ''", "device_address: 'TM16-999999'"),
    )
    .unwrap();
    let (code, out, records) = run(
        other.to_str().unwrap(),
        Some(&served.station),
        &dir.join("o"),
    );
    assert_ne!(code, 0, "{out}");
    let why = records[0].verdict.reasons.join(" ");
    assert!(why.contains("no reply"), "{why}");
    // A sign-on at 9600 baud is noise to a meter listening at 300.
    let fast = dir.join("fast.yaml");
    std::fs::write(
        &fast,
        text.replace("port: { baud: 300,", "port: { baud: 9600,"),
    )
    .unwrap();
    let (code, out, records) = run(
        fast.to_str().unwrap(),
        Some(&served.station),
        &dir.join("f"),
    );
    assert_ne!(code, 0, "{out}");
    for r in &records {
        assert_eq!(r.verdict.status, UnitStatus::Incomplete);
        let why = r.verdict.reasons.join(" ");
        assert!(
            why.contains("could not identify the unit") && why.contains("stopped after 5 bytes"),
            "{why}"
        );
    }
    std::fs::remove_dir_all(&dir).unwrap();
}

/// Register by register (programming mode, read command R1): the same verdicts as the built-in
/// simulator, a wrong block check asked again, and a register the meter does not have named.
#[test]
fn register_by_register_reads_give_the_builtin_verdicts() {
    let dir = temp_dir("readout-register");
    let served = serve_at(
        &dir,
        SCALE,
        &["--protocol", "iec62056_21", "--fault", "3:bad-crc-every=7"],
    );
    let text = std::fs::read_to_string("test-plans/demo-readout.yaml")
        .unwrap()
        .replace("read: readout ", "read: register ");
    let plan = dir.join("register.yaml");
    std::fs::write(&plan, &text).unwrap();
    let (code, out, by_register) = run(
        plan.to_str().unwrap(),
        Some(&served.station),
        &dir.join("r"),
    );
    assert_eq!(code, 1, "{out}");
    let (_, _, builtin) = run("test-plans/demo.yaml", None, &dir.join("b"));
    assert_eq!(verdicts(&by_register), verdicts(&builtin));
    assert!(
        by_register[0].link.contains("register by register"),
        "{}",
        by_register[0].link
    );
    let h3 = by_register[2].link_health.unwrap();
    assert!(h3.crc_errors > 0 && h3.retries >= h3.crc_errors, "{h3:?}");
    // A register the meter does not have: its answer is an error message, named as the
    // meter's refusal and not asked again.
    let missing = dir.join("missing.yaml");
    std::fs::write(&missing, text.replace("{ obis: 32.7.0,", "{ obis: 52.7.0,")).unwrap();
    let (_, out, records) = run(
        missing.to_str().unwrap(),
        Some(&served.station),
        &dir.join("m"),
    );
    let reason = records[0]
        .steps
        .iter()
        .find(|s| s.id == "basic-Ib")
        .and_then(|s| s.reason.clone())
        .unwrap_or_default();
    assert!(
        reason.contains(
            "the unit refused read voltage (52.7.0): it answered (ERROR) for register 52.7.0"
        ),
        "{reason}\n{out}"
    );
    assert_eq!(records[0].link_health.unwrap().exceptions, 1);
    std::fs::remove_dir_all(&dir).unwrap();
}

/// A meter on an interactive console (characters echoed, CRLF, a "> " prompt with no line
/// ending, log lines until `log off`): the link waits for the prompt, takes it off the echo
/// glued to it, sends its init sequence, and gets the built-in simulator's verdicts with no
/// reply misunderstood (the console's behaviour is common practice, no published source).
#[test]
fn units_on_an_interactive_console_get_the_builtin_verdicts() {
    let dir = temp_dir("console-same");
    let served = serve_at(&dir, SCALE, &["--console"]);
    let (code, text, on_console) = run(
        "test-plans/demo-console.yaml",
        Some(&served.station),
        &dir.join("c"),
    );
    assert_eq!(code, 1, "{text}");
    assert_builtin_statuses(&on_console, &text);
    let (_, _, builtin) = run("test-plans/demo.yaml", None, &dir.join("b"));
    assert_eq!(verdicts(&on_console), verdicts(&builtin));
    for r in &on_console {
        let h = r.link_health.expect("a text link counts its lines");
        assert_eq!((h.not_understood, h.retries), (0, 0), "{}", r.serial);
        // Every request's echo is skipped, besides banner lines.
        assert!(h.lines_skipped >= h.requests, "{h:?}");
    }
    // The same console read with a link that knows nothing of it: the prompt glued to each
    // echo and the log lines are lines not understood, counted in the record.
    let naive = dir.join("naive.yaml");
    let plan = std::fs::read_to_string("test-plans/demo-console.yaml").unwrap();
    let start = plan.find("  echo: true").unwrap();
    let end = plan.find("  restart:").unwrap();
    std::fs::write(
        &naive,
        format!("{}  skip: '^#'\n{}", &plan[..start], &plan[end..]),
    )
    .unwrap();
    let (_, text, records) = run(
        naive.to_str().unwrap(),
        Some(&served.station),
        &dir.join("n"),
    );
    assert!(!records.is_empty(), "{text}");
    let h = records[0].link_health.unwrap();
    assert!(h.not_understood >= h.requests, "{h:?}");
    // A prompt that never comes: the unit is INCOMPLETE, and the reason says so.
    let wrong = dir.join("wrong-prompt.yaml");
    std::fs::write(&wrong, plan.replace("prompt: \"> \"", "prompt: \"$ \"")).unwrap();
    let (code, text, records) = run(
        wrong.to_str().unwrap(),
        Some(&served.station),
        &dir.join("w"),
    );
    assert_eq!(code, 3, "{text}");
    assert!(
        records
            .iter()
            .all(|r| r.verdict.status == UnitStatus::Incomplete)
    );
    assert!(text.contains("no prompt \"$ \" within 250 ms"), "{text}");
    std::fs::remove_dir_all(&dir).unwrap();
}
