//! Re-verification of a run: what "the same result" means, its hash, and which fields differ.
//! Pure; the store records verifications and the worker recomputes them like any run.
//!
//! The compared result document is `{"results", "sensitivity", "whatif"}` as stored (JSON
//! members; absent ones as null), hashed by SHA-256 over its RFC 8785 canonical form.
//! Provenance (host, threads, timestamps) and warnings (which depend on how the job was
//! sent, e.g. a seed picked by the service) are not part of it. A re-verification recomputes
//! the stored spec, which carries the recorded seed and method, with the service's current
//! code: when the method version has moved on since the run, a difference may come from the
//! new version rather than from the record, and the verification says so.

use crate::problem::Pointer;
use crate::provenance::sha256_hex;
use serde_json::{json, Value};

/// At most this many differing fields are listed.
pub const MAX_DIFFERENCES: usize = 50;

/// The stored members of a result.
#[derive(Debug, Clone, Copy)]
pub struct StoredResult<'a> {
    /// `results` text.
    pub results: Option<&'a str>,
    /// `sensitivity` text.
    pub sensitivity: Option<&'a str>,
    /// `whatif` text.
    pub whatif: Option<&'a str>,
}

fn member(text: Option<&str>) -> Value {
    text.and_then(|t| serde_json::from_str(t).ok())
        .unwrap_or(Value::Null)
}

impl StoredResult<'_> {
    /// The compared result document.
    pub fn document(&self) -> Value {
        json!({
            "results": member(self.results),
            "sensitivity": member(self.sensitivity),
            "whatif": member(self.whatif),
        })
    }
}

/// SHA-256 of the canonical result document.
pub fn result_sha256(doc: &Value) -> String {
    sha256_hex(
        serde_jcs::to_string(doc)
            .expect("a JSON value always serialises")
            .as_bytes(),
    )
}

/// How a recomputation compared with the record.
#[derive(Debug, Clone, PartialEq)]
pub struct Comparison {
    /// Whether the canonical result documents are byte-identical.
    pub identical: bool,
    /// Hash of the recorded result document.
    pub original_sha256: String,
    /// Hash of the recomputed one.
    pub recomputed_sha256: String,
    /// JSON pointers of the fields that differ (at most [`MAX_DIFFERENCES`]), in document
    /// order.
    pub differences: Vec<String>,
    /// Whether more fields differ than are listed.
    pub more_differences: bool,
}

/// Compares a recomputed result with the recorded one.
pub fn compare(original: StoredResult<'_>, recomputed: StoredResult<'_>) -> Comparison {
    let a = original.document();
    let b = recomputed.document();
    let original_sha256 = result_sha256(&a);
    let recomputed_sha256 = result_sha256(&b);
    let mut differences = Vec::new();
    let mut more = false;
    if original_sha256 != recomputed_sha256 {
        differing(&a, &b, &Pointer::root(), &mut differences, &mut more);
    }
    Comparison {
        identical: original_sha256 == recomputed_sha256,
        original_sha256,
        recomputed_sha256,
        differences,
        more_differences: more,
    }
}

fn differing(a: &Value, b: &Value, at: &Pointer, out: &mut Vec<String>, more: &mut bool) {
    if a == b {
        return;
    }
    if out.len() >= MAX_DIFFERENCES {
        *more = true;
        return;
    }
    match (a, b) {
        (Value::Object(x), Value::Object(y)) => {
            let mut keys: Vec<&String> = x.keys().chain(y.keys()).collect();
            keys.sort();
            keys.dedup();
            for k in keys {
                let null = Value::Null;
                differing(
                    x.get(k).unwrap_or(&null),
                    y.get(k).unwrap_or(&null),
                    &at.key(k),
                    out,
                    more,
                );
            }
        }
        (Value::Array(x), Value::Array(y)) if x.len() == y.len() => {
            for (i, (p, q)) in x.iter().zip(y).enumerate() {
                differing(p, q, &at.index(i), out, more);
            }
        }
        _ => out.push(at.as_str().to_owned()),
    }
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn identical_results_hash_alike_whatever_the_member_order() {
        let a = StoredResult {
            results: Some(r#"[{"s":0.1,"p":0.5}]"#),
            sensitivity: None,
            whatif: None,
        };
        let b = StoredResult {
            results: Some(r#"[{"p":0.5,"s":0.1}]"#),
            ..a
        };
        let c = compare(a, b);
        assert!(c.identical, "{c:?}");
        assert!(c.differences.is_empty());
    }

    #[test]
    fn differences_are_named_by_pointer() {
        let a = StoredResult {
            results: Some(r#"[{"s":0.1,"p":0.5,"t":[1,2]}]"#),
            sensitivity: Some("[]"),
            whatif: None,
        };
        let b = StoredResult {
            results: Some(r#"[{"s":0.1,"p":0.25,"t":[1,3]}]"#),
            sensitivity: None,
            whatif: None,
        };
        let c = compare(a, b);
        assert!(!c.identical);
        assert_ne!(c.original_sha256, c.recomputed_sha256);
        assert_eq!(
            c.differences,
            ["/results/0/p", "/results/0/t/1", "/sensitivity"]
        );
        assert!(!c.more_differences);
    }

    #[test]
    fn a_long_list_of_differences_is_cut() {
        let xs: Vec<u32> = (0..200).collect();
        let ys: Vec<u32> = (1..201).collect();
        let (xs, ys) = (json!(xs).to_string(), json!(ys).to_string());
        let c = compare(
            StoredResult {
                results: Some(&xs),
                sensitivity: None,
                whatif: None,
            },
            StoredResult {
                results: Some(&ys),
                sensitivity: None,
                whatif: None,
            },
        );
        assert_eq!(c.differences.len(), MAX_DIFFERENCES);
        assert!(c.more_differences);
    }
}
