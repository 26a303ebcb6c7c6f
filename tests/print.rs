//! The reports as a browser prints them: each of the three documents rendered, printed to PDF by
//! headless Chromium (the distribution's package) and read back with pdfinfo and pdftotext
//! (poppler-utils): A4 pages (Letter when asked), the running header and "page x of y" on every
//! page, nothing wider than the page's text area, and the signature block last. And on a
//! phone-wide screen (400 px) no document runs off the page.
//!
//! Its own harness, so that it can say out loud when the browser is missing: without Chromium
//! and poppler-utils it prints that the checks did not run and why, and fails when
//! MP_REQUIRE_BROWSER is set (`.ci/run` sets it, after installing both).

mod common;
use common::{ctx, temp_dir};

use meterproof::bench::sim::{SimBench, SimConfig, firmware::FirmwareChange};
use meterproof::exec::{self, Silent};
use meterproof::plan::Plan;
use meterproof::record::UnitRecord;
use meterproof::report::{Paper, Templates, summary::LotSummary};
use std::path::{Path, PathBuf};
use std::process::Command;

/// A4 is 210 mm × 297 mm, 595.28 pt × 841.89 pt (ISO 216); Letter 8.5 in × 11 in, 612 pt ×
/// 792 pt (ANSI/ASME Y14.1). Chromium rounds to whole device pixels: within 1.5 pt.
const A4: (f64, f64) = (595.28, 841.89);
const LETTER: (f64, f64) = (612.0, 792.0);
/// The stylesheet's page margins, left and right: 14 mm.
const SIDE_MARGIN_PT: f64 = 14.0 / 25.4 * 72.0;

fn main() {
    let missing: Vec<&str> = ["chromium", "pdfinfo", "pdftotext"]
        .into_iter()
        .filter(|tool| which(tool).is_none())
        .collect();
    if !missing.is_empty() {
        let message = format!(
            "\n*** print checks NOT RUN: {} not found. Install them with `apt-get install chromium poppler-utils` (as root), or run `bash .ci/run`, which does. ***\n",
            missing.join(", ")
        );
        eprintln!("{message}");
        if std::env::var_os("MP_REQUIRE_BROWSER").is_some() {
            panic!("MP_REQUIRE_BROWSER is set and the print checks cannot run");
        }
        return;
    }
    let dir = temp_dir("print");
    let docs = documents(&dir);
    for (name, html, paper) in &docs {
        let pdf = print(&dir, html);
        check_pdf(name, &pdf, *paper);
        check_widths(name, html, &dir, *paper);
    }
    // MP_KEEP_PRINTS keeps the documents and their PDFs for a person to look at.
    if std::env::var_os("MP_KEEP_PRINTS").is_some() {
        println!("the documents and their PDFs are in {}", dir.display());
    } else {
        std::fs::remove_dir_all(&dir).unwrap();
    }
    println!(
        "print checks: {} documents printed and read back",
        docs.len()
    );
}

fn which(tool: &str) -> Option<PathBuf> {
    std::env::var_os("PATH").and_then(|paths| {
        std::env::split_paths(&paths)
            .map(|p| p.join(tool))
            .find(|p| p.is_file())
    })
}

/// The demo run's rejected and accepted unit reports, its lot summary, and a comparison with a
/// firmware that moved; one unit report also on Letter.
fn documents(dir: &Path) -> Vec<(String, PathBuf, Paper)> {
    let plan = Plan::load("test-plans/demo.yaml".as_ref()).unwrap();
    let run = |config: &SimConfig| -> Vec<UnitRecord> {
        exec::run(
            &plan,
            &mut SimBench::new(config).into_bench(),
            &ctx(),
            &mut Silent,
        )
    };
    let baseline = run(&SimConfig::new(1, 4));
    let mut moved = SimConfig::new(1, 4);
    moved.firmware = FirmwareChange::parse("2.1.5,phase=+0.3deg").unwrap();
    let candidate = run(&moved);
    let a4 = Templates::load(None).unwrap();
    let letter = Templates::load(None).unwrap().with_paper(Paper::Letter);
    let mut out = Vec::new();
    let mut write = |name: &str, html: String, paper: Paper| {
        let path = dir.join(format!("{name}.html"));
        std::fs::write(&path, html).unwrap();
        out.push((name.to_string(), path, paper));
    };
    write(
        "rejected unit",
        a4.unit_html(&baseline[1], Some("12:abc")).unwrap(),
        Paper::A4,
    );
    write(
        "accepted unit",
        a4.unit_html(&baseline[0], None).unwrap(),
        Paper::A4,
    );
    write(
        "accepted unit on Letter",
        letter.unit_html(&baseline[0], None).unwrap(),
        Paper::Letter,
    );
    // An incomplete unit: the pulse plan on a bench with no counter, every step not run.
    let pulses = Plan::load("test-plans/demo-pulses.yaml".as_ref()).unwrap();
    let mut bench = SimBench::new(&SimConfig::new(1, 1)).into_bench();
    bench.counter = None;
    let incomplete = exec::run(&pulses, &mut bench, &ctx(), &mut Silent);
    write(
        "incomplete unit",
        a4.unit_html(&incomplete[0], None).unwrap(),
        Paper::A4,
    );
    let summary = LotSummary::of("demo lot", &baseline, &|r| format!("{}.html", r.serial));
    write("lot summary", a4.lot_html(&summary).unwrap(), Paper::A4);
    let comparison = meterproof::regression::compare(&baseline, &candidate, 0.25, &[]);
    write(
        "comparison",
        a4.compare_html("2.1.4 against 2.1.5", &comparison, 0.25)
            .unwrap(),
        Paper::A4,
    );
    out
}

fn chromium(dir: &Path) -> Command {
    let mut c = Command::new("chromium");
    c.args([
        "--headless",
        "--no-sandbox",
        "--disable-gpu",
        "--disable-quic",
        "--no-first-run",
        "--disable-background-networking",
        "--disable-component-update",
        "--disable-sync",
    ])
    .arg(format!("--user-data-dir={}", dir.join("profile").display()));
    c
}

fn print(dir: &Path, html: &Path) -> PathBuf {
    let pdf = html.with_extension("pdf");
    let out = chromium(dir)
        .arg("--no-pdf-header-footer")
        .arg(format!("--print-to-pdf={}", pdf.display()))
        .arg(format!("file://{}", html.display()))
        .output()
        .unwrap();
    assert!(
        pdf.exists(),
        "chromium printed nothing: {}",
        String::from_utf8_lossy(&out.stderr)
    );
    pdf
}

fn run_tool(tool: &str, args: &[&str], pdf: &Path) -> String {
    let out = Command::new(tool).args(args).arg(pdf).arg("-").output();
    let out = match tool {
        "pdfinfo" => Command::new(tool).arg(pdf).output(),
        _ => out,
    }
    .unwrap();
    assert!(out.status.success(), "{tool} failed on {}", pdf.display());
    String::from_utf8_lossy(&out.stdout).into_owned()
}

fn check_pdf(name: &str, pdf: &Path, paper: Paper) {
    let info = run_tool("pdfinfo", &[], pdf);
    let field = |key: &str| {
        info.lines()
            .find_map(|l| l.strip_prefix(key))
            .map(str::trim)
            .unwrap_or_else(|| panic!("{name}: no {key} in {info}"))
            .to_string()
    };
    let pages: usize = field("Pages:").parse().unwrap();
    // "Page size:       594.96 x 841.92 pts (A4)"
    let size = field("Page size:");
    let numbers: Vec<f64> = size
        .split_whitespace()
        .filter_map(|w| w.parse().ok())
        .collect();
    let want = match paper {
        Paper::A4 => A4,
        Paper::Letter => LETTER,
    };
    assert!(
        (numbers[0] - want.0).abs() < 1.5 && (numbers[1] - want.1).abs() < 1.5,
        "{name}: page size {size}, wanted {want:?}"
    );
    // Every page carries the running header and its number.
    let text = run_tool("pdftotext", &["-layout"], pdf);
    let page_texts: Vec<&str> = text
        .split('\u{c}')
        .filter(|p| !p.trim().is_empty())
        .collect();
    assert_eq!(page_texts.len(), pages, "{name}");
    let header = page_texts[0]
        .lines()
        .find(|l| !l.trim().is_empty())
        .unwrap()
        .trim()
        .to_string();
    for (i, page) in page_texts.iter().enumerate() {
        assert!(
            page.contains(&format!("page {} of {pages}", i + 1)),
            "{name}: page {} has no page number:\n{page}",
            i + 1
        );
        assert!(
            page.contains(&header),
            "{name}: page {} lacks the header {header:?}",
            i + 1
        );
    }
    if name == "incomplete unit" {
        // Nothing holds the steps back from the first page: it is not left two-thirds empty.
        assert!(
            page_texts[0].contains("Step 1: gate-Imax"),
            "{name}: {}",
            page_texts[0]
        );
    } else if name.contains("unit") {
        assert!(
            header.contains("TM16-")
                && header.contains("plan TM16-EOL rev A")
                && header.contains("record "),
            "{name}: {header}"
        );
        // The signature block comes last, after every table and note.
        let last = page_texts[pages - 1];
        let tail: Vec<&str> = last
            .lines()
            .map(str::trim)
            .filter(|l| !l.is_empty() && !l.starts_with("page "))
            .collect();
        assert!(
            tail.iter().rev().take(2).any(|l| l.contains("Tested by")),
            "{name}: the last lines are {:?}",
            &tail[tail.len().saturating_sub(3)..]
        );
    }
    // Nothing reaches past the right margin: every word's box ends inside the text area.
    let boxes = run_tool("pdftotext", &["-bbox"], pdf);
    let right_edge = want.0 - SIDE_MARGIN_PT + 1.0;
    let mut widest = 0.0f64;
    for line in boxes
        .lines()
        .filter(|l| l.trim_start().starts_with("<word"))
    {
        let x_max: f64 = attribute(line, "xMax").parse().unwrap();
        widest = widest.max(x_max);
        assert!(
            x_max <= right_edge,
            "{name}: a word ends at {x_max:.1} pt, past the text area's {right_edge:.1} pt: {line}"
        );
    }
    println!("{name}: {pages} pages of {size}, widest word ending at {widest:.1} pt");
}

fn attribute<'a>(line: &'a str, key: &str) -> &'a str {
    let start = line.find(&format!("{key}=\"")).unwrap() + key.len() + 2;
    let end = start + line[start..].find('"').unwrap();
    &line[start..end]
}

/// The width the document takes laid out in a frame `width` px wide, with the print rules
/// applied as on paper when `as_printed`. (A headless window is never narrower than 500 px,
/// and a printed page that overflows is shrunk to fit rather than cut, so both are measured in
/// a frame of their own.)
fn laid_out_width(name: &str, html: &Path, dir: &Path, width: u32, as_printed: bool) -> f64 {
    let probe = html.with_extension(format!("{width}.probe.html"));
    let mut text = std::fs::read_to_string(html).unwrap();
    if as_printed {
        text = text.replace("@media print", "@media all");
    }
    let text = text.replace('&', "&amp;").replace('"', "&quot;");
    std::fs::write(
        &probe,
        format!(
            "<!DOCTYPE html><html><body onload=\"document.body.setAttribute('data-page-width', document.getElementById('f').contentDocument.documentElement.scrollWidth)\"><iframe id=\"f\" style=\"width:{width}px;height:900px;border:0\" srcdoc=\"{text}\"></iframe></body></html>"
        ),
    )
    .unwrap();
    let out = chromium(dir)
        .args(["--window-size=1200,1000", "--dump-dom"])
        .arg(format!("file://{}", probe.display()))
        .output()
        .unwrap();
    let dom = String::from_utf8_lossy(&out.stdout);
    let line = dom
        .lines()
        .find(|l| l.contains("data-page-width"))
        .unwrap_or_else(|| panic!("{name}: no width measured"));
    attribute(line, "data-page-width").parse().unwrap()
}

/// Nothing wider than the page's text area when printed (the print rules laid out at the text
/// area's width, 96 px to the inch), and at 400 px the page never scrolls sideways: wide tables
/// scroll in their own box.
fn check_widths(name: &str, html: &Path, dir: &Path, paper: Paper) {
    let page_pt = match paper {
        Paper::A4 => A4.0,
        Paper::Letter => LETTER.0,
    };
    let text_area = ((page_pt - 2.0 * SIDE_MARGIN_PT) / 72.0 * 96.0).floor() as u32;
    let printed = laid_out_width(name, html, dir, text_area, true);
    assert!(
        printed <= f64::from(text_area),
        "{name}: {printed} px wide on a text area of {text_area} px"
    );
    let narrow = laid_out_width(name, html, dir, 400, false);
    assert!(
        narrow <= 400.0,
        "{name}: the page is {narrow} px wide in a 400 px frame"
    );
    println!("{name}: {printed} px on a {text_area} px text area; {narrow} px in a 400 px frame");
}
