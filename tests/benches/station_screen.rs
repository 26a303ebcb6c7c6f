//! Benchmark of the station screen as an operator feels it: how soon `meterproof serve` answers
//! after it is started, what a page weighs, how soon the screen shows a run started, and how
//! steadily it follows a run of 16 positions (the updates a page receives, their size, and the
//! longest the screen stood still while the run went on). Run with
//! `cargo bench --bench station_screen`; it prints figures and asserts nothing.

use std::io::{BufRead, BufReader, Read, Write};
use std::net::TcpStream;
use std::process::{Command, Stdio};
use std::sync::mpsc;
use std::time::{Duration, Instant};

fn request(at: &str, method: &str, path: &str, headers: &str, body: &str) -> String {
    let mut s = TcpStream::connect(at).unwrap();
    write!(
        s,
        "{method} {path} HTTP/1.0\r\nHost: {at}\r\n{headers}Content-Type: application/json\r\nContent-Length: {}\r\n\r\n{body}",
        body.len()
    )
    .unwrap();
    let mut out = String::new();
    s.read_to_string(&mut out).unwrap();
    out.split_once("\r\n\r\n")
        .map(|(_, b)| b.to_string())
        .unwrap_or_default()
}

fn main() {
    run(16, 10.0);
}

/// The figures for a bench of `positions` simulated positions running `pace` times real time.
pub fn run(positions: usize, pace: f64) {
    let dir = std::env::temp_dir().join(format!("meterproof-bench-screen-{}", std::process::id()));
    let _ = std::fs::remove_dir_all(&dir);
    let started = Instant::now();
    let mut child = Command::new(env!("CARGO_BIN_EXE_meterproof"))
        .args(["serve", "--listen", "127.0.0.1:0", "--plan", "demo.yaml"])
        .args(["--positions", &positions.to_string()])
        .args(["--sim-pace", &pace.to_string()])
        .arg("--out")
        .arg(&dir)
        .stdout(Stdio::piped())
        .stderr(Stdio::null())
        .spawn()
        .unwrap();
    let mut lines = BufReader::new(child.stdout.take().unwrap()).lines();
    let first = lines.next().unwrap().unwrap();
    let listening = started.elapsed();
    std::thread::spawn(move || for _ in lines {});
    let at = first[first.find("http://").unwrap() + 7..]
        .split('/')
        .next()
        .unwrap()
        .to_string();
    let page = request(&at, "GET", "/", "", "");
    let first_page = started.elapsed();
    let css = request(&at, "GET", "/screen.css", "", "");
    let js = request(&at, "GET", "/station.js", "", "");
    println!(
        "start-up: listening after {:.0} ms, the station page served after {:.0} ms",
        listening.as_secs_f64() * 1e3,
        first_page.as_secs_f64() * 1e3
    );
    println!(
        "the station view: page {:.1} kB, style {:.1} kB, script {:.1} kB (nothing else is loaded)",
        page.len() as f64 / 1e3,
        css.len() as f64 / 1e3,
        js.len() as f64 / 1e3
    );
    // A page's live connection: every screen update with its arrival time and size.
    let (tx, rx) = mpsc::channel::<(Instant, usize, bool)>();
    let events_at = at.clone();
    std::thread::spawn(move || {
        let mut s = TcpStream::connect(&events_at).unwrap();
        write!(
            s,
            "GET /station/events HTTP/1.0\r\nHost: {events_at}\r\n\r\n"
        )
        .unwrap();
        for line in BufReader::new(s).lines() {
            let Ok(line) = line else { break };
            if let Some(data) = line.strip_prefix("data: ") {
                let busy = data.contains("\"busy\":true");
                if tx.send((Instant::now(), data.len(), busy)).is_err() {
                    break;
                }
            }
        }
    });
    let _ = rx.recv_timeout(Duration::from_secs(5)).unwrap();
    // An idle screen, as when the operator presses Start (updates come at most every 100 ms).
    std::thread::sleep(Duration::from_millis(300));
    let key_at = page.find("\"page_key\": \"").unwrap() + "\"page_key\": \"".len();
    let key = &page[key_at..key_at + 32];
    let serials: Vec<String> = (1..=positions).map(|i| format!("\"BS-{i:03}\"")).collect();
    let body = format!(
        r#"{{"plan":"demo.yaml","bench":"sim","serials":[{}],"operator":"bench"}}"#,
        serials.join(",")
    );
    let asked = Instant::now();
    let answer = request(
        &at,
        "POST",
        "/station/start",
        &format!("X-Meterproof-Key: {key}\r\n"),
        &body,
    );
    assert!(answer.contains("started"), "{answer}");
    let mut shown_busy = None;
    let mut updates: Vec<(Instant, usize)> = Vec::new();
    loop {
        let (when, size, busy) = rx.recv_timeout(Duration::from_secs(60)).unwrap();
        if busy && shown_busy.is_none() {
            shown_busy = Some(when - asked);
        }
        updates.push((when, size));
        if !busy && shown_busy.is_some() {
            break;
        }
    }
    let run = updates.last().unwrap().0 - asked;
    let gaps = updates
        .windows(2)
        .map(|w| w[1].0 - w[0].0)
        .max()
        .unwrap_or_default();
    let largest = updates.iter().map(|u| u.1).max().unwrap_or(0);
    println!(
        "a run of {positions} positions (the demo plan, the simulated bench at {pace}x real time): the screen showed it going {:.1} ms after Start, then {} updates in {:.1} s ({:.0} a second), the largest {:.1} kB; the screen stood still at most {:.2} s while the run went on",
        shown_busy.unwrap().as_secs_f64() * 1e3,
        updates.len(),
        run.as_secs_f64(),
        updates.len() as f64 / run.as_secs_f64(),
        largest as f64 / 1e3,
        gaps.as_secs_f64()
    );
    let _ = child.kill();
    let _ = child.wait();
    let _ = std::fs::remove_dir_all(&dir);
}
