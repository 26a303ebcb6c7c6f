//! The README's walkthrough "Onboarding a new meter model", run as written: its shell blocks,
//! in order, in an empty folder, with this build's `meterproof` first on the PATH. A change
//! to the tool that breaks the walkthrough fails here.

mod common;
use common::{records_in, temp_dir};
use std::path::Path;

/// The walkthrough's shell blocks, in order.
fn walkthrough() -> String {
    let readme = std::fs::read_to_string("README.md").unwrap();
    let start = readme
        .find("### Onboarding a new meter model")
        .expect("the README has the walkthrough");
    let section = &readme[start..];
    let section = &section[..section[4..].find("\n#").map_or(section.len(), |i| i + 4)];
    let mut script = String::from("set -e\n");
    let mut rest = section;
    while let Some(open) = rest.find("```sh\n") {
        let body = &rest[open + 6..];
        let close = body.find("```").expect("a closed block");
        script.push_str(&body[..close]);
        rest = &body[close + 3..];
    }
    script
}

#[test]
fn the_onboarding_walkthrough_runs_as_written() {
    let script = walkthrough();
    assert!(script.contains("meterproof try-link"), "{script}");
    let dir = temp_dir("onboarding");
    let bin_dir = Path::new(env!("CARGO_BIN_EXE_meterproof"))
        .parent()
        .unwrap();
    let path = format!(
        "{}:{}",
        bin_dir.display(),
        std::env::var("PATH").unwrap_or_default()
    );
    let out = std::process::Command::new("bash")
        .arg("-c")
        .arg(&script)
        .current_dir(&dir)
        .env("PATH", path)
        .stdin(std::process::Stdio::null())
        .output()
        .unwrap();
    let text = format!(
        "{}{}",
        String::from_utf8_lossy(&out.stdout),
        String::from_utf8_lossy(&out.stderr)
    );
    assert_eq!(out.status.code(), Some(0), "{text}");
    // The first try names what to set; the second understands every line.
    let joined = text.split_whitespace().collect::<Vec<_>>().join(" ");
    assert!(
        joined.contains("set prompt: \"> \" and echo: true"),
        "{text}"
    );
    assert!(joined.contains("it looks like a log line"), "{text}");
    assert!(
        text.contains("every request answered, every line understood"),
        "{text}"
    );
    // `check` took the plan and the run tested both units.
    assert!(text.contains("plan MY-METER revision A"), "{text}");
    assert_eq!(records_in(&dir.join("out")).len(), 2, "{text}");
    std::fs::remove_dir_all(&dir).unwrap();
}
