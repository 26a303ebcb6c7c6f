//! The canonical form that seals records, tested over open-ended inputs: whatever a device can
//! send and a person can type, a record read back from its JSON file or from the archive has
//! the hash it was sealed with, and `verify` passes on an untouched archive. A false alarm
//! would destroy the integrity check as surely as a missed change.

mod common;
use common::temp_dir;

use meterproof::archive::Archive;
use meterproof::bench::sim::{SimBench, SimConfig};
use meterproof::exec::{self, Silent};
use meterproof::plan::Plan;
use meterproof::record::{self, Sample, UnitRecord, record_hash};
use proptest::prelude::*;
use std::path::Path;
use std::sync::LazyLock;
use std::sync::atomic::{AtomicUsize, Ordering};

/// One real record of the demo on the built-in simulator, to vary.
static RECORD: LazyLock<UnitRecord> = LazyLock::new(|| {
    let plan = Plan::load(Path::new("test-plans/demo.yaml")).unwrap();
    let mut bench = SimBench::new(&SimConfig::new(1, 1)).into_bench();
    exec::run(&plan, &mut bench, &common::ctx(), &mut Silent).remove(0)
});

static CASE: AtomicUsize = AtomicUsize::new(0);

/// One PostgreSQL database for this file's cases, where a server is given: each case has an
/// archive of its own in a schema of its own (the archive's tables are found through the
/// connection's `search_path`), so that its `verify` sees that case alone.
static SHARED: LazyLock<Option<String>> =
    LazyLock::new(|| common::store::server().map(|_| common::store::fresh_database("canonical")));

/// Stores `r` in a fresh SQLite archive and reads it back; `verify` must pass. Where a
/// PostgreSQL server is given, the same through it: the record read back must keep its hash.
fn through_the_archive(r: &UnitRecord) -> UnitRecord {
    let case = CASE.fetch_add(1, Ordering::SeqCst);
    let dir = temp_dir(&format!("canonical-{case}"));
    let path = dir.join("a.sqlite");
    let archive = Archive::open(&path).unwrap();
    archive.import_units(std::slice::from_ref(r)).unwrap();
    let v = archive.verify(None).unwrap();
    assert!(v.failures.is_empty(), "false alarm: {:?}", v.failures);
    let back = archive.unit_records(&r.run_id).unwrap().remove(0);
    drop(archive);
    std::fs::remove_dir_all(&dir).unwrap();
    if let Some(url) = SHARED.as_ref() {
        let schema = format!("case_{case}");
        let mut c = postgres::Client::connect(url, postgres::NoTls).unwrap();
        c.batch_execute(&format!("CREATE SCHEMA {schema}")).unwrap();
        let at = format!("{url}?options=-csearch_path%3D{schema}");
        let shared = Archive::open_at(&meterproof::archive::Location::Postgres(at)).unwrap();
        shared.import_units(std::slice::from_ref(r)).unwrap();
        let v = shared.verify(None).unwrap();
        assert!(
            v.failures.is_empty(),
            "PostgreSQL: false alarm: {:?}",
            v.failures
        );
        let from_pg = shared.unit_records(&r.run_id).unwrap().remove(0);
        assert_eq!(
            record_hash(&from_pg),
            record_hash(r),
            "PostgreSQL: the record read back has another hash"
        );
        drop(shared);
        c.batch_execute(&format!("DROP SCHEMA {schema} CASCADE"))
            .unwrap();
    }
    back
}

/// Sets every series of the record's first measuring step to `values`.
fn with_samples(values: &[f64]) -> UnitRecord {
    let mut r = RECORD.clone();
    let step = r.steps.iter_mut().find(|s| !s.checks.is_empty()).unwrap();
    for c in &mut step.checks {
        c.samples = values
            .iter()
            .enumerate()
            .map(|(i, v)| Sample::at(i as f64 * 0.5, *v))
            .collect();
    }
    r
}

/// Finite floats of every kind: signed zeros, subnormals, the extremes, and anything else.
fn any_finite() -> impl Strategy<Value = f64> {
    prop_oneof![
        Just(-0.0),
        Just(0.0),
        Just(f64::MIN_POSITIVE / 8.0),
        Just(-f64::MIN_POSITIVE / 3.0),
        Just(5e-324),
        Just(f64::MAX),
        Just(f64::MIN),
        Just(-0.00),
        proptest::num::f64::NORMAL | proptest::num::f64::SUBNORMAL | proptest::num::f64::ZERO,
    ]
}

proptest! {
    #![proptest_config(ProptestConfig { cases: 48, .. ProptestConfig::default() })]

    #[test]
    fn any_finite_sample_keeps_its_hash_through_the_archive(
        values in proptest::collection::vec(any_finite(), 0..6)
    ) {
        let r = with_samples(&values);
        let back = through_the_archive(&r);
        prop_assert_eq!(record_hash(&back), record_hash(&r));
    }

    #[test]
    fn any_text_keeps_its_hash_through_the_file_and_the_archive(
        note in "\\PC*|[\\x00-\\x1f\\x7f]{0,8}|\\u{1b}\\[[0-9;]*[A-Za-z]",
        lot in proptest::option::of(any::<String>()),
        operator in any::<String>(),
    ) {
        let mut r = RECORD.clone();
        r.notes = vec![note];
        r.lot = lot;
        r.operator = operator;
        let file = record::to_json(&r).unwrap();
        let read: UnitRecord = serde_json::from_slice(&file).unwrap();
        prop_assert_eq!(record_hash(&read), record_hash(&r));
        let back = through_the_archive(&r);
        prop_assert_eq!(record_hash(&back), record_hash(&r));
    }
}

#[test]
fn a_negative_zero_from_a_device_is_no_tamper_alarm() {
    // A meter answering `p=-0.00W` gives −0.0; the database's REAL column gives back 0.0.
    let r = with_samples(&[-0.0, 0.0, -0.0]);
    let back = through_the_archive(&r);
    assert_eq!(record_hash(&back), record_hash(&r));
}

#[test]
fn empty_collections_seal_and_verify() {
    let mut r = RECORD.clone();
    r.steps.clear();
    r.notes.clear();
    r.verdict.reasons.clear();
    let back = through_the_archive(&r);
    assert_eq!(record_hash(&back), record_hash(&r));
    assert!(back.steps.is_empty());
}

#[test]
fn the_canonical_form_sorts_keys_and_unsigns_zero() {
    let a = serde_json::json!({"b": -0.0, "a": [1, -0.0, "x"]});
    let b = serde_json::json!({"a": [1, 0.0, "x"], "b": 0.0});
    assert_eq!(record::canonical_bytes(&a), record::canonical_bytes(&b));
    assert_eq!(
        String::from_utf8(record::canonical_bytes(&a)).unwrap(),
        r#"{"a":[1,0.0,"x"],"b":0.0}"#
    );
    // Integers stay integers: 1 and 1.0 are different values in a record.
    assert_ne!(
        record::canonical_bytes(&serde_json::json!(1)),
        record::canonical_bytes(&serde_json::json!(1.0))
    );
}

/// A link that lets "NaN" through on one quantity.
struct NotANumber(Box<dyn meterproof::link::DutLink>);

impl meterproof::link::DutLink for NotANumber {
    fn identify(&mut self) -> Result<meterproof::link::Identity, meterproof::link::LinkError> {
        self.0.identify()
    }
    fn read(
        &mut self,
        q: meterproof::plan::Quantity,
        ch: &str,
    ) -> Result<f64, meterproof::link::LinkError> {
        if q == meterproof::plan::Quantity::Current {
            return Ok(f64::NAN);
        }
        self.0.read(q, ch)
    }
    fn describe(&self) -> String {
        "nan".into()
    }
}

#[test]
fn a_value_that_is_not_a_number_is_refused_not_stored() {
    let plan = Plan::load(Path::new("test-plans/demo.yaml")).unwrap();
    let mut bench = SimBench::new(&SimConfig::new(1, 1)).into_bench();
    let inner = std::mem::replace(
        &mut bench.positions[0].link,
        Box::new(meterproof::link::Unreachable::new(
            "x",
            meterproof::link::LinkError::Disconnected("x".into()),
        )),
    );
    bench.positions[0].link = Box::new(NotANumber(inner));
    let r = exec::run(&plan, &mut bench, &common::ctx(), &mut Silent).remove(0);
    assert_eq!(r.verdict.status, meterproof::record::UnitStatus::Incomplete);
    let reasons: Vec<&str> = r.steps.iter().filter_map(|s| s.reason.as_deref()).collect();
    assert!(
        reasons.iter().any(|x| x.contains("not a finite number")),
        "{reasons:?}"
    );
    // Nothing that is not a number reached the record.
    for s in &r.steps {
        for c in &s.checks {
            assert!(c.samples.iter().all(|x| x.value.is_finite()));
        }
    }
    let back = through_the_archive(&r);
    assert_eq!(record_hash(&back), record_hash(&r));
}
