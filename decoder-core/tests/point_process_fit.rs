//! The point-process decoder's encoding models on a block where spike
//! history matters (1 ms bins, absolute and relative refractoriness): the
//! history GLMs pass the time-rescaling KS test where the LNP models fail,
//! and explain the held-out spikes better. Also: the decoder decodes.

use decoder_core::fit::evaluate::{DecoderSpec, cross_validate};
use decoder_core::fit::point_process::OneAfterAnother;
use decoder_core::fit::point_process::{HistoryOptions, PointProcessFitOptions};
use decoder_core::sim::reaching::{SimOptions, simulate};

#[test]
fn history_models_pass_the_ks_band_where_lnp_models_fail() {
    let (session, _) = simulate(&SimOptions {
        minutes: 1.5,
        n_channels: 8,
        bin_width: decoder_core::BinWidth::from_us(1000).unwrap(),
        refractory_ms: 3,
        recovery_ms: 15.0,
        ..SimOptions::default()
    })
    .unwrap();
    let lnp = PointProcessFitOptions {
        history: None,
        ..PointProcessFitOptions::default()
    };
    let history = PointProcessFitOptions {
        history: Some(HistoryOptions {
            n_basis: 8,
            span_bins: 80,
        }),
        ..PointProcessFitOptions::default()
    };
    let eval = cross_validate(
        &session,
        &[
            DecoderSpec::PointProcess(lnp),
            DecoderSpec::PointProcess(history),
        ],
        2,
        &OneAfterAnother,
        |_, _| {},
    )
    .unwrap();
    let (l, h) = (&eval.goodness[0], &eval.goodness[1]);
    assert_eq!(
        (l.decoder.as_str(), h.decoder.as_str()),
        ("pp-lnp", "pp-history")
    );
    let lnp_fails: Vec<usize> = l
        .channels
        .iter()
        .filter(|c| !c.within_band)
        .map(|c| c.channel)
        .collect();
    let rescued = lnp_fails
        .iter()
        .filter(|&&c| h.channels[c].within_band)
        .count();
    eprintln!(
        "LNP within band {}/8, history {}/8, rescued {rescued}/{}; bits/spike {:.3} vs {:.3}",
        l.within_band,
        h.within_band,
        lnp_fails.len(),
        l.mean_bits_per_spike,
        h.mean_bits_per_spike
    );
    assert!(
        lnp_fails.len() >= 6,
        "refractoriness should defeat most LNP models"
    );
    assert!(
        rescued * 4 >= lnp_fails.len() * 3,
        "history models pass on most of those"
    );
    // Held-out log-likelihood: higher with history, channel by channel.
    for (a, b) in l.channels.iter().zip(&h.channels) {
        assert!(
            b.bits_per_spike > a.bits_per_spike,
            "channel {}: {a:?} vs {b:?}",
            a.channel
        );
    }
    // Both still decode velocity.
    for d in &eval.decoders {
        assert!(
            d.mean.iter().all(|s| s.cc > 0.2),
            "{}: {:?}",
            d.decoder,
            d.mean
        );
    }
}

#[test]
fn an_absurd_rate_is_clamped_counted_and_stays_finite() {
    use decoder_core::decoders::DecoderModel;
    use decoder_core::decoders::point_process::{ChannelGlm, PointProcessModel};
    use decoder_core::formats::model_file::{ModelFile, Provenance};
    use decoder_core::linalg::Mat;
    let channel = |b0: f64| {
        Some(ChannelGlm {
            b0,
            beta: vec![0.1, -0.1],
            history: Vec::new(),
            coupling: Vec::new(),
            deviance: 0.0,
            null_deviance: 0.0,
            iterations: 0,
        })
    };
    let model = ModelFile {
        input: decoder_core::wire::packet::BinKind::Counts,
        bin_width: decoder_core::BinWidth::from_us(20000).unwrap(),
        decoder: DecoderModel::PointProcess(PointProcessModel {
            state: vec!["vel_x".into(), "vel_y".into()],
            outputs: vec!["vel_x".into(), "vel_y".into()],
            a: Mat::identity(2),
            w: Mat::identity(2),
            x0: vec![0.0, 0.0],
            p0: Mat::identity(2),
            // exp(45) expected spikes per bin: far past the ±30 clamp.
            channels: vec![channel(45.0), channel(-1.0)],
            excluded: Vec::new(),
            history_basis: None,
        }),
        provenance: Provenance::untracked(),
        click: None,
    };
    let mut p = model.pipeline().unwrap();
    let est = p.step(0, &[3, 1]);
    assert!(est.estimate.iter().all(|v| v.is_finite()));
    assert_eq!(p.rate_clamps(), 1);
}
