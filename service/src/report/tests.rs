use super::*;
use serde_json::json;

/// A finished ensemble run of two demes, two values of s, arrival times and link rows.
fn run() -> Value {
    let result = |s: f64, start: &str, p: f64| {
        json!({
            "s": s, "start": start, "method": "ensemble:event",
            "fixation_probability": p, "ci95": [p - 0.01, p + 0.01],
            "replicates": 1000, "fixed": (p * 1000.0) as u64,
            "mean_fixation_generations": 80.0, "mean_fixation_days": 160.0,
            "arrival_generations": {
                "x": {"0.5": {"median": 10.0, "q05": 4.0, "q95": 20.0},
                      "1": {"median": 30.0, "q05": 15.0, "q95": 60.0}},
                "y": {"0.5": {"median": 12.0, "q05": 5.0, "q95": 25.0},
                      "1": {"median": 33.0, "q05": 16.0, "q95": 64.0}}
            },
            "well_mixed_fixation_probability": p * 0.9, "well_mixed_method": "moran",
            "ratio_to_well_mixed": 1.0 / 0.9
        })
    };
    let link = |s: f64, start: &str, from: &str, to: &str, d: f64, method: &str| {
        json!({"s": s, "start": start, "from": from, "to": to,
               "d_fixation_probability": d, "method": method, "meaning": "..."})
    };
    json!({
        "id": "0193aaaa-0000-7000-8000-000000000001",
        "status": "succeeded",
        "progress": {"done": 4000, "total": 4000},
        "submitted_at": "2026-12-01T10:00:00.000Z",
        "finished_at": "2026-12-01T10:00:03.000Z",
        "spec": {
            "label": "Two <fictional> islands",
            "series": "isles",
            "population": {"demes": [{"id": "x", "size": 30}, {"id": "y", "size": 20}]},
            "migration": {"orientation": "dispersal", "matrix": [[0.9, 0.1], [0.2, 0.8]]},
            "dynamics": {"rule": "birth_death", "generation_days": 2.0},
            "selection": {"s": [0.0, 0.2], "scope": "deme"},
            "start": ["y", "uniform"],
            "method": {"kind": "ensemble", "seed": 5}
        },
        "provenance": {
            "spec_sha256": "a".repeat(64), "matrix_sha256": "b".repeat(64),
            "normalised_matrix_sha256": "c".repeat(64), "seed": 5,
            "method": "ensemble:event", "method_version": "0.3.0",
            "service_version": "0.1.0+abc", "host": "vm", "threads": 2
        },
        "results": [
            result(0.0, "y", 0.02), result(0.0, "uniform", 0.02),
            result(0.2, "y", 0.15), result(0.2, "uniform", 0.17)
        ],
        "sensitivity": [
            link(0.2, "uniform", "x", "y", -0.03, "approximation:branching"),
            link(0.2, "uniform", "y", "x", 0.01, "approximation:branching"),
            {"s": 0.2, "start": "uniform", "from": "x", "to": "y",
             "d_fixation_probability": -0.025, "ci95": [-0.05, 0.0],
             "method": "ensemble_paired_secant"}
        ],
        "warnings": ["a warning with <markup>"],
        "disclaimer": crate::document::DISCLAIMER
    })
}

#[test]
fn a_finished_run_gets_every_chart_with_captions_and_its_provenance() {
    let html = render(&run(), None);
    assert!(html.starts_with("<!DOCTYPE html>"));
    // by start (2 values of s), against s, arrival (4 pairs), one heatmap
    assert_eq!(html.matches("<svg").count(), 2 + 1 + 4 + 1, "{html}");
    assert_eq!(
        html.matches("<figcaption>").count(),
        html.matches("<svg").count()
    );
    assert_eq!(
        html.matches("not forecasts").count(),
        html.matches("<figcaption>").count() + 1,
        "every caption and the document's disclaimer at the top"
    );
    for needle in [
        "0193aaaa-0000-7000-8000-000000000001",
        &"a".repeat(64),
        &"c".repeat(64),
        "0.3.0",
        "birth-death",
        "dispersal matrix",
        "N = 50",
        "one generation = 2 days",
        "public-health authorities",
        "local regulations",
        "Two &lt;fictional&gt; islands",
        "a warning with &lt;markup&gt;",
        "source deme",
        "ensemble_paired_secant",
    ] {
        assert!(html.contains(needle), "{needle} missing");
    }
    assert!(!html.contains("<script"));
    assert!(!html.contains("<fictional>"));
    assert!(!html.contains("id=\"changes\""), "no change report asked");
}

#[test]
fn a_change_report_is_included_when_given() {
    let changes = json!({"series": "isles", "rows": [
        {"s": 0.2, "start": "uniform",
         "fixation_probability": {"from": 0.15, "to": 0.17, "change": 0.02, "flagged": true}}
    ]});
    let html = render(&run(), Some(&changes));
    assert!(html.contains("<section id=\"changes\">"));
    assert!(html.contains("href=\"#changes\""));
}

#[test]
fn an_exact_single_s_run_has_no_sweep_arrival_or_heatmap_charts() {
    let mut doc = run();
    let results = doc["results"].as_array_mut().unwrap();
    results.truncate(2);
    for r in results.iter_mut() {
        let r = r.as_object_mut().unwrap();
        r.remove("ci95");
        r.remove("arrival_generations");
        r.insert("method".to_owned(), json!("exact"));
    }
    doc.as_object_mut().unwrap().remove("sensitivity");
    let html = render(&doc, None);
    assert_eq!(html.matches("<svg").count(), 1, "by start only");
    assert!(html.contains("Fixation probability against s <span class=\"note\">— not in this run"));
    assert!(html.contains("exact (the Markov chain solved; no interval)"));
}

#[test]
fn runs_without_results_say_where_they_are() {
    let mut doc = run();
    doc["status"] = json!("running");
    doc.as_object_mut().unwrap().remove("results");
    let html = render(&doc, None);
    assert!(html.contains("This run is running"));
    assert!(html.contains("Progress: 4000 of 4000"));
    assert!(!html.contains("<svg"));
    doc["status"] = json!("failed");
    doc["error"] = json!("the solver <did not> converge");
    let html = render(&doc, None);
    assert!(html.contains("the solver &lt;did not&gt; converge"));
    assert!(html.contains("not forecasts"));
    // Anything at all renders a page.
    assert!(render(&json!(null), None).contains("<html"));
    assert!(render(&json!({"results": "nonsense"}), None).contains("Every result"));
}

#[test]
fn many_values_of_s_are_drawn_at_most_six_times_and_all_in_the_sweep_chart() {
    let mut doc = run();
    let template = doc["results"][1].clone();
    let results: Vec<Value> = (0..20)
        .map(|i| {
            let mut r = template.clone();
            r["s"] = json!(i as f64 * 0.01);
            r.as_object_mut().unwrap().remove("arrival_generations");
            r
        })
        .collect();
    doc["results"] = Value::Array(results);
    doc.as_object_mut().unwrap().remove("sensitivity");
    let html = render(&doc, None);
    assert_eq!(html.matches("<svg").count(), MAX_S_CHARTS + 1);
    assert!(html.contains("6 of the 20 values of s"));
}
