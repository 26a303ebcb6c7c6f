//! The PostgreSQL archive's schema: the same tables as SQLite's (so a copy keeps every row and
//! hash), in PostgreSQL's types, with the version kept in `meta`.
//!
//! Texts that are sorted or compared (times, serials, lots) use the "C" collation: the order of
//! ISO 8601 times must be the order of their bytes, whatever the database's locale. Sequence
//! numbers that the chain refers to (`runs.seq`, `units.seq`, `chain.seq`) are given by the
//! writer under the chain's lock, never by a sequence, so a copy can keep them as they are.

use super::*;

/// The PostgreSQL layout's version. It starts at the layout SQLite's version 2 has (the chain
/// sealing every row), and counts on with it: version 1 never existed in PostgreSQL.
pub const PG_SCHEMA_VERSION: i64 = 2;

const SCHEMA: &str = r#"
CREATE TABLE IF NOT EXISTS meta (key TEXT PRIMARY KEY, value TEXT NOT NULL);
CREATE TABLE IF NOT EXISTS plans (
    sha256 TEXT PRIMARY KEY, plan_id TEXT NOT NULL, revision TEXT NOT NULL,
    file TEXT NOT NULL, text TEXT NOT NULL);
CREATE TABLE IF NOT EXISTS runs (
    seq BIGINT NOT NULL UNIQUE,
    run_id TEXT PRIMARY KEY, plan_sha256 TEXT NOT NULL REFERENCES plans(sha256),
    lot TEXT COLLATE "C", station TEXT NOT NULL, operator TEXT NOT NULL, bench TEXT NOT NULL,
    tool_version TEXT NOT NULL, started_at TEXT COLLATE "C" NOT NULL,
    finished_at TEXT COLLATE "C", state TEXT NOT NULL);
CREATE INDEX IF NOT EXISTS runs_lot ON runs(lot);
CREATE INDEX IF NOT EXISTS runs_started ON runs(started_at);
CREATE TABLE IF NOT EXISTS run_units (
    seq BIGSERIAL NOT NULL, run_id TEXT NOT NULL, position BIGINT NOT NULL,
    serial TEXT COLLATE "C" NOT NULL,
    PRIMARY KEY (run_id, position, serial));
CREATE TABLE IF NOT EXISTS readings (
    id BIGSERIAL PRIMARY KEY, run_id TEXT NOT NULL, position BIGINT NOT NULL,
    step_index BIGINT NOT NULL, attempt BIGINT NOT NULL, quantity TEXT NOT NULL,
    channel TEXT NOT NULL, raw BOOLEAN NOT NULL, t_s DOUBLE PRECISION NOT NULL,
    value DOUBLE PRECISION NOT NULL, took_s DOUBLE PRECISION);
CREATE INDEX IF NOT EXISTS readings_unit ON readings(run_id, position, step_index, attempt);
CREATE TABLE IF NOT EXISTS steps (
    run_id TEXT NOT NULL, position BIGINT NOT NULL, step_index BIGINT NOT NULL,
    attempt BIGINT NOT NULL, status TEXT NOT NULL, record TEXT NOT NULL,
    PRIMARY KEY (run_id, position, step_index, attempt));
CREATE TABLE IF NOT EXISTS units (
    seq BIGINT PRIMARY KEY, run_id TEXT NOT NULL, position BIGINT NOT NULL,
    serial TEXT COLLATE "C" NOT NULL, firmware TEXT COLLATE "C", status TEXT NOT NULL,
    finished_at TEXT COLLATE "C" NOT NULL, record TEXT NOT NULL, record_sha256 TEXT NOT NULL,
    prev_sha256 TEXT NOT NULL);
CREATE INDEX IF NOT EXISTS units_serial ON units(serial, finished_at);
CREATE INDEX IF NOT EXISTS units_run ON units(run_id, position);
CREATE INDEX IF NOT EXISTS units_firmware ON units(firmware);
CREATE TABLE IF NOT EXISTS chain (
    seq BIGINT PRIMARY KEY, kind TEXT NOT NULL, run_id TEXT NOT NULL,
    position BIGINT, step_index BIGINT, attempt BIGINT, unit_seq BIGINT,
    content_sha256 TEXT NOT NULL, sha256 TEXT NOT NULL, prev_sha256 TEXT NOT NULL);
CREATE INDEX IF NOT EXISTS chain_run ON chain(run_id, kind);
CREATE TABLE IF NOT EXISTS journal_uploads (
    journal_id TEXT PRIMARY KEY, chain_upto BIGINT NOT NULL, readings_upto BIGINT NOT NULL,
    uploaded_at TEXT NOT NULL);
"#;

/// The stored schema version, `None` for an empty database.
pub(super) fn stored_version(c: &mut impl GenericClient) -> Result<Option<i64>, ArchiveError> {
    let has_meta = c
        .query_one("SELECT to_regclass('meta') IS NOT NULL", &[])?
        .get::<_, bool>(0);
    if !has_meta {
        return Ok(None);
    }
    Ok(
        c.query_opt("SELECT value FROM meta WHERE key = 'schema_version'", &[])?
            .and_then(|r| r.get::<_, String>(0).parse().ok()),
    )
}

/// Creates the tables of an empty database, or checks the version of an existing one, in one
/// transaction under the chain's lock (two benches opening a new database at once: one creates,
/// the other finds it made). A newer layout is refused before anything is touched.
pub(super) fn set_up(client: &mut Client) -> Result<(), ArchiveError> {
    let mut tx = client.transaction()?;
    lock_chain(&mut tx)?;
    match stored_version(&mut tx)? {
        Some(v) if v > PG_SCHEMA_VERSION => return Err(ArchiveError::Newer(v)),
        // Later versions add their migrations here, each in this same transaction. The table
        // of journal uploads came within version 2, before any release: made where missing.
        Some(_) => tx.batch_execute(
            "CREATE TABLE IF NOT EXISTS journal_uploads (
                 journal_id TEXT PRIMARY KEY, chain_upto BIGINT NOT NULL,
                 readings_upto BIGINT NOT NULL, uploaded_at TEXT NOT NULL)",
        )?,
        None => tx.batch_execute(SCHEMA)?,
    }
    tx.execute(
        "INSERT INTO meta (key, value) VALUES ('schema_version', $1)
         ON CONFLICT (key) DO UPDATE SET value = excluded.value",
        &[&PG_SCHEMA_VERSION.to_string()],
    )?;
    tx.commit()?;
    Ok(())
}
