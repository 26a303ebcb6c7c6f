//! `meterproof serve`: the station screen in a browser, served by meterproof itself (pages,
//! style and script are in the binary; nothing is fetched from elsewhere). The station view
//! scans serials, starts a run of the same engine as `run`, shows it live and asks the
//! operator's questions as dialogs; the archive view looks units, lots and runs up.
//!
//! Who may do what: the server listens on the address it is given (loopback by default). A
//! page's requests that change anything carry the key the server put in the page, so that
//! another site open in the same browser cannot start a run; a run is started, answered or
//! stopped only from the machine the server runs on, unless a token is configured and given.

mod lookup;
mod pages;
mod station;

use super::*;
use axum::extract::{ConnectInfo, Path as UrlPath, Query, State};
use axum::http::{HeaderValue, Method, StatusCode, header};
use axum::response::sse::{Event as SseEvent, KeepAlive, Sse};
use axum::response::{Html, IntoResponse, Response};
use axum::routing::{get, post};
use axum::{Json, Router};
use serde::{Deserialize, Serialize};
use station::{Board, Going, Order, Setting};
use std::net::SocketAddr;

#[derive(clap::Args)]
pub(super) struct ServeArgs {
    /// The address to listen on. The default answers this machine only; give another address
    /// of this machine (or 0.0.0.0) only to show the screen elsewhere.
    #[arg(long, default_value = "127.0.0.1:8470")]
    listen: SocketAddr,
    /// Folder of the plans offered (every plan file in it).
    #[arg(long, default_value = "test-plans")]
    plans: PathBuf,
    /// The plan chosen when the page opens (a file name in the plans folder).
    #[arg(long, value_name = "NAME")]
    plan: Option<String>,
    /// A station file offered besides the simulated bench (repeat for several).
    #[arg(long, value_name = "FILE")]
    station: Vec<PathBuf>,
    /// Folder for records and reports; each run gets a subfolder named by its run id.
    #[arg(long)]
    out: PathBuf,
    /// The archive database (default: archive.sqlite in the --out folder), or a shared one
    /// (postgres://USER@HOST/DB).
    #[arg(long)]
    archive: Option<Location>,
    /// Positions of the simulated bench.
    #[arg(long, default_value_t = 4)]
    positions: usize,
    /// Seed of the simulated bench.
    #[arg(long, default_value_t = 1)]
    seed: u64,
    /// How fast the simulated bench's clock runs when its run is watched (bench seconds per
    /// real second).
    #[arg(long, default_value_t = 5.0)]
    sim_pace: f64,
    /// A file holding a token: with it, a run may also be started, answered and stopped from
    /// another machine that gives the token. Without it, only from this one.
    #[arg(long, value_name = "FILE")]
    token_file: Option<PathBuf>,
    /// Folder of templates that replace the embedded report templates, file by file.
    #[arg(long)]
    templates: Option<PathBuf>,
    /// The paper printed reports are laid out for.
    #[arg(long, value_enum, default_value_t = crate::report::Paper::A4)]
    paper: crate::report::Paper,
    /// Where the records go when the output folder cannot take them.
    #[arg(long, value_name = "DIR")]
    fallback: Option<PathBuf>,
}

/// A plan offered on the station view.
#[derive(Debug, Clone, Serialize)]
struct PlanChoice {
    /// The file's name in the plans folder: what the page sends back.
    name: String,
    label: String,
    #[serde(skip)]
    path: PathBuf,
}

/// A bench offered on the station view.
#[derive(Debug, Clone, Serialize)]
struct BenchChoice {
    key: String,
    label: String,
    positions: usize,
    /// The operator sets the load and types the reference's readings.
    typed: bool,
    #[serde(skip)]
    spec: BenchSpec,
}

/// Everything the handlers share.
struct App {
    board: Arc<Board>,
    setting: Arc<Setting>,
    plans_dir: PathBuf,
    benches: Vec<BenchChoice>,
    going: Mutex<Option<Going>>,
    /// The plan chosen when a page opens.
    first_plan: Option<String>,
    /// Put into every page; every request that changes something must carry it back.
    page_key: String,
    token: Option<String>,
    /// The Host headers this server answers to (none: any, when listening on every address).
    hosts: Option<Vec<String>>,
    listen: SocketAddr,
}

type Shared = Arc<App>;

pub(super) fn serve(args: &ServeArgs) -> Result<i32, CliError> {
    let templates = Templates::load(args.templates.as_deref())
        .map_err(|e| CliError::Usage(e.to_string()))?
        .with_paper(args.paper);
    if args.positions == 0 {
        return Err(CliError::Usage("--positions must be at least 1".into()));
    }
    if !(args.sim_pace.is_finite() && args.sim_pace > 0.0) {
        return Err(CliError::Usage(format!(
            "--sim-pace {}: give a number of bench seconds per real second above 0",
            args.sim_pace
        )));
    }
    if plan_files(&args.plans)?.is_empty() {
        return Err(CliError::Usage(format!(
            "--plans {}: no plan file (.yaml) in it",
            args.plans.display()
        )));
    }
    if let Some(name) = &args.plan
        && !plans(&args.plans).iter().any(|p| &p.name == name)
    {
        return Err(CliError::Usage(format!(
            "--plan {name}: no plan of this name in {} (give a file name there)",
            args.plans.display()
        )));
    }
    let (benches, named) = benches(args)?;
    let token = match &args.token_file {
        None => None,
        Some(path) => {
            let text = std::fs::read_to_string(path)
                .map_err(|e| CliError::Usage(format!("--token-file {}: {e}", path.display())))?;
            let token = text.trim().to_string();
            if token.chars().count() < 16 || token.chars().any(char::is_control) {
                return Err(CliError::Usage(format!(
                    "--token-file {}: the token must be one line of at least 16 characters",
                    path.display()
                )));
            }
            Some(token)
        }
    };
    std::fs::create_dir_all(&args.out)
        .map_err(|e| CliError::Run(format!("cannot create {}: {e}", args.out.display())))?;
    // The screen writes one archive: --archive, else the one the station files name (they
    // must agree), else the file beside the reports.
    let archive = match (&args.archive, named) {
        (Some(given), _) => given.clone(),
        (None, Some(named)) => named,
        (None, None) => Location::Sqlite(args.out.join("archive.sqlite")),
    };
    // The archive is opened (made, where new) now: a wrong address is said at once, not at
    // the first run.
    Archive::open_at(&archive).map_err(|e| CliError::Run(e.to_string()))?;
    let setting = Setting {
        out: args.out.clone(),
        archive,
        templates,
        fallback: fallback_dir(args.fallback.as_deref())?,
    };
    let runtime = tokio::runtime::Builder::new_multi_thread()
        .worker_threads(2)
        .enable_all()
        .build()
        .map_err(|e| CliError::Run(format!("cannot start the server: {e}")))?;
    let listener = runtime
        .block_on(tokio::net::TcpListener::bind(args.listen))
        .map_err(|e| CliError::Usage(format!("--listen {}: {e}", args.listen)))?;
    let listen = listener
        .local_addr()
        .map_err(|e| CliError::Run(e.to_string()))?;
    let app = Arc::new(App {
        board: Arc::new(Board::new()),
        setting: Arc::new(setting),
        plans_dir: args.plans.clone(),
        benches,
        going: Mutex::new(None),
        first_plan: args.plan.clone(),
        page_key: format!(
            "{:016x}{:016x}",
            rand::random::<u64>(),
            rand::random::<u64>()
        ),
        token,
        hosts: hosts(listen),
        listen,
    });
    out!(
        "{}",
        wrapped(
            &format!(
                "meterproof serves the station screen at http://{listen}/ (the archive: {}). Stop it with Ctrl-C.",
                app.setting.archive
            ),
            0
        )
    );
    if !listen.ip().is_loopback() {
        out!(
            "{}",
            wrapped(
                "The screen can be read from other machines on this network. Runs start from this machine only, unless --token-file is given.",
                0
            )
        );
    }
    eprintln!("{}", wrapped(MAINS_CAUTION, 0));
    let router = router(app.clone());
    let stopped = runtime.block_on(async move {
        let server = axum::serve(
            listener,
            router.into_make_service_with_connect_info::<SocketAddr>(),
        );
        tokio::select! {
            result = server => result.map(|_| false),
            _ = stop_signal() => Ok(true),
        }
    });
    // A run still going is stopped (the output off, what was taken recorded) before leaving.
    let going = lock(&app.going).take();
    if let Some(going) = going {
        going
            .interrupt
            .store(true, std::sync::atomic::Ordering::SeqCst);
        station::join(going, std::time::Duration::from_secs(120));
    }
    runtime.shutdown_timeout(std::time::Duration::from_secs(1));
    match stopped {
        Ok(true) => Ok(130),
        Ok(false) => Ok(0),
        Err(e) => Err(CliError::Run(format!("the server stopped: {e}"))),
    }
}

/// Resolves when the stop signal (Ctrl-C, SIGTERM) has come.
async fn stop_signal() {
    while !INTERRUPT.load(Ordering::SeqCst) {
        tokio::time::sleep(std::time::Duration::from_millis(100)).await;
    }
}

fn lock<T>(m: &Mutex<T>) -> std::sync::MutexGuard<'_, T> {
    m.lock().unwrap_or_else(|p| p.into_inner())
}

/// The Host headers a page may come with: the address listened on, and for loopback its
/// names; none (any) when listening on every address. A page from another name (a DNS name
/// pointed at this machine by someone else) is refused.
fn hosts(listen: SocketAddr) -> Option<Vec<String>> {
    if listen.ip().is_unspecified() {
        return None;
    }
    let port = listen.port();
    let mut hosts = vec![listen.to_string()];
    if listen.ip().is_loopback() {
        hosts.extend([
            format!("localhost:{port}"),
            format!("127.0.0.1:{port}"),
            format!("[::1]:{port}"),
        ]);
    }
    Some(hosts)
}

/// The plan files of the plans folder, by name.
fn plan_files(dir: &Path) -> Result<Vec<PathBuf>, CliError> {
    let entries = std::fs::read_dir(dir)
        .map_err(|e| CliError::Usage(format!("--plans {}: {e}", dir.display())))?;
    let mut files: Vec<PathBuf> = entries
        .filter_map(Result::ok)
        .map(|e| e.path())
        .filter(|p| p.is_file() && p.extension().is_some_and(|x| x == "yaml" || x == "yml"))
        .collect();
    files.sort();
    Ok(files)
}

/// The plans the folder holds now (a file that is not a plan, a station file say, is left
/// out).
fn plans(dir: &Path) -> Vec<PlanChoice> {
    plan_files(dir)
        .unwrap_or_default()
        .into_iter()
        .filter_map(|path| {
            let plan = Plan::load(&path).ok()?;
            let name = path.file_name()?.to_string_lossy().into_owned();
            Some(PlanChoice {
                label: format!("{} ({name})", plan_label(&plan)),
                name,
                path,
            })
        })
        .collect()
}

/// A plan as the screen names it: id, revision and title.
fn plan_label(plan: &Plan) -> String {
    format!(
        "{} rev {}{}",
        plan.id,
        plan.revision,
        plan.title
            .as_deref()
            .map(|t| format!(": {t}"))
            .unwrap_or_default()
    )
}

/// The simulated bench, the same with the operator at the load and the reference, and each
/// station file given; and the archive the station files name, if they name one.
fn benches(args: &ServeArgs) -> Result<(Vec<BenchChoice>, Option<Location>), CliError> {
    let n = args.positions;
    let mut benches = vec![
        BenchChoice {
            key: "sim".into(),
            label: format!("Simulated bench, {n} positions"),
            positions: n,
            typed: false,
            spec: BenchSpec::Sim {
                seed: args.seed,
                positions: n,
                serials: None,
                ask: false,
                firmware: None,
                pace: Some(args.sim_pace),
            },
        },
        BenchChoice {
            key: "sim-typed".into(),
            label: format!(
                "Simulated bench, {n} positions: load set and reference readings typed by the operator"
            ),
            positions: n,
            typed: true,
            spec: BenchSpec::Sim {
                seed: args.seed,
                positions: n,
                serials: None,
                ask: true,
                firmware: None,
                pace: None,
            },
        },
    ];
    let mut named: Option<(Location, &Path)> = None;
    for (i, path) in args.station.iter().enumerate() {
        let station = Station::load(path).map_err(CliError::Plan)?;
        if station.journal.is_some() {
            return Err(CliError::Usage(format!(
                "--station {}: the station keeps a journal, which the station screen does not; run it from the terminal (meterproof run), or take journal: out of the station file and serve with --archive",
                path.display()
            )));
        }
        if let Some(a) = &station.archive {
            let here = Location::parse(a);
            match &named {
                Some((there, other)) if there.to_string() != here.to_string() => {
                    return Err(CliError::Usage(format!(
                        "--station {} names the archive {here}, --station {} the archive {there}: the station screen writes one archive (give --archive to choose it)",
                        path.display(),
                        other.display()
                    )));
                }
                Some(_) => {}
                None => named = Some((here, path)),
            }
        }
        let typed = matches!(station.source, crate::bench::station::SourceSpec::Manual)
            || matches!(
                station.reference.read,
                crate::bench::station::ReferenceRead::Operator
            );
        benches.push(BenchChoice {
            key: format!("station-{}", i + 1),
            label: format!(
                "Station {}{}, {}",
                station.id,
                if station.description.is_empty() {
                    String::new()
                } else {
                    format!(": {}", station.description)
                },
                counted(station.positions.len(), "position")
            ),
            positions: station.positions.len(),
            typed,
            spec: BenchSpec::Station {
                path: std::fs::canonicalize(path)
                    .unwrap_or_else(|_| path.clone())
                    .display()
                    .to_string(),
                serials: None,
            },
        });
    }
    Ok((benches, named.map(|(location, _)| location)))
}

fn router(app: Shared) -> Router {
    Router::new()
        .route("/", get(station_page))
        .route("/station/state", get(state))
        .route("/station/events", get(events))
        .route("/station/start", post(start))
        .route("/station/answer", post(answer))
        .route("/station/stop", post(stop))
        .route("/archive", get(archive_page))
        .route("/archive/report/{run}/{position}", get(report))
        .route("/archive/summary/{by}/{value}", get(summary))
        .route("/archive/verify", get(verify))
        .route("/screen.css", get(|| async { pages::asset("screen.css") }))
        .route("/station.js", get(|| async { pages::asset("station.js") }))
        .layer(axum::middleware::from_fn_with_state(app.clone(), guard))
        .with_state(app)
}

/// A refusal the page shows as it is.
fn refused(status: StatusCode, text: impl Into<String>) -> Response {
    (status, Json(serde_json::json!({ "error": text.into() }))).into_response()
}

/// Every request: the Host it names, and for a request that changes something the page's key
/// and (from another machine) the token. Every answer: no framing, no sniffing, nothing
/// loaded from elsewhere.
async fn guard(
    State(app): State<Shared>,
    ConnectInfo(peer): ConnectInfo<SocketAddr>,
    request: axum::extract::Request,
    next: axum::middleware::Next,
) -> Response {
    let headers = request.headers();
    if let Some(hosts) = &app.hosts {
        let host = headers
            .get(header::HOST)
            .and_then(|h| h.to_str().ok())
            .unwrap_or("");
        if !hosts.iter().any(|h| h.eq_ignore_ascii_case(host)) {
            return refused(
                StatusCode::MISDIRECTED_REQUEST,
                format!(
                    "this server answers to http://{}/ only, not to the host \"{}\"",
                    app.listen,
                    record::escape_controls(host)
                ),
            );
        }
    }
    if request.method() != Method::GET {
        let given = |name: &str| headers.get(name).and_then(|v| v.to_str().ok());
        if given("x-meterproof-key") != Some(app.page_key.as_str()) {
            return refused(
                StatusCode::FORBIDDEN,
                "this request did not come from a page of this server: reload the page",
            );
        }
        if !peer.ip().is_loopback() {
            match &app.token {
                None => {
                    return refused(
                        StatusCode::FORBIDDEN,
                        "runs are started and answered at the bench's own machine (the server has no --token-file)",
                    );
                }
                Some(token) if given("x-meterproof-token") != Some(token.as_str()) => {
                    return refused(
                        StatusCode::FORBIDDEN,
                        "this machine is not the bench's: give the station's token",
                    );
                }
                Some(_) => {}
            }
        }
    }
    let mut response = next.run(request).await;
    let h = response.headers_mut();
    h.insert(
        header::CONTENT_SECURITY_POLICY,
        HeaderValue::from_static(
            "default-src 'self'; script-src 'self'; style-src 'self' 'unsafe-inline'; img-src 'self' data:; connect-src 'self'; frame-ancestors 'none'; form-action 'self'; base-uri 'none'",
        ),
    );
    h.insert(
        header::X_CONTENT_TYPE_OPTIONS,
        HeaderValue::from_static("nosniff"),
    );
    h.insert(
        header::REFERRER_POLICY,
        HeaderValue::from_static("no-referrer"),
    );
    h.insert(header::CACHE_CONTROL, HeaderValue::from_static("no-store"));
    response
}

async fn station_page(
    State(app): State<Shared>,
    ConnectInfo(peer): ConnectInfo<SocketAddr>,
) -> Response {
    let plans = plans(&app.plans_dir);
    let setup = serde_json::json!({
        "plans": plans,
        "first_plan": app.first_plan,
        "benches": app.benches,
        "page_key": app.page_key,
        "token_needed": !peer.ip().is_loopback(),
        "remote_allowed": app.token.is_some(),
        "caution": crate::bench::operator::PROMPT_CAUTION,
    });
    pages::page(
        "station.html",
        minijinja::context! { setup => minijinja::value::Serde(&setup) },
    )
}

async fn state(State(app): State<Shared>) -> Json<station::Screen> {
    Json(app.board.snapshot())
}

/// The shortest time between two updates sent to a page: readings of 16 positions change the
/// screen hundreds of times a second, which a person cannot follow and a tablet's network
/// should not carry; the changes in between are sent as one.
const UPDATE_EVERY: std::time::Duration = std::time::Duration::from_millis(100);

/// The screen, whole, at once and at every change, at most one update per [`UPDATE_EVERY`].
async fn events(
    State(app): State<Shared>,
) -> Sse<impl futures_util::Stream<Item = Result<SseEvent, std::convert::Infallible>>> {
    let rx = app.board.watch();
    let start = (app, rx, None::<tokio::time::Instant>);
    let stream = futures_util::stream::unfold(start, |(app, mut rx, last)| async move {
        if let Some(last) = last {
            rx.changed().await.ok()?;
            tokio::time::sleep_until(last + UPDATE_EVERY).await;
        }
        rx.borrow_and_update();
        let event = SseEvent::default()
            .event("screen")
            .json_data(app.board.snapshot())
            .unwrap_or_else(|_| SseEvent::default().comment("unserialisable"));
        Some((Ok(event), (app, rx, Some(tokio::time::Instant::now()))))
    });
    Sse::new(stream).keep_alive(KeepAlive::default())
}

#[derive(Debug, Deserialize)]
struct StartForm {
    plan: String,
    bench: String,
    serials: Vec<String>,
    operator: String,
    #[serde(default)]
    lot: String,
}

/// The longest text a field takes (a serial, an operator, a lot, an answer).
const FIELD_MAX: usize = 200;

/// Text from the page, checked as the terminal checks what is typed: no control characters,
/// not too long.
fn field(what: &str, text: &str) -> Result<String, String> {
    let text = text.trim();
    if text.chars().any(char::is_control) {
        return Err(format!(
            "{what}: \"{}\" contains control characters",
            record::escape_controls(text)
        ));
    }
    if text.chars().count() > FIELD_MAX {
        return Err(format!("{what}: longer than {FIELD_MAX} characters"));
    }
    Ok(text.to_string())
}

/// A run asked for by the page, checked: a plan and a bench the server offers, a serial for
/// each position (none empty, none twice), an operator.
fn order(app: &App, form: &StartForm) -> Result<Order, String> {
    let plan = plans(&app.plans_dir)
        .into_iter()
        .find(|p| p.name == form.plan)
        .ok_or_else(|| {
            format!(
                "no plan \"{}\" is offered",
                record::escape_controls(&form.plan)
            )
        })?;
    let bench = app
        .benches
        .iter()
        .find(|b| b.key == form.bench)
        .ok_or_else(|| {
            format!(
                "no bench \"{}\" is offered",
                record::escape_controls(&form.bench)
            )
        })?;
    if form.serials.len() != bench.positions {
        return Err(format!(
            "the bench has {} but {} were given",
            counted(bench.positions, "position"),
            counted(form.serials.len(), "serial number")
        ));
    }
    let mut serials = Vec::new();
    for (i, s) in form.serials.iter().enumerate() {
        let s = field(&format!("the serial number of position {}", i + 1), s)?;
        if s.is_empty() {
            return Err(format!("position {} has no serial number: scan it", i + 1));
        }
        if let Some(j) = serials.iter().position(|x| *x == s) {
            return Err(format!(
                "{s} is scanned in position {} and in position {}: scan the unit in position {}",
                j + 1,
                i + 1,
                i + 1
            ));
        }
        serials.push(s);
    }
    let operator = field("the operator", &form.operator)?;
    if operator.is_empty() {
        return Err("give the operator's id".into());
    }
    let lot = field("the lot", &form.lot)?;
    let spec = match &bench.spec {
        BenchSpec::Sim {
            seed,
            positions,
            ask,
            firmware,
            pace,
            ..
        } => BenchSpec::Sim {
            seed: *seed,
            positions: *positions,
            serials: Some(serials.clone()),
            ask: *ask,
            firmware: firmware.clone(),
            pace: *pace,
        },
        station => station.clone(),
    };
    Ok(Order {
        plan: plan.path,
        bench: spec,
        bench_label: bench.label.clone(),
        serials,
        operator,
        lot: (!lot.is_empty()).then_some(lot),
    })
}

async fn start(State(app): State<Shared>, Json(form): Json<StartForm>) -> Response {
    let order = match order(&app, &form) {
        Ok(o) => o,
        Err(e) => return refused(StatusCode::BAD_REQUEST, e),
    };
    let mut going = lock(&app.going);
    if let Some(g) = going.as_ref()
        && !g.thread.is_finished()
    {
        return refused(
            StatusCode::CONFLICT,
            "a run is going on this bench: wait for its verdicts",
        );
    }
    *going = Some(station::start(
        order,
        app.setting.clone(),
        app.board.clone(),
    ));
    (
        StatusCode::ACCEPTED,
        Json(serde_json::json!({ "started": true })),
    )
        .into_response()
}

#[derive(Debug, Deserialize)]
struct AnswerForm {
    prompt: u64,
    #[serde(default)]
    text: String,
}

async fn answer(State(app): State<Shared>, Json(form): Json<AnswerForm>) -> Response {
    let text = match field("the answer", &form.text) {
        Ok(t) => t,
        Err(e) => return refused(StatusCode::BAD_REQUEST, e),
    };
    let going = lock(&app.going);
    let Some(going) = going.as_ref() else {
        return refused(StatusCode::CONFLICT, "no run is going");
    };
    // The question is taken off the screen as its answer is sent: a second answer to it (a
    // double click, a second page) is refused rather than read as the next question's.
    let current = app.board.change(|s| match &s.prompt {
        Some(p) if p.id == form.prompt => s.prompt.take().is_some(),
        _ => false,
    });
    if !current {
        return refused(
            StatusCode::CONFLICT,
            "that question was already answered or is no longer asked",
        );
    }
    if going.answers.send(text).is_err() {
        return refused(StatusCode::CONFLICT, "the run has ended");
    }
    Json(serde_json::json!({ "answered": form.prompt })).into_response()
}

async fn stop(State(app): State<Shared>) -> Response {
    let going = lock(&app.going);
    match going.as_ref() {
        Some(g) if !g.thread.is_finished() => {
            g.interrupt.store(true, Ordering::SeqCst);
            app.board.change(|s| {
                s.said.push(
                    "Stop asked at the screen: the output goes off, what was taken is recorded."
                        .into(),
                )
            });
            Json(serde_json::json!({ "stopping": true })).into_response()
        }
        _ => refused(StatusCode::CONFLICT, "no run is going"),
    }
}

#[derive(Debug, Deserialize)]
struct SearchQuery {
    #[serde(default)]
    q: String,
}

/// Runs a read of the archive off the server's threads.
async fn reading<T: Send + 'static>(
    app: &Shared,
    f: impl FnOnce(&Archive, &Setting) -> Result<T, CliError> + Send + 'static,
) -> Result<T, Response> {
    let setting = app.setting.clone();
    tokio::task::spawn_blocking(move || {
        let archive = Archive::open_read_only_at(&setting.archive)
            .map_err(|e| CliError::Run(e.to_string()))?;
        f(&archive, &setting)
    })
    .await
    .map_err(|_| refused(StatusCode::INTERNAL_SERVER_ERROR, "the archive read failed"))?
    .map_err(|e| {
        pages::page(
            "message.html",
            minijinja::context! { title => "The archive could not be read", text => e.to_string() },
        )
    })
}

async fn archive_page(State(app): State<Shared>, Query(q): Query<SearchQuery>) -> Response {
    let query = match field("the search", &q.q) {
        Ok(q) => q,
        Err(e) => {
            return pages::page(
                "message.html",
                minijinja::context! { title => "Not searched", text => e },
            );
        }
    };
    match reading(&app, move |archive, _| lookup::search(archive, &query)).await {
        Ok(found) => pages::page(
            "archive.html",
            minijinja::context! { found => minijinja::value::Serde(&found), archive => app.setting.archive.to_string() },
        ),
        Err(r) => r,
    }
}

async fn report(
    State(app): State<Shared>,
    UrlPath((run, position)): UrlPath<(String, usize)>,
) -> Response {
    let run_shown = run.clone();
    match reading(&app, move |archive, setting| {
        lookup::unit_report(archive, &setting.templates, &run, position)
    })
    .await
    {
        Ok(Some(html)) => Html(html).into_response(),
        Ok(None) => not_found(&format!(
            "no unit in position {position} of run {run_shown}"
        )),
        Err(r) => r,
    }
}

async fn summary(
    State(app): State<Shared>,
    UrlPath((by, value)): UrlPath<(String, String)>,
) -> Response {
    let what = format!("{by} {value}");
    match reading(&app, move |archive, setting| {
        lookup::summary(archive, &setting.templates, &by, &value)
    })
    .await
    {
        Ok(Some(html)) => Html(html).into_response(),
        Ok(None) => not_found(&format!("no unit records with {what}")),
        Err(r) => r,
    }
}

async fn verify(State(app): State<Shared>) -> Response {
    match reading(&app, |archive, _| lookup::seals(archive)).await {
        Ok(seals) => pages::page(
            "verify.html",
            minijinja::context! { seals => minijinja::value::Serde(&seals), archive => app.setting.archive.to_string() },
        ),
        Err(r) => r,
    }
}

fn not_found(text: &str) -> Response {
    let mut r = pages::page(
        "message.html",
        minijinja::context! { title => "Not in the archive", text => text },
    );
    *r.status_mut() = StatusCode::NOT_FOUND;
    r
}

#[cfg(test)]
mod tests {
    use super::*;
    use proptest::prelude::*;

    /// Loopback listens answer to their own names only; every address, to any name.
    #[test]
    fn the_hosts_a_page_may_name() {
        let local = hosts_of("127.0.0.1:8470");
        assert!(local.contains(&"localhost:8470".to_string()));
        assert!(local.contains(&"127.0.0.1:8470".to_string()));
        assert!(!local.iter().any(|h| h.starts_with("bench.example")));
        let lan = hosts_of("192.0.2.7:9000");
        assert_eq!(lan, vec!["192.0.2.7:9000".to_string()]);
        assert_eq!(hosts("0.0.0.0:8470".parse().unwrap()), None);
    }

    fn hosts_of(addr: &str) -> Vec<String> {
        hosts(addr.parse().unwrap()).unwrap()
    }

    #[test]
    fn fields_are_checked_as_typed_text_is() {
        assert_eq!(field("x", "  TM-1 ").unwrap(), "TM-1");
        assert!(
            field("the serial", "A\u{1b}[2J")
                .unwrap_err()
                .contains("contains control characters")
        );
        assert!(field("x", &"a".repeat(201)).unwrap_err().contains("longer"));
        assert_eq!(field("x", &"é".repeat(200)).unwrap().chars().count(), 200);
    }

    proptest! {
        /// Whatever the page sends, what is taken has no control character, is trimmed and
        /// holds at most FIELD_MAX characters; what is refused says why.
        #[test]
        fn a_field_taken_is_clean(text in "\\PC{0,250}|[\\x00-\\x1f\\x7f a-z]{0,20}") {
            match field("f", &text) {
                Ok(t) => {
                    prop_assert!(!t.chars().any(char::is_control));
                    prop_assert_eq!(t.trim(), t.as_str());
                    prop_assert!(t.chars().count() <= FIELD_MAX);
                }
                Err(e) => prop_assert!(e.starts_with("f: "), "{}", e),
            }
        }
    }
}
