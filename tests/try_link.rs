//! `meterproof try-link` against simulated meters on pseudo-terminals: the raw exchange shown
//! line by line, what each line was taken for, a hint for the commonest mistakes in describing
//! a console, a plan read anew on Enter, and a line sent as typed. No load is applied.

mod common;
use common::{bin, serve_at, temp_dir};
use std::io::Write;
use std::process::Stdio;

/// Runs try-link with `input` typed at it; (exit status, what it printed).
fn try_link(
    plan: &std::path::Path,
    station: &std::path::Path,
    position: &str,
    input: &str,
) -> (i32, String) {
    let mut child = bin()
        .arg("try-link")
        .arg(plan)
        .arg("--bench")
        .arg(station)
        .args(["--position", position])
        .stdin(Stdio::piped())
        .stdout(Stdio::piped())
        .stderr(Stdio::piped())
        .spawn()
        .unwrap();
    child
        .stdin
        .take()
        .unwrap()
        .write_all(input.as_bytes())
        .unwrap();
    let out = child.wait_with_output().unwrap();
    let text = format!(
        "{}{}",
        String::from_utf8_lossy(&out.stdout),
        String::from_utf8_lossy(&out.stderr)
    );
    (out.status.code().unwrap(), text)
}

/// The console plan's link with what a first attempt would not know: LF endings, no echo, no
/// prompt, no init, banner lines only skipped.
fn naive_plan(dir: &std::path::Path) -> std::path::PathBuf {
    let plan = std::fs::read_to_string("test-plans/demo-console.yaml").unwrap();
    let start = plan.find("  line_ending:").unwrap();
    let end = plan.find("  restart:").unwrap();
    let path = dir.join("naive.yaml");
    std::fs::write(
        &path,
        format!(
            "{}  line_ending: {{ send: LF, receive: LF }}\n  timeout: 250 ms\n  skip: '^#'\n{}",
            &plan[..start],
            &plan[end..]
        ),
    )
    .unwrap();
    path
}

#[test]
fn a_console_link_described_right_is_understood_line_by_line() {
    let dir = temp_dir("try-link-right");
    let served = serve_at(&dir, "10", &["--console", "--no-defect"]);
    let station = std::fs::read_to_string(&served.station).unwrap();
    let (code, text) = try_link(
        std::path::Path::new("test-plans/demo-console.yaml"),
        &served.station,
        "3",
        "",
    );
    assert_eq!(code, 0, "{text}");
    assert!(text.contains("applies no load"), "{text}");
    // The init line, its echo and its reply; the prompt taken as such.
    assert!(text.contains("→ \"log off\\r\""), "{text}");
    assert!(text.contains("← \"log off\"  echo (skipped)"), "{text}");
    assert!(text.contains("← \"logging stopped\"  ✔ reply"), "{text}");
    assert!(text.contains("← \"> \"  the prompt"), "{text}");
    // The identity caught, on the port of position 3 of the station.
    assert!(text.contains("✔ model TM-16, serial TM16-"), "{text}");
    let port = text
        .lines()
        .find_map(|l| l.strip_prefix("text: "))
        .and_then(|rest| rest.split(' ').next())
        .expect("the port line");
    let third = station
        .lines()
        .find(|l| l.contains("position: 3,"))
        .expect("position 3");
    assert!(third.contains(&format!("port: {port} ")), "{third}");
    // Each quantity's value and how it was scaled from the counts.
    assert!(
        text.contains("✔ current = ") && text.contains("((value − 128) / 2240)"),
        "{text}"
    );
    assert!(
        text.contains("every request answered, every line understood"),
        "{text}"
    );
    assert!(!text.contains('✘'), "{text}");
    for line in text.lines() {
        assert!(line.chars().count() <= 80, "wider than 80 columns: {line}");
    }
    std::fs::remove_dir_all(&dir).unwrap();
}

#[test]
fn a_first_attempt_at_a_console_is_told_what_to_set() {
    let dir = temp_dir("try-link-naive");
    let served = serve_at(&dir, "10", &["--console"]);
    let naive = naive_plan(&dir);
    let (code, text) = try_link(&naive, &served.station, "1", "");
    // Every request is answered, but with lines not understood: exit 1, and the hints.
    assert_eq!(code, 1, "{text}");
    assert!(text.contains("every request answered, but"), "{text}");
    // Hints are wrapped to 80 columns: read them as one text.
    let joined = text.split_whitespace().collect::<Vec<_>>().join(" ");
    assert!(
        joined.contains("it is the echo of the request after \"> \", a prompt: set prompt: \"> \" and echo: true"),
        "{text}"
    );
    assert!(joined.contains("it looks like a log line"), "{text}");
    // Enter reads the plan anew: the engineer fixes the link and the second pass is clean.
    // A line typed is sent as it is, and what came back is shown.
    let fixed = std::fs::read_to_string("test-plans/demo-console.yaml").unwrap();
    let mut child = bin()
        .arg("try-link")
        .arg(&naive)
        .arg("--bench")
        .arg(&served.station)
        .args(["--position", "1"])
        .stdin(Stdio::piped())
        .stdout(Stdio::piped())
        .spawn()
        .unwrap();
    let mut stdin = child.stdin.take().unwrap();
    let mut stdout = std::io::BufReader::new(child.stdout.take().unwrap());
    let mut seen = String::new();
    let mut line = String::new();
    // Wait for the first pass to end before changing the plan.
    while std::io::BufRead::read_line(&mut stdout, &mut line).unwrap() > 0 {
        seen.push_str(&line);
        if line.starts_with("Enter: try again") {
            break;
        }
        line.clear();
    }
    std::fs::write(&naive, &fixed).unwrap();
    stdin.write_all(b"\nlog on\nq\n").unwrap();
    drop(stdin);
    std::io::Read::read_to_string(&mut stdout, &mut seen).unwrap();
    let code = child.wait().unwrap().code();
    let second = &seen[seen.find("Enter: try again").unwrap()..];
    assert!(
        second.contains("every request answered, every line understood"),
        "{second}"
    );
    assert!(second.contains("→ \"log on\\r\""), "{second}");
    assert!(second.contains("logging started"), "{second}");
    assert_eq!(code, Some(0), "{seen}");
    std::fs::remove_dir_all(&dir).unwrap();
}

#[test]
fn a_port_that_is_not_there_is_named() {
    let o = bin()
        .args([
            "try-link",
            "test-plans/demo-console.yaml",
            "--port",
            "/dev/meterproof-none",
        ])
        .stdin(Stdio::null())
        .output()
        .unwrap();
    assert_eq!(o.status.code(), Some(3));
    let err = String::from_utf8_lossy(&o.stderr);
    assert!(err.contains("/dev/meterproof-none"), "{err}");
    // The built-in simulator has nothing to try.
    let o = bin()
        .args(["try-link", "test-plans/demo.yaml", "--port", "/dev/null"])
        .stdin(Stdio::null())
        .output()
        .unwrap();
    assert_eq!(o.status.code(), Some(2));
    assert!(String::from_utf8_lossy(&o.stderr).contains("built-in simulator"));
}

/// A position the station does not have is named, with how many it has; nothing is opened.
#[test]
fn a_position_the_station_lacks_is_named() {
    let station = "test-plans/station-example.yaml";
    let o = bin()
        .args([
            "try-link",
            "test-plans/demo-serial.yaml",
            "--bench",
            station,
            "--position",
            "9",
        ])
        .stdin(Stdio::null())
        .output()
        .unwrap();
    let err = String::from_utf8_lossy(&o.stderr);
    assert_eq!(o.status.code(), Some(2), "{err}");
    assert!(
        err.contains("station EOL-2 has no position 9 (it has 4 positions)"),
        "{err}"
    );
}
