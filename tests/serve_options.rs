//! `meterproof serve` refuses what it cannot serve before it listens, each refusal saying
//! where and what (exit status 2, as for every invalid argument).

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
