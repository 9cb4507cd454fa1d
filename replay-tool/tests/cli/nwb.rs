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

/// A session recorded through the daemon leaves as a Neurodata Without
/// Borders file: the arrays equal the export folder's (read back here with
/// the HDF5 reader, and by pynwb with its warnings as errors plus the NWB
/// inspector when `VDEC_REFERENCE_PYTHON` names the reference
/// environment's python, as CI does), and `import` reads the file back to
/// the same counts, byte for byte.
#[test]
fn a_session_exports_to_nwb_that_pynwb_reads_and_imports_back_to_the_same_counts() {
    let dir = tempfile::tempdir().unwrap();
    // A velocity-and-click model, selecting by click.
    let model = fixture::kalman_with_click(&fixture::block("1", "16", &["--click"]));
    let report = dir.path().join("cl");
    closed_loop_fast(&model, "3", &["--select", "click"], &report);
    let log = closed_loop_log(&report);
    let meta = dir.path().join("meta.toml");
    std::fs::write(
        &meta,
        r#"[subject]
subject_id = "demo-07"
species = "Macaca mulatta"
sex = "M"
age = "P7Y"
description = "synthetic subject of the demo scenario"

[session]
session_description = "centre-out reaching, velocity Kalman decoder, synthetic"
experimenter = ["Rig, Operator"]
institution = "Demo Institute"
lab = "Closed-loop rig"
keywords = ["velocity decoding", "closed loop"]
"#,
    )
    .unwrap();
    let folder = dir.path().join("folder");
    let nwb = dir.path().join("session.nwb");
    let said = ok(&[
        "export",
        p(&log),
        "--out",
        p(&folder),
        "--nwb",
        p(&nwb),
        "--metadata",
        p(&meta),
    ]);
    assert!(said.contains("Neurodata Without Borders"), "{said}");

    // Read back with the HDF5 reader: the decoder's series equal the
    // folder's arrays, and the root says what it is.
    let f = hdf5_pure::File::open(&nwb).unwrap();
    let attrs = f.root().attrs().unwrap();
    assert_eq!(
        attrs.get("neurodata_type").and_then(|a| a.as_str()),
        Some("NWBFile")
    );
    let estimates = npy_f64(&folder.join("estimates.npy"));
    let got = f
        .dataset("processing/decoder/estimate/data")
        .unwrap()
        .read_f64()
        .unwrap();
    assert_eq!(got, estimates.iter().copied().collect::<Vec<f64>>());
    let subject = f
        .dataset("general/subject/species")
        .unwrap()
        .read_string()
        .unwrap();
    assert_eq!(subject, ["Macaca mulatta"]);

    // The click decoder's output, as the packets carried it (the replay of
    // the log writes the same).
    let clicks = dir.path().join("clicks.npy");
    ok(&[
        "replay",
        "--session",
        p(&log),
        "--out",
        p(&dir.path().join("e.npy")),
        "--click-out",
        p(&clicks),
    ]);
    let replayed = npy_f64(&clicks);
    let prob = f
        .dataset("processing/decoder/click_probability/data")
        .unwrap()
        .read_f64()
        .unwrap();
    let flag = f
        .dataset("processing/decoder/click/data")
        .unwrap()
        .read_u8()
        .unwrap();
    assert_eq!(prob, replayed.column(0).to_vec());
    assert_eq!(
        flag.iter().map(|&c| f64::from(c)).collect::<Vec<_>>(),
        replayed.column(1).to_vec()
    );

    // import reads it back to the same counts.
    let back = dir.path().join("back");
    ok(&["import", p(&nwb), "--out", p(&back), "--bin-ms", "20"]);
    assert_eq!(
        std::fs::read(back.join("counts.npy")).unwrap(),
        std::fs::read(folder.join("counts.npy")).unwrap()
    );
    let wrong = fails_with(
        &[
            "import",
            p(&nwb),
            "--out",
            p(&dir.path().join("w")),
            "--bin-ms",
            "10",
        ],
        2,
    );
    assert!(
        wrong.contains("binned at 20 ms") && wrong.contains("--bin-ms 20"),
        "{wrong}"
    );

    // A metadata file with a key NWB does not have is refused by name.
    std::fs::write(
        &meta,
        "[subject]\nspecies = \"Macaca mulatta\"\nweight = 9\n",
    )
    .unwrap();
    let e = fails_with(
        &[
            "export",
            p(&log),
            "--nwb",
            p(&dir.path().join("x.nwb")),
            "--metadata",
            p(&meta),
        ],
        2,
    );
    assert!(e.contains("meta.toml") && e.contains("weight"), "{e}");

    if let Some(python) = std::env::var_os("VDEC_REFERENCE_PYTHON") {
        let script =
            Path::new(env!("CARGO_MANIFEST_DIR")).join("../tests/reference/check_nwb_export.py");
        let out = std::process::Command::new(python)
            .arg(&script)
            .arg(&nwb)
            .arg(&folder)
            .arg("--with-metadata")
            .output()
            .unwrap();
        let said = String::from_utf8_lossy(&out.stdout);
        assert!(
            out.status.success(),
            "{said}{}",
            String::from_utf8_lossy(&out.stderr)
        );
        assert!(said.contains("nothing CRITICAL"), "{said}");
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
        e.contains("no_units.nwb") && e.contains("no units table") && e.contains("binned counts"),
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
