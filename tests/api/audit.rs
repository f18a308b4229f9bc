//! The hash-chained audit log through the service and offline: every state change is an
//! entry, the chain verifies, and an edit made to a copy of the database file is named by the
//! first entry it breaks (RFC 9162-style tamper evidence; the rules are in
//! `service/src/audit.rs`).

use super::helpers::{ensemble_job, small_job, spawn_app, TempDir};
use serde_json::Value;
use sqlx::Connection;
use std::path::{Path, PathBuf};
use std::process::Command;
use std::time::Duration;

const FINISH: Duration = Duration::from_secs(60);

/// Every entry, paging with a small `limit` so the cursor is exercised.
async fn all_entries(app: &super::helpers::TestApp) -> Vec<Value> {
    let mut entries = Vec::new();
    let mut after = 0u64;
    loop {
        let page = app
            .get_json(&format!("/v1/audit?after={after}&limit=3"))
            .await;
        entries.extend(page["entries"].as_array().unwrap().iter().cloned());
        match page["next_after"].as_u64() {
            Some(next) => after = next,
            None => break,
        }
    }
    entries
}

fn offline_verify(db: &Path) -> (i32, Value) {
    let out = Command::new(env!("CARGO_BIN_EXE_demefix"))
        .args(["audit", "verify", "--db"])
        .arg(db)
        .output()
        .expect("run demefix audit verify");
    let verdict = serde_json::from_slice(&out.stdout).unwrap_or(Value::Null);
    (out.status.code().unwrap_or(-1), verdict)
}

/// Copies the database file (the service was stopped, so the WAL was checkpointed) into
/// `dir` under `name`.
fn copy_db(from: &Path, dir: &TempDir, name: &str) -> PathBuf {
    let to = dir.0.join(name);
    std::fs::copy(from, &to).expect("copy the database");
    for suffix in ["-wal", "-shm"] {
        let side = PathBuf::from(format!("{}{suffix}", from.display()));
        if side.exists() {
            std::fs::copy(&side, format!("{}{suffix}", to.display())).unwrap();
        }
    }
    to
}

async fn tamper(db: &Path, statements: &[&str]) {
    let url = format!("sqlite://{}", db.display());
    let mut conn = sqlx::SqliteConnection::connect(&url).await.unwrap();
    for sql in statements {
        sqlx::query(sql).execute(&mut conn).await.unwrap();
    }
    conn.close().await.unwrap();
}

#[tokio::test(flavor = "multi_thread", worker_threads = 2)]
async fn every_state_change_is_chained_and_an_edited_result_names_its_entry() {
    let mut app = spawn_app().await;
    let exact = app.succeeded(&small_job(), FINISH).await;
    let exact_id = exact["id"].as_str().unwrap().to_owned();
    let ensemble = app.succeeded(&ensemble_job(600, 200), FINISH).await;
    let ensemble_id = ensemble["id"].as_str().unwrap().to_owned();

    let entries = all_entries(&app).await;
    let kinds_of = |id: &str| -> Vec<String> {
        entries
            .iter()
            .filter(|e| e["run_id"] == id)
            .map(|e| e["kind"].as_str().unwrap().to_owned())
            .collect()
    };
    assert_eq!(kinds_of(&exact_id), ["submitted", "started", "finished"]);
    let ensemble_kinds = kinds_of(&ensemble_id);
    assert_eq!(ensemble_kinds.first().unwrap(), "submitted");
    assert_eq!(ensemble_kinds.last().unwrap(), "finished");
    assert!(
        ensemble_kinds
            .iter()
            .filter(|k| *k == "chunk_committed")
            .count()
            >= 3,
        "600 replicates in chunks of 200 commit at least 3 chunks: {ensemble_kinds:?}"
    );
    assert_eq!(entries[0]["kind"], "matrix_stored");
    for (i, e) in entries.iter().enumerate() {
        assert_eq!(e["seq"], i as u64 + 1, "no gaps");
        if i > 0 {
            assert_eq!(e["prev_sha256"], entries[i - 1]["entry_sha256"]);
        }
    }

    let verdict = app.get_json("/v1/audit/verify").await;
    assert_eq!(verdict["intact"], true, "{verdict:#}");
    assert_eq!(verdict["entries"], entries.len() as u64);
    assert_eq!(
        verdict["head_sha256"],
        entries.last().unwrap()["entry_sha256"]
    );

    let db = app.db_path();
    app.stop_keeping_files().await;
    let copies = TempDir::new("audit-copies");

    let untouched = copy_db(&db, &copies, "untouched.db");
    let (code, verdict) = offline_verify(&untouched);
    assert_eq!(code, 0, "{verdict:#}");
    assert_eq!(verdict["intact"], true);
    assert_eq!(verdict["entries"], entries.len() as u64);

    // Someone with the file edits a stored result (dropping the trigger that forbids it).
    let edited = copy_db(&db, &copies, "edited-result.db");
    tamper(
        &edited,
        &[
            "DROP TRIGGER runs_finished_are_immutable",
            &format!(
                "UPDATE runs SET results = replace(results, '0.', '0.9') WHERE id = '{exact_id}'"
            ),
        ],
    )
    .await;
    let finished_seq = entries
        .iter()
        .find(|e| e["run_id"] == exact_id.as_str() && e["kind"] == "finished")
        .unwrap()["seq"]
        .clone();
    let (code, verdict) = offline_verify(&edited);
    assert_eq!(code, 3, "{verdict:#}");
    assert_eq!(verdict["intact"], false);
    let broken = &verdict["first_broken"];
    assert_eq!(broken["seq"], finished_seq, "{verdict:#}");
    assert_eq!(broken["run_id"], exact_id.as_str());
    assert!(
        broken["reason"]
            .as_str()
            .unwrap()
            .contains("results_sha256"),
        "{verdict:#}"
    );

    // An entry edited in place, with its content hash recomputed, breaks the chain there.
    let rewritten = copy_db(&db, &copies, "edited-entry.db");
    let target = entries
        .iter()
        .find(|e| e["run_id"] == ensemble_id.as_str() && e["kind"] == "chunk_committed")
        .unwrap();
    let seq = target["seq"].as_u64().unwrap();
    tamper(
        &rewritten,
        &[
            "DROP TRIGGER audit_log_is_append_only",
            &format!(
                "UPDATE audit_log SET content = replace(content, '\"done\":', '\"done\":1'),
                 content_sha256 = lower(hex(randomblob(32))) WHERE seq = {seq}"
            ),
        ],
    )
    .await;
    let (code, verdict) = offline_verify(&rewritten);
    assert_eq!(code, 3, "{verdict:#}");
    assert_eq!(verdict["first_broken"]["seq"], seq, "{verdict:#}");

    // A removed entry is named by the position where it is missed.
    let removed = copy_db(&db, &copies, "removed-entry.db");
    tamper(
        &removed,
        &[
            "DROP TRIGGER audit_log_is_never_deleted",
            &format!("DELETE FROM audit_log WHERE seq = {seq}"),
        ],
    )
    .await;
    let (code, verdict) = offline_verify(&removed);
    assert_eq!(code, 3, "{verdict:#}");
    assert_eq!(verdict["first_broken"]["seq"], seq + 1, "{verdict:#}");
}

#[tokio::test(flavor = "multi_thread", worker_threads = 2)]
async fn a_succeeded_run_exports_w3c_prov_json_naming_recomputable_hashes() {
    let app = spawn_app().await;
    let run = app.succeeded(&small_job(), FINISH).await;
    let id = run["id"].as_str().unwrap();
    let res = app.get(&format!("/v1/runs/{id}/provenance")).await;
    assert_eq!(res.status(), 200);
    let prov: Value = res.json().await.unwrap();
    let p = &run["provenance"];
    let spec = format!("demefix:spec-{}", p["spec_sha256"].as_str().unwrap());
    let matrix = format!("demefix:matrix-{}", p["matrix_sha256"].as_str().unwrap());
    let activity = format!("demefix:run-{id}");
    assert_eq!(prov["entity"][&spec]["demefix:seed"], p["seed"]);
    assert!(prov["entity"][&matrix].is_object(), "{prov:#}");
    assert_eq!(prov["used"]["_:used-spec"]["prov:entity"], spec.as_str());
    assert_eq!(
        prov["used"]["_:used-matrix"]["prov:activity"],
        activity.as_str()
    );
    let result = prov["wasGeneratedBy"]["_:generated-result"]["prov:entity"]
        .as_str()
        .unwrap()
        .to_owned();
    assert!(prov["entity"][&result]["demefix:results_sha256"].is_string());
    assert_eq!(
        prov["activity"][&activity]["prov:endTime"], run["finished_at"],
        "{prov:#}"
    );
    let agent = prov["wasAssociatedWith"]["_:associated"]["prov:agent"]
        .as_str()
        .unwrap();
    assert_eq!(prov["agent"][agent]["prov:type"]["$"], "prov:SoftwareAgent");

    // The results hash is the one the audit log's `finished` entry vouches for.
    let entries = app.get_json("/v1/audit?limit=1000").await;
    let finished = entries["entries"]
        .as_array()
        .unwrap()
        .iter()
        .find(|e| e["run_id"] == id && e["kind"] == "finished")
        .unwrap();
    let content: Value = serde_json::from_str(finished["content"].as_str().unwrap()).unwrap();
    assert_eq!(
        content["facts"]["results_sha256"],
        prov["entity"][&result]["demefix:results_sha256"]
    );

    let unknown = app
        .get("/v1/runs/01890000-0000-7000-8000-000000000000/provenance")
        .await;
    assert_eq!(unknown.status(), 404);
    let queued = app
        .post_job(&super::helpers::ensemble_job(5_000_000, 1000))
        .await;
    let queued: Value = queued.json().await.unwrap();
    let early = app
        .get(&format!(
            "/v1/runs/{}/provenance",
            queued["id"].as_str().unwrap()
        ))
        .await;
    assert_eq!(early.status(), 409);
    app.stop().await;
}

#[tokio::test(flavor = "multi_thread", worker_threads = 2)]
async fn the_audit_cursor_takes_every_sqlite_position_and_nothing_beyond() {
    let app = spawn_app().await;
    // 2^63 - 1, the largest SQLite integer (openapi.yaml's maximum of `after`): an empty page.
    let last = app.get(&format!("/v1/audit?after={}", i64::MAX)).await;
    assert_eq!(last.status(), 200);
    let page: Value = last.json().await.unwrap();
    assert_eq!(page["entries"].as_array().unwrap().len(), 0);
    assert!(page["next_after"].is_null());
    for bad in [
        format!("/v1/audit?after={}", i64::MAX as u64 + 1),
        "/v1/audit?after=99999999999999999999999".to_owned(),
        "/v1/audit?after=-1".to_owned(),
    ] {
        let res = app.get(&bad).await;
        assert_eq!(res.status(), 400, "{bad}");
        assert_eq!(
            res.headers()["content-type"].to_str().unwrap(),
            "application/problem+json"
        );
    }
    app.stop().await;
}
