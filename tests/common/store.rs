//! The archive's backends, for the tests that must hold on every one of them: one set of tests,
//! run on SQLite (always) and on PostgreSQL (where a server is given).
//!
//! PostgreSQL: `MP_POSTGRES_URL` names a server and a user allowed to create databases
//! (`.ci/run` starts a throw-away cluster and sets it); each call of [`backends`] gets a fresh
//! database. Without it the PostgreSQL half does not run, and `tests/postgres_notice.rs` says so
//! in capitals; with `MP_REQUIRE_POSTGRES` set, a missing server fails the tests instead.

use meterproof::archive::{Archive, Location};
use std::path::{Path, PathBuf};
use std::sync::atomic::{AtomicUsize, Ordering};

/// One archive for a test, on one backend.
pub enum Store {
    Sqlite(PathBuf),
    Postgres { url: String },
}

static NEXT: AtomicUsize = AtomicUsize::new(0);

/// The server's address for creating test databases, if one is given.
pub fn server() -> Option<String> {
    match std::env::var("MP_POSTGRES_URL") {
        Ok(url) if !url.is_empty() => Some(url),
        _ => {
            assert!(
                std::env::var_os("MP_REQUIRE_POSTGRES").is_none(),
                "MP_REQUIRE_POSTGRES is set but MP_POSTGRES_URL names no server"
            );
            None
        }
    }
}

/// `url` with its database replaced by `db`.
pub fn with_database(url: &str, db: &str) -> String {
    let (base, query) = match url.split_once('?') {
        Some((b, q)) => (b, format!("?{q}")),
        None => (url, String::new()),
    };
    let scheme_end = base.find("://").map_or(0, |i| i + 3);
    let host_part = match base[scheme_end..].find('/') {
        Some(i) => &base[..scheme_end + i],
        None => base,
    };
    format!("{host_part}/{db}{query}")
}

/// A client on the server's administrative database.
pub fn admin() -> postgres::Client {
    let url = server().expect("a PostgreSQL server");
    postgres::Client::connect(&url, postgres::NoTls).unwrap()
}

/// A fresh, empty database on the server; its URL.
pub fn fresh_database(name: &str) -> String {
    let url = server().expect("a PostgreSQL server");
    let clean: String = name
        .chars()
        .map(|c| {
            if c.is_ascii_alphanumeric() {
                c.to_ascii_lowercase()
            } else {
                '_'
            }
        })
        .take(30)
        .collect();
    let db = format!(
        "mp_{clean}_{}_{}",
        std::process::id(),
        NEXT.fetch_add(1, Ordering::SeqCst)
    );
    let mut c = admin();
    c.batch_execute(&format!("DROP DATABASE IF EXISTS {db}"))
        .unwrap();
    c.batch_execute(&format!("CREATE DATABASE {db}")).unwrap();
    with_database(&url, &db)
}

/// The archives a test runs on: a new SQLite file in `dir`, and a new PostgreSQL database
/// where a server is given.
pub fn backends(dir: &Path, name: &str) -> Vec<Store> {
    let mut out = vec![Store::Sqlite(dir.join(format!("{name}.sqlite")))];
    if server().is_some() {
        out.push(Store::Postgres {
            url: fresh_database(name),
        });
    }
    out
}

/// Runs `test` once per backend, each with a folder of its own (beside its archive, which is
/// fresh), and removes both after it.
pub fn on_every_backend(name: &str, test: impl Fn(&Path, &Store)) {
    let top = super::temp_dir(name);
    for store in backends(&top, name) {
        let dir = top.join(store.label());
        std::fs::create_dir_all(&dir).unwrap();
        test(&dir, &store);
        store.remove();
    }
    std::fs::remove_dir_all(&top).unwrap();
}

impl Store {
    /// The value of `--archive`.
    pub fn arg(&self) -> String {
        match self {
            Store::Sqlite(p) => p.display().to_string(),
            Store::Postgres { url } => url.clone(),
        }
    }

    pub fn location(&self) -> Location {
        Location::parse(&self.arg())
    }

    pub fn label(&self) -> &'static str {
        match self {
            Store::Sqlite(_) => "SQLite",
            Store::Postgres { .. } => "PostgreSQL",
        }
    }

    pub fn open(&self) -> Archive {
        Archive::open_at(&self.location()).unwrap()
    }

    pub fn open_read_only(&self) -> Result<Archive, meterproof::archive::ArchiveError> {
        Archive::open_read_only_at(&self.location())
    }

    /// Runs SQL on the stored tables behind the archive's back, as someone with the database's
    /// own tools would (foreign keys not enforced). The error's text on failure.
    pub fn tamper(&self, sql: &str) -> Result<(), String> {
        match self {
            Store::Sqlite(p) => rusqlite::Connection::open(p)
                .and_then(|c| c.execute_batch(&format!("PRAGMA foreign_keys = OFF; {sql}")))
                .map_err(|e| e.to_string()),
            Store::Postgres { url } => {
                let mut c = postgres::Client::connect(url, postgres::NoTls).unwrap();
                c.batch_execute(&format!(
                    "BEGIN; SET LOCAL session_replication_role = replica; {sql}; COMMIT"
                ))
                .map_err(|e| match e.as_db_error() {
                    Some(d) => d.message().to_string(),
                    None => e.to_string(),
                })
            }
        }
    }

    /// The rows a query returns, every value as text (NULL as "").
    pub fn rows(&self, sql: &str) -> Vec<Vec<String>> {
        self.try_rows(sql).unwrap_or_else(|e| panic!("{sql}: {e}"))
    }

    /// The rows a query returns, or what went wrong (a table not made yet, a database that
    /// cannot be opened yet).
    pub fn try_rows(&self, sql: &str) -> Result<Vec<Vec<String>>, String> {
        let text = |e: &dyn std::fmt::Display| e.to_string();
        match self {
            Store::Sqlite(p) => {
                use rusqlite::types::ValueRef;
                let c = rusqlite::Connection::open(p).map_err(|e| text(&e))?;
                c.busy_timeout(std::time::Duration::from_secs(30))
                    .map_err(|e| text(&e))?;
                let mut stmt = c.prepare(sql).map_err(|e| text(&e))?;
                let n = stmt.column_count();
                let rows = stmt
                    .query_map([], |r| {
                        (0..n)
                            .map(|i| {
                                Ok(match r.get_ref(i)? {
                                    ValueRef::Null => String::new(),
                                    ValueRef::Integer(v) => v.to_string(),
                                    ValueRef::Real(v) => v.to_string(),
                                    ValueRef::Text(t) => String::from_utf8_lossy(t).into_owned(),
                                    ValueRef::Blob(b) => format!("{b:?}"),
                                })
                            })
                            .collect()
                    })
                    .map_err(|e| text(&e))?;
                rows.collect::<Result<_, _>>().map_err(|e| text(&e))
            }
            Store::Postgres { url } => {
                let mut c =
                    postgres::Client::connect(url, postgres::NoTls).map_err(|e| text(&e))?;
                Ok(c.simple_query(sql)
                    .map_err(|e| text(&e))?
                    .into_iter()
                    .filter_map(|m| match m {
                        postgres::SimpleQueryMessage::Row(r) => Some(
                            (0..r.len())
                                .map(|i| r.get(i).unwrap_or_default().to_string())
                                .collect(),
                        ),
                        _ => None,
                    })
                    .collect())
            }
        }
    }

    /// The single value a query returns, or `None` where the query fails (a table not made
    /// yet, a database not created yet).
    pub fn try_value(&self, sql: &str) -> Option<String> {
        self.try_rows(sql).ok()?.first()?.first().cloned()
    }

    /// The single value a query returns, as text (NULL as "").
    pub fn value(&self, sql: &str) -> String {
        let rows = self.rows(sql);
        assert_eq!(rows.len(), 1, "one row from {sql}");
        rows[0][0].clone()
    }

    /// Predicates that pick the rows of `table` at the given offsets, in storage order (SQLite's
    /// rowid, PostgreSQL's ctid).
    pub fn rows_at(&self, table: &str, offsets: &[i64]) -> Vec<String> {
        offsets
            .iter()
            .map(|off| match self {
                Store::Sqlite(_) => format!(
                    "rowid = {}",
                    self.value(&format!(
                        "SELECT rowid FROM {table} ORDER BY rowid LIMIT 1 OFFSET {off}"
                    ))
                ),
                Store::Postgres { .. } => format!(
                    "ctid = '{}'",
                    self.value(&format!(
                        "SELECT ctid FROM {table} ORDER BY ctid LIMIT 1 OFFSET {off}"
                    ))
                ),
            })
            .collect()
    }

    /// The columns of `table` with their kind: "integer", "real", "boolean" or "text".
    pub fn columns(&self, table: &str) -> Vec<(String, &'static str)> {
        let kind = |ty: &str| match ty.to_ascii_lowercase().as_str() {
            "integer" | "bigint" => "integer",
            "real" | "double precision" => "real",
            "boolean" => "boolean",
            _ => "text",
        };
        match self {
            Store::Sqlite(p) => {
                let c = rusqlite::Connection::open(p).unwrap();
                let mut stmt = c
                    .prepare(&format!(
                        "SELECT name, type FROM pragma_table_info('{table}')"
                    ))
                    .unwrap();
                stmt.query_map([], |r| Ok((r.get::<_, String>(0)?, r.get::<_, String>(1)?)))
                    .unwrap()
                    .map(|r| {
                        let (name, ty) = r.unwrap();
                        (name, kind(&ty))
                    })
                    .collect()
            }
            Store::Postgres { url } => {
                let mut c = postgres::Client::connect(url, postgres::NoTls).unwrap();
                c.query(
                    "SELECT column_name::text, data_type::text FROM information_schema.columns
                     WHERE table_name = $1 ORDER BY ordinal_position",
                    &[&table],
                )
                .unwrap()
                .iter()
                .map(|r| (r.get::<_, String>(0), kind(&r.get::<_, String>(1))))
                .collect()
            }
        }
    }

    /// A copy of this archive as it is now, for an edit that must not touch the original.
    pub fn copy(&self, dir: &Path, i: usize) -> Store {
        match self {
            Store::Sqlite(p) => {
                let to = dir.join(format!("case-{i}.sqlite"));
                std::fs::copy(p, &to).unwrap();
                Store::Sqlite(to)
            }
            Store::Postgres { url } => {
                let from = url.rsplit('/').next().unwrap().split('?').next().unwrap();
                let db = format!("{from}_c{i}");
                let mut c = admin();
                c.batch_execute(&format!("DROP DATABASE IF EXISTS {db}"))
                    .unwrap();
                c.batch_execute(&format!("CREATE DATABASE {db} TEMPLATE {from}"))
                    .unwrap();
                Store::Postgres {
                    url: with_database(url, &db),
                }
            }
        }
    }

    /// Removes the archive (a file, or a database).
    pub fn remove(self) {
        match self {
            Store::Sqlite(p) => {
                let _ = std::fs::remove_file(p);
            }
            Store::Postgres { url } => {
                let db = url
                    .rsplit('/')
                    .next()
                    .unwrap()
                    .split('?')
                    .next()
                    .unwrap()
                    .to_string();
                let _ =
                    admin().batch_execute(&format!("DROP DATABASE IF EXISTS {db} WITH (FORCE)"));
            }
        }
    }
}
