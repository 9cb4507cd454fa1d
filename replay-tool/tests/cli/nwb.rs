//! `import` of Neurodata Without Borders files written by pynwb.

use super::*;

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

/// A file longer than the import's windows — more spike times per unit,
/// position samples and bins than one read or one written chunk holds —
/// imports to numpy's binning of the same file, element by element, with
/// the same tolerances as above.
#[test]
fn a_file_read_in_many_windows_imports_as_numpy_bins_it() {
    let src = nwb_dir();
    let dir = tempfile::tempdir().unwrap();
    let out = dir.path().join("long");
    let f = src.join("long.nwb");
    ok(&["import", p(&f), "--out", p(&out), "--bin-ms", "20"]);
    let block = decoder_core::Block::read(&out).unwrap();
    let want =
        Array2::<u16>::read_npy(std::fs::File::open(src.join("long_counts.npy")).unwrap()).unwrap();
    assert!(block.n_bins > 2 * 4096, "{} bins", block.n_bins);
    assert_eq!(block.n_bins, want.nrows());
    let counts: Vec<u16> = want.iter().copied().collect();
    if let Some(i) = (0..counts.len()).find(|&i| block.counts[i] != counts[i]) {
        panic!(
            "count at bin {}, channel {}: {} vs numpy.histogram {}",
            i / 3,
            i % 3,
            block.counts[i],
            counts[i]
        );
    }
    let kin = npy_f64(&src.join("long_kinematics.npy"));
    let got = block.kinematics.as_ref().unwrap();
    assert_eq!(got.data.len(), kin.len());
    for (i, (g, w)) in got.data.iter().zip(kin.iter()).enumerate() {
        assert!(
            (g - w).abs() <= 1e-12 + 1e-12 * w.abs(),
            "kinematics element {i}: {g} vs numpy.interp {w}"
        );
    }
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
    // Found while binning, after rows were written: nothing is left behind.
    let e = run("unsorted.nwb", &[]);
    assert!(
        e.contains("units row 2") && e.contains("spike_times go backwards"),
        "{e}"
    );
    assert!(!out.exists(), "nothing written for a bad file");
    assert_eq!(
        std::fs::read_dir(dir.path()).unwrap().count(),
        0,
        "no staging directory left behind"
    );
    // An existing directory is never written over.
    std::fs::create_dir(&out).unwrap();
    std::fs::write(out.join("keep.txt"), "a recording").unwrap();
    let e = run("reach.nwb", &[]);
    assert!(e.contains("already exists"), "{e}");
    assert!(out.join("keep.txt").is_file());
}
