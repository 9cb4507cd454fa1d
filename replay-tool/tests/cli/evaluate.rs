//! `evaluate`: the score table, the report files, goodness of fit, and sharded runs merged.

use super::*;

#[test]
fn evaluate_prints_both_decoders_and_writes_a_report() {
    let dir = tempfile::tempdir().unwrap();
    let block = fixture::block("1", "24", &[]);
    let report = dir.path().join("report");
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

/// `evaluate --click` cross-validates a click decoder on the block's cues
/// beside the velocity decoders and writes click.json.
#[test]
fn evaluate_with_click_scores_the_click_decoder() {
    let dir = tempfile::tempdir().unwrap();
    let block = fixture::block("1", "16", &["--click"]);
    let report = dir.path().join("r");
    let said = ok(&[
        "evaluate",
        "--session",
        p(&block),
        "--click",
        "--report",
        p(&report),
    ]);
    assert!(
        said.contains("click decoder (5 contiguous folds): AUC"),
        "{said}"
    );
    let c = json_file(&report.join("click.json"));
    for key in [
        "auc",
        "cues",
        "caught",
        "false_per_minute",
        "median_latency_ms",
        "catch_ms",
    ] {
        assert!(c.get(key).is_some(), "{key}: {c}");
    }
    assert!(c["auc"].as_f64().unwrap() > 0.6, "{c}");
    let err = fails_with(
        &[
            "evaluate",
            "--session",
            p(&fixture::block("1", "16", &[])),
            "--click",
        ],
        2,
    );
    assert!(err.contains("no click cues"), "{err}");
}
