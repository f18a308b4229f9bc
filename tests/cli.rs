//! The `demefix` binary end to end: results, exit codes, problem documents, determinism.

use serde_json::{json, Value};
use std::io::Write;
use std::path::PathBuf;
use std::process::{Command, Output, Stdio};

fn example(name: &str) -> PathBuf {
    PathBuf::from(env!("CARGO_MANIFEST_DIR"))
        .join("examples")
        .join(name)
}

/// Runs the binary with `args`, feeding `stdin` when given.
fn demefix(args: &[&str], stdin: Option<&[u8]>) -> Output {
    let mut child = Command::new(env!("CARGO_BIN_EXE_demefix"))
        .args(args)
        .stdin(if stdin.is_some() {
            Stdio::piped()
        } else {
            Stdio::null()
        })
        .stdout(Stdio::piped())
        .stderr(Stdio::piped())
        .spawn()
        .expect("the binary starts");
    if let Some(bytes) = stdin {
        child
            .stdin
            .take()
            .unwrap()
            .write_all(bytes)
            .expect("stdin accepts the job");
    }
    child.wait_with_output().expect("the binary finishes")
}

fn run_stdin(job: &Value, extra: &[&str]) -> Output {
    let mut args = vec!["run", "-", "--quiet"];
    args.extend_from_slice(extra);
    demefix(&args, Some(job.to_string().as_bytes()))
}

fn stdout_json(out: &Output) -> Value {
    assert!(
        out.status.success(),
        "exit {:?}, stderr: {}",
        out.status.code(),
        String::from_utf8_lossy(&out.stderr)
    );
    serde_json::from_slice(&out.stdout).expect("stdout is JSON")
}

/// A small valid job: three demes, exact by size.
fn small_job() -> Value {
    json!({
        "population": {"demes": [{"id": "a", "size": 3}, {"id": "b", "size": 4}, {"id": "c", "size": 2}]},
        "migration": {"orientation": "flows", "matrix": [[0, 4, 1], [3, 0, 2], [1, 1, 0]]},
        "dynamics": {"rule": "death_birth"},
        "selection": {"s": [0.1]},
        "start": ["a", "uniform"],
        "method": {"kind": "auto", "seed": 11}
    })
}

/// A small ensemble job that runs in well under a second.
fn ensemble_job() -> Value {
    json!({
        "population": {"demes": [{"id": "x", "size": 30}, {"id": "y", "size": 20}]},
        "migration": {"orientation": "dispersal", "matrix": [[0.9, 0.1], [0.2, 0.8]]},
        "dynamics": {"rule": "birth_death", "generation_days": 2.0},
        "selection": {"s": [0.0, 0.2]},
        "start": ["y", "uniform"],
        "method": {"kind": "ensemble", "seed": 5, "replicates": 1200, "chunk_size": 200},
        "outputs": {"arrival_fractions": [0.5, 1]}
    })
}

#[test]
fn the_demo_example_gives_a_result_for_every_s_and_start() {
    let path = example("river-valley.json");
    let out = demefix(&["run", path.to_str().unwrap(), "--quiet"], None);
    let doc = stdout_json(&out);
    let spec = &doc["spec"];
    let sweep = spec["selection"]["s"].as_array().unwrap();
    let starts = spec["start"].as_array().unwrap();
    let results = doc["results"].as_array().unwrap();
    assert_eq!(results.len(), sweep.len() * starts.len());
    let mut k = 0;
    for s in sweep {
        for start in starts {
            let r = &results[k];
            assert_eq!(&r["s"], s);
            assert_eq!(&r["start"], start);
            assert_eq!(r["method"], "exact");
            let rho = r["fixation_probability"].as_f64().unwrap();
            assert!((0.0..=1.0).contains(&rho), "{r}");
            assert!(r.get("ci95").is_none(), "exact results carry no interval");
            let wm = r["well_mixed_fixation_probability"].as_f64().unwrap();
            let ratio = r["ratio_to_well_mixed"].as_f64().unwrap();
            assert!((ratio - rho / wm).abs() <= 1e-12 * ratio.abs());
            let g = r["mean_fixation_generations"].as_f64().unwrap();
            let d = r["mean_fixation_days"].as_f64().unwrap();
            assert!((d - 3.5 * g).abs() <= 1e-9 * d, "days twin of {g}: {d}");
            k += 1;
        }
    }
    let p = &doc["provenance"];
    for key in [
        "request_sha256",
        "spec_sha256",
        "matrix_sha256",
        "normalised_matrix_sha256",
    ] {
        assert_eq!(p[key].as_str().unwrap().len(), 64, "{key}");
    }
    assert_eq!(p["method"], "exact");
    assert!(doc["disclaimer"]
        .as_str()
        .unwrap()
        .contains("public-health authorities"));
}

#[test]
fn the_ensemble_example_goes_ensemble_under_auto() {
    let path = example("plateau-towns-ensemble.json");
    let out = demefix(&["validate", path.to_str().unwrap()], None);
    let v = stdout_json(&out);
    assert_eq!(v["valid"], true);
    assert_eq!(v["method"], "ensemble");
}

/// Strips the three provenance lines allowed to differ between runs.
fn without_run_specific_lines(stdout: &[u8]) -> String {
    String::from_utf8_lossy(stdout)
        .lines()
        .filter(|l| {
            let l = l.trim_start();
            !(l.starts_with("\"threads\"")
                || l.starts_with("\"computed_at\"")
                || l.starts_with("\"host\""))
        })
        .collect::<Vec<_>>()
        .join("\n")
}

#[test]
fn the_thread_count_does_not_change_ensemble_results() {
    let job = ensemble_job();
    let one = run_stdin(&job, &["--threads", "1"]);
    let two = run_stdin(&job, &["--threads", "2"]);
    let (a, b) = (stdout_json(&one), stdout_json(&two));
    assert_eq!(a["provenance"]["threads"], 1);
    assert_eq!(b["provenance"]["threads"], 2);
    assert_eq!(
        serde_json::to_string(&a["results"]).unwrap(),
        serde_json::to_string(&b["results"]).unwrap()
    );
    assert_eq!(
        without_run_specific_lines(&one.stdout),
        without_run_specific_lines(&two.stdout)
    );
    let r = &a["results"][0];
    assert_eq!(r["method"], "ensemble:event");
    assert_eq!(r["replicates"], 1200);
    let counted = r["fixed"].as_u64().unwrap() + r["lost"].as_u64().unwrap();
    assert_eq!(counted + r["unresolved"].as_u64().unwrap(), 1200);
    assert!(r["arrival_generations"]["x"].get("0.5").is_some(), "{r}");
    assert!(r["arrival_days"]["x"].get("1").is_some(), "{r}");
}

#[test]
fn the_thread_count_does_not_change_exact_results() {
    let job = small_job();
    let a = stdout_json(&run_stdin(&job, &["--threads", "1"]));
    let b = stdout_json(&run_stdin(&job, &["--threads", "2"]));
    assert_eq!(
        serde_json::to_string(&a["results"]).unwrap(),
        serde_json::to_string(&b["results"]).unwrap()
    );
}

#[test]
fn a_job_is_read_from_stdin_with_a_dash_and_hashed_as_sent() {
    let text = small_job().to_string();
    let out = demefix(&["run", "-", "--quiet"], Some(text.as_bytes()));
    let doc = stdout_json(&out);
    assert_eq!(doc["results"].as_array().unwrap().len(), 2);
    // The request hash covers the bytes exactly as sent.
    let mut spaced = text.clone();
    spaced.push('\n');
    let again = stdout_json(&demefix(&["run", "-", "--quiet"], Some(spaced.as_bytes())));
    assert_ne!(
        doc["provenance"]["request_sha256"],
        again["provenance"]["request_sha256"]
    );
    assert_eq!(
        doc["provenance"]["spec_sha256"],
        again["provenance"]["spec_sha256"]
    );
}

#[test]
fn a_missing_seed_is_picked_recorded_and_warned_about() {
    let mut job = ensemble_job();
    job["method"] = json!({"kind": "ensemble", "replicates": 200, "chunk_size": 100});
    let doc = stdout_json(&run_stdin(&job, &[]));
    let seed = doc["spec"]["method"]["seed"]
        .as_u64()
        .expect("a seed was recorded");
    assert_eq!(doc["provenance"]["seed"].as_u64(), Some(seed));
    let warnings = doc["warnings"].as_array().unwrap();
    assert!(warnings
        .iter()
        .any(|w| w.as_str().unwrap().contains(&seed.to_string())));
}

#[test]
fn validate_prints_states_and_warnings() {
    let mut job = small_job();
    job["migration"] = json!({"orientation": "recruitment", "matrix": [[1, 1, 0], [0.5, 0.5, 0], [0.2, 0.3, 0.5]]});
    let v = stdout_json(&demefix(
        &["validate", "-"],
        Some(job.to_string().as_bytes()),
    ));
    assert_eq!(v["valid"], true);
    assert_eq!(v["states"], 4 * 5 * 3);
    let warnings = v["warnings"].as_array().unwrap();
    // row `a` sums to 2 (weights); deme `c` never sends a lineage anywhere
    assert!(warnings.iter().any(|w| w.as_str().unwrap().contains("`a`")));
    assert!(warnings.iter().any(|w| w
        .as_str()
        .unwrap()
        .contains("fixation is impossible from `c`")));
}

/// The problem document of a rejected job, checking exit code 2 and the RFC 9457 members.
fn problems(job: &[u8]) -> Vec<(String, String)> {
    let out = demefix(&["run", "-", "--quiet"], Some(job));
    assert_eq!(
        out.status.code(),
        Some(2),
        "stdout: {}",
        String::from_utf8_lossy(&out.stdout)
    );
    assert!(out.stdout.is_empty());
    let doc: Value = serde_json::from_slice(&out.stderr).expect("stderr is a problem document");
    assert_eq!(doc["title"], "Invalid job");
    assert_eq!(doc["status"], 422);
    assert!(doc["type"].is_string());
    doc["errors"]
        .as_array()
        .unwrap()
        .iter()
        .map(|e| {
            (
                e["pointer"].as_str().unwrap().to_owned(),
                e["detail"].as_str().unwrap().to_owned(),
            )
        })
        .collect()
}

#[test]
fn every_malformed_job_of_the_table_exits_2_with_its_pointers() {
    type Edit = fn(&mut Value);
    let table: &[(&str, Edit, &[&str], &str)] = &[
        (
            "NaN via csv",
            |j| {
                j["migration"] =
                    json!({"orientation": "flows", "matrix_csv": "a,b,c\n0,4,1\n3,0,NaN\n1,1,0\n"})
            },
            &["/migration/matrix_csv"],
            "line 3, field 3",
        ),
        (
            "negative entry",
            |j| j["migration"]["matrix"][1][2] = json!(-2),
            &["/migration/matrix/1/2"],
            "negative",
        ),
        (
            "non-square matrix",
            |j| j["migration"]["matrix"] = json!([[0, 4, 1], [3, 0], [1, 1, 0]]),
            &["/migration/matrix/1"],
            "2 entries",
        ),
        (
            "too few rows",
            |j| j["migration"]["matrix"] = json!([[0, 4, 1], [3, 0, 2]]),
            &["/migration/matrix"],
            "2 rows",
        ),
        (
            "empty row",
            |j| j["migration"]["matrix"][2] = json!([]),
            &["/migration/matrix/2"],
            "0 entries",
        ),
        (
            "row of zeros",
            |j| {
                j["dynamics"]["rule"] = json!("birth_death");
                j["migration"]["matrix"][2] = json!([0, 0, 0]);
            },
            &["/migration/matrix/2"],
            "all zeros",
        ),
        (
            "unknown start id",
            |j| j["start"] = json!(["a", "nowhere"]),
            &["/start/1"],
            "nowhere",
        ),
        (
            "duplicate deme id",
            |j| j["population"]["demes"][1]["id"] = json!("a"),
            &["/population/demes/1/id"],
            "duplicate",
        ),
        (
            "s at or below -1",
            |j| j["selection"]["s"] = json!([-1.0, 0.1]),
            &["/selection/s/0"],
            "greater than -1",
        ),
        (
            "too many states for exact",
            |j| {
                j["method"]["kind"] = json!("exact");
                j["population"]["demes"][0]["size"] = json!(2000);
                j["population"]["demes"][1]["size"] = json!(2000);
            },
            &["/method/kind"],
            "count vectors",
        ),
        (
            "deme scope with all sizes 1",
            |j| {
                for k in 0..3 {
                    j["population"]["demes"][k]["size"] = json!(1);
                }
            },
            &["/selection/scope"],
            "neighbourhood",
        ),
        (
            "size of the wrong type",
            |j| j["population"]["demes"][2]["size"] = json!("2"),
            &["/population/demes/2/size"],
            "whole number",
        ),
        (
            "unknown field",
            |j| j["method"]["replicate"] = json!(10),
            &["/method/replicate"],
            "unknown field",
        ),
    ];
    for (name, edit, want, word) in table {
        let mut job = small_job();
        edit(&mut job);
        let got = problems(job.to_string().as_bytes());
        let pointers: Vec<&str> = got.iter().map(|(p, _)| p.as_str()).collect();
        assert_eq!(&pointers, want, "{name}: {got:?}");
        assert!(
            got.iter().any(|(_, d)| d.contains(word)),
            "{name}: no detail mentions `{word}`: {got:?}"
        );
    }
}

#[test]
fn every_problem_of_a_job_is_reported_at_once() {
    let job = json!({
        "population": {"demes": [{"id": "a", "size": 0}, {"id": "a", "size": 2}, {"id": "b c", "size": 2.5}]},
        "migration": {"orientation": "flows", "matrix": [[0, -1, 1], [1, 0, 1], [1, 1]]},
        "dynamics": {"rule": "voter"},
        "selection": {"s": [0.1, -3]},
        "start": ["z"],
        "method": {"kind": "exact", "replicates": 0},
        "colour": "blue"
    });
    let got = problems(job.to_string().as_bytes());
    let pointers: Vec<&str> = got.iter().map(|(p, _)| p.as_str()).collect();
    for want in [
        "/colour",
        "/population/demes/0/size",
        "/population/demes/1/id",
        "/population/demes/2/id",
        "/population/demes/2/size",
        "/dynamics/rule",
        "/selection/s/1",
        "/start/0",
        "/method/replicates",
        "/migration/matrix/2",
        "/migration/matrix/0/1",
    ] {
        assert!(pointers.contains(&want), "{want} missing from {pointers:?}");
    }
}

#[test]
fn text_that_is_not_json_exits_2_at_the_root_pointer() {
    let got = problems(b"{\"population\": [1, 2");
    assert_eq!(got.len(), 1);
    assert_eq!(got[0].0, "");
}

#[test]
fn a_missing_file_exits_1_with_a_message() {
    let out = demefix(&["run", "/nonexistent/job.json"], None);
    assert_eq!(out.status.code(), Some(1));
    assert!(String::from_utf8_lossy(&out.stderr).contains("cannot read"));
}

/// A fresh directory under the system temp dir, removed on drop.
struct ScratchDir(PathBuf);

impl ScratchDir {
    fn new(tag: &str) -> Self {
        let nanos = std::time::SystemTime::now()
            .duration_since(std::time::UNIX_EPOCH)
            .map_or(0, |d| d.as_nanos());
        let dir =
            std::env::temp_dir().join(format!("demefix-cli-{tag}-{}-{nanos}", std::process::id()));
        std::fs::create_dir_all(&dir).expect("create a scratch dir");
        Self(dir)
    }
}

impl Drop for ScratchDir {
    fn drop(&mut self) {
        let _ = std::fs::remove_dir_all(&self.0);
    }
}

/// A number of the demo table that must be a probability.
fn probability_cell(cell: &str, line: &str) -> f64 {
    let x: f64 = cell
        .trim_matches(|c| c == '[' || c == ']' || c == ',')
        .parse()
        .unwrap_or_else(|_| panic!("`{cell}` is not a number in: {line}"));
    assert!((0.0..=1.0).contains(&x), "{x} outside [0, 1] in: {line}");
    x
}

#[test]
fn the_demo_posts_the_scenario_over_http_and_prints_every_rule_s_and_start() {
    let scratch = ScratchDir::new("demo");
    let db = scratch.0.join("demo.db");
    let out = demefix(
        &[
            "demo",
            "--quiet",
            "--replicates",
            "300",
            "--threads",
            "2",
            "--db",
            db.to_str().unwrap(),
        ],
        None,
    );
    let stdout = String::from_utf8_lossy(&out.stdout).into_owned();
    assert!(
        out.status.success(),
        "exit {:?}\nstdout: {stdout}\nstderr: {}",
        out.status.code(),
        String::from_utf8_lossy(&out.stderr)
    );
    assert!(out.stderr.is_empty(), "--quiet writes nothing on stderr");

    let scenario: Value = serde_json::from_slice(
        &std::fs::read(example("ferry-islands-ensemble.json")).expect("the scenario file"),
    )
    .unwrap();
    let sweep: Vec<f64> = scenario["selection"]["s"]
        .as_array()
        .unwrap()
        .iter()
        .map(|s| s.as_f64().unwrap())
        .collect();
    let starts: Vec<&str> = scenario["start"]
        .as_array()
        .unwrap()
        .iter()
        .map(|s| s.as_str().unwrap())
        .collect();
    for rule in demefix::demo::RULES {
        let rows: Vec<&str> = stdout
            .lines()
            .filter(|l| l.split_whitespace().next() == Some(rule))
            .collect();
        assert_eq!(rows.len(), sweep.len() * starts.len(), "{rule}:\n{stdout}");
        for &s in &sweep {
            for &start in &starts {
                let line = rows
                    .iter()
                    .find(|l| {
                        let t: Vec<&str> = l.split_whitespace().collect();
                        t[1].parse::<f64>().ok() == Some(s) && t[2] == start
                    })
                    .unwrap_or_else(|| panic!("no row {rule} {s} {start}:\n{stdout}"));
                let t: Vec<&str> = line.split_whitespace().collect();
                let p = probability_cell(t[3], line);
                let (lo, hi) = (probability_cell(t[4], line), probability_cell(t[5], line));
                assert!(lo <= p && p <= hi, "{line}");
                probability_cell(t[6], line);
                let ratio: f64 = t[7].parse().unwrap();
                assert!(ratio >= 0.0, "{line}");
            }
        }
    }
    assert!(stdout.contains("not forecasts"), "{stdout}");
    assert!(stdout.contains("public-health authorities"), "{stdout}");

    let ids: Vec<(String, String)> = stdout
        .lines()
        .filter_map(|l| {
            let t: Vec<&str> = l.split_whitespace().collect();
            (t.len() == 3 && t[0] == "run").then(|| (t[1].to_owned(), t[2].to_owned()))
        })
        .collect();
    assert_eq!(ids.len(), demefix::demo::RULES.len(), "{stdout}");
    let printed_db = stdout
        .lines()
        .find_map(|l| l.strip_prefix("database "))
        .expect("the database path is printed");
    assert_eq!(PathBuf::from(printed_db), db);
    assert!(db.is_file(), "the database is kept");

    let runtime = tokio::runtime::Runtime::new().unwrap();
    runtime.block_on(async {
        let store = demefix::db::Store::open(&db)
            .await
            .expect("the demo's database opens");
        assert_eq!(store.count_runs().await.unwrap(), ids.len() as i64);
        for (rule, id) in &ids {
            let run = store.run(id).await.unwrap().expect("the run is stored");
            assert_eq!(run.status.as_str(), "succeeded", "{rule} {id}");
            let spec: Value = serde_json::from_str(&run.spec).unwrap();
            assert_eq!(spec["dynamics"]["rule"].as_str(), Some(rule.as_str()));
            assert_eq!(spec["method"]["replicates"], 300);
            assert_eq!(run.done, run.total);
        }
        store.close().await;
    });
}

#[test]
fn the_demo_refuses_a_database_that_already_exists() {
    let scratch = ScratchDir::new("demo-taken");
    let db = scratch.0.join("taken.db");
    std::fs::write(&db, b"not ours").unwrap();
    let out = demefix(&["demo", "--quiet", "--db", db.to_str().unwrap()], None);
    assert_eq!(out.status.code(), Some(1));
    assert!(String::from_utf8_lossy(&out.stderr).contains("already exists"));
    assert_eq!(std::fs::read(&db).unwrap(), b"not ours");
}

#[test]
fn link_sensitivities_are_ranked_per_result_and_vanish_where_theory_says() {
    for rule in ["death_birth", "birth_death"] {
        let mut job = small_job();
        job["dynamics"]["rule"] = json!(rule);
        job["selection"]["s"] = json!([0.0, 0.1]);
        job["outputs"] = json!({"sensitivity": true});
        let doc = stdout_json(&run_stdin(&job, &[]));
        let rows = doc["sensitivity"].as_array().expect("a sensitivity array");
        // 2 values of s x 2 starts x 6 links (the off-diagonal flows)
        assert_eq!(rows.len(), 24, "{rule}");
        let ids = ["a", "b", "c"];
        for group in rows.chunks(6) {
            let (s, start) = (&group[0]["s"], &group[0]["start"]);
            let d: Vec<f64> = group
                .iter()
                .map(|r| {
                    assert_eq!((&r["s"], &r["start"]), (s, start));
                    assert!(ids.contains(&r["from"].as_str().unwrap()));
                    assert!(ids.contains(&r["to"].as_str().unwrap()));
                    assert_ne!(r["from"], r["to"]);
                    assert_eq!(r["method"], "exact_adjoint");
                    r["d_fixation_probability"].as_f64().unwrap()
                })
                .collect();
            assert!(
                d.windows(2).all(|w| w[0] <= w[1]),
                "most lowering first: {d:?}"
            );
            if s == &json!(0.0) && start == "uniform" {
                // neutral fixation from a uniformly chosen individual is 1/N for every
                // matrix (references.md §5.1): no link changes it
                assert!(d.iter().all(|x| x.abs() < 1e-12), "{rule}: {d:?}");
            } else if start == "a" {
                assert!(d.iter().any(|x| x.abs() > 1e-4), "{rule} {s}: {d:?}");
            }
        }
    }
    let mut wf = small_job();
    wf["dynamics"]["rule"] = json!("wright_fisher");
    wf["outputs"] = json!({"sensitivity": true});
    let doc = stdout_json(&run_stdin(&wf, &[]));
    assert!(doc.get("sensitivity").is_none());
    assert!(
        doc["warnings"]
            .as_array()
            .unwrap()
            .iter()
            .any(|w| w.as_str().unwrap().contains("outputs.sensitivity")),
        "{doc:#}"
    );
}

/// The entry called `name` of a result's `approximations`.
fn approximation<'a>(result: &'a Value, name: &str) -> &'a Value {
    result["approximations"]
        .as_array()
        .expect("an approximations array")
        .iter()
        .find(|e| e["name"] == name)
        .unwrap_or_else(|| panic!("no `{name}` in {result:#}"))
}

fn warnings_of(doc: &Value) -> Vec<String> {
    doc["warnings"]
        .as_array()
        .unwrap()
        .iter()
        .map(|w| w.as_str().unwrap().to_owned())
        .collect()
}

#[test]
fn approximation_jobs_answer_with_the_first_approximation_inside_its_regime() {
    let mut job = small_job();
    job["method"] = json!({"kind": "approximation"});
    job["selection"]["s"] = json!([0.001, 0.3]);
    let doc = stdout_json(&run_stdin(&job, &[]));
    let results = doc["results"].as_array().unwrap();
    assert_eq!(results.len(), 4);
    for r in results {
        let entries = r["approximations"].as_array().unwrap();
        let names: Vec<&str> = entries
            .iter()
            .map(|e| e["name"].as_str().unwrap())
            .collect();
        assert_eq!(names, ["weak_selection", "strong_migration", "branching"]);
        for e in entries {
            let regime = &e["valid_regime"];
            assert_eq!(regime["approximation"], e["name"]);
            assert!(!regime["indicators"].as_array().unwrap().is_empty());
            assert!(
                e.get("discrepancy").is_none(),
                "no exact answer to compare with"
            );
        }
        // Weak selection at s = 0.001 on 9 individuals: |s rho'/rho| is about 0.004, inside;
        // at s = 0.3 nothing is inside, so the first computed (weak selection) answers.
        assert_eq!(r["method"], "approximation:weak_selection", "{r:#}");
        let weak = approximation(r, "weak_selection");
        assert_eq!(r["fixation_probability"], weak["fixation_probability"]);
        assert_eq!(r["valid_regime"], weak["valid_regime"]);
        let inside = r["valid_regime"]["inside"].as_bool().unwrap();
        assert_eq!(inside, r["s"] == 0.001, "{r:#}");
        let c = &weak["coefficients"];
        let s = r["s"].as_f64().unwrap();
        let linear = c["neutral"].as_f64().unwrap() + s * c["slope"].as_f64().unwrap();
        assert!(
            (linear.clamp(0.0, 1.0) - weak["fixation_probability"].as_f64().unwrap()).abs() < 1e-15
        );
    }
    assert_eq!(doc["provenance"]["method"], "approximation:weak_selection");
    let warnings = warnings_of(&doc);
    assert!(
        warnings
            .iter()
            .any(|w| w.contains("no screening approximation is inside") && w.contains("0.3")),
        "{warnings:?}"
    );
    for name in ["strong_migration", "branching"] {
        assert!(
            warnings
                .iter()
                .any(|w| w.contains(&format!("`{name}` is outside its valid regime"))),
            "{name}: {warnings:?}"
        );
    }

    // The job's own order decides when nothing is inside.
    job["method"]["approximations"] = json!(["branching", "weak_selection"]);
    let doc = stdout_json(&run_stdin(&job, &[]));
    let strong = &doc["results"][2];
    assert_eq!(strong["s"], 0.3);
    assert_eq!(strong["method"], "approximation:branching");
    assert_eq!(strong["approximations"].as_array().unwrap().len(), 2);
    assert_eq!(doc["results"][0]["method"], "approximation:weak_selection");
    assert_eq!(doc["provenance"]["method"], "approximation");
    assert_eq!(
        doc["spec"]["method"]["approximations"],
        json!(["branching", "weak_selection"])
    );
}

#[test]
fn exact_results_carry_every_approximation_with_its_discrepancy() {
    let mut job = small_job();
    job["selection"]["s"] = json!([0.001]);
    let doc = stdout_json(&run_stdin(&job, &[]));
    assert!(
        doc["spec"]["method"].get("approximations").is_none(),
        "not written when absent"
    );
    for r in doc["results"].as_array().unwrap() {
        assert_eq!(r["method"], "exact");
        let exact = r["fixation_probability"].as_f64().unwrap();
        for e in r["approximations"].as_array().unwrap() {
            let value = e["fixation_probability"].as_f64().unwrap();
            assert_eq!(e["discrepancy"].as_f64().unwrap(), value - exact);
            assert!(e.get("inside_ci95").is_none());
        }
        // The first-order expansion (references.md §5; Allen et al. 2017, Nature 544:227-230,
        // approach) is off by O(s^2): at s = 0.001 the exact answer is within 1e-5 of it.
        let weak = approximation(r, "weak_selection");
        assert!(
            weak["discrepancy"].as_f64().unwrap().abs() < 1e-5,
            "{weak:#}"
        );
    }
    job["method"]["approximations"] = json!(["strong_migration"]);
    let doc = stdout_json(&run_stdin(&job, &[]));
    let entries = doc["results"][0]["approximations"].as_array().unwrap();
    assert_eq!(entries.len(), 1);
    assert_eq!(entries[0]["name"], "strong_migration");
    job["method"]["approximations"] = json!([]);
    let doc = stdout_json(&run_stdin(&job, &[]));
    assert!(doc["results"][0].get("approximations").is_none());
}

#[test]
fn an_ensemble_compares_in_standard_errors_and_takes_link_rows_from_an_in_regime_approximation() {
    // Demes of 100 and 80 at s = 0.1: n_i s >= 8, inside the branching regime; too little
    // migration for the strong-migration limit and too much selection for weak selection.
    let job = json!({
        "population": {"demes": [{"id": "x", "size": 100}, {"id": "y", "size": 80}]},
        "migration": {"orientation": "recruitment", "matrix": [[0.9, 0.1], [0.2, 0.8]]},
        "dynamics": {"rule": "death_birth"},
        "selection": {"s": 0.1},
        "start": ["x", "uniform"],
        "method": {"kind": "ensemble", "seed": 3, "replicates": 2000, "chunk_size": 500},
        "outputs": {"sensitivity": true, "times": false}
    });
    let doc = stdout_json(&run_stdin(&job, &[]));
    for r in doc["results"].as_array().unwrap() {
        let p = r["fixation_probability"].as_f64().unwrap();
        let n = r["replicates"].as_f64().unwrap();
        let ci: Vec<f64> = serde_json::from_value(r["ci95"].clone()).unwrap();
        for e in r["approximations"].as_array().unwrap() {
            let value = e["fixation_probability"].as_f64().unwrap();
            let d = e["discrepancy"].as_f64().unwrap();
            assert_eq!(d, value - p);
            let z = e["discrepancy_standard_errors"].as_f64().unwrap();
            assert!((z - d / (p * (1.0 - p) / n).sqrt()).abs() < 1e-9 * z.abs().max(1.0));
            let inside = ci[0] <= value && value <= ci[1];
            assert_eq!(e["inside_ci95"].as_bool().unwrap(), inside, "{e:#}");
        }
        assert!(approximation(r, "branching")["valid_regime"]["inside"]
            .as_bool()
            .unwrap());
    }
    // Rows of other methods (paired simulation) may stand beside them.
    let rows: Vec<&Value> = doc["sensitivity"]
        .as_array()
        .expect("a sensitivity array")
        .iter()
        .filter(|r| r["method"] == "approximation:branching")
        .collect();
    assert_eq!(rows.len(), 4, "2 starts x 2 links from branching");
    for r in rows {
        assert!(r.get("d_mean_fixation_generations").is_none());
        assert!(
            r.get("d_fixation_probability_per_flow").is_none(),
            "not a flows job"
        );
    }
    let warnings = warnings_of(&doc);
    assert!(
        warnings
            .iter()
            .any(|w| w.contains("`strong_migration` is outside its valid regime")),
        "{warnings:?}"
    );
}

#[test]
fn approximation_link_rows_are_ranked_and_flows_jobs_get_per_flow_derivatives() {
    let mut job = small_job();
    job["method"] = json!({"kind": "approximation"});
    job["selection"]["s"] = json!([0.001]);
    job["outputs"] = json!({"sensitivity": true});
    let doc = stdout_json(&run_stdin(&job, &[]));
    let rows = doc["sensitivity"].as_array().unwrap();
    assert_eq!(rows.len(), 12, "2 starts x 6 links");
    for group in rows.chunks(6) {
        let d: Vec<f64> = group
            .iter()
            .map(|r| {
                assert_eq!(r["method"], "approximation:weak_selection");
                let flow = r["flow"].as_f64().unwrap();
                let matrix = &doc["spec"]["migration"]["matrix"];
                let (from, to) = (r["from"].as_str().unwrap(), r["to"].as_str().unwrap());
                let index = |id: &str| ["a", "b", "c"].iter().position(|x| *x == id).unwrap();
                assert_eq!(matrix[index(from)][index(to)].as_f64().unwrap(), flow);
                assert!(r["d_fixation_probability_per_flow"].is_number());
                assert!(r["flow_meaning"].as_str().unwrap().contains("raw flow"));
                r["d_fixation_probability"].as_f64().unwrap()
            })
            .collect();
        assert!(
            d.windows(2).all(|w| w[0] <= w[1]),
            "most lowering first: {d:?}"
        );
    }
}

#[test]
fn per_flow_derivatives_match_finite_differences_of_the_reduced_flow() {
    // The chain rule through the flows normalisation (model.md: B normalises the columns of
    // the flows) against a central difference of the exact answers of the job itself, with
    // the raw flow changed by ±h.
    let mut job = small_job();
    job["method"] = json!({"kind": "exact"});
    job["start"] = json!(["a"]);
    job["outputs"] = json!({"sensitivity": true});
    let doc = stdout_json(&run_stdin(&job, &[]));
    let rows = doc["sensitivity"].as_array().unwrap();
    assert_eq!(rows.len(), 6);
    let index = |id: &Value| ["a", "b", "c"].iter().position(|x| id == x).unwrap();
    let h = 1e-4;
    for r in rows {
        let (from, to) = (index(&r["from"]), index(&r["to"]));
        let at = |delta: f64| {
            let mut changed = job.clone();
            changed["outputs"] = json!({});
            let flow = changed["migration"]["matrix"][from][to].as_f64().unwrap();
            changed["migration"]["matrix"][from][to] = json!(flow + delta);
            let out = stdout_json(&run_stdin(&changed, &[]));
            out["results"][0]["fixation_probability"].as_f64().unwrap()
        };
        let reduce = (at(-h) - at(h)) / (2.0 * h);
        let got = r["d_fixation_probability_per_flow"].as_f64().unwrap();
        // truncation O(h^2), round-off about 1e-16 / h
        assert!(
            (got - reduce).abs() <= 1e-6 * got.abs() + 1e-10,
            "{r:#}: finite difference {reduce:e}"
        );
        assert!(r["d_mean_fixation_generations_per_flow"].is_number());
    }
}

#[test]
fn bad_approximation_lists_are_reported_at_their_pointers() {
    let mut job = small_job();
    job["method"]["approximations"] = json!(["branching", "kimura", "branching", 3]);
    let got = problems(job.to_string().as_bytes());
    let pointers: Vec<&str> = got.iter().map(|(p, _)| p.as_str()).collect();
    assert_eq!(
        pointers,
        [
            "/method/approximations/1",
            "/method/approximations/2",
            "/method/approximations/3"
        ],
        "{got:?}"
    );
    assert!(got[0].1.contains("weak_selection"), "{got:?}");
    assert!(got[1].1.contains("twice"), "{got:?}");
    job["method"] = json!({"kind": "approximation", "approximations": []});
    let got = problems(job.to_string().as_bytes());
    assert_eq!(got.len(), 1, "{got:?}");
    assert_eq!(got[0].0, "/method/approximations");
    job["method"]["approximations"] = json!("branching");
    assert_eq!(
        problems(job.to_string().as_bytes())[0].0,
        "/method/approximations"
    );
}

#[test]
fn exact_what_ifs_and_a_plan_come_back_in_the_run_document() {
    let mut job = small_job();
    job["interventions"] = json!([
        {"name": "nothing", "changes": [{"action": "scale_link", "from": "a", "to": "b", "factor": 1}]},
        {"name": "isolate-a", "changes": [{"action": "scale_out_of", "deme": "a", "factor": 0}]}
    ]);
    job["plan"] = json!({"budget": 0.3, "shortlist": 2});
    let doc = stdout_json(&run_stdin(&job, &[]));
    assert_eq!(
        doc["spec"]["plan"],
        json!({"budget": 0.3, "steps": 10, "shortlist": 2, "s": 0.1})
    );
    let rows = doc["interventions"]
        .as_array()
        .expect("an interventions array");
    assert_eq!(rows.len(), 4, "2 scenarios x 1 s x 2 starts");
    for r in rows {
        assert_eq!(r["method"], "exact");
        assert!(
            r.get("change_ci95").is_none(),
            "exact changes carry no interval"
        );
        let (base, scen, change) = (
            r["baseline_fixation_probability"].as_f64().unwrap(),
            r["scenario_fixation_probability"].as_f64().unwrap(),
            r["change_fixation_probability"].as_f64().unwrap(),
        );
        assert_eq!(change, scen - base);
        match (r["name"].as_str().unwrap(), r["start"].as_str().unwrap()) {
            ("nothing", _) => {
                assert_eq!(change, 0.0);
                assert_eq!(r["change_mean_fixation_generations"], 0.0);
            }
            ("isolate-a", "a") => {
                assert_eq!(scen, 0.0, "no lineage leaves the start deme");
                assert!(r.get("scenario_mean_fixation_generations").is_none());
            }
            _ => assert!(scen < base),
        }
    }
    // The baseline of every row is the job's own result.
    for r in rows {
        let result = doc["results"]
            .as_array()
            .unwrap()
            .iter()
            .find(|x| x["start"] == r["start"])
            .unwrap();
        assert_eq!(
            r["baseline_fixation_probability"],
            result["fixation_probability"]
        );
    }
    let plan = &doc["plan"];
    assert_eq!(plan["method"], "exact");
    let mut before = plan["baseline_objective"].as_f64().unwrap();
    let steps = plan["steps"].as_array().unwrap();
    assert!(!steps.is_empty());
    for step in steps {
        assert_eq!(step["objective_before"].as_f64().unwrap(), before);
        let after = step["objective_after"].as_f64().unwrap();
        assert!(after < before, "{step:#}");
        assert!(step["budget_used"].as_f64().unwrap() <= 0.3);
        assert_eq!(step["ranked_by"], "exact_adjoint");
        assert_eq!(step["candidates"].as_array().unwrap().len(), 2);
        before = after;
    }
    assert!(["budget", "no_improvement", "steps", "no_links"]
        .contains(&plan["stop_reason"].as_str().unwrap()));
}

#[test]
fn an_ensemble_what_if_pairs_its_replicates_with_the_job_s_own_ensemble() {
    let mut job = ensemble_job();
    job["interventions"] = json!([
        {"name": "same", "changes": [{"action": "scale_into", "deme": "x", "factor": 1}]},
        {"name": "halve", "changes": [{"action": "scale_link", "from": "y", "to": "x", "factor": 0.5}]}
    ]);
    job["outputs"]["sensitivity"] = json!(true);
    let doc = stdout_json(&run_stdin(&job, &[]));
    let results = doc["results"].as_array().unwrap();
    let rows = doc["interventions"].as_array().unwrap();
    assert_eq!(rows.len(), 2 * 2 * 2, "2 scenarios x 2 s x 2 starts");
    for r in rows {
        let result = results
            .iter()
            .find(|x| x["s"] == r["s"] && x["start"] == r["start"])
            .unwrap();
        // Same key, same replicates: the baseline is the job's ensemble, interval included.
        assert_eq!(
            r["baseline_fixation_probability"],
            result["fixation_probability"]
        );
        assert_eq!(r["baseline_ci95"], result["ci95"]);
        assert_eq!(r["interval_method"], "newcombe_1998_paired_hybrid_score");
        let ci: Vec<f64> = serde_json::from_value(r["change_ci95"].clone()).unwrap();
        let change = r["change_fixation_probability"].as_f64().unwrap();
        assert!(ci[0] <= change && change <= ci[1]);
        if r["name"] == "same" {
            assert_eq!(change, 0.0);
            assert_eq!(r["pairs"]["baseline_only"], 0);
            assert_eq!(r["pairs"]["scenario_only"], 0);
            for by_fraction in r["arrival_change_generations"]
                .as_object()
                .unwrap()
                .values()
            {
                for a in by_fraction.as_object().unwrap().values() {
                    assert_eq!(a["change_mean"], 0.0);
                    assert_eq!(a["change_median"], 0.0);
                }
            }
        }
    }
    let paired: Vec<&Value> = doc["sensitivity"]
        .as_array()
        .unwrap()
        .iter()
        .filter(|r| r["method"] == "ensemble_paired_secant")
        .collect();
    assert_eq!(paired.len(), 2 * 2 * 2, "2 s x 2 starts x both links");
    for r in paired {
        let ci: Vec<f64> = serde_json::from_value(r["ci95"].clone()).unwrap();
        let d = r["d_fixation_probability"].as_f64().unwrap();
        assert!(ci[0] <= d && d <= ci[1], "{r:#}");
    }
}

#[test]
fn bad_interventions_and_plans_exit_2_with_their_pointers() {
    let mut job = small_job();
    job["interventions"] = json!([
        {"name": "x", "changes": [
            {"action": "scale_link", "from": "a", "to": "nowhere", "factor": 0.5},
            {"action": "scale_out_of", "deme": "b", "factor": -0.5}]},
        {"name": "x", "changes": [{"action": "close_link", "from": "a", "to": "b"}]}
    ]);
    job["plan"] = json!({"budget": -0.1});
    let found = problems(job.to_string().as_bytes());
    let at: Vec<&str> = found.iter().map(|(p, _)| p.as_str()).collect();
    for want in [
        "/interventions/0/changes/0/to",
        "/interventions/0/changes/1/factor",
        "/interventions/1/name",
        "/plan/budget",
    ] {
        assert!(at.contains(&want), "{want} missing from {found:?}");
    }
}

#[test]
fn a_notify_url_is_accepted_by_run_which_says_it_sends_no_notification() {
    let mut job = small_job();
    job["notify_url"] = json!("http://127.0.0.1:9/done");
    let doc = stdout_json(&run_stdin(&job, &[]));
    assert!(doc["spec"].get("notify_url").is_none(), "{:#}", doc["spec"]);
    let warnings = doc["warnings"].as_array().unwrap();
    assert!(
        warnings
            .iter()
            .any(|w| w.as_str().unwrap().contains("sends no notification")),
        "{warnings:#?}"
    );
}
