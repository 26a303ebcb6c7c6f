//! Checking a very large plan: time and peak memory for a plan of 100,000 steps (change with
//! METERPROOF_BENCH_STEPS), valid and with a mistake in every step. Prints figures, asserts
//! nothing.

use meterproof::plan::Plan;
use std::time::Instant;

/// Peak resident memory of this process so far, kB (Linux).
fn peak_kb() -> u64 {
    std::fs::read_to_string("/proc/self/status")
        .ok()
        .and_then(|s| {
            s.lines()
                .find(|l| l.starts_with("VmHWM"))
                .and_then(|l| l.split_whitespace().nth(1))
                .and_then(|n| n.parse().ok())
        })
        .unwrap_or(0)
}

fn plan_text(steps: usize, mistake: bool) -> String {
    let demo = std::fs::read_to_string("test-plans/demo.yaml").unwrap();
    let (head, _) = demo.split_once("steps:").unwrap();
    let key = if mistake { "precent" } else { "percent" };
    let mut text = format!("{head}steps:\n");
    for i in 0..steps {
        text.push_str(&format!(
            "  - id: s{i}\n    description: step {i} of a very long generated plan\n    load: {{ current: 5 A }}\n    checks:\n      - {{ quantity: current, tolerance: {{ {key}: 0.5 % }} }}\n      - {{ quantity: voltage, tolerance: {{ percent: 0.5 % }} }}\n"
        ));
    }
    text
}

fn main() {
    let steps: usize = std::env::var("METERPROOF_BENCH_STEPS")
        .ok()
        .and_then(|v| v.parse().ok())
        .unwrap_or(100_000);
    run(steps);
}

/// The benchmark with a plan of `steps` steps.
pub fn run(steps: usize) {
    for mistake in [false, true] {
        let text = plan_text(steps, mistake);
        let before = peak_kb();
        let t = Instant::now();
        let result = Plan::from_text("big.yaml", &text);
        let seconds = t.elapsed().as_secs_f64();
        let shown = match &result {
            Ok(p) => format!("valid, {} steps", p.steps.len()),
            Err(e) => format!(
                "{} mistakes, {} lines printed",
                e.0.len(),
                e.to_string().lines().count()
            ),
        };
        println!(
            "plan of {steps} steps ({:.1} MB){}: {shown} in {seconds:.2} s; peak memory of the process so far {:.0} MB ({:.1} × the text; {:.0} MB before this plan)",
            text.len() as f64 / 1e6,
            if mistake {
                ", a mistake in every step"
            } else {
                ""
            },
            peak_kb() as f64 / 1024.0,
            peak_kb() as f64 * 1024.0 / text.len() as f64,
            before as f64 / 1024.0
        );
    }
}
