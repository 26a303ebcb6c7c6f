//! What the operator sees of a run on the terminal: the progress of each step as the engine's
//! events arrive, the verdicts at the end, and every text from outside made safe to print. A
//! front end like any other: it is fed the same events as the archive's recorder and a browser
//! would be.

use super::*;

/// Text from a device, a file or the archive made safe for a terminal: control characters
/// (escape sequences, NUL, newlines) are shown escaped, never sent to the screen.
pub(super) fn terminal_safe(text: &str) -> String {
    record::escape_controls(text)
}

/// Several lines made safe for a terminal, line by line (the line breaks kept).
pub(super) fn terminal_safe_lines(text: &str) -> String {
    text.split('\n')
        .map(terminal_safe)
        .collect::<Vec<_>>()
        .join("\n")
}

/// Files written for one unit.
pub(super) struct Written {
    pub(super) html: PathBuf,
}

pub(super) fn print_summary(records: &[UnitRecord], written: &Option<Vec<Written>>) {
    out!();
    out!("{:<4} {:<20} {:<12} report", "pos", "serial", "verdict");
    for (i, r) in records.iter().enumerate() {
        // The file's name: the folder is said once, on the run's last line.
        let report = match written.as_ref().and_then(|w| w.get(i)) {
            Some(w) => terminal_safe(&w.html.file_name().map_or_else(
                || w.html.display().to_string(),
                |f| f.to_string_lossy().into_owned(),
            )),
            None => "(not written)".to_string(),
        };
        out!(
            "{:<4} {:<20} {} {}",
            r.position,
            terminal_safe(&r.serial),
            verdict_mark(r.verdict.status, 12, false),
            report
        );
        for reason in &r.verdict.reasons {
            out!("{}", wrapped(&terminal_safe(reason), 7));
        }
    }
    out!("{}", wrapped(&closing_line(records), 0));
}

/// Columns the terminal output is laid out for: nothing printed wraps at 80.
pub(super) const WIDTH: usize = 80;

/// How every line the terminal shows is wrapped: at spaces only, never inside a word at its
/// hyphens (a date, a serial number, a file name stays whole).
pub(super) fn wrap_options(width: usize) -> textwrap::Options<'static> {
    textwrap::Options::new(width).word_splitter(textwrap::WordSplitter::NoHyphenation)
}

/// `text` wrapped at word boundaries to [`WIDTH`], every line indented by `indent` spaces.
pub(super) fn wrapped(text: &str, indent: usize) -> String {
    let pad = " ".repeat(indent);
    textwrap::fill(
        text,
        wrap_options(WIDTH)
            .initial_indent(&pad)
            .subsequent_indent(&pad),
    )
}

/// `text` cut to `width` characters, with … where something was cut.
pub(super) fn fitted(text: &str, width: usize) -> String {
    if text.chars().count() <= width {
        return text.to_string();
    }
    let mut cut: String = text.chars().take(width.saturating_sub(1)).collect();
    cut.push('…');
    cut
}

/// A verdict as its symbol and word, padded to `width`, in colour where the terminal shows
/// colour (not when NO_COLOR is set or the output is not a terminal); the symbol and the word
/// say it without the colour.
pub(super) fn verdict_mark(status: UnitStatus, width: usize, on_stderr: bool) -> String {
    let text = format!("{} {}", status.symbol(), status.word());
    let padded = format!("{text:<width$}");
    // NO_COLOR (no-color.org) wins over everything, CLICOLOR_FORCE included.
    if std::env::var_os("NO_COLOR").is_some_and(|v| !v.is_empty()) {
        return padded;
    }
    let style = match status {
        UnitStatus::Accepted => console::Style::new().green(),
        UnitStatus::Rejected => console::Style::new().red().bold(),
        UnitStatus::Incomplete => console::Style::new().yellow().bold(),
    };
    let style = if on_stderr { style.for_stderr() } else { style };
    style.apply_to(padded).to_string()
}

/// The run's last line: the counts, and which positions to take off the bench for what, so
/// that the operator need not read back through the table.
pub(super) fn closing_line(records: &[UnitRecord]) -> String {
    let count = |s: UnitStatus| records.iter().filter(|r| r.verdict.status == s).count();
    let positions = |s: UnitStatus| {
        let p: Vec<String> = records
            .iter()
            .filter(|r| r.verdict.status == s)
            .map(|r| r.position.to_string())
            .collect();
        match p.len() {
            0 => String::new(),
            1 => format!(" (position {})", p[0]),
            _ => format!(" (positions {})", p.join(", ")),
        }
    };
    format!(
        "{} accepted, {} rejected{}, {} incomplete{}",
        count(UnitStatus::Accepted),
        count(UnitStatus::Rejected),
        positions(UnitStatus::Rejected),
        count(UnitStatus::Incomplete),
        positions(UnitStatus::Incomplete)
    )
}

/// 3 when any unit is incomplete (the run did not complete for it), else 1 when any is
/// rejected, else 0.
pub(super) fn exit_status(records: &[UnitRecord]) -> i32 {
    let any = |s: UnitStatus| records.iter().any(|r| r.verdict.status == s);
    if any(UnitStatus::Incomplete) {
        3
    } else if any(UnitStatus::Rejected) {
        1
    } else {
        0
    }
}

/// The progress bar on screen now, if any, for the console to put aside while it prompts.
#[derive(Default)]
pub(super) struct BarSlot(Mutex<Option<indicatif::ProgressBar>>);

impl crate::bench::operator::Screen for BarSlot {
    fn aside(&self, f: &mut dyn FnMut()) {
        let bar = self.0.lock().unwrap_or_else(|p| p.into_inner()).clone();
        match bar {
            // Cleared and held still until `f` returns: the bar's ticker waits meanwhile.
            Some(bar) => bar.suspend(f),
            None => f(),
        }
    }
}

/// The one progress-bar slot of this process: the terminal reporter puts its bar there, the
/// operator's console puts it aside.
pub(super) fn bar_slot() -> Arc<BarSlot> {
    static SLOT: std::sync::OnceLock<Arc<BarSlot>> = std::sync::OnceLock::new();
    SLOT.get_or_init(Default::default).clone()
}

/// Progress on standard error, one line per step.
pub(super) struct TerminalReporter {
    quiet: bool,
    /// The bar of the step being measured, and the flag that stops its ticker.
    bar: Option<(indicatif::ProgressBar, Arc<AtomicBool>)>,
    slot: Arc<BarSlot>,
}

impl TerminalReporter {
    /// A reporter whose bar steps aside for the operator's console (both share
    /// [`bar_slot`]).
    pub(super) fn new(quiet: bool) -> TerminalReporter {
        TerminalReporter {
            quiet,
            bar: None,
            slot: bar_slot(),
        }
    }

    /// A bar with the time left while a step settles and samples; indicatif draws nothing
    /// when standard error is not a terminal.
    fn start_bar(&mut self, step: &crate::plan::Step, real_s: f64) {
        let bar = indicatif::ProgressBar::new((real_s * 1000.0) as u64);
        bar.set_style(
            indicatif::ProgressStyle::with_template("      {prefix} [{bar:30}] {msg}")
                .unwrap_or_else(|_| indicatif::ProgressStyle::default_bar())
                .progress_chars("=> "),
        );
        bar.set_prefix(step.id.clone());
        let stop = Arc::new(AtomicBool::new(false));
        let (b, s) = (bar.clone(), stop.clone());
        std::thread::spawn(move || {
            let start = Instant::now();
            while !s.load(Ordering::SeqCst) {
                let elapsed = start.elapsed().as_secs_f64();
                if elapsed >= real_s {
                    b.finish_and_clear();
                    return;
                }
                b.set_position((elapsed * 1000.0) as u64);
                b.set_message(format!("{:.0} s left", (real_s - elapsed).ceil()));
                std::thread::sleep(std::time::Duration::from_millis(200));
            }
            b.finish_and_clear();
        });
        *self.slot.0.lock().unwrap_or_else(|p| p.into_inner()) = Some(bar.clone());
        self.bar = Some((bar, stop));
    }

    fn stop_bar(&mut self) {
        *self.slot.0.lock().unwrap_or_else(|p| p.into_inner()) = None;
        if let Some((bar, stop)) = self.bar.take() {
            stop.store(true, Ordering::SeqCst);
            bar.finish_and_clear();
        }
    }
}

impl Reporter for TerminalReporter {
    fn event(&mut self, event: &Event) {
        if self.quiet {
            return;
        }
        match event {
            Event::RunStarted { plan, positions } => eprintln!(
                "plan {} revision {} ({}), {positions} positions, scheduled bench time {}",
                plan.id,
                plan.revision,
                plan.product.model,
                crate::report::describe::scheduled_text(plan)
            ),
            Event::UnitIdentified { position, identity } => eprintln!(
                "  position {position}: {} serial {} firmware {}",
                terminal_safe(&identity.model),
                terminal_safe(&identity.serial),
                terminal_safe(&identity.firmware)
            ),
            Event::UnitRefused { position, reason } => {
                eprintln!(
                    "  position {position}: not tested: {}",
                    terminal_safe(reason)
                )
            }
            Event::StepStarted { index, total, step } => eprintln!(
                "[{}/{total}] {}: {}",
                index + 1,
                step.id,
                step.load.describe()
            ),
            Event::Measuring { step, real_s } => {
                if *real_s > 0.5 {
                    self.start_bar(step, *real_s);
                }
            }
            Event::StepFinished { results, .. } => {
                self.stop_bar();
                let marks: Vec<String> = results
                    .iter()
                    .map(|(pos, status, failed)| {
                        let mark = match (status, failed) {
                            (crate::record::StepStatus::Done, 0) => "✔",
                            (crate::record::StepStatus::Done, _) => "✘",
                            _ => "◐",
                        };
                        format!("{pos}{mark}")
                    })
                    .collect();
                eprintln!("      {}", marks.join(" "));
            }
            Event::RecordingFailed { what } => {
                self.stop_bar();
                eprintln!(
                    "ARCHIVE: {what}. Nothing more can be kept: no further load is applied, the output is switched off, and what was taken is written as files (or to the fallback folder)."
                );
            }
            Event::StepSetAside { step, reason } => {
                self.stop_bar();
                eprintln!(
                    "!!! step {} NOT JUDGED for any unit: {}",
                    terminal_safe(&step.id),
                    terminal_safe(reason)
                );
            }
            Event::RunFinished { .. } => {}
        }
    }
}
