//! The one decode pipeline: what happens to one bin's counts, identically in
//! the daemon and in offline replay.
//!
//! A [`DecodePipeline`] is built once from a model file (all allocation
//! happens there) and then fed bins in order, `step` for a bin whose counts
//! arrived and `predict_only` for a bin that never came. It keeps no clock
//! and does no I/O, so the same bins give the same estimates bit for bit
//! wherever it runs.

use crate::bin_width::BinWidth;
use crate::decoders::DecoderModel;
use crate::decoders::click::ClickFilter;
use crate::decoders::kalman::{KalmanError, KalmanFilter};
use crate::decoders::point_process::{PointProcessError, PointProcessFilter};
use crate::decoders::wiener::WienerFilter;

// One value per loaded model, never per bin: boxing would buy nothing.
#[allow(clippy::large_enum_variant)]
#[derive(Clone, Debug)]
enum Engine {
    Kalman {
        filter: KalmanFilter,
        outputs: Vec<usize>,
    },
    Wiener(WienerFilter),
    PointProcess {
        filter: PointProcessFilter,
        outputs: Vec<usize>,
    },
}

/// The outcome of one bin.
#[derive(Clone, Copy, Debug, PartialEq)]
pub struct BinEstimate<'a> {
    pub seq: u64,
    /// Decoded velocity, one value per output.
    pub estimate: &'a [f64],
    /// No counts for this bin: the estimate is the model's prediction alone.
    pub predicted_only: bool,
    /// The filter could not update (singular covariance) or produced a value
    /// that is not finite; a supervisor must treat the estimate as unusable.
    pub numerical_fault: bool,
    /// The click decoder's probability after this bin, when the model has
    /// one.
    pub click_prob: Option<f64>,
}

/// One decoder ready to run bin by bin: the filter of whichever kind the
/// model is (Kalman, steady-state Kalman, Wiener, point process), with the
/// model's channel count, bin width and output components. Each bin it
/// takes the counts (`step`) or nothing (`predict_only`, a bin that never
/// came) and gives the estimate of the output components, flagging a
/// numerical fault instead of returning a value that is not finite. It
/// holds no clock and allocates nothing after it is built; the slot engine
/// owns one and swaps it whole at a model change.
#[derive(Clone, Debug)]
pub struct DecodePipeline {
    engine: Engine,
    n_channels: usize,
    bin_width: BinWidth,
    estimate: Vec<f64>,
    last_seq: Option<u64>,
    /// The model's click decoder, run on the same bins.
    click: Option<ClickFilter>,
}

/// Why a checked model still cannot be run: the Kalman filter's noise
/// terms do not invert, or its steady-state gain does not converge.
#[derive(Clone, Debug, PartialEq, thiserror::Error)]
pub enum PipelineError {
    #[error(transparent)]
    Kalman(#[from] KalmanError),
    #[error(transparent)]
    PointProcess(#[from] PointProcessError),
}

impl DecodePipeline {
    /// A pipeline for `decoder` at `bin_width`; `use_steady_state` picks the
    /// steady-state gain when the model has one (the default for models
    /// trained with it). A model file builds its pipeline through this
    /// (`ModelFile::pipeline`).
    pub fn from_decoder(
        decoder: &DecoderModel,
        bin_width: BinWidth,
        use_steady_state: bool,
    ) -> Result<DecodePipeline, PipelineError> {
        let (engine, d) = match decoder {
            DecoderModel::Kalman(k) => {
                let filter = KalmanFilter::new(k, use_steady_state)?;
                let outputs = k.output_indices()?;
                let d = outputs.len();
                (Engine::Kalman { filter, outputs }, d)
            }
            DecoderModel::Wiener(w) => (Engine::Wiener(WienerFilter::new(w)), w.outputs.len()),
            DecoderModel::PointProcess(m) => {
                let filter = PointProcessFilter::new(m)?;
                let outputs = m.output_indices()?;
                let d = outputs.len();
                (Engine::PointProcess { filter, outputs }, d)
            }
        };
        let mut p = DecodePipeline {
            engine,
            n_channels: decoder.n_channels(),
            bin_width,
            estimate: vec![0.0; d],
            last_seq: None,
            click: None,
        };
        p.reset();
        Ok(p)
    }

    /// Whether the model runs a click decoder.
    pub fn has_click(&self) -> bool {
        self.click.is_some()
    }

    /// The same pipeline with a click decoder beside the velocity decoder.
    pub fn with_click(mut self, click: Option<ClickFilter>) -> DecodePipeline {
        self.click = click;
        self
    }

    pub fn n_channels(&self) -> usize {
        self.n_channels
    }

    pub fn bin_width(&self) -> BinWidth {
        self.bin_width
    }

    pub fn n_outputs(&self) -> usize {
        self.estimate.len()
    }

    /// Times the point-process filter clamped a rate's exponent since this
    /// pipeline was built (0 for the other decoders).
    pub fn rate_clamps(&self) -> u64 {
        match &self.engine {
            Engine::PointProcess { filter, .. } => filter.clamps(),
            _ => 0,
        }
    }

    /// The seq of the last bin fed in, if any since the last reset.
    pub fn last_seq(&self) -> Option<u64> {
        self.last_seq
    }

    /// Back to the model's initial state (a new stream or block).
    pub fn reset(&mut self) {
        match &mut self.engine {
            Engine::Kalman { filter, .. } => filter.reset(),
            Engine::Wiener(w) => w.reset(),
            Engine::PointProcess { filter, .. } => filter.reset(),
        }
        self.last_seq = None;
        if let Some(c) = self.click.as_mut() {
            c.reset();
        }
        self.copy_estimate();
    }

    /// Decodes one bin. `counts` must have the model's channel count (the
    /// daemon and the session reader check this before a bin gets here).
    pub fn step(&mut self, seq: u64, counts: &[u16]) -> BinEstimate<'_> {
        assert_eq!(
            counts.len(),
            self.n_channels,
            "bin has the wrong channel count"
        );
        let updated = match &mut self.engine {
            Engine::Kalman { filter, .. } => filter.step(counts),
            Engine::Wiener(w) => {
                w.step(counts);
                true
            }
            Engine::PointProcess { filter, .. } => filter.step(counts),
        };
        if let Some(c) = self.click.as_mut() {
            c.step(counts);
        }
        self.finish(seq, false, !updated)
    }

    /// A bin that never came: advance the model without counts.
    pub fn predict_only(&mut self, seq: u64) -> BinEstimate<'_> {
        match &mut self.engine {
            Engine::Kalman { filter, .. } => filter.predict_only(),
            Engine::Wiener(w) => w.predict_only(),
            Engine::PointProcess { filter, .. } => filter.predict_only(),
        }
        if let Some(c) = self.click.as_mut() {
            c.predict_only();
        }
        self.finish(seq, true, false)
    }

    fn finish(&mut self, seq: u64, predicted_only: bool, fault: bool) -> BinEstimate<'_> {
        self.last_seq = Some(seq);
        let finite = self.copy_estimate();
        BinEstimate {
            seq,
            estimate: &self.estimate,
            predicted_only,
            numerical_fault: fault || !finite,
            click_prob: self.click.as_ref().map(ClickFilter::probability),
        }
    }

    /// Copies the engine's outputs into `estimate`; false if any is not
    /// finite, and then the estimate reads as zeros: a value that is not a
    /// number never leaves the pipeline, in a packet or in a replay.
    fn copy_estimate(&mut self) -> bool {
        match &self.engine {
            Engine::Kalman { filter, outputs } => {
                let x = filter.state();
                for (e, &i) in self.estimate.iter_mut().zip(outputs) {
                    *e = x[i];
                }
            }
            Engine::Wiener(w) => self.estimate.copy_from_slice(w.estimate()),
            Engine::PointProcess { filter, outputs } => {
                let x = filter.state();
                for (e, &i) in self.estimate.iter_mut().zip(outputs) {
                    *e = x[i];
                }
            }
        }
        let finite = self.estimate.iter().all(|v| v.is_finite());
        if !finite {
            self.estimate.fill(0.0);
        }
        finite
    }
}
