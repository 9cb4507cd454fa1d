//! The replay-tool binary as a user runs it: verbs, outputs, exit codes and
//! the messages for bad input.

use daemon_rig::protocol::{json_keys, protocol_table};
use std::path::{Path, PathBuf};
use std::process::{Command, Output};

use ndarray::Array2;
use ndarray_npy::ReadNpyExt;

fn tool(args: &[&str]) -> Output {
    Command::new(env!("CARGO_BIN_EXE_replay-tool"))
        .args(args)
        .output()
        .expect("runs")
}

fn ok(args: &[&str]) -> String {
    let out = tool(args);
    assert!(
        out.status.success(),
        "{args:?} failed: {}",
        String::from_utf8_lossy(&out.stderr)
    );
    String::from_utf8(out.stdout).unwrap()
}

fn fails_with(args: &[&str], code: i32) -> String {
    let out = tool(args);
    assert_eq!(
        out.status.code(),
        Some(code),
        "{args:?}: {}",
        String::from_utf8_lossy(&out.stderr)
    );
    let err = String::from_utf8(out.stderr).unwrap();
    assert_eq!(
        err.trim_end().lines().count(),
        1,
        "one-line message expected, got {err:?}"
    );
    err
}

fn p(path: &Path) -> &str {
    path.to_str().unwrap()
}

#[test]
fn simulate_train_replay_and_show() {
    let dir = tempfile::tempdir().unwrap();
    let block = dir.path().join("block");
    let model = dir.path().join("k.model");
    let est = dir.path().join("est.npy");
    ok(&[
        "simulate",
        "--out",
        p(&block),
        "--minutes",
        "1",
        "--channels",
        "24",
        "--seed",
        "3",
    ]);
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
fn evaluate_prints_both_decoders_and_writes_a_report() {
    let dir = tempfile::tempdir().unwrap();
    let block = dir.path().join("block");
    let report = dir.path().join("report");
    ok(&[
        "simulate",
        "--out",
        p(&block),
        "--minutes",
        "1",
        "--channels",
        "24",
    ]);
    let table = ok(&[
        "evaluate",
        "--session",
        p(&block),
        "--decoders",
        "kalman",
        "--folds",
        "3",
        "--report",
        p(&report),
    ]);
    assert!(
        table.contains("kalman") && table.contains("wiener") && table.contains("mean"),
        "{table}"
    );
    for f in [
        "scores.csv",
        "evaluation.json",
        "held-out-velocity.svg",
        "held-out-velocity.png",
    ] {
        let len = std::fs::metadata(report.join(f))
            .map(|m| m.len())
            .unwrap_or(0);
        assert!(len > 100, "{f} missing or empty");
    }
    let csv = std::fs::read_to_string(report.join("scores.csv")).unwrap();
    assert!(csv.starts_with("decoder,fold,output,cc,r2,rmse"));
    // evaluation.json has the fields PROTOCOL.md §12 lists.
    let eval = json_file(&report.join("evaluation.json"));
    assert_eq!(json_keys(&eval), protocol_table("evaluation-json"));
    assert_eq!(csv.lines().filter(|l| l.contains(",mean,")).count(), 4);
    // Both decoders must decode the simulated velocity, not only print a
    // row: the simulator's channels are cosine-tuned to velocity with a
    // modulation that a linear decoder recovers at CC well above 0.5 from
    // 24 channels (the demo's 96 reach about 0.9).
    for line in csv.lines().filter(|l| l.contains(",mean,")) {
        let f: Vec<&str> = line.split(',').collect();
        let (cc, r2): (f64, f64) = (f[3].parse().unwrap(), f[4].parse().unwrap());
        assert!(cc > 0.5 && cc <= 1.0 && r2 > 0.2, "{line}");
    }
}

#[test]
fn missing_session_is_a_user_error_naming_the_path() {
    let dir = tempfile::tempdir().unwrap();
    let e = fails_with(
        &[
            "train",
            "--session",
            "/no/such/block",
            "--decoder",
            "kalman",
            "--out",
            p(&dir.path().join("m")),
        ],
        2,
    );
    assert!(e.contains("/no/such/block"), "{e}");
    assert!(!dir.path().join("m").exists(), "no model file on failure");
}

#[test]
fn replay_with_the_wrong_array_names_both_channel_counts() {
    let dir = tempfile::tempdir().unwrap();
    let a = dir.path().join("a");
    let b = dir.path().join("b");
    let model = dir.path().join("a.model");
    ok(&[
        "simulate",
        "--out",
        p(&a),
        "--minutes",
        "0.5",
        "--channels",
        "16",
    ]);
    ok(&[
        "simulate",
        "--out",
        p(&b),
        "--minutes",
        "0.5",
        "--channels",
        "12",
    ]);
    ok(&[
        "train",
        "--session",
        p(&a),
        "--decoder",
        "wiener",
        "--out",
        p(&model),
        "--no-cv",
    ]);
    let out = dir.path().join("x.npy");
    let e = fails_with(
        &[
            "replay",
            "--session",
            p(&b),
            "--model",
            p(&model),
            "--out",
            p(&out),
        ],
        2,
    );
    assert!(e.contains("12 columns") && e.contains("16 channels"), "{e}");
    assert!(!out.exists());
}

#[test]
fn a_damaged_model_file_is_refused() {
    let dir = tempfile::tempdir().unwrap();
    let model = dir.path().join("bad.model");
    std::fs::write(&model, b"not a model at all").unwrap();
    let e = fails_with(&["model", "show", p(&model)], 2);
    assert!(
        e.contains("bad.model") && e.contains("not a model file"),
        "{e}"
    );
}

#[test]
fn bad_config_key_is_named() {
    let dir = tempfile::tempdir().unwrap();
    let block = dir.path().join("block");
    ok(&[
        "simulate",
        "--out",
        p(&block),
        "--minutes",
        "0.5",
        "--channels",
        "8",
    ]);
    let cfg = dir.path().join("train.toml");
    std::fs::write(&cfg, "[kalman]\nsteady_sate = true\n").unwrap();
    let e = fails_with(
        &[
            "train",
            "--session",
            p(&block),
            "--decoder",
            "kalman",
            "--out",
            p(&dir.path().join("m")),
            "--config",
            p(&cfg),
        ],
        2,
    );
    assert!(e.contains("train.toml") && e.contains("steady_sate"), "{e}");
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

/// Records a short live session with the demo and returns its log.
fn recorded_session(dir: &Path) -> std::path::PathBuf {
    let out = dir.join("demo");
    let stdout = ok(&[
        "demo",
        "--out",
        p(&out),
        "--minutes",
        "1",
        "--channels",
        "16",
        "--live-seconds",
        "1",
    ]);
    let log = stdout
        .lines()
        .find_map(|l| l.trim().strip_prefix("recording -> "))
        .expect("the recording's path");
    std::path::PathBuf::from(log)
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

/// Each word means one thing (PROTOCOL.md §5): a log is not a calibration
/// block, a directory is not a log, and a bad address names its flag.
#[test]
fn verbs_refuse_the_wrong_kind_of_input_and_name_the_flag() {
    let dir = tempfile::tempdir().unwrap();
    let log = dir.path().join("s.vdlog");
    std::fs::write(&log, b"not read").unwrap();
    let err = fails_with(
        &[
            "train",
            "--session",
            p(&log),
            "--decoder",
            "kalman",
            "--out",
            "m.model",
        ],
        2,
    );
    assert!(
        err.contains("not a session log") && err.contains("--session"),
        "{err}"
    );
    let err = fails_with(&["verify", p(dir.path())], 2);
    assert!(err.contains("not a session directory"), "{err}");
    let err = fails_with(
        &[
            "stream",
            "--session",
            p(dir.path()),
            "--daemon",
            "nowhere",
            "--actuator",
            "127.0.0.1:0",
        ],
        2,
    );
    assert!(err.contains("--daemon nowhere"), "{err}");
    let err = fails_with(
        &[
            "stream",
            "--session",
            p(dir.path()),
            "--daemon",
            "127.0.0.1:1",
            "--actuator",
            "127.0.0.1:0",
            "--time-scale",
            "0",
        ],
        2,
    );
    assert!(err.contains("--time-scale 0"), "{err}");
    for verb in ["stream", "bench", "closed-loop"] {
        let help = ok(&[verb, "--help"]);
        assert!(help.contains("attached to a person"), "{verb}: {help}");
    }
}

/// Damage in the middle fails the check (exit 1, with its offset); a torn
/// tail passes what it holds and says the check is partial.
#[test]
fn verify_tells_a_damaged_middle_from_a_torn_tail() {
    use decoder_core::formats::session_log::LogReader;
    let dir = tempfile::tempdir().unwrap();
    let log = recorded_session(dir.path());
    let bytes = std::fs::read(&log).unwrap();
    let mut reader = LogReader::open(&log).unwrap();
    let mut starts = vec![reader.offset()];
    while reader.next_record().is_some() {
        starts.push(reader.offset());
    }
    let middle = starts[starts.len() / 2] as usize;
    let mut damaged = bytes.clone();
    let past_the_end = (bytes.len() as u32).to_le_bytes();
    damaged[middle..middle + 4].copy_from_slice(&past_the_end);
    let damaged_path = dir.path().join("damaged.vdlog");
    std::fs::write(&damaged_path, &damaged).unwrap();
    let err = fails_with(&["verify", p(&damaged_path)], 1);
    assert!(
        err.contains(&format!("at byte {middle}")) && err.contains("intact record follows"),
        "{err}"
    );

    let last = starts[starts.len() - 2] as usize;
    let torn_path = dir.path().join("torn.vdlog");
    std::fs::write(&torn_path, &bytes[..last + 5]).unwrap();
    let out = ok(&["verify", p(&torn_path)]);
    assert!(
        out.contains("a partial check") && out.contains("the last 5 bytes"),
        "{out}"
    );
}

#[test]
fn verify_passes_on_a_recording_and_names_the_seq_of_a_changed_byte() {
    use decoder_core::formats::session_log::{LogReader, LogRecord};
    let dir = tempfile::tempdir().unwrap();
    let log = recorded_session(dir.path());
    let stdout = ok(&["verify", p(&log)]);
    assert!(stdout.contains("bit for bit"), "{stdout}");

    // Find the datagram record of the 20th bin.
    let mut reader = LogReader::open(&log).unwrap();
    let (offset, seq) = loop {
        let at = reader.offset();
        match reader.next_record().expect("enough records") {
            LogRecord::Datagram { bytes, .. } if bytes.len() > 40 => {
                let seq = u64::from_le_bytes(bytes[8..16].try_into().unwrap());
                if seq == 20 {
                    break (at as usize, seq);
                }
            }
            _ => {}
        }
    };
    let original = std::fs::read(&log).unwrap();
    // One byte of bin 20's counts: length 4 + crc 4 + kind 1 + recv_ns 8,
    // then the 32-byte bin header.
    let count_byte = offset + 4 + 4 + 1 + 8 + 32;

    // Changed on disk: the checksum catches it, at the right seq.
    let mut damaged = original.clone();
    damaged[count_byte] ^= 0x01;
    let bad = dir.path().join("damaged.vdlog");
    std::fs::write(&bad, &damaged).unwrap();
    let err = fails_with(&["verify", p(&bad)], 1);
    assert!(err.contains(&format!("seq {seq}")), "{err}");

    // Changed and re-sealed (checksum recomputed): the replay itself
    // disagrees with the recorded packet of that seq.
    let mut forged = original.clone();
    forged[count_byte] = forged[count_byte].wrapping_add(7);
    let len = u32::from_le_bytes(forged[offset..offset + 4].try_into().unwrap()) as usize;
    let crc = crc32fast::hash(&forged[offset + 8..offset + 8 + len]);
    forged[offset + 4..offset + 8].copy_from_slice(&crc.to_le_bytes());
    let forged_path = dir.path().join("forged.vdlog");
    std::fs::write(&forged_path, &forged).unwrap();
    let err = fails_with(&["verify", p(&forged_path)], 1);
    assert!(err.contains(&format!("seq {seq}: estimate")), "{err}");
}

fn json_file(path: &Path) -> serde_json::Value {
    serde_json::from_str(&std::fs::read_to_string(path).unwrap()).unwrap()
}

fn bench_p99(report: &Path) -> f64 {
    let s = json_file(&report.join("summary.json"));
    // summary.json has the fields PROTOCOL.md §12 lists.
    assert_eq!(json_keys(&s), protocol_table("bench-summary-json"));
    s["recv_to_send_us"]["p99"].as_f64().unwrap()
}

#[test]
fn bench_passes_a_budget_it_meets_and_fails_one_it_cannot() {
    let dir = tempfile::tempdir().unwrap();
    // The budget verdict is under test, not this machine's scheduling: a
    // wide deadline slack keeps a host stall from turning a bin late.
    let config = dir.path().join("daemon.toml");
    std::fs::write(&config, "[timing]\ndeadline_slack_bins = 4.0\n").unwrap();
    let first = dir.path().join("first");
    let base = [
        "bench",
        "--seconds",
        "1.5",
        "--channels",
        "16",
        "--config",
        p(&config),
    ];
    let mut args = base.to_vec();
    args.extend(["--report", p(&first)]);
    let stdout = ok(&args);
    assert!(stdout.contains("bench passed"), "{stdout}");
    for f in [
        "summary.json",
        "bins.csv",
        "report.html",
        "latency-histogram.svg",
        "latency-over-time.png",
    ] {
        assert!(first.join(f).is_file(), "{f}");
    }
    let measured = bench_p99(&first);
    assert!(measured > 0.0);
    let model = first.join("bench.model");
    let base = [
        "bench",
        "--seconds",
        "1.5",
        "--model",
        p(&model),
        "--config",
        p(&config),
    ];

    // A budget far above what this machine just measured passes ...
    let generous = format!("{}", measured * 100.0 + 10_000.0);
    let second = dir.path().join("second");
    let mut args = base.to_vec();
    args.extend(["--report", p(&second), "--budget-p99-us", &generous]);
    ok(&args);
    // ... and one far below it fails with exit 1.
    let tight = format!("{}", measured / 1000.0);
    let third = dir.path().join("third");
    let mut args = base.to_vec();
    args.extend(["--report", p(&third), "--budget-p99-us", &tight]);
    let err = fails_with(&args, 1);
    assert!(err.contains("over the budget"), "{err}");
    assert!(
        std::fs::read_to_string(third.join("report.html"))
            .unwrap()
            .contains("FAIL")
    );
}

fn closed_loop_summary(report: &Path) -> serde_json::Value {
    let s = json_file(&report.join("closed-loop.json"));
    // closed-loop.json has the fields PROTOCOL.md §12 lists.
    assert_eq!(json_keys(&s), protocol_table("closed-loop-json"));
    s["summary"].clone()
}

/// The session log the closed loop's spawned daemon recorded.
fn closed_loop_log(report: &Path) -> PathBuf {
    let s: serde_json::Value =
        serde_json::from_str(&std::fs::read_to_string(report.join("closed-loop.json")).unwrap())
            .unwrap();
    PathBuf::from(s["session_log"].as_str().expect("a session log"))
}

/// A decoder trained on the simulated array lets the simulated user reach
/// targets; one trained with the channels shuffled does not; a refit from
/// the good decoder's closed-loop block is at least as good and faster per
/// target. Every run is seeded and the loop turns as fast as it can
/// (bins early for their slots), so the outcomes repeat.
#[test]
fn simulated_user_succeeds_with_a_good_decoder_fails_with_a_shuffled_one_and_refit_helps() {
    let dir = tempfile::tempdir().unwrap();
    let cal = dir.path().join("cal");
    ok(&[
        "simulate",
        "--out",
        p(&cal),
        "--minutes",
        "3",
        "--channels",
        "32",
    ]);
    let good = dir.path().join("good.model");
    ok(&[
        "train",
        "--session",
        p(&cal),
        "--decoder",
        "kalman",
        "--out",
        p(&good),
        "--no-cv",
    ]);

    // The same block with its channel columns rotated by one: the decoder
    // reads every channel as its neighbour.
    let mut s = decoder_core::Block::read(&cal).unwrap();
    let n = s.n_channels;
    for row in s.counts.chunks_mut(n) {
        row.rotate_left(1);
    }
    let shuffled_dir = dir.path().join("shuffled");
    s.write(&shuffled_dir).unwrap();
    let shuffled = dir.path().join("shuffled.model");
    ok(&[
        "train",
        "--session",
        p(&shuffled_dir),
        "--decoder",
        "kalman",
        "--out",
        p(&shuffled),
        "--no-cv",
    ]);

    let run = |model: &Path, name: &str, seed: &str| {
        let report = dir.path().join(name);
        ok(&[
            "closed-loop",
            "--model",
            p(model),
            "--time-scale",
            "0",
            "--trials",
            "12",
            "--task-seed",
            seed,
            "--report",
            p(&report),
        ]);
        (closed_loop_summary(&report), report)
    };
    let (with_good, good_report) = run(&good, "cl-good", "3");
    let (with_shuffled, _) = run(&shuffled, "cl-shuffled", "3");
    let success = |v: &serde_json::Value| v["success_rate"].as_f64().unwrap();
    assert!(success(&with_good) >= 0.5, "{with_good}");
    assert!(success(&with_shuffled) <= 0.25, "{with_shuffled}");

    // The session log is the closed-loop block: its task packets give
    // cursor, shown velocity, targets and the radius.
    let refit = dir.path().join("refit.model");
    let log = closed_loop_log(&good_report);
    let out = ok(&[
        "train",
        "--session",
        p(&log),
        "--refit",
        "--decoder",
        "kalman",
        "--out",
        p(&refit),
        "--no-cv",
    ]);
    assert!(out.contains("intention re-estimated"), "{out}");
    // Judged on targets it was not refit on.
    let (seed_after, _) = run(&good, "cl-good-2", "4");
    let (refit_after, _) = run(&refit, "cl-refit", "4");
    assert!(
        success(&refit_after) >= success(&seed_after),
        "{refit_after} vs {seed_after}"
    );
    eprintln!("good {with_good}\nshuffled {with_shuffled}\nseed {seed_after}\nrefit {refit_after}");
    let per_target = |v: &serde_json::Value| v["mean_trial_time_s"].as_f64().unwrap();
    // Retraining with intention re-estimation must make targets faster
    // (Gilja et al. 2012 report the same direction in closed loop).
    assert!(
        per_target(&refit_after) < per_target(&seed_after),
        "{refit_after} vs {seed_after}"
    );
}

#[test]
fn stream_through_a_running_daemon_equals_offline_decoding() {
    let dir = tempfile::tempdir().unwrap();
    let cal = dir.path().join("cal");
    ok(&[
        "simulate",
        "--out",
        p(&cal),
        "--minutes",
        "1",
        "--channels",
        "16",
    ]);
    let model = dir.path().join("k.model");
    ok(&[
        "train",
        "--session",
        p(&cal),
        "--decoder",
        "kalman",
        "--out",
        p(&model),
        "--no-cv",
    ]);
    let block = dir.path().join("block");
    ok(&[
        "simulate",
        "--out",
        p(&block),
        "--minutes",
        "0.1",
        "--channels",
        "16",
        "--seed",
        "5",
    ]);
    // The running daemon (here on threads of this test) sends to `sink`.
    let sink = std::net::UdpSocket::bind("127.0.0.1:0")
        .unwrap()
        .local_addr()
        .unwrap();
    let daemon = daemon_rig::Launch::new(&model, &dir.path().join("d"), sink)
        .start()
        .unwrap();
    let target = daemon.listen.to_string();
    let sink_text = sink.to_string();
    let out = ok(&[
        "stream",
        "--session",
        p(&block),
        "--model",
        p(&model),
        "--daemon",
        &target,
        "--actuator",
        &sink_text,
        "--time-scale",
        "0.25",
    ]);
    assert!(
        out.contains("300 of 300 live estimates equal offline decoding bit for bit"),
        "{out}"
    );

    // Against another model, the same stream differs and the check fails.
    let other_cal = dir.path().join("other-cal");
    ok(&[
        "simulate",
        "--out",
        p(&other_cal),
        "--minutes",
        "1",
        "--channels",
        "16",
        "--seed",
        "9",
        "--array-seed",
        "2",
    ]);
    let other = dir.path().join("other.model");
    ok(&[
        "train",
        "--session",
        p(&other_cal),
        "--decoder",
        "kalman",
        "--out",
        p(&other),
        "--no-cv",
    ]);
    let err = fails_with(
        &[
            "stream",
            "--session",
            p(&block),
            "--model",
            p(&other),
            "--daemon",
            &target,
            "--actuator",
            &sink_text,
            "--time-scale",
            "0.25",
        ],
        1,
    );
    assert!(err.contains("differ"), "{err}");
    // And with the right model again, on the now used daemon: a new stream
    // resets it, and the check passes from the stream's first decoded bin.
    let out = ok(&[
        "stream",
        "--session",
        p(&block),
        "--model",
        p(&model),
        "--daemon",
        &target,
        "--actuator",
        &sink_text,
        "--time-scale",
        "0.25",
    ]);
    assert!(out.contains("299 of 299 live estimates equal"), "{out}");
    daemon.stop().unwrap();
}

#[test]
fn evaluate_compares_point_process_forms_with_goodness_of_fit() {
    let dir = tempfile::tempdir().unwrap();
    let block = dir.path().join("block");
    ok(&[
        "simulate",
        "--out",
        p(&block),
        "--minutes",
        "1",
        "--channels",
        "8",
        "--bin-ms",
        "1",
        "--refractory-ms",
        "3",
        "--recovery-ms",
        "15",
    ]);
    let cfg = dir.path().join("train.toml");
    std::fs::write(
        &cfg,
        "[point_process]\nhistory_basis = 8\nhistory_span_bins = 80\n",
    )
    .unwrap();
    let report = dir.path().join("report");
    let out = ok(&[
        "evaluate",
        "--session",
        p(&block),
        "--decoders",
        "kalman,point-process",
        "--folds",
        "2",
        "--config",
        p(&cfg),
        "--report",
        p(&report),
    ]);
    for name in ["kalman", "wiener", "pp-lnp", "pp-history"] {
        assert!(out.contains(name), "{name} missing from {out}");
    }
    assert!(out.contains("within the KS 95 % band"), "{out}");
    let csv = std::fs::read_to_string(report.join("goodness-of-fit.csv")).unwrap();
    assert_eq!(csv.lines().count(), 1 + 2 * 8, "{csv}");
    assert!(
        std::fs::read_to_string(report.join("ks-plots.svg"))
            .unwrap()
            .contains("<svg")
    );
}

/// A session recorded through the daemon with task packets is a
/// calibration block (PROTOCOL.md §5 `export`, §6): one row per slot, the
/// kinematics of the screen shown while each bin was counted, trials, valid
/// rows, and what the daemon sent; and `train --session LOG` trains on it
/// exactly as on its export.
#[test]
fn a_closed_loop_recording_exports_as_a_session_directory_and_trains() {
    let dir = tempfile::tempdir().unwrap();
    let cal = dir.path().join("cal");
    ok(&[
        "simulate",
        "--out",
        p(&cal),
        "--minutes",
        "1",
        "--channels",
        "16",
    ]);
    let model = dir.path().join("k.model");
    ok(&[
        "train",
        "--session",
        p(&cal),
        "--decoder",
        "kalman",
        "--out",
        p(&model),
        "--no-cv",
    ]);
    let report = dir.path().join("cl");
    ok(&[
        "closed-loop",
        "--model",
        p(&model),
        "--time-scale",
        "0",
        "--trials",
        "4",
        "--report",
        p(&report),
    ]);
    let summary: serde_json::Value =
        serde_json::from_str(&std::fs::read_to_string(report.join("closed-loop.json")).unwrap())
            .unwrap();
    let bins = summary["bins"].as_u64().unwrap() as usize;
    let log = closed_loop_log(&report);

    let out_dir = dir.path().join("exported");
    let said = ok(&["export", p(&log), "--out", p(&out_dir)]);
    assert!(said.contains(&format!("{bins} rows")), "{said}");
    let block = decoder_core::Block::read(&out_dir).unwrap();
    assert_eq!(block.n_bins, bins);
    // The streaming export writes what the in-memory reading of the log
    // (the one train and evaluate use) holds, byte for byte.
    let in_memory = dir.path().join("in-memory");
    decoder_core::formats::log_block::read_log_block(&log)
        .unwrap()
        .block
        .write(&in_memory)
        .unwrap();
    for f in [
        "manifest.toml",
        "counts.npy",
        "kinematics.npy",
        "trials.csv",
        "valid.npy",
    ] {
        assert_eq!(
            std::fs::read(out_dir.join(f)).unwrap(),
            std::fs::read(in_memory.join(f)).unwrap(),
            "{f}"
        );
    }
    assert_eq!(
        block.kinematic_names,
        ["pos_x", "pos_y", "vel_x", "vel_y"].map(String::from)
    );
    // Bin 0 was counted before any task packet: not valid. Every later bin
    // came (the user waits for each answer) and had a screen.
    let valid = block.valid.clone().unwrap();
    assert!(!valid[0]);
    assert!(valid[1..].iter().all(|v| *v), "{said}");
    let trials = block.trials.clone().unwrap();
    assert_eq!(trials.len(), 4);
    assert_eq!(trials[0].start_bin, 1);
    for t in &trials {
        assert!((t.target_x.hypot(t.target_y) - 10.0).abs() < 1e-9, "{t:?}");
    }

    // The shown velocity of row s is the command sent for bin s − 1 (the
    // task applied it, then drew the screen bin s was counted under).
    let read = |name: &str| {
        Array2::<f64>::read_npy(std::fs::File::open(out_dir.join(name)).unwrap()).unwrap()
    };
    let commands = read("commands.npy");
    let estimates = read("estimates.npy");
    assert_eq!(commands.dim(), (bins, 2));
    let kin = block.kinematics.as_ref().unwrap();
    for s in 1..bins {
        // Row s − 1 ended its trial when row s starts the next one; the
        // cursor resets, but the velocity shown is still that command.
        assert_eq!(kin.get(s, 2), commands[[s - 1, 0]], "row {s}");
        assert_eq!(kin.get(s, 3), commands[[s - 1, 1]], "row {s}");
    }
    // The estimates sent are what offline replay of the log computes.
    let replayed = dir.path().join("replayed.npy");
    ok(&["replay", "--session", p(&log), "--out", p(&replayed)]);
    let replayed = Array2::<f64>::read_npy(std::fs::File::open(&replayed).unwrap()).unwrap();
    assert_eq!(replayed, estimates);
    // So does the exported folder, valid.npy (NumPy's bool) and all.
    let from_folder = dir.path().join("replayed-folder.npy");
    ok(&[
        "replay",
        "--session",
        p(&out_dir),
        "--model",
        p(&model),
        "--out",
        p(&from_folder),
    ]);
    let from_folder = Array2::<f64>::read_npy(std::fs::File::open(&from_folder).unwrap()).unwrap();
    assert_eq!(from_folder, estimates);

    // Training on the log and on its export gives the same model.
    let from_log = dir.path().join("from-log.model");
    let from_dir = dir.path().join("from-dir.model");
    for (session, out) in [(&log, &from_log), (&out_dir, &from_dir)] {
        ok(&[
            "train",
            "--session",
            p(session),
            "--decoder",
            "kalman",
            "--out",
            p(out),
            "--no-cv",
        ]);
    }
    let show = |m: &Path| {
        let mut v: serde_json::Value =
            serde_json::from_str(&ok(&["model", "show", p(m), "--json"])).unwrap();
        v.as_object_mut().unwrap().remove("trained_at");
        v
    };
    assert_eq!(show(&from_log), show(&from_dir));
    // Evaluation reads the log too.
    let said = ok(&[
        "evaluate",
        "--session",
        p(&log),
        "--decoders",
        "kalman",
        "--folds",
        "2",
    ]);
    assert!(said.contains("kalman") && said.contains("wiener"), "{said}");
}

/// An adaptive closed-loop session (PROTOCOL.md §9): the spawned daemon
/// adapts with no operator action, and `verify` reproduces the session,
/// every update included, bit for bit.
#[test]
fn an_adaptive_closed_loop_session_verifies_bit_for_bit() {
    let dir = tempfile::tempdir().unwrap();
    let cal = dir.path().join("cal");
    ok(&[
        "simulate",
        "--out",
        p(&cal),
        "--minutes",
        "1",
        "--channels",
        "16",
    ]);
    let model = dir.path().join("k.model");
    ok(&[
        "train",
        "--session",
        p(&cal),
        "--decoder",
        "kalman",
        "--out",
        p(&model),
        "--no-cv",
    ]);
    let config = dir.path().join("daemon.toml");
    std::fs::write(&config, "[adaptation]\nbatch_s = 2.0\nhalf_life_s = 10.0\n").unwrap();
    let report = dir.path().join("cl");
    let said = ok(&[
        "closed-loop",
        "--model",
        p(&model),
        "--config",
        p(&config),
        "--adapt",
        "--time-scale",
        "0",
        "--trials",
        "6",
        "--report",
        p(&report),
    ]);
    assert!(said.contains("adaptation: ON"), "{said}");
    let s: serde_json::Value =
        serde_json::from_str(&std::fs::read_to_string(report.join("closed-loop.json")).unwrap())
            .unwrap();
    let updates = s["adaptation"]["updates"].as_u64().unwrap();
    assert!(updates >= 2, "{}", s["adaptation"]);
    let said = ok(&["verify", p(&closed_loop_log(&report))]);
    assert!(said.contains("bit for bit"), "{said}");
}

/// A recording made without a task computer holds no kinematics: train
/// says so and what to do.
#[test]
fn a_recording_without_task_packets_is_refused_for_training_with_the_reason() {
    let dir = tempfile::tempdir().unwrap();
    let cal = dir.path().join("cal");
    ok(&[
        "simulate",
        "--out",
        p(&cal),
        "--minutes",
        "0.5",
        "--channels",
        "16",
    ]);
    let model = dir.path().join("k.model");
    ok(&[
        "train",
        "--session",
        p(&cal),
        "--decoder",
        "kalman",
        "--out",
        p(&model),
        "--no-cv",
    ]);
    let report = dir.path().join("bench");
    // Any recording without a task computer will do; the bench's own
    // verdict (its latency budget on a loaded machine) is not under test.
    tool(&[
        "bench",
        "--model",
        p(&model),
        "--seconds",
        "1",
        "--report",
        p(&report),
    ]);
    let log = std::fs::read_dir(report.join("daemon").join("recordings"))
        .unwrap()
        .next()
        .unwrap()
        .unwrap()
        .path();
    let err = fails_with(
        &[
            "train",
            "--session",
            p(&log),
            "--decoder",
            "kalman",
            "--out",
            "m.model",
        ],
        2,
    );
    assert!(
        err.contains("no task packets") && err.contains("task_listen"),
        "{err}"
    );
    let said = ok(&["export", p(&log), "--out", p(&dir.path().join("e"))]);
    assert!(said.contains("no task packets"), "{said}");
}

/// A list of sessions split into shards and merged gives the same table
/// as the unsharded run; a merge with a shard missing says which.
#[test]
fn sharded_evaluation_merges_to_the_unsharded_result() {
    let dir = tempfile::tempdir().unwrap();
    let mut list = String::from("# three sessions, one per line\n");
    for seed in 1..=3 {
        let s = dir.path().join(format!("s{seed}"));
        ok(&[
            "simulate",
            "--out",
            p(&s),
            "--minutes",
            "0.4",
            "--channels",
            "12",
            "--seed",
            &seed.to_string(),
        ]);
        list.push_str(&format!("s{seed}\n"));
    }
    let list_path = dir.path().join("sessions.txt");
    std::fs::write(&list_path, list).unwrap();
    let run = |report: &Path, shard: &str| {
        ok(&[
            "evaluate",
            "--sessions",
            p(&list_path),
            "--shard",
            shard,
            "--decoders",
            "kalman",
            "--folds",
            "2",
            "--report",
            p(report),
        ])
    };
    let sharded = dir.path().join("sharded");
    run(&sharded, "2/2");
    // One shard missing: the merge names it and fails.
    let err = fails_with(&["evaluate", "--merge", p(&sharded)], 1);
    assert!(err.contains("1/2") && err.contains("not finished"), "{err}");
    run(&sharded, "1/2");
    let said = ok(&["evaluate", "--merge", p(&sharded)]);
    assert!(said.contains("merged 3 sessions from 2 shards"), "{said}");
    let whole = dir.path().join("whole");
    run(&whole, "1/1");
    ok(&["evaluate", "--merge", p(&whole)]);
    for f in ["scores.csv", "summary.csv"] {
        let a = std::fs::read_to_string(sharded.join(f)).unwrap();
        let b = std::fs::read_to_string(whole.join(f)).unwrap();
        assert_eq!(a, b, "{f}");
    }
    let table = std::fs::read_to_string(whole.join("scores.csv")).unwrap();
    // 3 sessions × 2 decoders (kalman and the Wiener baseline) × 2 outputs.
    assert_eq!(table.lines().count(), 1 + 3 * 2 * 2, "{table}");
    assert!(whole.join("cc-by-session.png").is_file());
    // Every session evaluates as `evaluate --session` does.
    let single = ok(&[
        "evaluate",
        "--session",
        p(&dir.path().join("s2")),
        "--decoders",
        "kalman",
        "--folds",
        "2",
    ]);
    let mean_line = single
        .lines()
        .find(|l| l.starts_with("kalman") && l.contains("mean") && l.contains("vel_x"))
        .unwrap()
        .to_string();
    let cc: f64 = mean_line
        .split_whitespace()
        .nth(3)
        .unwrap()
        .parse()
        .unwrap();
    let row = table
        .lines()
        .find(|l| l.starts_with("1,") && l.contains(",kalman,vel_x,"))
        .unwrap();
    let merged_cc: f64 = row.split(',').nth(4).unwrap().parse().unwrap();
    assert!((cc - merged_cc).abs() < 5e-4, "{mean_line} vs {row}");
    let err = fails_with(
        &[
            "evaluate",
            "--sessions",
            p(&list_path),
            "--shard",
            "3/2",
            "--report",
            p(&whole),
        ],
        2,
    );
    assert!(err.contains("--shard 3/2"), "{err}");
}

/// The NWB files `tests/reference/make_nwb.py` wrote with pynwb, and
/// numpy's view of them (`VDEC_NWB_DIR` points at a fresh set in CI).
fn nwb_dir() -> PathBuf {
    std::env::var_os("VDEC_NWB_DIR")
        .map(PathBuf::from)
        .unwrap_or_else(|| Path::new(env!("CARGO_MANIFEST_DIR")).join("../tests/data/nwb"))
}

fn npy_f64(path: &Path) -> Array2<f64> {
    Array2::<f64>::read_npy(std::fs::File::open(path).unwrap()).unwrap()
}

/// A Neurodata Without Borders file written by pynwb imports as numpy
/// reads it: counts equal `numpy.histogram` over the same edges, element
/// by element; kinematics equal `numpy.interp` at the bin centres and
/// edges (rtol 1e-12, atol 1e-12, the same arithmetic); trials by the
/// PROTOCOL.md §5 rule. Then the block trains and replays.
#[test]
fn an_nwb_file_written_by_pynwb_imports_as_numpy_bins_it_and_trains() {
    let src = nwb_dir();
    let dir = tempfile::tempdir().unwrap();
    let check = |name: &str, extra: &[&str]| {
        let out = dir.path().join(name);
        let mut args: Vec<String> = vec![
            "import".into(),
            p(&src.join("reach.nwb")).to_string(),
            "--out".into(),
            p(&out).to_string(),
            "--bin-ms".into(),
            "20".into(),
        ];
        args.extend(extra.iter().map(|s| s.to_string()));
        let args: Vec<&str> = args.iter().map(String::as_str).collect();
        let said = ok(&args);
        let block = decoder_core::Block::read(&out).unwrap();
        let want = Array2::<u16>::read_npy(
            std::fs::File::open(src.join(format!("{name}_counts.npy"))).unwrap(),
        )
        .unwrap();
        assert_eq!(block.n_bins, want.nrows(), "{said}");
        assert_eq!(block.counts, want.iter().copied().collect::<Vec<u16>>());
        let kin = npy_f64(&src.join(format!("{name}_kinematics.npy")));
        let got = block.kinematics.as_ref().unwrap();
        for (i, (g, w)) in got.data.iter().zip(kin.iter()).enumerate() {
            assert!(
                (g - w).abs() <= 1e-12 + 1e-12 * w.abs(),
                "kinematics element {i}: {g} vs numpy.interp {w}"
            );
        }
        assert_eq!(
            block.kinematic_names,
            ["pos_x", "pos_y", "vel_x", "vel_y"].map(String::from)
        );
        (block, out)
    };
    let (block, out) = check("reach", &[]);
    let trials = block.trials.clone().unwrap();
    let want = npy_f64(&src.join("reach_trials.npy"));
    assert_eq!(trials.len(), want.nrows());
    for (t, w) in trials.iter().zip(want.rows()) {
        assert_eq!(
            (t.start_bin as f64, t.end_bin as f64, t.target_x, t.target_y),
            (w[0], w[1], w[2], w[3])
        );
    }
    assert_eq!(block.channel_labels.as_ref().unwrap().len(), 6);
    check("window", &["--start", "1.0", "--stop", "5.0"]);
    // The imported block is a block like any other.
    let model = dir.path().join("k.model");
    ok(&[
        "train",
        "--session",
        p(&out),
        "--decoder",
        "kalman",
        "--out",
        p(&model),
        "--no-cv",
    ]);
    ok(&[
        "replay",
        "--session",
        p(&out),
        "--model",
        p(&model),
        "--out",
        p(&dir.path().join("e.npy")),
    ]);
}

#[test]
fn a_bad_nwb_file_gets_an_error_that_says_what_is_wrong() {
    let src = nwb_dir();
    let dir = tempfile::tempdir().unwrap();
    let out = dir.path().join("o");
    let run = |file: &str, extra: &[&str]| {
        let f = src.join(file);
        let mut args = vec!["import", p(&f), "--out", p(&out), "--bin-ms", "20"];
        args.extend_from_slice(extra);
        fails_with(&args, 2)
    };
    let e = run("no_units.nwb", &[]);
    assert!(
        e.contains("no_units.nwb") && e.contains("no units table"),
        "{e}"
    );
    let e = run("index_past.nwb", &[]);
    assert!(
        e.contains("spike_times_index") && e.contains("damaged"),
        "{e}"
    );
    let e = run("backwards.nwb", &[]);
    assert!(e.contains("timestamps go backwards at sample 100"), "{e}");
    let e = run(
        "reach.nwb",
        &["--position", "processing/behavior/Position/nothere"],
    );
    assert!(
        e.contains("--position") && e.contains("no such SpatialSeries"),
        "{e}"
    );
    assert!(!out.exists(), "nothing written for a bad file");
}
