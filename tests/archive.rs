//! The archive through the real binary: queries, integrity, concurrent writers, and a run killed
//! with SIGKILL and resumed.

mod common;
use common::{bin, temp_dir};

use meterproof::record::UnitStatus;
use rusqlite::Connection;
use std::path::Path;
use std::process::Stdio;
use std::time::{Duration, Instant};

fn run_demo(out: &Path, extra: &[&str]) -> i32 {
    bin()
        .args(["run", "test-plans/demo.yaml", "--quiet", "--out"])
        .arg(out)
        .args(extra)
        .status()
        .unwrap()
        .code()
        .unwrap()
}

fn cmd(args: &[&str], archive: &Path) -> (i32, String) {
    let o = bin()
        .args(args)
        .arg("--archive")
        .arg(archive)
        .output()
        .unwrap();
    (
        o.status.code().unwrap(),
        format!(
            "{}{}",
            String::from_utf8_lossy(&o.stdout),
            String::from_utf8_lossy(&o.stderr)
        ),
    )
}

#[test]
fn the_demo_lands_in_the_archive_and_can_be_queried() {
    let dir = temp_dir("query");
    assert_eq!(
        run_demo(
            &dir,
            &["--lot", "LOT-1", "--serials", "A-1,B-2,O'Hara;--,D-4"]
        ),
        1
    );
    assert_eq!(
        run_demo(
            &dir,
            &[
                "--lot",
                "LOT-2",
                "--serials",
                "A-1,B-2,C-3,D-4",
                "--seed",
                "2"
            ]
        ),
        1
    );
    let archive = dir.join("archive.sqlite");
    let (code, text) = cmd(&["history", "A-1"], &archive);
    assert_eq!(code, 0);
    let lines: Vec<&str> = text.lines().collect();
    assert_eq!(lines.len(), 3, "header and two runs: {text}");
    let (_, json) = cmd(&["history", "A-1", "--json"], &archive);
    let rows: serde_json::Value = serde_json::from_str(&json).unwrap();
    assert_eq!(rows.as_array().unwrap().len(), 2);
    assert!(
        rows[0]["finished_at"].as_str() >= rows[1]["finished_at"].as_str(),
        "newest first"
    );
    // A serial with quotes and semicolons is data, never SQL.
    let (_, text) = cmd(&["history", "O'Hara;--"], &archive);
    assert_eq!(text.lines().count(), 2, "{text}");
    let (_, json) = cmd(&["runs", "--lot", "LOT-1", "--json"], &archive);
    let runs: serde_json::Value = serde_json::from_str(&json).unwrap();
    assert_eq!(runs.as_array().unwrap().len(), 1);
    let r = &runs[0];
    assert_eq!(
        r["accepted"].as_u64().unwrap() + r["rejected"].as_u64().unwrap(),
        4
    );
    // The built-in simulator plants its defect at position 2 (seed 1 and 2 alike): 3 accepted,
    // 1 rejected in each run.
    assert_eq!(r["accepted"].as_u64(), Some(3), "{r}");
    assert_eq!(r["rejected"].as_u64(), Some(1), "{r}");
    assert_eq!(r["incomplete"].as_u64(), Some(0), "{r}");
    let count = |args: &[&str]| -> usize {
        let mut a = vec!["runs", "--json"];
        a.extend_from_slice(args);
        let (code, json) = cmd(&a, &archive);
        assert_eq!(code, 0, "{json}");
        serde_json::from_str::<serde_json::Value>(&json)
            .unwrap()
            .as_array()
            .unwrap()
            .len()
    };
    // --verdict finds the runs with such a unit, and none where there is none.
    assert_eq!(count(&[]), 2);
    assert_eq!(count(&["--verdict", "rejected"]), 2);
    assert_eq!(count(&["--verdict", "incomplete"]), 0);
    let (code, _) = cmd(&["runs", "--verdict", "maybe"], &archive);
    assert_eq!(code, 2);
    // --plan by the plan's id, --since by date (today's runs are since yesterday, not since
    // tomorrow).
    assert_eq!(count(&["--plan", "TM16-EOL"]), 2);
    assert_eq!(count(&["--plan", "NO-SUCH-PLAN"]), 0);
    let today = chrono::Local::now().date_naive();
    let day = |d: chrono::NaiveDate| d.format("%Y-%m-%d").to_string();
    assert_eq!(count(&["--since", &day(today - chrono::Days::new(1))]), 2);
    assert_eq!(count(&["--since", &day(today + chrono::Days::new(1))]), 0);
    // Export by serial: both runs' records and the plan text, byte for byte the plan file.
    let to = dir.join("export");
    let (code, text) = cmd(&["export", "A-1", "--to", to.to_str().unwrap()], &archive);
    assert_eq!(code, 0, "{text}");
    let plan = std::fs::read("test-plans/demo.yaml").unwrap();
    let sha = meterproof::plan::sha256_hex(&plan);
    assert_eq!(
        std::fs::read(to.join(format!("plan-{sha}.yaml"))).unwrap(),
        plan
    );
    let exported: Vec<_> = std::fs::read_dir(&to).unwrap().collect();
    assert_eq!(exported.len(), 3);
    // The exported record equals the one written beside the reports, sample for sample.
    let run_id = r["run_id"].as_str().unwrap();
    let beside = meterproof::record::read(&dir.join(run_id).join("A-1-p1.json")).unwrap();
    let from_archive = meterproof::record::read(&to.join(format!("{run_id}-A-1-p1.json"))).unwrap();
    assert_eq!(beside, from_archive);
    let (code, text) = cmd(&["verify"], &archive);
    assert_eq!(code, 0, "{text}");
    assert!(text.contains("8 unit records checked, 0 failed"), "{text}");
    std::fs::remove_dir_all(&dir).unwrap();
}

#[test]
fn two_runs_writing_one_archive_at_once_lose_nothing() {
    let dir = temp_dir("concurrent");
    let archive = dir.join("shared.sqlite");
    let spawn = |seed: &str, out: &str| {
        bin()
            .args([
                "run",
                "test-plans/demo.yaml",
                "--quiet",
                "--positions",
                "6",
                "--seed",
                seed,
            ])
            .arg("--out")
            .arg(dir.join(out))
            .arg("--archive")
            .arg(&archive)
            .stdout(Stdio::null())
            .spawn()
            .unwrap()
    };
    let mut a = spawn("11", "a");
    let mut b = spawn("12", "b");
    assert!(a.wait().unwrap().code().is_some_and(|c| c <= 1));
    assert!(b.wait().unwrap().code().is_some_and(|c| c <= 1));
    let conn = Connection::open(&archive).unwrap();
    let units: i64 = conn
        .query_row("SELECT COUNT(*) FROM units", [], |r| r.get(0))
        .unwrap();
    assert_eq!(units, 12);
    let (code, text) = cmd(&["verify"], &archive);
    assert_eq!(code, 0, "{text}");
    std::fs::remove_dir_all(&dir).unwrap();
}

#[test]
fn a_file_that_is_not_an_archive_is_refused_before_any_step() {
    let dir = temp_dir("readonly");
    let archive = dir.join("ro.sqlite");
    std::fs::write(&archive, b"this is not a database").unwrap();
    let o = bin()
        .args(["run", "test-plans/demo.yaml", "--quiet", "--out"])
        .arg(dir.join("out"))
        .arg("--archive")
        .arg(&archive)
        .output()
        .unwrap();
    assert_eq!(o.status.code(), Some(3));
    let err = String::from_utf8_lossy(&o.stderr);
    assert!(
        err.contains("archive") && err.contains("ro.sqlite"),
        "{err}"
    );
    // No reports were written: nothing ran.
    let runs: Vec<_> = std::fs::read_dir(dir.join("out"))
        .unwrap()
        .flatten()
        .collect();
    assert!(
        runs.iter()
            .all(|d| std::fs::read_dir(d.path()).unwrap().count() == 0)
    );
    std::fs::remove_dir_all(&dir).unwrap();
}

#[test]
fn a_run_killed_mid_way_resumes_with_no_reading_lost() {
    let dir = temp_dir("kill");
    let served = common::serve_at(&dir, "10", &[]);
    let station = served.station.clone();
    let archive = dir.join("archive.sqlite");
    let out = dir.join("out");
    let mut run = bin()
        .args([
            "run",
            "test-plans/demo-serial.yaml",
            "--quiet",
            "--unattended",
            "--bench",
        ])
        .arg(&station)
        .arg("--out")
        .arg(&out)
        .arg("--archive")
        .arg(&archive)
        .stdout(Stdio::null())
        .stderr(Stdio::null())
        .spawn()
        .unwrap();
    // Wait until two steps are done for every unit and the third has begun, then SIGKILL.
    let deadline = Instant::now() + Duration::from_secs(60);
    loop {
        assert!(
            Instant::now() < deadline,
            "the run never got to its third step"
        );
        std::thread::sleep(Duration::from_millis(20));
        let Ok(conn) = Connection::open(&archive) else {
            continue;
        };
        let done: i64 = conn
            .query_row("SELECT COUNT(*) FROM steps WHERE step_index = 1", [], |r| {
                r.get(0)
            })
            .unwrap_or(0);
        let third: i64 = conn
            .query_row(
                "SELECT COUNT(*) FROM readings WHERE step_index = 2",
                [],
                |r| r.get(0),
            )
            .unwrap_or(0);
        if done == 4 && third > 0 {
            break;
        }
    }
    run.kill().unwrap(); // SIGKILL on Unix
    run.wait().unwrap();
    // Which steps each position had finished when it was killed.
    let finished: Vec<(i64, i64)> = {
        let conn = Connection::open(&archive).unwrap();
        let mut stmt = conn
            .prepare("SELECT position, step_index FROM steps WHERE status = 'done'")
            .unwrap();
        stmt.query_map([], |r| Ok((r.get(0)?, r.get(1)?)))
            .unwrap()
            .map(|x| x.unwrap())
            .collect()
    };
    let before: Vec<(i64, f64)> = {
        let conn = Connection::open(&archive).unwrap();
        let mut stmt = conn
            .prepare("SELECT id, value FROM readings ORDER BY id")
            .unwrap();
        stmt.query_map([], |r| Ok((r.get(0)?, r.get(1)?)))
            .unwrap()
            .map(|x| x.unwrap())
            .collect()
    };
    assert!(!before.is_empty());
    let run_id: String = Connection::open(&archive)
        .unwrap()
        .query_row("SELECT run_id FROM runs", [], |r| r.get(0))
        .unwrap();
    let (code, text) = cmd(&["runs"], &archive);
    assert_eq!(code, 0);
    assert!(
        text.contains("running"),
        "the killed run is still open: {text}"
    );

    let o = bin()
        .args(["resume", &run_id, "--quiet", "--unattended", "--out"])
        .arg(&out)
        .arg("--archive")
        .arg(&archive)
        .output()
        .unwrap();
    let text = format!(
        "{}{}",
        String::from_utf8_lossy(&o.stdout),
        String::from_utf8_lossy(&o.stderr)
    );
    assert_eq!(o.status.code(), Some(1), "{text}");

    // Every reading taken before the kill is still there, unchanged.
    let conn = Connection::open(&archive).unwrap();
    for (id, value) in &before {
        let v: f64 = conn
            .query_row("SELECT value FROM readings WHERE id = ?1", [id], |r| {
                r.get(0)
            })
            .unwrap();
        assert_eq!(v, *value);
    }
    // The verdicts are those of an uninterrupted run: the planted defect at position 2.
    let mut records: Vec<meterproof::record::UnitRecord> = std::fs::read_dir(out.join(&run_id))
        .unwrap()
        .map(|e| e.unwrap().path())
        .filter(|p| p.extension().is_some_and(|x| x == "json"))
        .map(|p| meterproof::record::read(&p).unwrap())
        .collect();
    records.sort_by_key(|r| r.position);
    let statuses: Vec<UnitStatus> = records.iter().map(|r| r.verdict.status).collect();
    assert_eq!(
        statuses,
        [
            UnitStatus::Accepted,
            UnitStatus::Rejected,
            UnitStatus::Accepted,
            UnitStatus::Accepted
        ]
    );
    // At least one unit was cut short and ran a step again.
    assert!(finished.len() < 4 * 5);
    for r in &records {
        let attempts: Vec<u32> = r.steps.iter().map(|s| s.attempt).collect();
        eprintln!("{} attempts {attempts:?} notes {:?}", r.serial, r.notes);
        let note = r
            .notes
            .iter()
            .find(|n| n.contains("resumed at"))
            .expect("a resume note");
        // A step the unit had finished before the kill is kept (first attempt, not listed as
        // run again); every other step was run (again) after the resume.
        for (i, s) in r.steps.iter().enumerate() {
            let kept = finished.contains(&(r.position as i64, i as i64));
            let listed = note.contains(&format!(" {}", s.id));
            assert_eq!(listed, !kept, "{}: {note}", s.id);
            if kept {
                assert_eq!(s.attempt, 1);
            }
        }
        // The first two steps were done for every unit when it was killed.
        assert_eq!(r.steps[0].attempt, 1);
        assert_eq!(r.steps[1].attempt, 1);
        assert!(
            !r.notes.iter().any(|n| n.contains("no-load,")),
            "kept steps are not repeated"
        );
    }
    let (code, text) = cmd(&["verify"], &archive);
    assert_eq!(code, 0, "{text}");
    let (code, _) = cmd(
        &["resume", &run_id, "--out", out.to_str().unwrap()],
        &archive,
    );
    assert_eq!(code, 2, "a finished run cannot be resumed");
    std::fs::remove_dir_all(&dir).unwrap();
}

/// An archive from before readings kept their transaction time opens, gains the column, and its
/// old records still verify and read back whole.
#[test]
fn an_archive_without_reading_durations_is_brought_up_to_date() {
    let dir = temp_dir("migrate");
    let archive = dir.join("a.sqlite");
    let out = dir.join("out");
    let out = out.to_str().unwrap();
    assert_eq!(
        run_demo(Path::new(out), &["--archive", archive.to_str().unwrap()]),
        1
    );
    let serial: String = Connection::open(&archive)
        .unwrap()
        .query_row("SELECT serial FROM units LIMIT 1", [], |r| r.get(0))
        .unwrap();
    let records = |path: &Path| {
        meterproof::archive::Archive::open(path)
            .unwrap()
            .serial_records(&serial)
            .unwrap()
    };
    let before = records(&archive);
    assert!(!before.is_empty());
    Connection::open(&archive)
        .unwrap()
        .execute_batch("ALTER TABLE readings DROP COLUMN took_s")
        .unwrap();
    let has = || -> bool {
        Connection::open(&archive)
            .unwrap()
            .prepare("SELECT 1 FROM pragma_table_info('readings') WHERE name = 'took_s'")
            .unwrap()
            .exists([])
            .unwrap()
    };
    // Reading commands read it as it is, and change nothing.
    let (code, text) = cmd(&["verify"], &archive);
    assert_eq!(code, 0, "{text}");
    assert!(!has(), "verify opens the archive read-only");
    // Opened for writing (as a run or resume does), it gets the column.
    assert_eq!(before, records(&archive));
    assert!(has());
    std::fs::remove_dir_all(&dir).unwrap();
}

/// An archive that stops taking readings mid-run (here a trigger stands in for a full disk):
/// the operator is told at once, no further load is applied, every record is still written as
/// a file, none accepted, and the run ends with exit 3 naming the archive's error.
#[test]
fn an_archive_that_fails_mid_run_stops_the_loads_and_loses_no_record() {
    let dir = temp_dir("full");
    let archive = dir.join("a.sqlite");
    drop(meterproof::archive::Archive::open(&archive).unwrap());
    Connection::open(&archive)
        .unwrap()
        .execute_batch(
            "CREATE TRIGGER full BEFORE INSERT ON readings
             WHEN (SELECT COUNT(*) FROM readings) >= 40
             BEGIN SELECT RAISE(ABORT, 'database or disk is full (simulated)'); END;",
        )
        .unwrap();
    let out = dir.join("out");
    let o = bin()
        .args(["run", "test-plans/demo.yaml", "--out"])
        .arg(&out)
        .arg("--archive")
        .arg(&archive)
        .output()
        .unwrap();
    let stderr = String::from_utf8_lossy(&o.stderr);
    assert_eq!(o.status.code(), Some(3), "{stderr}");
    // Forty readings are the first step and a half: said at once, and no further load is
    // applied.
    assert!(
        stderr.contains("ARCHIVE: writing a reading: database or disk is full (simulated)"),
        "{stderr}"
    );
    assert!(
        !stderr.contains("[3/5]"),
        "no load after the failure: {stderr}"
    );
    assert!(
        stderr.contains("the archive did not take every reading"),
        "{stderr}"
    );
    // The verdicts are still summed up for the operator, and none is an acceptance.
    let stdout = String::from_utf8_lossy(&o.stdout);
    assert!(
        stdout.contains("0 accepted, 0 rejected, 4 incomplete"),
        "{stdout}"
    );
    // Every unit's record is there as a file, with every reading taken.
    let records = common::records_in(&out);
    assert_eq!(records.len(), 4);
    for r in &records {
        assert_eq!(r.verdict.status, UnitStatus::Incomplete, "{:?}", r.verdict);
        assert!(r.steps[0].checks.iter().all(|c| !c.samples.is_empty()));
        assert!(r.steps[2..].iter().all(|s| {
            s.reason
                .as_deref()
                .unwrap()
                .contains("the archive could not keep")
        }));
    }
    std::fs::remove_dir_all(&dir).unwrap();
}

/// `explain` prints one check's whole computation from the archive; redoing its arithmetic from
/// the printed figures alone gives the printed results (GUM 5.1.2 and 6.2.1 for the budget;
/// the percentage error as IEC 62053-21 defines it).
#[test]
fn explain_prints_a_computation_that_can_be_redone_by_hand() {
    let dir = temp_dir("explain");
    run_demo(&dir, &["--serials", "A-1,A-2,A-3,A-4"]);
    let archive = dir.join("archive.sqlite");
    let run_id = std::fs::read_dir(&dir)
        .unwrap()
        .map(|e| e.unwrap().file_name().to_string_lossy().into_owned())
        .find(|n| n.starts_with("20"))
        .unwrap();
    let (code, text) = cmd(
        &["explain", &run_id, "A-2", "basic-pf0.5", "active_power"],
        &archive,
    );
    assert_eq!(code, 0, "{text}");
    let after = |line_start: &str, marker: &str| -> f64 {
        let line = text
            .lines()
            .find(|l| l.trim_start().starts_with(line_start))
            .unwrap_or_else(|| panic!("no line {line_start}: {text}"));
        let rest = &line[line.rfind(marker).unwrap() + marker.len()..];
        rest.split_whitespace()
            .next()
            .unwrap()
            .trim_end_matches(';')
            .parse()
            .unwrap()
    };
    // The number after `marker` on every line `keep` picks.
    let numbers = |keep: &dyn Fn(&str) -> bool, marker: &str| -> Vec<f64> {
        text.lines()
            .filter(|l| keep(l))
            .map(|l| {
                l.split(marker)
                    .nth(1)
                    .unwrap()
                    .split_whitespace()
                    .next()
                    .unwrap()
                    .parse()
                    .unwrap()
            })
            .collect()
    };
    let values = numbers(&|l| l.contains("value = "), "value = ");
    assert_eq!(values.len(), 8);
    let mean = values.iter().sum::<f64>() / 8.0;
    assert!((after("mean =", "/ n = ") - mean).abs() < 1e-9);
    let e = after("e = (measured", "= ");
    let ref_line = text
        .lines()
        .find(|l| l.contains("from the instrument"))
        .unwrap();
    let r: f64 = ref_line.split_whitespace().next().unwrap().parse().unwrap();
    assert!((e - (mean - r) / r * 100.0).abs() < 1e-9, "{e}");
    let us = numbers(&|l| l.trim_start().starts_with("Type "), "u = ");
    let uc = after("u_c =", "= ");
    assert!((uc - us.iter().map(|u| u * u).sum::<f64>().sqrt()).abs() < 1e-12);
    let k = after("k = Student", "= ");
    let big_u = after("U = k", "= ");
    assert!((big_u - k * uc).abs() < 1e-12);
    // A step or quantity that is not there is named with what is.
    let (code, text) = cmd(&["explain", &run_id, "A-2", "nine", "current"], &archive);
    assert_eq!(code, 2);
    assert!(
        text.contains("no step \"nine\"") && text.contains("basic-pf0.5"),
        "{text}"
    );
    std::fs::remove_dir_all(&dir).unwrap();
}

/// The archive's durability settings as SQLite itself reports them (the WAL journal, fsync at
/// every commit), and the group commit of readings that arrive together: sixteen positions
/// handing over readings at once are committed in fewer transactions than readings, and every
/// reading is stored.
#[test]
fn durability_settings_and_group_commit_of_concurrent_readings() {
    use meterproof::archive::RunRecorder;
    use meterproof::exec::{ReadingKey, Recorder};
    use meterproof::plan::{Plan, Quantity};
    use meterproof::record::Sample;
    let dir = temp_dir("durability");
    let path = dir.join("archive.sqlite");
    let archive = meterproof::archive::Archive::open(&path).unwrap();
    assert_eq!(archive.durability().unwrap(), ("wal".to_string(), 2));
    let plan = Plan::load(Path::new("test-plans/demo.yaml")).unwrap();
    archive
        .begin_run(&plan, &common::run_row(&plan, "G", None))
        .unwrap();
    let recorder = RunRecorder::new(&archive, "G");
    let (positions, per_position) = (16usize, 40usize);
    let start = std::sync::Barrier::new(positions);
    std::thread::scope(|s| {
        for position in 1..=positions {
            let (recorder, start) = (&recorder, &start);
            s.spawn(move || {
                start.wait();
                for i in 0..per_position {
                    let key = ReadingKey {
                        position,
                        step_index: 0,
                        attempt: 1,
                        quantity: Quantity::Current,
                        channel: "L".into(),
                        raw: false,
                    };
                    recorder.reading(
                        &key,
                        Sample {
                            t_s: i as f64,
                            value: position as f64 + i as f64 / 1000.0,
                            took_s: None,
                        },
                    );
                }
            });
        }
    });
    assert_eq!(archive.failure(), None);
    let total = positions * per_position;
    let stored: i64 = rusqlite::Connection::open(&path)
        .unwrap()
        .query_row(
            "SELECT COUNT(*) FROM readings WHERE run_id = 'G'",
            [],
            |r| r.get(0),
        )
        .unwrap();
    assert_eq!(stored as usize, total, "every reading stored");
    let commits = recorder.reading_commits();
    println!("{total} readings from {positions} threads in {commits} commits");
    assert!(
        commits < total as u64,
        "{commits} commits for {total} readings"
    );
    std::fs::remove_dir_all(&dir).unwrap();
}
