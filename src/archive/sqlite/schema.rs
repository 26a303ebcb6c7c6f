//! The archive's schema and its migrations: the tables, the version kept in `meta`, how an
//! archive of an earlier version is brought up to date, and the connection's durability
//! settings.

use super::*;

/// The archive's layout version. 1: no chain table, one record per run and position. 2: the
/// chain seals every row; a position may have several records (an interrupted run and its
/// resumption), the newest counts.
pub const SCHEMA_VERSION: i64 = 2;

pub(super) const SCHEMA: &str = "
CREATE TABLE IF NOT EXISTS meta (key TEXT PRIMARY KEY, value TEXT NOT NULL);
CREATE TABLE IF NOT EXISTS plans (
    sha256 TEXT PRIMARY KEY, plan_id TEXT NOT NULL, revision TEXT NOT NULL,
    file TEXT NOT NULL, text TEXT NOT NULL);
CREATE TABLE IF NOT EXISTS runs (
    run_id TEXT PRIMARY KEY, plan_sha256 TEXT NOT NULL REFERENCES plans(sha256),
    lot TEXT, station TEXT NOT NULL, operator TEXT NOT NULL, bench TEXT NOT NULL,
    tool_version TEXT NOT NULL, started_at TEXT NOT NULL, finished_at TEXT,
    state TEXT NOT NULL);
CREATE INDEX IF NOT EXISTS runs_lot ON runs(lot);
CREATE INDEX IF NOT EXISTS runs_started ON runs(started_at);
CREATE TABLE IF NOT EXISTS run_units (
    run_id TEXT NOT NULL, position INTEGER NOT NULL, serial TEXT NOT NULL,
    PRIMARY KEY (run_id, position, serial));
CREATE TABLE IF NOT EXISTS readings (
    id INTEGER PRIMARY KEY, run_id TEXT NOT NULL, position INTEGER NOT NULL,
    step_index INTEGER NOT NULL, attempt INTEGER NOT NULL, quantity TEXT NOT NULL,
    channel TEXT NOT NULL, raw INTEGER NOT NULL, t_s REAL NOT NULL, value REAL NOT NULL,
    took_s REAL);
CREATE INDEX IF NOT EXISTS readings_unit ON readings(run_id, position, step_index, attempt);
CREATE TABLE IF NOT EXISTS steps (
    run_id TEXT NOT NULL, position INTEGER NOT NULL, step_index INTEGER NOT NULL,
    attempt INTEGER NOT NULL, status TEXT NOT NULL, record TEXT NOT NULL,
    PRIMARY KEY (run_id, position, step_index, attempt));
CREATE TABLE IF NOT EXISTS units (
    seq INTEGER PRIMARY KEY AUTOINCREMENT, run_id TEXT NOT NULL, position INTEGER NOT NULL,
    serial TEXT NOT NULL, firmware TEXT, status TEXT NOT NULL, finished_at TEXT NOT NULL,
    record TEXT NOT NULL, record_sha256 TEXT NOT NULL, prev_sha256 TEXT NOT NULL);
CREATE INDEX IF NOT EXISTS units_serial ON units(serial, finished_at);
CREATE INDEX IF NOT EXISTS units_run ON units(run_id, position);
";

/// The archive's schema version as stored, `None` for an empty file or a version-1 archive.
pub(super) fn stored_version(conn: &Connection) -> rusqlite::Result<Option<i64>> {
    let has_meta = conn
        .prepare("SELECT 1 FROM sqlite_master WHERE type = 'table' AND name = 'meta'")?
        .exists([])?;
    if !has_meta {
        return Ok(None);
    }
    Ok(conn
        .query_row(
            "SELECT value FROM meta WHERE key = 'schema_version'",
            [],
            |r| r.get::<_, String>(0),
        )
        .optional()?
        .and_then(|v| v.parse().ok()))
}

pub(super) fn has_table(conn: &Connection, name: &str) -> rusqlite::Result<bool> {
    conn.prepare("SELECT 1 FROM sqlite_master WHERE type = 'table' AND name = ?1")?
        .exists([name])
}

/// Brings a version-1 archive to version 2 in one transaction: the unit and position tables
/// lose their one-record-per-position constraint (rows, sequence numbers and hashes are copied
/// as they are), and what was there is marked as written before the chain, with its own record
/// chain's head, so `verify` checks it the old way and sees anything added since.
pub(super) fn migrate_from_1(conn: &Connection) -> Result<(), ArchiveError> {
    conn.execute_batch(
        "
        ALTER TABLE units RENAME TO units_v1;
        ALTER TABLE run_units RENAME TO run_units_v1;
        DROP INDEX IF EXISTS units_serial;
        ",
    )?;
    conn.execute_batch(SCHEMA)?;
    conn.execute_batch(chain::SCHEMA)?;
    add_reading_durations(conn)?;
    conn.execute_batch(
        "
        INSERT INTO units (seq, run_id, position, serial, firmware, status, finished_at, record, record_sha256, prev_sha256)
            SELECT seq, run_id, position, serial, firmware, status, finished_at, record, record_sha256, prev_sha256 FROM units_v1;
        INSERT INTO run_units (run_id, position, serial) SELECT run_id, position, serial FROM run_units_v1;
        DROP TABLE units_v1;
        DROP TABLE run_units_v1;
        ",
    )?;
    let units_upto: i64 =
        conn.query_row("SELECT COALESCE(MAX(seq), 0) FROM units", [], |r| r.get(0))?;
    let runs_upto: i64 =
        conn.query_row("SELECT COALESCE(MAX(rowid), 0) FROM runs", [], |r| r.get(0))?;
    if units_upto > 0 || runs_upto > 0 {
        let head: Option<String> = conn
            .query_row("SELECT value FROM meta WHERE key = 'chain_head'", [], |r| {
                r.get(0)
            })
            .optional()?;
        let put = |k: &str, v: String| {
            conn.execute(
                "INSERT INTO meta (key, value) VALUES (?1, ?2)
                 ON CONFLICT(key) DO UPDATE SET value = excluded.value",
                params![k, v],
            )
        };
        put("legacy_units_upto", units_upto.to_string())?;
        put("legacy_runs_upto", runs_upto.to_string())?;
        put(
            "legacy_chain_head",
            head.unwrap_or_else(|| format!("0:{}", seal::GENESIS)),
        )?;
        conn.execute("DELETE FROM meta WHERE key = 'chain_head'", [])?;
        let content = shared::legacy_content(conn)?.expect("the markers were just written");
        chain::append(conn, &seal::Entry::Legacy, &content)?;
    }
    Ok(())
}

pub(super) fn set_up(conn: &Connection) -> Result<(), ArchiveError> {
    conn.pragma_update(None, "journal_mode", "WAL")?;
    conn.pragma_update(None, "synchronous", "FULL")?;
    conn.pragma_update(None, "foreign_keys", "ON")?;
    let tx = rusqlite::Transaction::new_unchecked(conn, rusqlite::TransactionBehavior::Immediate)?;
    match stored_version(&tx)? {
        Some(v) if v > SCHEMA_VERSION => {
            return Err(ArchiveError::Newer(v));
        }
        Some(_) => {
            tx.execute_batch(SCHEMA)?;
            tx.execute_batch(chain::SCHEMA)?;
            add_reading_durations(&tx)?;
        }
        None if has_table(&tx, "units")? => migrate_from_1(&tx)?,
        None => {
            tx.execute_batch(SCHEMA)?;
            tx.execute_batch(chain::SCHEMA)?;
        }
    }
    tx.execute(
        "INSERT INTO meta (key, value) VALUES ('schema_version', ?1)
         ON CONFLICT(key) DO UPDATE SET value = excluded.value",
        [SCHEMA_VERSION.to_string()],
    )?;
    // Proves the file writable now, not at the end of the run.
    tx.execute(
        "INSERT INTO meta (key, value) VALUES ('last_opened', ?1)
         ON CONFLICT(key) DO UPDATE SET value = excluded.value",
        [chrono::Utc::now().to_rfc3339()],
    )?;
    tx.commit()?;
    Ok(())
}

/// Archives written before readings kept their transaction's duration get the column, empty
/// for their old rows (their records' hashes stay valid: an absent duration is not serialised).
pub(super) fn add_reading_durations(conn: &Connection) -> rusqlite::Result<()> {
    let has = conn
        .prepare("SELECT 1 FROM pragma_table_info('readings') WHERE name = 'took_s'")?
        .exists([])?;
    if !has {
        conn.execute_batch("ALTER TABLE readings ADD COLUMN took_s REAL")?;
    }
    Ok(())
}
