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
use crate::decoders::kalman::filter::{ReducedTerms, Reducer};
use crate::decoders::kalman::{KalmanError, KalmanFilter};
use crate::decoders::point_process::{PointProcessError, PointProcessFilter};
use crate::decoders::wiener::WienerFilter;
use crate::engine::drift::{DriftSettings, DriftTracker};
use crate::wire::packet::{BinKind, BinValues};

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
    /// Drift handling ([`crate::engine::drift`]), once configured.
    drift: Option<DriftTracker>,
    /// The model's training mean count per bin (and variance, for a
    /// decoder that normalises counts): where drift tracking starts.
    reference: (Vec<f64>, Option<Vec<f64>>),
    /// Whether baselines and bias follow (the decoder is armed).
    tracking: bool,
    /// The last bin's flags: (predicted only, numerical fault).
    last_flags: (bool, bool),
    /// What the model decodes: counts, or continuous features.
    input: BinKind,
    /// A bin's features as f64 (a model of features), reused.
    values: Vec<f64>,
    /// Leaving channels out of a Kalman filter: see [`ReductionRequest`].
    reduction: Reduction,
}

/// A Kalman filter's change of the channels left out, on its way: judged
/// at one bin, in effect from a later one (`drift.left_out_after_s`), its
/// reduced terms built meanwhile wherever the caller likes. The bin it
/// takes effect at depends on the bins alone, so a replay and the live
/// decode change at the same bin, whoever built the terms.
#[derive(Clone, Debug, Default)]
struct Reduction {
    /// (generation, seq from which the change is in effect).
    pending: Option<(u64, u64)>,
    /// The channels the pending change leaves out.
    wanted: Vec<bool>,
    generation: u64,
    /// Terms built elsewhere, with the generation they were built for.
    offered: Option<(u64, ReducedTerms)>,
    /// Terms replaced, for the caller to drop off the decode path.
    spent: Option<ReducedTerms>,
    applied: u64,
    built_at_the_bin: u64,
}

/// What to build for a pending change of the channels left out
/// ([`DecodePipeline::reduction_request`]).
#[derive(Clone, Debug)]
pub struct ReductionRequest {
    pub generation: u64,
    /// The seq whose decode first uses the terms.
    pub due: u64,
    pub left_out: Vec<bool>,
    pub reducer: std::sync::Arc<Reducer>,
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
        let (engine, d, reference) = match decoder {
            DecoderModel::Kalman(k) => {
                let filter = KalmanFilter::new(k, use_steady_state)?;
                let outputs = k.output_indices()?;
                let d = outputs.len();
                (Engine::Kalman { filter, outputs }, d, kalman_reference(k))
            }
            DecoderModel::Wiener(w) => (
                Engine::Wiener(WienerFilter::new(w)),
                w.outputs.len(),
                (w.mean_counts.clone(), None),
            ),
            DecoderModel::PointProcess(m) => {
                let filter = PointProcessFilter::new(m)?;
                let outputs = m.output_indices()?;
                let d = outputs.len();
                let mut rates = vec![0.0; m.n_channels()];
                filter.expected_counts(&m.x0, &mut rates);
                (Engine::PointProcess { filter, outputs }, d, (rates, None))
            }
        };
        let mut p = DecodePipeline {
            engine,
            n_channels: decoder.n_channels(),
            bin_width,
            estimate: vec![0.0; d],
            last_seq: None,
            click: None,
            drift: None,
            reference,
            tracking: true,
            last_flags: (false, false),
            input: BinKind::Counts,
            values: Vec::new(),
            reduction: Reduction::default(),
        };
        p.reset();
        Ok(p)
    }

    /// The same pipeline decoding bins of `input` (a model trained on
    /// features decodes features). Only the Kalman and Wiener decoders
    /// read features; the model file refuses any other pairing before a
    /// pipeline is built.
    pub fn with_input(mut self, input: BinKind) -> DecodePipeline {
        self.input = input;
        self.values = match input {
            BinKind::Counts => Vec::new(),
            BinKind::Features => vec![0.0; self.n_channels],
        };
        if input == BinKind::Features {
            // Drift handling follows counts (silence, saturation, count
            // baselines); a pipeline of features runs without it.
            self.drift = None;
            self.apply_left_out();
        }
        self
    }

    /// What the pipeline decodes.
    pub fn input(&self) -> BinKind {
        self.input
    }

    /// Decodes one bin of either kind ([`DecodePipeline::step`] for
    /// counts, [`DecodePipeline::step_features`] for features).
    pub fn step_bin(&mut self, seq: u64, values: BinValues<'_>) -> BinEstimate<'_> {
        match values {
            BinValues::Counts(c) => self.step(seq, c),
            BinValues::Features(f) => self.step_features(seq, f),
        }
    }

    /// Decodes one bin of features (a model trained on features): each
    /// value as f64, into the Kalman or Wiener filter as counts would go.
    pub fn step_features(&mut self, seq: u64, features: &[f32]) -> BinEstimate<'_> {
        assert_eq!(
            features.len(),
            self.n_channels,
            "bin has the wrong channel count"
        );
        assert_eq!(
            self.input,
            BinKind::Features,
            "a pipeline of counts was handed features"
        );
        for (v, &f) in self.values.iter_mut().zip(features) {
            *v = f64::from(f);
        }
        let updated = match &mut self.engine {
            Engine::Kalman { filter, .. } => filter.step_values(&self.values),
            Engine::Wiener(w) => {
                w.step_values(&self.values);
                true
            }
            Engine::PointProcess { .. } => {
                unreachable!("a point-process model of features is refused when it is read")
            }
        };
        self.finish(seq, false, !updated)
    }

    /// Sets up drift handling with `settings` (on when `settings.enabled`),
    /// `saturation_count` marking a saturated channel; from the training
    /// statistics, every channel in. Allocates: call it when a pipeline is
    /// built or handling is switched, not per bin.
    pub fn configure_drift(&mut self, settings: DriftSettings, saturation_count: u16) {
        let enabled = settings.enabled && self.input == BinKind::Counts;
        self.drift = enabled.then(|| {
            DriftTracker::new(
                settings,
                self.bin_width,
                saturation_count,
                self.reference.0.clone(),
                self.reference.1.clone(),
                self.estimate.len(),
            )
        });
        self.reduction.pending = None;
        self.reduction.offered = None;
        self.apply_left_out();
    }

    /// The drift tracker, when drift handling is on.
    pub fn drift(&self) -> Option<&DriftTracker> {
        self.drift.as_ref()
    }

    /// Whether baselines and bias follow the bins (while armed).
    pub fn set_tracking(&mut self, tracking: bool) {
        self.tracking = tracking;
    }

    /// Hands the tracker's left-out channels to the filter.
    fn apply_left_out(&mut self) {
        // Allocates only when drift handling is off (at configuration,
        // never at a bin whose channels changed).
        let none;
        let flags = match self.drift.as_ref() {
            Some(t) => t.left_out(),
            None => {
                none = vec![false; self.n_channels];
                &none[..]
            }
        };
        match &mut self.engine {
            Engine::Kalman { filter, .. } => filter.set_left_out(flags),
            // The tracker hands it the training mean of a channel left out.
            Engine::Wiener(_) => {}
            Engine::PointProcess { filter, .. } => filter.set_left_out(flags),
        }
    }

    /// The tracker left channels out or brought them back at `seq`. A
    /// Kalman filter takes the change from `seq + left_out_lag_bins`
    /// (meanwhile the tracker feeds a channel newly out its training
    /// mean); the other decoders at once.
    fn left_out_changed(&mut self, seq: u64) {
        let Some(t) = self.drift.as_ref() else {
            return;
        };
        let lag = t.left_out_lag_bins();
        if !matches!(self.engine, Engine::Kalman { .. }) || lag == 0 {
            self.reduction.pending = None;
            self.apply_left_out();
            return;
        }
        let r = &mut self.reduction;
        r.wanted.clear();
        r.wanted.extend_from_slice(t.left_out());
        r.generation += 1;
        r.pending = Some((r.generation, seq.wrapping_add(lag)));
        if let Some((_, old)) = r.offered.take() {
            r.spent = Some(old);
        }
    }

    /// Puts a pending change of the channels left out in place when `seq`
    /// is its bin or later: the terms offered for it, else built here.
    fn land_reduction(&mut self, seq: u64) {
        let Some((generation, due)) = self.reduction.pending else {
            return;
        };
        // seq ≥ due on the circle of u64 seqs.
        if seq.wrapping_sub(due) > u64::MAX / 2 {
            return;
        }
        let Engine::Kalman { filter, .. } = &mut self.engine else {
            return;
        };
        let r = &mut self.reduction;
        let terms = match r.offered.take() {
            Some((g, t)) if g == generation => t,
            other => {
                if let Some((_, stale)) = other {
                    r.spent = Some(stale);
                }
                r.built_at_the_bin += 1;
                filter.reducer().terms(&r.wanted)
            }
        };
        r.spent = Some(filter.apply_reduced(terms));
        r.applied += 1;
        r.pending = None;
    }

    /// The pending change of the channels left out, for a worker to build
    /// its terms ([`Reducer::terms`]) and hand them back with
    /// [`DecodePipeline::offer_reduction`] before its bin; `None` when
    /// nothing is pending. Allocates (the flags): call it when
    /// [`DecodePipeline::pending_reduction`] shows a new generation.
    pub fn reduction_request(&self) -> Option<ReductionRequest> {
        let (generation, due) = self.reduction.pending?;
        let Engine::Kalman { filter, .. } = &self.engine else {
            return None;
        };
        Some(ReductionRequest {
            generation,
            due,
            left_out: self.reduction.wanted.clone(),
            reducer: filter.reducer(),
        })
    }

    /// The generation of the pending change of the channels left out, if
    /// any; cheap, to poll every slot.
    pub fn pending_reduction(&self) -> Option<u64> {
        self.reduction.pending.map(|(g, _)| g)
    }

    /// Terms built for the change of generation `generation`: kept for its
    /// bin, or handed back when that change is no longer pending.
    pub fn offer_reduction(
        &mut self,
        generation: u64,
        terms: ReducedTerms,
    ) -> Option<ReducedTerms> {
        match self.reduction.pending {
            Some((g, _)) if g == generation && terms.left_out() == self.reduction.wanted => {
                self.reduction.offered = Some((generation, terms));
                None
            }
            _ => Some(terms),
        }
    }

    /// Terms the filter no longer uses, for the caller to drop where
    /// freeing them costs the decode nothing.
    pub fn take_spent_reduction(&mut self) -> Option<ReducedTerms> {
        self.reduction.spent.take()
    }

    /// Changes of the channels left out put in place, and how many of
    /// those had their terms built at their bin because none had been
    /// offered in time.
    pub fn reductions(&self) -> (u64, u64) {
        (self.reduction.applied, self.reduction.built_at_the_bin)
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
        self.land_reduction(seq);
        let changed = match self.drift.as_mut() {
            Some(t) => t.observe(counts, self.tracking),
            None => false,
        };
        if changed {
            self.left_out_changed(seq);
        }
        let updated = if let Some(t) = self.drift.as_ref() {
            let values = t.values();
            match &mut self.engine {
                Engine::Kalman { filter, .. } => filter.step_values(values),
                Engine::Wiener(w) => {
                    w.step_values(values);
                    true
                }
                // A point-process filter reads counts; the channels left
                // out are dropped inside it.
                Engine::PointProcess { filter, .. } => filter.step(counts),
            }
        } else {
            match &mut self.engine {
                Engine::Kalman { filter, .. } => filter.step(counts),
                Engine::Wiener(w) => {
                    w.step(counts);
                    true
                }
                Engine::PointProcess { filter, .. } => filter.step(counts),
            }
        };
        if let Some(c) = self.click.as_mut() {
            c.step(counts);
        }
        self.finish(seq, false, !updated)
    }

    /// A bin that never came: advance the model without counts.
    pub fn predict_only(&mut self, seq: u64) -> BinEstimate<'_> {
        self.land_reduction(seq);
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

    /// The outcome of the last bin fed in, again (as `step` or
    /// `predict_only` returned it).
    pub fn last_estimate(&self) -> BinEstimate<'_> {
        let (predicted_only, numerical_fault) = self.last_flags;
        BinEstimate {
            seq: self.last_seq.unwrap_or(0),
            estimate: &self.estimate,
            predicted_only,
            numerical_fault,
            click_prob: self.click.as_ref().map(ClickFilter::probability),
        }
    }

    fn finish(&mut self, seq: u64, predicted_only: bool, fault: bool) -> BinEstimate<'_> {
        self.last_seq = Some(seq);
        let mut finite = self.copy_estimate();
        if finite && let Some(t) = self.drift.as_mut() {
            t.correct_velocity(&mut self.estimate, self.tracking && !predicted_only);
            finite = self.estimate.iter().all(|v| v.is_finite());
            if !finite {
                self.estimate.fill(0.0);
            }
        }
        self.last_flags = (predicted_only, fault || !finite);
        self.last_estimate()
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

/// A Kalman model's training mean count per bin per channel — `offset +
/// scale·(H x0)`, x0 being the training mean state — and, when it
/// normalises counts (a scale other than 1), the training variance scale².
fn kalman_reference(k: &crate::decoders::kalman::KalmanModel) -> (Vec<f64>, Option<Vec<f64>>) {
    let d = k.state_dim();
    let mean = (0..k.n_channels())
        .map(|c| {
            let hx: f64 = (0..d).map(|j| k.h.get(c, j) * k.x0[j]).sum();
            k.count_offset[c] + k.count_scale[c] * hx
        })
        .collect();
    let var = k
        .count_scale
        .iter()
        .any(|&s| s != 1.0)
        .then(|| k.count_scale.iter().map(|s| s * s).collect());
    (mean, var)
}
