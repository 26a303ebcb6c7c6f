//! Helpers shared by the integration tests.
#![allow(dead_code)]

use meterproof::exec::RunContext;
use meterproof::record::UnitRecord;
use std::path::{Path, PathBuf};
use std::process::Command;

/// The real binary.
pub fn bin() -> Command {
    Command::new(env!("CARGO_BIN_EXE_meterproof"))
}

/// A fresh, empty folder for one test.
pub fn temp_dir(name: &str) -> PathBuf {
    let d = std::env::temp_dir().join(format!("meterproof-{name}-{}", std::process::id()));
    let _ = std::fs::remove_dir_all(&d);
    std::fs::create_dir_all(&d).unwrap();
    d
}

/// A run context for engine-level tests.
pub fn ctx() -> RunContext {
    RunContext {
        run_id: "test".into(),
        operator: "tester".into(),
        lot: None,
        tool_version: "test".into(),
        notes: Vec::new(),
    }
}

/// Every unit record in the run folders under `out`, by position.
pub fn records_in(out: &Path) -> Vec<UnitRecord> {
    let mut rs: Vec<UnitRecord> = std::fs::read_dir(out)
        .unwrap()
        .map(|e| e.unwrap().path())
        .filter(|p| p.is_dir())
        .flat_map(|d| std::fs::read_dir(d).unwrap().map(|e| e.unwrap().path()))
        .filter(|p| p.extension().is_some_and(|x| x == "json"))
        .map(|p| meterproof::record::read(&p).unwrap())
        .collect();
    rs.sort_by_key(|r| (r.run_id.clone(), r.position));
    rs
}
