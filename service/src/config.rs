//! Configuration of `demefix serve`, read in two phases: raw strings first ([`RawConfig`],
//! one field per setting), then a validated [`Config`] with typed values and defaults, so a
//! bad setting is reported by name before anything starts.
//!
//! Settings come from three layers, highest first: the `DEMEFIX_*` environment variables,
//! the optional TOML file named by `DEMEFIX_CONFIG` ([`FileConfig`], one key per variable),
//! and the defaults below. An empty variable counts as unset. A file that cannot be read,
//! is not valid TOML, or has a key this module does not know stops the start with an error
//! naming the file (and, for TOML errors, the line).
//!
//! This module owns every `DEMEFIX_*` variable of the service, its file key and its default;
//! DEVELOPERS.md, `deploy/demefix.env.example` and `deploy/demefix.toml.example` list the
//! same table.

use serde::Deserialize;
use std::net::SocketAddr;
use std::path::{Path, PathBuf};
use std::time::Duration;

/// The variable naming the optional configuration file.
pub const CONFIG_FILE_VAR: &str = "DEMEFIX_CONFIG";
/// Default `DEMEFIX_BIND`.
pub const DEFAULT_BIND: &str = "127.0.0.1:8080";
/// Default `DEMEFIX_DB`.
pub const DEFAULT_DB: &str = "./demefix.db";
/// Default `DEMEFIX_BODY_LIMIT`, bytes (a 2,000-deme matrix as JSON is about 40 MB; the
/// default admits a few hundred demes).
pub const DEFAULT_BODY_LIMIT: usize = 8 * 1024 * 1024;
/// Default `DEMEFIX_LEASE_SECS`: how long a claim stays valid without a heartbeat.
pub const DEFAULT_LEASE_SECS: u64 = 30;
/// Default `DEMEFIX_HEARTBEAT_SECS`.
pub const DEFAULT_HEARTBEAT_SECS: u64 = 5;
/// Default `DEMEFIX_NOTIFY_BACKOFF_MS`: the wait after a completion notification's first
/// failed attempt (it doubles after each further one, see [`crate::notify`]).
pub const DEFAULT_NOTIFY_BACKOFF_MS: u64 = 1_000;
/// Default `DEMEFIX_NOTIFY_ATTEMPTS`: delivery attempts of a completion notification.
pub const DEFAULT_NOTIFY_ATTEMPTS: u32 = 6;
/// Largest `DEMEFIX_NOTIFY_ATTEMPTS`.
pub const MAX_NOTIFY_ATTEMPTS: u32 = 30;

/// Every setting: its environment variable and its key in the configuration file, in the
/// order of the fields of [`RawConfig`].
pub const SETTINGS: [(&str, &str); 10] = [
    ("DEMEFIX_BIND", "bind"),
    ("DEMEFIX_DB", "db"),
    ("DEMEFIX_WORKERS", "workers"),
    ("DEMEFIX_MAX_STATES", "max_states"),
    ("DEMEFIX_BODY_LIMIT", "body_limit_bytes"),
    ("DEMEFIX_LEASE_SECS", "lease_secs"),
    ("DEMEFIX_HEARTBEAT_SECS", "heartbeat_secs"),
    ("DEMEFIX_LOG_FORMAT", "log_format"),
    ("DEMEFIX_NOTIFY_BACKOFF_MS", "notify_backoff_ms"),
    ("DEMEFIX_NOTIFY_ATTEMPTS", "notify_attempts"),
];

/// How log lines are written.
#[derive(Debug, Clone, Copy, PartialEq, Eq)]
pub enum LogFormat {
    /// Human-readable lines.
    Text,
    /// One JSON object per line.
    Json,
}

/// The settings as found, before any parsing (one field per entry of [`SETTINGS`]).
#[derive(Debug, Clone, Default, PartialEq, Eq)]
pub struct RawConfig {
    /// `DEMEFIX_BIND`.
    pub bind: Option<String>,
    /// `DEMEFIX_DB`.
    pub db: Option<String>,
    /// `DEMEFIX_WORKERS`.
    pub workers: Option<String>,
    /// `DEMEFIX_MAX_STATES`.
    pub max_states: Option<String>,
    /// `DEMEFIX_BODY_LIMIT`.
    pub body_limit: Option<String>,
    /// `DEMEFIX_LEASE_SECS`.
    pub lease_secs: Option<String>,
    /// `DEMEFIX_HEARTBEAT_SECS`.
    pub heartbeat_secs: Option<String>,
    /// `DEMEFIX_LOG_FORMAT`.
    pub log_format: Option<String>,
    /// `DEMEFIX_NOTIFY_BACKOFF_MS`.
    pub notify_backoff_ms: Option<String>,
    /// `DEMEFIX_NOTIFY_ATTEMPTS`.
    pub notify_attempts: Option<String>,
}

impl RawConfig {
    /// Reads the variables from the process environment.
    pub fn from_env() -> Self {
        Self::from_lookup(|name| std::env::var(name).ok())
    }

    /// Reads the variables through `lookup` (an empty or blank value counts as unset).
    pub fn from_lookup(lookup: impl Fn(&str) -> Option<String>) -> Self {
        let mut raw = Self::default();
        for (name, slot) in raw.slots_mut() {
            *slot = lookup(name).filter(|v| !v.trim().is_empty());
        }
        raw
    }

    fn slots_mut(&mut self) -> [(&'static str, &mut Option<String>); 10] {
        let [bind, db, workers, max_states, body_limit, lease, heartbeat, log_format, notify_backoff, notify_attempts] =
            SETTINGS.map(|(name, _)| name);
        [
            (bind, &mut self.bind),
            (db, &mut self.db),
            (workers, &mut self.workers),
            (max_states, &mut self.max_states),
            (body_limit, &mut self.body_limit),
            (lease, &mut self.lease_secs),
            (heartbeat, &mut self.heartbeat_secs),
            (log_format, &mut self.log_format),
            (notify_backoff, &mut self.notify_backoff_ms),
            (notify_attempts, &mut self.notify_attempts),
        ]
    }

    /// `self`, with every setting it lacks taken from `lower`; also the names of the
    /// variables so taken.
    pub fn over(mut self, lower: RawConfig) -> (RawConfig, Vec<&'static str>) {
        let mut lower = lower;
        let mut taken = Vec::new();
        for ((name, slot), (_, below)) in self.slots_mut().into_iter().zip(lower.slots_mut()) {
            if slot.is_none() && below.is_some() {
                *slot = below.take();
                taken.push(name);
            }
        }
        (self, taken)
    }
}

/// The optional configuration file (TOML): one key per setting, typed; every key optional,
/// any other key an error.
#[derive(Debug, Clone, Default, PartialEq, Eq, Deserialize)]
#[serde(deny_unknown_fields)]
pub struct FileConfig {
    /// As `DEMEFIX_BIND`.
    pub bind: Option<String>,
    /// As `DEMEFIX_DB` (a relative path is relative to the working directory).
    pub db: Option<String>,
    /// As `DEMEFIX_WORKERS`.
    pub workers: Option<u64>,
    /// As `DEMEFIX_MAX_STATES`.
    pub max_states: Option<u64>,
    /// As `DEMEFIX_BODY_LIMIT`.
    pub body_limit_bytes: Option<u64>,
    /// As `DEMEFIX_LEASE_SECS`.
    pub lease_secs: Option<u64>,
    /// As `DEMEFIX_HEARTBEAT_SECS`.
    pub heartbeat_secs: Option<u64>,
    /// As `DEMEFIX_LOG_FORMAT`.
    pub log_format: Option<String>,
    /// As `DEMEFIX_NOTIFY_BACKOFF_MS`.
    pub notify_backoff_ms: Option<u64>,
    /// As `DEMEFIX_NOTIFY_ATTEMPTS`.
    pub notify_attempts: Option<u64>,
}

impl FileConfig {
    /// Parses the text of a configuration file read from `path` (named in errors).
    pub fn parse(text: &str, path: &Path) -> Result<Self, ConfigError> {
        toml::from_str(text).map_err(|e: toml::de::Error| {
            let line = e
                .span()
                .map(|span| text[..span.start.min(text.len())].matches('\n').count() + 1);
            ConfigError::FileInvalid {
                path: path.to_owned(),
                line,
                message: e.message().trim_end().to_owned(),
            }
        })
    }

    /// Reads and parses the configuration file at `path`.
    pub fn read(path: &Path) -> Result<Self, ConfigError> {
        let text = std::fs::read_to_string(path).map_err(|e| ConfigError::FileUnreadable {
            path: path.to_owned(),
            reason: e.to_string(),
        })?;
        Self::parse(&text, path)
    }

    /// The same settings as raw strings, as if given by their variables.
    pub fn into_raw(self) -> RawConfig {
        let text = |n: Option<u64>| n.map(|n| n.to_string());
        RawConfig {
            bind: self.bind,
            db: self.db,
            workers: text(self.workers),
            max_states: text(self.max_states),
            body_limit: text(self.body_limit_bytes),
            lease_secs: text(self.lease_secs),
            heartbeat_secs: text(self.heartbeat_secs),
            log_format: self.log_format,
            notify_backoff_ms: text(self.notify_backoff_ms),
            notify_attempts: text(self.notify_attempts),
        }
    }
}

/// Where a setting's value came from.
#[derive(Debug, Clone, PartialEq, Eq)]
pub enum Origin {
    /// Its environment variable.
    Environment,
    /// A key of the configuration file.
    File {
        /// The file.
        path: PathBuf,
        /// The key.
        key: &'static str,
    },
}

/// A setting that could not be used.
#[derive(Debug, Clone, PartialEq, Eq)]
pub struct BadSetting {
    /// The setting's environment variable.
    pub name: &'static str,
    /// Where its value came from.
    pub origin: Origin,
    /// Its value.
    pub value: String,
    /// What is wrong with it.
    pub reason: String,
}

impl std::fmt::Display for BadSetting {
    fn fmt(&self, f: &mut std::fmt::Formatter<'_>) -> std::fmt::Result {
        match &self.origin {
            Origin::Environment => write!(f, "{}={:?}: {}", self.name, self.value, self.reason),
            Origin::File { path, key } => write!(
                f,
                "{} = {:?} in {}: {}",
                key,
                self.value,
                path.display(),
                self.reason
            ),
        }
    }
}

/// Why the configuration cannot be used.
#[derive(Debug, Clone, PartialEq, Eq, thiserror::Error)]
pub enum ConfigError {
    /// A setting has a value that cannot be used.
    #[error("{0}")]
    Setting(BadSetting),
    /// The configuration file cannot be read.
    #[error("cannot read the configuration file {} (named by {CONFIG_FILE_VAR}): {reason}", path.display())]
    FileUnreadable {
        /// The file.
        path: PathBuf,
        /// What the operating system said.
        reason: String,
    },
    /// The configuration file is not valid TOML, or has a key or value it must not have.
    #[error("configuration file {}{}: {message}", path.display(), line.map(|l| format!(", line {l}")).unwrap_or_default())]
    FileInvalid {
        /// The file.
        path: PathBuf,
        /// The line (from 1) of the problem, when the parser knows it.
        line: Option<usize>,
        /// What is wrong.
        message: String,
    },
}

impl ConfigError {
    /// The variable of the setting at fault, if the error is about one setting.
    pub fn setting(&self) -> Option<&'static str> {
        match self {
            ConfigError::Setting(bad) => Some(bad.name),
            _ => None,
        }
    }
}

/// The validated configuration of the service.
#[derive(Debug, Clone)]
pub struct Config {
    /// Address to listen on (port 0 picks a free port).
    pub bind: SocketAddr,
    /// SQLite database file (created and migrated on start).
    pub db: PathBuf,
    /// Worker slots (runs computed at once) and threads of the compute pool.
    pub workers: usize,
    /// Largest exact state space (`auto` runs ensembles above it); `None` keeps the science
    /// crate's default.
    pub max_states: Option<u64>,
    /// Largest request body, bytes.
    pub body_limit: usize,
    /// Lease of a claimed run.
    pub lease: Duration,
    /// Interval between heartbeats of a running run (also the progress update interval).
    pub heartbeat: Duration,
    /// Log format.
    pub log_format: LogFormat,
    /// Wait after a completion notification's first failed attempt (doubling after each
    /// further one).
    pub notify_backoff: Duration,
    /// Delivery attempts of a completion notification before it is recorded as failed.
    pub notify_attempts: u32,
    /// The configuration file read, if any.
    pub file: Option<PathBuf>,
}

fn bad(name: &'static str, value: &str, reason: impl Into<String>) -> ConfigError {
    ConfigError::Setting(BadSetting {
        name,
        origin: Origin::Environment,
        value: value.to_owned(),
        reason: reason.into(),
    })
}

fn number<T>(name: &'static str, value: &Option<String>, min: T) -> Result<Option<T>, ConfigError>
where
    T: std::str::FromStr + PartialOrd + std::fmt::Display + Copy,
{
    let Some(v) = value else { return Ok(None) };
    let n: T = v
        .trim()
        .replace('_', "")
        .parse()
        .map_err(|_| bad(name, v, "not a whole number"))?;
    if n < min {
        return Err(bad(name, v, format!("must be at least {min}")));
    }
    Ok(Some(n))
}

impl Config {
    /// Validates `raw`, filling in defaults.
    pub fn from_raw(raw: &RawConfig) -> Result<Self, ConfigError> {
        let bind_text = raw.bind.clone().unwrap_or_else(|| DEFAULT_BIND.to_owned());
        let bind = bind_text.trim().parse().map_err(|_| {
            bad(
                "DEMEFIX_BIND",
                &bind_text,
                "not an address of the form HOST:PORT (an IP address, e.g. 0.0.0.0:8080)",
            )
        })?;
        let cores = std::thread::available_parallelism().map_or(1, |n| n.get());
        let workers = number("DEMEFIX_WORKERS", &raw.workers, 1usize)?.unwrap_or(cores);
        let lease_secs =
            number("DEMEFIX_LEASE_SECS", &raw.lease_secs, 2u64)?.unwrap_or(DEFAULT_LEASE_SECS);
        let heartbeat_secs = number("DEMEFIX_HEARTBEAT_SECS", &raw.heartbeat_secs, 1u64)?
            .unwrap_or(DEFAULT_HEARTBEAT_SECS.min(lease_secs.div_ceil(3)));
        if heartbeat_secs >= lease_secs {
            return Err(bad(
                "DEMEFIX_HEARTBEAT_SECS",
                &heartbeat_secs.to_string(),
                format!(
                    "must be shorter than the lease ({lease_secs} s), or every lease expires \
                     between heartbeats"
                ),
            ));
        }
        let log_format = match raw.log_format.as_deref().map(str::trim) {
            None | Some("text") => LogFormat::Text,
            Some("json") => LogFormat::Json,
            Some(other) => {
                return Err(bad("DEMEFIX_LOG_FORMAT", other, "must be `text` or `json`"))
            }
        };
        let notify_backoff_ms = number("DEMEFIX_NOTIFY_BACKOFF_MS", &raw.notify_backoff_ms, 1u64)?
            .unwrap_or(DEFAULT_NOTIFY_BACKOFF_MS);
        let notify_attempts = number("DEMEFIX_NOTIFY_ATTEMPTS", &raw.notify_attempts, 1u32)?
            .unwrap_or(DEFAULT_NOTIFY_ATTEMPTS);
        if notify_attempts > MAX_NOTIFY_ATTEMPTS {
            return Err(bad(
                "DEMEFIX_NOTIFY_ATTEMPTS",
                &notify_attempts.to_string(),
                format!("must be at most {MAX_NOTIFY_ATTEMPTS}"),
            ));
        }
        Ok(Self {
            bind,
            db: PathBuf::from(raw.db.clone().unwrap_or_else(|| DEFAULT_DB.to_owned())),
            workers,
            max_states: number("DEMEFIX_MAX_STATES", &raw.max_states, 1u64)?,
            body_limit: number("DEMEFIX_BODY_LIMIT", &raw.body_limit, 1024usize)?
                .unwrap_or(DEFAULT_BODY_LIMIT),
            lease: Duration::from_secs(lease_secs),
            heartbeat: Duration::from_secs(heartbeat_secs),
            log_format,
            notify_backoff: Duration::from_millis(notify_backoff_ms),
            notify_attempts,
            file: None,
        })
    }

    /// Validates the settings of `env` over those of the file `file` (read from `path`) over
    /// the defaults. A bad value taken from the file is reported with its key and the file.
    pub fn layered(env: RawConfig, file: FileConfig, path: &Path) -> Result<Self, ConfigError> {
        let (merged, from_file) = env.over(file.into_raw());
        let mut config = Self::from_raw(&merged).map_err(|e| match e {
            ConfigError::Setting(mut bad) if from_file.contains(&bad.name) => {
                if let Some(&(_, key)) = SETTINGS.iter().find(|(name, _)| *name == bad.name) {
                    bad.origin = Origin::File {
                        path: path.to_owned(),
                        key,
                    };
                }
                ConfigError::Setting(bad)
            }
            other => other,
        })?;
        config.file = Some(path.to_owned());
        Ok(config)
    }

    /// Validates `env`, layered over the configuration file at `file` if one is named.
    pub fn load(env: RawConfig, file: Option<&Path>) -> Result<Self, ConfigError> {
        match file {
            None => Self::from_raw(&env),
            Some(path) => Self::layered(env, FileConfig::read(path)?, path),
        }
    }

    /// Reads and validates the process environment and the file named by `DEMEFIX_CONFIG`.
    pub fn from_env() -> Result<Self, ConfigError> {
        let file = std::env::var_os(CONFIG_FILE_VAR)
            .filter(|v| !v.is_empty())
            .map(PathBuf::from);
        Self::load(RawConfig::from_env(), file.as_deref())
    }

    /// The job limits this deployment applies.
    pub fn limits(&self) -> crate::spec::Limits {
        let mut limits = crate::spec::Limits::default();
        if let Some(n) = self.max_states {
            limits.exact.max_states = n;
        }
        limits
    }
}

#[cfg(test)]
mod tests {
    use super::*;

    fn file(text: &str) -> Result<FileConfig, ConfigError> {
        FileConfig::parse(text, Path::new("/etc/demefix/demefix.toml"))
    }

    #[test]
    fn an_empty_environment_gives_the_documented_defaults() {
        let c = Config::from_raw(&RawConfig::default()).unwrap();
        assert_eq!(c.bind.to_string(), DEFAULT_BIND);
        assert_eq!(c.db, PathBuf::from(DEFAULT_DB));
        assert!(c.workers >= 1);
        assert_eq!(c.body_limit, DEFAULT_BODY_LIMIT);
        assert_eq!(c.lease, Duration::from_secs(DEFAULT_LEASE_SECS));
        assert_eq!(c.heartbeat, Duration::from_secs(DEFAULT_HEARTBEAT_SECS));
        assert_eq!(c.log_format, LogFormat::Text);
        assert_eq!(c.max_states, None);
        assert_eq!(
            c.notify_backoff,
            Duration::from_millis(DEFAULT_NOTIFY_BACKOFF_MS)
        );
        assert_eq!(c.notify_attempts, DEFAULT_NOTIFY_ATTEMPTS);
        assert_eq!(c.file, None);
    }

    #[test]
    fn a_bad_variable_is_named_in_the_error() {
        let raw = RawConfig {
            workers: Some("zero".to_owned()),
            ..RawConfig::default()
        };
        let e = Config::from_raw(&raw).unwrap_err();
        assert_eq!(e.setting(), Some("DEMEFIX_WORKERS"));
        assert_eq!(
            e.to_string(),
            "DEMEFIX_WORKERS=\"zero\": not a whole number"
        );
        let raw = RawConfig {
            workers: Some("0".to_owned()),
            ..RawConfig::default()
        };
        assert_eq!(
            Config::from_raw(&raw).unwrap_err().setting(),
            Some("DEMEFIX_WORKERS")
        );
    }

    #[test]
    fn a_heartbeat_as_long_as_the_lease_is_rejected() {
        let raw = RawConfig {
            lease_secs: Some("4".to_owned()),
            heartbeat_secs: Some("4".to_owned()),
            ..RawConfig::default()
        };
        assert_eq!(
            Config::from_raw(&raw).unwrap_err().setting(),
            Some("DEMEFIX_HEARTBEAT_SECS")
        );
        let raw = RawConfig {
            lease_secs: Some("3".to_owned()),
            ..RawConfig::default()
        };
        assert_eq!(
            Config::from_raw(&raw).unwrap().heartbeat,
            Duration::from_secs(1)
        );
    }

    #[test]
    fn blank_variables_count_as_unset() {
        let raw = RawConfig::from_lookup(|name| match name {
            "DEMEFIX_WORKERS" => Some("  ".to_owned()),
            "DEMEFIX_DB" => Some("/var/lib/demefix/demefix.db".to_owned()),
            _ => None,
        });
        assert_eq!(raw.workers, None);
        assert_eq!(raw.db.as_deref(), Some("/var/lib/demefix/demefix.db"));
    }

    #[test]
    fn every_setting_has_a_file_key_that_parses() {
        let text = r#"
            bind = "0.0.0.0:9000"
            db = "/var/lib/demefix/demefix.db"
            workers = 3
            max_states = 500_000
            body_limit_bytes = 65536
            lease_secs = 20
            heartbeat_secs = 4
            log_format = "json"
            notify_backoff_ms = 250
            notify_attempts = 3
        "#;
        for (_, key) in SETTINGS {
            assert!(text.contains(&format!("{key} = ")), "{key} is tried");
        }
        let mut raw = file(text).unwrap().into_raw();
        let every_slot_set = raw.slots_mut().iter().all(|(_, v)| v.is_some());
        assert!(every_slot_set, "every key reaches its setting: {raw:?}");
        let c = Config::layered(RawConfig::default(), file(text).unwrap(), Path::new("f")).unwrap();
        assert_eq!(c.bind.to_string(), "0.0.0.0:9000");
        assert_eq!(c.db, PathBuf::from("/var/lib/demefix/demefix.db"));
        assert_eq!(c.workers, 3);
        assert_eq!(c.max_states, Some(500_000));
        assert_eq!(c.body_limit, 65536);
        assert_eq!(c.lease, Duration::from_secs(20));
        assert_eq!(c.heartbeat, Duration::from_secs(4));
        assert_eq!(c.log_format, LogFormat::Json);
        assert_eq!(c.notify_backoff, Duration::from_millis(250));
        assert_eq!(c.notify_attempts, 3);
        assert_eq!(c.file, Some(PathBuf::from("f")));
    }

    #[test]
    fn notification_attempts_are_bounded() {
        let raw = RawConfig {
            notify_attempts: Some((MAX_NOTIFY_ATTEMPTS + 1).to_string()),
            ..RawConfig::default()
        };
        assert_eq!(
            Config::from_raw(&raw).unwrap_err().setting(),
            Some("DEMEFIX_NOTIFY_ATTEMPTS")
        );
        let raw = RawConfig {
            notify_backoff_ms: Some("0".to_owned()),
            ..RawConfig::default()
        };
        assert_eq!(
            Config::from_raw(&raw).unwrap_err().setting(),
            Some("DEMEFIX_NOTIFY_BACKOFF_MS")
        );
    }

    #[test]
    fn the_environment_wins_over_the_file_and_the_file_over_the_defaults() {
        let env = RawConfig {
            workers: Some("5".to_owned()),
            ..RawConfig::default()
        };
        let settings = file("workers = 3\nlease_secs = 12\n").unwrap();
        let c = Config::layered(env, settings, Path::new("f")).unwrap();
        assert_eq!(c.workers, 5, "the variable wins");
        assert_eq!(
            c.lease,
            Duration::from_secs(12),
            "the file wins over the default"
        );
        assert_eq!(
            c.heartbeat,
            Duration::from_secs(4),
            "the default heartbeat follows the lease from the file"
        );
        assert_eq!(
            c.body_limit, DEFAULT_BODY_LIMIT,
            "the default fills the rest"
        );
    }

    #[test]
    fn an_unknown_key_is_an_error_naming_the_key_the_file_and_the_line() {
        let e = file("workers = 2\nwrokers = 3\n").unwrap_err();
        let ConfigError::FileInvalid {
            path,
            line,
            message,
        } = &e
        else {
            panic!("{e:?}")
        };
        assert_eq!(path, Path::new("/etc/demefix/demefix.toml"));
        assert_eq!(*line, Some(2));
        assert!(message.contains("wrokers"), "{message}");
        let text = e.to_string();
        assert!(
            text.starts_with("configuration file /etc/demefix/demefix.toml, line 2: "),
            "{text}"
        );
    }

    #[test]
    fn invalid_toml_and_wrong_types_name_the_line() {
        for (text, line) in [
            ("bind = \"127.0.0.1:1\"\n\nworkers = = 2\n", 3),
            ("workers = \"two\"\n", 1),
            ("db = \"x\"\nlease_secs = -4\n", 2),
            ("[server]\nbind = \"x\"\n", 1),
        ] {
            match file(text) {
                Err(ConfigError::FileInvalid { line: got, .. }) => {
                    assert_eq!(got, Some(line), "{text:?}")
                }
                other => panic!("{text:?}: {other:?}"),
            }
        }
    }

    #[test]
    fn a_bad_value_from_the_file_names_its_key_and_the_file() {
        let settings = file("workers = 0\n").unwrap();
        let e =
            Config::layered(RawConfig::default(), settings, Path::new("/srv/d.toml")).unwrap_err();
        assert_eq!(e.setting(), Some("DEMEFIX_WORKERS"));
        assert_eq!(
            e.to_string(),
            "workers = \"0\" in /srv/d.toml: must be at least 1"
        );
        // The same value from the environment names the variable.
        let env = RawConfig {
            workers: Some("0".to_owned()),
            ..RawConfig::default()
        };
        let e = Config::layered(env, FileConfig::default(), Path::new("/srv/d.toml")).unwrap_err();
        assert_eq!(e.to_string(), "DEMEFIX_WORKERS=\"0\": must be at least 1");
    }

    #[test]
    fn a_missing_file_is_an_error_naming_it() {
        let path =
            std::env::temp_dir().join(format!("demefix-missing-{}.toml", std::process::id()));
        let e = Config::load(RawConfig::default(), Some(&path)).unwrap_err();
        assert!(matches!(e, ConfigError::FileUnreadable { .. }), "{e:?}");
        let text = e.to_string();
        assert!(text.contains(&path.display().to_string()), "{text}");
        assert!(text.contains(CONFIG_FILE_VAR), "{text}");
    }

    #[test]
    fn a_file_on_disk_is_read_and_recorded() {
        let path = std::env::temp_dir().join(format!(
            "demefix-config-{}-{:?}.toml",
            std::process::id(),
            std::thread::current().id()
        ));
        std::fs::write(&path, "# comments are fine\nlog_format = \"json\"\n").unwrap();
        let c = Config::load(RawConfig::default(), Some(&path));
        let _ = std::fs::remove_file(&path);
        let c = c.unwrap();
        assert_eq!(c.log_format, LogFormat::Json);
        assert_eq!(c.file, Some(path));
    }

    #[test]
    fn the_example_files_list_every_setting_with_its_default() {
        let example = include_str!("../../deploy/demefix.toml.example");
        let c =
            Config::layered(RawConfig::default(), file(example).unwrap(), Path::new("f")).unwrap();
        let defaults = Config::from_raw(&RawConfig::default()).unwrap();
        assert_eq!(c.bind, defaults.bind);
        assert_eq!(c.db, defaults.db);
        assert_eq!(c.body_limit, defaults.body_limit);
        assert_eq!(c.lease, defaults.lease);
        assert_eq!(c.heartbeat, defaults.heartbeat);
        assert_eq!(c.log_format, defaults.log_format);
        assert_eq!(c.notify_backoff, defaults.notify_backoff);
        assert_eq!(c.notify_attempts, defaults.notify_attempts);
        let env = include_str!("../../deploy/demefix.env.example");
        for (name, key) in SETTINGS {
            assert!(
                example.contains(&format!("{key} = ")),
                "{key} in demefix.toml.example"
            );
            assert!(
                example.contains(&format!("[{name}]")),
                "{name} in demefix.toml.example"
            );
            assert!(
                env.contains(&format!("{name}=")),
                "{name} in demefix.env.example"
            );
        }
        assert!(env.contains(&format!("{CONFIG_FILE_VAR}=")));
    }

    #[test]
    fn an_empty_file_gives_the_defaults() {
        let c = Config::layered(RawConfig::default(), file("").unwrap(), Path::new("f")).unwrap();
        assert_eq!(c.bind.to_string(), DEFAULT_BIND);
        assert_eq!(c.lease, Duration::from_secs(DEFAULT_LEASE_SECS));
    }
}
