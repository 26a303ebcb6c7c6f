//! A station's journal on the command line: where a run keeps its records when its archive of
//! record is a shared database (`--journal FILE --archive postgres://...`), the uploads before
//! and after each run, what the operator is told when the database is out of reach, and
//! `meterproof upload`.

use super::CliError;
use crate::archive::Location;
use crate::archive::journal::{Journal, Uploaded};
use std::path::{Path, PathBuf};

/// Where a run keeps its records.
pub(super) struct Keeping {
    /// The archive the run writes to as it goes.
    pub at: Location,
    /// With a journal: the journal and the shared archive's address.
    pub journal: Option<(Journal, String)>,
}

/// The run's archive: `archive` (or `default`), or with `journal` the journal, uploaded to the
/// shared archive `archive` names.
pub(super) fn keeping(
    archive: Option<&Location>,
    journal: Option<&Path>,
    default: Location,
) -> Result<Keeping, CliError> {
    match (archive, journal) {
        (Some(Location::Postgres(url)), Some(path)) => {
            let j = Journal::open(path).map_err(|e| CliError::Run(e.to_string()))?;
            Ok(Keeping {
                at: Location::Sqlite(path.to_path_buf()),
                journal: Some((j, url.clone())),
            })
        }
        (_, Some(path)) => Err(CliError::Usage(format!(
            "--journal {} keeps a station's runs for a shared archive: give it with --archive postgres://...",
            path.display()
        ))),
        (a, None) => Ok(Keeping {
            at: a.cloned().unwrap_or(default),
            journal: None,
        }),
    }
}

fn plural(n: u64, one: &str) -> String {
    if n == 1 {
        format!("1 {one}")
    } else {
        format!("{n} {one}s")
    }
}

/// Uploads what the journal holds beyond the shared archive's mark, and says what happened.
/// The bench goes on whatever the answer: what was not uploaded waits in the journal.
pub(super) fn send(journal: &Journal, url: &str) -> Option<Uploaded> {
    let shown = Location::Postgres(url.to_string());
    match journal.upload(url) {
        Ok(up) => {
            if up.entries > 0 || up.readings > 0 {
                eprintln!(
                    "shared archive {shown}: uploaded {} ({} unit records, {} readings, {} chain entries) from the journal {}",
                    plural(up.runs, "run"),
                    up.units,
                    up.readings,
                    up.entries,
                    journal.path().display()
                );
            }
            Some(up)
        }
        Err(e) => {
            let waiting = journal
                .waiting()
                .map(|w| {
                    format!(
                        "waiting there: {} ({} readings)",
                        plural(w.runs, "run"),
                        w.readings
                    )
                })
                .unwrap_or_else(|e| format!("what waits there cannot be read: {e}"));
            let j = journal.path().display().to_string();
            eprintln!(
                "SHARED ARCHIVE OUT OF REACH: {}\n  The bench goes on: its runs are kept in the journal {j}; {waiting}.\n  They are uploaded at the next run, or with: meterproof upload --journal {} --archive {shown}",
                e.said(),
                super::run::shell_word(&j)
            );
            None
        }
    }
}

#[derive(clap::Args)]
pub(super) struct UploadArgs {
    /// The station's journal.
    #[arg(long, value_name = "FILE")]
    journal: PathBuf,
    /// The shared archive (postgres://USER@HOST/DB).
    #[arg(long)]
    archive: Location,
}

/// Uploads a journal; exit 3 when the shared archive is out of reach.
pub(super) fn upload(args: &UploadArgs) -> Result<i32, CliError> {
    let Location::Postgres(url) = &args.archive else {
        return Err(CliError::Usage(
            "upload takes a journal to a shared archive: --archive postgres://...".into(),
        ));
    };
    if !args.journal.exists() {
        return Err(CliError::Usage(format!(
            "no journal at {}",
            args.journal.display()
        )));
    }
    let journal = Journal::open(&args.journal).map_err(|e| CliError::Run(e.to_string()))?;
    match send(&journal, url) {
        Some(up) => {
            if up.entries == 0 && up.readings == 0 {
                out!(
                    "shared archive {}: up to date with the journal {}",
                    args.archive,
                    args.journal.display()
                );
            }
            Ok(0)
        }
        None => Ok(3),
    }
}
