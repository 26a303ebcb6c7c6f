//! The operator at the bench: a console that asks and reads answers, a load source the operator
//! sets by hand, and reference readings typed from a true-RMS meter.
//!
//! Answers are read line by line on a thread of their own, so that Ctrl-C is noticed at once
//! even while a prompt waits; a barcode scanner types its text and Enter like a keyboard.

use super::{BenchError, LoadSource, ReferenceMeter, ReferenceReading, ReferenceRequest};
use crate::plan::Load;
use crate::plan::units::{self, DecimalSeparator};
use serde::{Deserialize, Serialize};
use std::io::{BufRead, Write};
use std::sync::atomic::{AtomicBool, Ordering};
use std::sync::mpsc::{Receiver, RecvTimeoutError, channel};
use std::sync::{Arc, Mutex};
use std::time::Duration;

/// Shown once per run, before the first prompt that asks for a change of load, wrapped to fit
/// an 80-column terminal at word boundaries.
pub const PROMPT_CAUTION: &str = "CAUTION: mains voltage. Qualified people only; de-energise before touching\n\
                                  wiring, keep terminals enclosed, follow local electrical codes.";

/// Why a prompt got no answer.
#[derive(Debug, Clone, PartialEq, thiserror::Error)]
pub enum Interrupted {
    #[error("interrupted (stop signal)")]
    Signal,
    #[error("the input ended")]
    EndOfInput,
}

/// What else a front end draws on the operator's screen (a progress bar). It steps aside
/// while the console shows a line or waits for an answer, so that no prompt is ever hidden or
/// drawn over.
pub trait Screen: Send + Sync {
    /// Runs `f` with the screen's own drawing cleared and paused, and draws it again after.
    fn aside(&self, f: &mut dyn FnMut());
}

/// What a question asks for, so that a front end with buttons can offer the right ones. The
/// answer is a line of text whatever the kind: the console reads it the same way.
#[derive(Debug, Clone, Copy, PartialEq, Eq, Serialize)]
#[serde(rename_all = "snake_case")]
pub enum Ask {
    /// Any text: a serial number, a reason.
    Text,
    /// Set a load: Enter goes on, `skip REASON` or `abort REASON`.
    Load,
    /// A reading of the reference meter, with its unit.
    Reading,
    /// `yes` does it; anything else does not.
    Confirm,
}

/// Where a console's words go when they do not go to the terminal: a front end of its own (a
/// browser page), which shows each question until it is answered.
pub trait Speaker: Send + Sync {
    /// A line for the operator.
    fn say(&self, text: &str);
    /// A question, waiting for its answer.
    fn ask(&self, kind: Ask, prompt: &str);
    /// The question is answered (or given up): it goes from the screen.
    fn answered(&self);
}

/// Prompts on standard error, or on a front end's [`Speaker`]; answers from standard input, a
/// front end, or any line source (for tests).
pub struct Console {
    lines: Receiver<String>,
    interrupt: Arc<AtomicBool>,
    screen: Option<Arc<dyn Screen>>,
    speaker: Option<Arc<dyn Speaker>>,
}

impl Console {
    /// A console on standard input, stopping when `interrupt` is set.
    pub fn stdin(interrupt: Arc<AtomicBool>) -> Console {
        let (tx, rx) = channel();
        std::thread::spawn(move || {
            let stdin = std::io::stdin();
            for line in stdin.lock().lines() {
                let Ok(line) = line else { break };
                if tx.send(line).is_err() {
                    break;
                }
            }
        });
        Console {
            lines: rx,
            interrupt,
            screen: None,
            speaker: None,
        }
    }

    /// A console of a front end of its own: questions and lines go to `speaker`, answers come
    /// from `answers`, one line each; it stops when `interrupt` is set.
    pub fn remote(
        answers: Receiver<String>,
        interrupt: Arc<AtomicBool>,
        speaker: Arc<dyn Speaker>,
    ) -> Console {
        Console {
            lines: answers,
            interrupt,
            screen: None,
            speaker: Some(speaker),
        }
    }

    /// Has `screen` step aside whenever the console prints or waits.
    pub fn set_screen(&mut self, screen: Arc<dyn Screen>) {
        self.screen = Some(screen);
    }

    fn with_screen_aside<T>(&self, f: impl FnOnce() -> T) -> T {
        let Some(screen) = &self.screen else {
            return f();
        };
        let mut f = Some(f);
        let mut out = None;
        screen.aside(&mut || {
            if let Some(f) = f.take() {
                out = Some(f());
            }
        });
        out.expect("the screen ran the prompt")
    }

    /// Prints `prompt` and waits for one line.
    pub fn ask(&self, prompt: &str) -> Result<String, Interrupted> {
        self.ask_for(Ask::Text, prompt)
    }

    /// Asks for a `kind` of answer (shown on a front end's buttons; the terminal reads the
    /// prompt alone).
    pub fn ask_for(&self, kind: Ask, prompt: &str) -> Result<String, Interrupted> {
        match &self.speaker {
            Some(speaker) => {
                speaker.ask(kind, prompt);
                let answer = self.wait(|| {});
                speaker.answered();
                answer
            }
            None => self.with_screen_aside(|| {
                eprint!("{prompt}");
                let _ = std::io::stderr().flush();
                self.wait(|| eprintln!())
            }),
        }
    }

    /// The next line, or why there is none (`broken` ends the prompt's line).
    fn wait(&self, broken: impl Fn()) -> Result<String, Interrupted> {
        loop {
            if self.interrupt.load(Ordering::SeqCst) {
                broken();
                return Err(Interrupted::Signal);
            }
            match self.lines.recv_timeout(Duration::from_millis(100)) {
                Ok(line) => return Ok(line.trim().to_string()),
                Err(RecvTimeoutError::Timeout) => {}
                Err(RecvTimeoutError::Disconnected) => {
                    broken();
                    return Err(Interrupted::EndOfInput);
                }
            }
        }
    }

    /// Prints a line for the operator.
    pub fn say(&self, text: &str) {
        match &self.speaker {
            Some(speaker) => speaker.say(text),
            None => self.with_screen_aside(|| eprintln!("{text}")),
        }
    }
}

/// A console shared by the parts of the bench that talk to the operator.
pub type SharedConsole = Arc<Mutex<Console>>;

/// Asked, before any load, when a unit reports another serial than the one scanned for its
/// position: the serial scanned again, or `None` to leave the unit out of the run.
pub trait Rescan: Send {
    fn rescan(&mut self, position: usize, scanned: &str, reported: &str) -> Option<String>;
}

/// The operator, asked at the console to scan a unit again.
pub struct ConsoleRescan(pub SharedConsole);

impl Rescan for ConsoleRescan {
    fn rescan(&mut self, position: usize, scanned: &str, reported: &str) -> Option<String> {
        let console = lock(&self.0);
        let answer = console
            .ask(&format!(
                "Position {position}: {scanned} was scanned, but the unit there reports {reported}. Scan it again (Enter leaves it out of the run): "
            ))
            .ok()?;
        (!answer.is_empty()).then_some(answer)
    }
}

/// The console, even when a thread that held it panicked (a prompt is still answerable).
pub fn lock(c: &SharedConsole) -> std::sync::MutexGuard<'_, Console> {
    c.lock().unwrap_or_else(|p| p.into_inner())
}

/// The reason of a skip or an abort typed without one (the console then asks for one).
const NO_REASON: &str = "no reason given";

/// What the operator answered at a step's load prompt: Enter (or anything else) goes on;
/// `skip REASON` skips the step; `abort REASON` ends the run.
fn step_answer(answer: &str) -> Result<(), BenchError> {
    let (word, rest) = answer
        .split_once(char::is_whitespace)
        .unwrap_or((answer, ""));
    let reason = match rest.trim() {
        "" => NO_REASON.to_string(),
        r => r.to_string(),
    };
    match word.to_lowercase().as_str() {
        "skip" => Err(BenchError::Skipped(reason)),
        "abort" => Err(BenchError::Aborted(reason)),
        _ => Ok(()),
    }
}

/// A load the operator sets by hand, possibly on top of a source that really applies it (the
/// simulator, so the flow can be practised without mains).
pub struct ManualSource {
    console: SharedConsole,
    inner: Option<Box<dyn LoadSource>>,
    /// The caution was shown: once per run is read; at every prompt it is not.
    cautioned: bool,
}

impl ManualSource {
    pub fn new(console: SharedConsole, inner: Option<Box<dyn LoadSource>>) -> ManualSource {
        ManualSource {
            console,
            inner,
            cautioned: false,
        }
    }
}

impl LoadSource for ManualSource {
    fn describe(&self) -> String {
        "load set by the operator".into()
    }

    fn apply(&mut self, load: &Load) -> Result<(), BenchError> {
        let console = lock(&self.console);
        if !self.cautioned {
            console.say(PROMPT_CAUTION);
            self.cautioned = true;
        }
        let interrupted = |e: Interrupted| BenchError::Aborted(e.to_string());
        let load_prompt = format!(
            "Set the load to {}. Press Enter when it is set (or type: skip REASON / abort REASON): ",
            load.describe()
        );
        let mut answer = console
            .ask_for(Ask::Load, &load_prompt)
            .map_err(interrupted)?;
        // A skip or an abort goes into the records with its reason: one is asked for until
        // given, and an abort, which ends the run, is confirmed.
        loop {
            match step_answer(&answer) {
                Ok(()) => break,
                Err(BenchError::Skipped(reason) | BenchError::Aborted(reason))
                    if reason == NO_REASON =>
                {
                    let word = answer
                        .split_whitespace()
                        .next()
                        .unwrap_or("")
                        .to_lowercase();
                    let reason = console
                        .ask(&format!("Why {word}? A reason is needed for the records: "))
                        .map_err(interrupted)?;
                    answer = format!("{word} {reason}");
                }
                Err(BenchError::Aborted(reason)) => {
                    let sure = console
                        .ask_for(Ask::Confirm, &format!(
                            "Abort the run ({reason})? The load goes off and the units not finished stay INCOMPLETE. Type yes to abort, Enter to go on: "
                        ))
                        .map_err(interrupted)?;
                    if sure.eq_ignore_ascii_case("yes") {
                        return Err(BenchError::Aborted(reason));
                    }
                    answer = console
                        .ask_for(Ask::Load, &load_prompt)
                        .map_err(interrupted)?;
                }
                Err(BenchError::Skipped(reason)) => {
                    console.say(&format!(
                        "  skipped: the step at {} is not run for any unit ({reason})",
                        load.describe()
                    ));
                    return Err(BenchError::Skipped(reason));
                }
                Err(e) => return Err(e),
            }
        }
        drop(console);
        match &mut self.inner {
            Some(inner) => inner.apply(load),
            None => Ok(()),
        }
    }

    fn off(&mut self) -> Result<(), BenchError> {
        lock(&self.console)
            .say("Switch the load off and de-energise the positions before removing the units.");
        match &mut self.inner {
            Some(inner) => inner.off(),
            None => Ok(()),
        }
    }
}

/// One thing the operator typed for a reading, and what became of it.
#[derive(Debug, Clone, PartialEq, Serialize, Deserialize)]
pub struct TypedEntry {
    /// Wall-clock time, ISO 8601.
    pub at: String,
    pub text: String,
    /// "refused: ...", "confirm", "corrected" or "accepted".
    pub outcome: String,
}

/// A typed value not recorded yet.
struct Pending {
    value: f64,
    text: String,
    /// Beyond the plausibility limit: it must be typed again to count.
    far: bool,
}

/// Reference readings typed by the operator from a reference meter.
pub struct TypedReference {
    console: SharedConsole,
    /// A reading further than this fraction from the step's nominal value must be confirmed.
    plausibility: f64,
}

impl TypedReference {
    pub fn new(console: SharedConsole, plausibility: f64) -> TypedReference {
        TypedReference {
            console,
            plausibility,
        }
    }
}

fn now() -> String {
    chrono::Local::now().to_rfc3339_opts(chrono::SecondsFormat::Millis, false)
}

/// An energy typed as the reference counter's two readings, `START to END` (each with its
/// unit): the energy of the window between them.
fn counter_span(text: &str, q: crate::plan::Quantity) -> Result<f64, String> {
    let (start, end) = text.split_once(" to ").expect("checked by the caller");
    let read = |t: &str| {
        units::parse_with(t, q.dimension(), DecimalSeparator::PointOrComma)
            .map_err(|e| e.to_string())
    };
    let (start, end) = (read(start)?, read(end)?);
    if end < start {
        return Err(format!(
            "the counter went backwards (from {} to {}): type both readings again",
            units::Display(start, q.dimension()),
            units::Display(end, q.dimension())
        ));
    }
    Ok(end - start)
}

impl ReferenceMeter for TypedReference {
    /// The cue to note the reference's energy counter: the window starts as this returns.
    fn window_starts(&mut self, _at_s: f64) -> Result<(), BenchError> {
        let console = lock(&self.console);
        console.say("  The energy window starts now: note the reference meter's energy counter.");
        console.say("  At the end type its two readings, as 1000 Wh to 1010.2 Wh, or the energy.");
        Ok(())
    }

    fn read(&mut self, request: &ReferenceRequest) -> Result<ReferenceReading, BenchError> {
        let q = request.quantity;
        let nominal = request.load.nominal(q, request.window.1 - request.window.0);
        let console = lock(&self.console);
        let mut entries = Vec::new();
        let abort = |e: Interrupted| BenchError::Aborted(e.to_string());
        // What was typed and not recorded yet: a plausible value waits for Enter, an
        // implausible one for the same value typed again; either may be replaced by another.
        let mut pending: Option<Pending> = None;
        let accepted = loop {
            let prompt = match &pending {
                None => format!(
                    "Reference {} for step {} (nominal {}): ",
                    q.name(),
                    request.step_id,
                    units::Display(nominal, q.dimension())
                ),
                Some(p) if p.far => format!(
                    "  again: type {} once more to confirm it, or type another value: ",
                    p.text
                ),
                Some(p) => format!("  {}: Enter to record it, or type it again: ", p.text),
            };
            let text = console.ask_for(Ask::Reading, &prompt).map_err(abort)?;
            if text.is_empty() {
                match pending.take() {
                    Some(p) if !p.far => {
                        entries.push(TypedEntry {
                            at: now(),
                            text: p.text.clone(),
                            outcome: "accepted".into(),
                        });
                        break (p.value, p.text);
                    }
                    // Enter does not confirm an implausible value: it must be typed again.
                    other => pending = other,
                }
                continue;
            }
            let parsed = if q.is_register() && text.contains(" to ") {
                counter_span(&text, q)
            } else {
                units::parse_with(&text, q.dimension(), DecimalSeparator::PointOrComma)
                    .map_err(|e| e.to_string())
            };
            match parsed {
                Err(e) => {
                    console.say(&format!("  refused: {e}"));
                    entries.push(TypedEntry {
                        at: now(),
                        text,
                        outcome: format!("refused: {e}"),
                    });
                }
                Ok(value) => {
                    if let Some(p) = pending.take() {
                        // The implausible value typed again: confirmed.
                        if p.far && value == p.value {
                            entries.push(TypedEntry {
                                at: now(),
                                text: text.clone(),
                                outcome: "accepted".into(),
                            });
                            break (value, text);
                        }
                        // Another value replaces the one not yet recorded: the old was a typo.
                        entries.push(TypedEntry {
                            at: now(),
                            text: p.text,
                            outcome: "corrected".into(),
                        });
                    }
                    console.say(&format!(
                        "  read as {}",
                        units::Display(value, q.dimension())
                    ));
                    let far =
                        nominal != 0.0 && ((value - nominal) / nominal).abs() > self.plausibility;
                    if far {
                        console.say(&format!(
                            "  {text} is {:.1} % from the nominal {}: type it again to confirm it, or enter another value",
                            (value - nominal) / nominal * 100.0,
                            units::Display(nominal, q.dimension())
                        ));
                        entries.push(TypedEntry {
                            at: now(),
                            text: text.clone(),
                            outcome: "confirm".into(),
                        });
                    }
                    pending = Some(Pending { value, text, far });
                }
            }
        };
        Ok(ReferenceReading {
            power_readings: Vec::new(),
            window_s: None,
            value: accepted.0,
            source: "operator".into(),
            taken_at_s: request.window.1,
            as_given: Some(accepted.1),
            entries,
        })
    }
}

#[cfg(test)]
mod tests {
    use super::*;

    /// A reading typed through a console fed `lines`, for `quantity` at `current` (230 V,
    /// power factor 1) over a window of `window_s`, the window's start announced first.
    fn typed_at(
        lines: &[&str],
        quantity: crate::plan::Quantity,
        current: f64,
        window_s: f64,
    ) -> ReferenceReading {
        let (tx, rx) = channel();
        for l in lines {
            tx.send(l.to_string()).unwrap();
        }
        drop(tx);
        let console = Arc::new(Mutex::new(Console {
            lines: rx,
            interrupt: Arc::new(AtomicBool::new(false)),
            screen: None,
            speaker: None,
        }));
        let mut reference = TypedReference::new(console, 0.10);
        let load = crate::plan::Load {
            voltage: 230.0,
            current,
            phase_deg: 0.0,
            frequency: 50.0,
        };
        reference.window_starts(0.0).unwrap();
        reference
            .read(&ReferenceRequest {
                step_id: "a-step",
                quantity,
                load: &load,
                window: (0.0, window_s),
            })
            .unwrap()
    }

    /// A typed current at 5 A nominal.
    fn typed(lines: &[&str]) -> ReferenceReading {
        typed_at(lines, crate::plan::Quantity::Current, 5.0, 4.0)
    }

    /// A typed energy over a 10 s window at 16 A, 230 V (nominal 10.222 Wh).
    fn typed_energy(lines: &[&str]) -> ReferenceReading {
        typed_at(lines, crate::plan::Quantity::ActiveEnergy, 16.0, 10.0)
    }

    /// The counter's two readings give the window's energy (the energy itself is still taken
    /// as before); a counter that went backwards is refused and both are asked again.
    #[test]
    fn a_typed_energy_from_the_counter_readings() {
        let span = typed_energy(&["1000 Wh to 1010.2 Wh", ""]);
        assert!((span.value - 10.2).abs() < 1e-9, "{}", span.value);
        assert_eq!(span.as_given.as_deref(), Some("1000 Wh to 1010.2 Wh"));
        let kwh = typed_energy(&["1,000 kWh to 1,0102 kWh", ""]);
        assert!((kwh.value - 10.2).abs() < 1e-9, "{}", kwh.value);
        let direct = typed_energy(&["10.2 Wh", ""]);
        assert!((direct.value - 10.2).abs() < 1e-12);
        let backwards = typed_energy(&["1010.2 Wh to 1000 Wh", "1000 Wh to 1010.2 Wh", ""]);
        assert!((backwards.value - 10.2).abs() < 1e-9);
        assert!(
            backwards.entries[0].outcome.contains("went backwards"),
            "{:?}",
            backwards.entries
        );
    }

    /// The plausibility limit at its edge (the plan's `reference_plausibility`, 10 % by
    /// default; our rule, common practice, no published source): 5.5 A against 5 A nominal is
    /// 10 % off and recorded with Enter; 5.51 A is beyond and taken only when typed again.
    #[test]
    fn the_plausibility_limit_at_its_edge() {
        let at_edge = typed(&["5.5 A", ""]);
        assert_eq!(at_edge.value, 5.5);
        assert!(at_edge.entries.iter().all(|e| e.outcome != "confirm"));
        let confirmed = typed(&["5.51 A", "5.51 A"]);
        assert_eq!(confirmed.value, 5.51);
        assert!(confirmed.entries.iter().any(|e| e.outcome == "confirm"));
    }

    /// At the confirmation prompt another value may be typed instead: it replaces the
    /// implausible one (kept in the entries as corrected) and is recorded with Enter; Enter
    /// alone never confirms an implausible value. Every entry is kept, in order.
    #[test]
    fn a_corrected_value_at_the_confirmation_prompt_is_taken() {
        let corrected = typed(&["5.51 A", "", "5,02 A", ""]);
        assert!((corrected.value - 5.02).abs() < 1e-12);
        assert_eq!(corrected.as_given.as_deref(), Some("5,02 A"));
        let outcomes: Vec<&str> = corrected
            .entries
            .iter()
            .map(|e| e.outcome.as_str())
            .collect();
        assert_eq!(outcomes, ["confirm", "corrected", "accepted"]);
    }

    /// A speaker that keeps what it was given.
    #[derive(Default)]
    struct Kept(Mutex<Vec<String>>);

    impl Speaker for Kept {
        fn say(&self, text: &str) {
            self.0.lock().unwrap().push(format!("say {text}"));
        }
        fn ask(&self, kind: Ask, prompt: &str) {
            self.0
                .lock()
                .unwrap()
                .push(format!("ask {kind:?} {prompt}"));
        }
        fn answered(&self) {
            self.0.lock().unwrap().push("answered".into());
        }
    }

    /// A console of a front end of its own reads the same answers the same way: a reading in
    /// the wrong unit refused, the right one recorded, each question asked with its kind and
    /// taken off the screen when answered; nothing goes to the terminal.
    #[test]
    fn a_remote_console_asks_its_speaker_and_reads_the_same_answers() {
        let (tx, rx) = channel();
        for l in ["500 mV", "5.01 A", ""] {
            tx.send(l.to_string()).unwrap();
        }
        let kept = Arc::new(Kept::default());
        let console = Arc::new(Mutex::new(Console::remote(
            rx,
            Arc::new(AtomicBool::new(false)),
            kept.clone(),
        )));
        let mut reference = TypedReference::new(console, 0.10);
        let load = crate::plan::Load {
            voltage: 230.0,
            current: 5.0,
            phase_deg: 0.0,
            frequency: 50.0,
        };
        let reading = reference
            .read(&ReferenceRequest {
                step_id: "a-step",
                quantity: crate::plan::Quantity::Current,
                load: &load,
                window: (0.0, 4.0),
            })
            .unwrap();
        assert_eq!(reading.value, 5.01);
        let outcomes: Vec<&str> = reading.entries.iter().map(|e| e.outcome.as_str()).collect();
        assert!(outcomes[0].starts_with("refused: "), "{outcomes:?}");
        assert_eq!(outcomes[1], "accepted");
        let kept = kept.0.lock().unwrap();
        assert!(
            kept[0].starts_with("ask Reading Reference current for step a-step"),
            "{kept:?}"
        );
        assert_eq!(kept[1], "answered");
        assert!(kept[2].starts_with("say   refused: "), "{kept:?}");
        assert_eq!(kept.iter().filter(|l| l.starts_with("ask")).count(), 3);
        assert_eq!(kept.iter().filter(|l| *l == "answered").count(), 3);
    }

    /// The stop flag ends a question waiting on a remote console, as Ctrl-C does at the
    /// terminal, and the question leaves the screen.
    #[test]
    fn a_stop_ends_a_remote_question() {
        let (_tx, rx) = channel::<String>();
        let stop = Arc::new(AtomicBool::new(true));
        let kept = Arc::new(Kept::default());
        let console = Console::remote(rx, stop, kept.clone());
        assert_eq!(
            console.ask_for(Ask::Load, "Set the load"),
            Err(Interrupted::Signal)
        );
        assert_eq!(kept.0.lock().unwrap().last().unwrap(), "answered");
    }

    #[test]
    fn skip_and_abort_carry_their_reasons() {
        assert_eq!(step_answer(""), Ok(()));
        assert_eq!(
            step_answer("skip lamp bank fuse blown"),
            Err(BenchError::Skipped("lamp bank fuse blown".into()))
        );
        assert_eq!(
            step_answer("abort end of shift"),
            Err(BenchError::Aborted("end of shift".into()))
        );
        assert_eq!(
            step_answer("abort"),
            Err(BenchError::Aborted("no reason given".into()))
        );
    }
}
