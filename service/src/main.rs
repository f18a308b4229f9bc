//! The `demefix` command: see [`demefix::cli`].

fn main() -> std::process::ExitCode {
    demefix::cli::main()
}
