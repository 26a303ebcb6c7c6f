//! A bench that fails safe: whatever ends a run, the source output is off afterwards; no unit is
//! judged at a load the plan did not ask for or against a reference that is the odd one out;
//! units that cannot be told apart are not tested.
//!
//! The figures of the load and tolerance bands here are the plan's own arithmetic (common
//! practice, no published source).

mod common;
use common::{Served, bin, ctx, serve_at, temp_dir};

use meterproof::bench::sim::{SimBench, SimConfig};
use meterproof::bench::{BenchError, LoadSource};
use meterproof::exec::{self, Silent};
use meterproof::link::{DutLink, Identity, LinkError};
use meterproof::plan::{Load, Plan, Quantity};
use meterproof::record::{StepStatus, UnitStatus};
use std::io::{BufRead, BufReader, Read, Write};
use std::path::Path;
use std::process::Stdio;
use std::sync::{Arc, Mutex};
use std::time::{Duration, Instant};

/// Asks a SCPI instrument on a pseudo-terminal one question.
fn ask(port: &str, query: &str) -> String {
    let mut p = serialport::new(port, 115_200)
        .timeout(Duration::from_millis(200))
        .open()
        .unwrap();
    let _ = p.clear(serialport::ClearBuffer::All);
    p.write_all(format!("{query}\n").as_bytes()).unwrap();
    let deadline = Instant::now() + Duration::from_secs(3);
    let mut got = Vec::new();
    let mut buf = [0u8; 64];
    while Instant::now() < deadline && !got.contains(&b'\n') {
        if let Ok(n) = p.read(&mut buf) {
            got.extend_from_slice(&buf[..n]);
        }
    }
    String::from_utf8_lossy(&got).trim().to_string()
}

/// The source's port in a station file that `sim-meter` wrote.
fn source_port(station: &Path) -> String {
    let text = std::fs::read_to_string(station).unwrap();
    let v: serde_yaml::Value = serde_yaml::from_str(&text).unwrap();
    v["source"]["port"].as_str().unwrap().to_string()
}

/// The child's standard error, line by line as it comes, on a channel.
fn stderr_lines(child: &mut std::process::Child) -> std::sync::mpsc::Receiver<String> {
    let stderr = child.stderr.take().unwrap();
    let (tx, rx) = std::sync::mpsc::channel();
    std::thread::spawn(move || {
        for line in BufReader::new(stderr).lines() {
            let Ok(line) = line else { break };
            let _ = tx.send(line);
        }
    });
    rx
}

/// A run on a served station, stopped by `signal` while its second step is under load.
fn stop_mid_run(signal: &str) {
    let dir = temp_dir(&format!("signal-{signal}"));
    let served: Served = serve_at(&dir, "4", &[]);
    let out = dir.join("out");
    let mut child = bin()
        .args([
            "run",
            "test-plans/demo-serial.yaml",
            "--unattended",
            "--bench",
        ])
        .arg(&served.station)
        .arg("--out")
        .arg(&out)
        .stdout(Stdio::piped())
        .stderr(Stdio::piped())
        .spawn()
        .unwrap();
    // Wait for the observable moment: the second step has started and its load is on.
    let rx = stderr_lines(&mut child);
    let mut seen = Vec::new();
    loop {
        let line = rx
            .recv_timeout(Duration::from_secs(60))
            .unwrap_or_else(|_| panic!("no second step: {seen:#?}"));
        let second = line.starts_with("[2/");
        seen.push(line);
        if second {
            break;
        }
    }
    // (The instrument's port is meterproof's alone while it runs: its state is read after.)
    let port = source_port(&served.station);
    let status = std::process::Command::new("kill")
        .args([&format!("-{signal}"), &child.id().to_string()])
        .status()
        .unwrap();
    assert!(status.success());
    let mut stdout = String::new();
    child
        .stdout
        .take()
        .unwrap()
        .read_to_string(&mut stdout)
        .unwrap();
    let code = child.wait().unwrap().code();
    let errors: Vec<String> = rx.try_iter().collect();
    let errors = errors.join("\n");
    assert_eq!(code, Some(3), "{stdout}\n{errors}");
    assert!(errors.contains("the source output is OFF"), "{errors}");
    // The output is off at the instrument itself.
    assert_eq!(ask(&port, "OUTP?"), "0");
    // What was taken is written, and no unit is accepted.
    let run_dir = std::fs::read_dir(&out)
        .unwrap()
        .map(|e| e.unwrap().path())
        .find(|p| p.is_dir())
        .unwrap();
    let run_id = run_dir.file_name().unwrap().to_string_lossy().to_string();
    let records = common::records_of_dir(&run_dir);
    assert_eq!(records.len(), 4);
    for r in &records {
        assert_eq!(r.verdict.status, UnitStatus::Incomplete, "{:?}", r.verdict);
        assert_eq!(
            r.steps[0].status,
            StepStatus::Done,
            "the first step was kept"
        );
        // The signal came during the second step.
        assert_ne!(r.steps[1].status, StepStatus::Done);
        assert!(
            r.steps[1]
                .reason
                .as_deref()
                .unwrap()
                .contains("interrupted"),
            "{:?}",
            r.steps[1].reason
        );
    }
    // The run is resumable, and says how.
    assert!(
        stdout.contains(&format!("meterproof resume {run_id}")),
        "{stdout}"
    );
    let archive = out.join("archive.sqlite");
    // A write the kill cut short left its temporary file behind: the resume clears it.
    let stale = run_dir.join(".TM16-322610-p1.json.99999.tmp");
    std::fs::write(&stale, b"{\"half\": ").unwrap();
    let row = meterproof::archive::Archive::open_read_only(&archive)
        .unwrap()
        .run(&run_id)
        .unwrap();
    assert_eq!(row.state, "interrupted");
    let o = bin()
        .args(["resume", &run_id, "--quiet", "--unattended", "--archive"])
        .arg(&archive)
        .arg("--out")
        .arg(&out)
        .output()
        .unwrap();
    let text = String::from_utf8_lossy(&o.stdout);
    // The built-in simulator's defect at position 2 (seed 1) rejects that unit.
    assert_eq!(
        o.status.code(),
        Some(1),
        "{text}{}",
        String::from_utf8_lossy(&o.stderr)
    );
    let finals = common::records_of_dir(&run_dir);
    let statuses: Vec<UnitStatus> = finals.iter().map(|r| r.verdict.status).collect();
    assert_eq!(
        statuses,
        [
            UnitStatus::Accepted,
            UnitStatus::Rejected,
            UnitStatus::Accepted,
            UnitStatus::Accepted
        ]
    );
    assert!(!stale.exists(), "the stale temporary file is gone");
    // The interrupted run's files are kept aside, the final ones have the plain names.
    assert_eq!(common::records_of_dir(&run_dir.join("earlier-1")).len(), 4);
    assert!(
        std::fs::read_dir(&run_dir).unwrap().all(|e| !e
            .unwrap()
            .file_name()
            .to_string_lossy()
            .contains(".2."))
    );
    assert_eq!(ask(&port, "OUTP?"), "0", "off after the resumed run too");
    let v = bin()
        .args(["verify", "--archive"])
        .arg(&archive)
        .arg("--anchor")
        .arg(run_dir.join("chain-anchor.txt"))
        .output()
        .unwrap();
    assert_eq!(
        v.status.code(),
        Some(0),
        "{}",
        String::from_utf8_lossy(&v.stdout)
    );
    drop(served);
    std::fs::remove_dir_all(&dir).unwrap();
}

#[test]
fn sigterm_switches_the_output_off_and_leaves_a_resumable_run() {
    stop_mid_run("TERM");
}

#[test]
fn sighup_switches_the_output_off_and_leaves_a_resumable_run() {
    stop_mid_run("HUP");
}

/// A source that remembers whether its output is on.
#[derive(Clone, Default)]
struct Watched(Arc<Mutex<bool>>);

impl LoadSource for Watched {
    fn describe(&self) -> String {
        "watched".into()
    }
    fn apply(&mut self, _: &Load) -> Result<(), BenchError> {
        *self.0.lock().unwrap() = true;
        Ok(())
    }
    fn off(&mut self) -> Result<(), BenchError> {
        *self.0.lock().unwrap() = false;
        Ok(())
    }
}

/// A link whose reads panic after a while, as a bug in a link would.
struct Panicky {
    inner: Box<dyn DutLink>,
    reads: usize,
}

impl DutLink for Panicky {
    fn identify(&mut self) -> Result<Identity, LinkError> {
        self.inner.identify()
    }
    fn read(&mut self, q: Quantity, ch: &str) -> Result<f64, LinkError> {
        self.reads += 1;
        assert!(self.reads < 15, "a bug in the link");
        self.inner.read(q, ch)
    }
    fn describe(&self) -> String {
        "panicky".into()
    }
}

#[test]
fn a_panic_under_load_switches_the_output_off() {
    let plan = Plan::load(Path::new("test-plans/demo.yaml")).unwrap();
    let mut bench = SimBench::new(&SimConfig::new(1, 2)).into_bench();
    let watched = Watched::default();
    bench.source = meterproof::bench::SourceHandle::new(Box::new(watched.clone()));
    let inner = std::mem::replace(
        &mut bench.positions[0].link,
        Box::new(meterproof::link::Unreachable::new(
            "x",
            LinkError::Disconnected("x".into()),
        )),
    );
    bench.positions[0].link = Box::new(Panicky { inner, reads: 0 });
    let result = std::panic::catch_unwind(std::panic::AssertUnwindSafe(|| {
        exec::run(&plan, &mut bench, &ctx(), &mut Silent)
    }));
    assert!(result.is_err(), "the link's panic went through");
    assert!(!*watched.0.lock().unwrap(), "the output was left on");
}

fn check(file: &Path) -> (i32, String) {
    let o = bin().arg("check").arg(file).output().unwrap();
    (
        o.status.code().unwrap(),
        String::from_utf8_lossy(&o.stderr).to_string(),
    )
}

/// A station file that `sim-meter` would write, for editing.
const STATION: &str = "station: S
positions:
  - { position: 1, port: /dev/ttyUSB0 }
  - { position: 2, port: /dev/ttyUSB1 }
source:
  kind: scpi
  port: /dev/ttyUSB8
  timeout: 2 s
  commands:
    setup: ['*RST']
    voltage: 'SOUR:VOLT {value}'
    current: 'SOUR:CURR {value}'
    phase: 'SOUR:PHAS {value}'
    frequency: 'SOUR:FREQ {value}'
    output_on: 'OUTP ON'
    output_off: 'OUTP OFF'
    error_query: 'SYST:ERR?'
reference:
  id: R
  accuracy: 0.05 % of reading
  read:
    kind: scpi
    port: /dev/ttyUSB9
    timeout: 1 s
    queries: { current: 'MEAS:CURR?' }
";

#[test]
fn check_refuses_stations_that_cannot_work() {
    let dir = temp_dir("bad-stations");
    let cases: &[(&str, &str, &str)] = &[
        (
            "current: 'SOUR:CURR {value}'",
            "current: 'SOUR:CURR {valeu}'",
            "source.commands.current: \"{valeu}\" is not a placeholder",
        ),
        (
            "current: 'SOUR:CURR {value}'",
            "current: 'SOUR:CURR 5'",
            "source.commands.current: \"SOUR:CURR 5\" has no {value}",
        ),
        (
            "output_on: 'OUTP ON'",
            "output_on: 'OUTP {value}'",
            "source.commands.output_on: this command takes no {value}",
        ),
        (
            "  timeout: 1 s",
            "  timeout: -1 s",
            "reference.read.timeout: \"-1 s\" is negative",
        ),
        (
            "  timeout: 2 s",
            "  timeout: 1000000000 s",
            "source.timeout: \"1000000000 s\" is longer than 12 h",
        ),
        (
            "  port: /dev/ttyUSB8",
            "  port: /dev/ttyUSB1",
            "source.port: port /dev/ttyUSB1 is already used by the port of position 2",
        ),
        (
            "    port: /dev/ttyUSB9",
            "    port: /dev/ttyUSB8",
            "reference.read.port: port /dev/ttyUSB8 is already used by source.port",
        ),
        (
            "  accuracy: 0.05 % of reading\n",
            "  accuracy: 0.05 % of reading\n  ranges: { current: -20 A }\n",
            "reference.ranges.current: a range must be greater than zero",
        ),
        (
            "station: S\n",
            "station: S\nsimulation: { time_scale: 1e12 }\n",
            "simulation.time_scale: expected a number greater than zero and at most 1000",
        ),
        (
            "station: S\n",
            "station: S\nambient_temperature: 23 K\n",
            "ambient_temperature: \"K\" in \"23 K\" is not a unit meterproof knows",
        ),
        (
            "station: S\n",
            "station: S\nambient_temperature: 230 °C\n",
            "ambient_temperature: 230 °C is not a bench's temperature",
        ),
    ];
    let good = dir.join("good.yaml");
    std::fs::write(&good, STATION).unwrap();
    assert_eq!(check(&good).0, 0, "{}", check(&good).1);
    let mut refused = 0;
    for (i, (from, to, expected)) in cases.iter().enumerate() {
        assert!(STATION.contains(from), "{from}");
        let f = dir.join(format!("bad-{i}.yaml"));
        std::fs::write(&f, STATION.replacen(from, to, 1)).unwrap();
        let (code, text) = check(&f);
        assert_eq!(code, 2, "{to}: {text}");
        assert!(text.contains(expected), "{to}: {text}");
        refused += 1;
    }
    println!("bad stations refused: {refused} of {}", cases.len());
    std::fs::remove_dir_all(&dir).unwrap();
}

#[test]
fn check_refuses_plans_that_cannot_work() {
    let dir = temp_dir("bad-plan-bounds");
    // (plan, text in it, replacement, what check must say)
    let cases: &[(&str, &str, &str, &str)] = &[
        (
            "demo-serial.yaml",
            "timeout: 250 ms",
            "timeout: -5 ms",
            "link.timeout: \"-5 ms\" is negative",
        ),
        (
            "demo-serial.yaml",
            "timeout: 250 ms",
            "timeout: 1000000000 s",
            "link.timeout: \"1000000000 s\" is longer than 12 h",
        ),
        (
            "demo-serial.yaml",
            "timeout: 250 ms",
            "timeout: 90 s",
            "link.timeout: the timeout must be",
        ),
        (
            "demo-serial.yaml",
            "pause: 0 ms",
            "pause: -1 s",
            "link.pause: \"-1 s\" is negative",
        ),
        (
            "demo-serial.yaml",
            "skip: '^#'",
            "skip: ''",
            "link.skip: an empty pattern matches every line",
        ),
        (
            "demo.yaml",
            "interval: 500 ms",
            "interval: 1e30 s",
            "defaults.interval: \"1e30 s\" is longer than 12 h",
        ),
        (
            "demo.yaml",
            "samples: 8",
            "samples: 0",
            "defaults.samples: expected a whole number of samples from 1 to 10000",
        ),
        (
            "demo.yaml",
            "tolerance: { percent: 1 %, plus: 5 mA }",
            "tolerance: { percent: 0 %, plus: 0 mA }",
            "a tolerance of zero can never be met",
        ),
        (
            "demo.yaml",
            "tolerance: { percent: 0.5 % }",
            "tolerance: { percent: 0 % }",
            "a tolerance of zero",
        ),
        (
            "demo.yaml",
            "guard_band: 1 U",
            "guard_band: 40 U",
            "decision.guard_band: expected a multiple of the expanded uncertainty from 0 to 3",
        ),
        (
            "demo-adaptive.yaml",
            "readings: 4, every: 150 ms, at_least: 500 ms, at_most: 4 s",
            "readings: 40, every: 150 ms, at_least: 500 ms, at_most: 4 s",
            "the step could never settle",
        ),
        (
            "demo.yaml",
            "    settle: 2 s\n",
            "    settle: 2 s\n    load_within: 0 %\n",
            "steps[1].load_within: expected a percentage above 0 % and at most 50 %",
        ),
    ];
    let mut refused = 0;
    for (i, (plan, from, to, expected)) in cases.iter().enumerate() {
        let text = std::fs::read_to_string(format!("test-plans/{plan}")).unwrap();
        assert!(text.contains(from), "{plan} has {from}");
        let f = dir.join(format!("bad-{i}.yaml"));
        std::fs::write(&f, text.replacen(from, to, 1)).unwrap();
        let (code, out) = check(&f);
        assert_eq!(code, 2, "{to}: {out}");
        assert!(out.contains(expected), "{to}: {out}");
        refused += 1;
    }
    // Calibration points all at one load: no line can be fitted through them.
    let text = std::fs::read_to_string("test-plans/calibrate.yaml")
        .unwrap()
        .replace("current: 1.2 A", "current: 0 A")
        .replace("current: 2.4 A", "current: 0 A")
        .replace("current: 3.6 A", "current: 0 A");
    let f = dir.join("one-load.yaml");
    std::fs::write(&f, text).unwrap();
    let (code, out) = check(&f);
    assert_eq!(code, 2, "{out}");
    assert!(
        out.contains("every calibration point is at the same load"),
        "{out}"
    );
    refused += 1;
    println!("bad plans refused: {refused} of {}", cases.len() + 1);
    std::fs::remove_dir_all(&dir).unwrap();
}

/// Serves a simulated station, edits its station file (`from` becomes `to`) and runs the
/// serial demo on it into `dir/out`.
fn run_on_edited_station(dir: &Path, from: &str, to: &str) -> (Served, std::process::Output) {
    let served = serve_at(dir, "25", &[]);
    let text = std::fs::read_to_string(&served.station).unwrap();
    assert!(text.contains(from), "the station file has {from}");
    let station = dir.join("edited.yaml");
    std::fs::write(&station, text.replace(from, to)).unwrap();
    let o = bin()
        .args([
            "run",
            "test-plans/demo-serial.yaml",
            "--quiet",
            "--unattended",
            "--bench",
        ])
        .arg(&station)
        .arg("--out")
        .arg(dir.join("out"))
        .output()
        .unwrap();
    (served, o)
}

/// A station whose current command sets the voltage instead (it passes `check`: the command is
/// well formed): the source never gets its current set-point, and the reference says so.
#[test]
fn a_unit_is_never_judged_at_a_load_never_applied() {
    let dir = temp_dir("load-not-applied");
    let (served, o) = run_on_edited_station(
        &dir,
        "current: 'SOUR:CURR {value}'",
        "current: 'SOUR:VOLT {value}'",
    );
    let stdout = String::from_utf8_lossy(&o.stdout);
    assert_eq!(o.status.code(), Some(3), "{stdout}");
    let records = common::records_in(&dir.join("out"));
    assert_eq!(records.len(), 4);
    for r in &records {
        assert_ne!(r.verdict.status, UnitStatus::Accepted);
        // Every step with current planned was set aside, with both figures.
        for s in r.steps.iter().filter(|s| s.load.current > 0.0) {
            assert_eq!(s.status, StepStatus::Incomplete, "{}", s.id);
            let reason = s.reason.as_deref().unwrap();
            assert!(
                reason.starts_with("load not as planned: the reference reads "),
                "{reason}"
            );
        }
    }
    drop(served);
    std::fs::remove_dir_all(&dir).unwrap();
}

/// A set-up command the source does not know: its error queue says so, and no load is applied.
#[test]
fn a_source_error_stops_before_any_load() {
    let dir = temp_dir("source-error");
    let (served, o) = run_on_edited_station(
        &dir,
        "setup: ['*RST', '*CLS']",
        "setup: ['*RST', '*CLS', 'SYST:BEEP']",
    );
    let stdout = String::from_utf8_lossy(&o.stdout);
    assert_eq!(o.status.code(), Some(3), "{stdout}");
    // The table wraps reasons at 80 columns: read it with its line breaks as spaces.
    let flowing = stdout.split_whitespace().collect::<Vec<_>>().join(" ");
    assert!(
        flowing.contains("the source reports an error after its set-up commands: -113"),
        "{stdout}"
    );
    let records = common::records_in(&dir.join("out"));
    assert!(!records.is_empty(), "the units' records are kept");
    for r in records {
        assert_eq!(r.verdict.status, UnitStatus::Incomplete);
        assert!(r.steps.iter().all(|s| s.status == StepStatus::NotRun));
    }
    assert_eq!(ask(&source_port(&served.station), "OUTP?"), "0");
    drop(served);
    std::fs::remove_dir_all(&dir).unwrap();
}

#[test]
fn two_positions_with_one_serial_are_both_stopped_before_any_load() {
    let plan = Plan::load(Path::new("test-plans/demo.yaml")).unwrap();
    let mut config = SimConfig::new(1, 3);
    config.serials = Some(vec!["TM16-5".into(), "TM16-5".into(), "TM16-9".into()]);
    let mut bench = SimBench::new(&config).into_bench();
    let records = exec::run(&plan, &mut bench, &ctx(), &mut Silent);
    for r in &records[..2] {
        assert_eq!(r.verdict.status, UnitStatus::Incomplete);
        assert!(r.steps.is_empty(), "no step was run for it");
        assert!(
            r.verdict.reasons[0].starts_with("serial TM16-5 is reported by position"),
            "{:?}",
            r.verdict.reasons
        );
    }
    assert_eq!(records[2].steps.len(), plan.steps.len());
}

#[test]
fn an_identity_with_control_characters_is_refused_and_kept_escaped() {
    let plan = Plan::load(Path::new("test-plans/demo.yaml")).unwrap();
    let mut config = SimConfig::new(1, 2);
    config.serials = Some(vec!["\u{1b}[2K\u{1b}[1AOK-1".into(), "TM16-9\0".into()]);
    let mut bench = SimBench::new(&config).into_bench();
    let records = exec::run(&plan, &mut bench, &ctx(), &mut Silent);
    for r in &records {
        assert_eq!(r.verdict.status, UnitStatus::Incomplete);
        assert!(!r.serial.chars().any(char::is_control), "{:?}", r.serial);
        assert!(
            r.verdict.reasons[0].contains("control characters"),
            "{:?}",
            r.verdict.reasons
        );
    }
    assert_eq!(records[0].serial, "\\u{1b}[2K\\u{1b}[1AOK-1");
}

/// A reference file whose current at one step is ten times too large: every position "fails"
/// by the same −90 %; the step is set aside as a suspected reference fault, not a batch reject.
#[test]
fn every_position_failing_alike_is_taken_for_the_reference() {
    let plan = Plan::load(Path::new("test-plans/demo.yaml")).unwrap();
    let dir = temp_dir("reference-fault");
    let mut csv = String::from(
        "# instrument: REF-LAB-4 (invented)\n# accuracy: 0.02 % of reading\nstep,quantity,value,unit\n",
    );
    let mut wrong_step = None;
    for s in &plan.steps {
        let mut asked: Vec<Quantity> = Vec::new();
        for c in s.checks.iter().filter(|c| c.tolerance.needs_reference()) {
            if !asked.contains(&c.quantity) {
                asked.push(c.quantity);
            }
        }
        for q in asked {
            let mut v = s.load.nominal(q, s.sampling_window_s());
            // Active power at the first step that checks it, typed ten times too large.
            if q == Quantity::ActivePower && wrong_step.is_none() && v > 0.0 {
                v *= 10.0;
                wrong_step = Some(s.id.clone());
            }
            csv.push_str(&format!("{},{},{v},{}\n", s.id, q.name(), q.unit()));
        }
    }
    let wrong_step = wrong_step.unwrap();
    let file = dir.join("refs.csv");
    std::fs::write(&file, csv).unwrap();
    let o = bin()
        .args(["run", "test-plans/demo.yaml", "--reference"])
        .arg(&file)
        .arg("--out")
        .arg(dir.join("out"))
        .stdin(Stdio::null())
        .output()
        .unwrap();
    let stderr = String::from_utf8_lossy(&o.stderr);
    assert!(
        stderr.contains(&format!(
            "!!! step {wrong_step} NOT JUDGED for any unit: suspected reference fault"
        )),
        "{stderr}"
    );
    let records = common::records_in(&dir.join("out"));
    assert!(!records.is_empty(), "the units' records are kept");
    for r in records {
        let s = r.steps.iter().find(|s| s.id == wrong_step).unwrap();
        assert_eq!(s.status, StepStatus::Incomplete);
        assert!(
            s.checks
                .iter()
                .all(|c| c.verdict != meterproof::record::CheckVerdict::Fail)
        );
        assert_ne!(r.verdict.status, UnitStatus::Accepted);
    }
    std::fs::remove_dir_all(&dir).unwrap();
}

/// The quantities a step asks the operator for, in the order it asks, typed as nominal.
fn typed_references(plan: &Plan, step: usize) -> String {
    let s = &plan.steps[step];
    let mut asked: Vec<Quantity> = Vec::new();
    let mut out = String::new();
    for c in s.checks.iter().filter(|c| c.tolerance.needs_reference()) {
        if !asked.contains(&c.quantity) {
            asked.push(c.quantity);
            let v = s.load.nominal(c.quantity, s.sampling_window_s());
            out.push_str(&format!("{v} {}\n\n", c.quantity.unit()));
        }
    }
    out
}

#[test]
fn two_resumes_of_one_run_cannot_both_proceed() {
    let plan = Plan::load(Path::new("test-plans/demo.yaml")).unwrap();
    let dir = temp_dir("two-resumes");
    let out = dir.join("out");
    // A run at a hand-switched bench, aborted by the operator at its second step.
    let mut child = bin()
        .args(["run", "test-plans/demo.yaml", "--ask", "--quiet", "--out"])
        .arg(&out)
        .stdin(Stdio::piped())
        .stdout(Stdio::piped())
        .stderr(Stdio::piped())
        .spawn()
        .unwrap();
    let input = format!(
        "op\nL\n1\n2\n3\n4\n\n{}abort end of shift\n",
        typed_references(&plan, 0)
    );
    child
        .stdin
        .take()
        .unwrap()
        .write_all(input.as_bytes())
        .unwrap();
    let o = child.wait_with_output().unwrap();
    assert_eq!(
        o.status.code(),
        Some(3),
        "{}",
        String::from_utf8_lossy(&o.stderr)
    );
    let stdout = String::from_utf8_lossy(&o.stdout).to_string();
    let run_id = stdout
        .split("meterproof resume ")
        .nth(1)
        .and_then(|t| t.split_whitespace().next())
        .unwrap_or_else(|| panic!("no resume hint: {stdout}"))
        .to_string();
    let archive = out.join("archive.sqlite");
    // The first resume waits for the operator at its first prompt, holding the run.
    let mut first = bin()
        .args(["resume", &run_id, "--archive"])
        .arg(&archive)
        .arg("--out")
        .arg(&out)
        .stdin(Stdio::piped())
        .stdout(Stdio::piped())
        .stderr(Stdio::piped())
        .spawn()
        .unwrap();
    let mut prompt = Vec::new();
    let mut err = first.stderr.take().unwrap();
    let mut byte = [0u8; 1];
    while !String::from_utf8_lossy(&prompt).contains("Set the load") {
        assert_eq!(
            err.read(&mut byte).unwrap(),
            1,
            "{}",
            String::from_utf8_lossy(&prompt)
        );
        prompt.push(byte[0]);
    }
    let second = bin()
        .args(["resume", &run_id, "--quiet", "--archive"])
        .arg(&archive)
        .arg("--out")
        .arg(&out)
        .stdin(Stdio::null())
        .output()
        .unwrap();
    let text = String::from_utf8_lossy(&second.stderr);
    assert_eq!(second.status.code(), Some(2), "{text}");
    assert!(
        text.contains("is being worked on by another meterproof"),
        "{text}"
    );
    // The first one ends when its operator leaves (end of input), and the archive verifies.
    drop(first.stdin.take());
    assert_eq!(first.wait().unwrap().code(), Some(3));
    let v = bin()
        .args(["verify", "--archive"])
        .arg(&archive)
        .output()
        .unwrap();
    assert_eq!(
        v.status.code(),
        Some(0),
        "{}",
        String::from_utf8_lossy(&v.stdout)
    );
    std::fs::remove_dir_all(&dir).unwrap();
}

#[test]
fn typed_identities_with_control_characters_are_refused() {
    let dir = temp_dir("hostile-args");
    for args in [
        vec!["--serials", "\u{1b}[2KA-1,B-2,C-3,D-4"],
        vec!["--lot", "L\u{7}7"],
        vec!["--operator", "op\u{1b}]0;x\u{7}"],
    ] {
        let o = bin()
            .args(["run", "test-plans/demo.yaml", "--quiet", "--out"])
            .arg(dir.join("out"))
            .args(&args)
            .output()
            .unwrap();
        let err = String::from_utf8_lossy(&o.stderr);
        assert_eq!(o.status.code(), Some(2), "{err}");
        assert!(err.contains("contains control characters"), "{err}");
        // What is said about it is escaped: no raw control character reaches the terminal.
        assert!(!err.contains('\u{1b}') && !err.contains('\u{7}'), "{err:?}");
    }
    assert!(!dir.join("out").exists(), "nothing was run");
    std::fs::remove_dir_all(&dir).unwrap();
}

/// A second stop signal quits at once (status 130), after switching the output off again: the
/// operator who presses Ctrl-C twice is not kept waiting for the records to be written. The
/// second signal is sent as soon as the first one's message shows (an observable event); at
/// real time the run takes about two seconds to wind down, so the second lands in time.
#[test]
fn a_second_stop_signal_quits_at_once_with_the_output_off() {
    let dir = temp_dir("signal-twice");
    let served: Served = serve_at(&dir, "1", &[]);
    let mut child = bin()
        .args([
            "run",
            "test-plans/demo-serial.yaml",
            "--unattended",
            "--bench",
        ])
        .arg(&served.station)
        .arg("--out")
        .arg(dir.join("out"))
        .stdout(Stdio::null())
        .stderr(Stdio::piped())
        .spawn()
        .unwrap();
    let rx = stderr_lines(&mut child);
    let mut seen = Vec::new();
    let wait_for = |what: &str, seen: &mut Vec<String>| loop {
        let line = rx
            .recv_timeout(Duration::from_secs(60))
            .unwrap_or_else(|_| panic!("never saw {what:?}: {seen:#?}"));
        let found = line.contains(what);
        seen.push(line);
        if found {
            break;
        }
    };
    let signal = |child: &std::process::Child| {
        std::process::Command::new("kill")
            .args(["-INT", &child.id().to_string()])
            .status()
            .unwrap()
    };
    wait_for("[2/", &mut seen);
    assert!(signal(&child).success());
    wait_for("stop requested", &mut seen);
    assert!(signal(&child).success(), "the run was still winding down");
    let code = child.wait().unwrap().code();
    wait_for("quitting at once", &mut seen);
    assert_eq!(code, Some(130), "{seen:#?}");
    let port = source_port(&served.station);
    assert_eq!(ask(&port, "OUTP?"), "0", "the output is off");
    drop(served);
    std::fs::remove_dir_all(&dir).unwrap();
}

/// Before a programmable source first puts mains on the positions, the operator confirms that
/// the bench is closed: no answer, or anything but yes, energises nothing (the source's output
/// stays off and no unit is tested); "yes" runs; `--unattended` skips the question and says so
/// in every record.
#[test]
fn a_programmable_source_is_energised_only_on_a_bench_confirmed_closed() {
    let dir = temp_dir("bench-closed");
    let served: Served = serve_at(&dir, "25", &[]);
    let run = |out: &str, extra: &[&str], input: &[u8]| {
        let mut child = bin()
            .args(["run", "test-plans/demo-serial.yaml", "--quiet", "--bench"])
            .arg(&served.station)
            .arg("--out")
            .arg(dir.join(out))
            .args(extra)
            .stdin(Stdio::piped())
            .stdout(Stdio::piped())
            .stderr(Stdio::piped())
            .spawn()
            .unwrap();
        child.stdin.take().unwrap().write_all(input).unwrap();
        let o = child.wait_with_output().unwrap();
        (
            o.status.code(),
            String::from_utf8_lossy(&o.stderr).to_string(),
        )
    };
    let records = |out: &str| {
        if dir.join(out).exists() {
            common::records_in(&dir.join(out))
        } else {
            Vec::new()
        }
    };
    for (out, input) in [("none", &b""[..]), ("no", &b"no\n"[..])] {
        let (code, err) = run(out, &[], input);
        assert_eq!(code, Some(2), "{err}");
        assert!(err.contains("Is the bench closed"), "{err}");
        assert!(err.contains("nothing was energised"), "{err}");
        assert!(records(out).is_empty(), "no unit tested");
    }
    let port = source_port(&served.station);
    assert_eq!(ask(&port, "OUTP?"), "0", "never switched on");
    let (code, err) = run("yes", &[], b"yes\n");
    assert_eq!(code, Some(1), "{err}");
    assert_eq!(records("yes").len(), 4);
    let (code, err) = run("unattended", &["--unattended"], b"");
    assert_eq!(code, Some(1), "{err}");
    assert!(!err.contains("Is the bench closed"), "{err}");
    let unattended = records("unattended");
    assert_eq!(unattended.len(), 4);
    assert!(
        unattended[0]
            .notes
            .iter()
            .any(|n| n.contains("run unattended")),
        "{:?}",
        unattended[0].notes
    );
    drop(served);
    std::fs::remove_dir_all(&dir).unwrap();
}
