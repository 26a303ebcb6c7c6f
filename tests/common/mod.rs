//! Helpers shared by the integration tests.
#![allow(dead_code)]

pub mod store;

use meterproof::exec::RunContext;
use meterproof::record::UnitRecord;
use std::io::{BufRead, BufReader};
use std::path::{Path, PathBuf};
use std::process::{Child, Command, Stdio};

/// The real binary.
pub fn bin() -> Command {
    Command::new(env!("CARGO_BIN_EXE_meterproof"))
}

/// A fresh, empty folder for one test.
pub fn temp_dir(name: &str) -> PathBuf {
    let d = std::env::temp_dir().join(format!("meterproof-{name}-{}", std::process::id()));
    let _ = std::fs::remove_dir_all(&d);
    std::fs::create_dir_all(&d).unwrap();
    d
}

/// A run context for engine-level tests.
pub fn ctx() -> RunContext {
    RunContext {
        run_id: "test".into(),
        operator: "tester".into(),
        lot: None,
        tool_version: "test".into(),
        notes: Vec::new(),
    }
}

/// The archive's row for a run of `plan` begun by a test (simulated bench, no lot unless given).
pub fn run_row(
    plan: &meterproof::plan::Plan,
    run_id: &str,
    lot: Option<&str>,
) -> meterproof::archive::RunRow {
    meterproof::archive::RunRow {
        run_id: run_id.into(),
        plan_sha256: plan.source.sha256.clone(),
        plan_id: plan.id.clone(),
        revision: plan.revision.clone(),
        lot: lot.map(str::to_string),
        station: "sim".into(),
        operator: "tester".into(),
        bench: "{\"kind\":\"sim\"}".into(),
        tool_version: "test".into(),
        started_at: "2026-12-01T10:00:00.000+00:00".into(),
        finished_at: None,
        state: "running".into(),
    }
}

/// Every unit record (`*.json`) in one folder, by position.
pub fn records_of_dir(dir: &Path) -> Vec<UnitRecord> {
    let mut rs: Vec<UnitRecord> = std::fs::read_dir(dir)
        .unwrap()
        .map(|e| e.unwrap().path())
        .filter(|p| p.extension().is_some_and(|x| x == "json"))
        .map(|p| meterproof::record::read(&p).unwrap())
        .collect();
    rs.sort_by_key(|r| r.position);
    rs
}

/// Every unit record in the run folders under `out`, by position.
pub fn records_in(out: &Path) -> Vec<UnitRecord> {
    let mut rs: Vec<UnitRecord> = std::fs::read_dir(out)
        .unwrap()
        .map(|e| e.unwrap().path())
        .filter(|p| p.is_dir())
        .flat_map(|d| std::fs::read_dir(d).unwrap().map(|e| e.unwrap().path()))
        .filter(|p| p.extension().is_some_and(|x| x == "json"))
        .map(|p| meterproof::record::read(&p).unwrap())
        .collect();
    rs.sort_by_key(|r| (r.run_id.clone(), r.position));
    rs
}

/// A `meterproof sim-meter` process serving a simulated station; killed when dropped.
pub struct Served {
    child: Child,
    /// The station file it wrote.
    pub station: PathBuf,
}

impl Drop for Served {
    fn drop(&mut self) {
        let _ = self.child.kill();
        let _ = self.child.wait();
    }
}

/// Starts `sim-meter` with 4 meters (seed 1) at `time_scale`, writing its station file in `dir`,
/// and waits until it says it serves.
pub fn serve_at(dir: &Path, time_scale: &str, extra: &[&str]) -> Served {
    let station = dir.join("station.yaml");
    let mut child = bin()
        .args([
            "sim-meter",
            "--positions",
            "4",
            "--seed",
            "1",
            "--for",
            "300 s",
        ])
        .args(["--time-scale", time_scale])
        .arg("--station")
        .arg(&station)
        .args(extra)
        .stdout(Stdio::piped())
        .spawn()
        .unwrap();
    let stdout = child.stdout.take().unwrap();
    let mut lines = BufReader::new(stdout).lines();
    loop {
        let line = lines.next().expect("sim-meter ended early").unwrap();
        if line.starts_with("serving") {
            break;
        }
    }
    Served { child, station }
}

/// The served station with its reference read by the operator (`read: { kind: operator }`),
/// written beside it as `typed.yaml`.
pub fn typed_station(dir: &Path, station: &Path) -> PathBuf {
    let text = std::fs::read_to_string(station).unwrap();
    let cut = text.find("  read:\n").expect("a read block");
    let typed = dir.join("typed.yaml");
    std::fs::write(
        &typed,
        format!("{}  read: {{ kind: operator }}\n", &text[..cut]),
    )
    .unwrap();
    typed
}

/// What an operator types at a served station of seed 1 with typed references (`typed_station`),
/// reading the reference meter: the simulated source's real output, each value with its unit, in
/// the order the plan asks. The library replays the station's SCPI commands on a simulator of
/// the same seed, so the source draws its errors exactly as the served one does.
pub fn typed_readings(plan: &meterproof::plan::Plan) -> Vec<String> {
    use meterproof::bench::sim::device::LineDevice;
    let sim = meterproof::bench::sim::SimBench::new(&meterproof::bench::sim::SimConfig::new(1, 4));
    let (source, mut reference) = sim.instruments();
    let mut source = meterproof::bench::sim::instruments::ScpiSourceDevice::new(source);
    for c in ["*RST", "*CLS"] {
        source.handle(c);
    }
    let mut typed = Vec::new();
    for (i, s) in plan.steps.iter().enumerate() {
        for c in [
            format!("SOUR:VOLT {}", s.load.voltage),
            format!("SOUR:CURR {}", s.load.current),
            format!("SOUR:PHAS {}", s.load.phase_deg),
            format!("SOUR:FREQ {}", s.load.frequency),
        ] {
            source.handle(&c);
        }
        if i == 0 {
            source.handle("OUTP ON");
        }
        let mut asked = Vec::new();
        for c in &s.checks {
            if c.tolerance.needs_reference() && !asked.contains(&c.quantity) {
                asked.push(c.quantity);
                let request = meterproof::bench::ReferenceRequest {
                    step_id: &s.id,
                    quantity: c.quantity,
                    load: &s.load,
                    window: (0.0, s.sampling_window_s()),
                };
                let v = reference.read(&request).unwrap().value;
                typed.push(format!("{v} {}", c.quantity.unit()));
            }
        }
    }
    typed
}

/// The plan at `plan` with its energy window (the demo plans' `max-Imax` step: 11 samples a
/// second apart) ten times as long, written into `dir`; any other plan as it is. For stations
/// served at several times real time: a register's timing budget is half of each end's exchange,
/// which takes real milliseconds that the time compression multiplies, and on a loaded machine
/// (exchanges of 8 ms, 80 ms of bench time at ten times) it narrowed the guarded limit of a
/// 10 s window until good units were rejected (seen in CI); over 100 s it stays a small share.
pub fn stretched(plan: &str, dir: &Path) -> PathBuf {
    let window = "    samples: 11\n    interval: 1 s\n";
    let text = std::fs::read_to_string(plan).unwrap();
    if !text.contains(window) {
        return PathBuf::from(plan);
    }
    std::fs::create_dir_all(dir).unwrap();
    let name = Path::new(plan).file_name().unwrap().to_string_lossy();
    let path = dir.join(format!("stretched-{name}"));
    std::fs::write(
        &path,
        text.replace(window, "    samples: 11\n    interval: 10 s\n"),
    )
    .unwrap();
    path
}

/// The serial-port demo plan without its energy check, written into `dir`: an operator's
/// energy reading is over the window as it really ran, which a script typing ahead cannot
/// know (the typed energy path is tested on the virtual clock, tests/operator_flow.rs).
pub fn plan_without_energy(dir: &Path) -> PathBuf {
    let energy_check = "      - { quantity: active_energy, tolerance: { class: true } }\n";
    let plan_text = std::fs::read_to_string("test-plans/demo-serial.yaml").unwrap();
    assert!(plan_text.contains(energy_check));
    let plan_file = dir.join("no-energy.yaml");
    std::fs::write(&plan_file, plan_text.replace(energy_check, "")).unwrap();
    plan_file
}

/// One HTTP/1.0 request (its body not chunked) to the server at `authority` (host:port),
/// `headers` besides Host (the server's own unless given); the status and the body.
pub fn http(
    authority: &str,
    method: &str,
    path: &str,
    headers: &[(&str, &str)],
    body: &str,
) -> (u16, String) {
    use std::io::{Read, Write};
    let mut stream = std::net::TcpStream::connect(authority).unwrap();
    let mut request = format!("{method} {path} HTTP/1.0\r\n");
    if !headers.iter().any(|(k, _)| k.eq_ignore_ascii_case("host")) {
        request.push_str(&format!("Host: {authority}\r\n"));
    }
    for (k, v) in headers {
        request.push_str(&format!("{k}: {v}\r\n"));
    }
    request.push_str(&format!(
        "Content-Type: application/json\r\nContent-Length: {}\r\n\r\n{body}",
        body.len()
    ));
    stream.write_all(request.as_bytes()).unwrap();
    let mut response = Vec::new();
    stream.read_to_end(&mut response).unwrap();
    let response = String::from_utf8_lossy(&response).into_owned();
    let status = response
        .split_whitespace()
        .nth(1)
        .and_then(|s| s.parse().ok())
        .unwrap_or(0);
    let body = response
        .split_once("\r\n\r\n")
        .map(|(_, b)| b.to_string())
        .unwrap_or_default();
    (status, body)
}

/// The key a station page of the server at `authority` carries, which every request that
/// changes something must carry back.
pub fn page_key(authority: &str) -> String {
    let (_, page) = http(authority, "GET", "/", &[], "");
    let at = page.find("\"page_key\": \"").expect("the key in the page") + "\"page_key\": \"".len();
    page[at..at + 32].to_string()
}

/// `meterproof serve` on a free loopback port with `args`; its address (host:port) and the
/// process, to be killed by the caller.
pub fn serve_screen(out: &Path, args: &[&str]) -> (String, Child) {
    let mut child = bin()
        .args(["serve", "--listen", "127.0.0.1:0"])
        .arg("--out")
        .arg(out)
        .args(args)
        .stdout(Stdio::piped())
        .stderr(Stdio::null())
        .spawn()
        .unwrap();
    let mut lines = BufReader::new(child.stdout.take().unwrap()).lines();
    let first = lines.next().expect("serve said nothing").unwrap();
    let start = first.find("http://").expect("an address") + "http://".len();
    let authority = first[start..].split('/').next().unwrap().to_string();
    std::thread::spawn(move || for _ in lines {});
    (authority, child)
}
