//! The local command line: `demefix run`, `demefix validate`, `demefix serve`, `demefix demo`
//! (the service end to end in one process, see [`crate::demo`]), and the client commands
//! `demefix submit`, `demefix get` and `demefix report` against a running service (see
//! [`crate::client`], which owns their behaviour and exit codes).
//!
//! This module owns everything at the process edge: reading the job (a file or `-` for
//! stdin), the exit codes of `run` and `validate` (0 success, 2 invalid job with the RFC 9457
//! problem document on stderr, 1 any other failure with a message on stderr), picking a seed
//! when a job needs one and has none, the thread pool, and the progress bar on stderr.
//! Results go to stdout as pretty JSON. `serve` reads its configuration from the environment
//! ([`crate::config`]) and hands over to [`crate::server::serve`] on a multi-threaded tokio
//! runtime.

use crate::client;
use crate::compute::{self, ComputeError};
use crate::document::{RunDocument, DISCLAIMER};
use crate::problem::InvalidJob;
use crate::provenance::Provenance;
use crate::spec::{self, Limits, ResolvedMethod, ValidatedJob};
use clap::{Args, Parser, Subcommand};
use demefix_science::ensemble::ProgressObserver;
use demefix_science::exact::ExactConfig;
use indicatif::{ProgressBar, ProgressDrawTarget, ProgressStyle};
use std::io::{IsTerminal, Read, Write};
use std::process::ExitCode;
use std::sync::atomic::AtomicBool;

/// Fixation probabilities, times and arrival times of a new variant in a structured
/// population.
#[derive(Debug, Parser)]
#[command(name = "demefix", version = crate::provenance::SERVICE_VERSION)]
pub struct Cli {
    #[command(subcommand)]
    command: Command,
}

#[derive(Debug, Subcommand)]
enum Command {
    /// Validate and compute a job; print the result document as JSON on stdout.
    Run(RunArgs),
    /// Validate a job without computing it.
    Validate(ValidateArgs),
    /// Run the HTTP analysis service (configured by DEMEFIX_* environment variables; see
    /// DEVELOPERS.md).
    Serve,
    /// Start the service in this process with a fresh database, post the demo scenario
    /// (examples/ferry-islands-ensemble.json) for two update rules, and print the results.
    Demo(DemoArgs),
    /// Submit a job to a running service (POST /v1/runs); print the run id and its Location,
    /// or with --wait the finished run document.
    #[command(after_help = CLIENT_EXIT_CODES)]
    Submit(SubmitArgs),
    /// Print the document of a run of a running service (GET /v1/runs/{id}).
    #[command(after_help = CLIENT_EXIT_CODES)]
    Get(GetArgs),
    /// Save the report of a run (GET /v1/runs/{id}/report) to a file.
    #[command(after_help = CLIENT_EXIT_CODES)]
    Report(ReportArgs),
    /// Re-verify a succeeded run of a running service (POST /v1/runs/{id}/verify): recompute it
    /// from its stored spec and say whether the result is byte-identical (exit 7 when not).
    #[command(after_help = CLIENT_EXIT_CODES)]
    Verify(VerifyArgs),
    /// Print the change report between two runs of a series (GET /v1/series/{name}/changes).
    #[command(after_help = CLIENT_EXIT_CODES)]
    Changes(ChangesArgs),
    /// Work with the tamper-evident audit log of a database file.
    #[command(subcommand)]
    Audit(AuditCommand),
}

/// The exit codes of the client commands (`crate::client::exit`), for `--help`.
const CLIENT_EXIT_CODES: &str = "Exit codes: 0 done (with --wait: the run succeeded); \
    1 any other failure; 2 the service rejected the job (422, every problem printed with its \
    pointer); 3 the service cannot be reached; 4 the run failed; 5 the run was cancelled; \
    6 no such run (404); 7 (verify) the recomputed result differs.\n\nOutputs are model estimates for planning, not forecasts; \
    decisions rest with the responsible public-health authorities.";

#[derive(Debug, Args)]
struct ServiceArgs {
    /// Address of the running service, an http:// URL [default: $DEMEFIX_URL, else
    /// http://127.0.0.1:8080].
    #[arg(long, value_name = "URL")]
    url: Option<String>,
}

#[derive(Debug, Args)]
struct SubmitArgs {
    /// Job document (JSON), or `-` to read it from standard input.
    spec: String,
    /// Wait until the run has finished, showing progress on stderr, and print its document.
    #[arg(long)]
    wait: bool,
    /// Idempotency-Key of the submission: a retry with the same key and job gets the same
    /// run.
    #[arg(long, value_name = "KEY")]
    idempotency_key: Option<String>,
    /// Compute the run even when an earlier run of the same spec could answer it
    /// (Cache-Control: no-cache).
    #[arg(long)]
    no_reuse: bool,
    /// No progress or status lines on stderr.
    #[arg(long)]
    quiet: bool,
    #[command(flatten)]
    service: ServiceArgs,
}

#[derive(Debug, Args)]
struct VerifyArgs {
    /// Run id.
    id: String,
    /// Wait until the recomputation has ended and print the finished verification.
    #[arg(long)]
    wait: bool,
    #[command(flatten)]
    service: ServiceArgs,
}

#[derive(Debug, Args)]
struct ChangesArgs {
    /// Series name.
    series: String,
    /// The earlier run: a run id or an as_of date [default: the succeeded run before --to].
    #[arg(long, value_name = "ID|DATE")]
    from: Option<String>,
    /// The later run: a run id or an as_of date [default: the latest succeeded run].
    #[arg(long, value_name = "ID|DATE")]
    to: Option<String>,
    /// Flag fixation-probability changes at least this large (absolute).
    #[arg(long, value_name = "X")]
    threshold: Option<f64>,
    /// Flag time changes at least this large, generations.
    #[arg(long, value_name = "G")]
    generations_threshold: Option<f64>,
    #[command(flatten)]
    service: ServiceArgs,
}

#[derive(Debug, Args)]
struct GetArgs {
    /// Run id.
    id: String,
    #[command(flatten)]
    service: ServiceArgs,
}

#[derive(Debug, Args)]
struct ReportArgs {
    /// Run id.
    id: String,
    /// File to save the report to (replaced if it exists; written whole or not at all).
    #[arg(long, value_name = "FILE")]
    out: std::path::PathBuf,
    #[command(flatten)]
    service: ServiceArgs,
}

#[derive(Debug, Subcommand)]
enum AuditCommand {
    /// Recompute the audit chain of a database file offline (run it on a copy) and check every
    /// entry against the records as stored. Prints the verdict as JSON; exit 0 when intact, 3
    /// when an entry does not hold (the verdict names the first).
    Verify(AuditVerifyArgs),
}

#[derive(Debug, Args)]
struct AuditVerifyArgs {
    /// The SQLite file (opened read-only; nothing is migrated or written).
    #[arg(long, value_name = "PATH")]
    db: std::path::PathBuf,
}

#[derive(Debug, Args)]
struct DemoArgs {
    /// SQLite file to create for the demo (must not exist yet; default: demefix.db in a new
    /// directory under the system temp dir). It is kept and its path printed.
    #[arg(long, value_name = "PATH")]
    db: Option<std::path::PathBuf>,
    /// Worker threads of the service (default: the number of CPUs). Results do not depend on
    /// it.
    #[arg(long, value_name = "N", value_parser = clap::value_parser!(u64).range(1..=1024))]
    threads: Option<u64>,
    /// Replicates per table row instead of the scenario's 4,000 (fewer is faster, with wider
    /// intervals).
    #[arg(long, value_name = "N", value_parser = clap::value_parser!(u64).range(1..=10_000_000))]
    replicates: Option<u64>,
    /// Delete the database once the table is printed.
    #[arg(long)]
    discard: bool,
    /// No progress or status lines on stderr.
    #[arg(long)]
    quiet: bool,
}

#[derive(Debug, Args)]
struct JobArgs {
    /// Job document (JSON), or `-` to read it from standard input.
    spec: String,
    /// Largest state space of the exact method (`auto` picks ensembles above it).
    #[arg(long, value_name = "N")]
    max_states: Option<u64>,
}

#[derive(Debug, Args)]
struct RunArgs {
    #[command(flatten)]
    job: JobArgs,
    /// Worker threads (default: the number of CPUs). Results do not depend on it.
    #[arg(long, value_name = "N", value_parser = clap::value_parser!(u64).range(1..=1024))]
    threads: Option<u64>,
    /// No progress bar.
    #[arg(long)]
    quiet: bool,
}

#[derive(Debug, Args)]
struct ValidateArgs {
    #[command(flatten)]
    job: JobArgs,
}

/// A failure of the command, with its exit code.
#[derive(Debug)]
enum Failure {
    /// The job document is not acceptable: exit 2.
    Invalid(InvalidJob),
    /// The audit chain does not hold: exit 3.
    AuditBroken,
    /// Anything else: exit 1.
    Other(String),
}

impl Failure {
    fn report(self) -> ExitCode {
        let mut stderr = std::io::stderr().lock();
        match self {
            Failure::Invalid(doc) => {
                let text = serde_json::to_string_pretty(&doc).unwrap_or_default();
                let _ = writeln!(stderr, "{text}");
                ExitCode::from(2)
            }
            Failure::AuditBroken => {
                let _ = writeln!(
                    stderr,
                    "demefix: the audit log does not hold (see first_broken)"
                );
                ExitCode::from(3)
            }
            Failure::Other(message) => {
                let _ = writeln!(stderr, "demefix: {message}");
                ExitCode::from(1)
            }
        }
    }
}

/// Parses the arguments, runs the command and returns the process exit code.
pub fn main() -> ExitCode {
    let cli = Cli::parse();
    let outcome = match cli.command {
        Command::Run(args) => run(&args),
        Command::Validate(args) => validate(&args),
        Command::Serve => serve(),
        Command::Demo(args) => demo(&args),
        Command::Audit(AuditCommand::Verify(args)) => audit_verify(&args),
        Command::Submit(args) => return submit(args),
        Command::Get(args) => {
            let url = client::service_url(args.service.url);
            return client::run(&url, &client::Command::Get { id: args.id });
        }
        Command::Verify(args) => {
            let url = client::service_url(args.service.url);
            let command = client::Command::Verify {
                id: args.id,
                wait: args.wait,
            };
            return client::run(&url, &command);
        }
        Command::Changes(args) => {
            let url = client::service_url(args.service.url);
            let mut query = Vec::new();
            for (name, value) in [("from", args.from), ("to", args.to)] {
                if let Some(v) = value {
                    query.push((name.to_owned(), v));
                }
            }
            for (name, value) in [
                ("threshold", args.threshold),
                ("generations_threshold", args.generations_threshold),
            ] {
                if let Some(v) = value {
                    query.push((name.to_owned(), v.to_string()));
                }
            }
            let command = client::Command::Changes {
                series: args.series,
                query,
            };
            return client::run(&url, &command);
        }
        Command::Report(args) => {
            let url = client::service_url(args.service.url);
            let command = client::Command::Report {
                id: args.id,
                out: args.out,
            };
            return client::run(&url, &command);
        }
    };
    match outcome {
        Ok(()) => ExitCode::SUCCESS,
        Err(failure) => failure.report(),
    }
}

fn submit(args: SubmitArgs) -> ExitCode {
    let job = match read_job(&args.spec) {
        Ok(bytes) => bytes,
        Err(failure) => return failure.report(),
    };
    let command = client::Command::Submit(client::SubmitOptions {
        job,
        idempotency_key: args.idempotency_key,
        no_reuse: args.no_reuse,
        wait: args.wait,
        quiet: args.quiet,
    });
    client::run(&client::service_url(args.service.url), &command)
}

fn serve() -> Result<(), Failure> {
    let config = crate::config::Config::from_env()
        .map_err(|e| Failure::Other(format!("bad configuration: {e}")))?;
    crate::server::init_logging(config.log_format);
    let runtime = tokio::runtime::Builder::new_multi_thread()
        .enable_all()
        .build()
        .map_err(|e| Failure::Other(format!("cannot start the async runtime: {e}")))?;
    runtime
        .block_on(crate::server::serve(config))
        .map_err(|e| Failure::Other(e.to_string()))
}

fn audit_verify(args: &AuditVerifyArgs) -> Result<(), Failure> {
    if !args.db.is_file() {
        return Err(Failure::Other(format!(
            "{} is not a database file",
            args.db.display()
        )));
    }
    let runtime = tokio::runtime::Builder::new_current_thread()
        .enable_all()
        .build()
        .map_err(|e| Failure::Other(format!("cannot start the async runtime: {e}")))?;
    let verdict = runtime
        .block_on(crate::db::verify_audit_file(&args.db))
        .map_err(|e| Failure::Other(format!("{}: {e}", args.db.display())))?;
    let text = serde_json::to_string_pretty(&verdict).unwrap_or_default();
    let mut stdout = std::io::stdout().lock();
    let _ = writeln!(stdout, "{text}");
    if verdict.intact {
        Ok(())
    } else {
        Err(Failure::AuditBroken)
    }
}

fn demo(args: &DemoArgs) -> Result<(), Failure> {
    let options = crate::demo::DemoOptions {
        db: args.db.clone(),
        workers: args.threads.map(|n| n as usize),
        replicates: args.replicates,
        discard: args.discard,
        quiet: args.quiet,
    };
    let mut stdout = std::io::stdout().lock();
    crate::demo::run(&options, &mut stdout).map_err(|e| Failure::Other(e.to_string()))
}

fn read_job(path: &str) -> Result<Vec<u8>, Failure> {
    if path == "-" {
        let mut bytes = Vec::new();
        std::io::stdin()
            .read_to_end(&mut bytes)
            .map_err(|e| Failure::Other(format!("cannot read the job from stdin: {e}")))?;
        Ok(bytes)
    } else {
        std::fs::read(path).map_err(|e| Failure::Other(format!("cannot read `{path}`: {e}")))
    }
}

fn load(args: &JobArgs) -> Result<(Vec<u8>, ValidatedJob), Failure> {
    let bytes = read_job(&args.spec)?;
    let mut exact = ExactConfig::default();
    if let Some(n) = args.max_states {
        exact.max_states = n;
    }
    let job = spec::parse_bytes(&bytes, &Limits { exact })
        .map_err(|errors| Failure::Invalid(InvalidJob::new(errors)))?;
    Ok((bytes, job))
}

fn method_name(m: ResolvedMethod) -> &'static str {
    match m {
        ResolvedMethod::Exact { .. } => "exact",
        ResolvedMethod::Ensemble => "ensemble",
        ResolvedMethod::Approximation => "approximation",
    }
}

fn print_json(value: &impl serde::Serialize) -> Result<(), Failure> {
    let text = serde_json::to_string_pretty(value)
        .map_err(|e| Failure::Other(format!("cannot write the result: {e}")))?;
    let mut stdout = std::io::stdout().lock();
    writeln!(stdout, "{text}").map_err(|e| Failure::Other(format!("cannot write stdout: {e}")))
}

fn validate(args: &ValidateArgs) -> Result<(), Failure> {
    let (_, job) = load(&args.job)?;
    let mut warnings = job.warnings().to_vec();
    if job.needs_seed() {
        warnings
            .push("no method.seed was given: `demefix run` will pick one and record it".to_owned());
    }
    print_json(&serde_json::json!({
        "valid": true,
        "warnings": warnings,
        "states": job.states(),
        "method": method_name(job.method()),
    }))
}

/// A seed from the operating system's randomness, or from the clock if that is unavailable.
fn fresh_seed() -> u64 {
    let mut buf = [0u8; 8];
    let from_os = std::fs::File::open("/dev/urandom")
        .and_then(|mut f| f.read_exact(&mut buf))
        .is_ok();
    if from_os {
        return u64::from_le_bytes(buf);
    }
    let nanos = std::time::SystemTime::now()
        .duration_since(std::time::UNIX_EPOCH)
        .map_or(0, |d| d.as_nanos() as u64);
    nanos ^ (u64::from(std::process::id()) << 32)
}

/// Progress of the job's ensembles on an indicatif bar.
struct Bar(ProgressBar);

impl ProgressObserver for Bar {
    fn on_progress(&self, done: u64, total: u64) {
        self.0.set_length(total);
        self.0.set_position(done);
    }
}

fn progress_bar(total: u64, quiet: bool) -> ProgressBar {
    if quiet || total == 0 || !std::io::stderr().is_terminal() {
        return ProgressBar::hidden();
    }
    let bar = ProgressBar::with_draw_target(Some(total), ProgressDrawTarget::stderr());
    if let Ok(style) = ProgressStyle::with_template(
        "{elapsed_precise} [{bar:30}] {pos}/{len} replicates, {eta} left",
    ) {
        bar.set_style(style.progress_chars("=> "));
    }
    bar
}

fn run(args: &RunArgs) -> Result<(), Failure> {
    let (bytes, mut job) = load(&args.job)?;
    if job.needs_seed() {
        job.pick_seed(fresh_seed());
    }
    let threads = match args.threads {
        Some(n) => n as usize,
        None => std::thread::available_parallelism().map_or(1, |n| n.get()),
    };
    let pool = rayon::ThreadPoolBuilder::new()
        .num_threads(threads)
        .build()
        .map_err(|e| Failure::Other(format!("cannot start {threads} worker threads: {e}")))?;
    let bar = Bar(progress_bar(compute::ensemble_total(&job), args.quiet));
    let cancel = AtomicBool::new(false);
    let outcome = compute::run(&job, &pool, &bar, &cancel).map_err(|e| match e {
        ComputeError::Cancelled => Failure::Other("the computation was cancelled".to_owned()),
        other => Failure::Other(format!("the job could not be computed: {other}")),
    })?;
    bar.0.finish_and_clear();
    let provenance = Provenance::new(&job, &bytes, &outcome.method, threads);
    let mut warnings = job.warnings().to_vec();
    warnings.extend(outcome.warnings);
    if job.notify_url().is_some() {
        warnings.push(
            "notify_url is used by the service (POST /v1/runs, `demefix submit`); \
             `demefix run` sends no notification"
                .to_owned(),
        );
    }
    print_json(&RunDocument {
        spec: job.spec(),
        provenance: &provenance,
        results: &outcome.results,
        sensitivity: &outcome.sensitivity,
        interventions: &outcome.whatif.interventions,
        plan: outcome.whatif.plan.as_ref(),
        warnings: &warnings,
        disclaimer: DISCLAIMER,
    })
}
