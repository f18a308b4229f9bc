//! Records the git commit the service is built from, for `provenance.service_version`.
//!
//! Sets `DEMEFIX_GIT_COMMIT` to `git rev-parse --short HEAD`, or `unknown` when git or the
//! repository is not available (a source tarball, say). Rebuilds when HEAD moves.

use std::path::Path;
use std::process::Command;

fn main() {
    println!("cargo:rerun-if-changed=service/build.rs");
    println!("cargo:rerun-if-changed=migrations");
    let git = Path::new(".git");
    if git.is_dir() {
        println!("cargo:rerun-if-changed=.git/HEAD");
        println!("cargo:rerun-if-changed=.git/packed-refs");
        if let Ok(head) = std::fs::read_to_string(git.join("HEAD")) {
            if let Some(reference) = head.trim().strip_prefix("ref: ") {
                println!("cargo:rerun-if-changed=.git/{reference}");
            }
        }
    }
    let commit = Command::new("git")
        .args(["rev-parse", "--short", "HEAD"])
        .output()
        .ok()
        .filter(|o| o.status.success())
        .and_then(|o| String::from_utf8(o.stdout).ok())
        .map(|s| s.trim().to_owned())
        .filter(|s| !s.is_empty() && s.bytes().all(|b| b.is_ascii_hexdigit()))
        .unwrap_or_else(|| "unknown".to_owned());
    println!("cargo:rustc-env=DEMEFIX_GIT_COMMIT={commit}");
}
