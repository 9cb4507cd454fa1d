//! The simulated world that changes (`sim::drift`): each property checked
//! against what the options say, on blocks short enough for a test.

use decoder_core::sim::drift::{ChannelEvent, Drift, DriftOptions};
use decoder_core::sim::reaching::{SimOptions, population, simulate};
use decoder_core::sim::user::{SimulatedUser, TaskOptions};

const N: usize = 20;

fn options(drift: DriftOptions, minutes: f64) -> SimOptions {
    SimOptions {
        seed: 3,
        minutes,
        n_channels: N,
        drift: Some(drift),
        ..SimOptions::default()
    }
}

/// Mean count per bin of channel `ch` over bins `from..to`.
fn mean(block: &decoder_core::Block, ch: usize, from: usize, to: usize) -> f64 {
    (from..to)
        .map(|t| f64::from(block.bin_counts(t)[ch]))
        .sum::<f64>()
        / (to - from) as f64
}

#[test]
fn silent_channels_fire_nothing_and_noisy_ones_fire_at_their_rate_in_their_windows() {
    let drift = DriftOptions {
        silent: Some(ChannelEvent {
            share: 0.1,
            from_minute: 1.0,
            until_minute: Some(2.0),
        }),
        noisy: Some(ChannelEvent {
            share: 0.1,
            from_minute: 1.5,
            until_minute: None,
        }),
        noisy_hz: 400.0,
        ..DriftOptions::default()
    };
    let world = Drift::draw(&drift, N, 3).unwrap();
    let silent: Vec<usize> = (0..N).filter(|&c| world.is_silent_channel(c)).collect();
    let noisy: Vec<usize> = (0..N).filter(|&c| world.is_noisy_channel(c)).collect();
    assert_eq!((silent.len(), noisy.len()), (2, 2));
    assert!(silent.iter().all(|c| !noisy.contains(c)));
    let (block, _) = simulate(&options(drift, 3.0)).unwrap();
    let minute = 3000; // 20 ms bins
    for &c in &silent {
        assert!(mean(&block, c, 0, minute) > 0.0, "channel {c} before");
        assert_eq!(
            mean(&block, c, minute, 2 * minute),
            0.0,
            "channel {c} silent"
        );
        assert!(
            mean(&block, c, 2 * minute, 3 * minute) > 0.0,
            "channel {c} back"
        );
    }
    // A 400 Hz channel with a 2 ms absolute refractory period, drawn a ms
    // at a time: a spike every 1/p + 2 ms on average, p = 0.4 (the mean
    // of a geometric wait plus the dead time), 20 ms / 4.5 ms = 4.44 per
    // bin.
    let want = 20.0 / (1.0 / 0.4 + 2.0);
    for &c in &noisy {
        let got = mean(&block, c, minute * 3 / 2 + 10, 3 * minute);
        assert!(
            (got - want).abs() < 0.05 * want,
            "channel {c}: {got} per bin, want {want}"
        );
    }
}

#[test]
fn rates_ramp_to_their_drawn_gain_and_stay() {
    let drift = DriftOptions {
        seed: 11,
        gain_min: 0.6,
        gain_max: 1.8,
        ramp_minutes: 2.0,
        ..DriftOptions::default()
    };
    let gains = Drift::draw(&drift, N, 3).unwrap().final_gains().to_vec();
    assert!(gains.iter().all(|g| (0.6..1.8).contains(g)));
    let (drifting, _) = simulate(&options(drift, 6.0)).unwrap();
    let (still, _) = simulate(&SimOptions {
        drift: None,
        ..options(DriftOptions::default(), 6.0)
    })
    .unwrap();
    // The same movements and the same array: over the last four minutes
    // each channel's rate is its gain times the stationary rate (spikes
    // differ, so within sampling error: about 3 % for these rates).
    let (from, to) = (2 * 3000, 6 * 3000);
    for (c, g) in gains.iter().enumerate() {
        let ratio = mean(&drifting, c, from, to) / mean(&still, c, from, to);
        assert!(
            (ratio - g).abs() < 0.12 * g,
            "channel {c}: ratio {ratio}, gain {g}"
        );
    }
}

#[test]
fn over_dispersed_counts_have_the_gamma_poisson_variance() {
    // Gamma(k, 1/k) factors a bin make its count a gamma-Poisson mixture:
    // Fano factor 1 + μ/k (from memory: the negative binomial's variance
    // μ + μ²/k). Checked on 1 ms bins of a channel made noisy from the
    // start, whose rate does not depend on movement.
    let drift = DriftOptions {
        noisy: Some(ChannelEvent {
            share: 1.0,
            from_minute: 0.0,
            until_minute: None,
        }),
        noisy_hz: 100.0,
        overdispersion_shape: Some(0.5),
        ..DriftOptions::default()
    };
    let block = simulate(&SimOptions {
        seed: 5,
        minutes: 2.0,
        n_channels: 4,
        bin_width: decoder_core::bin_width::BinWidth::from_us(20_000).unwrap(),
        refractory_ms: 0,
        drift: Some(drift),
        ..SimOptions::default()
    })
    .unwrap()
    .0;
    for c in 0..4 {
        let x: Vec<f64> = (0..block.n_bins)
            .map(|t| f64::from(block.bin_counts(t)[c]))
            .collect();
        let m = x.iter().sum::<f64>() / x.len() as f64;
        let v = x.iter().map(|a| (a - m) * (a - m)).sum::<f64>() / (x.len() - 1) as f64;
        // μ = 2 a bin (100 Hz × 20 ms): Fano 1 + 2 / 0.5 = 5.
        let fano = v / m;
        assert!((m - 2.0).abs() < 0.15, "channel {c}: mean {m}");
        assert!((fano - 5.0).abs() < 0.8, "channel {c}: Fano {fano}");
    }
}

#[test]
fn preferred_directions_turn_by_the_drawn_angles_and_the_user_drifts_too() {
    let drift = DriftOptions {
        pd_change_deg: 20.0,
        silent: Some(ChannelEvent {
            share: 0.5,
            from_minute: 0.0,
            until_minute: None,
        }),
        ..DriftOptions::default()
    };
    let (_, turned) = simulate(&options(drift.clone(), 0.2)).unwrap();
    let original = population(1, N);
    let mut angles = Vec::new();
    for (a, b) in original.beta.iter().zip(&turned.beta) {
        let depth = |v: &[f64; 2]| v[0].hypot(v[1]);
        assert!((depth(a) - depth(b)).abs() < 1e-12, "depth kept");
        let mut d = b[1].atan2(b[0]) - a[1].atan2(a[0]);
        d = (d + std::f64::consts::PI).rem_euclid(2.0 * std::f64::consts::PI)
            - std::f64::consts::PI;
        angles.push(d.to_degrees());
    }
    let sd = (angles.iter().map(|a| a * a).sum::<f64>() / N as f64).sqrt();
    assert!(sd > 8.0 && sd < 35.0, "turned by sd {sd}°");

    // The closed-loop user lives in the same kind of world.
    let task = TaskOptions::default();
    let mut user = SimulatedUser::new(population(1, N), &task)
        .with_drift(&drift)
        .unwrap();
    let world = Drift::draw(&drift, N, task.seed).unwrap();
    let mut sums = [0u32; N];
    let mut counts = [0u16; N];
    for _ in 0..500 {
        user.bin_counts([10.0, 0.0], &mut counts);
        for (s, &c) in sums.iter_mut().zip(&counts) {
            *s += u32::from(c);
        }
    }
    for (c, s) in sums.iter().enumerate() {
        assert_eq!(
            *s == 0,
            world.is_silent_channel(c),
            "channel {c}: {s} spikes"
        );
    }
}

#[test]
fn options_out_of_range_are_refused_by_name() {
    let e = simulate(&options(
        DriftOptions {
            gain_min: 1.5,
            gain_max: 1.0,
            ..DriftOptions::default()
        },
        1.0,
    ))
    .unwrap_err()
    .to_string();
    assert!(e.contains("gain_max"), "{e}");
    let e = Drift::draw(
        &DriftOptions {
            silent: Some(ChannelEvent {
                share: 0.7,
                from_minute: 0.0,
                until_minute: None,
            }),
            noisy: Some(ChannelEvent {
                share: 0.5,
                from_minute: 0.0,
                until_minute: None,
            }),
            ..DriftOptions::default()
        },
        10,
        1,
    )
    .unwrap_err()
    .to_string();
    assert!(e.contains("silent + noisy"), "{e}");
}
