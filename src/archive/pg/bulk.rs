//! Finished records in bulk (imports, generated archives): readings, unit rows and their chain
//! entries each go through one `COPY ... FROM STDIN BINARY`, where an INSERT each would take a
//! round trip per row. Under the chain's lock the entries are linked here, one after another,
//! exactly as `insert_unit_row` would link them one at a time.

use super::*;
use postgres::binary_copy::BinaryCopyInWriter;
use postgres::types::Type;

pub(super) fn import_units(
    tx: &mut postgres::Transaction<'_>,
    records: &[UnitRecord],
) -> Result<(), ArchiveError> {
    let sink = tx.copy_in(
        "COPY readings (run_id, position, step_index, attempt, quantity, channel, raw, t_s, value, took_s)
         FROM STDIN BINARY",
    )?;
    let mut w = BinaryCopyInWriter::new(
        sink,
        &[
            Type::TEXT,
            Type::INT8,
            Type::INT8,
            Type::INT8,
            Type::TEXT,
            Type::TEXT,
            Type::BOOL,
            Type::FLOAT8,
            Type::FLOAT8,
            Type::FLOAT8,
        ],
    );
    for r in records {
        for (key, s) in shared::readings_of_record(r) {
            w.write(&ReadingValues::of(&r.run_id, &key, s).params())?;
        }
    }
    w.finish()?;
    // The unit rows and their entries, linked in order from the chain's newest entry.
    let (mut entry_seq, mut head) = chain::newest(tx)?;
    let mut unit_seq: i64 = tx
        .query_one("SELECT COALESCE(MAX(seq), 0) FROM units", &[])?
        .get(0);
    let mut units = Vec::with_capacity(records.len());
    let mut entries = Vec::with_capacity(records.len());
    for r in records {
        unit_seq += 1;
        entry_seq += 1;
        let hash = crate::record::record_hash(r);
        let text = serde_json::to_string(&stripped(r)).expect("a record serialises");
        let linked = seal::link(&head, "unit", &hash);
        units.push((unit_seq, r, text, hash.clone(), head.clone()));
        entries.push((entry_seq, r, unit_seq, hash, linked.clone(), head));
        head = linked;
    }
    let sink = tx.copy_in(
        "COPY units (seq, run_id, position, serial, firmware, status, finished_at, record, record_sha256, prev_sha256)
         FROM STDIN BINARY",
    )?;
    let mut w = BinaryCopyInWriter::new(
        sink,
        &[
            Type::INT8,
            Type::TEXT,
            Type::INT8,
            Type::TEXT,
            Type::TEXT,
            Type::TEXT,
            Type::TEXT,
            Type::TEXT,
            Type::TEXT,
            Type::TEXT,
        ],
    );
    for (seq, r, text, hash, prev) in &units {
        w.write(&[
            seq,
            &r.run_id,
            &(r.position as i64),
            &r.serial,
            &r.identity.as_ref().map(|i| i.firmware.clone()),
            &format!("{:?}", r.verdict.status).to_lowercase(),
            &r.finished_at,
            text,
            hash,
            prev,
        ])?;
    }
    w.finish()?;
    let sink = tx.copy_in(
        "COPY chain (seq, kind, run_id, position, unit_seq, content_sha256, sha256, prev_sha256)
         FROM STDIN BINARY",
    )?;
    let mut w = BinaryCopyInWriter::new(
        sink,
        &[
            Type::INT8,
            Type::TEXT,
            Type::TEXT,
            Type::INT8,
            Type::INT8,
            Type::TEXT,
            Type::TEXT,
            Type::TEXT,
        ],
    );
    for (seq, r, useq, content, hash, prev) in &entries {
        w.write(&[
            seq,
            &"unit",
            &r.run_id,
            &(r.position as i64),
            useq,
            content,
            hash,
            prev,
        ])?;
    }
    w.finish()?;
    if !records.is_empty() {
        tx.execute(
            "INSERT INTO meta (key, value) VALUES ('chain_head', $1)
             ON CONFLICT (key) DO UPDATE SET value = excluded.value",
            &[&format!("{entry_seq}:{head}")],
        )?;
    }
    Ok(())
}
