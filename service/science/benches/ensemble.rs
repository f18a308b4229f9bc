//! Benchmarks of the ensemble method (`cargo bench -p demefix-science --bench ensemble`).
fn main() {
    divan::main();
}
