//! `meterproof check`: plans and station files validated and described, and the warnings a plan
//! earns before any load (a guarded check with no acceptance zone).

use super::*;

pub(super) fn check(paths: &[PathBuf]) -> Result<i32, CliError> {
    let mut invalid = 0;
    // A plan is checked against the reference of the first station given with it, else against
    // the simulated bench's.
    let station = paths
        .iter()
        .filter(|p| is_station_file(p))
        .find_map(|p| Station::load(p).ok());
    for path in paths {
        let summary = if is_station_file(path) {
            Station::load(path).map(|s| station_summary(&s))
        } else {
            Plan::load(path).map(|p| {
                crate::report::describe::plan_summary(&p)
                    + &zone_warnings(&p, station.as_ref())
                    + &plan_warnings(&p)
            })
        };
        match summary {
            Ok(text) => {
                for line in text.lines() {
                    out!("{}", fitted_line(line));
                }
            }
            Err(errors) => {
                invalid += 1;
                eprintln!("{errors}");
            }
        }
    }
    if invalid > 0 {
        return Err(CliError::Usage(format!(
            "{invalid} of {} files invalid",
            paths.len()
        )));
    }
    Ok(0)
}

/// A line of the description wrapped to 80 columns, its continuation lines under its second
/// column (after its first word: the step id, "warning:", "decision").
fn fitted_line(line: &str) -> String {
    if line.chars().count() <= terminal::WIDTH {
        return line.to_string();
    }
    let lead = line.len() - line.trim_start().len();
    let after_word = line[lead..].find(' ').map_or(lead, |i| lead + i);
    let second = after_word + (line.len() - after_word - line[after_word..].trim_start().len());
    let indent = if lead <= 2 && second < 40 {
        second
    } else {
        lead + 2
    };
    let pad = " ".repeat(indent);
    // A value and its unit stay on one line ("500 ms", "1 %"): joined by a no-break space
    // while the line is filled.
    static VALUE_UNIT: std::sync::OnceLock<regex::Regex> = std::sync::OnceLock::new();
    let value_unit = VALUE_UNIT
        .get_or_init(|| regex::Regex::new(r"(\d) ([A-Za-zµΩ%°])").expect("a valid pattern"));
    let joined = value_unit.replace_all(line.trim_start(), "$1\u{a0}$2");
    textwrap::fill(
        &joined,
        terminal::wrap_options(terminal::WIDTH)
            .initial_indent(&line[..lead])
            .subsequent_indent(&pad),
    )
    .replace('\u{a0}', " ")
}

/// Warnings for the plan's checks whose acceptance zone the reference and the unit's
/// resolution alone leave empty or nearly so.
fn zone_warnings(plan: &Plan, station: Option<&Station>) -> String {
    use crate::exec::preview::{ExpectedReference, narrow_zones};
    let sim_ranges = crate::bench::sim::sim_reference_ranges();
    let reference = match station {
        Some(s) => ExpectedReference {
            name: format!("station {}'s reference {}", s.id, s.reference.info.id),
            accuracy: s
                .reference
                .info
                .accuracy
                .as_deref()
                .and_then(|a| crate::metrology::accuracy::Accuracy::parse(a).ok()),
            ranges: &s.reference.info.ranges,
        },
        None => ExpectedReference {
            name: "the simulated bench's reference (give a station file to check against yours)"
                .into(),
            accuracy: crate::metrology::accuracy::Accuracy::parse(
                crate::bench::sim::SIM_REFERENCE_ACCURACY,
            )
            .ok(),
            ranges: &sim_ranges,
        },
    };
    let zones = narrow_zones(plan, &reference);
    if zones.is_empty() {
        return String::new();
    }
    let mut s = format!("  warning: against {}:\n", reference.name);
    for z in zones {
        s.push_str(&format!("  warning: {z}\n"));
    }
    s
}

/// What the plan asks that its steps cannot give (a resolution out of reach in its time).
fn plan_warnings(plan: &Plan) -> String {
    plan.warnings()
        .into_iter()
        .map(|(step, w)| format!("  warning: step {step}: {w}\n"))
        .collect()
}

/// Whether a YAML file is a station file (its top level names a `station`) rather than a plan.
fn is_station_file(path: &Path) -> bool {
    /// The top-level keys that tell the two apart, read without building the document.
    #[derive(serde::Deserialize)]
    struct Probe {
        station: Option<serde::de::IgnoredAny>,
        steps: Option<serde::de::IgnoredAny>,
    }
    std::fs::read_to_string(path)
        .ok()
        .and_then(|t| serde_yaml::from_str::<Probe>(&t).ok())
        .is_some_and(|p| p.station.is_some() && p.steps.is_none())
}

/// What `check` prints for a valid station file.
fn station_summary(s: &Station) -> String {
    let source = match &s.source {
        station::SourceSpec::Scpi { port, .. } => format!("SCPI source on {}", port.path),
        station::SourceSpec::Manual => "load set by the operator".into(),
    };
    let reading = match &s.reference.read {
        station::ReferenceRead::Scpi { port, .. } => format!("read over SCPI on {}", port.path),
        station::ReferenceRead::Operator => "typed by the operator".into(),
    };
    let counter = match &s.counter {
        None => "no counter for the test outputs".to_string(),
        Some(c) => format!(
            "counter {} on {}{}",
            c.info.id,
            c.port.path,
            c.info.reference_constant.map_or(String::new(), |k| format!(
                ", counting the reference standard's pulses at {k} imp/kWh"
            ))
        ),
    };
    let archive = match (&s.archive, &s.journal) {
        (None, _) => String::new(),
        (Some(a), None) => format!("; runs archived in {}", crate::archive::Location::parse(a)),
        (Some(a), Some(j)) => format!(
            "; runs archived in {} through the journal {}",
            crate::archive::Location::parse(a),
            j.display()
        ),
    };
    format!(
        "{}: station {}, {}, {source}; reference {} ({reading}){}; {counter}; {}{archive}\n",
        s.file,
        s.id,
        counted(s.positions.len(), "position"),
        s.reference.info.id,
        s.reference
            .calibration_due
            .map_or(String::new(), |d| format!(", calibration due {d}")),
        s.ambient_c
            .map_or("ambient temperature not stated".to_string(), |c| {
                format!("ambient {c} °C")
            })
    )
}
