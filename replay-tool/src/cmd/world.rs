//! The flags that make the simulated world change (`simulate` and
//! `closed-loop`): rates that drift, channels that fall silent or turn
//! noisy and come back, over-dispersed counts, preferred directions that
//! move from one day to the next ([`decoder_core::sim::drift`]). With none
//! of them the array is stationary, as before.

use anyhow::{Result, bail};
use decoder_core::sim::drift::{ChannelEvent, DriftOptions};

#[derive(Clone, Debug, Default, clap::Args)]
pub struct WorldArgs {
    /// Seed of the drift (gains, which channels, direction changes).
    #[arg(long, default_value_t = 1)]
    pub drift_seed: u64,
    /// Each channel's rate ramps linearly from 1× to a factor drawn in
    /// MIN:MAX (for example 0.6:1.8) over --drift-ramp-min.
    #[arg(long, value_name = "MIN:MAX")]
    pub drift_gain: Option<String>,
    /// Minutes over which the rates ramp.
    #[arg(long, default_value_t = 60.0, value_name = "MINUTES")]
    pub drift_ramp_min: f64,
    /// A share of the channels fire nothing from minute FROM (to minute
    /// UNTIL, when given): for example 0.1@10 or 0.1@10-40.
    #[arg(long, value_name = "SHARE@FROM[-UNTIL]")]
    pub silent: Option<String>,
    /// Another share of the channels fire at --noisy-hz, unrelated to
    /// movement, from minute FROM (to UNTIL): for example 0.1@20.
    #[arg(long, value_name = "SHARE@FROM[-UNTIL]")]
    pub noisy: Option<String>,
    /// Rate of a noisy channel, Hz (before its refractory period).
    #[arg(long, default_value_t = 400.0)]
    pub noisy_hz: f64,
    /// Over-dispersed counts: each bin's rate times a gamma factor of this
    /// shape and mean 1 (smaller is more dispersed; variance μ + μ²/shape).
    #[arg(long, value_name = "SHAPE")]
    pub overdispersion: Option<f64>,
    /// Turn each preferred direction by a normal angle of this standard
    /// deviation, degrees (another day's array).
    #[arg(long, value_name = "DEGREES")]
    pub pd_change_deg: Option<f64>,
}

fn event(flag: &str, text: &str) -> Result<ChannelEvent> {
    let usage = || {
        format!(
            "{flag} {text:?}: expected SHARE@FROM or SHARE@FROM-UNTIL, for example 0.1@10 or 0.1@10-40 (share 0 to 1, minutes)"
        )
    };
    let Some((share, when)) = text.split_once('@') else {
        bail!(usage());
    };
    let (from, until) = match when.split_once('-') {
        Some((f, u)) => (f, Some(u)),
        None => (when, None),
    };
    let number = |s: &str| {
        s.trim()
            .parse::<f64>()
            .map_err(|_| anyhow::anyhow!(usage()))
    };
    Ok(ChannelEvent {
        share: number(share)?,
        from_minute: number(from)?,
        until_minute: until.map(number).transpose()?,
    })
}

impl WorldArgs {
    /// The drift these flags ask for; `None` when none is given.
    pub fn drift(&self) -> Result<Option<DriftOptions>> {
        let any = self.drift_gain.is_some()
            || self.silent.is_some()
            || self.noisy.is_some()
            || self.overdispersion.is_some()
            || self.pd_change_deg.is_some();
        if !any {
            return Ok(None);
        }
        let (gain_min, gain_max) = match &self.drift_gain {
            Some(g) => {
                let parsed = g
                    .split_once(':')
                    .and_then(|(a, b)| Some((a.trim().parse().ok()?, b.trim().parse().ok()?)));
                match parsed {
                    Some(p) => p,
                    None => bail!(
                        "--drift-gain {g:?}: expected MIN:MAX rate factors, for example 0.6:1.8"
                    ),
                }
            }
            None => (1.0, 1.0),
        };
        let options = DriftOptions {
            seed: self.drift_seed,
            gain_min,
            gain_max,
            ramp_minutes: self.drift_ramp_min,
            silent: self
                .silent
                .as_deref()
                .map(|s| event("--silent", s))
                .transpose()?,
            noisy: self
                .noisy
                .as_deref()
                .map(|s| event("--noisy", s))
                .transpose()?,
            noisy_hz: self.noisy_hz,
            overdispersion_shape: self.overdispersion,
            pd_change_deg: self.pd_change_deg.unwrap_or(0.0),
        };
        options.check().map_err(|e| anyhow::anyhow!("{e}"))?;
        Ok(Some(options))
    }
}
