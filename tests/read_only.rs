//! The reading commands on an archive that cannot be written (a read-only folder, an auditor's
//! copy): each works and leaves the file exactly as it was; a run is refused before any step.
//! Run as root (CI), the commands run as the unprivileged user `nobody` (setpriv), for whom
//! the folder really is read-only; otherwise as the current user, with the write bits removed.

mod common;
use common::{bin, temp_dir};

use std::os::unix::fs::PermissionsExt;
use std::path::Path;
use std::process::{Command, Output};

fn is_root() -> bool {
    Command::new("id")
        .arg("-u")
        .output()
        .is_ok_and(|o| String::from_utf8_lossy(&o.stdout).trim() == "0")
}

/// The binary as a user who cannot write the archive's folder.
fn as_reader(args: &[&str]) -> Output {
    let mut c = if is_root() {
        let mut c = Command::new("setpriv");
        c.args(["--reuid=65534", "--regid=65534", "--clear-groups"])
            .arg(env!("CARGO_BIN_EXE_meterproof"));
        c
    } else {
        bin()
    };
    c.args(args).output().expect("setpriv (util-linux) runs")
}

fn demo(out: &Path, extra: &[&str]) -> String {
    let o = bin()
        .args(["run", "test-plans/demo.yaml", "--quiet", "--json", "--out"])
        .arg(out)
        .args(extra)
        .output()
        .unwrap();
    let records: serde_json::Value = serde_json::from_slice(&o.stdout).unwrap();
    records[0]["run_id"].as_str().unwrap().to_string()
}

fn set_mode(p: &Path, mode: u32) {
    std::fs::set_permissions(p, std::fs::Permissions::from_mode(mode)).unwrap();
}

/// Every command that only reads, on the archive `a`, writing its files where `o` says.
fn reading_commands(
    a: &str,
    first: &str,
    second: &str,
    o: &dyn Fn(&str) -> String,
) -> Vec<Vec<String>> {
    vec![
        vec!["verify".into(), "--archive".into(), a.into()],
        vec!["history".into(), "A-1".into(), "--archive".into(), a.into()],
        vec![
            "runs".into(),
            "--lot".into(),
            "L-7".into(),
            "--archive".into(),
            a.into(),
        ],
        vec![
            "export".into(),
            first.to_string(),
            "--archive".into(),
            a.into(),
            "--to".into(),
            o("export"),
        ],
        vec![
            "report".into(),
            "A-1".into(),
            "--archive".into(),
            a.into(),
            "--out".into(),
            o("report"),
        ],
        vec![
            "summary".into(),
            "--lot".into(),
            "L-7".into(),
            "--archive".into(),
            a.into(),
            "--out".into(),
            o(""),
        ],
        vec![
            "compare".into(),
            "--baseline".into(),
            format!("run={first}"),
            "--candidate".into(),
            format!("run={second}"),
            "--archive".into(),
            a.into(),
        ],
    ]
}

#[test]
fn reading_commands_work_on_a_read_only_archive_and_change_nothing() {
    let dir = temp_dir("read-only");
    set_mode(&dir, 0o755);
    let store = dir.join("store");
    let first = demo(&store, &["--lot", "L-7", "--serials", "A-1,A-2,A-3,A-4"]);
    let second = demo(
        &store,
        &[
            "--lot",
            "L-7",
            "--serials",
            "A-1,A-2,A-3,A-4",
            "--seed",
            "3",
        ],
    );
    let archive = store.join("archive.sqlite");
    // Readers write their files elsewhere.
    let outside = dir.join("outside");
    std::fs::create_dir_all(&outside).unwrap();
    set_mode(&outside, 0o777);
    for entry in std::fs::read_dir(&store).unwrap() {
        let p = entry.unwrap().path();
        set_mode(&p, if p.is_dir() { 0o555 } else { 0o444 });
    }
    set_mode(&store, 0o555);
    let before = std::fs::read(&archive).unwrap();
    let listing = |d: &Path| -> Vec<String> {
        let mut v: Vec<String> = std::fs::read_dir(d)
            .unwrap()
            .map(|e| e.unwrap().file_name().to_string_lossy().into_owned())
            .collect();
        v.sort();
        v
    };
    let files_before = listing(&store);
    let a = archive.to_str().unwrap();
    let o = |name: &str| outside.join(name).to_str().unwrap().to_string();
    let commands = reading_commands(a, &first, &second, &o);
    for args in &commands {
        let args: Vec<&str> = args.iter().map(String::as_str).collect();
        let out = as_reader(&args);
        let text = format!(
            "{}{}",
            String::from_utf8_lossy(&out.stdout),
            String::from_utf8_lossy(&out.stderr)
        );
        // 0, or 1 where a comparison finds a difference: never "could not" (3).
        assert!(
            matches!(out.status.code(), Some(0) | Some(1)),
            "{}: {text}",
            args[0]
        );
        assert!(
            !text.contains("not writable") && !text.contains("readonly"),
            "{}: {text}",
            args[0]
        );
    }
    assert_eq!(
        std::fs::read(&archive).unwrap(),
        before,
        "the archive is unchanged"
    );
    assert_eq!(listing(&store), files_before, "no file was added beside it");
    // A run into it is refused before any step. The plan is copied where the reader can read
    // it (a checkout may sit in a folder only its owner can enter).
    let plan = dir.join("demo.yaml");
    std::fs::copy("test-plans/demo.yaml", &plan).unwrap();
    set_mode(&plan, 0o644);
    let refused = as_reader(&[
        "run",
        plan.to_str().unwrap(),
        "--quiet",
        "--archive",
        a,
        "--out",
        &o("run"),
    ]);
    assert_eq!(refused.status.code(), Some(3));
    let err = String::from_utf8_lossy(&refused.stderr);
    assert!(err.contains("not writable"), "{err}");
    assert!(
        common::records_in(&outside.join("run")).is_empty(),
        "no unit was tested"
    );
    set_mode(&store, 0o755);
    std::fs::remove_dir_all(&dir).unwrap();
}

/// The same commands against a shared PostgreSQL archive, as a database user who may only read
/// (an auditor's or a quality manager's account: `SELECT` and nothing else): each works, nothing
/// changes, and a run with that account is refused before any step.
#[test]
fn reading_commands_work_for_a_database_user_who_may_only_read() {
    if common::store::server().is_none() {
        return; // said loudly by tests/postgres_notice.rs
    }
    let dir = temp_dir("read-only-pg");
    let url = common::store::fresh_database("reader");
    let store = dir.join("store");
    let first = demo(
        &store,
        &[
            "--lot",
            "L-7",
            "--serials",
            "A-1,A-2,A-3,A-4",
            "--archive",
            &url,
        ],
    );
    let second = demo(
        &store,
        &[
            "--lot",
            "L-7",
            "--serials",
            "A-1,A-2,A-3,A-4",
            "--seed",
            "3",
            "--archive",
            &url,
        ],
    );
    let db = url.rsplit('/').next().unwrap().to_string();
    let mut admin = postgres::Client::connect(&url, postgres::NoTls).unwrap();
    admin
        .batch_execute(&format!(
            "DO $$ BEGIN
                 IF NOT EXISTS (SELECT 1 FROM pg_roles WHERE rolname = 'mp_auditor') THEN
                     CREATE ROLE mp_auditor LOGIN;
                 END IF;
             END $$;
             GRANT CONNECT ON DATABASE {db} TO mp_auditor;
             GRANT USAGE ON SCHEMA public TO mp_auditor;
             GRANT SELECT ON ALL TABLES IN SCHEMA public TO mp_auditor;"
        ))
        .unwrap();
    let state = |c: &mut postgres::Client| -> String {
        let row = c
            .query_one(
                "SELECT (SELECT string_agg(key || '=' || value, ',' ORDER BY key) FROM meta),
                        (SELECT COUNT(*) FROM readings)::text, (SELECT COUNT(*) FROM units)::text",
                &[],
            )
            .unwrap();
        format!(
            "{:?} {:?} {:?}",
            row.get::<_, Option<String>>(0),
            row.get::<_, String>(1),
            row.get::<_, String>(2)
        )
    };
    let before = state(&mut admin);
    let reader =
        common::store::with_database(&url.replacen("://meterproof@", "://mp_auditor@", 1), &db);
    assert!(reader.contains("mp_auditor@"), "{reader}");
    let outside = dir.join("outside");
    let o = |name: &str| outside.join(name).to_str().unwrap().to_string();
    for args in reading_commands(&reader, &first, &second, &o) {
        let out = bin().args(&args).output().unwrap();
        let text = format!(
            "{}{}",
            String::from_utf8_lossy(&out.stdout),
            String::from_utf8_lossy(&out.stderr)
        );
        assert!(
            matches!(out.status.code(), Some(0) | Some(1)),
            "{}: {text}",
            args[0]
        );
    }
    assert_eq!(state(&mut admin), before, "the archive is unchanged");
    let refused = bin()
        .args([
            "run",
            "test-plans/demo.yaml",
            "--quiet",
            "--archive",
            &reader,
            "--out",
            &o("run"),
        ])
        .output()
        .unwrap();
    assert_eq!(refused.status.code(), Some(3));
    let err = String::from_utf8_lossy(&refused.stderr);
    assert!(
        err.contains("not writable") && err.contains("permission denied"),
        "{err}"
    );
    assert!(
        common::records_in(&outside.join("run")).is_empty(),
        "no unit was tested"
    );
    std::fs::remove_dir_all(&dir).unwrap();
}
