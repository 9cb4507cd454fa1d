//! The training configuration (`config/train.toml`), in two stages: the TOML
//! as written, then validated options ready to fit with. Every key has a
//! default, so an empty file is valid; an unknown key is an error naming it,
//! because a misspelt option that silently keeps its default is how a rig
//! ends up running a decoder nobody meant to train.

use serde::Deserialize;

use crate::decoders::kalman::steady::{DEFAULT_MAX_ITERATIONS, DEFAULT_TOLERANCE};
use crate::fit::kalman::{
    CONSTANT, CountNormalisation, KalmanFitOptions, QForm, SteadyStateOptions,
};
use crate::fit::point_process::PointProcessFitOptions;
use crate::fit::wiener::WienerFitOptions;

#[derive(Debug, Default, Deserialize)]
#[serde(deny_unknown_fields)]
struct RawTrainConfig {
    lag_bins: Option<i64>,
    ridge: Option<f64>,
    folds: Option<i64>,
    per_block_normalisation: Option<bool>,
    #[serde(default)]
    kalman: RawKalman,
    #[serde(default)]
    wiener: RawWiener,
    #[serde(default)]
    point_process: RawPointProcess,
}

#[derive(Debug, Default, Deserialize)]
#[serde(deny_unknown_fields)]
struct RawPointProcess {
    state: Option<Vec<String>>,
    outputs: Option<Vec<String>>,
    history: Option<bool>,
    history_basis: Option<i64>,
    history_span_bins: Option<i64>,
    coupling: Option<bool>,
    max_iterations: Option<i64>,
    tolerance: Option<f64>,
}

#[derive(Debug, Default, Deserialize)]
#[serde(deny_unknown_fields)]
struct RawKalman {
    state: Option<Vec<String>>,
    outputs: Option<Vec<String>>,
    count_normalisation: Option<String>,
    q_form: Option<String>,
    physical_coupling: Option<bool>,
    steady_state: Option<bool>,
    steady_state_tolerance: Option<f64>,
    steady_state_max_iterations: Option<i64>,
}

#[derive(Debug, Default, Deserialize)]
#[serde(deny_unknown_fields)]
struct RawWiener {
    taps: Option<i64>,
    outputs: Option<Vec<String>>,
}

/// Validated training options.
#[derive(Clone, Debug, PartialEq)]
pub struct TrainConfig {
    pub kalman: KalmanFitOptions,
    pub wiener: WienerFitOptions,
    pub point_process: PointProcessFitOptions,
    pub folds: usize,
    /// Per-block normalisation for the Kalman and Wiener fits; the
    /// point-process fit has no such option and refuses it.
    pub per_block: bool,
}

impl Default for TrainConfig {
    fn default() -> Self {
        TrainConfig {
            kalman: KalmanFitOptions::default(),
            wiener: WienerFitOptions::default(),
            point_process: PointProcessFitOptions::default(),
            folds: 5,
            per_block: false,
        }
    }
}

/// Why a training configuration was refused; each names where the value
/// came from (the file, or the flag) and the key, as the daemon's own
/// configuration errors do.
#[derive(Debug, thiserror::Error)]
pub enum ConfigError {
    #[error("{path}: cannot read: {source}")]
    Read {
        path: String,
        source: std::io::Error,
    },
    #[error("{origin}: {message}")]
    Parse { origin: String, message: String },
    #[error("{origin}: key `{key}`: {problem}")]
    Key {
        origin: String,
        key: &'static str,
        problem: String,
    },
    #[error("{flag}: {problem}")]
    Flag { flag: &'static str, problem: String },
}

/// A refused key, before the origin is known.
struct KeyProblem {
    key: &'static str,
    problem: String,
}

fn refuse(key: &'static str, problem: String) -> KeyProblem {
    KeyProblem { key, problem }
}

impl TrainConfig {
    /// Parses and validates TOML text; `source_name` (usually the file path)
    /// prefixes every message.
    pub fn from_toml(text: &str, source_name: &str) -> Result<TrainConfig, ConfigError> {
        let raw: RawTrainConfig = toml::from_str(text).map_err(|e| ConfigError::Parse {
            origin: source_name.to_string(),
            message: e
                .to_string()
                .split('\n')
                .map(str::trim)
                .filter(|l| !l.is_empty())
                .collect::<Vec<_>>()
                .join(" "),
        })?;
        Self::from_raw(raw).map_err(|KeyProblem { key, problem }| ConfigError::Key {
            origin: source_name.to_string(),
            key,
            problem,
        })
    }

    /// Reads `path` (the defaults when `None`).
    pub fn read(path: Option<&std::path::Path>) -> Result<TrainConfig, ConfigError> {
        let Some(path) = path else {
            return Ok(TrainConfig::default());
        };
        let text = std::fs::read_to_string(path).map_err(|source| ConfigError::Read {
            path: path.display().to_string(),
            source,
        })?;
        TrainConfig::from_toml(&text, &path.display().to_string())
    }

    fn from_raw(raw: RawTrainConfig) -> Result<TrainConfig, KeyProblem> {
        let mut cfg = TrainConfig::default();
        if let Some(lag) = raw.lag_bins {
            let lag = bounded(lag, "lag_bins", 0, MAX_LAG_BINS)?;
            cfg.kalman.lag_bins = lag;
            cfg.wiener.lag_bins = lag;
        }
        if let Some(ridge) = raw.ridge {
            check_ridge(ridge).map_err(|p| refuse("ridge", p))?;
            cfg.kalman.ridge = ridge;
            cfg.wiener.ridge = ridge;
            cfg.point_process.ridge = ridge;
        }
        if let Some(folds) = raw.folds {
            cfg.folds = bounded(folds, "folds", 2, 100)?;
        }
        if let Some(p) = raw.per_block_normalisation {
            cfg.set_per_block(p);
        }
        let k = raw.kalman;
        if let Some(state) = k.state {
            if state.is_empty() {
                return Err(refuse("kalman.state", "is empty".into()));
            }
            for (i, s) in state.iter().enumerate() {
                if state[..i].contains(s) {
                    return Err(refuse("kalman.state", format!("names {s:?} twice")));
                }
            }
            cfg.kalman.outputs.retain(|o| state.contains(o));
            cfg.kalman.state = state;
        }
        if let Some(outputs) = k.outputs {
            cfg.kalman.outputs = outputs;
        }
        if cfg.kalman.outputs.is_empty() || cfg.kalman.outputs.len() > 8 {
            return Err(refuse(
                "kalman.outputs",
                format!(
                    "has {} entries; a velocity packet carries 1 to 8",
                    cfg.kalman.outputs.len()
                ),
            ));
        }
        for o in &cfg.kalman.outputs {
            if !cfg.kalman.state.contains(o) || o == CONSTANT {
                return Err(refuse(
                    "kalman.outputs",
                    format!(
                        "{o:?} is not a kinematic component of kalman.state {:?}",
                        cfg.kalman.state
                    ),
                ));
            }
        }
        if let Some(n) = k.count_normalisation {
            cfg.kalman.count_normalisation = match n.as_str() {
                "none" => CountNormalisation::None,
                "mean-centred" => CountNormalisation::MeanCentred,
                "z-scored" => CountNormalisation::ZScored,
                other => {
                    return Err(refuse(
                        "kalman.count_normalisation",
                        format!(
                            "is {other:?}; expected \"none\", \"mean-centred\" or \"z-scored\""
                        ),
                    ));
                }
            };
        }
        if let Some(q) = k.q_form {
            cfg.kalman.q_form = match q.as_str() {
                "full" => QForm::Full,
                "diagonal" => QForm::Diagonal,
                other => {
                    return Err(refuse(
                        "kalman.q_form",
                        format!("is {other:?}; expected \"full\" or \"diagonal\""),
                    ));
                }
            };
        }
        if let Some(p) = k.physical_coupling {
            cfg.kalman.physical_coupling = p;
        }
        let tolerance = k.steady_state_tolerance.unwrap_or(DEFAULT_TOLERANCE);
        if !(tolerance.is_finite() && tolerance > 0.0 && tolerance <= 1.0) {
            return Err(refuse(
                "kalman.steady_state_tolerance",
                format!("is {tolerance}; it must be above 0 and at most 1"),
            ));
        }
        let max_iterations = match k.steady_state_max_iterations {
            Some(v) => bounded(v, "kalman.steady_state_max_iterations", 1, 10_000_000)?,
            None => DEFAULT_MAX_ITERATIONS,
        };
        if k.steady_state.unwrap_or(false) {
            cfg.kalman.steady_state = Some(SteadyStateOptions {
                tolerance,
                max_iterations,
            });
        }
        if let Some(taps) = raw.wiener.taps {
            cfg.wiener.taps = bounded(taps, "wiener.taps", 1, 100)?;
        }
        cfg.wiener.outputs = raw
            .wiener
            .outputs
            .unwrap_or_else(|| cfg.kalman.outputs.clone());
        let pp = raw.point_process;
        if let Some(state) = pp.state {
            if state.is_empty() || state.len() > 16 || state.iter().any(|s| s == CONSTANT) {
                return Err(refuse(
                    "point_process.state",
                    "must name 1 to 16 kinematics columns (the intercept b0 is always fitted)"
                        .into(),
                ));
            }
            cfg.point_process.outputs.retain(|o| state.contains(o));
            cfg.point_process.state = state;
        }
        if let Some(outputs) = pp.outputs {
            cfg.point_process.outputs = outputs;
        }
        if cfg.point_process.outputs.is_empty()
            || cfg.point_process.outputs.len() > 8
            || cfg
                .point_process
                .outputs
                .iter()
                .any(|o| !cfg.point_process.state.contains(o))
        {
            return Err(refuse(
                "point_process.outputs",
                format!(
                    "{:?}: 1 to 8 components of point_process.state {:?}",
                    cfg.point_process.outputs, cfg.point_process.state
                ),
            ));
        }
        let mut history = cfg
            .point_process
            .history
            .clone()
            .expect("default has history");
        if let Some(n) = pp.history_basis {
            history.n_basis = bounded(n, "point_process.history_basis", 2, 64)?;
        }
        if let Some(n) = pp.history_span_bins {
            history.span_bins = bounded(n, "point_process.history_span_bins", 2, 10_000)?;
        }
        if history.n_basis < 2 || history.span_bins < history.n_basis {
            return Err(refuse(
                "point_process.history_basis",
                format!(
                    "{} with history_span_bins = {}: need at least 2 basis functions and a span of at least as many bins",
                    history.n_basis, history.span_bins
                ),
            ));
        }
        cfg.point_process.history = pp.history.unwrap_or(true).then_some(history);
        if let Some(c) = pp.coupling {
            cfg.point_process.coupling = c;
        }
        if let Some(n) = pp.max_iterations {
            cfg.point_process.max_iterations =
                bounded(n, "point_process.max_iterations", 1, 10_000)?;
        }
        if let Some(t) = pp.tolerance {
            if !(t.is_finite() && t > 0.0 && t <= 1.0) {
                return Err(refuse(
                    "point_process.tolerance",
                    format!("is {t}; it must be above 0 and at most 1"),
                ));
            }
            cfg.point_process.tolerance = t;
        }
        Ok(cfg)
    }

    /// Command-line overrides, validated the same way.
    pub fn override_lag(&mut self, lag: usize) -> Result<(), ConfigError> {
        let lag =
            bounded(lag as i64, "lag_bins", 0, MAX_LAG_BINS).map_err(|p| ConfigError::Flag {
                flag: "--lag",
                problem: p.problem,
            })?;
        self.kalman.lag_bins = lag;
        self.wiener.lag_bins = lag;
        Ok(())
    }

    /// Per-block normalisation on or off (`per_block_normalisation`,
    /// `train --per-block`).
    pub fn set_per_block(&mut self, on: bool) {
        self.per_block = on;
        self.kalman.per_block = on;
        self.wiener.per_block = on;
    }

    pub fn override_ridge(&mut self, ridge: f64) -> Result<(), ConfigError> {
        check_ridge(ridge).map_err(|problem| ConfigError::Flag {
            flag: "--ridge",
            problem,
        })?;
        self.kalman.ridge = ridge;
        self.wiener.ridge = ridge;
        self.point_process.ridge = ridge;
        Ok(())
    }
}

/// The longest lag between counts and kinematics: 1000 bins (20 s at
/// 20 ms, far beyond the 50–150 ms by which motor cortex leads movement).
const MAX_LAG_BINS: i64 = 1000;

/// A whole number in `lo..=hi`.
fn bounded(v: i64, key: &'static str, lo: i64, hi: i64) -> Result<usize, KeyProblem> {
    if (lo..=hi).contains(&v) {
        Ok(v as usize)
    } else {
        Err(refuse(
            key,
            format!("is {v}; it must be a whole number from {lo} to {hi}"),
        ))
    }
}

fn check_ridge(ridge: f64) -> Result<(), String> {
    if ridge.is_finite() && (0.0..=1e12).contains(&ridge) {
        Ok(())
    } else {
        Err(format!(
            "is {ridge}; it must be zero (no penalty) or more, at most 1e12"
        ))
    }
}

#[cfg(test)]
mod tests {
    use super::*;

    /// Every numeric key of config/train.toml, outside its documented
    /// range, is refused naming the key.
    #[test]
    fn every_numeric_key_is_checked_against_its_range() {
        let table: &[(&str, &str, &[&str])] = &[
            ("", "lag_bins", &["-1", "1001"]),
            ("", "ridge", &["-1.0", "nan", "inf", "1e13"]),
            ("", "folds", &["1", "0", "101"]),
            (
                "kalman",
                "steady_state_tolerance",
                &["0.0", "-1e-9", "2.0", "nan"],
            ),
            (
                "kalman",
                "steady_state_max_iterations",
                &["0", "-4", "20000000"],
            ),
            ("wiener", "taps", &["0", "101", "-1"]),
            ("point_process", "history_basis", &["1", "65"]),
            ("point_process", "history_span_bins", &["1", "10001"]),
            ("point_process", "max_iterations", &["0", "10001"]),
            ("point_process", "tolerance", &["0.0", "1.5", "nan", "-inf"]),
        ];
        for (section, key, bads) in table {
            let name = if section.is_empty() {
                key.to_string()
            } else {
                format!("{section}.{key}")
            };
            for bad in *bads {
                let text = if section.is_empty() {
                    format!("{key} = {bad}\n")
                } else {
                    format!("[{section}]\n{key} = {bad}\n")
                };
                let e = TrainConfig::from_toml(&text, "train.toml")
                    .err()
                    .unwrap_or_else(|| panic!("{name} = {bad} was accepted"))
                    .to_string();
                assert!(
                    e.contains(&name) || (*key == "ridge" && e.contains("ridge")),
                    "{name} = {bad}: {e}"
                );
            }
        }
        let example = include_str!("../../../config/train.toml");
        assert!(TrainConfig::from_toml(example, "config/train.toml").is_ok());
    }

    #[test]
    fn empty_file_gives_defaults() {
        assert_eq!(
            TrainConfig::from_toml("", "t").unwrap(),
            TrainConfig::default()
        );
    }

    #[test]
    fn misspelt_key_is_named() {
        let e = TrainConfig::from_toml("[kalman]\nq_from = \"full\"\n", "train.toml").unwrap_err();
        assert!(e.to_string().contains("q_from"), "{e}");
        assert!(e.to_string().starts_with("train.toml"), "{e}");
    }

    #[test]
    fn velocity_only_state_keeps_velocity_outputs() {
        let c = TrainConfig::from_toml("[kalman]\nstate = [\"vel_x\", \"vel_y\", \"1\"]\n", "t")
            .unwrap();
        assert_eq!(c.kalman.outputs, vec!["vel_x", "vel_y"]);
    }

    #[test]
    fn negative_lag_and_bad_ridge_are_refused() {
        assert!(
            TrainConfig::from_toml("lag_bins = -1", "t")
                .unwrap_err()
                .to_string()
                .contains("lag_bins")
        );
        assert!(
            TrainConfig::from_toml("ridge = -2.0", "t")
                .unwrap_err()
                .to_string()
                .contains("ridge")
        );
    }

    #[test]
    fn unknown_normalisation_lists_the_choices() {
        let e = TrainConfig::from_toml("[kalman]\ncount_normalisation = \"zscore\"\n", "t")
            .unwrap_err();
        assert!(e.to_string().contains("z-scored"), "{e}");
    }
}
