//! Where a test keeps what it fetches from a package registry: outside the source tree, in
//! the build's target folder unless a variable names another place.

use std::path::{Path, PathBuf};

/// `$var` when set, else `name` in the target folder that holds this build's binary
/// (`<target>/<profile>/demefix`).
pub fn fetched_dir(var: &str, name: &str) -> PathBuf {
    if let Some(dir) = std::env::var_os(var) {
        return PathBuf::from(dir);
    }
    PathBuf::from(env!("CARGO_BIN_EXE_demefix"))
        .parent()
        .and_then(Path::parent)
        .expect("the binary lives in <target>/<profile>/")
        .join(name)
}
