//! `simulate`, `train`, `replay`, `model show` and the demo, as a user runs them.

use super::*;

#[test]
fn simulate_train_replay_and_show() {
    let dir = tempfile::tempdir().unwrap();
    // `simulate` as a user runs it, shared with the evaluation test.
    let block = fixture::block("1", "24", &[]);
    let model = dir.path().join("k.model");
    let est = dir.path().join("est.npy");
    let said = ok(&[
        "train",
        "--session",
        p(&block),
        "--decoder",
        "kalman",
        "--out",
        p(&model),
        "--lag",
        "0",
        "--ridge",
        "0",
    ]);
    assert!(said.contains("cross-validated"), "{said}");
    ok(&[
        "replay",
        "--session",
        p(&block),
        "--model",
        p(&model),
        "--out",
        p(&est),
    ]);
    let arr = Array2::<f64>::read_npy(std::fs::File::open(&est).unwrap()).unwrap();
    assert_eq!(arr.dim(), (3000, 2));

    let csv = dir.path().join("est.csv");
    ok(&[
        "replay",
        "--session",
        p(&block),
        "--model",
        p(&model),
        "--out",
        p(&csv),
    ]);
    let text = std::fs::read_to_string(&csv).unwrap();
    assert_eq!(text.lines().next(), Some("vel_x,vel_y"));
    assert_eq!(text.lines().count(), 3001);

    let json: serde_json::Value =
        serde_json::from_str(&ok(&["model", "show", p(&model), "--json"])).unwrap();
    assert_eq!(json["kind"], "kalman");
    assert_eq!(json["channels"], 24);
    assert_eq!(
        json["fit"]["options"]["ridge"], 0.0,
        "the --ridge flag is recorded"
    );
    assert_eq!(json["cv"]["folds"], 5);
    let summary = ok(&["model", "show", p(&model)]);
    assert!(
        summary.contains("data sha256") && summary.contains("cv vel_x"),
        "{summary}"
    );
}

#[test]
fn point_process_decoder_trains_replays_and_exports() {
    let dir = tempfile::tempdir().unwrap();
    let cal = dir.path().join("cal");
    ok(&[
        "simulate",
        "--out",
        p(&cal),
        "--minutes",
        "2",
        "--channels",
        "16",
    ]);
    let later = dir.path().join("later");
    ok(&[
        "simulate",
        "--out",
        p(&later),
        "--minutes",
        "0.5",
        "--channels",
        "16",
        "--seed",
        "4",
    ]);
    for (name, extra) in [("pp.model", None), ("lnp.model", Some("--no-history"))] {
        let model = dir.path().join(name);
        let mut args = vec![
            "train",
            "--session",
            p(&cal),
            "--decoder",
            "point-process",
            "--out",
            p(&model),
        ];
        args.extend(extra);
        let out = ok(&args);
        assert!(out.contains("16 channels fitted of 16"), "{out}");
        let shown = ok(&["model", "show", p(&model)]);
        assert!(shown.contains("point-process"), "{shown}");
        let json: serde_json::Value =
            serde_json::from_str(&ok(&["model", "show", p(&model), "--json"])).unwrap();
        assert_eq!(json["kind"], "point-process");
        for key in [
            "b0", "beta", "history", "A", "W", "x0", "P0", "state", "outputs",
        ] {
            assert!(!json[key].is_null(), "{key} missing");
        }
        assert_eq!(json["history_basis"].is_null(), extra.is_some());
        let est = dir.path().join(format!("{name}.npy"));
        let out = ok(&[
            "replay",
            "--session",
            p(&later),
            "--model",
            p(&model),
            "--out",
            p(&est),
        ]);
        // Decoding the later block from the same simulated array works.
        let cc: Vec<f64> = out
            .lines()
            .find(|l| l.contains("kinematics"))
            .unwrap()
            .split("CC ")
            .skip(1)
            .map(|w| {
                w.split(|c: char| c == ',' || c.is_whitespace())
                    .next()
                    .unwrap()
                    .parse()
                    .unwrap()
            })
            .collect();
        assert!(cc.iter().all(|&c| c > 0.5), "{name}: {out}");
    }
    // The daemon runs it unchanged: a closed-loop run through decoderd.
    let report = dir.path().join("cl");
    let out = ok(&[
        "closed-loop",
        "--model",
        p(&dir.path().join("pp.model")),
        "--time-scale",
        "0",
        "--trials",
        "4",
        "--report",
        p(&report),
    ]);
    assert!(out.contains("closed loop with"), "{out}");
}

/// A 3-D block given the default 2-D state trains, and says which
/// kinematics the decoder does not decode.
#[test]
fn training_says_which_kinematics_the_decoder_leaves_out() {
    let dir = tempfile::tempdir().unwrap();
    let block = dir.path().join("block3d");
    ok(&[
        "simulate",
        "--out",
        p(&block),
        "--minutes",
        "1",
        "--channels",
        "8",
    ]);
    let mut b = decoder_core::Block::read(&block).unwrap();
    let kin = b.kinematics.take().unwrap();
    let rows: Vec<Vec<f64>> = (0..b.n_bins)
        .map(|t| {
            let r: Vec<f64> = (0..kin.cols).map(|c| kin.get(t, c)).collect();
            vec![r[0], r[1], 0.5 * r[0], r[2], r[3], 0.5 * r[2]]
        })
        .collect();
    b.kinematics = Some(decoder_core::linalg::Mat::from_rows(&rows));
    b.kinematic_names = ["pos_x", "pos_y", "pos_z", "vel_x", "vel_y", "vel_z"]
        .map(String::from)
        .to_vec();
    b.write(&block).unwrap();
    let out = tool(&[
        "train",
        "--session",
        p(&block),
        "--decoder",
        "kalman",
        "--out",
        p(&dir.path().join("k.model")),
        "--no-cv",
    ]);
    assert!(out.status.success());
    let err = String::from_utf8_lossy(&out.stderr);
    assert!(
        err.contains("kinematics pos_z, vel_z are not decoded by the kalman decoder"),
        "{err}"
    );
    assert!(err.contains("[kalman] state and outputs"), "{err}");
}

#[test]
fn the_example_config_is_valid() {
    let cfg = concat!(env!("CARGO_MANIFEST_DIR"), "/../config/train.toml");
    let text = std::fs::read_to_string(cfg).unwrap();
    decoder_core::fit::config::TrainConfig::from_toml(&text, cfg).unwrap();
}

#[test]
fn demo_runs_the_daemon_live_and_the_recording_replays() {
    let dir = tempfile::tempdir().unwrap();
    let out = dir.path().join("demo");
    let stdout = ok(&[
        "demo",
        "--out",
        p(&out),
        "--minutes",
        "1",
        "--channels",
        "16",
        "--live-seconds",
        "2",
    ]);
    assert!(stdout.contains("streaming 100 bins"), "{stdout}");
    let line = stdout
        .lines()
        .find(|l| l.contains("reproduced"))
        .unwrap_or_else(|| panic!("no replay check in {stdout}"));
    // "offline replay of the recording reproduced N of N sent packets"
    let nums: Vec<u64> = line
        .split_whitespace()
        .filter_map(|w| w.parse().ok())
        .collect();
    assert_eq!(nums.len(), 2, "{line}");
    assert_eq!(nums[0], nums[1], "{line}");
    assert!(nums[0] >= 100, "{line}");
    assert!(stdout.contains("latency recv->send"), "{stdout}");
    let log = stdout
        .lines()
        .find_map(|l| l.trim().strip_prefix("recording -> "))
        .expect("the recording's path");
    assert!(Path::new(log).is_file(), "{log}");
}

/// `train --session A --session B` trains on both blocks as one
/// calibration set, names each in the model's provenance, and refuses
/// blocks that cannot be joined with the reason and the block.
#[test]
fn several_sessions_train_one_decoder_and_the_model_names_each() {
    let dir = tempfile::tempdir().unwrap();
    let a = fixture::block("1", "16", &[]);
    let b = fixture::block("1", "16", &["--seed", "9"]);
    let model = dir.path().join("ab.model");
    let said = ok(&[
        "train",
        "--session",
        p(&a),
        "--session",
        p(&b),
        "--decoder",
        "kalman",
        "--out",
        p(&model),
    ]);
    assert!(
        said.contains(&format!("block {}: 3000 rows", p(&b))),
        "{said}"
    );
    let shown: serde_json::Value =
        serde_json::from_str(&ok(&["model", "show", p(&model), "--json"])).unwrap();
    let blocks = shown["fit"]["blocks"].as_array().unwrap();
    let rows = |block: &Path| decoder_core::Block::read(block).unwrap().n_bins as u64;
    assert_eq!(blocks.len(), 2, "{shown}");
    assert_eq!(blocks[0]["session"].as_str().unwrap(), p(&a));
    assert_eq!(blocks[1]["rows"].as_u64().unwrap(), rows(&b));
    assert_ne!(blocks[0]["data_sha256"], blocks[1]["data_sha256"]);
    // Cross-validated on the joined blocks.
    assert!(shown["cv"]["folds"].as_u64().unwrap() >= 2);

    let other = fixture::block("1", "8", &[]);
    let err = fails_with(
        &[
            "train",
            "--session",
            p(&a),
            "--session",
            p(&other),
            "--decoder",
            "kalman",
            "--out",
            p(&dir.path().join("x.model")),
        ],
        2,
    );
    assert!(
        err.contains("block 2") && err.contains("8 channels, not 16"),
        "{err}"
    );
    let err = fails_with(
        &[
            "train",
            "--session",
            p(&a),
            "--session",
            p(&b),
            "--refit",
            "--decoder",
            "kalman",
            "--out",
            p(&dir.path().join("y.model")),
        ],
        2,
    );
    assert!(err.contains("--refit") && err.contains("once"), "{err}");

    // Per-block normalisation: recorded in the fit document, the offsets
    // the last block's means; the point-process fit refuses it by name.
    let per_block = dir.path().join("ab-per-block.model");
    ok(&[
        "train",
        "--session",
        p(&a),
        "--session",
        p(&b),
        "--decoder",
        "kalman",
        "--per-block",
        "--no-cv",
        "--out",
        p(&per_block),
    ]);
    let shown: serde_json::Value =
        serde_json::from_str(&ok(&["model", "show", p(&per_block), "--json"])).unwrap();
    assert_eq!(shown["fit"]["options"]["per_block"], true, "{shown}");
    let last = decoder_core::Block::read(&b).unwrap();
    let mean0 = (0..last.n_bins)
        .map(|t| f64::from(last.bin_counts(t)[0]))
        .sum::<f64>()
        / last.n_bins as f64;
    assert_eq!(shown["count_offset"][0].as_f64().unwrap(), mean0);
    let err = fails_with(
        &[
            "train",
            "--session",
            p(&a),
            "--session",
            p(&b),
            "--decoder",
            "point-process",
            "--per-block",
            "--out",
            p(&dir.path().join("z.model")),
        ],
        2,
    );
    assert!(
        err.contains("per-block") && err.contains("point-process"),
        "{err}"
    );
}

/// `simulate` draws a world that changes when asked: the channels the
/// drift picks go silent from the minute given, others fire fast and
/// unrelated to movement, and the block's notes say what was drawn; a flag
/// that cannot be read is refused with the form it takes.
#[test]
fn simulate_draws_a_drifting_array_when_asked() {
    let dir = tempfile::tempdir().unwrap();
    let out = dir.path().join("drift");
    ok(&[
        "simulate",
        "--out",
        p(&out),
        "--minutes",
        "2",
        "--channels",
        "8",
        "--silent",
        "0.25@1",
        "--noisy",
        "0.25@0.5-1.5",
        "--drift-gain",
        "0.6:1.8",
        "--drift-ramp-min",
        "2",
    ]);
    let block = decoder_core::Block::read(&out).unwrap();
    assert!(
        block
            .notes
            .as_ref()
            .unwrap()
            .contains("silent 25 % from minute 1")
    );
    let minute = 3000;
    let total = |ch: usize, from: usize, to: usize| -> u32 {
        (from..to).map(|t| u32::from(block.bin_counts(t)[ch])).sum()
    };
    let silent: Vec<usize> = (0..8)
        .filter(|&c| total(c, minute, 2 * minute) == 0)
        .collect();
    assert_eq!(silent.len(), 2, "{silent:?}");
    assert!(silent.iter().all(|&c| total(c, 0, minute) > 0));
    // Noisy from minute 0.5 to 1.5: about 4.4 spikes a bin, far above any
    // tuned channel's mean (under 1.5 a bin at 30 Hz and peak speed).
    let noisy: Vec<usize> = (0..8)
        .filter(|&c| total(c, minute * 3 / 4, minute * 5 / 4) > 3 * minute as u32 / 2)
        .collect();
    assert_eq!(noisy.len(), 2, "{noisy:?}");
    assert!(noisy.iter().all(|c| !silent.contains(c)));

    // The closed-loop user drifts the same way: with every channel silent
    // from the start the decoder has nothing to go on.
    let (_, model) = fixture::calibration_16();
    let report = dir.path().join("cl");
    closed_loop_fast(&model, "2", &["--silent", "1@0"], &report);
    let s = closed_loop_summary(&report);
    assert_eq!(s["success_rate"].as_f64().unwrap(), 0.0, "{s}");

    let e = fails_with(
        &[
            "simulate",
            "--out",
            p(&dir.path().join("x")),
            "--silent",
            "0.1",
        ],
        2,
    );
    assert!(e.contains("--silent") && e.contains("SHARE@FROM"), "{e}");
    let e = fails_with(
        &[
            "simulate",
            "--out",
            p(&dir.path().join("y")),
            "--drift-gain",
            "2:1",
        ],
        2,
    );
    assert!(e.contains("gain_max"), "{e}");

    // Click cues come with --click, and the options are checked by name.
    let clicks = dir.path().join("clicks");
    ok(&[
        "simulate",
        "--out",
        p(&clicks),
        "--minutes",
        "0.5",
        "--channels",
        "8",
        "--click",
        "--click-ms",
        "200",
    ]);
    let block = decoder_core::Block::read(&clicks).unwrap();
    let cued = block.click.unwrap().iter().filter(|c| **c).count();
    let trials = block.trials.unwrap().len();
    assert!(
        cued.abs_diff(10 * trials) <= trials,
        "{cued} cued, {trials} trials"
    );
    let e = fails_with(
        &[
            "simulate",
            "--out",
            p(&dir.path().join("z")),
            "--click",
            "--click-share",
            "2",
        ],
        2,
    );
    assert!(e.contains("click share"), "{e}");
}

/// `train --click` fits a click decoder from the block's click cues into
/// the same model file, beside the velocity decoder; a block without cues
/// is refused with what to provide.
#[test]
fn train_with_click_puts_a_click_decoder_beside_the_velocity_decoder() {
    let dir = tempfile::tempdir().unwrap();
    let block = fixture::block("1", "16", &["--click"]);
    let model = dir.path().join("vc.model");
    let said = ok(&[
        "train",
        "--session",
        p(&block),
        "--decoder",
        "kalman",
        "--click",
        "--out",
        p(&model),
        "--no-cv",
    ]);
    assert!(said.contains("click decoder: 6 lags"), "{said}");
    // Trained with --no-cv: the options are recorded, the scores are not.
    let shown_fit: serde_json::Value =
        serde_json::from_str(&ok(&["model", "show", p(&model), "--json"])).unwrap();
    assert_eq!(shown_fit["fit"]["click"]["lags"], 6);
    assert!(shown_fit["fit"]["click"]["cv"].is_null());
    let with_cv = dir.path().join("vc-cv.model");
    ok(&[
        "train",
        "--session",
        p(&block),
        "--decoder",
        "kalman",
        "--click",
        "--out",
        p(&with_cv),
    ]);
    let shown_cv: serde_json::Value =
        serde_json::from_str(&ok(&["model", "show", p(&with_cv), "--json"])).unwrap();
    let auc = shown_cv["fit"]["click"]["cv"]["auc"].as_f64().unwrap();
    assert!(auc > 0.6, "{}", shown_cv["fit"]["click"]);
    let shown: serde_json::Value =
        serde_json::from_str(&ok(&["model", "show", p(&model), "--json"])).unwrap();
    let click = &shown["click"];
    assert_eq!(click["kind"], "lda-hmm");
    assert_eq!(click["weights"].as_array().unwrap().len(), 6);
    assert_eq!(click["weights"][0].as_array().unwrap().len(), 16);
    let cued = decoder_core::Block::read(&block)
        .unwrap()
        .click
        .unwrap()
        .iter()
        .filter(|c| **c)
        .count() as f64;
    let prior = click["prior_click"].as_f64().unwrap();
    // The prior is the share of cued bins among the rows the discriminant
    // reads (all but the first 5).
    assert!((prior - cued / 2995.0).abs() < 1e-12, "{prior}");
    // The velocity decoder is the one trained without --click.
    let plain = fixture::kalman(&fixture::block("1", "16", &["--click"]));
    let plain: serde_json::Value =
        serde_json::from_str(&ok(&["model", "show", p(&plain), "--json"])).unwrap();
    assert_eq!(shown["H"], plain["H"]);
    assert!(plain["click"].is_null());

    // A session directory replays its clicks as a daemon armed throughout
    // would send them, with the gate of a daemon configuration.
    let estimates = dir.path().join("e.npy");
    let replay_clicks = |extra: &[&str]| {
        let out = dir.path().join("c.npy");
        let mut a = vec![
            "replay",
            "--session",
            p(&block),
            "--model",
            p(&model),
            "--out",
            p(&estimates),
            "--click-out",
            p(&out),
        ];
        a.extend_from_slice(extra);
        ok(&a);
        let t = npy_f64(&out);
        assert_eq!(t.nrows(), 3000);
        t.column(1).sum()
    };
    let default_clicks = replay_clicks(&[]);
    let strict = dir.path().join("strict.toml");
    std::fs::write(&strict, "[click]\nthreshold = 0.999\nhold_bins = 20\n").unwrap();
    let strict_clicks = replay_clicks(&["--config", p(&strict)]);
    assert!(
        default_clicks > 0.0 && strict_clicks < default_clicks,
        "{default_clicks} {strict_clicks}"
    );

    let err = fails_with(
        &[
            "train",
            "--session",
            p(&fixture::block("1", "16", &[])),
            "--decoder",
            "kalman",
            "--click",
            "--out",
            p(&dir.path().join("x.model")),
            "--no-cv",
        ],
        2,
    );
    assert!(
        err.contains("no click cues") && err.contains("click.npy"),
        "{err}"
    );
}
