//! Benchmarks of the exact method (`cargo bench -p demefix-science --bench exact`).
fn main() {
    divan::main();
}
