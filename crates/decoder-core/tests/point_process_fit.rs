//! The point-process decoder's encoding models on a block where spike
//! history matters (1 ms bins, absolute and relative refractoriness): the
//! history GLMs pass the time-rescaling KS test where the LNP models fail,
//! and explain the held-out spikes better. Also: the decoder decodes.

use decoder_core::evaluate::{DecoderSpec, cross_validate};
use decoder_core::pp_fit::{HistoryOptions, PointProcessFitOptions};
use decoder_core::simulate::{SimOptions, simulate};

#[test]
fn history_models_pass_the_ks_band_where_lnp_models_fail() {
    let (session, _) = simulate(&SimOptions {
        minutes: 1.5,
        n_channels: 8,
        bin_ms: 1.0,
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
