//! What the operator sees, read as a terminal emulator reads it: the real binary in a
//! pseudo-terminal of 80 × 24, its output fed to a VT100 screen model (the vt100 crate), the
//! answers typed when a prompt shows. A prompt must stay on screen, whole, for as long as the
//! tool waits for it; the progress bar of a step must never draw over it.

mod common;
use common::{serve_at, temp_dir};

use portable_pty::{CommandBuilder, PtySize, native_pty_system};
use std::io::{Read, Write};
use std::sync::mpsc::{Receiver, channel};
use std::time::{Duration, Instant};

/// The binary in an 80 × 24 pseudo-terminal, its screen and its keyboard.
struct Terminal {
    parser: vt100::Parser,
    output: Receiver<Vec<u8>>,
    keyboard: Box<dyn Write + Send>,
    child: Box<dyn portable_pty::Child + Send + Sync>,
}

impl Terminal {
    fn start(args: &[&str]) -> Terminal {
        let pair = native_pty_system()
            .openpty(PtySize {
                rows: 24,
                cols: 80,
                pixel_width: 0,
                pixel_height: 0,
            })
            .expect("a pseudo-terminal");
        let mut cmd = CommandBuilder::new(env!("CARGO_BIN_EXE_meterproof"));
        cmd.args(args);
        cmd.cwd(env!("CARGO_MANIFEST_DIR"));
        cmd.env("TERM", "xterm");
        let child = pair.slave.spawn_command(cmd).expect("the binary starts");
        drop(pair.slave);
        let mut reader = pair.master.try_clone_reader().unwrap();
        let keyboard = pair.master.take_writer().unwrap();
        let (tx, output) = channel();
        std::thread::spawn(move || {
            let _master = pair.master;
            let mut buf = [0u8; 4096];
            while let Ok(n) = reader.read(&mut buf) {
                if n == 0 || tx.send(buf[..n].to_vec()).is_err() {
                    break;
                }
            }
        });
        Terminal {
            parser: vt100::Parser::new(
                std::num::NonZero::new(24).unwrap(),
                std::num::NonZero::new(80).unwrap(),
                0,
            ),
            output,
            keyboard,
            child,
        }
    }

    /// Feeds the screen whatever arrives within `wait`.
    fn pump(&mut self, wait: Duration) {
        let until = Instant::now() + wait;
        while let Some(left) = until.checked_duration_since(Instant::now()) {
            match self.output.recv_timeout(left) {
                Ok(bytes) => self.parser.process(&bytes),
                Err(_) => break,
            }
        }
    }

    /// The line the cursor is on, as the screen shows it.
    fn cursor_line(&self) -> String {
        let screen = self.parser.screen();
        let (row, _) = screen.cursor_position();
        screen.rows(0, 80).nth(usize::from(row)).unwrap_or_default()
    }

    fn screen_text(&self) -> String {
        self.parser.screen().contents()
    }

    fn type_line(&mut self, text: &str) {
        self.keyboard
            .write_all(format!("{text}\r").as_bytes())
            .unwrap();
        self.keyboard.flush().unwrap();
    }

    fn finished(&mut self) -> bool {
        self.child.try_wait().ok().flatten().is_some()
    }
}

/// The nominal value a reference prompt shows: "… (nominal 500 mA): ".
fn nominal_in(prompt: &str) -> Option<String> {
    let start = prompt.find("(nominal ")? + "(nominal ".len();
    let end = start + prompt[start..].find(')')?;
    Some(prompt[start..end].to_string())
}

/// A station with a programmable source and the reference read by the operator, at 4 times
/// real time: every step shows its progress bar (more than half a second of settling and
/// sampling), and every step ends in reference prompts.
#[test]
fn reference_prompts_stay_on_screen_while_the_bar_runs() {
    let dir = temp_dir("screen");
    let served = serve_at(&dir, "4", &[]);
    let station = common::typed_station(&dir, &served.station);
    let out = dir.join("out");
    let mut term = Terminal::start(&[
        "run",
        "test-plans/demo-serial.yaml",
        "--unattended",
        "--bench",
        station.to_str().unwrap(),
        "--out",
        out.to_str().unwrap(),
    ]);
    let started = Instant::now();
    let mut prompts = 0;
    let mut bars_seen = 0;
    while !term.finished() {
        assert!(
            started.elapsed() < Duration::from_secs(180),
            "the run did not end; the screen:\n{}",
            term.screen_text()
        );
        term.pump(Duration::from_millis(100));
        if term.screen_text().contains(" s left") {
            bars_seen += 1;
        }
        let line = term.cursor_line();
        let waiting_for = if line.contains("Reference ") && line.trim_end().ends_with(':') {
            nominal_in(&line)
        } else if line.contains(": Enter to record it") {
            Some(String::new())
        } else {
            None
        };
        let Some(answer) = waiting_for else {
            continue;
        };
        // The tool waits: over the next several ticks of a bar (every 200 ms) the prompt must
        // stay on the cursor's line, whole.
        term.pump(Duration::from_millis(900));
        assert_eq!(
            term.cursor_line().trim_end(),
            line.trim_end(),
            "the prompt was drawn over; the screen:\n{}",
            term.screen_text()
        );
        term.type_line(&answer);
        prompts += 1;
        // Let the echo and the next output arrive before looking again.
        term.pump(Duration::from_millis(150));
    }
    term.pump(Duration::from_millis(300));
    assert!(
        prompts >= 10,
        "{prompts} prompts answered; the screen:\n{}",
        term.screen_text()
    );
    assert!(
        bars_seen > 0,
        "no progress bar was ever on screen: the test proves nothing"
    );
    let screen = term.screen_text();
    assert!(screen.contains("accepted"), "{screen}");
    std::fs::remove_dir_all(&dir).unwrap();
}
