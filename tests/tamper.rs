//! The archive's integrity claim, attacked: every column of every table edited, rows of each
//! table deleted, and `verify` must find every change that alters what a command shows.
//!
//! The fixture holds a finished run and a run interrupted after two steps and resumed, so that
//! every kind of row (plans, runs, positions, readings, steps, unit records, the chain, meta) is
//! there more than once. What a command shows is taken as a fingerprint of the archive's reading
//! API (runs, each run's row, plan text and unit records, each serial's history and records,
//! records by lot and firmware, and each run's resume state); a change that moves the
//! fingerprint must fail `verify`, and the counts are printed.

mod common;
use common::store::{Store, backends, on_every_backend};
use common::{bin, temp_dir};

use meterproof::archive::{RunFilter, RunRecorder, RunRow, RunState};
use meterproof::bench::sim::{SimBench, SimConfig};
use meterproof::exec::{self, Event, Reporter, RunContext};
use meterproof::plan::Plan;
use std::path::Path;
use std::sync::Arc;
use std::sync::atomic::{AtomicBool, Ordering};

/// Stops the run (as a stop signal would) once `after` steps have finished.
struct StopAfter {
    after: usize,
    seen: usize,
    flag: Arc<AtomicBool>,
}

impl Reporter for StopAfter {
    fn event(&mut self, event: &Event) {
        if let Event::StepFinished { .. } = event {
            self.seen += 1;
            if self.seen == self.after {
                self.flag.store(true, Ordering::SeqCst);
            }
        }
    }
}

fn run_row(plan: &Plan, run_id: &str, lot: &str) -> RunRow {
    common::run_row(plan, run_id, Some(lot))
}

fn context(run_id: &str, lot: &str) -> RunContext {
    RunContext {
        run_id: run_id.into(),
        operator: "tester".into(),
        lot: Some(lot.into()),
        tool_version: "test".into(),
        notes: Vec::new(),
    }
}

/// A finished run and an interrupted-then-resumed one, in one archive.
fn fixture(store: &Store) {
    let plan = Plan::load(Path::new("test-plans/demo.yaml")).unwrap();
    let archive = store.open();
    // Run 1: straight through.
    archive
        .begin_run(&plan, &run_row(&plan, "R1", "LOT-A"))
        .unwrap();
    let mut bench = SimBench::new(&SimConfig::new(1, 3)).into_bench();
    let rec = RunRecorder::new(&archive, "R1");
    let records = exec::run_with(
        &plan,
        &mut bench,
        &context("R1", "LOT-A"),
        &mut exec::Silent,
        &rec,
        None,
    );
    archive
        .finish_run("R1", &records[0].finished_at, RunState::Finished)
        .unwrap();
    // Run 2: stopped after two steps, then resumed on a fresh bench.
    archive
        .begin_run(&plan, &run_row(&plan, "R2", "LOT-B"))
        .unwrap();
    let mut bench = SimBench::new(&SimConfig::new(2, 3)).into_bench();
    let flag = bench.interrupt.clone();
    let rec = RunRecorder::new(&archive, "R2");
    let mut stop = StopAfter {
        after: 2,
        seen: 0,
        flag,
    };
    let records = exec::run_with(
        &plan,
        &mut bench,
        &context("R2", "LOT-B"),
        &mut stop,
        &rec,
        None,
    );
    assert!(exec::stopped_early(&records).is_some());
    archive
        .finish_run("R2", &records[0].finished_at, RunState::Interrupted)
        .unwrap();
    let state = archive.resume_state("R2").unwrap();
    let mut bench = SimBench::new(&SimConfig::new(2, 3)).into_bench();
    let rec = RunRecorder::new(&archive, "R2");
    let records = exec::run_with(
        &plan,
        &mut bench,
        &context("R2", "LOT-B"),
        &mut exec::Silent,
        &rec,
        Some(&state),
    );
    assert!(exec::stopped_early(&records).is_none());
    archive
        .finish_run("R2", &records[0].finished_at, RunState::Finished)
        .unwrap();
}

/// What the archive's commands would show, as text.
fn shown(store: &Store, runs: &[String], serials: &[String], firmwares: &[String]) -> String {
    let a = match store.open_read_only() {
        Ok(a) => a,
        Err(e) => return format!("cannot open: {e}"),
    };
    let mut out = format!("{:?}\n", a.runs(&RunFilter::default()));
    for r in runs {
        out += &format!("{:?}\n", a.run(r));
        if let Ok(row) = a.run(r) {
            out += &format!("{:?}\n", a.plan_text(&row.plan_sha256));
        }
        out += &format!("{:?}\n", a.unit_records(r));
        out += &format!(
            "{:?}\n",
            a.resume_state(r)
                .map(|s| { (s.serials, s.done, s.attempts, s.first_started_at, s.sealed) })
        );
    }
    for s in serials {
        out += &format!("{:?}\n{:?}\n", a.history(s), a.serial_records(s));
    }
    for f in firmwares {
        out += &format!("{:?}\n", a.select("firmware", f, None));
    }
    for lot in ["LOT-A", "LOT-B"] {
        out += &format!("{:?}\n", a.select("lot", lot, None));
    }
    out
}

fn verify_fails(store: &Store) -> bool {
    match store.open_read_only() {
        Err(_) => true,
        Ok(a) => match a.verify(None) {
            Err(_) => true,
            Ok(v) => !v.failures.is_empty(),
        },
    }
}

/// One edit of a copy of the archive.
struct Case {
    name: String,
    sql: String,
}

fn cases(store: &Store) -> Vec<Case> {
    let mut out = Vec::new();
    let tables = [
        "meta",
        "plans",
        "runs",
        "run_units",
        "readings",
        "steps",
        "units",
        "chain",
    ];
    for table in tables {
        let n: i64 = store
            .value(&format!("SELECT COUNT(*) FROM {table}"))
            .parse()
            .unwrap();
        assert!(n > 0, "the fixture has rows in {table}");
        let rowids = store.rows_at(table, &[0, n / 2, n - 1]);
        for (column, ty) in store.columns(table) {
            let rowid = &rowids[1];
            let edits: Vec<(&str, String)> = match ty {
                "integer" => vec![("+1", format!("{column} = {column} + 1"))],
                "boolean" => vec![("negated", format!("{column} = NOT {column}"))],
                "real" => vec![(
                    "×1.001",
                    format!("{column} = COALESCE({column} * 1.001 + 0.000001, 1.5)"),
                )],
                _ => vec![
                    (
                        "appended",
                        format!("{column} = COALESCE({column}, '') || 'x'"),
                    ),
                    ("digit", format!("{column} = replace({column}, '1', '2')")),
                    (
                        "verdict",
                        format!(
                            "{column} = replace(replace({column}, 'rejected', 'accepted'), 'incomplete', 'accepted')"
                        ),
                    ),
                    ("emptied", format!("{column} = ''")),
                ],
            };
            for (what, set) in edits {
                out.push(Case {
                    name: format!("{table}.{column} {what} (row {rowid})"),
                    sql: format!("UPDATE {table} SET {set} WHERE {rowid}"),
                });
            }
        }
        for (i, rowid) in rowids.iter().enumerate() {
            let place = ["first", "middle", "last"][i];
            out.push(Case {
                name: format!("{table}: {place} row deleted"),
                sql: format!("DELETE FROM {table} WHERE {rowid}"),
            });
        }
        out.push(Case {
            name: format!("{table}: every row deleted"),
            sql: format!("DELETE FROM {table}"),
        });
    }
    // Edits an attacker would make on purpose.
    out.push(Case {
        name: "a rejected unit made accepted in the columns queries read".into(),
        sql: "UPDATE units SET status = 'accepted' WHERE status = 'rejected'".into(),
    });
    out.push(Case {
        name: "a rejected unit made accepted in its record and columns".into(),
        sql: "UPDATE units SET status = 'accepted', record = replace(record, '\"status\":\"rejected\"', '\"status\":\"accepted\"') WHERE status = 'rejected'".into(),
    });
    out.push(Case {
        name: "every record and the chain head deleted".into(),
        sql: "DELETE FROM units; DELETE FROM meta WHERE key = 'chain_head'".into(),
    });
    out.push(Case {
        name: "two records swapped".into(),
        sql: "UPDATE units SET seq = -seq WHERE seq IN (1, 2); UPDATE units SET seq = 2 WHERE seq = -1; UPDATE units SET seq = 1 WHERE seq = -2".into(),
    });
    out.push(Case {
        name: "a lot renamed everywhere it is stored".into(),
        sql: "UPDATE runs SET lot = 'LOT-Z' WHERE lot = 'LOT-A'; UPDATE units SET record = replace(record, 'LOT-A', 'LOT-Z')".into(),
    });
    out.push(Case {
        name: "a finished run made resumable".into(),
        sql: "UPDATE runs SET state = 'interrupted' WHERE run_id = 'R1'".into(),
    });
    out
}

#[test]
fn verify_finds_every_change_that_alters_what_a_command_shows() {
    on_every_backend("tamper-suite", tamper_suite);
}

fn tamper_suite(dir: &Path, archive: &Store) {
    let on = archive.label();
    fixture(archive);
    let a = archive.open_read_only().unwrap();
    let v = a.verify(None).unwrap();
    assert!(v.failures.is_empty(), "{on}: untouched: {:?}", v.failures);
    assert_eq!(
        v.unit_records, 9,
        "3 units of R1; 3 of R2 when it was interrupted and 3 after its resume"
    );
    let runs = vec!["R1".to_string(), "R2".to_string()];
    let records = [a.unit_records("R1").unwrap(), a.unit_records("R2").unwrap()].concat();
    let serials: Vec<String> = records.iter().map(|r| r.serial.clone()).collect();
    let firmwares: Vec<String> = records
        .iter()
        .filter_map(|r| r.identity.as_ref().map(|i| i.firmware.clone()))
        .collect();
    drop(a);
    let before = shown(archive, &runs, &serials, &firmwares);
    let cases = cases(archive);
    // Each case on a copy of its own; three at a time (a case mostly waits on its archive).
    let outcome = |i: usize, case: &Case| -> Option<(bool, bool)> {
        let copy = archive.copy(dir, i);
        // An attacker is not held back by the schema's foreign keys; an edit that a unique
        // key refuses (a sequence number moved onto another) is not possible and not counted.
        if let Err(e) = copy.tamper(&case.sql) {
            assert!(
                e.to_ascii_lowercase().contains("unique"),
                "{on}: {}: {e}",
                case.name
            );
            copy.remove();
            return None;
        }
        let alters = shown(&copy, &runs, &serials, &firmwares) != before;
        let fails = verify_fails(&copy);
        copy.remove();
        Some((alters, fails))
    };
    let next = std::sync::atomic::AtomicUsize::new(0);
    let outcomes = std::sync::Mutex::new(Vec::new());
    std::thread::scope(|s| {
        for _ in 0..3 {
            s.spawn(|| {
                loop {
                    let i = next.fetch_add(1, Ordering::SeqCst);
                    let Some(case) = cases.get(i) else { break };
                    let o = outcome(i, case);
                    outcomes.lock().unwrap().push((i, o));
                }
            });
        }
    });
    let mut outcomes = outcomes.into_inner().unwrap();
    outcomes.sort_by_key(|(i, _)| *i);
    let (mut altering, mut caught, mut harmless, mut flagged_anyway) = (0, 0, 0, 0);
    let mut impossible = 0;
    let mut missed = Vec::new();
    for (i, o) in outcomes {
        let case = &cases[i];
        match o {
            None => impossible += 1,
            Some((true, true)) => {
                altering += 1;
                caught += 1
            }
            Some((true, false)) => {
                altering += 1;
                missed.push(case.name.clone())
            }
            Some((false, true)) => {
                harmless += 1;
                flagged_anyway += 1
            }
            Some((false, false)) => {
                harmless += 1;
                eprintln!("{on}: harmless and passed: {}", case.name)
            }
        }
    }
    println!(
        "{on}: tamper cases: {} tried, {impossible} refused by the schema's unique keys; {altering} alter what a \
         command shows, {caught} of them found by verify; {harmless} alter nothing shown ({flagged_anyway} \
         of those flagged too)",
        cases.len()
    );
    assert!(missed.is_empty(), "{on}: verify missed: {missed:#?}");
    assert!(altering > 100, "the suite edits enough to mean something");
}

/// Records removed from the end with the chain rewritten to match cannot be seen from inside
/// the database; the anchor kept in the run's folder and on its reports finds it.
#[test]
fn truncation_is_found_against_the_anchor() {
    on_every_backend("tamper-anchor", truncation_against_the_anchor);
}

fn truncation_against_the_anchor(dir: &Path, archive: &Store) {
    fixture(archive);
    let anchor = archive
        .open_read_only()
        .unwrap()
        .run_anchor("R2")
        .unwrap()
        .unwrap();
    // Remove run R2 whole, chain entries included, and write the head of what is left.
    archive
        .tamper(
            "DELETE FROM units WHERE run_id = 'R2'; DELETE FROM steps WHERE run_id = 'R2';
             DELETE FROM readings WHERE run_id = 'R2'; DELETE FROM run_units WHERE run_id = 'R2';
             DELETE FROM runs WHERE run_id = 'R2'; DELETE FROM chain WHERE run_id = 'R2';
             UPDATE meta SET value = (SELECT seq || ':' || sha256 FROM chain ORDER BY seq DESC LIMIT 1)
                 WHERE key = 'chain_head'",
        )
        .unwrap();
    let run = |extra: &[&str]| {
        let o = bin()
            .arg("verify")
            .arg("--archive")
            .arg(archive.arg())
            .args(extra)
            .output()
            .unwrap();
        (
            o.status.code().unwrap(),
            String::from_utf8_lossy(&o.stdout).to_string(),
        )
    };
    // Alone, the archive is consistent: the README says this is what verify cannot prove.
    assert_eq!(run(&[]).0, 0, "{}", archive.label());
    let (code, text) = run(&["--anchor", &anchor]);
    assert_eq!(code, 1, "{text}");
    assert!(text.contains("the chain has no entry"), "{text}");
    // The anchor file of a run's folder works as well.
    let file = dir.join("chain-anchor.txt");
    std::fs::write(&file, format!("{anchor}\n")).unwrap();
    assert_eq!(run(&["--anchor", file.to_str().unwrap()]).0, 1);
}

#[test]
fn a_file_that_is_not_an_archive_is_named_as_such() {
    let dir = temp_dir("not-archive");
    let empty = dir.join("empty.sqlite");
    std::fs::write(&empty, b"").unwrap();
    let text_file = dir.join("notes.sqlite");
    std::fs::write(&text_file, b"lot 7: retest tomorrow\n").unwrap();
    for (path, why) in [
        (&empty, "the file is empty"),
        (&text_file, "not an SQLite database"),
    ] {
        let o = bin()
            .arg("verify")
            .arg("--archive")
            .arg(path)
            .output()
            .unwrap();
        let err = String::from_utf8_lossy(&o.stderr);
        assert_eq!(o.status.code(), Some(1), "{err}");
        assert!(
            err.contains("is not a meterproof archive") && err.contains(why),
            "{err}"
        );
    }
    // Nothing was created or changed.
    assert_eq!(std::fs::read(&empty).unwrap(), b"");
    assert!(!dir.join("empty.sqlite-wal").exists());
    std::fs::remove_dir_all(&dir).unwrap();
}

/// Forwards everything to the archive but the unit records at the end: a process killed
/// before its run's end.
struct KilledBeforeTheEnd<'a>(RunRecorder<'a>);

impl exec::Recorder for KilledBeforeTheEnd<'_> {
    fn reading(&self, key: &exec::ReadingKey, sample: meterproof::record::Sample) {
        self.0.reading(key, sample)
    }
    fn step_finished(&self, i: usize, records: &[(usize, &meterproof::record::StepRecord)]) {
        self.0.step_finished(i, records)
    }
    fn unit_started(&self, record: &meterproof::record::UnitRecord) {
        self.0.unit_started(record)
    }
    fn units_finished(&self, _: &[meterproof::record::UnitRecord]) {}
}

/// A unit swapped for another while its run was interrupted: the unit that left keeps its own
/// record of the steps it did, the unit that came is tested from the first step.
#[test]
fn a_unit_swapped_during_an_interruption_keeps_its_own_record() {
    use meterproof::record::{StepStatus, UnitStatus};
    let plan = Plan::load(Path::new("test-plans/demo.yaml")).unwrap();
    let dir = temp_dir("swap");
    for (killed, store) in [false, true].into_iter().flat_map(|k| {
        backends(&dir, &format!("swap-{k}"))
            .into_iter()
            .map(move |s| (k, s))
    }) {
        let on = store.label();
        let archive = store.open();
        archive
            .begin_run(&plan, &run_row(&plan, "S", "LOT-S"))
            .unwrap();
        let mut config = SimConfig::new(5, 3);
        config.serials = Some(vec!["OLD-1".into(), "OLD-2".into(), "OLD-3".into()]);
        let mut bench = SimBench::new(&config).into_bench();
        let flag = bench.interrupt.clone();
        let mut stop = StopAfter {
            after: 2,
            seen: 0,
            flag,
        };
        let rec = RunRecorder::new(&archive, "S");
        if killed {
            let rec = KilledBeforeTheEnd(rec);
            exec::run_with(
                &plan,
                &mut bench,
                &context("S", "LOT-S"),
                &mut stop,
                &rec,
                None,
            );
        } else {
            let records = exec::run_with(
                &plan,
                &mut bench,
                &context("S", "LOT-S"),
                &mut stop,
                &rec,
                None,
            );
            archive
                .finish_run("S", &records[0].finished_at, RunState::Interrupted)
                .unwrap();
        }
        // Position 2 now holds another unit.
        config.serials = Some(vec!["OLD-1".into(), "NEW-2".into(), "OLD-3".into()]);
        let state = archive.resume_state("S").unwrap();
        let mut bench = SimBench::new(&config).into_bench();
        let rec = RunRecorder::new(&archive, "S");
        let records = exec::run_with(
            &plan,
            &mut bench,
            &context("S", "LOT-S"),
            &mut exec::Silent,
            &rec,
            Some(&state),
        );
        archive
            .finish_run("S", &records[0].finished_at, RunState::Finished)
            .unwrap();
        // The unit that came: every step run for it, none kept from the one before.
        let newest = archive.unit_records("S").unwrap();
        let new = newest.iter().find(|r| r.position == 2).unwrap();
        assert_eq!(new.serial, "NEW-2");
        assert_eq!(new.steps.len(), plan.steps.len());
        assert!(
            new.steps.iter().all(|s| s.status == StepStatus::Done),
            "killed: {killed}, {on}"
        );
        assert!(
            new.notes.iter().any(|n| n.contains("replaced OLD-2")),
            "{:?}",
            new.notes
        );
        // The unit that left: its own record, with the two steps it did, never accepted.
        let old = archive.serial_records("OLD-2").unwrap();
        assert_eq!(old.len(), 1, "killed: {killed}");
        assert_eq!(old[0].verdict.status, UnitStatus::Incomplete);
        let done = old[0]
            .steps
            .iter()
            .filter(|s| s.status == StepStatus::Done)
            .count();
        assert_eq!(done, 2, "killed: {killed}");
        assert!(
            old[0].steps[0].checks.iter().all(|c| !c.samples.is_empty()),
            "its readings are in its record"
        );
        let v = archive.verify(None).unwrap();
        assert!(v.failures.is_empty(), "{on}: {:?}", v.failures);
        drop(archive);
        store.remove();
    }
    std::fs::remove_dir_all(&dir).unwrap();
}

/// `verify` names what it found changed: an edited reading and an edited verdict each name the
/// run, the position and the serial of the record they belong to; so do the readings of an
/// attempt that was cut short by the interruption (kept, though no verdict rests on them).
#[test]
fn verify_names_the_record_a_change_belongs_to() {
    on_every_backend("tamper-named", changes_named);
}

fn changes_named(dir: &Path, archive: &Store) {
    fixture(archive);
    // A reading of a finished step, and a cut-short attempt's reading: the interrupted run's
    // step 3 (index 2) was stopped during its sampling, then run again as attempt 2.
    let cut_short = archive.value(
        "SELECT COUNT(*) FROM readings WHERE run_id = 'R2' AND step_index = 2 AND attempt = 1",
    );
    assert_ne!(
        cut_short, "0",
        "the fixture's interruption left no cut-short attempt"
    );
    let cases = [
        (
            "UPDATE readings SET value = value * 1.01 WHERE id = (SELECT id FROM readings WHERE run_id = 'R1' AND position = 2 AND step_index = 1 ORDER BY id LIMIT 1)",
            "R1",
            2,
        ),
        (
            "UPDATE units SET record = replace(record, '\"status\":\"rejected\"', '\"status\":\"accepted\"') WHERE run_id = 'R1' AND position = 2",
            "R1",
            2,
        ),
        (
            "UPDATE readings SET value = value * 1.01 WHERE id = (SELECT id FROM readings WHERE run_id = 'R2' AND position = 3 AND step_index = 2 AND attempt = 1 ORDER BY id LIMIT 1)",
            "R2",
            3,
        ),
    ];
    for (i, (sql, run, position)) in cases.iter().enumerate() {
        let copy = archive.copy(dir, 1000 + i);
        copy.tamper(sql).unwrap();
        let v = copy.open_read_only().unwrap().verify(None).unwrap();
        assert!(!v.failures.is_empty(), "{}: {sql}: not found", copy.label());
        let serial = copy.value(&format!(
            "SELECT serial FROM units WHERE run_id = '{run}' AND position = {position} LIMIT 1"
        ));
        let named = v.failures.iter().any(|f| {
            f.what.contains(run)
                && f.what.contains(&format!("position {position}"))
                && f.what.contains(&serial)
        });
        assert!(named, "{}: {sql}: {:#?}", copy.label(), v.failures);
        copy.remove();
    }
}

/// Forgeries made the way one who knows the scheme would make them: a run's end time changed in
/// its row and in its chain entry's content (the canonical JSON's SHA-256, recomputed), with the
/// entry's own hash left as it was, and then recomputed too. The first is caught by the entry's
/// own hash, the second by the next entry's link to it (the run is not the last in the chain).
#[test]
fn a_consistent_forgery_is_caught_by_the_chain_itself() {
    on_every_backend("tamper-forged", forgeries_caught);
}

fn forgeries_caught(dir: &Path, archive: &Store) {
    use meterproof::plan::sha256_hex;
    use meterproof::record::canonical_bytes;
    fixture(archive);
    let forged_at = "2026-12-01T23:59:59.000+00:00";
    let content = sha256_hex(&canonical_bytes(&serde_json::json!({
        "run_id": "R1",
        "state": "finished",
        "finished_at": forged_at,
    })));
    let end =
        "SELECT seq FROM chain WHERE kind = 'end' AND run_id = 'R1' ORDER BY seq DESC LIMIT 1";
    let seq: i64 = archive.value(end).parse().unwrap();
    let prev = archive.value(&format!("SELECT prev_sha256 FROM chain WHERE seq = {seq}"));
    let last: i64 = archive.value("SELECT MAX(seq) FROM chain").parse().unwrap();
    assert!(seq < last, "R1's end is not the last entry");
    let rehashed = sha256_hex(format!("{prev}\nend\n{content}").as_bytes());
    let forge = |i: usize, with_hash: bool| {
        let copy = archive.copy(dir, 2000 + i);
        let mut sql = format!(
            "UPDATE runs SET finished_at = '{forged_at}' WHERE run_id = 'R1';
             UPDATE chain SET content_sha256 = '{content}' WHERE seq = {seq}"
        );
        if with_hash {
            sql += &format!("; UPDATE chain SET sha256 = '{rehashed}' WHERE seq = {seq}");
        }
        copy.tamper(&sql).unwrap();
        let v = copy.open_read_only().unwrap().verify(None).unwrap();
        copy.remove();
        v
    };
    let own = forge(0, false);
    assert!(
        own.failures
            .iter()
            .any(|f| f.why.contains("its own hash does not match its content")),
        "{}: {:#?}",
        archive.label(),
        own.failures
    );
    let linked = forge(1, true);
    assert!(
        linked
            .failures
            .iter()
            .any(|f| f.why.contains("missing, reordered or changed")),
        "{}: {:#?}",
        archive.label(),
        linked.failures
    );
}
