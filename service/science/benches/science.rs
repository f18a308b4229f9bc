//! Benchmarks of the science core (run with `cargo bench -p demefix-science`).
fn main() {
    divan::main();
}
