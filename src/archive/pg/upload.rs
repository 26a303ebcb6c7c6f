//! Receiving a station's journal: what a bench kept locally while the shared archive was out of
//! reach (or always, with `--journal`), appended here exactly once and in order.
//!
//! One transaction per upload, under the chain's lock: it reads how far this journal was taken
//! before (`journal_uploads`), receives the rows beyond (the journal's chain entries after that
//! mark, the rows they seal, the readings after that mark), inserts them, re-seals each entry in
//! this archive's chain (same kind, same content hash; a unit entry names the unit's number
//! here), and moves the mark. A crash or a lost connection before the commit leaves nothing; a
//! retry after it finds the mark moved and sends nothing twice.

use super::*;
use crate::archive::image::Rows;
use crate::archive::journal::{Marks, Pending, Uploaded};
use crate::archive::seal::EntryColumns;
use std::collections::HashMap;

impl Postgres {
    /// Takes what `pending` gives beyond this journal's mark, in one transaction.
    pub fn receive_journal(
        &self,
        journal_id: &str,
        pending: &mut Pending<'_>,
    ) -> Result<(Uploaded, Marks), ArchiveError> {
        let mut client = self.client.borrow_mut();
        let mut tx = client.transaction()?;
        lock_chain(&mut tx)?;
        let marks = tx
            .query_opt(
                "SELECT chain_upto, readings_upto FROM journal_uploads WHERE journal_id = $1",
                &[&journal_id],
            )?
            .map(|r| Marks {
                chain_upto: r.get(0),
                readings_upto: r.get(1),
            })
            .unwrap_or_default();
        let mut moved = marks;
        let mut up = Uploaded::default();
        let mut unit_seq: HashMap<i64, i64> = HashMap::new();
        let mut runs = std::collections::BTreeSet::new();
        pending(&marks, &mut |rows| {
            match rows {
                Rows::Meta(_) => {}
                Rows::Plans(v) => {
                    for p in v {
                        tx.execute(
                            "INSERT INTO plans (sha256, plan_id, revision, file, text)
                             VALUES ($1, $2, $3, $4, $5) ON CONFLICT (sha256) DO NOTHING",
                            &[&p.sha256, &p.plan_id, &p.revision, &p.file, &p.text],
                        )?;
                    }
                }
                Rows::Runs(v) => {
                    for r in v {
                        tx.execute(
                            "INSERT INTO runs (seq, run_id, plan_sha256, lot, station, operator, bench,
                                               tool_version, started_at, finished_at, state)
                             VALUES ((SELECT COALESCE(MAX(seq), 0) + 1 FROM runs),
                                     $1, $2, $3, $4, $5, $6, $7, $8, $9, $10)
                             ON CONFLICT (run_id) DO UPDATE
                                 SET state = excluded.state, finished_at = excluded.finished_at",
                            &[
                                &r.run_id,
                                &r.plan_sha256,
                                &r.lot,
                                &r.station,
                                &r.operator,
                                &r.bench,
                                &r.tool_version,
                                &r.started_at,
                                &r.finished_at,
                                &r.state,
                            ],
                        )?;
                        runs.insert(r.run_id);
                    }
                }
                Rows::Seen(v) => {
                    for r in v {
                        tx.execute(
                            "INSERT INTO run_units (run_id, position, serial) VALUES ($1, $2, $3)
                             ON CONFLICT DO NOTHING",
                            &[&r.run_id, &r.position, &r.serial],
                        )?;
                    }
                }
                Rows::Readings(v) => {
                    let stmt = tx.prepare(INSERT_READING)?;
                    for r in v {
                        tx.execute(
                            &stmt,
                            &[
                                &r.run_id,
                                &r.position,
                                &r.step_index,
                                &r.attempt,
                                &r.quantity,
                                &r.channel,
                                &r.raw,
                                &r.t_s,
                                &r.value,
                                &r.took_s,
                            ],
                        )?;
                        moved.readings_upto = moved.readings_upto.max(r.id);
                        up.readings += 1;
                    }
                }
                Rows::Steps(v) => {
                    for r in v {
                        tx.execute(
                            "INSERT INTO steps (run_id, position, step_index, attempt, status, record)
                             VALUES ($1, $2, $3, $4, $5, $6)",
                            &[&r.run_id, &r.position, &r.step_index, &r.attempt, &r.status, &r.record],
                        )?;
                    }
                }
                Rows::Units(v) => {
                    for u in v {
                        let seq: i64 = tx
                            .query_one("SELECT COALESCE(MAX(seq), 0) + 1 FROM units", &[])?
                            .get(0);
                        tx.execute(
                            "INSERT INTO units (seq, run_id, position, serial, firmware, status, finished_at,
                                                record, record_sha256, prev_sha256)
                             VALUES ($1, $2, $3, $4, $5, $6, $7, $8, $9, $10)",
                            &[
                                &seq,
                                &u.run_id,
                                &u.position,
                                &u.serial,
                                &u.firmware,
                                &u.status,
                                &u.finished_at,
                                &u.record,
                                &u.record_sha256,
                                &u.prev_sha256,
                            ],
                        )?;
                        unit_seq.insert(u.seq, seq);
                        up.units += 1;
                    }
                }
                Rows::Chain(v) => {
                    for e in v {
                        let mapped = match e.unit_seq {
                            Some(s) => Some(*unit_seq.get(&s).ok_or_else(|| {
                                ArchiveError::Corrupt(format!(
                                    "the journal's chain entry {} names unit record {s}, which it did not send",
                                    e.seq
                                ))
                            })?),
                            None => None,
                        };
                        let columns = EntryColumns {
                            run_id: &e.run_id,
                            position: e.position,
                            step_index: e.step_index,
                            attempt: e.attempt,
                            unit_seq: mapped,
                        };
                        append_as(&mut tx, &e.kind, &columns, &e.content_sha256)?;
                        moved.chain_upto = moved.chain_upto.max(e.seq);
                        up.entries += 1;
                    }
                }
            }
            Ok(())
        })?;
        up.runs = runs.len() as u64;
        if moved != marks {
            tx.execute(
                "INSERT INTO journal_uploads (journal_id, chain_upto, readings_upto, uploaded_at)
                 VALUES ($1, $2, $3, $4)
                 ON CONFLICT (journal_id) DO UPDATE SET chain_upto = excluded.chain_upto,
                     readings_upto = excluded.readings_upto, uploaded_at = excluded.uploaded_at",
                &[
                    &journal_id,
                    &moved.chain_upto,
                    &moved.readings_upto,
                    &chrono::Utc::now().to_rfc3339(),
                ],
            )?;
        }
        tx.commit()?;
        Ok((up, moved))
    }
}
