//! `meterproof serve` without a browser: it refuses what it cannot serve before it listens,
//! each refusal saying where and what (exit status 2, as for every invalid argument), and a run
//! started at the screen lands in the archive on every backend, looked up and verified there.

mod common;
use common::{bin, temp_dir};
use std::path::Path;

/// Runs `serve` with `args` (and an output folder) and returns its exit status and standard
/// error.
fn serve(dir: &Path, args: &[&str]) -> (Option<i32>, String) {
    let o = bin()
        .arg("serve")
        .arg("--out")
        .arg(dir.join("out"))
        .args(["--listen", "127.0.0.1:0"])
        .args(args)
        .output()
        .unwrap();
    (
        o.status.code(),
        String::from_utf8_lossy(&o.stderr).into_owned(),
    )
}

/// The example station with `extra` lines added, written into `dir` as `name`.
fn station_with(dir: &Path, name: &str, extra: &str) -> String {
    let text = std::fs::read_to_string("test-plans/station-example.yaml").unwrap();
    let path = dir.join(name);
    std::fs::write(&path, format!("{text}\n{extra}\n")).unwrap();
    path.display().to_string()
}

#[test]
fn bad_serve_options_are_refused_with_where_and_what() {
    let dir = temp_dir("serve-options");
    let empty = dir.join("no-plans");
    std::fs::create_dir_all(&empty).unwrap();
    let with_journal = station_with(
        &dir,
        "journal.yaml",
        "journal: station-journal.sqlite\narchive: postgres://meterproof@127.0.0.1:9/shared",
    );
    let archive_a = station_with(&dir, "a.yaml", "archive: a.sqlite");
    let archive_b = station_with(&dir, "b.yaml", "archive: b.sqlite");
    let short_token = dir.join("token");
    std::fs::write(&short_token, "short\n").unwrap();
    let busy = std::net::TcpListener::bind("127.0.0.1:0").unwrap();
    let busy_at = busy.local_addr().unwrap().to_string();
    let cases: Vec<(Vec<String>, &str)> = vec![
        (
            vec!["--plans".into(), empty.display().to_string()],
            "no plan file (.yaml) in it",
        ),
        (
            vec!["--plan".into(), "nowhere.yaml".into()],
            "--plan nowhere.yaml: no plan of this name in test-plans",
        ),
        (
            vec!["--station".into(), with_journal.clone()],
            "the station keeps a journal, which the station screen does not",
        ),
        (
            vec![
                "--station".into(),
                archive_a.clone(),
                "--station".into(),
                archive_b.clone(),
            ],
            "the station screen writes one archive",
        ),
        (
            vec!["--token-file".into(), short_token.display().to_string()],
            "the token must be one line of at least 16 characters",
        ),
        (
            vec!["--sim-pace".into(), "0".into()],
            "--sim-pace 0: give a number of bench seconds per real second above 0",
        ),
        (
            vec!["--positions".into(), "0".into()],
            "--positions must be at least 1",
        ),
        (vec!["--listen".into(), busy_at.clone()], "--listen"),
    ];
    for (args, said) in cases {
        let args: Vec<&str> = args.iter().map(String::as_str).collect();
        let (code, stderr) = serve(&dir, &args);
        assert_eq!(code, Some(2), "{args:?}: {stderr}");
        assert!(stderr.contains(said), "{args:?}: {stderr}");
    }
    drop(busy);
    // A station file's archive is the screen's when --archive is not given (as for `run`).
    let named = dir.join("named.sqlite").display().to_string();
    let station = station_with(&dir, "named.yaml", &format!("archive: {named}"));
    let mut child = bin()
        .arg("serve")
        .arg("--out")
        .arg(dir.join("out"))
        .args(["--listen", "127.0.0.1:0", "--station", &station])
        .stdout(std::process::Stdio::piped())
        .stderr(std::process::Stdio::null())
        .spawn()
        .unwrap();
    let mut first = String::new();
    std::io::BufRead::read_line(
        &mut std::io::BufReader::new(child.stdout.take().unwrap()),
        &mut first,
    )
    .unwrap();
    let _ = child.kill();
    let _ = child.wait();
    assert!(
        first.starts_with("meterproof serves the station screen at http://127.0.0.1:"),
        "{first}"
    );
    assert!(std::path::Path::new(&named).exists(), "{first}");
    std::fs::remove_dir_all(&dir).unwrap();
}

/// A run started at the screen (plain HTTP, as the page sends it) is in the archive on SQLite
/// and on PostgreSQL: the archive view finds the unit and its verdict, and every seal holds.
#[test]
fn a_run_from_the_screen_lands_in_every_archive_backend() {
    common::store::on_every_backend("serve-backends", |dir, store| {
        let archive = store.arg();
        let (at, mut child) = common::serve_screen(
            &dir.join("out"),
            &[
                "--archive",
                &archive,
                "--plan",
                "demo.yaml",
                "--sim-pace",
                "40",
            ],
        );
        let key = common::page_key(&at);
        let (status, body) = common::http(
            &at,
            "POST",
            "/station/start",
            &[("X-Meterproof-Key", key.as_str())],
            r#"{"plan":"demo.yaml","bench":"sim","serials":["PG-1","PG-2","PG-3","PG-4"],"operator":"op-21","lot":"L-SHARED"}"#,
        );
        assert_eq!(status, 202, "{}: {body}", store.label());
        let end = std::time::Instant::now() + std::time::Duration::from_secs(60);
        let state = loop {
            let (_, state) = common::http(&at, "GET", "/station/state", &[], "");
            let state: serde_json::Value = serde_json::from_str(&state).unwrap();
            if state["busy"] == false && state["closing"].is_string() {
                break state;
            }
            assert!(
                std::time::Instant::now() < end,
                "{}: {state}",
                store.label()
            );
            std::thread::sleep(std::time::Duration::from_millis(100));
        };
        assert!(
            state["closing"]
                .as_str()
                .unwrap()
                .starts_with("3 accepted, 1 rejected (position 2)"),
            "{}: {state}",
            store.label()
        );
        let (status, page) = common::http(&at, "GET", "/archive?q=PG-2", &[], "");
        assert_eq!(status, 200);
        assert!(
            page.contains("Unit PG-2: 1 test"),
            "{}: {page}",
            store.label()
        );
        assert!(page.contains("✘ REJECTED"), "{}: {page}", store.label());
        let (_, page) = common::http(&at, "GET", "/archive?q=L-SHARED", &[], "");
        assert!(page.contains("lot summary"), "{}: {page}", store.label());
        let (_, page) = common::http(&at, "GET", "/archive/verify", &[], "");
        assert!(
            page.contains("Every seal holds") && page.contains("4 unit records"),
            "{}: {page}",
            store.label()
        );
        let _ = child.kill();
        let _ = child.wait();
    });
}
