//! `simulate --click`: click attempts at the start of each hold in the
//! target, cued in `click.npy`, during which the array's click channels
//! fire faster; a click decoder trained on such a block separates them.

use decoder_core::Block;
use decoder_core::decoders::click::logistic;
use decoder_core::fit::click::{fit_click, lagged_rows};
use decoder_core::sim::reaching::{
    ClickSim, SimOptions, click_channels, simulate, simulate_to_dir,
};

fn options() -> SimOptions {
    SimOptions {
        seed: 21,
        minutes: 4.0,
        n_channels: 16,
        click: Some(ClickSim::default()),
        ..SimOptions::default()
    }
}

#[test]
fn click_bins_are_cued_and_click_channels_fire_at_their_gain_in_them() {
    let (block, _) = simulate(&options()).unwrap();
    let click = block.click.as_ref().unwrap();
    let trials = block.trials.as_ref().unwrap().len();
    // 300 ms attempts in 20 ms bins: 15 bins a trial, give or take the bin
    // that straddles each edge.
    let cued = click.iter().filter(|c| **c).count();
    assert!(
        cued.abs_diff(15 * trials) <= trials,
        "{cued} cued bins, {trials} trials"
    );
    // Against bins where the hand is still and no click is cued, the click
    // channels fire at about twice their rate (ClickSim::default().gain),
    // the others at about the same rate.
    let kin = block.kinematics.as_ref().unwrap();
    let still = |t: usize| kin.get(t, 2).hypot(kin.get(t, 3)) < 0.5;
    let chosen = click_channels(1, 16, 0.25);
    assert_eq!(chosen.iter().filter(|c| **c).count(), 4);
    for (ch, is_click) in chosen.iter().enumerate() {
        let mean = |pick: &dyn Fn(usize) -> bool| {
            let bins: Vec<usize> = (0..block.n_bins).filter(|&t| pick(t)).collect();
            bins.iter()
                .map(|&t| f64::from(block.bin_counts(t)[ch]))
                .sum::<f64>()
                / bins.len() as f64
        };
        let during = mean(&|t| click[t]);
        let rest = mean(&|t| !click[t] && still(t));
        let want = if *is_click { 2.0 } else { 1.0 };
        let ratio = during / rest;
        assert!(
            (ratio - want).abs() < 0.2 * want,
            "channel {ch}: ratio {ratio}, want {want}"
        );
    }
}

#[test]
fn the_written_block_has_the_same_click_cues_and_a_click_decoder_separates_them() {
    let dir = tempfile::tempdir().unwrap();
    simulate_to_dir(&options(), dir.path()).unwrap();
    let written = Block::read(dir.path()).unwrap();
    let (block, _) = simulate(&options()).unwrap();
    assert_eq!(written.click, block.click);
    assert_eq!(written.counts, block.counts);

    // In-sample area under the ROC curve of the discriminant's posteriors
    // over the last 120 ms: the share of (click, rest) pairs ranked the
    // right way. Chance is 0.5; this small array (4 click channels of 16,
    // their rate doubled, beside tuning that moves every rate) gives 0.89.
    let click = block.click.unwrap();
    let model = fit_click(&block.counts, 16, &click, 6, 0.05).unwrap();
    let (x, y) = lagged_rows(&block.counts, 16, &click, 6);
    let score: Vec<f64> = x
        .iter()
        .map(|r| {
            logistic(
                model.intercept
                    + r.iter()
                        .zip(&model.weights)
                        .map(|(a, b)| a * b)
                        .sum::<f64>(),
            )
        })
        .collect();
    let auc = decoder_core::fit::click::roc_auc(&score, &y);
    assert!(auc > 0.85, "AUC {auc}");
}

#[test]
fn a_block_without_clicks_is_drawn_as_before() {
    let plain = SimOptions {
        click: None,
        ..options()
    };
    let (a, _) = simulate(&plain).unwrap();
    assert!(a.click.is_none());
    // The click channels change only the rates during attempts: the
    // movement (and so the kinematics and trials) is the same.
    let (b, _) = simulate(&options()).unwrap();
    assert_eq!(a.kinematics, b.kinematics);
    assert_eq!(a.trials, b.trials);
}

/// Cross-validated on a simulated block: the click probability separates
/// the cues on held-out bins, most attempts are caught within 300 ms of
/// their end, and false clicks are rare.
#[test]
fn cross_validated_clicks_are_caught_and_rarely_false() {
    use decoder_core::decoders::click::ClickGate;
    use decoder_core::fit::click::cross_validate_click;
    let (block, _) = simulate(&SimOptions {
        n_channels: 32,
        ..options()
    })
    .unwrap();
    let click = block.click.unwrap();
    let gate = ClickGate::new(0.9, 5, 25);
    let s =
        cross_validate_click(&block.counts, 32, &click, 6, 0.05, 5, &gate, 20.0, 300.0).unwrap();
    // Measured: AUC 0.91, 96 of 107 attempts caught (median 160 ms from
    // the cue), 2.25 false clicks a minute, with a gate of p ≥ 0.9 for 5
    // bins and 500 ms refractory, on 32 channels of which 8 click.
    assert!(s.auc > 0.85, "{s:?}");
    assert!(s.caught as f64 >= 0.8 * s.cues as f64, "{s:?}");
    assert!(s.false_per_minute < 4.0, "{s:?}");
}
