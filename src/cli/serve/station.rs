//! The station view's side of the server: what the screen shows of the bench (a snapshot that
//! every page receives whole, so that a page opened late or reloaded shows the same), and the
//! run itself, driven by the same engine as the terminal's `run` on a thread of its own. The
//! engine's events, the operator's questions and the readings arriving all change the snapshot;
//! the answers come back from the page as lines, read by the same console code as at the
//! terminal.

use super::super::*;
use crate::bench::operator::{Ask, Speaker};
use crate::exec::{ReadingKey, Recorder};
use crate::record::Sample;
use crate::record::StepRecord;
use serde::Serialize;
use std::sync::mpsc::Sender;
use std::time::{Duration, Instant};

/// Lines said to the operator kept on the screen (the newest last).
const SAID_KEPT: usize = 40;

/// What the station view shows, sent whole to every page at every change.
#[derive(Debug, Clone, Default, Serialize)]
pub(super) struct Screen {
    /// Counts the changes: a page knows it has the newest.
    pub(super) version: u64,
    /// A run is going (or being prepared): no other may start.
    pub(super) busy: bool,
    pub(super) run_id: Option<String>,
    pub(super) plan: Option<String>,
    pub(super) bench: Option<String>,
    pub(super) operator: Option<String>,
    pub(super) lot: Option<String>,
    pub(super) step: Option<StepShown>,
    pub(super) positions: Vec<PositionShown>,
    pub(super) prompt: Option<PromptShown>,
    pub(super) said: Vec<String>,
    /// The run's last line: the counts, and which positions to take off for what.
    pub(super) closing: Option<String>,
    /// Why the run did not start, or what went wrong at its end (the records are kept).
    pub(super) error: Option<String>,
    /// Where the run's records and reports are, once written.
    pub(super) written_to: Option<String>,
}

#[derive(Debug, Clone, Serialize)]
pub(super) struct StepShown {
    /// 1-based.
    pub(super) number: usize,
    pub(super) total: usize,
    pub(super) id: String,
    pub(super) load: String,
    /// Real seconds the step's settling and sampling take from `measuring_since`.
    pub(super) measuring_s: Option<f64>,
    /// Seconds left when the snapshot was made (the page counts down from it).
    pub(super) left_s: Option<f64>,
    #[serde(skip)]
    pub(super) measuring_since: Option<Instant>,
}

#[derive(Debug, Clone, Serialize)]
pub(super) struct PositionShown {
    pub(super) position: usize,
    pub(super) serial: String,
    pub(super) model: Option<String>,
    pub(super) firmware: Option<String>,
    /// "waiting", "testing", "refused" or "done".
    pub(super) state: &'static str,
    pub(super) steps_done: usize,
    pub(super) readings: u64,
    /// Checks outside their limits so far.
    pub(super) failed: usize,
    pub(super) verdict: Option<VerdictShown>,
    /// The unit report, rendered from the archive.
    pub(super) report: Option<String>,
}

#[derive(Debug, Clone, Serialize)]
pub(super) struct VerdictShown {
    /// accepted, rejected or incomplete.
    pub(super) status: UnitStatus,
    pub(super) word: &'static str,
    pub(super) symbol: &'static str,
    pub(super) reasons: Vec<String>,
}

#[derive(Debug, Clone, Serialize)]
pub(super) struct PromptShown {
    /// An answer names the question it answers: a late or doubled answer is refused.
    pub(super) id: u64,
    pub(super) kind: Ask,
    pub(super) text: String,
}

/// The screen and everyone watching it.
pub(super) struct Board {
    screen: Mutex<Screen>,
    changed: tokio::sync::watch::Sender<u64>,
    prompts: std::sync::atomic::AtomicU64,
}

impl Board {
    pub(super) fn new() -> Board {
        Board {
            screen: Mutex::new(Screen::default()),
            changed: tokio::sync::watch::channel(0).0,
            prompts: std::sync::atomic::AtomicU64::new(0),
        }
    }

    /// The screen as it is now (the step's time left counted to this moment).
    pub(super) fn snapshot(&self) -> Screen {
        let mut s = self.lock().clone();
        if let Some(step) = &mut s.step
            && let (Some(since), Some(total)) = (step.measuring_since, step.measuring_s)
        {
            step.left_s = Some((total - since.elapsed().as_secs_f64()).max(0.0));
        }
        s
    }

    pub(super) fn watch(&self) -> tokio::sync::watch::Receiver<u64> {
        self.changed.subscribe()
    }

    fn lock(&self) -> std::sync::MutexGuard<'_, Screen> {
        self.screen.lock().unwrap_or_else(|p| p.into_inner())
    }

    /// Changes the screen and tells every page.
    pub(super) fn change<T>(&self, f: impl FnOnce(&mut Screen) -> T) -> T {
        let (out, version) = {
            let mut s = self.lock();
            let out = f(&mut s);
            s.version += 1;
            (out, s.version)
        };
        self.changed.send_replace(version);
        out
    }

    fn say(&self, text: &str) {
        self.change(|s| {
            s.said.extend(text.lines().map(str::to_string));
            let over = s.said.len().saturating_sub(SAID_KEPT);
            s.said.drain(..over);
        });
    }
}

/// The page's side of the operator's console.
struct PageSpeaker(Arc<Board>);

impl Speaker for PageSpeaker {
    fn say(&self, text: &str) {
        self.0.say(text);
    }

    fn ask(&self, kind: Ask, prompt: &str) {
        let id = self
            .0
            .prompts
            .fetch_add(1, std::sync::atomic::Ordering::SeqCst)
            + 1;
        self.0.change(|s| {
            s.prompt = Some(PromptShown {
                id,
                kind,
                text: prompt.trim_end().to_string(),
            });
        });
    }

    fn answered(&self) {
        self.0.change(|s| s.prompt = None);
    }
}

/// The engine's events, onto the screen.
struct PageReporter(Arc<Board>);

impl Reporter for PageReporter {
    fn event(&mut self, event: &Event) {
        let board = &self.0;
        match event {
            Event::RunStarted { plan, .. } => {
                board.change(|s| s.plan = Some(super::plan_label(plan)))
            }
            Event::UnitIdentified { position, identity } => board.change(|s| {
                if let Some(p) = at(s, *position) {
                    p.serial = identity.serial.clone();
                    p.model = Some(identity.model.clone());
                    p.firmware = Some(identity.firmware.clone());
                    p.state = "testing";
                }
            }),
            Event::UnitRefused { position, reason } => board.change(|s| {
                if let Some(p) = at(s, *position) {
                    p.state = "refused";
                    p.verdict = Some(VerdictShown {
                        status: UnitStatus::Rejected,
                        word: UnitStatus::Rejected.word(),
                        symbol: UnitStatus::Rejected.symbol(),
                        reasons: vec![reason.to_string()],
                    });
                }
            }),
            Event::StepStarted { index, total, step } => board.change(|s| {
                s.step = Some(StepShown {
                    number: index + 1,
                    total: *total,
                    id: step.id.clone(),
                    load: step.load.describe(),
                    measuring_s: None,
                    left_s: None,
                    measuring_since: None,
                })
            }),
            Event::Measuring { real_s, .. } => board.change(|s| {
                if let Some(step) = &mut s.step {
                    step.measuring_s = Some(*real_s);
                    step.left_s = Some(*real_s);
                    step.measuring_since = Some(Instant::now());
                }
            }),
            Event::StepFinished { results, .. } => board.change(|s| {
                for (position, status, failed) in results {
                    if let Some(p) = at(s, *position) {
                        if *status == crate::record::StepStatus::Done {
                            p.steps_done += 1;
                        }
                        p.failed += failed;
                    }
                }
                if let Some(step) = &mut s.step {
                    step.left_s = Some(0.0);
                    step.measuring_since = None;
                }
            }),
            Event::RecordingFailed { what } => board.say(&format!(
                "RECORDING FAILED: {what}; no further load is applied"
            )),
            Event::StepSetAside { step, reason } => board.say(&format!(
                "STEP {} SET ASIDE for every unit: {reason}",
                step.id
            )),
            Event::RunFinished { records, .. } => board.change(|s| {
                for r in records.iter() {
                    if let Some(p) = at(s, r.position) {
                        p.state = "done";
                        p.serial = r.serial.clone();
                        p.verdict = Some(VerdictShown {
                            status: r.verdict.status,
                            word: r.verdict.status.word(),
                            symbol: r.verdict.status.symbol(),
                            reasons: r.verdict.reasons.clone(),
                        });
                    }
                }
                s.step = None;
            }),
        }
    }
}

fn at(s: &mut Screen, position: usize) -> Option<&mut PositionShown> {
    s.positions.iter_mut().find(|p| p.position == position)
}

/// The archive's recorder, with each reading counted on the screen as it arrives.
struct CountingRecorder<'a> {
    inner: RunRecorder<'a>,
    board: Arc<Board>,
}

impl Recorder for CountingRecorder<'_> {
    fn reading(&self, key: &ReadingKey, sample: Sample) {
        self.inner.reading(key, sample);
        self.board.change(|s| {
            if let Some(p) = at(s, key.position) {
                p.readings += 1;
            }
        });
    }
    fn step_finished(&self, step_index: usize, records: &[(usize, &StepRecord)]) {
        self.inner.step_finished(step_index, records);
    }
    fn unit_started(&self, record: &UnitRecord) {
        self.inner.unit_started(record);
    }
    fn units_finished(&self, records: &[UnitRecord]) {
        self.inner.units_finished(records);
    }
    fn failure(&self) -> Option<String> {
        self.inner.failure()
    }
}

/// A run asked for from the page, checked.
#[derive(Debug, Clone)]
pub(super) struct Order {
    pub(super) plan: PathBuf,
    pub(super) bench: BenchSpec,
    pub(super) bench_label: String,
    pub(super) serials: Vec<String>,
    pub(super) operator: String,
    pub(super) lot: Option<String>,
}

/// Where a served run writes, and how its reports look.
pub(super) struct Setting {
    pub(super) out: PathBuf,
    pub(super) archive: Location,
    pub(super) templates: Templates,
    pub(super) fallback: PathBuf,
}

/// The bench options of a run started from the page: its console is the page's, its stop the
/// page's stop button (and the stop signal), the caution said on the page.
struct PageOptions {
    console: SharedConsole,
    interrupt: Arc<AtomicBool>,
    board: Arc<Board>,
}

impl BenchOptions for PageOptions {
    fn quiet(&self) -> bool {
        false
    }
    fn allow_overdue_reference(&self) -> Option<&str> {
        None
    }
    fn unattended(&self) -> bool {
        false
    }
    fn console(&self) -> SharedConsole {
        self.console.clone()
    }
    fn interrupt(&self) -> Arc<AtomicBool> {
        self.interrupt.clone()
    }
    fn caution(&self) {
        self.board.say(crate::bench::operator::PROMPT_CAUTION);
    }
    fn scans_here(&self) -> bool {
        true
    }
}

/// A run going on its thread: its stop, and where the page's answers go.
pub(super) struct Going {
    pub(super) interrupt: Arc<AtomicBool>,
    pub(super) answers: Sender<String>,
    pub(super) thread: std::thread::JoinHandle<()>,
}

/// Starts `order` on a thread of its own; the screen is reset for it.
pub(super) fn start(order: Order, setting: Arc<Setting>, board: Arc<Board>) -> Going {
    board.change(|s| {
        *s = Screen {
            version: s.version,
            busy: true,
            bench: Some(order.bench_label.clone()),
            operator: Some(order.operator.clone()),
            lot: order.lot.clone(),
            positions: order
                .serials
                .iter()
                .enumerate()
                .map(|(i, serial)| PositionShown {
                    position: i + 1,
                    serial: serial.clone(),
                    model: None,
                    firmware: None,
                    state: "waiting",
                    steps_done: 0,
                    readings: 0,
                    failed: 0,
                    verdict: None,
                    report: None,
                })
                .collect(),
            ..Screen::default()
        }
    });
    let interrupt = Arc::new(AtomicBool::new(false));
    let (answers, lines) = std::sync::mpsc::channel();
    let console = Arc::new(Mutex::new(Console::remote(
        lines,
        interrupt.clone(),
        Arc::new(PageSpeaker(board.clone())),
    )));
    let options = PageOptions {
        console,
        interrupt: interrupt.clone(),
        board: board.clone(),
    };
    let thread = std::thread::spawn(move || {
        let outcome = std::panic::catch_unwind(std::panic::AssertUnwindSafe(|| {
            execute(&order, &setting, &options, &board)
        }));
        let error = match outcome {
            Ok(Ok(())) => None,
            Ok(Err(e)) => Some(e.to_string()),
            Err(_) => Some("the run ended with an internal error (the output is off)".into()),
        };
        board.change(|s| {
            s.busy = false;
            s.prompt = None;
            if error.is_some() {
                s.error = error;
            }
        });
    });
    Going {
        interrupt,
        answers,
        thread,
    }
}

/// The run, as `meterproof run` does it: every check before the first load, the engine, then
/// the archive, records and reports.
fn execute(
    order: &Order,
    setting: &Setting,
    options: &PageOptions,
    board: &Arc<Board>,
) -> Result<(), CliError> {
    let plan = Plan::load(&order.plan).map_err(CliError::Plan)?;
    let spec = match &order.bench {
        BenchSpec::Station { path, .. } => BenchSpec::Station {
            path: path.clone(),
            serials: Some(order.serials.clone()),
        },
        sim => sim.clone(),
    };
    let (mut bench, notes) = build_bench(&spec, &plan, options)?;
    let plan = plan_at_bench(plan, &bench)?;
    let ctx = RunContext {
        run_id: run::new_run_id(),
        operator: order.operator.clone(),
        lot: order.lot.clone(),
        tool_version: crate::VERSION.to_string(),
        notes,
    };
    board.change(|s| s.run_id = Some(ctx.run_id.clone()));
    let run_dir = run::run_folder(&setting.out, &ctx.run_id)?;
    let archive = Archive::open_at(&setting.archive).map_err(|e| CliError::Run(e.to_string()))?;
    let lock = lock_run(&setting.archive, &ctx.run_id)?;
    run::begin_in_archive(&archive, &plan, &ctx, &bench, &spec)?;
    let mut reporter = PageReporter(board.clone());
    let recorder = CountingRecorder {
        inner: RunRecorder::new(&archive, &ctx.run_id),
        board: board.clone(),
    };
    let records = exec::run_with(&plan, &mut bench, &ctx, &mut reporter, &recorder, None);
    let archived = finish_run(&archive, &ctx.run_id, &records);
    let mut anchors = Anchors::new();
    if let Ok(anchor) = &archived {
        anchors.insert(ctx.run_id.clone(), anchor.clone());
    }
    let (written, not_written) = write_or_keep(
        &run_dir,
        &records,
        &setting.templates,
        &anchors,
        &setting.fallback,
        &ctx.run_id,
    );
    let hint = resume_hint(
        &ctx.run_id,
        &resume_archive_args(None, None, &setting.archive),
        &setting.out,
        &records,
    );
    if hint.is_none() && archived.is_ok() {
        lock.finished();
    }
    board.change(|s| {
        for r in &records {
            if let Some(p) = at(s, r.position) {
                p.report = archived
                    .is_ok()
                    .then(|| super::lookup::report_link(&r.run_id, r.position));
            }
        }
        s.closing = Some(terminal::closing_line(&records));
        s.written_to = written.map(|_| run_dir.display().to_string());
        if let Some(h) = &hint {
            s.said.push(h.clone());
        }
    });
    match (archived, not_written) {
        (Err(e), _) | (Ok(_), Some(e)) => Err(e),
        (Ok(_), None) => Ok(()),
    }
}

/// Waits up to `limit` for a run's thread to end.
pub(super) fn join(going: Going, limit: Duration) {
    let end = Instant::now() + limit;
    while !going.thread.is_finished() && Instant::now() < end {
        std::thread::sleep(Duration::from_millis(50));
    }
    if going.thread.is_finished() {
        let _ = going.thread.join();
    }
}
