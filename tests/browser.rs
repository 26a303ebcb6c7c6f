//! The station screen as an operator uses it: the real pages of `meterproof serve`, driven in
//! headless Chromium (the distribution's package) through WebDriver (chromedriver, the
//! distribution's chromium-driver) with fantoccini. Four serials scanned (one twice by
//! mistake), a run on the simulated bench started and watched to its verdicts, a run whose
//! operator sets each load and types each reference reading answered dialog by dialog, the
//! units looked up in the archive view and their reports opened. The station view is
//! photographed at 1920×1080 and on a 1024×768 tablet into target/screens/ for a person to
//! look at. And the server's refusals: another Host, a request without the page's key, a
//! run from another machine, bad fields, a stale answer.
//!
//! Its own harness, so that it can say out loud when the browser is missing: without Chromium
//! and chromedriver it prints that the checks did not run and why, and fails when
//! MP_REQUIRE_BROWSER is set (`.ci/run` sets it, after installing both).

mod common;
use common::{bin, temp_dir};

use fantoccini::{Client, ClientBuilder, Locator};
use std::io::{BufRead, BufReader, Read, Write};
use std::net::TcpStream;
use std::path::{Path, PathBuf};
use std::process::{Child, Command, Stdio};
use std::time::{Duration, Instant};

fn main() {
    let missing: Vec<&str> = ["chromium", "chromedriver"]
        .into_iter()
        .filter(|tool| which(tool).is_none())
        .collect();
    if !missing.is_empty() {
        eprintln!(
            "\n*** browser checks NOT RUN: {} not found. Install them with `apt-get install chromium chromium-driver` (as root), or run `bash .ci/run`, which does. ***\n",
            missing.join(", ")
        );
        if std::env::var_os("MP_REQUIRE_BROWSER").is_some() {
            panic!("MP_REQUIRE_BROWSER is set and the browser checks cannot run");
        }
        return;
    }
    let dir = temp_dir("browser");
    // Ten times real time: a run of the demo takes about 4 s, long enough to watch it go.
    let server = Server::start(&dir, "127.0.0.1:0", "10", &[]);
    refusals(&server);
    let driver = Driver::start(&dir);
    let runtime = tokio::runtime::Builder::new_current_thread()
        .enable_all()
        .build()
        .unwrap();
    runtime.block_on(async {
        let client = driver.client(&dir).await;
        let outcome = async {
            let watched = watched_run(&client, &server).await;
            let typed = typed_run(&client, &server).await;
            look_up(&client, &server, &watched, &typed).await;
            stopped_run(&client, &dir).await;
            station_run(&client, &dir).await;
        };
        // The browser is closed however the checks end.
        let result =
            futures_util::FutureExt::catch_unwind(std::panic::AssertUnwindSafe(outcome)).await;
        let _ = client.close().await;
        if let Err(panic) = result {
            std::panic::resume_unwind(panic);
        }
    });
    let code = server.stop();
    // A stop signal ends the server with the status of an interrupted command.
    assert_eq!(code, Some(130), "the server's exit status after SIGTERM");
    signalled_run(&dir);
    println!(
        "browser checks: a watched run, a typed run, the archive view, a run stopped at the screen and continued at the terminal, a served station with typed references, a stop signal mid-run, the refusals; screenshots in {}",
        screens_dir().display()
    );
    let _ = std::fs::remove_dir_all(&dir);
}

fn which(tool: &str) -> Option<PathBuf> {
    std::env::var_os("PATH").and_then(|paths| {
        std::env::split_paths(&paths)
            .map(|p| p.join(tool))
            .find(|p| p.is_file())
    })
}

/// Where the screenshots go: target/screens/.
fn screens_dir() -> PathBuf {
    let d = Path::new(env!("CARGO_MANIFEST_DIR")).join("target/screens");
    std::fs::create_dir_all(&d).unwrap();
    d
}

/// `meterproof serve` on a free loopback port; stopped when dropped.
struct Server {
    child: Option<Child>,
    url: String,
    /// host:port
    authority: String,
    /// Its --out folder.
    out: PathBuf,
}

impl Server {
    /// A server whose simulated bench runs `pace` times faster than real time.
    fn start(dir: &Path, listen: &str, pace: &str, extra: &[&str]) -> Server {
        let mut child = bin()
            .args(["serve", "--listen", listen])
            .args(["--sim-pace", pace])
            .arg("--out")
            .arg(dir.join("out"))
            .args(if extra.contains(&"--plans") {
                &[][..]
            } else {
                &["--plan", "demo.yaml"][..]
            })
            .args(extra)
            .stdout(Stdio::piped())
            .stderr(Stdio::null())
            .spawn()
            .unwrap();
        let stdout = child.stdout.take().unwrap();
        let mut lines = BufReader::new(stdout).lines();
        let first = lines.next().expect("serve said nothing").unwrap();
        let start = first.find("http://").expect("an address") + "http://".len();
        let authority = first[start..].split('/').next().unwrap().to_string();
        // The rest of what it says is read off so that it never blocks on a full pipe.
        std::thread::spawn(move || for _ in lines {});
        Server {
            child: Some(child),
            url: format!("http://{authority}"),
            authority,
            out: dir.join("out"),
        }
    }

    /// Sends the stop signal and returns the exit status.
    fn stop(mut self) -> Option<i32> {
        let mut child = self.child.take()?;
        Command::new("kill")
            .args(["-TERM", &child.id().to_string()])
            .status()
            .unwrap();
        let end = Instant::now() + Duration::from_secs(30);
        while Instant::now() < end {
            if let Some(status) = child.try_wait().unwrap() {
                return status.code();
            }
            std::thread::sleep(Duration::from_millis(50));
        }
        let _ = child.kill();
        None
    }
}

impl Drop for Server {
    fn drop(&mut self) {
        if let Some(mut c) = self.child.take() {
            let _ = c.kill();
            let _ = c.wait();
        }
    }
}

/// chromedriver on a free port; stopped when dropped.
struct Driver {
    child: Child,
    port: u16,
}

impl Driver {
    fn start(dir: &Path) -> Driver {
        let port = free_port();
        let child = Command::new("chromedriver")
            .arg(format!("--port={port}"))
            .arg(format!(
                "--log-path={}",
                dir.join("chromedriver.log").display()
            ))
            .stdout(Stdio::null())
            .stderr(Stdio::null())
            .spawn()
            .unwrap();
        let end = Instant::now() + Duration::from_secs(20);
        while TcpStream::connect(("127.0.0.1", port)).is_err() {
            assert!(Instant::now() < end, "chromedriver did not start");
            std::thread::sleep(Duration::from_millis(50));
        }
        Driver { child, port }
    }

    async fn client(&self, dir: &Path) -> Client {
        let mut caps = serde_json::Map::new();
        caps.insert(
            "goog:chromeOptions".into(),
            serde_json::json!({
                "binary": which("chromium").unwrap(),
                "args": [
                    "--headless=new", "--no-sandbox", "--disable-gpu", "--disable-quic",
                    "--no-first-run", "--disable-background-networking",
                    "--disable-component-update", "--disable-sync",
                    "--window-size=1920,1080", "--hide-scrollbars",
                    format!("--user-data-dir={}", dir.join("chromium").display()),
                ],
            }),
        );
        ClientBuilder::new(hyper_util::client::legacy::connect::HttpConnector::new())
            .capabilities(caps)
            .connect(&format!("http://127.0.0.1:{}", self.port))
            .await
            .expect("a WebDriver session")
    }
}

impl Drop for Driver {
    fn drop(&mut self) {
        let _ = self.child.kill();
        let _ = self.child.wait();
    }
}

fn free_port() -> u16 {
    std::net::TcpListener::bind("127.0.0.1:0")
        .unwrap()
        .local_addr()
        .unwrap()
        .port()
}

/// Evaluates `script` (a JavaScript expression) in the page.
async fn js(client: &Client, script: &str) -> serde_json::Value {
    client
        .execute(&format!("return {script};"), vec![])
        .await
        .unwrap_or_else(|e| panic!("{script}: {e}"))
}

/// Waits until `script` is true in the page.
async fn until(client: &Client, script: &str, limit_s: u64) {
    let end = Instant::now() + Duration::from_secs(limit_s);
    loop {
        if js(client, script).await == serde_json::Value::Bool(true) {
            return;
        }
        if Instant::now() > end {
            let body = js(client, "document.body.innerText").await;
            panic!("waited {limit_s} s for {script}; the page shows:\n{body}");
        }
        tokio::time::sleep(Duration::from_millis(50)).await;
    }
}

async fn text_of(client: &Client, id: &str) -> String {
    client
        .find(Locator::Id(id))
        .await
        .unwrap_or_else(|e| panic!("#{id}: {e}"))
        .text()
        .await
        .unwrap()
}

/// The address the link at `css` points to.
async fn href_of(client: &Client, css: &str) -> String {
    client
        .find(Locator::Css(css))
        .await
        .unwrap_or_else(|e| panic!("{css}: {e}"))
        .attr("href")
        .await
        .unwrap()
        .unwrap_or_else(|| panic!("{css} has no href"))
}

/// Types `text` and Enter into the field `id`, as a barcode scanner does.
async fn scan(client: &Client, id: &str, text: &str) {
    let field = client.find(Locator::Id(id)).await.unwrap();
    field.clear().await.unwrap();
    field.send_keys(&format!("{text}\u{E007}")).await.unwrap();
}

async fn screenshot(client: &Client, name: &str) -> PathBuf {
    let png = client.screenshot().await.unwrap();
    let path = screens_dir().join(name);
    std::fs::write(&path, &png).unwrap();
    // The picture is the size asked for: PNG's width and height (ISO/IEC 15948, the IHDR
    // chunk, bytes 16..24, big-endian).
    assert_eq!(&png[1..4], b"PNG");
    path
}

/// Makes the page's viewport `width` × `height` (the window is bigger by the browser's own
/// frame, measured).
async fn viewport(client: &Client, width: u32, height: u32) {
    client.set_window_size(width, height).await.unwrap();
    let inner = js(client, "[window.innerWidth, window.innerHeight]").await;
    let (w, h) = (
        inner[0].as_u64().unwrap() as u32,
        inner[1].as_u64().unwrap() as u32,
    );
    client
        .set_window_size(2 * width - w, 2 * height - h)
        .await
        .unwrap();
    let inner = js(client, "[window.innerWidth, window.innerHeight]").await;
    assert_eq!(inner, serde_json::json!([width, height]), "the viewport");
}

/// The size of a PNG picture.
fn png_size(path: &Path) -> (u32, u32) {
    let bytes = std::fs::read(path).unwrap();
    let be = |i: usize| u32::from_be_bytes(bytes[i..i + 4].try_into().unwrap());
    (be(16), be(20))
}

/// Every verdict on the screen is whole on one line (a word broken over two lines is misread
/// from a distance) and inside its card.
async fn verdicts_fit(client: &Client) {
    let misfits = js(
        client,
        "[...document.querySelectorAll('#positions .unit')].filter(card => { const v = card.querySelector('.verdict .word'); if (!v) return false; const r = v.getBoundingClientRect(), c = card.getBoundingClientRect(); return r.height > 1.5 * parseFloat(getComputedStyle(v).fontSize) || r.right > c.right || r.left < c.left; }).map(card => card.id)",
    )
    .await;
    assert_eq!(misfits, serde_json::json!([]), "verdicts broken or cut");
}

/// What a finished run showed, for the archive view.
struct Shown {
    serials: Vec<String>,
    lot: String,
    run_id: String,
}

/// The simulated bench, watched: serials scanned (one twice by mistake, refused), the mains
/// caution before the start, the steps and readings as they come, the verdicts large.
async fn watched_run(client: &Client, server: &Server) -> Shown {
    open_station(client, &server.url, "sim").await;
    viewport(client, 1920, 1080).await;
    scan(client, "operator", "op-21").await;
    scan(client, "lot", "LOT-W1").await;
    let serials = ["WB-1001", "WB-1002", "WB-1003", "WB-1004"];
    scan(client, "serial-1", serials[0]).await;
    // The first unit scanned again into position 2: refused, the field kept for a new scan.
    scan(client, "serial-2", serials[0]).await;
    let error = text_of(client, "form-error").await;
    assert!(
        error.contains("WB-1001 is already in position 1"),
        "{error}"
    );
    assert_eq!(
        js(client, "document.activeElement.id").await,
        "serial-2",
        "the duplicate's field keeps the focus"
    );
    scan(client, "serial-2", serials[1]).await;
    assert_eq!(text_of(client, "form-error").await, "");
    assert_eq!(js(client, "document.activeElement.id").await, "serial-3");
    scan(client, "serial-3", serials[2]).await;
    scan(client, "serial-4", serials[3]).await;
    assert_eq!(
        js(client, "document.activeElement.id").await,
        "start",
        "after the last position, Start has the focus"
    );
    click(client, "start").await;
    // The mains caution comes before anything starts.
    until(client, "document.getElementById('caution-dialog').open", 5).await;
    let caution = text_of(client, "caution-dialog").await;
    assert!(caution.contains("CAUTION: mains voltage"), "{caution}");
    assert!(caution.contains("local electrical codes"), "{caution}");
    assert_eq!(
        js(client, "document.body.dataset.busy").await,
        "false",
        "nothing started before the caution was answered"
    );
    click(client, "caution-yes").await;
    // Live: a step under way with its time left, and readings arriving, before the end.
    until(
        client,
        "/Step \\d+ of \\d+/.test(document.getElementById('step-line').textContent) && /left/.test(document.getElementById('step-line').textContent)",
        30,
    )
    .await;
    until(
        client,
        "/[1-9]\\d* readings/.test(document.getElementById('position-1').textContent)",
        30,
    )
    .await;
    assert_eq!(js(client, "document.body.dataset.busy").await, "true");
    until(client, "document.body.dataset.busy === 'false'", 120).await;
    let closing = text_of(client, "closing").await;
    // The simulator's defect sits at position 2 with seed 1 (as in the terminal's demo).
    assert!(
        closing.starts_with("3 accepted, 1 rejected (position 2), 0 incomplete"),
        "{closing}"
    );
    for (position, word, shape) in [
        (1, "ACCEPTED", "✔"),
        (2, "REJECTED", "✘"),
        (3, "ACCEPTED", "✔"),
        (4, "ACCEPTED", "✔"),
    ] {
        let card = client
            .find(Locator::Id(&format!("position-{position}")))
            .await
            .unwrap();
        let class = card.attr("class").await.unwrap().unwrap();
        let verdict = card
            .find(Locator::Css(".verdict"))
            .await
            .unwrap()
            .text()
            .await
            .unwrap();
        assert!(
            verdict.contains(word) && verdict.contains(shape),
            "position {position}: {verdict}"
        );
        assert!(
            class.contains(&word.to_lowercase()),
            "position {position}: {class}"
        );
        // The verdict is read from a distance: its word at least 30 px high.
        let size = js(
            client,
            &format!(
                "parseFloat(getComputedStyle(document.querySelector('#position-{position} .verdict')).fontSize)"
            ),
        )
        .await;
        assert!(size.as_f64().unwrap() >= 30.0, "{size}");
    }
    // The rejected unit says why on its card.
    let second = text_of(client, "position-2").await;
    assert!(second.contains("outside"), "{second}");
    // Its card opens its report: the unit's HTML report, rendered from the archive.
    let report = href_of(client, "#position-2 a.report").await;
    let (status, html) = http(server, "GET", &report, &[], "");
    assert_eq!(status, 200, "{report}");
    assert!(
        html.contains("WB-1002") && html.contains("REJECTED"),
        "{report}"
    );
    let run_title = text_of(client, "run-title").await;
    let run_id = run_title
        .split_whitespace()
        .nth(1)
        .expect("a run id")
        .to_string();
    verdicts_fit(client).await;
    let shot = screenshot(client, "station-1920x1080.png").await;
    assert_eq!(png_size(&shot), (1920, 1080));
    Shown {
        serials: serials.iter().map(|s| s.to_string()).collect(),
        lot: "LOT-W1".into(),
        run_id,
    }
}

/// The typed flow on the simulated bench: each load confirmed, each reference reading typed
/// (one in a wrong unit, refused, then typed right), on a 1024×768 tablet.
async fn typed_run(client: &Client, server: &Server) -> Shown {
    open_station(client, &server.url, "sim-typed").await;
    viewport(client, 1024, 768).await;
    // The verdicts of the last run stay on the screen until the next start.
    let still = text_of(client, "closing").await;
    assert!(still.starts_with("3 accepted"), "{still}");
    scan(client, "lot", "LOT-T2").await;
    let serials = ["TB-201", "TB-202", "TB-203", "TB-204"];
    click(client, "clear").await;
    for (i, s) in serials.iter().enumerate() {
        scan(client, &format!("serial-{}", i + 1), s).await;
    }
    start(client).await;
    let mut loads = 0;
    let mut readings = 0;
    let mut refused_once = false;
    let mut reloaded = false;
    let mut photographed = false;
    let end = Instant::now() + Duration::from_secs(240);
    loop {
        assert!(Instant::now() < end, "the typed run did not end");
        let state = js(
            client,
            "[document.body.dataset.busy, document.getElementById('prompt').open]",
        )
        .await;
        if state[0] == "false" && state[1] == false {
            break;
        }
        if state[1] != true {
            tokio::time::sleep(Duration::from_millis(50)).await;
            continue;
        }
        let kind = text_of(client, "prompt-kind").await;
        let question = text_of(client, "prompt-text").await;
        if kind.eq_ignore_ascii_case("Set the load") {
            assert!(question.starts_with("Set the load to "), "{question}");
            if !photographed {
                let shot = screenshot(client, "station-tablet-1024x768-prompt.png").await;
                assert_eq!(png_size(&shot), (1024, 768));
                photographed = true;
            }
            loads += 1;
            match loads {
                // The last step's load: an abort asked for, with its reason, then declined at
                // its confirmation; the load is asked for again.
                5 => {
                    click_button(client, "Abort the run…").await;
                    reason(client, "end of shift").await;
                    click_button(client, "Abort the run…").await;
                    until(
                        client,
                        "document.getElementById('prompt').open && /Abort the run \\(end of shift\\)\\?/.test(document.getElementById('prompt-text').textContent)",
                        10,
                    )
                    .await;
                    click_button(client, "No").await;
                }
                // Asked again: skipped, with its reason.
                6 => {
                    click_button(client, "Skip this step…").await;
                    reason(client, "lamp bank fuse blown").await;
                    click_button(client, "Skip this step…").await;
                }
                _ => click_button(client, "The load is set: go on").await,
            }
        } else if question.starts_with("Reference ") {
            let nominal = question
                .split("(nominal ")
                .nth(1)
                .and_then(|t| t.split(')').next())
                .unwrap_or_else(|| panic!("no nominal in {question}"))
                .to_string();
            if !reloaded {
                // A page reloaded (a tablet woken, a browser restarted) shows the question
                // still waiting, as it was.
                client.refresh().await.unwrap();
                until(client, "document.getElementById('prompt').open", 10).await;
                assert_eq!(text_of(client, "prompt-text").await, question);
                reloaded = true;
            }
            if !refused_once && nominal.ends_with(" A") {
                // A current typed as a voltage: refused, said in the dialog, asked again.
                answer(client, "500 mV").await;
                until(
                    client,
                    "document.getElementById('prompt').open && /refused/.test(document.getElementById('prompt-latest').textContent)",
                    10,
                )
                .await;
                let latest = text_of(client, "prompt-latest").await;
                assert!(latest.contains("\"500 mV\" is a voltage"), "{latest}");
                refused_once = true;
                continue;
            }
            readings += 1;
            answer(client, &nominal).await;
        } else if question.contains("Enter to record it") {
            answer(client, "").await;
        } else {
            panic!("an unexpected question: {kind}: {question}");
        }
        // The next question (or the end) replaces this one.
        tokio::time::sleep(Duration::from_millis(30)).await;
    }
    assert!(refused_once, "no current was asked for");
    assert_eq!(loads, 6, "five steps, the last asked twice");
    assert!(readings >= 4, "{readings} readings");
    // The last step (the one that rejects position 2) was skipped: no unit finished the plan,
    // so none is accepted or rejected, and each says why.
    let closing = text_of(client, "closing").await;
    assert!(
        closing.starts_with("0 accepted, 0 rejected, 4 incomplete"),
        "{closing}"
    );
    let first = text_of(client, "position-1").await;
    assert!(first.contains("INCOMPLETE"), "{first}");
    let run_id = text_of(client, "run-title")
        .await
        .split_whitespace()
        .nth(1)
        .unwrap()
        .to_string();
    let records: Vec<_> = common::records_in(&server.out)
        .into_iter()
        .filter(|r| r.run_id == run_id)
        .collect();
    assert_eq!(records.len(), 4);
    let step = records[0].steps.last().unwrap();
    assert_eq!(
        step.reason
            .as_deref()
            .map(|r| r.contains("lamp bank fuse blown")),
        Some(true),
        "{:?}",
        step.reason
    );
    let said = text_of(client, "said").await;
    assert!(said.contains("CAUTION: mains voltage"), "{said}");
    verdicts_fit(client).await;
    let shot = screenshot(client, "station-tablet-1024x768.png").await;
    assert_eq!(png_size(&shot), (1024, 768));
    let run_title = text_of(client, "run-title").await;
    viewport(client, 1920, 1080).await;
    Shown {
        serials: serials.iter().map(|s| s.to_string()).collect(),
        lot: "LOT-T2".into(),
        run_id: run_title.split_whitespace().nth(1).unwrap().to_string(),
    }
}

/// Opens the station view and chooses `bench`.
async fn open_station(client: &Client, url: &str, bench: &str) {
    client.goto(url).await.unwrap();
    until(client, "document.body.dataset.version !== undefined", 10).await;
    let choice = client.find(Locator::Id("bench")).await.unwrap();
    fantoccini::elements::Element::select_by_value(&choice, bench)
        .await
        .unwrap();
}

async fn click(client: &Client, id: &str) {
    client
        .find(Locator::Id(id))
        .await
        .unwrap_or_else(|e| panic!("#{id}: {e}"))
        .click()
        .await
        .unwrap();
}

/// Start, the mains caution answered, until the run is going.
async fn start(client: &Client) {
    click(client, "start").await;
    until(client, "document.getElementById('caution-dialog').open", 5).await;
    click(client, "caution-yes").await;
    until(client, "document.body.dataset.busy === 'true'", 10).await;
}

/// Types a reason into the dialog's field (shown by a skip or an abort button).
async fn reason(client: &Client, text: &str) {
    until(client, "!document.getElementById('prompt-input').hidden", 5).await;
    let field = client.find(Locator::Id("prompt-input")).await.unwrap();
    field.send_keys(text).await.unwrap();
}

async fn answer(client: &Client, text: &str) {
    let field = client.find(Locator::Id("prompt-input")).await.unwrap();
    field.clear().await.unwrap();
    field.send_keys(&format!("{text}\u{E007}")).await.unwrap();
}

async fn click_button(client: &Client, label: &str) {
    let buttons = client
        .find_all(Locator::Css("#prompt-buttons button"))
        .await
        .unwrap();
    for b in buttons {
        if b.text().await.unwrap() == label {
            b.click().await.unwrap();
            return;
        }
    }
    panic!("no button {label}");
}

/// The archive view afterwards: a unit's history with its report, a lot and its summary, a
/// run and its units, the seals.
async fn look_up(client: &Client, server: &Server, watched: &Shown, typed: &Shown) {
    let search = |q: &str| format!("{}/archive?q={}", server.url, urlencoded(q));
    // A serial: its one test, rejected, and its report.
    client.goto(&search(&watched.serials[1])).await.unwrap();
    let unit = text_of(client, "unit").await;
    assert!(unit.contains("Unit WB-1002: 1 test"), "{unit}");
    assert!(unit.contains("✘ REJECTED"), "{unit}");
    let report = href_of(client, "#unit a.report").await;
    client
        .goto(&format!("{}{report}", server.url))
        .await
        .unwrap();
    let page = js(client, "document.body.innerText").await;
    let page = page.as_str().unwrap();
    assert!(page.contains("WB-1002"), "{page}");
    assert!(page.contains("REJECTED"), "{page}");
    // A lot: its run, and the summary with a working link to every unit's report.
    client.goto(&search(&typed.lot)).await.unwrap();
    let lot = text_of(client, "lot").await;
    assert!(lot.contains(&typed.run_id), "{lot}");
    client
        .find(Locator::LinkText("lot summary"))
        .await
        .unwrap()
        .click()
        .await
        .unwrap();
    let summary = js(client, "document.body.innerText").await;
    assert!(summary.as_str().unwrap().contains("LOT-T2"), "{summary}");
    let links: Vec<String> = js(
        client,
        "[...document.querySelectorAll('a')].map(a => a.getAttribute('href')).filter(h => h && h.startsWith('/archive/report/'))",
    )
    .await
    .as_array()
    .unwrap()
    .iter()
    .map(|v| v.as_str().unwrap().to_string())
    .collect();
    assert_eq!(links.len(), 4, "{links:?}");
    for link in &links {
        let (status, body) = http(server, "GET", link, &[], "");
        assert_eq!(status, 200, "{link}: {body}");
        assert!(
            typed.serials.iter().any(|s| body.contains(s.as_str())),
            "{link}"
        );
    }
    // A run: its four units with their verdicts.
    client.goto(&search(&watched.run_id)).await.unwrap();
    let run = text_of(client, "found-run").await;
    for s in ["WB-1001", "WB-1002", "WB-1004"] {
        assert!(run.contains(s), "{run}");
    }
    assert_eq!(run.matches("✔ ACCEPTED").count(), 3, "{run}");
    // Nothing under a name the archive does not know: said.
    client.goto(&search("NO-SUCH-UNIT")).await.unwrap();
    let nothing = text_of(client, "nothing").await;
    assert!(nothing.contains("NO-SUCH-UNIT"), "{nothing}");
    // The seals hold after both runs.
    client
        .goto(&format!("{}/archive/verify", server.url))
        .await
        .unwrap();
    let seals = text_of(client, "seal-state").await;
    assert!(seals.contains("Every seal holds"), "{seals}");
    assert!(seals.contains("8 unit records"), "{seals}");
}

/// A run stopped with the Stop button: confirmed, the output off, no unit accepted, the
/// operator told how to continue; and the run continued from the terminal to its verdicts.
async fn stopped_run(client: &Client, dir: &Path) {
    let dir = dir.join("stopped");
    // A slow bench (four times real time), so that the stop comes mid-run.
    let server = Server::start(&dir, "127.0.0.1:0", "4", &[]);
    open_station(client, &server.url, "sim").await;
    scan(client, "operator", "op-21").await;
    // Markup in a serial is shown as text, never run (HTML escaping: the page sets text).
    let marked = "SB-<img src=x onerror=alert(1)>";
    for i in 1..=4 {
        let serial = if i == 3 {
            marked.to_string()
        } else {
            format!("SB-{i}")
        };
        scan(client, &format!("serial-{i}"), &serial).await;
    }
    start(client).await;
    until(
        client,
        "/Step 2 of/.test(document.getElementById('step-line').textContent)",
        60,
    )
    .await;
    click(client, "stop").await;
    // The stop is confirmed first (a stray click does not end a run).
    let question = client.get_alert_text().await.unwrap();
    assert!(question.contains("INCOMPLETE"), "{question}");
    client.accept_alert().await.unwrap();
    until(client, "document.body.dataset.busy === 'false'", 60).await;
    let cards = js(
        client,
        "[...document.querySelectorAll('#positions .unit')].map(c => c.className)",
    )
    .await;
    let cards: Vec<&str> = cards
        .as_array()
        .unwrap()
        .iter()
        .map(|c| c.as_str().unwrap())
        .collect();
    assert_eq!(cards.len(), 4);
    assert!(
        cards.iter().all(|c| !c.contains("accepted")),
        "a unit not finished shown accepted: {cards:?}"
    );
    assert!(
        cards.iter().filter(|c| c.contains("incomplete")).count() >= 3,
        "{cards:?}"
    );
    let third = text_of(client, "position-3").await;
    assert!(third.contains(marked), "{third}");
    assert_eq!(
        js(client, "document.querySelectorAll('#positions img').length").await,
        0,
        "markup in a serial became an element"
    );
    let said = text_of(client, "said").await;
    assert!(said.contains("the source output is off"), "{said}");
    let resume = said
        .lines()
        .find(|l| l.trim_start().starts_with("meterproof resume "))
        .unwrap_or_else(|| panic!("no resume command in {said}"));
    // The command the screen gives continues the run at the terminal.
    let args: Vec<&str> = resume.split_whitespace().skip(1).collect();
    let out = bin().args(&args).arg("--quiet").output().unwrap();
    let stdout = String::from_utf8_lossy(&out.stdout);
    assert_eq!(out.status.code(), Some(1), "{stdout}");
    assert!(
        stdout.contains("3 accepted, 1 rejected (position 2), 0 incomplete"),
        "{stdout}"
    );
    // The serial with markup, found in the archive view by its text, shown as text.
    client
        .goto(&format!("{}/archive?q={}", server.url, urlencoded(marked)))
        .await
        .unwrap();
    let unit = text_of(client, "unit").await;
    assert!(unit.contains(marked), "{unit}");
    assert_eq!(
        js(client, "document.querySelectorAll('main img').length").await,
        0
    );
    drop(server);
}

/// The stop signal while a run started from the page is going: the run is stopped and
/// recorded (every unit INCOMPLETE, none accepted), then the server ends with status 130.
fn signalled_run(dir: &Path) {
    let dir = dir.join("signalled");
    let server = Server::start(&dir, "127.0.0.1:0", "1", &[]);
    let key = page_key(&server);
    let (status, body) = http(
        &server,
        "POST",
        "/station/start",
        &[("X-Meterproof-Key", key.as_str())],
        r#"{"plan":"demo.yaml","bench":"sim","serials":["SG-1","SG-2","SG-3","SG-4"],"operator":"op-21"}"#,
    );
    assert_eq!(status, 202, "{body}");
    let end = Instant::now() + Duration::from_secs(30);
    loop {
        let (_, state) = http(&server, "GET", "/station/state", &[], "");
        let state: serde_json::Value = serde_json::from_str(&state).unwrap();
        if state["positions"][0]["readings"].as_u64().unwrap_or(0) > 0 {
            break;
        }
        assert!(Instant::now() < end, "no reading arrived: {state}");
        std::thread::sleep(Duration::from_millis(100));
    }
    assert_eq!(server.stop(), Some(130));
    let records = common::records_in(&dir.join("out"));
    assert_eq!(records.len(), 4);
    assert!(
        records
            .iter()
            .all(|r| r.verdict.status == meterproof::record::UnitStatus::Incomplete),
        "{:?}",
        records.iter().map(|r| r.verdict.status).collect::<Vec<_>>()
    );
}

/// A served station (simulated meters, a SCPI source and reference on pseudo-terminals, the
/// reference read by the operator), driven from the page: the bench-closed question answered
/// yes, each position scanned wrong and scanned again when its unit reports its own serial, each
/// reference reading typed as the reference meter shows it. The verdicts are the built-in
/// simulator's.
async fn station_run(client: &Client, dir: &Path) {
    let dir = dir.join("station");
    std::fs::create_dir_all(&dir).unwrap();
    let served = common::serve_at(&dir, "5", &[]);
    let station = common::typed_station(&dir, &served.station);
    let plans = dir.join("plans");
    std::fs::create_dir_all(&plans).unwrap();
    let plan_file = common::plan_without_energy(&plans);
    let plan = meterproof::plan::Plan::load(&plan_file).unwrap();
    let mut typed = common::typed_readings(&plan).into_iter();
    let plans_arg = plans.display().to_string();
    let station_arg = station.display().to_string();
    let server = Server::start(
        &dir,
        "127.0.0.1:0",
        "20",
        &[
            "--plans",
            &plans_arg,
            "--plan",
            "no-energy.yaml",
            "--station",
            &station_arg,
        ],
    );
    open_station(client, &server.url, "station-1").await;
    scan(client, "operator", "op-21").await;
    for i in 1..=4 {
        scan(client, &format!("serial-{i}"), &format!("MISREAD-{i}")).await;
    }
    start(client).await;
    let (mut closed, mut rescanned, mut readings) = (0, Vec::new(), 0);
    let end = Instant::now() + Duration::from_secs(240);
    loop {
        assert!(Instant::now() < end, "the station run did not end");
        let state = js(
            client,
            "[document.body.dataset.busy, document.getElementById('prompt').open]",
        )
        .await;
        if state[0] == "false" && state[1] == false {
            break;
        }
        if state[1] != true {
            tokio::time::sleep(Duration::from_millis(50)).await;
            continue;
        }
        let question = text_of(client, "prompt-text").await;
        if question.contains("Is the bench closed") {
            closed += 1;
            click_button(client, "Yes").await;
        } else if question.contains("was scanned, but the unit there reports") {
            let reported = question
                .split("reports ")
                .nth(1)
                .and_then(|t| t.split('.').next())
                .unwrap()
                .to_string();
            rescanned.push(reported.clone());
            answer(client, &reported).await;
        } else if question.starts_with("Reference ") {
            readings += 1;
            answer(client, &typed.next().expect("a reading left to type")).await;
        } else if question.contains("Enter to record it") {
            answer(client, "").await;
        } else {
            panic!("an unexpected question: {question}");
        }
        tokio::time::sleep(Duration::from_millis(30)).await;
    }
    assert_eq!(closed, 1, "the bench-closed question, once");
    assert_eq!(rescanned.len(), 4, "{rescanned:?}");
    assert!(typed.next().is_none(), "every reading typed ({readings})");
    let closing = text_of(client, "closing").await;
    assert!(
        closing.starts_with("3 accepted, 1 rejected (position 2), 0 incomplete"),
        "{closing}"
    );
    // The cards carry the serials the units reported.
    for (i, serial) in rescanned.iter().enumerate() {
        let card = text_of(client, &format!("position-{}", i + 1)).await;
        assert!(card.contains(serial.as_str()), "{card}");
    }
    let said = text_of(client, "said").await;
    assert!(said.contains("CAUTION: mains voltage"), "{said}");
    let records = common::records_in(&dir.join("out"));
    assert_eq!(records[0].steps[1].references[0].reading.source, "operator");
    drop(server);
    drop(served);
}

fn urlencoded(text: &str) -> String {
    text.bytes()
        .map(|b| {
            if b.is_ascii_alphanumeric() || b"-_.~".contains(&b) {
                (b as char).to_string()
            } else {
                format!("%{b:02X}")
            }
        })
        .collect()
}

/// One request to `server` (see `common::http`).
fn http(
    server: &Server,
    method: &str,
    path: &str,
    headers: &[(&str, &str)],
    body: &str,
) -> (u16, String) {
    common::http(&server.authority, method, path, headers, body)
}

fn page_key(server: &Server) -> String {
    common::page_key(&server.authority)
}

/// What the server refuses, with where and what.
fn refusals(server: &Server) {
    // Another name for this machine (DNS rebinding): refused, every page.
    let (status, body) = http(server, "GET", "/", &[("Host", "bench.example:80")], "");
    assert_eq!(status, 421, "{body}");
    assert!(body.contains("answers to"), "{body}");
    // A request that changes something without the page's key (another site's form).
    let start = r#"{"plan":"demo.yaml","bench":"sim","serials":["A","B","C","D"],"operator":"x"}"#;
    let (status, body) = http(server, "POST", "/station/start", &[], start);
    assert_eq!(status, 403, "{body}");
    assert!(
        body.contains("did not come from a page of this server"),
        "{body}"
    );
    let key = page_key(server);
    let with_key = [("X-Meterproof-Key", key.as_str())];
    // Fields checked as the terminal checks them, before anything starts.
    for (form, said) in [
        (
            r#"{"plan":"../../etc/passwd","bench":"sim","serials":["A","B","C","D"],"operator":"x"}"#,
            "no plan \\\"../../etc/passwd\\\" is offered",
        ),
        (
            r#"{"plan":"demo.yaml","bench":"sim","serials":["A","B","A","D"],"operator":"x"}"#,
            "A is scanned in position 1 and in position 3",
        ),
        (
            r#"{"plan":"demo.yaml","bench":"sim","serials":["A","B","C"],"operator":"x"}"#,
            "the bench has 4 positions but 3 serial numbers were given",
        ),
        (
            r#"{"plan":"demo.yaml","bench":"sim","serials":["A","B\u001b[2J","C","D"],"operator":"x"}"#,
            "contains control characters",
        ),
        (
            r#"{"plan":"demo.yaml","bench":"sim","serials":["A","","C","D"],"operator":"x"}"#,
            "position 2 has no serial number",
        ),
        (
            r#"{"plan":"demo.yaml","bench":"sim","serials":["A","B","C","D"],"operator":" "}"#,
            "give the operator's id",
        ),
        (
            r#"{"plan":"demo.yaml","bench":"/dev/ttyUSB0","serials":["A","B","C","D"],"operator":"x"}"#,
            "no bench",
        ),
    ] {
        let (status, body) = http(server, "POST", "/station/start", &with_key, form);
        assert_eq!(status, 400, "{form}: {body}");
        assert!(body.contains(said), "{form}: {body}");
    }
    // An answer with no run going, or to a question not asked.
    let (status, body) = http(
        server,
        "POST",
        "/station/answer",
        &with_key,
        r#"{"prompt":7,"text":""}"#,
    );
    assert_eq!(status, 409, "{body}");
    // A report asked for by a path: the archive is asked, no file is read.
    let (status, _) = http(
        server,
        "GET",
        "/archive/report/..%2F..%2Fetc%2Fpasswd/1",
        &[],
        "",
    );
    assert_eq!(status, 404);
    // The pages say that nothing may be loaded from elsewhere.
    let mut stream = TcpStream::connect(&server.authority).unwrap();
    write!(
        stream,
        "GET / HTTP/1.0\r\nHost: {}\r\n\r\n",
        server.authority
    )
    .unwrap();
    let mut head = String::new();
    stream.read_to_string(&mut head).unwrap();
    assert!(
        head.to_lowercase()
            .contains("content-security-policy: default-src 'self'"),
        "{head}"
    );
    // From another machine (this machine's own network address stands for one): pages are
    // read, runs are not started without a token.
    if let Some(ip) = own_network_address() {
        let dir = temp_dir("browser-remote");
        let port = free_port();
        let token = "a-token-of-the-station-7f3e9a";
        std::fs::write(dir.join("token"), format!("{token}\n")).unwrap();
        let token_file = dir.join("token").display().to_string();
        let _remote = Server::start(
            &dir,
            &format!("0.0.0.0:{port}"),
            "20",
            &["--token-file", &token_file],
        );
        let other = Server {
            child: None,
            url: format!("http://{ip}:{port}"),
            authority: format!("{ip}:{port}"),
            out: PathBuf::new(),
        };
        let (status, _) = http(&other, "GET", "/archive", &[], "");
        assert_eq!(status, 200);
        let key = page_key(&other);
        let (status, body) = http(
            &other,
            "POST",
            "/station/start",
            &[("X-Meterproof-Key", key.as_str())],
            start,
        );
        assert_eq!(status, 403, "{body}");
        assert!(body.contains("give the station's token"), "{body}");
        let (status, body) = http(
            &other,
            "POST",
            "/station/start",
            &[
                ("X-Meterproof-Key", key.as_str()),
                ("X-Meterproof-Token", "a-token-of-the-station-7f3e9b"),
            ],
            start,
        );
        assert_eq!(status, 403, "a wrong token: {body}");
        let (status, body) = http(
            &other,
            "POST",
            "/station/start",
            &[
                ("X-Meterproof-Key", key.as_str()),
                ("X-Meterproof-Token", token),
            ],
            start,
        );
        assert_eq!(status, 202, "the station's token: {body}");
        // Without a token file, no token opens it.
        let dir = temp_dir("browser-remote-closed");
        let port = free_port();
        let _closed = Server::start(&dir, &format!("0.0.0.0:{port}"), "20", &[]);
        let other = Server {
            child: None,
            url: format!("http://{ip}:{port}"),
            authority: format!("{ip}:{port}"),
            out: PathBuf::new(),
        };
        let key = page_key(&other);
        let (status, body) = http(
            &other,
            "POST",
            "/station/start",
            &[
                ("X-Meterproof-Key", key.as_str()),
                ("X-Meterproof-Token", token),
            ],
            start,
        );
        assert_eq!(status, 403, "{body}");
        assert!(body.contains("at the bench's own machine"), "{body}");
    } else {
        eprintln!(
            "(no network address besides loopback here: the check from another machine did not run)"
        );
    }
}

/// An address of this machine other than loopback, if it has one (no packet is sent: a UDP
/// socket is only pointed at a documentation address, RFC 5737).
fn own_network_address() -> Option<std::net::IpAddr> {
    let socket = std::net::UdpSocket::bind("0.0.0.0:0").ok()?;
    socket.connect("192.0.2.1:9").ok()?;
    let ip = socket.local_addr().ok()?.ip();
    (!ip.is_loopback() && !ip.is_unspecified()).then_some(ip)
}
