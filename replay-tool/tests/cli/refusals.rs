//! Bad input: each refusal names the file, flag or key, in one line, with exit code 2.

use super::*;

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
    assert!(
        e.contains("has 12 channels") && e.contains("expects 16"),
        "{e}"
    );
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
