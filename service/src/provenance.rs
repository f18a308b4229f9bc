//! Provenance of a run: the hashes, seed, generator, versions and host an auditor needs to
//! recompute and compare it.
//!
//! This module owns the canonical matrix encoding of `api.md` (SHA-256 over the ASCII tag
//! [`MATRIX_TAG`], `m` as `u64` little endian, then the `m x m` entries row-major as IEEE-754
//! binary64 little endian, `-0.0` written as `0.0`), the spec hash (SHA-256 of the RFC 8785
//! canonical JSON of the normalised spec) and the description of the random streams.

use crate::spec::{JobSpec, ValidatedJob};
use serde::Serialize;
use sha2::{Digest, Sha256};
use std::time::{SystemTime, UNIX_EPOCH};

/// First bytes of the canonical matrix encoding.
pub const MATRIX_TAG: &[u8] = b"demefix-matrix-v1";

/// Crate version and git commit, e.g. `0.1.0+1a2b3c4`.
pub const SERVICE_VERSION: &str =
    concat!(env!("CARGO_PKG_VERSION"), "+", env!("DEMEFIX_GIT_COMMIT"));

/// How the ensemble's random streams are made; mirrors `demefix_science::ensemble::stream`.
pub fn rng_description() -> String {
    format!(
        "ChaCha8 (rand_chacha 0.10); key = SHA-256(\"{}\", seed as u64 LE, bits of 1 + s as \
         u64 LE, start tag byte and deme index as u64 LE, rule tag byte, scope tag byte); \
         stream = replicate index (set_stream)",
        String::from_utf8_lossy(demefix_science::ensemble::stream::DOMAIN_TAG)
    )
}

/// Lowercase hex SHA-256 of `bytes`.
pub fn sha256_hex(bytes: &[u8]) -> String {
    hex::encode(Sha256::digest(bytes))
}

/// SHA-256 of the canonical encoding of an `m x m` matrix given row-major. Entries must be
/// finite (validation rejects NaN and infinities before anything is hashed).
pub fn matrix_sha256(m: usize, row_major: impl IntoIterator<Item = f64>) -> String {
    let mut h = Sha256::new();
    h.update(MATRIX_TAG);
    h.update((m as u64).to_le_bytes());
    let mut count = 0usize;
    for x in row_major {
        debug_assert!(x.is_finite(), "non-finite matrix entry reached the hash");
        let x = if x == 0.0 { 0.0 } else { x };
        h.update(x.to_le_bytes());
        count += 1;
    }
    debug_assert_eq!(count, m * m, "the matrix is not {m} x {m}");
    hex::encode(h.finalize())
}

/// SHA-256 of the RFC 8785 canonical JSON of the normalised spec.
pub fn spec_sha256(spec: &JobSpec) -> String {
    let bytes = serde_jcs::to_vec(spec).expect("a job spec always serialises");
    sha256_hex(&bytes)
}

/// Host name from `/proc/sys/kernel/hostname`, else `$HOSTNAME`, else `unknown`.
pub fn host_name() -> String {
    std::fs::read_to_string("/proc/sys/kernel/hostname")
        .ok()
        .map(|s| s.trim().to_owned())
        .filter(|s| !s.is_empty())
        .or_else(|| std::env::var("HOSTNAME").ok().filter(|s| !s.is_empty()))
        .unwrap_or_else(|| "unknown".to_owned())
}

/// `t` (seconds since the Unix epoch) as an RFC 3339 UTC timestamp, `YYYY-MM-DDTHH:MM:SSZ`.
pub fn rfc3339(t: u64) -> String {
    let days = (t / 86_400) as i64;
    let secs = t % 86_400;
    // Civil date from days since 1970-01-01 (proleptic Gregorian; common practice, the
    // era-based day count of H. Hinnant's `civil_from_days`).
    let z = days + 719_468;
    let era = z.div_euclid(146_097);
    let doe = z.rem_euclid(146_097);
    let yoe = (doe - doe / 1460 + doe / 36_524 - doe / 146_096) / 365;
    let doy = doe - (365 * yoe + yoe / 4 - yoe / 100);
    let mp = (5 * doy + 2) / 153;
    let day = doy - (153 * mp + 2) / 5 + 1;
    let month = if mp < 10 { mp + 3 } else { mp - 9 };
    let year = yoe + era * 400 + i64::from(month <= 2);
    format!(
        "{year:04}-{month:02}-{day:02}T{:02}:{:02}:{:02}Z",
        secs / 3600,
        secs / 60 % 60,
        secs % 60
    )
}

/// The current time as RFC 3339 UTC.
pub fn now_rfc3339() -> String {
    let t = SystemTime::now()
        .duration_since(UNIX_EPOCH)
        .map_or(0, |d| d.as_secs());
    rfc3339(t)
}

/// The `provenance` member of a result document.
#[derive(Debug, Clone, PartialEq, Eq, Serialize)]
pub struct Provenance {
    /// SHA-256 of the raw request bytes.
    pub request_sha256: String,
    /// SHA-256 of the RFC 8785 canonical JSON of `spec`.
    pub spec_sha256: String,
    /// Canonical hash of the matrix as sent.
    pub matrix_sha256: String,
    /// Canonical hash of the matrix the method used (`B` or `F` after normalisation).
    pub normalised_matrix_sha256: String,
    /// Job seed, when the job has one.
    #[serde(skip_serializing_if = "Option::is_none")]
    pub seed: Option<u64>,
    /// Generator and stream scheme of the ensembles.
    pub rng: String,
    /// `exact`, `ensemble` or `approximation:<name>`.
    pub method: String,
    /// Version of the numerical methods.
    pub method_version: &'static str,
    /// Crate version and git commit.
    pub service_version: &'static str,
    /// Host that computed the run.
    pub host: String,
    /// Worker threads used.
    pub threads: usize,
    /// When the computation finished, RFC 3339 UTC.
    pub computed_at: String,
}

impl Provenance {
    /// Provenance of `job`, received as `request`, computed by `method` on `threads`.
    pub fn new(job: &ValidatedJob, request: &[u8], method: &str, threads: usize) -> Self {
        let spec = job.spec();
        let m = spec.population.demes.len();
        Self {
            request_sha256: sha256_hex(request),
            spec_sha256: spec_sha256(spec),
            matrix_sha256: matrix_sha256(m, spec.migration.matrix.iter().flatten().copied()),
            normalised_matrix_sha256: matrix_sha256(
                m,
                job.model().kernel().dense().iter().copied(),
            ),
            seed: spec.method.seed,
            rng: rng_description(),
            method: method.to_owned(),
            method_version: demefix_science::METHOD_VERSION,
            service_version: SERVICE_VERSION,
            host: host_name(),
            threads,
            computed_at: now_rfc3339(),
        }
    }
}

/// A JSON object whose members keep their order and their text (numbers are not re-read).
struct OrderedObject(Vec<(String, Box<serde_json::value::RawValue>)>);

impl<'de> serde::Deserialize<'de> for OrderedObject {
    fn deserialize<D: serde::Deserializer<'de>>(d: D) -> Result<Self, D::Error> {
        struct Members;
        impl<'de> serde::de::Visitor<'de> for Members {
            type Value = OrderedObject;
            fn expecting(&self, f: &mut std::fmt::Formatter<'_>) -> std::fmt::Result {
                f.write_str("a JSON object")
            }
            fn visit_map<A: serde::de::MapAccess<'de>>(
                self,
                mut map: A,
            ) -> Result<OrderedObject, A::Error> {
                let mut members = Vec::new();
                while let Some(member) = map.next_entry()? {
                    members.push(member);
                }
                Ok(OrderedObject(members))
            }
        }
        d.deserialize_map(Members)
    }
}

impl Serialize for OrderedObject {
    fn serialize<S: serde::Serializer>(&self, s: S) -> Result<S::Ok, S::Error> {
        use serde::ser::SerializeMap;
        let mut map = s.serialize_map(Some(self.0.len()))?;
        for (k, v) in &self.0 {
            map.serialize_entry(k, v)?;
        }
        map.end()
    }
}

/// The provenance of a run that reuses the results of run `reused_from`: the earlier
/// provenance (`original`, JSON object text) member for member, except that
/// `request_sha256` is this request's and a `reused_from` member follows it. Everything
/// else (hashes, seed, method and its version, the host, threads and `computed_at` of the
/// computation) describes the computation that produced the results, and is kept.
pub fn reused_provenance(
    original: &str,
    request_sha256: &str,
    reused_from: &str,
) -> Result<String, serde_json::Error> {
    let OrderedObject(members) = serde_json::from_str(original)?;
    let text = |s: &str| serde_json::value::to_raw_value(s);
    let mut out = Vec::with_capacity(members.len() + 1);
    let mut placed = false;
    for (k, v) in members {
        match k.as_str() {
            "reused_from" => {}
            "request_sha256" => {
                out.push((k, text(request_sha256)?));
                out.push(("reused_from".to_owned(), text(reused_from)?));
                placed = true;
            }
            _ => out.push((k, v)),
        }
    }
    if !placed {
        out.insert(0, ("request_sha256".to_owned(), text(request_sha256)?));
        out.insert(1, ("reused_from".to_owned(), text(reused_from)?));
    }
    serde_json::to_string(&OrderedObject(out))
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn the_matrix_hash_matches_an_independent_python_recipe() {
        // Computed independently with python3 (standard library only):
        //   import hashlib, struct
        //   rows = [[0.0, 40.0, 12.0], [35.0, -0.0, 5.0], [9.0, 4.0, 0.1]]
        //   m = len(rows)
        //   data = (b'demefix-matrix-v1' + struct.pack('<Q', m)
        //           + struct.pack('<%dd' % (m*m), *[x + 0.0 for r in rows for x in r]))
        //   print(hashlib.sha256(data).hexdigest())
        // (`x + 0.0` turns -0.0 into 0.0, as the encoding requires.)
        let rows = [[0.0, 40.0, 12.0], [35.0, -0.0, 5.0], [9.0, 4.0, 0.1]];
        assert_eq!(
            matrix_sha256(3, rows.iter().flatten().copied()),
            "f2b500463fb46449881633f7725dd92d41a885f01b0ee7317194328bf7d14db9"
        );
        // Same recipe with rows = [[1.0]].
        assert_eq!(
            matrix_sha256(1, [1.0]),
            "8b03313b04b1a724109d8418e2a6637a570c206064a5536ec040e8b5b5f2a941"
        );
    }

    #[test]
    fn a_reused_provenance_keeps_the_computation_and_names_the_request_and_the_source() {
        let original =
            r#"{"request_sha256":"aa","spec_sha256":"bb","seed":7,"x":1.50e-3,"computed_at":"t"}"#;
        let got = reused_provenance(original, "cc", "run-1").unwrap();
        assert_eq!(
            got,
            r#"{"request_sha256":"cc","reused_from":"run-1","spec_sha256":"bb","seed":7,"x":1.50e-3,"computed_at":"t"}"#
        );
        // Reusing a reused run's provenance names only the newest source.
        let again = reused_provenance(&got, "dd", "run-2").unwrap();
        assert!(again.starts_with(r#"{"request_sha256":"dd","reused_from":"run-2","spec"#));
        assert_eq!(again.matches("reused_from").count(), 1);
        assert!(reused_provenance("[1]", "cc", "run-1").is_err());
    }

    #[test]
    fn negative_zero_hashes_as_zero() {
        assert_eq!(matrix_sha256(1, [-0.0]), matrix_sha256(1, [0.0]));
        assert_ne!(matrix_sha256(1, [1.0]), matrix_sha256(1, [2.0]));
    }

    #[test]
    fn timestamps_are_rfc_3339_utc() {
        // Expected values from python3 `datetime.fromtimestamp(t, timezone.utc)` (common practice).
        assert_eq!(rfc3339(951_782_400), "2000-02-29T00:00:00Z");
        assert_eq!(rfc3339(0), "1970-01-01T00:00:00Z");
        assert_eq!(rfc3339(1_796_079_599), "2026-11-30T22:59:59Z");
    }

    #[test]
    fn the_service_version_names_a_commit() {
        let (version, commit) = SERVICE_VERSION.split_once('+').unwrap();
        assert_eq!(version, env!("CARGO_PKG_VERSION"));
        assert!(commit == "unknown" || commit.bytes().all(|b| b.is_ascii_hexdigit()));
    }
}
