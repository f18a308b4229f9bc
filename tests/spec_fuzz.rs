//! Validation never panics, whatever JSON arrives, and what it accepts is stable.
//!
//! Two generators: arbitrary JSON values, and a valid job with one part replaced, removed or
//! joined by an unknown member. For every input, validation must return (not panic); every
//! problem's pointer must designate a value of the input or a member missing from an object
//! that exists; an accepted job's normalised spec must validate to itself and hash.

use demefix::problem::Problem;
use demefix::provenance::{matrix_sha256, spec_sha256};
use demefix::spec::{validate, Limits};
use proptest::prelude::*;
use serde_json::{json, Map, Value};

fn valid_job() -> Value {
    json!({
        "label": "fuzz base",
        "series": "fuzz",
        "population": {"demes": [{"id": "a", "size": 3}, {"id": "b", "size": 2}, {"id": "c", "size": 2}]},
        "migration": {"orientation": "flows", "matrix": [[0, 4, 1], [3, 0, 2], [1, 1, 0]], "self_flows": "keep"},
        "dynamics": {"rule": "death_birth", "generation_days": 2.0},
        "selection": {"s": [0.1, 0.0], "scope": "deme"},
        "start": ["a", "uniform", "at_birth"],
        "method": {"kind": "auto", "seed": 3, "replicates": 100, "chunk_size": 10, "target_half_width": 0.01, "max_generations": 1000},
        "outputs": {"times": true, "arrival_fractions": [0.5], "sensitivity": false}
    })
}

fn arb_json() -> impl Strategy<Value = Value> {
    let leaf = prop_oneof![
        Just(Value::Null),
        any::<bool>().prop_map(Value::Bool),
        any::<i64>().prop_map(|n| json!(n)),
        any::<u64>().prop_map(|n| json!(n)),
        (-1e6f64..1e6).prop_map(|x| json!(x)),
        prop_oneof![
            Just(-1.0),
            Just(-0.0),
            Just(0.0),
            Just(1.0),
            Just(1e300),
            Just(0.5)
        ]
        .prop_map(|x: f64| json!(x)),
        "[a-z_~/]{0,8}".prop_map(Value::String),
        prop_oneof![
            Just("uniform"),
            Just("at_birth"),
            Just("a"),
            Just("flows"),
            Just("exact"),
            Just("ensemble"),
            Just("approximation"),
            Just("keep"),
            Just("neighbourhood"),
            Just("birth_death"),
            Just("wright_fisher"),
            Just("0,1\nNaN,1"),
            Just("a,b,c\n0,1,1\n1,0,1\n1,1,0"),
            Just("sha256:0000000000000000000000000000000000000000000000000000000000000000"),
        ]
        .prop_map(|s| Value::String(s.to_owned())),
    ];
    leaf.prop_recursive(4, 48, 6, |inner| {
        prop_oneof![
            prop::collection::vec(inner.clone(), 0..6).prop_map(Value::Array),
            prop::collection::vec(
                (
                    prop_oneof![
                        Just("population".to_owned()),
                        Just("demes".to_owned()),
                        Just("id".to_owned()),
                        Just("size".to_owned()),
                        Just("matrix".to_owned()),
                        Just("s".to_owned()),
                        "[a-z~/]{1,6}",
                    ],
                    inner
                ),
                0..6
            )
            .prop_map(|kv| Value::Object(kv.into_iter().collect::<Map<_, _>>())),
        ]
    })
}

/// Every JSON pointer of `v`, root included.
fn pointers(v: &Value, at: String, out: &mut Vec<String>) {
    out.push(at.clone());
    match v {
        Value::Array(a) => {
            for (i, x) in a.iter().enumerate() {
                pointers(x, format!("{at}/{i}"), out);
            }
        }
        Value::Object(m) => {
            for (k, x) in m {
                let key = k.replace('~', "~0").replace('/', "~1");
                pointers(x, format!("{at}/{key}"), out);
            }
        }
        _ => {}
    }
}

#[derive(Debug, Clone)]
enum Mutation {
    Replace(Value),
    Remove,
    AddUnknown(Value),
}

fn mutate(mut job: Value, which: usize, how: Mutation) -> Value {
    let mut all = Vec::new();
    pointers(&job, String::new(), &mut all);
    let target = all[which % all.len()].clone();
    match how {
        Mutation::Replace(v) => {
            if target.is_empty() {
                return v;
            }
            *job.pointer_mut(&target).unwrap() = v;
        }
        Mutation::Remove => {
            if let Some((parent, last)) = target.rsplit_once('/') {
                match job.pointer_mut(parent).unwrap() {
                    Value::Object(m) => {
                        m.remove(&last.replace("~1", "/").replace("~0", "~"));
                    }
                    Value::Array(a) => {
                        a.remove(last.parse::<usize>().unwrap());
                    }
                    _ => unreachable!(),
                }
            }
        }
        Mutation::AddUnknown(v) => {
            if let Value::Object(m) = job.pointer_mut(&target).unwrap() {
                m.insert("zz_unknown".to_owned(), v);
            }
        }
    }
    job
}

fn arb_mutation() -> impl Strategy<Value = Mutation> {
    prop_oneof![
        3 => arb_json().prop_map(Mutation::Replace),
        1 => Just(Mutation::Remove),
        1 => arb_json().prop_map(Mutation::AddUnknown),
    ]
}

/// The properties every validation outcome must have.
fn check(doc: &Value) {
    match validate(doc, &Limits::default()) {
        Err(problems) => {
            assert!(!problems.is_empty());
            for Problem { pointer, detail } in &problems {
                assert!(!detail.is_empty());
                let exists = doc.pointer(pointer).is_some();
                let parent_exists = pointer
                    .rsplit_once('/')
                    .is_some_and(|(parent, _)| doc.pointer(parent).is_some_and(Value::is_object));
                assert!(
                    exists || parent_exists,
                    "pointer {pointer} designates nothing in {doc}"
                );
            }
        }
        Ok(job) => {
            let spec = serde_json::to_value(job.spec()).unwrap();
            let again = validate(&spec, &Limits::default())
                .unwrap_or_else(|p| panic!("normalised spec rejected: {p:?}\n{spec}"));
            assert_eq!(job.spec(), again.spec());
            let m = job.spec().population.demes.len();
            let _ = matrix_sha256(m, job.spec().migration.matrix.iter().flatten().copied());
            let _ = matrix_sha256(m, job.model().kernel().dense().iter().copied());
            let _ = spec_sha256(job.spec());
        }
    }
}

proptest! {
    #![proptest_config(ProptestConfig { cases: 600, ..ProptestConfig::default() })]

    #[test]
    fn arbitrary_json_never_panics(doc in arb_json()) {
        check(&doc);
    }

    #[test]
    fn mutated_valid_jobs_never_panic(which in 0usize..1000, how in arb_mutation()) {
        check(&mutate(valid_job(), which, how));
    }

    #[test]
    fn doubly_mutated_valid_jobs_never_panic(
        a in 0usize..1000, how_a in arb_mutation(), b in 0usize..1000, how_b in arb_mutation()
    ) {
        check(&mutate(mutate(valid_job(), a, how_a), b, how_b));
    }
}

#[test]
fn the_fuzz_base_job_is_valid() {
    assert!(validate(&valid_job(), &Limits::default()).is_ok());
}
