//! Says, where nobody can miss it, whether the archive tests ran on PostgreSQL too.
//!
//! The archive's tests run on every backend (tests/common/store.rs): on SQLite always, on
//! PostgreSQL where `MP_POSTGRES_URL` names a server. A test harness hides what a passing test
//! prints, so this target (its own harness) says it instead: in capitals when the PostgreSQL
//! half did not run, and it fails when `MP_REQUIRE_POSTGRES` is set (`.ci/run` sets both,
//! after starting a throw-away server), so CI cannot pass by not running it.

fn main() {
    match std::env::var("MP_POSTGRES_URL") {
        Ok(url) if !url.is_empty() => {
            // Connect once, so a wrong address is said here rather than in every test.
            match postgres::Client::connect(&url, postgres::NoTls) {
                Ok(mut c) => {
                    let version: String = c.query_one("SHOW server_version", &[]).unwrap().get(0);
                    println!("archive tests ran on SQLite and on PostgreSQL {version}");
                }
                Err(e) => panic!("MP_POSTGRES_URL names a server that cannot be reached: {e}"),
            }
        }
        _ => {
            eprintln!(
                "\n*** archive tests on PostgreSQL NOT RUN: MP_POSTGRES_URL is not set, so they ran on SQLite only. \
                 Run `bash .ci/run`, which installs PostgreSQL (apt-get install postgresql, as root) and starts a \
                 throw-away server for them. ***\n"
            );
            if std::env::var_os("MP_REQUIRE_POSTGRES").is_some() {
                panic!("MP_REQUIRE_POSTGRES is set and the PostgreSQL archive tests cannot run");
            }
        }
    }
}
