//! A station's journal: the local SQLite archive a bench writes its runs to when its archive of
//! record is a shared PostgreSQL database, so that a network that goes away never stops the
//! bench. Runs are uploaded whole-entry by whole-entry when the database is reachable (before
//! and after each run, or with `meterproof upload`): exactly once, in order (see `pg::upload`).
//!
//! The journal is a complete archive of its own (its chain, `verify`, resume); the shared archive
//! re-seals each uploaded entry in its own chain with the same content hash, so a record's hash
//! is the same on both sides. How far each journal was taken is kept in the shared archive, in
//! the upload's own transaction; the journal keeps a copy of that mark only to say how much
//! waits while the database is out of reach.

use super::image::Sink;
use super::{ArchiveError, Postgres, Sqlite};
use std::path::{Path, PathBuf};

/// How far a journal has been taken: its chain entries and readings up to these numbers.
#[derive(Debug, Clone, Copy, Default, PartialEq, Eq)]
pub struct Marks {
    pub chain_upto: i64,
    pub readings_upto: i64,
}

/// What one upload took.
#[derive(Debug, Clone, Default, PartialEq)]
pub struct Uploaded {
    pub runs: u64,
    pub entries: u64,
    pub units: u64,
    pub readings: u64,
}

/// What waits in a journal, by its own copy of the mark.
#[derive(Debug, Clone, Default, PartialEq)]
pub struct Waiting {
    pub runs: u64,
    pub readings: u64,
}

/// What an upload runs inside the shared archive's transaction: the journal's rows beyond the
/// marks, into the sink.
pub type Pending<'a> = dyn FnMut(&Marks, &mut Sink<'_>) -> Result<(), ArchiveError> + 'a;

/// A station's journal file.
pub struct Journal {
    local: Sqlite,
    path: PathBuf,
    id: String,
}

impl Journal {
    /// Opens (or creates) the journal at `path`, giving it its identity on first use.
    pub fn open(path: &Path) -> Result<Journal, ArchiveError> {
        let local = Sqlite::open(path)?;
        let id = match local.meta_value("journal_id")? {
            Some(id) => id,
            None => {
                let id = format!(
                    "{:016x}{:016x}",
                    rand::random::<u64>(),
                    rand::random::<u64>()
                );
                local.set_meta("journal_id", &id)?;
                id
            }
        };
        Ok(Journal {
            local,
            path: path.to_path_buf(),
            id,
        })
    }

    pub fn path(&self) -> &Path {
        &self.path
    }

    /// Uploads everything the shared archive at `url` does not have yet, in one transaction.
    pub fn upload(&self, url: &str) -> Result<Uploaded, ArchiveError> {
        let shared = Postgres::open(url)?;
        let (up, marks) = shared.receive_journal(&self.id, &mut |marks, sink| {
            self.local.dump_since(marks, sink)
        })?;
        // Only a copy, for `waiting`: the shared archive's mark is the one that counts.
        self.local.set_meta(
            "uploaded_upto",
            &format!("{}:{}", marks.chain_upto, marks.readings_upto),
        )?;
        Ok(up)
    }

    /// What waits for upload, by the journal's copy of the mark.
    pub fn waiting(&self) -> Result<Waiting, ArchiveError> {
        let marks = self
            .local
            .meta_value("uploaded_upto")?
            .and_then(|v| {
                let (c, r) = v.split_once(':')?;
                Some(Marks {
                    chain_upto: c.parse().ok()?,
                    readings_upto: r.parse().ok()?,
                })
            })
            .unwrap_or_default();
        self.local.waiting_since(&marks)
    }
}
