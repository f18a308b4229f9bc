//! Problems found in a job document: where (an RFC 6901 JSON pointer) and what, and the
//! RFC 9457 problem document that reports all of them at once.
//!
//! This module owns the wire shape of bad-input errors, shared by the command line (on
//! stderr, exit code 2) and the planned HTTP service (`422 application/problem+json`).

use serde::Serialize;
use std::fmt;

/// The `type` URI of the problem document for a job that failed validation. A relative
/// URI reference, resolved against the service's base address (RFC 9457, section 3.1.1).
pub const INVALID_JOB_TYPE: &str = "/problems/invalid-job";

/// An RFC 6901 JSON pointer into the job document, built one reference token at a time.
#[derive(Debug, Clone, PartialEq, Eq, PartialOrd, Ord, Hash, Default)]
pub struct Pointer(String);

impl Pointer {
    /// The pointer to the whole document (the empty string).
    pub fn root() -> Self {
        Self(String::new())
    }

    /// The pointer to member `name` of the object this pointer designates; `~` and `/` in
    /// the name are escaped as `~0` and `~1`.
    pub fn key(&self, name: &str) -> Self {
        let mut s = String::with_capacity(self.0.len() + name.len() + 1);
        s.push_str(&self.0);
        s.push('/');
        for c in name.chars() {
            match c {
                '~' => s.push_str("~0"),
                '/' => s.push_str("~1"),
                c => s.push(c),
            }
        }
        Self(s)
    }

    /// The pointer to element `index` of the array this pointer designates.
    pub fn index(&self, index: usize) -> Self {
        Self(format!("{}/{index}", self.0))
    }

    /// The pointer as text.
    pub fn as_str(&self) -> &str {
        &self.0
    }
}

impl fmt::Display for Pointer {
    fn fmt(&self, f: &mut fmt::Formatter<'_>) -> fmt::Result {
        f.write_str(&self.0)
    }
}

/// One thing wrong with a job document.
#[derive(Debug, Clone, PartialEq, Eq, Serialize)]
pub struct Problem {
    /// RFC 6901 pointer to the offending value (it may designate a member that is missing).
    pub pointer: String,
    /// What is wrong, in words a user can act on.
    pub detail: String,
}

impl Problem {
    /// A problem at `pointer`.
    pub fn new(pointer: &Pointer, detail: impl Into<String>) -> Self {
        Self {
            pointer: pointer.as_str().to_owned(),
            detail: detail.into(),
        }
    }
}

/// The RFC 9457 problem document for a rejected job: every problem found, not just the first.
#[derive(Debug, Clone, PartialEq, Eq, Serialize)]
pub struct InvalidJob {
    /// [`INVALID_JOB_TYPE`].
    #[serde(rename = "type")]
    pub kind: &'static str,
    /// `Invalid job`.
    pub title: &'static str,
    /// `422`.
    pub status: u16,
    /// A one-line summary.
    pub detail: String,
    /// Every problem, in the order found.
    pub errors: Vec<Problem>,
}

impl InvalidJob {
    /// The document listing `errors`.
    pub fn new(errors: Vec<Problem>) -> Self {
        let detail = match errors.len() {
            1 => "1 problem was found in the job document".to_owned(),
            n => format!("{n} problems were found in the job document"),
        };
        Self {
            kind: INVALID_JOB_TYPE,
            title: "Invalid job",
            status: 422,
            detail,
            errors,
        }
    }
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn pointer_tokens_are_escaped_as_rfc_6901_says() {
        // RFC 6901, section 3: `~` is written `~0` and `/` is written `~1`.
        let p = Pointer::root().key("a/b").key("m~n").index(3);
        assert_eq!(p.as_str(), "/a~1b/m~0n/3");
        assert_eq!(Pointer::root().as_str(), "");
    }

    #[test]
    fn the_problem_document_has_the_rfc_9457_members() {
        let doc = InvalidJob::new(vec![Problem::new(
            &Pointer::root().key("start").index(0),
            "unknown deme",
        )]);
        let v = serde_json::to_value(&doc).unwrap();
        assert_eq!(v["type"], INVALID_JOB_TYPE);
        assert_eq!(v["title"], "Invalid job");
        assert_eq!(v["status"], 422);
        assert_eq!(v["errors"][0]["pointer"], "/start/0");
    }
}
