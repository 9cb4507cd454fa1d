//! The daemon's configuration, in two stages: the TOML file into raw
//! structs (unknown keys refused), then command-line overrides, then
//! validation into typed values a running daemon can trust. Every error
//! names the key and says what would be accepted. Every key has a default
//! except the model, so an empty file plus `--model` is a valid
//! configuration (PROTOCOL.md §5); `config/daemon.toml` documents each key.

use decoder_core::BinWidth;
use std::net::SocketAddr;
use std::path::{Path, PathBuf};
use std::time::Duration;

use decoder_core::engine::slot_engine::{ClickGateSettings, EngineSettings};
use decoder_core::engine::supervisor::SafetyLimits;
use serde::Deserialize;

pub const DEFAULT_LISTEN: &str = "127.0.0.1:27400";
pub const DEFAULT_ACTUATOR: &str = "127.0.0.1:27401";
pub const DEFAULT_TASK_LISTEN: &str = "127.0.0.1:27402";
/// The `decoderd ctl` prefix that reaches a daemon on `socket`: with
/// `--socket` only when it is not the default.
pub fn ctl_command(socket: &Path) -> String {
    if socket.as_os_str().is_empty() || socket == default_socket() {
        "decoderd ctl".into()
    } else {
        format!("decoderd ctl --socket {}", socket.display())
    }
}

/// The control socket's file name in the default directory.
pub const SOCKET_NAME: &str = "decoderd.sock";

/// The default control socket: in the user's runtime directory
/// (`$XDG_RUNTIME_DIR`, else `/run/user/<uid>`), which only that user can
/// write, never in world-writable `/tmp`; without either, in
/// `$HOME/.decoderd/`.
pub fn default_socket() -> PathBuf {
    if let Some(dir) = std::env::var_os("XDG_RUNTIME_DIR").map(PathBuf::from) {
        if dir.is_absolute() && dir.is_dir() {
            return dir.join(SOCKET_NAME);
        }
    }
    // SAFETY: getuid has no preconditions and cannot fail.
    let uid = unsafe { libc::getuid() };
    let run = PathBuf::from(format!("/run/user/{uid}"));
    if run.is_dir() {
        return run.join(SOCKET_NAME);
    }
    let home = std::env::var_os("HOME").map_or_else(|| PathBuf::from("."), PathBuf::from);
    home.join(".decoderd").join(SOCKET_NAME)
}

#[derive(Debug, Default, Deserialize)]
#[serde(deny_unknown_fields)]
pub struct RawConfig {
    #[serde(default)]
    pub network: RawNetwork,
    #[serde(default)]
    pub model: RawModel,
    #[serde(default)]
    pub recording: RawRecording,
    #[serde(default)]
    pub control: RawControl,
    #[serde(default)]
    pub safety: RawSafety,
    #[serde(default)]
    pub timing: RawTiming,
    #[serde(default)]
    pub monitor: RawMonitor,
    #[serde(default)]
    pub realtime: RawRealtime,
    #[serde(default)]
    pub log: RawLog,
    #[serde(default)]
    pub adaptation: RawAdaptation,
    #[serde(default)]
    pub click: RawClick,
    /// `[drift]`: its keys and defaults are the engine's own.
    #[serde(default)]
    pub drift: decoder_core::engine::drift::DriftSettings,
}

#[derive(Debug, Default, Deserialize)]
#[serde(deny_unknown_fields)]
pub struct RawClick {
    pub threshold: Option<f64>,
    pub hold_bins: Option<i64>,
    pub refractory_ms: Option<f64>,
    pub max_speed: Option<f64>,
}

#[derive(Debug, Default, Deserialize)]
#[serde(deny_unknown_fields)]
pub struct RawAdaptation {
    pub enabled: Option<bool>,
    pub parameters: Option<String>,
    pub batch_s: Option<f64>,
    pub half_life_s: Option<f64>,
    pub min_usable_fraction: Option<f64>,
    pub max_relative_change: Option<f64>,
    pub ridge: Option<f64>,
    pub land_after_s: Option<f64>,
}

/// Online adaptation (`[adaptation]`): off unless `enabled = true` or
/// `decoderd ctl adapt on`.
#[derive(Clone, Debug, PartialEq)]
pub struct AdaptConfig {
    pub enabled: bool,
    pub options: decoder_core::fit::adapt::AdaptOptions,
    /// Seconds of slots from a batch's last slot to the slot its update
    /// goes in at (PROTOCOL.md §9).
    pub land_after_s: f64,
}

#[derive(Debug, Default, Deserialize)]
#[serde(deny_unknown_fields)]
pub struct RawNetwork {
    pub listen: Option<String>,
    pub task_listen: Option<String>,
    pub actuator: Option<String>,
    pub allow_non_loopback: Option<bool>,
}

#[derive(Debug, Default, Deserialize)]
#[serde(deny_unknown_fields)]
pub struct RawModel {
    pub path: Option<PathBuf>,
}

#[derive(Debug, Default, Deserialize)]
#[serde(deny_unknown_fields)]
pub struct RawRecording {
    pub enabled: Option<bool>,
    pub dir: Option<PathBuf>,
    pub buffer_bins: Option<i64>,
}

#[derive(Debug, Default, Deserialize)]
#[serde(deny_unknown_fields)]
pub struct RawControl {
    pub socket: Option<PathBuf>,
}

#[derive(Debug, Default, Deserialize)]
#[serde(deny_unknown_fields)]
pub struct RawSafety {
    pub max_speed: Option<f64>,
    pub max_accel: Option<f64>,
    pub max_coast_bins: Option<i64>,
    pub coast_decay: Option<f64>,
}

#[derive(Debug, Default, Deserialize)]
#[serde(deny_unknown_fields)]
pub struct RawTiming {
    pub deadline_slack_bins: Option<f64>,
    pub reorder_window_bins: Option<i64>,
    pub clock_tracking: Option<f64>,
}

#[derive(Debug, Default, Deserialize)]
#[serde(deny_unknown_fields)]
pub struct RawMonitor {
    pub summary_interval_s: Option<f64>,
    pub dead_channel_s: Option<f64>,
    pub saturation_rate_hz: Option<f64>,
}

#[derive(Debug, Default, Deserialize)]
#[serde(deny_unknown_fields)]
pub struct RawRealtime {
    pub cpu: Option<i64>,
    pub mlockall: Option<bool>,
    pub fifo_priority: Option<i64>,
}

#[derive(Debug, Default, Deserialize)]
#[serde(deny_unknown_fields)]
pub struct RawLog {
    pub format: Option<String>,
    pub level: Option<String>,
}

/// Command-line values that override the file.
#[derive(Debug, Default, Clone)]
pub struct Overrides {
    pub model: Option<PathBuf>,
    pub listen: Option<String>,
    pub task_listen: Option<String>,
    pub actuator: Option<String>,
    pub record: Option<PathBuf>,
    pub socket: Option<PathBuf>,
    pub arm: bool,
}

#[derive(Clone, Copy, Debug, PartialEq, Eq)]
pub enum LogFormat {
    Human,
    Json,
}

#[derive(Clone, Debug, PartialEq)]
pub struct SafetyConfig {
    pub max_speed: f64,
    pub max_accel: f64,
    pub max_coast_bins: u32,
    pub coast_decay: f64,
}

#[derive(Clone, Debug, PartialEq)]
pub struct RealtimeConfig {
    pub cpu: Option<usize>,
    pub mlockall: bool,
    pub fifo_priority: Option<i32>,
}

/// A validated configuration.
#[derive(Clone, Debug, PartialEq)]
pub struct Config {
    pub listen: SocketAddr,
    /// Where task packets (PROTOCOL.md §6) arrive.
    pub task_listen: SocketAddr,
    pub actuator: SocketAddr,
    pub model: PathBuf,
    /// Directory for session logs; `None` when recording is off.
    pub record_dir: Option<PathBuf>,
    pub record_buffer_bins: usize,
    pub control_socket: PathBuf,
    pub safety: SafetyConfig,
    pub deadline_slack_bins: f64,
    pub reorder_window_bins: u32,
    pub clock_tracking: f64,
    pub summary_interval: Duration,
    pub dead_channel_s: f64,
    pub saturation_rate_hz: f64,
    pub realtime: RealtimeConfig,
    pub log_format: LogFormat,
    pub log_level: String,
    pub arm_at_start: bool,
    pub adaptation: AdaptConfig,
    /// When the model's click probability makes a click.
    pub click: ClickGateSettings,
    /// Drift handling (`[drift]`).
    pub drift: decoder_core::engine::drift::DriftSettings,
    /// Where each path came from, for errors: the flag (`--model`) or the
    /// key (`model.path`).
    pub sources: Sources,
}

/// The flag or key each path setting came from.
#[derive(Clone, Debug, PartialEq)]
pub struct Sources {
    pub model: &'static str,
    pub record_dir: &'static str,
    pub control_socket: &'static str,
}

#[derive(Debug, thiserror::Error)]
pub enum ConfigError {
    #[error("{flag}: {problem}")]
    Flag { flag: &'static str, problem: String },
    #[error("{path}: {source}")]
    Read {
        path: String,
        source: std::io::Error,
    },
    #[error("{path}: {message}")]
    Parse { path: String, message: String },
    #[error("{origin}: key `{key}`: {problem}")]
    Key {
        origin: String,
        key: &'static str,
        problem: String,
    },
    #[error(
        "--arm is refused: the actuator address {actuator} is not loopback, and arming at start is for bench use only (PROTOCOL.md §5); start disarmed and arm with `decoderd ctl arm`"
    )]
    ArmNotLoopback { actuator: SocketAddr },
}

impl RawConfig {
    pub fn from_file(path: &Path) -> Result<RawConfig, ConfigError> {
        let text = std::fs::read_to_string(path).map_err(|source| ConfigError::Read {
            path: path.display().to_string(),
            source,
        })?;
        Self::from_toml(&text, &path.display().to_string())
    }

    pub fn from_toml(text: &str, origin: &str) -> Result<RawConfig, ConfigError> {
        toml::from_str(text).map_err(|e| ConfigError::Parse {
            path: origin.to_string(),
            message: e.message().to_string()
                + &e.span()
                    .map(|s| format!(" (at byte {})", s.start))
                    .unwrap_or_default(),
        })
    }
}

struct Check<'a> {
    origin: &'a str,
}

impl Check<'_> {
    fn err(&self, key: &'static str, problem: impl Into<String>) -> ConfigError {
        ConfigError::Key {
            origin: self.origin.to_string(),
            key,
            problem: problem.into(),
        }
    }

    fn addr(
        &self,
        key: &'static str,
        text: &str,
        allow_remote: bool,
    ) -> Result<SocketAddr, ConfigError> {
        let addr: SocketAddr = text.parse().map_err(|_| {
            self.err(
                key,
                format!("{text:?} is not an IP:port address such as 127.0.0.1:27400"),
            )
        })?;
        if !allow_remote && !addr.ip().is_loopback() {
            return Err(self.err(
                key,
                format!(
                    "{addr} is not a loopback address; the daemon binds to loopback only unless network.allow_non_loopback = true"
                ),
            ));
        }
        Ok(addr)
    }

    /// A finite number above 0 and at most `hi`.
    fn positive(&self, key: &'static str, v: f64, hi: f64) -> Result<f64, ConfigError> {
        if v.is_finite() && v > 0.0 && v <= hi {
            Ok(v)
        } else {
            Err(self.err(
                key,
                format!("{v} must be a finite number above 0 and at most {hi}"),
            ))
        }
    }

    fn within(&self, key: &'static str, v: f64, lo: f64, hi: f64) -> Result<f64, ConfigError> {
        if v.is_finite() && (lo..=hi).contains(&v) {
            Ok(v)
        } else {
            Err(self.err(key, format!("{v} must be between {lo} and {hi}")))
        }
    }

    fn count(&self, key: &'static str, v: i64, lo: i64, hi: i64) -> Result<i64, ConfigError> {
        if (lo..=hi).contains(&v) {
            Ok(v)
        } else {
            Err(self.err(key, format!("{v} must be a whole number from {lo} to {hi}")))
        }
    }
}

/// The three addresses, checked (`network`).
struct Addresses {
    listen: SocketAddr,
    task_listen: SocketAddr,
    actuator: SocketAddr,
}

/// The files and sockets outside the network (`model`, `recording`,
/// `control`).
struct Places {
    model: PathBuf,
    record_dir: Option<PathBuf>,
    record_buffer_bins: usize,
    control_socket: PathBuf,
    sources: Sources,
}

/// `timing` and `monitor`, checked.
struct Clocking {
    deadline_slack_bins: f64,
    reorder_window_bins: u32,
    clock_tracking: f64,
    summary_interval: Duration,
    dead_channel_s: f64,
    saturation_rate_hz: f64,
}

impl Check<'_> {
    /// `network`, with `--listen`, `--task-listen` and `--actuator` over it.
    fn network(&self, raw: &RawNetwork, overrides: &Overrides) -> Result<Addresses, ConfigError> {
        let allow_remote = raw.allow_non_loopback.unwrap_or(false);
        // A bad value given as a flag is named by the flag, not by the key
        // it overrides.
        let one = |key: &'static str,
                   flag: &'static str,
                   given: &Option<String>,
                   file: &Option<String>,
                   default: &str| {
            let text = given
                .clone()
                .or_else(|| file.clone())
                .unwrap_or_else(|| default.into());
            self.addr(key, &text, allow_remote).map_err(|e| match e {
                ConfigError::Key { problem, .. } if given.is_some() => {
                    ConfigError::Flag { flag, problem }
                }
                other => other,
            })
        };
        Ok(Addresses {
            listen: one(
                "network.listen",
                "--listen",
                &overrides.listen,
                &raw.listen,
                DEFAULT_LISTEN,
            )?,
            actuator: one(
                "network.actuator",
                "--actuator",
                &overrides.actuator,
                &raw.actuator,
                DEFAULT_ACTUATOR,
            )?,
            task_listen: one(
                "network.task_listen",
                "--task-listen",
                &overrides.task_listen,
                &raw.task_listen,
                DEFAULT_TASK_LISTEN,
            )?,
        })
    }

    /// The model, the recording and the control socket, flags over keys.
    fn places(&self, raw: &RawConfig, overrides: &Overrides) -> Result<Places, ConfigError> {
        let sources = Sources {
            model: if overrides.model.is_some() {
                "--model"
            } else {
                "model.path"
            },
            record_dir: if overrides.record.is_some() {
                "--record"
            } else {
                "recording.dir"
            },
            control_socket: if overrides.socket.is_some() {
                "--socket"
            } else {
                "control.socket"
            },
        };
        let model = overrides.model.clone().or_else(|| raw.model.path.clone()).ok_or_else(|| {
            self.err(
                "model.path",
                "no model given; set model.path or pass --model FILE (a file from `replay-tool train`)",
            )
        })?;
        let record_enabled = raw.recording.enabled.unwrap_or(true) || overrides.record.is_some();
        let record_dir = record_enabled.then(|| {
            overrides
                .record
                .clone()
                .or_else(|| raw.recording.dir.clone())
                .unwrap_or_else(|| PathBuf::from("recordings"))
        });
        let record_buffer_bins = self.count(
            "recording.buffer_bins",
            raw.recording.buffer_bins.unwrap_or(1024),
            16,
            1 << 20,
        )? as usize;
        let control_socket = overrides
            .socket
            .clone()
            .or_else(|| raw.control.socket.clone())
            .unwrap_or_else(default_socket);
        Ok(Places {
            model,
            record_dir,
            record_buffer_bins,
            control_socket,
            sources,
        })
    }

    fn safety(&self, raw: &RawSafety) -> Result<SafetyConfig, ConfigError> {
        Ok(SafetyConfig {
            max_speed: self.positive(
                "safety.max_speed",
                raw.max_speed.unwrap_or(50.0),
                10_000.0,
            )?,
            max_accel: self.positive(
                "safety.max_accel",
                raw.max_accel.unwrap_or(500.0),
                1_000_000.0,
            )?,
            max_coast_bins: self.count(
                "safety.max_coast_bins",
                raw.max_coast_bins.unwrap_or(5),
                0,
                1000,
            )? as u32,
            coast_decay: self.within(
                "safety.coast_decay",
                raw.coast_decay.unwrap_or(0.8),
                0.0,
                1.0,
            )?,
        })
    }

    fn clocking(&self, timing: &RawTiming, monitor: &RawMonitor) -> Result<Clocking, ConfigError> {
        let deadline_slack_bins = self.within(
            "timing.deadline_slack_bins",
            timing.deadline_slack_bins.unwrap_or(0.5),
            0.05,
            4.0,
        )?;
        let reorder_window_bins = self.count(
            "timing.reorder_window_bins",
            timing.reorder_window_bins.unwrap_or(64),
            1,
            4096,
        )? as u32;
        let clock_tracking = self.within(
            "timing.clock_tracking",
            timing.clock_tracking.unwrap_or(0.01),
            0.0,
            0.5,
        )?;
        let summary_interval = Duration::from_secs_f64(self.within(
            "monitor.summary_interval_s",
            monitor.summary_interval_s.unwrap_or(5.0),
            0.1,
            3600.0,
        )?);
        let dead_channel_s = self.within(
            "monitor.dead_channel_s",
            monitor.dead_channel_s.unwrap_or(30.0),
            0.1,
            86_400.0,
        )?;
        let saturation_rate_hz = self.within(
            "monitor.saturation_rate_hz",
            monitor.saturation_rate_hz.unwrap_or(1000.0),
            1.0,
            100_000.0,
        )?;
        Ok(Clocking {
            deadline_slack_bins,
            reorder_window_bins,
            clock_tracking,
            summary_interval,
            dead_channel_s,
            saturation_rate_hz,
        })
    }

    fn adaptation(&self, a: &RawAdaptation) -> Result<AdaptConfig, ConfigError> {
        let parameters = a.parameters.clone().unwrap_or_else(|| "observation".into());
        if parameters != "observation" {
            return Err(self.err(
                "adaptation.parameters",
                format!(
                    "{parameters:?}; this version adapts \"observation\" (Kalman H and Q, point-process b0 and β) only"
                ),
            ));
        }
        let adaptation = AdaptConfig {
            enabled: a.enabled.unwrap_or(false),
            options: decoder_core::fit::adapt::AdaptOptions {
                batch_s: self.within(
                    "adaptation.batch_s",
                    a.batch_s.unwrap_or(10.0),
                    1.0,
                    600.0,
                )?,
                half_life_s: self.within(
                    "adaptation.half_life_s",
                    a.half_life_s.unwrap_or(60.0),
                    1.0,
                    86_400.0,
                )?,
                min_usable_fraction: self.within(
                    "adaptation.min_usable_fraction",
                    a.min_usable_fraction.unwrap_or(0.5),
                    0.0,
                    1.0,
                )?,
                max_relative_change: self.within(
                    "adaptation.max_relative_change",
                    a.max_relative_change.unwrap_or(0.25),
                    0.001,
                    10.0,
                )?,
                ridge: self.within("adaptation.ridge", a.ridge.unwrap_or(1.0), 0.0, 1e6)?,
            },
            land_after_s: 0.0,
        };
        let batch_s = adaptation.options.batch_s;
        let land_after_s = self.within(
            "adaptation.land_after_s",
            a.land_after_s.unwrap_or(1.0_f64.min(batch_s / 2.0)),
            0.0,
            600.0,
        )?;
        if land_after_s >= batch_s {
            return Err(self.err(
                "adaptation.land_after_s",
                format!(
                    "{land_after_s} s is not shorter than adaptation.batch_s ({batch_s} s); an update must go in before the next batch closes"
                ),
            ));
        }
        Ok(AdaptConfig {
            land_after_s,
            ..adaptation
        })
    }

    fn realtime(&self, raw: &RawRealtime) -> Result<RealtimeConfig, ConfigError> {
        let n_cpus = std::thread::available_parallelism().map_or(1, |n| n.get()) as i64;
        let cpu = match raw.cpu {
            None => None,
            Some(v) => Some(self.count("realtime.cpu", v, 0, n_cpus - 1)? as usize),
        };
        let fifo_priority = match raw.fifo_priority.unwrap_or(0) {
            0 => None,
            v => Some(self.count("realtime.fifo_priority", v, 1, 99)? as i32),
        };
        Ok(RealtimeConfig {
            cpu,
            mlockall: raw.mlockall.unwrap_or(false),
            fifo_priority,
        })
    }

    /// `click`: the gate between the click probability and a click.
    fn click(&self, raw: &RawClick) -> Result<ClickGateSettings, ConfigError> {
        Ok(ClickGateSettings {
            threshold: self.within("click.threshold", raw.threshold.unwrap_or(0.9), 0.5, 0.999)?,
            hold_bins: self.count("click.hold_bins", raw.hold_bins.unwrap_or(5), 1, 50)? as u32,
            refractory_ms: self.within(
                "click.refractory_ms",
                raw.refractory_ms.unwrap_or(500.0),
                0.0,
                5000.0,
            )?,
            max_speed: self.within("click.max_speed", raw.max_speed.unwrap_or(0.0), 0.0, 1e6)?,
        })
    }

    fn log(&self, raw: &RawLog) -> Result<(LogFormat, String), ConfigError> {
        let log_format = match raw.format.as_deref().unwrap_or("human") {
            "human" => LogFormat::Human,
            "json" => LogFormat::Json,
            other => {
                return Err(self.err(
                    "log.format",
                    format!("{other:?}; use \"human\" or \"json\""),
                ));
            }
        };
        let log_level = raw.level.clone().unwrap_or_else(|| "info".into());
        if !["error", "warn", "info", "debug", "trace"].contains(&log_level.as_str()) {
            return Err(self.err(
                "log.level",
                format!("{log_level:?}; use error, warn, info, debug or trace"),
            ));
        }
        Ok((log_format, log_level))
    }
}

impl Config {
    /// Validates `raw` with `overrides` applied, a section at a time;
    /// `origin` names the file in errors.
    pub fn resolve(
        raw: RawConfig,
        overrides: &Overrides,
        origin: &str,
    ) -> Result<Config, ConfigError> {
        let c = Check { origin };
        let Addresses {
            listen,
            task_listen,
            actuator,
        } = c.network(&raw.network, overrides)?;
        let places = c.places(&raw, overrides)?;
        let safety = c.safety(&raw.safety)?;
        let clocking = c.clocking(&raw.timing, &raw.monitor)?;
        let adaptation = c.adaptation(&raw.adaptation)?;
        let realtime = c.realtime(&raw.realtime)?;
        let (log_format, log_level) = c.log(&raw.log)?;
        let click = c.click(&raw.click)?;
        raw.drift
            .validate()
            .map_err(|e| c.err(e.key, format!("{}; it must be {}", e.value, e.want)))?;
        if overrides.arm && !actuator.ip().is_loopback() {
            return Err(ConfigError::ArmNotLoopback { actuator });
        }
        Ok(Config {
            adaptation,
            click,
            drift: raw.drift,
            listen,
            task_listen,
            actuator,
            model: places.model,
            record_dir: places.record_dir,
            record_buffer_bins: places.record_buffer_bins,
            control_socket: places.control_socket,
            safety,
            deadline_slack_bins: clocking.deadline_slack_bins,
            reorder_window_bins: clocking.reorder_window_bins,
            clock_tracking: clocking.clock_tracking,
            summary_interval: clocking.summary_interval,
            dead_channel_s: clocking.dead_channel_s,
            saturation_rate_hz: clocking.saturation_rate_hz,
            realtime,
            log_format,
            log_level,
            arm_at_start: overrides.arm,
            sources: places.sources,
        })
    }

    /// The slot engine's settings for a model with `bin_width` bins.
    pub fn engine_settings(&self, bin_width: BinWidth) -> EngineSettings {
        let bin_s = bin_width.seconds();
        EngineSettings {
            bin_width,
            deadline_slack_ns: (self.deadline_slack_bins * bin_width.ns() as f64).round() as u64,
            reorder_window: self.reorder_window_bins,
            clock_tracking: self.clock_tracking,
            limits: SafetyLimits {
                max_speed: self.safety.max_speed,
                max_accel: self.safety.max_accel,
                max_coast_bins: self.safety.max_coast_bins,
                coast_decay: self.safety.coast_decay,
                bin_width,
            },
            armed_at_start: self.arm_at_start,
            dead_channel_bins: (self.dead_channel_s / bin_s).ceil().max(1.0) as u64,
            // More than one spike per refractory period (1 ms at 1000 Hz) in
            // every bin of the window is not physiological: common practice.
            saturation_count: ((self.saturation_rate_hz * bin_s).floor() as u64 + 1).min(65535)
                as u16,
            click_gate: self.click,
            drift: self.drift,
        }
    }
}

#[cfg(test)]
mod tests {
    use super::*;

    fn resolve(text: &str, o: &Overrides) -> Result<Config, ConfigError> {
        Config::resolve(RawConfig::from_toml(text, "daemon.toml")?, o, "daemon.toml")
    }

    fn with_model() -> Overrides {
        Overrides {
            model: Some("m.model".into()),
            ..Overrides::default()
        }
    }

    #[test]
    fn empty_file_plus_model_is_valid() {
        let c = resolve("", &with_model()).unwrap();
        assert_eq!(c.listen.to_string(), DEFAULT_LISTEN);
        assert_eq!(c.safety.max_coast_bins, 5);
        assert_eq!(c.deadline_slack_bins, 0.5);
        assert!(!c.arm_at_start);
    }

    #[test]
    fn missing_model_names_the_key() {
        let e = resolve("", &Overrides::default()).unwrap_err().to_string();
        assert!(e.contains("model.path"), "{e}");
    }

    /// Every numeric key, its documented range in config/daemon.toml, and
    /// values outside it: each is refused at start naming the key, and
    /// none panics (a huge summary interval once overflowed a Duration, a
    /// tiny one a timer).
    #[test]
    fn the_default_socket_is_not_in_a_world_writable_directory() {
        let p = default_socket();
        assert!(p.is_absolute() || p.starts_with("."), "{}", p.display());
        assert!(!p.starts_with("/tmp"), "{}", p.display());
        assert_eq!(p.file_name().unwrap(), SOCKET_NAME);
    }

    #[test]
    fn every_numeric_key_is_checked_against_its_range() {
        let table: &[(&str, &str, &str, &[&str])] = &[
            ("recording", "buffer_bins", "1024", &["15", "1048577", "-1"]),
            (
                "safety",
                "max_speed",
                "50.0",
                &["0.0", "-1.0", "1e300", "nan", "inf"],
            ),
            (
                "safety",
                "max_accel",
                "500.0",
                &["0.0", "-5.0", "1e7", "nan", "-inf"],
            ),
            ("safety", "max_coast_bins", "5", &["-1", "1001"]),
            ("safety", "coast_decay", "0.8", &["-0.1", "1.5", "nan"]),
            (
                "timing",
                "deadline_slack_bins",
                "0.5",
                &["0.0", "0.01", "5.0", "nan", "inf"],
            ),
            ("timing", "reorder_window_bins", "64", &["0", "4097", "-3"]),
            ("click", "threshold", "0.9", &["0.4", "1.0", "nan"]),
            ("click", "hold_bins", "5", &["0", "51", "-1"]),
            (
                "click",
                "refractory_ms",
                "500.0",
                &["-1.0", "5001.0", "inf"],
            ),
            ("timing", "clock_tracking", "0.01", &["-0.01", "0.6", "nan"]),
            (
                "monitor",
                "summary_interval_s",
                "5.0",
                &["1e20", "1e-10", "0.0", "-1.0", "nan", "inf"],
            ),
            ("monitor", "dead_channel_s", "30.0", &["0.0", "1e9", "nan"]),
            (
                "monitor",
                "saturation_rate_hz",
                "1000.0",
                &["0.5", "1e6", "nan", "-inf"],
            ),
            ("realtime", "fifo_priority", "0", &["-1", "100"]),
            ("adaptation", "batch_s", "10.0", &["0.5", "601.0", "nan"]),
            ("adaptation", "half_life_s", "60.0", &["0.0", "1e9", "inf"]),
            (
                "adaptation",
                "min_usable_fraction",
                "0.5",
                &["-0.1", "1.5", "nan"],
            ),
            (
                "adaptation",
                "max_relative_change",
                "0.25",
                &["0.0", "11.0", "nan"],
            ),
            ("adaptation", "ridge", "1.0", &["-1.0", "1e7", "nan"]),
            // Not shorter than batch_s (10 s by default) is refused too.
            (
                "adaptation",
                "land_after_s",
                "1.0",
                &["-1.0", "10.0", "nan"],
            ),
        ];
        for (section, key, good, bads) in table {
            let ok = format!("[{section}]\n{key} = {good}\n");
            assert!(
                resolve(&ok, &with_model()).is_ok(),
                "{section}.{key} = {good}"
            );
            for bad in *bads {
                let text = format!("[{section}]\n{key} = {bad}\n");
                let e = resolve(&text, &with_model())
                    .err()
                    .unwrap_or_else(|| panic!("{section}.{key} = {bad} was accepted"))
                    .to_string();
                assert!(
                    e.contains(&format!("{section}.{key}")),
                    "{section}.{key} = {bad}: {e}"
                );
            }
        }
    }

    #[test]
    fn a_bad_flag_value_names_the_flag_and_a_bad_key_the_key() {
        let o = Overrides {
            listen: Some("nowhere".into()),
            ..with_model()
        };
        let e = resolve("", &o).unwrap_err().to_string();
        assert!(e.starts_with("--listen: "), "{e}");
        let e = resolve("[network]\nactuator = \"nowhere\"", &with_model())
            .unwrap_err()
            .to_string();
        assert!(e.contains("key `network.actuator`"), "{e}");
        let c = resolve("", &with_model()).unwrap();
        assert_eq!(c.sources.model, "--model");
        assert_eq!(c.sources.record_dir, "recording.dir");
    }

    #[test]
    fn non_loopback_needs_explicit_permission() {
        let e = resolve("[network]\nlisten = \"0.0.0.0:9000\"", &with_model())
            .unwrap_err()
            .to_string();
        assert!(
            e.contains("network.listen") && e.contains("loopback"),
            "{e}"
        );
        assert!(
            resolve(
                "[network]\nlisten = \"0.0.0.0:9000\"\nallow_non_loopback = true",
                &with_model()
            )
            .is_ok()
        );
    }

    #[test]
    fn bad_values_name_their_key() {
        for (text, key) in [
            ("[safety]\nmax_speed = -1.0", "safety.max_speed"),
            ("[safety]\ncoast_decay = 1.5", "safety.coast_decay"),
            ("[safety]\nmax_coast_bins = -2", "safety.max_coast_bins"),
            (
                "[timing]\ndeadline_slack_bins = 0.0",
                "timing.deadline_slack_bins",
            ),
            ("[realtime]\nfifo_priority = 150", "realtime.fifo_priority"),
            ("[log]\nformat = \"xml\"", "log.format"),
            ("[network]\nactuator = \"nowhere\"", "network.actuator"),
        ] {
            let e = resolve(text, &with_model()).unwrap_err().to_string();
            assert!(e.contains(key), "{text}: {e}");
        }
    }

    #[test]
    fn unknown_keys_are_refused() {
        let e = resolve("[safety]\nmax_sped = 1.0", &with_model())
            .unwrap_err()
            .to_string();
        assert!(e.contains("max_sped"), "{e}");
    }

    #[test]
    fn flags_override_the_file() {
        let o = Overrides {
            listen: Some("127.0.0.1:5000".into()),
            record: Some("/tmp/r".into()),
            arm: true,
            ..with_model()
        };
        let c = resolve(
            "[network]\nlisten = \"127.0.0.1:6000\"\n[recording]\nenabled = false",
            &o,
        )
        .unwrap();
        assert_eq!(c.listen.port(), 5000);
        assert_eq!(c.record_dir.as_deref(), Some(Path::new("/tmp/r")));
        assert!(c.arm_at_start);
    }

    #[test]
    fn arm_at_start_is_refused_for_an_actuator_that_is_not_loopback() {
        let o = Overrides {
            arm: true,
            ..with_model()
        };
        let remote = "[network]\nactuator = \"192.0.2.7:9001\"\nallow_non_loopback = true";
        let e = resolve(remote, &o).unwrap_err().to_string();
        assert!(e.contains("--arm") && e.contains("192.0.2.7:9001"), "{e}");
        // The same file without --arm is a valid configuration.
        assert!(resolve(remote, &with_model()).is_ok());
    }

    #[test]
    fn saturation_count_follows_the_bin_width() {
        let c = resolve("", &with_model()).unwrap();
        assert_eq!(
            c.engine_settings(BinWidth::from_ms(20.0).unwrap())
                .saturation_count,
            21
        );
        assert_eq!(
            c.engine_settings(BinWidth::from_ms(1.0).unwrap())
                .saturation_count,
            2
        );
        assert_eq!(
            c.engine_settings(BinWidth::from_ms(20.0).unwrap())
                .deadline_slack_ns,
            10_000_000
        );
    }
}

#[cfg(test)]
mod example_file {
    use super::*;

    /// config/daemon.toml claims to show every default; hold it to that.
    #[test]
    fn the_example_config_states_the_defaults() {
        let path = Path::new(env!("CARGO_MANIFEST_DIR")).join("../config/daemon.toml");
        let o = Overrides {
            model: Some("m.model".into()),
            ..Overrides::default()
        };
        let from_file =
            Config::resolve(RawConfig::from_file(&path).unwrap(), &o, "daemon.toml").unwrap();
        let defaults = Config::resolve(RawConfig::default(), &o, "defaults").unwrap();
        assert_eq!(from_file, defaults);
    }
}
