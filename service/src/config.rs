//! Configuration of `demefix serve`, read from the environment in two phases: raw strings
//! first ([`RawConfig`], one field per variable), then a validated [`Config`] with typed
//! values and defaults, so a bad variable is reported by name before anything starts.
//!
//! This module owns every `DEMEFIX_*` variable of the service and its default; DEVELOPERS.md
//! and `deploy/demefix.env.example` list the same table.

use std::net::SocketAddr;
use std::path::PathBuf;
use std::time::Duration;

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

/// How log lines are written.
#[derive(Debug, Clone, Copy, PartialEq, Eq)]
pub enum LogFormat {
    /// Human-readable lines.
    Text,
    /// One JSON object per line.
    Json,
}

/// The variables as found, before any parsing.
#[derive(Debug, Clone, Default)]
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
}

impl RawConfig {
    /// Reads the variables from the process environment.
    pub fn from_env() -> Self {
        let var = |name: &str| std::env::var(name).ok().filter(|v| !v.trim().is_empty());
        Self {
            bind: var("DEMEFIX_BIND"),
            db: var("DEMEFIX_DB"),
            workers: var("DEMEFIX_WORKERS"),
            max_states: var("DEMEFIX_MAX_STATES"),
            body_limit: var("DEMEFIX_BODY_LIMIT"),
            lease_secs: var("DEMEFIX_LEASE_SECS"),
            heartbeat_secs: var("DEMEFIX_HEARTBEAT_SECS"),
            log_format: var("DEMEFIX_LOG_FORMAT"),
        }
    }
}

/// A variable that could not be used.
#[derive(Debug, Clone, PartialEq, Eq, thiserror::Error)]
#[error("{name}={value:?}: {reason}")]
pub struct ConfigError {
    /// Variable name.
    pub name: &'static str,
    /// Its value.
    pub value: String,
    /// What is wrong with it.
    pub reason: String,
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
}

fn number<T>(name: &'static str, value: &Option<String>, min: T) -> Result<Option<T>, ConfigError>
where
    T: std::str::FromStr + PartialOrd + std::fmt::Display + Copy,
{
    let Some(v) = value else { return Ok(None) };
    let bad = |reason: String| ConfigError {
        name,
        value: v.clone(),
        reason,
    };
    let n: T = v
        .trim()
        .replace('_', "")
        .parse()
        .map_err(|_| bad("not a whole number".to_owned()))?;
    if n < min {
        return Err(bad(format!("must be at least {min}")));
    }
    Ok(Some(n))
}

impl Config {
    /// Validates `raw`, filling in defaults.
    pub fn from_raw(raw: &RawConfig) -> Result<Self, ConfigError> {
        let bind_text = raw.bind.clone().unwrap_or_else(|| DEFAULT_BIND.to_owned());
        let bind = bind_text.parse().map_err(|_| ConfigError {
            name: "DEMEFIX_BIND",
            value: bind_text.clone(),
            reason: "not an address of the form HOST:PORT (an IP address, e.g. 0.0.0.0:8080)"
                .to_owned(),
        })?;
        let cores = std::thread::available_parallelism().map_or(1, |n| n.get());
        let workers = number("DEMEFIX_WORKERS", &raw.workers, 1usize)?.unwrap_or(cores);
        let lease_secs =
            number("DEMEFIX_LEASE_SECS", &raw.lease_secs, 2u64)?.unwrap_or(DEFAULT_LEASE_SECS);
        let heartbeat_secs = number("DEMEFIX_HEARTBEAT_SECS", &raw.heartbeat_secs, 1u64)?
            .unwrap_or(DEFAULT_HEARTBEAT_SECS.min(lease_secs.div_ceil(3)));
        if heartbeat_secs >= lease_secs {
            return Err(ConfigError {
                name: "DEMEFIX_HEARTBEAT_SECS",
                value: heartbeat_secs.to_string(),
                reason: format!(
                    "must be shorter than DEMEFIX_LEASE_SECS ({lease_secs}), or every lease \
                     expires between heartbeats"
                ),
            });
        }
        let log_format = match raw.log_format.as_deref().map(str::trim) {
            None | Some("text") => LogFormat::Text,
            Some("json") => LogFormat::Json,
            Some(other) => {
                return Err(ConfigError {
                    name: "DEMEFIX_LOG_FORMAT",
                    value: other.to_owned(),
                    reason: "must be `text` or `json`".to_owned(),
                })
            }
        };
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
        })
    }

    /// Reads and validates the process environment.
    pub fn from_env() -> Result<Self, ConfigError> {
        Self::from_raw(&RawConfig::from_env())
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
    }

    #[test]
    fn a_bad_variable_is_named_in_the_error() {
        let raw = RawConfig {
            workers: Some("zero".to_owned()),
            ..RawConfig::default()
        };
        assert_eq!(Config::from_raw(&raw).unwrap_err().name, "DEMEFIX_WORKERS");
        let raw = RawConfig {
            workers: Some("0".to_owned()),
            ..RawConfig::default()
        };
        assert_eq!(Config::from_raw(&raw).unwrap_err().name, "DEMEFIX_WORKERS");
    }

    #[test]
    fn a_heartbeat_as_long_as_the_lease_is_rejected() {
        let raw = RawConfig {
            lease_secs: Some("4".to_owned()),
            heartbeat_secs: Some("4".to_owned()),
            ..RawConfig::default()
        };
        assert_eq!(
            Config::from_raw(&raw).unwrap_err().name,
            "DEMEFIX_HEARTBEAT_SECS"
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
}
