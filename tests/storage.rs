//! A storage that fills: the archive and the output folder on one small file system (a tmpfs of
//! its own, mounted in a private mount namespace by `unshare`, so nothing on the machine is
//! touched and it vanishes with the run). No further load once nothing can be kept, every
//! verdict printed as far as it got, none accepted, and every reading taken kept in the
//! fallback folder, or printed as JSON when that fails too.

mod common;
use common::temp_dir;

use meterproof::record::{UnitRecord, UnitStatus};
use std::path::Path;
use std::process::{Command, Output};

/// Runs the demo with its archive and output on a full-to-be tmpfs of `size`.
fn run_on_small_disk(full: &Path, size: &str, fallback: &str) -> Output {
    let o = Command::new("unshare")
        .args(["-rm", "sh", "-c"])
        .arg(
            "mount -t tmpfs -o size=$4 tmpfs \"$1\" || exit 97; \
             exec \"$2\" run test-plans/demo.yaml --out \"$1/out\" --fallback \"$3\"",
        )
        .args(["sh"])
        .arg(full)
        .arg(env!("CARGO_BIN_EXE_meterproof"))
        .arg(fallback)
        .arg(size)
        .output()
        .expect("`unshare` (util-linux) is needed for the full-disk tests");
    assert_ne!(
        o.status.code(),
        Some(97),
        "THIS TEST NEEDS a private mount namespace (unshare -rm) to mount a small tmpfs: {}",
        String::from_utf8_lossy(&o.stderr)
    );
    o
}

#[test]
fn a_full_disk_stops_the_loads_and_keeps_every_reading_in_the_fallback() {
    let dir = temp_dir("full-disk");
    let full = dir.join("full");
    std::fs::create_dir_all(&full).unwrap();
    let fallback = dir.join("fallback");
    // 700 kB hold the empty archive and the first steps' readings, not the run.
    let o = run_on_small_disk(&full, "700k", fallback.to_str().unwrap());
    let stdout = String::from_utf8_lossy(&o.stdout);
    let stderr = String::from_utf8_lossy(&o.stderr);
    assert_eq!(o.status.code(), Some(3), "{stdout}{stderr}");
    assert!(
        stderr.contains("ARCHIVE: writing a reading: database or disk is full"),
        "{stderr}"
    );
    assert!(
        !stderr.contains("[5/5]"),
        "no load once nothing can be kept: {stderr}"
    );
    // Every verdict is printed, as far as it got, and none is an acceptance.
    assert!(
        stdout.contains("0 accepted, 0 rejected, 4 incomplete"),
        "{stdout}"
    );
    assert!(!stdout.contains("ACCEPTED"), "{stdout}");
    assert!(stderr.contains("the unit records are kept in"), "{stderr}");
    // The fallback folder holds every unit's record with every reading taken.
    let runs: Vec<_> = std::fs::read_dir(&fallback).unwrap().collect();
    assert_eq!(runs.len(), 1);
    let records = common::records_of_dir(&runs[0].as_ref().unwrap().path());
    assert_eq!(records.len(), 4);
    let taken: usize = records
        .iter()
        .flat_map(|r| &r.steps)
        .flat_map(|s| &s.checks)
        .map(|c| c.samples.len())
        .sum();
    assert!(taken > 0);
    for r in &records {
        assert_eq!(r.verdict.status, UnitStatus::Incomplete);
        assert!(
            !r.steps[0].checks[0].samples.is_empty(),
            "the first step's readings"
        );
    }
    std::fs::remove_dir_all(&dir).unwrap();
}

#[test]
fn a_fallback_on_the_full_disk_too_leaves_the_records_on_standard_output() {
    let dir = temp_dir("full-disk-json");
    let full = dir.join("full");
    std::fs::create_dir_all(&full).unwrap();
    // The fallback is on the same small disk: writable at the start, full at the end.
    let o = run_on_small_disk(&full, "700k", &format!("{}/fallback", full.display()));
    let stdout = String::from_utf8_lossy(&o.stdout);
    let stderr = String::from_utf8_lossy(&o.stderr);
    assert_eq!(o.status.code(), Some(3), "{stderr}");
    assert!(stderr.contains("cannot take them either"), "{stderr}");
    let line = stdout
        .lines()
        .find(|l| l.starts_with('['))
        .unwrap_or_else(|| panic!("no JSON records: {stdout}"));
    let records: Vec<UnitRecord> = serde_json::from_str(line).unwrap();
    assert_eq!(records.len(), 4);
    assert!(
        records
            .iter()
            .all(|r| r.verdict.status != UnitStatus::Accepted)
    );
    std::fs::remove_dir_all(&dir).unwrap();
}

#[test]
fn a_fallback_folder_that_cannot_be_written_is_refused_before_any_load() {
    let dir = temp_dir("bad-fallback");
    let o = common::bin()
        .args([
            "run",
            "test-plans/demo.yaml",
            "--quiet",
            "--fallback",
            "/proc/meterproof",
            "--out",
        ])
        .arg(dir.join("out"))
        .output()
        .unwrap();
    let err = String::from_utf8_lossy(&o.stderr);
    assert_eq!(o.status.code(), Some(3), "{err}");
    assert!(
        err.contains("the fallback folder /proc/meterproof is not writable"),
        "{err}"
    );
    assert!(
        !dir.join("out").join("archive.sqlite").exists(),
        "nothing was started"
    );
    std::fs::remove_dir_all(&dir).unwrap();
}
