//! The client commands `demefix submit`, `demefix get` and `demefix report`: a running
//! service driven from a pipeline without writing HTTP code.
//!
//! This module owns what those commands do against the service at `--url` (or
//! `DEMEFIX_URL`, default [`DEFAULT_URL`]): submitting a job (`POST /v1/runs`, optionally
//! with an `Idempotency-Key` and `Cache-Control: no-cache`) and, with `--wait`, polling
//! `GET /v1/runs/{id}` at the pace its `Retry-After` asks for, with progress on stderr;
//! fetching a run document; downloading `GET /v1/runs/{id}/report` to a file (any 200 body,
//! written whole or not at all). Run documents go to stdout exactly as the service sent them
//! (compact JSON, one line). Problem documents (RFC 9457) are printed readably on stderr,
//! every problem of a rejected job with its JSON pointer. The outcome is the process exit
//! code ([`exit`]). The exchanges use the minimal HTTP/1.1 client of
//! [`crate::http_client`] (plain `http://`).

use crate::http_client::{self, HttpError, HttpUrl, Reply, Request};
use indicatif::{ProgressBar, ProgressDrawTarget, ProgressStyle};
use serde_json::Value;
use std::io::{IsTerminal, Write};
use std::path::{Path, PathBuf};
use std::process::ExitCode;
use std::time::{Duration, Instant};

/// The service address used when neither `--url` nor [`URL_VAR`] is given.
pub const DEFAULT_URL: &str = "http://127.0.0.1:8080";
/// The environment variable naming the service address.
pub const URL_VAR: &str = "DEMEFIX_URL";

/// Exit codes of the client commands.
pub mod exit {
    /// Done: submitted (and, with `--wait`, succeeded); document printed; report saved.
    pub const SUCCESS: u8 = 0;
    /// Any other failure: unreadable job file, bad `--url`, an unexpected answer (e.g. 413,
    /// 5xx), a file that cannot be written.
    pub const OTHER: u8 = 1;
    /// The service rejected the job (422): every problem printed with its pointer.
    pub const REJECTED: u8 = 2;
    /// The service cannot be reached (refused, unknown host, no answer in time).
    pub const UNREACHABLE: u8 = 3;
    /// `--wait`: the run failed (its document, with `error`, is on stdout).
    pub const FAILED: u8 = 4;
    /// `--wait`: the run was cancelled (its document is on stdout).
    pub const CANCELLED: u8 = 5;
    /// No such run (or no report for it): 404.
    pub const NOT_FOUND: u8 = 6;
    /// `verify`: the recomputed result is not byte-identical to the record.
    pub const DIFFERENT: u8 = 7;
}

/// Longest wait for the answer to a submission (validation of a large job takes a while).
const SUBMIT_TIMEOUT: Duration = Duration::from_secs(120);
/// Longest wait for any other answer.
const GET_TIMEOUT: Duration = Duration::from_secs(60);
/// Largest run document or report read, bytes.
const MAX_DOCUMENT: usize = 512 * 1024 * 1024;
/// Poll interval when an answer has no usable `Retry-After`.
const DEFAULT_POLL: Duration = Duration::from_secs(1);
/// Bounds of the poll interval, whatever `Retry-After` says.
const MIN_POLL: Duration = Duration::from_millis(100);
const MAX_POLL: Duration = Duration::from_secs(60);
/// While waiting, how long the service may stay unreachable (a restart) before giving up.
const WAIT_UNREACHABLE_GRACE: Duration = Duration::from_secs(60);
/// How much of a body that is not a problem document is quoted in a message, characters.
const BODY_EXCERPT: usize = 300;

/// What `demefix submit` was asked to do.
#[derive(Debug, Clone, Default)]
pub struct SubmitOptions {
    /// The job document as read.
    pub job: Vec<u8>,
    /// `Idempotency-Key`, if given.
    pub idempotency_key: Option<String>,
    /// Send `Cache-Control: no-cache` (compute even when an earlier run could answer).
    pub no_reuse: bool,
    /// Poll until the run has finished and print its document.
    pub wait: bool,
    /// No progress or status lines on stderr.
    pub quiet: bool,
}

/// A client command.
#[derive(Debug, Clone)]
pub enum Command {
    /// `demefix submit`.
    Submit(SubmitOptions),
    /// `demefix get ID`.
    Get {
        /// Run id.
        id: String,
    },
    /// `demefix report ID --out FILE`.
    Report {
        /// Run id.
        id: String,
        /// Where to save the body.
        out: PathBuf,
    },
    /// `demefix verify ID [--wait]`.
    Verify {
        /// Run id.
        id: String,
        /// Poll until the verification has ended.
        wait: bool,
    },
    /// `demefix changes SERIES [--from X] [--to Y] [--threshold T]`.
    Changes {
        /// Series name.
        series: String,
        /// Query parameters (`from`, `to`, `threshold`, `generations_threshold`) as given.
        query: Vec<(String, String)>,
    },
}

/// Why a client command did not succeed.
#[derive(Debug, thiserror::Error)]
pub enum ClientError {
    /// `--url` is not an `http://` URL.
    #[error("--url `{url}` {reason}")]
    BadUrl {
        /// As given.
        url: String,
        /// Why.
        reason: http_client::UrlError,
    },
    /// A local argument is not usable.
    #[error("{0}")]
    Usage(String),
    /// No connection, or no answer in time.
    #[error(
        "cannot reach the service at {url}: {source} (is `demefix serve` running there? set \
         --url or {URL_VAR})"
    )]
    Unreachable {
        /// The service address.
        url: String,
        /// Cause.
        source: HttpError,
    },
    /// The exchange broke after the connection was made.
    #[error("{request}: {source}")]
    Exchange {
        /// Method and target.
        request: String,
        /// Cause.
        source: HttpError,
    },
    /// The service answered with an error status.
    #[error("{}", .0.summary())]
    Answered(Box<ErrorAnswer>),
    /// The service answered with a body this command cannot read.
    #[error("{request}: {what}")]
    Unexpected {
        /// Method and target.
        request: String,
        /// What is wrong.
        what: String,
    },
    /// The report could not be written.
    #[error("cannot write {}: {source}", path.display())]
    Output {
        /// The file.
        path: PathBuf,
        /// Cause.
        source: std::io::Error,
    },
}

impl ClientError {
    /// The exit code of this failure.
    pub fn exit_code(&self) -> u8 {
        match self {
            ClientError::Unreachable { .. } => exit::UNREACHABLE,
            ClientError::Answered(answer) => match answer.status {
                422 => exit::REJECTED,
                404 => exit::NOT_FOUND,
                _ => exit::OTHER,
            },
            _ => exit::OTHER,
        }
    }
}

/// An error answer of the service: status, and its problem document when it sent one.
#[derive(Debug, Clone)]
pub struct ErrorAnswer {
    /// Method and target of the request.
    pub request: String,
    /// HTTP status.
    pub status: u16,
    /// The problem document (RFC 9457), if the body is one.
    pub problem: Option<Value>,
    /// The start of the body otherwise.
    pub excerpt: String,
}

impl ErrorAnswer {
    fn of(request: String, reply: &Reply) -> Self {
        let problem = serde_json::from_slice::<Value>(&reply.body)
            .ok()
            .filter(Value::is_object);
        let text = String::from_utf8_lossy(&reply.body);
        Self {
            request,
            status: reply.status,
            problem,
            excerpt: text.trim().chars().take(BODY_EXCERPT).collect(),
        }
    }

    /// One line: what was asked, the status and title, and the detail.
    pub fn summary(&self) -> String {
        let field = |name| {
            self.problem
                .as_ref()
                .and_then(|p| p.get(name))
                .and_then(Value::as_str)
        };
        let what = if self.status == 422 && self.request.starts_with("POST") {
            "the service rejected the job".to_owned()
        } else {
            self.request.clone()
        };
        let title = field("title").unwrap_or_else(|| reason_phrase(self.status));
        match field("detail") {
            Some(detail) => format!("{what}: {} {title}: {detail}", self.status),
            None if self.excerpt.is_empty() => format!("{what}: {} {title}", self.status),
            None => format!("{what}: {} {title}: {}", self.status, self.excerpt),
        }
    }

    /// The summary, then one indented line per problem of `errors` (pointer and detail), and
    /// the run an `Idempotency-Key` belongs to.
    pub fn render(&self) -> String {
        let mut text = self.summary();
        let errors = self
            .problem
            .as_ref()
            .and_then(|p| p.get("errors"))
            .and_then(Value::as_array);
        for e in errors.into_iter().flatten() {
            let pointer = e.get("pointer").and_then(Value::as_str).unwrap_or_default();
            let detail = e.get("detail").and_then(Value::as_str).unwrap_or_default();
            let at = if pointer.is_empty() {
                "(the whole document)"
            } else {
                pointer
            };
            text.push_str(&format!("\n  {at}: {detail}"));
        }
        if let Some(run) = self
            .problem
            .as_ref()
            .and_then(|p| p.get("run_id"))
            .and_then(Value::as_str)
        {
            text.push_str(&format!("\n  the key belongs to run {run}"));
        }
        text
    }
}

fn reason_phrase(status: u16) -> &'static str {
    match status {
        400 => "Bad request",
        404 => "Not found",
        409 => "Conflict",
        413 => "Payload too large",
        415 => "Unsupported media type",
        422 => "Unprocessable content",
        500 => "Internal error",
        503 => "Service unavailable",
        _ => "Error",
    }
}

/// The wait a reply asks for: `Retry-After` in seconds (RFC 9110, section 10.2.3; an
/// HTTP date is not read), bounded to 0.1 to 60 s; 1 s without one.
pub fn poll_interval(reply: &Reply) -> Duration {
    reply
        .header("retry-after")
        .and_then(|v| v.trim().parse::<u64>().ok())
        .map_or(DEFAULT_POLL, Duration::from_secs)
        .clamp(MIN_POLL, MAX_POLL)
}

/// `segment` percent-encoded for a path (RFC 3986 unreserved characters kept).
fn path_segment(segment: &str) -> String {
    segment
        .bytes()
        .map(|b| {
            if b.is_ascii_alphanumeric() || matches!(b, b'-' | b'.' | b'_' | b'~') {
                (b as char).to_string()
            } else {
                format!("%{b:02X}")
            }
        })
        .collect()
}

/// The service the commands talk to.
#[derive(Debug, Clone)]
pub struct Service {
    base: HttpUrl,
    shown: String,
}

impl Service {
    /// The service at `url` (an `http://` URL, optionally with a path prefix).
    pub fn new(url: &str) -> Result<Self, ClientError> {
        let base = HttpUrl::parse(url).map_err(|reason| ClientError::BadUrl {
            url: url.to_owned(),
            reason,
        })?;
        Ok(Self {
            base,
            shown: url.trim_end_matches('/').to_owned(),
        })
    }

    /// `reference` (a `Location`) resolved against the service address.
    pub fn resolve(&self, reference: &str) -> String {
        if reference.starts_with('/') {
            format!("http://{}{reference}", self.base.endpoint().authority())
        } else {
            reference.to_owned()
        }
    }

    async fn send(&self, request: &Request<'_>, shown: &str) -> Result<Reply, ClientError> {
        http_client::send(self.base.endpoint(), request)
            .await
            .map_err(|source| {
                if source.is_unreachable() {
                    ClientError::Unreachable {
                        url: self.shown.clone(),
                        source,
                    }
                } else {
                    ClientError::Exchange {
                        request: shown.to_owned(),
                        source,
                    }
                }
            })
    }

    /// `method path` with no body: the reply, an error for any status but `expected`.
    async fn call(&self, method: &str, path: &str, expected: &[u16]) -> Result<Reply, ClientError> {
        let target = self.base.join(path);
        let shown = format!("{method} {target}");
        let mut request = Request::new(method, &target)
            .timeout(GET_TIMEOUT)
            .max_response(MAX_DOCUMENT);
        if method == "POST" {
            request = request.json(b"");
        }
        let reply = self.send(&request, &shown).await?;
        if !expected.contains(&reply.status) {
            return Err(ClientError::Answered(Box::new(ErrorAnswer::of(
                shown, &reply,
            ))));
        }
        Ok(reply)
    }

    /// `GET /v1/runs/{id}`: the reply (any status).
    async fn get_run(&self, id: &str) -> Result<(String, Reply), ClientError> {
        let target = self.base.join(&format!("/v1/runs/{}", path_segment(id)));
        let shown = format!("GET {target}");
        let request = Request::new("GET", &target)
            .timeout(GET_TIMEOUT)
            .max_response(MAX_DOCUMENT);
        let reply = self.send(&request, &shown).await?;
        Ok((shown, reply))
    }
}

/// A run document as received: its bytes and the members the client reads.
struct RunDoc {
    bytes: Vec<u8>,
    id: String,
    status: String,
    done: u64,
    total: u64,
}

impl RunDoc {
    fn parse(request: &str, bytes: Vec<u8>) -> Result<Self, ClientError> {
        let unexpected = |what: String| ClientError::Unexpected {
            request: request.to_owned(),
            what,
        };
        let doc: Value = serde_json::from_slice(&bytes)
            .map_err(|e| unexpected(format!("the answer is not JSON: {e}")))?;
        let text = |key: &str| doc.get(key).and_then(Value::as_str).map(str::to_owned);
        let id = text("id").ok_or_else(|| unexpected("a run document without `id`".into()))?;
        let status =
            text("status").ok_or_else(|| unexpected("a run document without `status`".into()))?;
        let count = |key: &str| {
            doc.pointer(&format!("/progress/{key}"))
                .and_then(Value::as_u64)
                .unwrap_or(0)
        };
        Ok(Self {
            id,
            done: count("done"),
            total: count("total"),
            status,
            bytes,
        })
    }

    fn is_finished(&self) -> bool {
        matches!(self.status.as_str(), "succeeded" | "failed" | "cancelled")
    }

    fn exit_code(&self) -> u8 {
        match self.status.as_str() {
            "failed" => exit::FAILED,
            "cancelled" => exit::CANCELLED,
            _ => exit::SUCCESS,
        }
    }
}

fn write_document(out: &mut dyn Write, bytes: &[u8]) -> Result<(), ClientError> {
    out.write_all(bytes)
        .and_then(|()| out.write_all(b"\n"))
        .and_then(|()| out.flush())
        .map_err(|source| ClientError::Output {
            path: PathBuf::from("(stdout)"),
            source,
        })
}

/// Status lines and the progress bar of `--wait` on stderr.
struct Progress {
    quiet: bool,
    bar: Option<ProgressBar>,
    last_status: String,
}

impl Progress {
    fn new(quiet: bool) -> Self {
        let bar = (!quiet && std::io::stderr().is_terminal()).then(|| {
            let bar = ProgressBar::with_draw_target(Some(1), ProgressDrawTarget::stderr());
            if let Ok(style) =
                ProgressStyle::with_template("{elapsed_precise} [{bar:30}] {pos}/{len} {msg}")
            {
                bar.set_style(style.progress_chars("=> "));
            }
            bar
        });
        Self {
            quiet,
            bar,
            last_status: String::new(),
        }
    }

    fn line(&self, text: &str) {
        if self.quiet {
            return;
        }
        match &self.bar {
            Some(bar) => bar.println(text),
            None => eprintln!("{text}"),
        }
    }

    fn update(&mut self, doc: &RunDoc) {
        if let Some(bar) = &self.bar {
            bar.set_length(doc.total.max(1));
            bar.set_position(doc.done);
            bar.set_message(doc.status.clone());
        } else if doc.status != self.last_status {
            self.line(&format!(
                "run {}: {} ({}/{})",
                doc.id, doc.status, doc.done, doc.total
            ));
        }
        self.last_status.clone_from(&doc.status);
    }

    /// Removes the bar; later lines are plain.
    fn finish(&mut self) {
        if let Some(bar) = self.bar.take() {
            bar.finish_and_clear();
        }
    }
}

/// `demefix submit`: writes the id and Location (or, with `--wait`, the finished run
/// document) to `out`; returns the exit code.
pub async fn submit(
    service: &Service,
    options: &SubmitOptions,
    out: &mut dyn Write,
) -> Result<u8, ClientError> {
    if let Some(key) = &options.idempotency_key {
        if !crate::domain::is_valid_idempotency_key(key) {
            return Err(ClientError::Usage(format!(
                "--idempotency-key must be 1 to {} visible ASCII characters",
                crate::domain::MAX_IDEMPOTENCY_KEY
            )));
        }
    }
    let target = service.base.join("/v1/runs");
    let shown = format!("POST {target}");
    let mut request = Request::new("POST", &target)
        .json(&options.job)
        .timeout(SUBMIT_TIMEOUT)
        .max_response(MAX_DOCUMENT);
    if let Some(key) = &options.idempotency_key {
        request = request.header("Idempotency-Key", key);
    }
    if options.no_reuse {
        request = request.header("Cache-Control", "no-cache");
    }
    let reply = service.send(&request, &shown).await?;
    if reply.status != 202 {
        return Err(ClientError::Answered(Box::new(ErrorAnswer::of(
            shown, &reply,
        ))));
    }
    let location = reply
        .header("location")
        .map(|l| service.resolve(l))
        .unwrap_or_default();
    let mut pause = poll_interval(&reply);
    let mut doc = RunDoc::parse(&shown, reply.body)?;
    if !options.wait {
        writeln!(out, "{}\n{location}", doc.id)
            .and_then(|()| out.flush())
            .map_err(|source| ClientError::Output {
                path: PathBuf::from("(stdout)"),
                source,
            })?;
        return Ok(exit::SUCCESS);
    }
    let mut progress = Progress::new(options.quiet);
    progress.line(&format!("submitted run {} ({location})", doc.id));
    let mut unreachable_since: Option<Instant> = None;
    while !doc.is_finished() {
        progress.update(&doc);
        tokio::time::sleep(pause).await;
        let (shown, reply) = match service.get_run(&doc.id).await {
            Ok(answer) => {
                unreachable_since = None;
                answer
            }
            Err(e @ ClientError::Unreachable { .. }) => {
                let since = *unreachable_since.get_or_insert_with(Instant::now);
                if since.elapsed() > WAIT_UNREACHABLE_GRACE {
                    progress.finish();
                    return Err(e);
                }
                pause = DEFAULT_POLL;
                continue;
            }
            Err(e) => {
                progress.finish();
                return Err(e);
            }
        };
        pause = poll_interval(&reply);
        match reply.status {
            200 => doc = RunDoc::parse(&shown, reply.body)?,
            503 => continue,
            _ => {
                progress.finish();
                return Err(ClientError::Answered(Box::new(ErrorAnswer::of(
                    shown, &reply,
                ))));
            }
        }
    }
    progress.update(&doc);
    progress.finish();
    progress.line(&format!("run {}: {}", doc.id, doc.status));
    if doc.status == "succeeded" {
        progress.line(&format!("Caution. {}", crate::document::DISCLAIMER));
    }
    write_document(out, &doc.bytes)?;
    Ok(doc.exit_code())
}

/// `demefix get ID`: writes the run document to `out`.
pub async fn get(service: &Service, id: &str, out: &mut dyn Write) -> Result<u8, ClientError> {
    let (shown, reply) = service.get_run(id).await?;
    if reply.status != 200 {
        return Err(ClientError::Answered(Box::new(ErrorAnswer::of(
            shown, &reply,
        ))));
    }
    write_document(out, &reply.body)?;
    Ok(exit::SUCCESS)
}

/// `demefix report ID --out FILE`: saves the body of a 200 answer to `out` (whole: it is
/// written to a temporary file beside it, then renamed), and returns its size.
pub async fn report(service: &Service, id: &str, out: &Path) -> Result<usize, ClientError> {
    let target = service
        .base
        .join(&format!("/v1/runs/{}/report", path_segment(id)));
    let shown = format!("GET {target}");
    let request = Request::new("GET", &target)
        .accept("text/html, */*;q=0.5")
        .timeout(GET_TIMEOUT)
        .max_response(MAX_DOCUMENT);
    let reply = service.send(&request, &shown).await?;
    if reply.status != 200 {
        return Err(ClientError::Answered(Box::new(ErrorAnswer::of(
            shown, &reply,
        ))));
    }
    save(out, &reply.body)?;
    Ok(reply.body.len())
}

/// `demefix verify ID`: asks for a re-verification (`POST /v1/runs/{id}/verify`); with `wait`,
/// polls it until it has ended. Writes the verification document; exit 0 when byte-identical
/// (or, without `wait`, when queued), [`exit::DIFFERENT`] when not, [`exit::FAILED`] when it
/// could not be recomputed.
pub async fn verify(
    service: &Service,
    id: &str,
    wait: bool,
    out: &mut dyn Write,
) -> Result<u8, ClientError> {
    let reply = service
        .call(
            "POST",
            &format!("/v1/runs/{}/verify", path_segment(id)),
            &[202],
        )
        .await?;
    let mut doc: serde_json::Value = serde_json::from_slice(&reply.body).unwrap_or_default();
    let check = doc["check_run_id"].as_str().unwrap_or_default().to_owned();
    if wait {
        let mut pause = poll_interval(&reply);
        while doc["status"] == "pending" {
            tokio::time::sleep(pause).await;
            let r = service
                .call(
                    "GET",
                    &format!("/v1/verifications/{}", path_segment(&check)),
                    &[200],
                )
                .await?;
            pause = poll_interval(&r);
            doc = serde_json::from_slice(&r.body).unwrap_or_default();
        }
    }
    let text = serde_json::to_vec(&doc).unwrap_or_default();
    write_document(out, &text)?;
    Ok(match doc["status"].as_str() {
        Some("identical") | Some("pending") => exit::SUCCESS,
        Some("different") => exit::DIFFERENT,
        _ => exit::FAILED,
    })
}

/// `demefix changes SERIES`: writes the change report of `GET /v1/series/{name}/changes`.
pub async fn changes(
    service: &Service,
    series: &str,
    query: &[(String, String)],
    out: &mut dyn Write,
) -> Result<u8, ClientError> {
    let mut path = format!("/v1/series/{}/changes", path_segment(series));
    for (i, (k, v)) in query.iter().enumerate() {
        path.push(if i == 0 { '?' } else { '&' });
        path.push_str(&format!("{}={}", path_segment(k), path_segment(v)));
    }
    let reply = service.call("GET", &path, &[200]).await?;
    write_document(out, &reply.body)?;
    Ok(exit::SUCCESS)
}

/// Writes `bytes` to `path` whole or not at all.
fn save(path: &Path, bytes: &[u8]) -> Result<(), ClientError> {
    let failed = |source| ClientError::Output {
        path: path.to_owned(),
        source,
    };
    let name = path
        .file_name()
        .ok_or_else(|| ClientError::Usage(format!("--out {} is not a file", path.display())))?;
    let mut partial = name.to_owned();
    partial.push(format!(".partial-{}", std::process::id()));
    let temporary = path.with_file_name(partial);
    let written = std::fs::File::create(&temporary).and_then(|mut f| {
        f.write_all(bytes)?;
        f.sync_all()
    });
    if let Err(e) = written.and_then(|()| std::fs::rename(&temporary, path)) {
        let _ = std::fs::remove_file(&temporary);
        return Err(failed(e));
    }
    Ok(())
}

/// The service address: `--url`, else [`URL_VAR`], else [`DEFAULT_URL`].
pub fn service_url(flag: Option<String>) -> String {
    flag.or_else(|| std::env::var(URL_VAR).ok())
        .filter(|u| !u.trim().is_empty())
        .unwrap_or_else(|| DEFAULT_URL.to_owned())
}

/// Runs `command` against the service at `url` on a single-threaded runtime; documents go
/// to stdout, messages to stderr. Returns the exit code ([`exit`]).
pub fn run(url: &str, command: &Command) -> ExitCode {
    let outcome = Service::new(url).and_then(|service| {
        let runtime = tokio::runtime::Builder::new_current_thread()
            .enable_all()
            .build()
            .map_err(|e| ClientError::Usage(format!("cannot start the async runtime: {e}")))?;
        runtime.block_on(async {
            let mut stdout = std::io::stdout().lock();
            match command {
                Command::Submit(options) => submit(&service, options, &mut stdout).await,
                Command::Get { id } => get(&service, id, &mut stdout).await,
                Command::Verify { id, wait } => verify(&service, id, *wait, &mut stdout).await,
                Command::Changes { series, query } => {
                    changes(&service, series, query, &mut stdout).await
                }
                Command::Report { id, out } => {
                    let size = report(&service, id, out).await?;
                    eprintln!(
                        "saved the report of run {id} to {} ({size} bytes)",
                        out.display()
                    );
                    Ok(exit::SUCCESS)
                }
            }
        })
    });
    match outcome {
        Ok(code) => ExitCode::from(code),
        Err(e) => {
            let text = match &e {
                ClientError::Answered(answer) => answer.render(),
                other => other.to_string(),
            };
            eprintln!("demefix: {text}");
            ExitCode::from(e.exit_code())
        }
    }
}

#[cfg(test)]
mod tests {
    use super::*;

    fn reply(status: u16, headers: &[(&str, &str)], body: &str) -> Reply {
        Reply {
            status,
            headers: headers
                .iter()
                .map(|(n, v)| (n.to_string(), v.to_string()))
                .collect(),
            body: body.as_bytes().to_vec(),
        }
    }

    #[test]
    fn retry_after_sets_the_pace_within_bounds() {
        assert_eq!(
            poll_interval(&reply(200, &[("retry-after", "3")], "")),
            Duration::from_secs(3)
        );
        assert_eq!(
            poll_interval(&reply(200, &[("retry-after", "0")], "")),
            MIN_POLL
        );
        assert_eq!(
            poll_interval(&reply(200, &[("retry-after", "86400")], "")),
            MAX_POLL
        );
        let date = [("retry-after", "Wed, 21 Oct 2026 07:28:00 GMT")];
        assert_eq!(poll_interval(&reply(200, &date, "")), DEFAULT_POLL);
        assert_eq!(poll_interval(&reply(200, &[], "")), DEFAULT_POLL);
    }

    #[test]
    fn a_rejected_job_lists_every_problem_with_its_pointer() {
        let body = serde_json::json!({
            "type": "/problems/invalid-job", "title": "Invalid job", "status": 422,
            "detail": "2 problems were found in the job document",
            "errors": [
                {"pointer": "/notify_url", "detail": "https is not supported"},
                {"pointer": "", "detail": "the request body is not valid JSON"}
            ]
        });
        let answer = ErrorAnswer::of(
            "POST /v1/runs".to_owned(),
            &reply(422, &[], &body.to_string()),
        );
        let text = answer.render();
        assert_eq!(
            text,
            "the service rejected the job: 422 Invalid job: 2 problems were found in the job \
             document\n  /notify_url: https is not supported\n  (the whole document): the \
             request body is not valid JSON"
        );
        let error = ClientError::Answered(Box::new(answer));
        assert_eq!(error.exit_code(), exit::REJECTED);
    }

    #[test]
    fn other_answers_keep_their_status_and_an_excerpt() {
        let missing = ErrorAnswer::of(
            "GET /v1/runs/x/report".to_owned(),
            &reply(
                404,
                &[],
                r#"{"title":"Not found","status":404,"detail":"no such run"}"#,
            ),
        );
        assert_eq!(
            missing.summary(),
            "GET /v1/runs/x/report: 404 Not found: no such run"
        );
        assert_eq!(
            ClientError::Answered(Box::new(missing)).exit_code(),
            exit::NOT_FOUND
        );
        let proxy = ErrorAnswer::of("GET /".to_owned(), &reply(502, &[], "<html>bad</html>"));
        assert_eq!(proxy.summary(), "GET /: 502 Error: <html>bad</html>");
        assert_eq!(
            ClientError::Answered(Box::new(proxy)).exit_code(),
            exit::OTHER
        );
    }

    #[test]
    fn ids_are_escaped_and_locations_resolved_against_the_service() {
        assert_eq!(path_segment("0193-ab_c.d~"), "0193-ab_c.d~");
        assert_eq!(path_segment("a/b c"), "a%2Fb%20c");
        let service = Service::new("http://127.0.0.1:9/prefix/").unwrap();
        assert_eq!(service.base.join("/v1/runs"), "/prefix/v1/runs");
        assert_eq!(
            service.resolve("/v1/runs/x"),
            "http://127.0.0.1:9/v1/runs/x"
        );
        assert!(matches!(
            Service::new("https://127.0.0.1:9"),
            Err(ClientError::BadUrl { .. })
        ));
    }

    #[test]
    fn a_saved_file_is_whole_or_absent() {
        let dir = std::env::temp_dir().join(format!("demefix-client-{}", uuid::Uuid::now_v7()));
        std::fs::create_dir_all(&dir).unwrap();
        let file = dir.join("report.html");
        save(&file, b"<html></html>").unwrap();
        assert_eq!(std::fs::read(&file).unwrap(), b"<html></html>");
        let missing_dir = dir.join("no/such/dir/report.html");
        assert!(matches!(
            save(&missing_dir, b"x"),
            Err(ClientError::Output { .. })
        ));
        let left: Vec<_> = std::fs::read_dir(&dir).unwrap().collect();
        assert_eq!(left.len(), 1, "no partial file is left behind");
        let _ = std::fs::remove_dir_all(&dir);
    }
}
