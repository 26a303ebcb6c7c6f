//! The `text` link end to end: simulated meters on pseudo-terminals, driven through the real
//! serialport code path, all positions read concurrently.

mod common;
use common::ctx;

use meterproof::bench::Bench;
use meterproof::bench::sim::device::{Device, Faults, PtyDevice};
use meterproof::bench::sim::{SimBench, SimConfig};
use meterproof::exec::{self, Silent};
use meterproof::link::text;
use meterproof::plan::{LinkSpec, Plan};
use meterproof::record::{CheckVerdict, StepStatus, UnitRecord, UnitStatus};
use std::sync::Arc;
use std::time::Duration;

fn plan(name: &str) -> Plan {
    let path = format!("test-plans/{name}");
    Plan::load(std::path::Path::new(&path)).unwrap()
}

/// A simulated bench whose meters are served on pseudo-terminals and reached through the plan's
/// text link; the devices must outlive the run.
fn serial_bench(plan: &Plan, config: &SimConfig, faults: &[Faults]) -> (Bench, Vec<PtyDevice>) {
    let LinkSpec::Text(spec) = &plan.link else {
        panic!("the plan has no text link")
    };
    let spec = Arc::new((**spec).clone());
    // A device told to echo needs a link told to expect it.
    let mut echo_spec = (*spec).clone();
    echo_spec.echo = true;
    let echo_spec = Arc::new(echo_spec);
    let sim = SimBench::new(config);
    let devices: Vec<PtyDevice> = (0..sim.positions())
        .map(|i| {
            let f = faults.get(i).cloned().unwrap_or_default();
            PtyDevice::spawn(Device::new(sim.meter(i), f)).unwrap()
        })
        .collect();
    let mut bench = sim.into_bench();
    for (i, (p, d)) in bench.positions.iter_mut().zip(&devices).enumerate() {
        let echoes = faults.get(i).is_some_and(|f| f.echo);
        let spec = if echoes { &echo_spec } else { &spec };
        p.link = text::open(&d.path, spec.clone()).unwrap();
    }
    bench.parallel = true;
    (bench, devices)
}

fn run(plan: &Plan, bench: &mut Bench) -> Vec<UnitRecord> {
    exec::run(plan, bench, &ctx(), &mut Silent)
}

#[test]
fn the_serial_demo_reads_what_the_builtin_sim_reads() {
    let config = SimConfig::new(1, 4);
    let builtin = run(&plan("demo.yaml"), &mut SimBench::new(&config).into_bench());
    let serial_plan = plan("demo-serial.yaml");
    let (mut bench, _devices) = serial_bench(&serial_plan, &config, &[]);
    let serial = run(&serial_plan, &mut bench);
    assert_eq!(builtin.len(), serial.len());
    for (a, b) in builtin.iter().zip(&serial) {
        assert_eq!(a.serial, b.serial);
        assert_eq!(a.verdict, b.verdict);
        for (sa, sb) in a.steps.iter().zip(&b.steps) {
            for (ca, cb) in sa.checks.iter().zip(&sb.checks) {
                // The same counts, converted the same way: the same numbers, bit for bit.
                assert_eq!(ca.samples, cb.samples, "{} {}", sa.id, ca.quantity.name());
                assert_eq!(ca.verdict, cb.verdict);
            }
        }
    }
    assert_eq!(
        serial
            .iter()
            .filter(|r| r.verdict.status == UnitStatus::Rejected)
            .count(),
        1
    );
}

#[test]
fn recoverable_faults_are_retried_and_fatal_ones_leave_the_unit_incomplete() {
    let serial_plan = plan("demo-serial.yaml");
    let mut config = SimConfig::new(1, 6);
    config.plant_defect = false;
    let faults = [
        // Every 7th reply lost: each loss costs one retry, no reading.
        Faults {
            drop_every: Some(7),
            ..Faults::default()
        },
        // Every 5th reply garbled on the wire.
        Faults {
            garble_every: Some(5),
            ..Faults::default()
        },
        // Stops answering after 60 requests (in the middle of step 3).
        Faults {
            die_after: Some(60),
            ..Faults::default()
        },
        // Reboots once mid-run: a banner instead of a reply, then answers again; the step it
        // restarted in does not count.
        Faults {
            reboot_after: Some(30),
            echo: true,
            ..Faults::default()
        },
        // Slow, but within the link's 250 ms timeout.
        Faults {
            slow: Duration::from_millis(20),
            ..Faults::default()
        },
        // Slower than the link's 3 attempts of 250 ms: never an answer in time.
        Faults {
            slow: Duration::from_millis(900),
            ..Faults::default()
        },
    ];
    let (mut bench, _devices) = serial_bench(&serial_plan, &config, &faults);
    let records = run(&serial_plan, &mut bench);

    // Retries and lines not understood are counted in the records.
    let lost = records[0].link_health.unwrap();
    assert!(lost.retries > 0 && lost.restarts == 0, "{lost:?}");
    let garbled = records[1].link_health.unwrap();
    assert!(garbled.not_understood > 0, "{garbled:?}");
    let rebooted = &records[3];
    assert_eq!(rebooted.link_health.unwrap().restarts, 1);
    assert_eq!(rebooted.verdict.status, UnitStatus::Incomplete);
    let restarted: Vec<&str> = rebooted
        .steps
        .iter()
        .filter(|s| s.status == StepStatus::Incomplete)
        .map(|s| s.reason.as_deref().unwrap())
        .collect();
    assert_eq!(
        restarted.len(),
        1,
        "only the step it restarted in: {restarted:?}"
    );
    assert!(restarted[0].starts_with("the unit restarted during the step"));
    assert!(
        rebooted
            .steps
            .iter()
            .flat_map(|s| &s.checks)
            .filter(|c| c.verdict == CheckVerdict::Fail)
            .count()
            == 0
    );
    for i in [0, 1, 4] {
        let r = &records[i];
        assert_eq!(
            r.verdict.status,
            UnitStatus::Accepted,
            "position {}: {:?}",
            i + 1,
            r.verdict
        );
    }

    let dead = &records[2];
    assert_eq!(dead.verdict.status, UnitStatus::Incomplete);
    let first_broken = dead
        .steps
        .iter()
        .position(|s| s.status != StepStatus::Done)
        .expect("a broken step");
    let broken = &dead.steps[first_broken];
    assert!(
        broken.reason.as_deref().unwrap().contains("no reply to rd"),
        "{:?}",
        broken.reason
    );
    // 60 answered requests: 1 identity, then 2 readings a sample.
    let kept: usize = dead
        .steps
        .iter()
        .flat_map(|s| &s.checks)
        .map(|c| c.samples.len())
        .sum();
    assert_eq!(kept, 59, "every answered reading is in the record");
    assert!(
        dead.steps[first_broken + 1..]
            .iter()
            .all(|s| s.status == StepStatus::Incomplete)
    );

    let slow = &records[5];
    assert_eq!(slow.verdict.status, UnitStatus::Incomplete);
    assert_eq!(
        slow.verdict.reasons[0],
        "could not identify the unit: no reply to who within 250 ms (after 3 attempts)"
    );
    // No unit that did not finish is accepted, and nothing was decided on a partial series.
    for r in &records {
        for c in r.steps.iter().flat_map(|s| &s.checks) {
            if c.samples.is_empty() {
                assert_eq!(c.verdict, CheckVerdict::NotEvaluated);
            }
        }
    }
}

#[test]
fn a_wrong_firmware_is_rejected_before_any_step() {
    let serial_plan = plan("demo-serial.yaml");
    let config = SimConfig::new(2, 2);
    let faults = [Faults {
        firmware: Some("2.0.9".into()),
        ..Faults::default()
    }];
    let (mut bench, _devices) = serial_bench(&serial_plan, &config, &faults);
    let records = run(&serial_plan, &mut bench);
    assert_eq!(records[0].verdict.status, UnitStatus::Rejected);
    assert!(
        records[0].steps.is_empty(),
        "no load step for a refused unit"
    );
    assert!(records[0].verdict.reasons[0].contains("firmware 2.0.9 does not match"));
    assert_ne!(records[1].verdict.status, UnitStatus::Rejected);
}

#[test]
fn an_unplugged_port_is_a_clear_error() {
    let serial_plan = plan("demo-serial.yaml");
    let LinkSpec::Text(spec) = &serial_plan.link else {
        unreachable!()
    };
    let err = text::open("/dev/meterproof-no-such-port", Arc::new((**spec).clone()))
        .err()
        .expect("no such port");
    assert!(
        err.to_string()
            .starts_with("cannot open /dev/meterproof-no-such-port"),
        "{err}"
    );
}

/// After a lost reply and a retry, the link says how long the attempt that was answered took,
/// not the whole call: the unit took its reading in that attempt, and a register's timing
/// uncertainty is that attempt's, not the timeout's (real time, 250 ms timeout).
#[test]
fn a_retried_reading_is_timed_by_the_attempt_that_was_answered() {
    let serial_plan = plan("demo-serial.yaml");
    let LinkSpec::Text(spec) = &serial_plan.link else {
        panic!("the plan has no text link")
    };
    let sim = SimBench::new(&SimConfig::new(1, 1));
    let device = PtyDevice::spawn(Device::new(
        sim.meter(0),
        Faults {
            drop_every: Some(2),
            ..Faults::default()
        },
    ))
    .unwrap();
    let mut link = text::open(&device.path, Arc::new((**spec).clone())).unwrap();
    // The first request is answered, the second lost and retried.
    link.read(meterproof::plan::Quantity::ActiveEnergy, "L")
        .unwrap();
    let first = link.last_exchange().unwrap().took().as_secs_f64();
    let started = std::time::Instant::now();
    link.read(meterproof::plan::Quantity::ActiveEnergy, "L")
        .unwrap();
    let whole = started.elapsed().as_secs_f64();
    let answered = link.last_exchange().unwrap().took().as_secs_f64();
    assert!(whole >= 0.25, "the retry waited out the timeout: {whole} s");
    assert!(
        answered < 0.25 && answered < whole - 0.2,
        "answered in {answered} s of {whole} s"
    );
    assert!(first < 0.25, "{first}");
}

/// A text link on the port at `path` that opens whatever path the returned cell holds when the
/// port is lost: a reseated unit comes back on another pseudo-terminal here (a real port keeps
/// its path).
fn reseatable(
    spec: &Arc<meterproof::plan::text_link::TextLinkSpec>,
    path: &str,
) -> (
    text::TextLink<Box<dyn serialport::SerialPort>>,
    Arc<std::sync::Mutex<String>>,
) {
    use meterproof::link::line::open_port;
    let now_at = Arc::new(std::sync::Mutex::new(path.to_string()));
    let settings = spec.port;
    let at = now_at.clone();
    let link = text::TextLink::new(spec.clone(), open_port(path, settings).unwrap(), "p1")
        .with_reopen(Box::new(move || open_port(&at.lock().unwrap(), settings)));
    (link, now_at)
}

/// A unit reseated on its port: the link opens the port again, checks that the same unit
/// answers (its serial) and counts the reconnection; another unit in its place, or no unit, is
/// an error that says so.
#[test]
fn a_reseated_unit_is_reopened_and_must_be_the_same_unit() {
    use meterproof::link::DutLink;
    use meterproof::plan::Quantity;
    let serial_plan = plan("demo-serial.yaml");
    let LinkSpec::Text(spec) = &serial_plan.link else {
        panic!("a text link")
    };
    let spec = Arc::new((**spec).clone());
    let mut config = SimConfig::new(1, 2);
    config.plant_defect = false;
    let sim = SimBench::new(&config);
    let first = PtyDevice::spawn(Device::new(sim.meter(0), Faults::default())).unwrap();
    // Where the unit is now: a reseated unit comes back on another pseudo-terminal here (a
    // real port keeps its path).
    let (mut link, now_at) = reseatable(&spec, &first.path);
    let id = link.identify().unwrap();
    assert!(link.read(Quantity::Voltage, "L").is_ok());
    // Unplugged, nothing to open: the read fails, saying the link is gone.
    drop(first);
    *now_at.lock().unwrap() = "/dev/meterproof-nowhere".into();
    let e = link.read(Quantity::Voltage, "L").unwrap_err();
    assert!(
        matches!(e, meterproof::link::LinkError::Disconnected(_)),
        "{e}"
    );
    // Plugged in again: the same unit, so the read goes on, and the reconnection is counted.
    let again = PtyDevice::spawn(Device::new(sim.meter(0), Faults::default())).unwrap();
    *now_at.lock().unwrap() = again.path.clone();
    assert!(link.read(Quantity::Voltage, "L").is_ok());
    assert_eq!(link.health().unwrap().reconnects, 1);
    // Another unit in its place: refused by its serial.
    drop(again);
    let other = PtyDevice::spawn(Device::new(sim.meter(1), Faults::default())).unwrap();
    *now_at.lock().unwrap() = other.path.clone();
    let e = link.read(Quantity::Voltage, "L").unwrap_err().to_string();
    assert!(e.contains(&format!("instead of {}", id.serial)), "{e}");
}

/// An energy register sampled until decided stops early only when its budget allows: the same
/// register stated 1000 times coarser (`resolution: 1 Wh` instead of one count, 1 mWh) keeps
/// sampling to the step's maximum, because its resolution term (δ·√2/√12 over two readings,
/// GUM F.2.2.1) leaves the decision open (README, "Bench time").
#[test]
fn a_coarse_register_keeps_sampling() {
    // The serial demo with its energy step sampled until decided, as in demo-adaptive.yaml.
    let base = std::fs::read_to_string("test-plans/demo-serial.yaml")
        .unwrap()
        .replace(
            "    samples: 11\n    interval: 1 s\n",
            "    samples_until_decided: { min: 3, max: 11 }\n    interval: 1 s\n",
        );
    assert!(base.contains("samples_until_decided"));
    let energy_line = "    active_energy:  { request: \"rd E {channel}\",  reply: '^= E \\S+ (?P<value>-?\\d+)$',  gain: 1000 }";
    assert!(base.contains(energy_line), "the demo's energy line");
    let coarse = base.replace(
        energy_line,
        &energy_line.replace("gain: 1000 }", "gain: 1000, resolution: 1 Wh }"),
    );
    let config = SimConfig {
        plant_defect: false,
        ..SimConfig::new(1, 4)
    };
    let taken = |text: &str| -> Vec<usize> {
        let plan = Plan::from_text("adaptive-serial.yaml", text).unwrap();
        let (mut bench, _devices) = serial_bench(&plan, &config, &[]);
        let records = run(&plan, &mut bench);
        assert_eq!(records.len(), 4);
        records
            .iter()
            .map(|r| {
                let step = r.steps.iter().find(|s| s.id == "max-Imax").unwrap();
                step.checks
                    .iter()
                    .find(|c| c.quantity.name() == "active_energy")
                    .unwrap()
                    .samples
                    .len()
            })
            .collect()
    };
    let fine = taken(&base);
    let coarse = taken(&coarse);
    assert!(
        fine.iter().all(|n| *n < 11),
        "fine registers stop early: {fine:?}"
    );
    assert!(
        coarse.iter().all(|n| *n == 11),
        "coarse ones go on: {coarse:?}"
    );
}

/// A unit that answers, but later than the link's timeout: each late reply arrives while a
/// later request waits. It is set aside and counted as late, never read as the answer to the
/// later request nor reported as "not understood"; the unit is INCOMPLETE with a reason that
/// says its replies come after the timeout.
#[test]
fn replies_later_than_the_timeout_are_named_as_such() {
    let serial_plan = plan("demo-serial.yaml");
    let mut config = SimConfig::new(1, 2);
    config.plant_defect = false;
    let faults = [
        // 400 ms a reply against the plan's 250 ms timeout.
        Faults {
            slow: Duration::from_millis(400),
            ..Faults::default()
        },
        Faults::default(),
    ];
    let (mut bench, _devices) = serial_bench(&serial_plan, &config, &faults);
    let records = run(&serial_plan, &mut bench);
    let late = &records[0];
    assert_eq!(late.verdict.status, UnitStatus::Incomplete);
    let reasons: Vec<&String> = late
        .steps
        .iter()
        .filter_map(|s| s.reason.as_ref())
        .collect();
    assert!(!reasons.is_empty());
    for r in &reasons {
        assert!(
            r.contains("within 250 ms")
                && r.contains("the unit answers more slowly than the link's timeout allows"),
            "{r}"
        );
        assert!(!r.contains("not understood"), "{r}");
    }
    let h = late.link_health.unwrap();
    assert!(h.late_replies > 0 && h.not_understood == 0, "{h:?}");
    // The punctual unit beside it is untouched.
    assert_eq!(records[1].verdict.status, UnitStatus::Accepted);
}

/// A console unit reseated on its port gets the plan's init sequence again before anything
/// else: the device served anew counts `log off`, the identity check and the reads, and the
/// link reads through its prompt with no line misunderstood.
#[test]
fn a_reopened_console_gets_its_init_sequence_again() {
    use meterproof::link::DutLink;
    use meterproof::plan::Quantity;
    use std::sync::atomic::Ordering;
    let console_plan = plan("demo-console.yaml");
    let LinkSpec::Text(spec) = &console_plan.link else {
        panic!("a text link")
    };
    assert_eq!(spec.init.len(), 1);
    let spec = Arc::new((**spec).clone());
    let sim = SimBench::new(&SimConfig::new(1, 1));
    let console = || Faults {
        console: true,
        ..Faults::default()
    };
    let first = PtyDevice::spawn(Device::new(sim.meter(0), console())).unwrap();
    let (mut link, now_at) = reseatable(&spec, &first.path);
    link.identify().unwrap();
    assert!(link.read(Quantity::Current, "L").is_ok());
    // init, who, one read.
    assert_eq!(first.requests.load(Ordering::Relaxed), 3);
    drop(first);
    let again = PtyDevice::spawn(Device::new(sim.meter(0), console())).unwrap();
    *now_at.lock().unwrap() = again.path.clone();
    for _ in 0..4 {
        assert!(link.read(Quantity::Voltage, "L").is_ok());
    }
    // init again, who (the same unit?), four reads.
    assert_eq!(again.requests.load(Ordering::Relaxed), 6);
    let h = link.health().unwrap();
    assert_eq!((h.reconnects, h.not_understood), (1, 0), "{h:?}");
}
