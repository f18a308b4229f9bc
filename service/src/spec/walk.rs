//! Reading untrusted JSON one member at a time while collecting every problem.
//!
//! Each helper reports what is wrong at the value's pointer and returns `None`, so the caller
//! can carry on and find the next problem. Nothing here knows the job schema.

use crate::problem::{Pointer, Problem};
use serde_json::{Map, Value};

/// Largest integer every `f64` below it represents exactly (2^53).
pub const MAX_EXACT_INTEGER: u64 = 1 << 53;

/// Collects problems while a document is walked.
#[derive(Debug, Default)]
pub struct Walker {
    problems: Vec<Problem>,
}

/// JSON's name for the type of `v`, for messages.
pub fn type_name(v: &Value) -> &'static str {
    match v {
        Value::Null => "null",
        Value::Bool(_) => "a boolean",
        Value::Number(_) => "a number",
        Value::String(_) => "a string",
        Value::Array(_) => "an array",
        Value::Object(_) => "an object",
    }
}

impl Walker {
    /// Records a problem.
    pub fn report(&mut self, at: &Pointer, detail: impl Into<String>) {
        self.problems.push(Problem::new(at, detail));
    }

    /// Whether any problem has been recorded.
    pub fn has_problems(&self) -> bool {
        !self.problems.is_empty()
    }

    /// Number of problems recorded so far.
    pub fn count(&self) -> usize {
        self.problems.len()
    }

    /// The problems, in the order found.
    pub fn into_problems(self) -> Vec<Problem> {
        self.problems
    }

    /// `v` as an object whose members are all in `allowed`; unknown members are reported
    /// (each at its own pointer) and the object is still returned.
    pub fn object<'a>(
        &mut self,
        v: &'a Value,
        at: &Pointer,
        allowed: &[&str],
    ) -> Option<&'a Map<String, Value>> {
        let Value::Object(map) = v else {
            self.report(at, format!("must be an object, not {}", type_name(v)));
            return None;
        };
        for key in map.keys() {
            if !allowed.contains(&key.as_str()) {
                self.report(
                    &at.key(key),
                    format!("unknown field; expected one of: {}", allowed.join(", ")),
                );
            }
        }
        Some(map)
    }

    /// Member `key` of `map`, reporting it as missing when absent.
    pub fn required<'a>(
        &mut self,
        map: &'a Map<String, Value>,
        at: &Pointer,
        key: &str,
    ) -> Option<&'a Value> {
        let v = map.get(key);
        if v.is_none() {
            self.report(&at.key(key), "required field is missing");
        }
        v
    }

    /// `v` as an array.
    pub fn array<'a>(&mut self, v: &'a Value, at: &Pointer) -> Option<&'a [Value]> {
        match v {
            Value::Array(a) => Some(a),
            other => {
                self.report(at, format!("must be an array, not {}", type_name(other)));
                None
            }
        }
    }

    /// `v` as a string.
    pub fn string<'a>(&mut self, v: &'a Value, at: &Pointer) -> Option<&'a str> {
        match v {
            Value::String(s) => Some(s),
            other => {
                self.report(at, format!("must be a string, not {}", type_name(other)));
                None
            }
        }
    }

    /// `v` as a boolean.
    pub fn boolean(&mut self, v: &Value, at: &Pointer) -> Option<bool> {
        match v {
            Value::Bool(b) => Some(*b),
            other => {
                self.report(
                    at,
                    format!("must be true or false, not {}", type_name(other)),
                );
                None
            }
        }
    }

    /// `v` as a number (JSON numbers are always finite).
    pub fn number(&mut self, v: &Value, at: &Pointer) -> Option<f64> {
        match v.as_f64() {
            Some(x) if v.is_number() => Some(x),
            _ => {
                self.report(at, format!("must be a number, not {}", type_name(v)));
                None
            }
        }
    }

    /// `v` as a whole number in `min..=max`. Integral floats (`12.0`) are accepted; a float
    /// at or above 2^53 is not, since it may not be the integer that was written.
    pub fn whole(&mut self, v: &Value, at: &Pointer, min: u64, max: u64) -> Option<u64> {
        let n = if let Some(n) = v.as_u64() {
            Some(n)
        } else if v.is_i64() {
            None
        } else if let Some(x) = v.as_f64() {
            if x.fract() == 0.0 && x >= 0.0 && x < MAX_EXACT_INTEGER as f64 {
                Some(x as u64)
            } else if x.fract() != 0.0 {
                self.report(at, format!("must be a whole number, not {x}"));
                return None;
            } else {
                None
            }
        } else {
            self.report(at, format!("must be a whole number, not {}", type_name(v)));
            return None;
        };
        match n {
            Some(n) if (min..=max).contains(&n) => Some(n),
            _ => {
                self.report(at, format!("must be a whole number from {min} to {max}"));
                None
            }
        }
    }

    /// `v` as one of the strings in `choices`.
    pub fn choice<'a>(&mut self, v: &Value, at: &Pointer, choices: &[&'a str]) -> Option<&'a str> {
        let s = self.string(v, at)?;
        match choices.iter().find(|c| **c == s) {
            Some(c) => Some(c),
            None => {
                self.report(at, format!("`{s}` is not one of: {}", choices.join(", ")));
                None
            }
        }
    }
}

#[cfg(test)]
mod tests {
    use super::*;
    use serde_json::json;

    #[test]
    fn whole_numbers_accept_integral_floats_and_reject_the_rest() {
        let at = Pointer::root();
        let mut w = Walker::default();
        assert_eq!(w.whole(&json!(12), &at, 1, 100), Some(12));
        assert_eq!(w.whole(&json!(12.0), &at, 1, 100), Some(12));
        assert!(!w.has_problems());
        assert_eq!(w.whole(&json!(12.5), &at, 1, 100), None);
        assert_eq!(w.whole(&json!(-3), &at, 1, 100), None);
        assert_eq!(w.whole(&json!(0), &at, 1, 100), None);
        assert_eq!(w.whole(&json!(1e300), &at, 1, u64::MAX), None);
        assert_eq!(w.whole(&json!("7"), &at, 1, 100), None);
        assert_eq!(w.count(), 5);
    }

    #[test]
    fn unknown_members_are_reported_at_their_own_pointer() {
        let mut w = Walker::default();
        let v = json!({"kind": "exact", "sede": 1});
        assert!(w
            .object(&v, &Pointer::root().key("method"), &["kind", "seed"])
            .is_some());
        let p = w.into_problems();
        assert_eq!(p.len(), 1);
        assert_eq!(p[0].pointer, "/method/sede");
    }
}
