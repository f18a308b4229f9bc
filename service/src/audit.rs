//! The rules of the tamper-evident audit log: what an entry holds, how it is hashed into the
//! chain, which stored facts it vouches for, and how a chain is checked. Pure: the store
//! (`db::audit`) reads and writes the rows; this module only computes and compares.
//!
//! Every state change of a run or matrix appends one entry. An entry's `content` is a JSON
//! object in RFC 8785 canonical form; `content_sha256` is the SHA-256 of those bytes, and
//! `entry_sha256` is the SHA-256 of the canonical form of
//! `{"seq", "at", "kind", "run_id", "content_sha256", "prev_sha256"}`, where `prev_sha256` is
//! the previous entry's `entry_sha256` (64 zeros before the first). Editing, inserting or
//! deleting an entry breaks the chain from there on.
//!
//! Entries that describe stored records (a submission, an outcome, a stored matrix) carry
//! `facts`: the SHA-256 of each immutable stored field as it was written. The check
//! recomputes the facts from the records as they are now, so a record edited after the fact
//! (a result changed in the database file) breaks its entry even though the chain itself was
//! not touched. A chain rewritten in full from some point on is only caught against a head
//! hash kept outside the database (`GET /v1/audit` answers it; keep a copy).

use crate::provenance::sha256_hex;
use serde::Serialize;
use serde_json::{json, Map, Value};

/// `prev_sha256` of the first entry.
pub const GENESIS_SHA256: &str = "0000000000000000000000000000000000000000000000000000000000000000";

/// What happened.
#[derive(Debug, Clone, Copy, PartialEq, Eq)]
pub enum EventKind {
    /// A matrix was stored (by `POST /v1/matrices` or with the first job that used it).
    MatrixStored,
    /// A run was accepted.
    Submitted,
    /// A worker claimed a run (first start or a rescue).
    Started,
    /// An ensemble chunk was committed to a run's checkpoint log.
    ChunkCommitted,
    /// A running run's checkpoint log was emptied (its ensembles start afresh).
    ChunksDiscarded,
    /// Cancellation of a running run was requested.
    CancelRequested,
    /// A running run went back to the queue (shutdown).
    Requeued,
    /// A run ended: succeeded, failed or cancelled.
    Finished,
    /// A re-verification ended (its check run finished); the entry's run is the original.
    Verified,
}

impl EventKind {
    /// Every kind.
    pub const ALL: [EventKind; 9] = [
        EventKind::MatrixStored,
        EventKind::Submitted,
        EventKind::Started,
        EventKind::ChunkCommitted,
        EventKind::ChunksDiscarded,
        EventKind::CancelRequested,
        EventKind::Requeued,
        EventKind::Finished,
        EventKind::Verified,
    ];

    /// The stored and served name.
    pub fn as_str(self) -> &'static str {
        match self {
            EventKind::MatrixStored => "matrix_stored",
            EventKind::Submitted => "submitted",
            EventKind::Started => "started",
            EventKind::ChunkCommitted => "chunk_committed",
            EventKind::ChunksDiscarded => "chunks_discarded",
            EventKind::CancelRequested => "cancel_requested",
            EventKind::Requeued => "requeued",
            EventKind::Finished => "finished",
            EventKind::Verified => "verified",
        }
    }

    /// The kind named `name`.
    pub fn parse(name: &str) -> Option<Self> {
        Self::ALL.into_iter().find(|k| k.as_str() == name)
    }

    /// Which stored record the entry's `facts` describe, if any.
    pub fn witness(self) -> Option<Witness> {
        match self {
            EventKind::MatrixStored => Some(Witness::Matrix),
            EventKind::Submitted => Some(Witness::Submission),
            EventKind::Finished => Some(Witness::Outcome),
            EventKind::Verified => Some(Witness::Verification),
            _ => None,
        }
    }
}

/// The stored record an entry vouches for.
#[derive(Debug, Clone, Copy, PartialEq, Eq)]
pub enum Witness {
    /// The matrix named by the content's `matrix_sha256`: [`matrix_facts`].
    Matrix,
    /// The run's fields fixed at submission: [`submission_facts`].
    Submission,
    /// The run's fields fixed when it ended: [`outcome_facts`].
    Outcome,
    /// The verification named by the content's `check_run_id`: [`verification_facts`].
    Verification,
}

/// One entry of the log, as stored and served.
#[derive(Debug, Clone, PartialEq, Serialize)]
pub struct Entry {
    /// Position, from 1, without gaps.
    pub seq: u64,
    /// RFC 3339 UTC.
    pub at: String,
    /// An [`EventKind`] name.
    pub kind: String,
    /// The run concerned, if any.
    pub run_id: Option<String>,
    /// The content: canonical JSON text.
    pub content: String,
    /// SHA-256 of `content`.
    pub content_sha256: String,
    /// `entry_sha256` of the entry before (or [`GENESIS_SHA256`]).
    pub prev_sha256: String,
    /// SHA-256 of the canonical header (module docs).
    pub entry_sha256: String,
}

/// RFC 8785 canonical text of `value`.
pub fn canonical(value: &Value) -> String {
    serde_jcs::to_string(value).expect("a JSON value always serialises")
}

/// The hash that links an entry into the chain.
pub fn entry_sha256(
    seq: u64,
    at: &str,
    kind: &str,
    run_id: Option<&str>,
    content_sha256: &str,
    prev_sha256: &str,
) -> String {
    let header = json!({
        "seq": seq,
        "at": at,
        "kind": kind,
        "run_id": run_id,
        "content_sha256": content_sha256,
        "prev_sha256": prev_sha256,
    });
    sha256_hex(canonical(&header).as_bytes())
}

/// The entry that follows `prev` (`(seq, entry_sha256)` of the last entry, `None` for the
/// first).
pub fn next_entry(
    prev: Option<(u64, &str)>,
    at: &str,
    kind: EventKind,
    run_id: Option<&str>,
    content: &Value,
) -> Entry {
    let (seq, prev_sha256) = match prev {
        Some((seq, hash)) => (seq + 1, hash.to_owned()),
        None => (1, GENESIS_SHA256.to_owned()),
    };
    let content = canonical(content);
    let content_sha256 = sha256_hex(content.as_bytes());
    let entry_sha256 = entry_sha256(
        seq,
        at,
        kind.as_str(),
        run_id,
        &content_sha256,
        &prev_sha256,
    );
    Entry {
        seq,
        at: at.to_owned(),
        kind: kind.as_str().to_owned(),
        run_id: run_id.map(str::to_owned),
        content,
        content_sha256,
        prev_sha256,
        entry_sha256,
    }
}

/// A run's stored fields, as the store reads them.
#[derive(Debug, Clone, Default)]
pub struct RunFields {
    /// Raw request bytes.
    pub request: Vec<u8>,
    /// Stored spec text.
    pub spec: String,
    /// Canonical spec hash column.
    pub spec_sha256: String,
    /// Matrix reference.
    pub matrix_sha256: String,
    /// Series name.
    pub series: Option<String>,
    /// Idempotency key.
    pub idempotency_key: Option<String>,
    /// Submission time.
    pub submitted_at: String,
    /// The run whose results were reused.
    pub reused_from: Option<String>,
    /// Where the completion notice goes.
    pub notify_url: Option<String>,
    /// Status.
    pub status: String,
    /// Provenance text.
    pub provenance: Option<String>,
    /// Results text.
    pub results: Option<String>,
    /// Warnings text.
    pub warnings: String,
    /// Link rows text.
    pub sensitivity: Option<String>,
    /// What-if text.
    pub whatif: Option<String>,
    /// Failure message.
    pub error: Option<String>,
    /// End time.
    pub finished_at: Option<String>,
}

fn hash_of(text: Option<&str>) -> Value {
    text.map_or(Value::Null, |t| Value::String(sha256_hex(t.as_bytes())))
}

/// The fields of a run fixed when it was accepted, as stored.
pub fn submission_facts(run: &RunFields) -> Value {
    submission_facts_from(&Submission {
        request_sha256: &sha256_hex(&run.request),
        spec_text_sha256: &sha256_hex(run.spec.as_bytes()),
        spec_sha256: &run.spec_sha256,
        matrix_sha256: &run.matrix_sha256,
        series: run.series.as_deref(),
        idempotency_key: run.idempotency_key.as_deref(),
        submitted_at: &run.submitted_at,
        reused_from: run.reused_from.as_deref(),
        notify_url: run.notify_url.as_deref(),
    })
}

/// A run's fields fixed at submission, with the large ones already hashed (the submission
/// hashes them before it takes the write lock).
#[derive(Debug, Clone, Copy)]
pub struct Submission<'a> {
    /// SHA-256 of the raw request bytes.
    pub request_sha256: &'a str,
    /// SHA-256 of the stored spec text.
    pub spec_text_sha256: &'a str,
    /// Canonical spec hash.
    pub spec_sha256: &'a str,
    /// Matrix reference.
    pub matrix_sha256: &'a str,
    /// Series name.
    pub series: Option<&'a str>,
    /// Idempotency key.
    pub idempotency_key: Option<&'a str>,
    /// Submission time.
    pub submitted_at: &'a str,
    /// The run whose results were reused.
    pub reused_from: Option<&'a str>,
    /// Where the completion notice goes.
    pub notify_url: Option<&'a str>,
}

/// [`submission_facts`] of fields in hand.
pub fn submission_facts_from(s: &Submission<'_>) -> Value {
    json!({
        "request_sha256": s.request_sha256,
        "spec_text_sha256": s.spec_text_sha256,
        "spec_sha256": s.spec_sha256,
        "matrix_sha256": s.matrix_sha256,
        "series": s.series,
        "idempotency_key": s.idempotency_key,
        "submitted_at": s.submitted_at,
        "reused_from": s.reused_from,
        "notify_url": s.notify_url,
    })
}

/// The fields of a run fixed when it ended.
pub fn outcome_facts(run: &RunFields) -> Value {
    json!({
        "status": run.status,
        "provenance_sha256": hash_of(run.provenance.as_deref()),
        "results_sha256": hash_of(run.results.as_deref()),
        "warnings_sha256": sha256_hex(run.warnings.as_bytes()),
        "sensitivity_sha256": hash_of(run.sensitivity.as_deref()),
        "whatif_sha256": hash_of(run.whatif.as_deref()),
        "error_sha256": hash_of(run.error.as_deref()),
        "finished_at": run.finished_at,
    })
}

/// The fields of a finished verification, as stored.
pub fn verification_facts(row: &Value) -> Value {
    let mut facts = row.clone();
    if let Some(text) = row.get("differences").and_then(Value::as_str) {
        facts["differences"] = Value::String(sha256_hex(text.as_bytes()));
    }
    facts
}

/// The fields of a stored matrix.
pub fn matrix_facts(demes: u64, entries: &str, created_at: &str) -> Value {
    json!({
        "demes": demes,
        "entries_sha256": sha256_hex(entries.as_bytes()),
        "created_at": created_at,
    })
}

/// The content of an entry: `members`, plus `facts` when the kind vouches for a record.
pub fn content(members: Value, facts: Option<Value>) -> Value {
    let mut object = match members {
        Value::Object(map) => map,
        _ => Map::new(),
    };
    if let Some(facts) = facts {
        object.insert("facts".to_owned(), facts);
    }
    Value::Object(object)
}

/// The first entry that does not hold.
#[derive(Debug, Clone, PartialEq, Serialize)]
pub struct BrokenEntry {
    /// Its position (for a missing entry: the position expected).
    pub seq: u64,
    /// Its kind as stored.
    pub kind: String,
    /// Its run, as stored.
    pub run_id: Option<String>,
    /// What does not hold.
    pub reason: String,
}

/// The outcome of checking a whole log.
#[derive(Debug, Clone, PartialEq, Serialize)]
pub struct Verdict {
    /// Whether every entry holds.
    pub intact: bool,
    /// Entries checked.
    pub entries: u64,
    /// `entry_sha256` of the last entry (the head to compare with a copy kept elsewhere).
    pub head_sha256: String,
    /// The first entry that does not hold.
    pub first_broken: Option<BrokenEntry>,
}

/// Checks a log entry by entry, in order. Feed every entry to [`ChainCheck::check`] with
/// the current facts of the record it vouches for, then take [`ChainCheck::verdict`].
#[derive(Debug, Clone)]
pub struct ChainCheck {
    entries: u64,
    head: String,
    first_broken: Option<BrokenEntry>,
}

impl Default for ChainCheck {
    fn default() -> Self {
        Self {
            entries: 0,
            head: GENESIS_SHA256.to_owned(),
            first_broken: None,
        }
    }
}

/// What the store found for the record an entry vouches for.
#[derive(Debug, Clone, PartialEq)]
pub enum Current {
    /// The entry vouches for no record.
    NotApplicable,
    /// The record is gone.
    Missing,
    /// The record's facts as they are now.
    Facts(Value),
}

impl ChainCheck {
    /// Checks `entry`, the next entry in `seq` order; `current` is what the store holds now
    /// for the record it vouches for ([`EventKind::witness`]). After the first broken entry
    /// the rest are only counted.
    pub fn check(&mut self, entry: &Entry, current: &Current) {
        self.entries += 1;
        if self.first_broken.is_none() {
            if let Err(reason) = self.holds(entry, current) {
                self.first_broken = Some(BrokenEntry {
                    seq: entry.seq,
                    kind: entry.kind.clone(),
                    run_id: entry.run_id.clone(),
                    reason,
                });
            }
        }
        self.head = entry.entry_sha256.clone();
    }

    fn holds(&self, entry: &Entry, current: &Current) -> Result<(), String> {
        if entry.seq != self.entries {
            return Err(format!(
                "position {} found where {} was expected (an entry was removed or inserted)",
                entry.seq, self.entries
            ));
        }
        if entry.prev_sha256 != self.head {
            return Err("prev_sha256 does not match the entry before".to_owned());
        }
        let content_sha256 = sha256_hex(entry.content.as_bytes());
        if content_sha256 != entry.content_sha256 {
            return Err("the content does not match its content_sha256".to_owned());
        }
        let expected = entry_sha256(
            entry.seq,
            &entry.at,
            &entry.kind,
            entry.run_id.as_deref(),
            &entry.content_sha256,
            &entry.prev_sha256,
        );
        if expected != entry.entry_sha256 {
            return Err("entry_sha256 does not match the entry".to_owned());
        }
        let Some(kind) = EventKind::parse(&entry.kind) else {
            return Err(format!("unknown kind {:?}", entry.kind));
        };
        let content: Value = serde_json::from_str(&entry.content)
            .map_err(|e| format!("the content is not JSON: {e}"))?;
        if kind.witness().is_none() {
            return Ok(());
        }
        let recorded = content.get("facts").unwrap_or(&Value::Null);
        match current {
            Current::NotApplicable => Err("no record was looked up for this entry".to_owned()),
            Current::Missing => Err("the record this entry describes is missing".to_owned()),
            Current::Facts(now) => {
                let changed = changed_members(recorded, now);
                if changed.is_empty() {
                    Ok(())
                } else {
                    Err(format!(
                        "the stored record no longer matches this entry: {} changed",
                        changed.join(", ")
                    ))
                }
            }
        }
    }

    /// The verdict over every entry checked.
    pub fn verdict(&self) -> Verdict {
        Verdict {
            intact: self.first_broken.is_none(),
            entries: self.entries,
            head_sha256: self.head.clone(),
            first_broken: self.first_broken.clone(),
        }
    }
}

/// Names of the members that differ between two fact objects (all of them when either is not
/// an object).
fn changed_members(recorded: &Value, now: &Value) -> Vec<String> {
    match (recorded.as_object(), now.as_object()) {
        (Some(a), Some(b)) => {
            let mut names: Vec<String> = a
                .keys()
                .chain(b.keys())
                .filter(|k| a.get(*k) != b.get(*k))
                .cloned()
                .collect();
            names.sort();
            names.dedup();
            names
        }
        _ if recorded == now => Vec::new(),
        _ => vec!["facts".to_owned()],
    }
}

#[cfg(test)]
mod tests {
    use super::*;

    fn chain(n: usize) -> Vec<Entry> {
        let mut entries: Vec<Entry> = Vec::new();
        for i in 0..n {
            let prev = entries.last().map(|e| (e.seq, e.entry_sha256.as_str()));
            let e = next_entry(
                prev,
                "2026-12-01T00:00:00.000Z",
                EventKind::Started,
                Some("run"),
                &json!({"attempt": i}),
            );
            entries.push(e);
        }
        entries
    }

    fn check_all(entries: &[Entry]) -> Verdict {
        let mut check = ChainCheck::default();
        for e in entries {
            check.check(e, &Current::NotApplicable);
        }
        check.verdict()
    }

    #[test]
    fn an_untouched_chain_holds_and_names_its_head() {
        let entries = chain(5);
        let v = check_all(&entries);
        assert!(v.intact, "{v:?}");
        assert_eq!(v.entries, 5);
        assert_eq!(v.head_sha256, entries[4].entry_sha256);
        assert_eq!(entries[0].prev_sha256, GENESIS_SHA256);
    }

    #[test]
    fn edited_removed_or_reordered_entries_are_named() {
        let mut edited = chain(5);
        edited[2].content = canonical(&json!({"attempt": 99}));
        assert_eq!(check_all(&edited).first_broken.unwrap().seq, 3);

        let mut removed = chain(5);
        removed.remove(1);
        assert_eq!(check_all(&removed).first_broken.unwrap().seq, 3);

        let mut rehashed = chain(5);
        rehashed[3].content = canonical(&json!({"attempt": 7}));
        rehashed[3].content_sha256 = sha256_hex(rehashed[3].content.as_bytes());
        let broken = check_all(&rehashed).first_broken.unwrap();
        assert_eq!(broken.seq, 4);
        assert!(broken.reason.contains("entry_sha256"), "{broken:?}");
    }

    #[test]
    fn a_record_changed_after_its_entry_breaks_that_entry() {
        let run = RunFields {
            status: "succeeded".into(),
            results: Some("[1]".into()),
            ..RunFields::default()
        };
        let facts = outcome_facts(&run);
        let entry = next_entry(
            None,
            "t",
            EventKind::Finished,
            Some("r"),
            &content(json!({"run_id": "r"}), Some(facts.clone())),
        );
        let mut ok = ChainCheck::default();
        ok.check(&entry, &Current::Facts(facts));
        assert!(ok.verdict().intact);

        let edited = RunFields {
            results: Some("[2]".into()),
            ..run
        };
        let mut bad = ChainCheck::default();
        bad.check(&entry, &Current::Facts(outcome_facts(&edited)));
        let broken = bad.verdict().first_broken.unwrap();
        assert_eq!(broken.seq, 1);
        assert!(broken.reason.contains("results_sha256"), "{broken:?}");

        let mut gone = ChainCheck::default();
        gone.check(&entry, &Current::Missing);
        assert!(!gone.verdict().intact);
    }
}
