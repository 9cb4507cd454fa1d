//! Every bad session directory gets an error that names the file and the
//! problem. Each test writes a good block, breaks one thing, and checks the
//! message a rig engineer would read.

use std::path::Path;

use decoder_core::fit::kalman::{KalmanFitOptions, fit_kalman};
use decoder_core::formats::block::Block;
use decoder_core::sim::reaching::{SimOptions, simulate};
use decoder_core::{BlockError, TrainError};
use ndarray::Array2;
use ndarray_npy::write_npy;

fn good_block(dir: &Path) -> Block {
    let (s, _) = simulate(&SimOptions {
        minutes: 0.2,
        n_channels: 8,
        ..SimOptions::default()
    })
    .unwrap();
    s.write(dir).unwrap();
    s
}

fn read_err(dir: &Path) -> String {
    match Block::read(dir) {
        Ok(_) => panic!("expected an error for {}", dir.display()),
        Err(e) => e.to_string(),
    }
}

#[test]
fn a_good_block_reads_back_identically() {
    let dir = tempfile::tempdir().unwrap();
    let written = good_block(dir.path());
    assert_eq!(Block::read(dir.path()).unwrap(), written);
}

#[test]
fn missing_counts_file_is_named() {
    let dir = tempfile::tempdir().unwrap();
    good_block(dir.path());
    std::fs::remove_file(dir.path().join("counts.npy")).unwrap();
    let e = read_err(dir.path());
    assert!(e.contains("counts.npy") && e.contains("missing"), "{e}");
}

#[test]
fn row_count_mismatch_names_both_files() {
    let dir = tempfile::tempdir().unwrap();
    let s = good_block(dir.path());
    write_npy(
        dir.path().join("kinematics.npy"),
        &Array2::<f64>::zeros((s.n_bins - 3, 4)),
    )
    .unwrap();
    let e = read_err(dir.path());
    assert!(
        e.contains("kinematics.npy")
            && e.contains("counts.npy")
            && e.contains(&format!("{}", s.n_bins - 3)),
        "{e}"
    );
}

#[test]
fn column_count_mismatch_names_the_manifest_key() {
    let dir = tempfile::tempdir().unwrap();
    let s = good_block(dir.path());
    write_npy(
        dir.path().join("kinematics.npy"),
        &Array2::<f64>::zeros((s.n_bins, 3)),
    )
    .unwrap();
    let e = read_err(dir.path());
    assert!(e.contains("3 columns") && e.contains("kinematics"), "{e}");
}

#[test]
fn float_counts_are_refused_as_non_integer() {
    let dir = tempfile::tempdir().unwrap();
    let s = good_block(dir.path());
    write_npy(
        dir.path().join("counts.npy"),
        &Array2::<f64>::zeros((s.n_bins, 8)),
    )
    .unwrap();
    let e = read_err(dir.path());
    assert!(
        e.contains("counts.npy") && e.contains("float64") && e.contains("integer"),
        "{e}"
    );
}

#[test]
fn negative_count_names_bin_and_channel() {
    let dir = tempfile::tempdir().unwrap();
    let s = good_block(dir.path());
    let mut counts = Array2::<i32>::zeros((s.n_bins, 8));
    counts[(5, 2)] = -1;
    write_npy(dir.path().join("counts.npy"), &counts).unwrap();
    let e = read_err(dir.path());
    assert!(e.contains("negative count -1 at bin 5, channel 2"), "{e}");
}

#[test]
fn any_integer_dtype_is_accepted() {
    let dir = tempfile::tempdir().unwrap();
    let s = good_block(dir.path());
    let as_i64 = Array2::from_shape_vec(
        (s.n_bins, 8),
        s.counts.iter().map(|&c| i64::from(c)).collect(),
    )
    .unwrap();
    write_npy(dir.path().join("counts.npy"), &as_i64).unwrap();
    let back = Block::read(dir.path()).unwrap();
    assert_eq!(back.counts, s.counts);
    assert_eq!(
        back.data_sha256(),
        s.data_sha256(),
        "the hash is of the values, not the dtype"
    );
}

#[test]
fn nan_in_kinematics_names_bin_and_column() {
    let dir = tempfile::tempdir().unwrap();
    let s = good_block(dir.path());
    let mut kin = Array2::<f64>::zeros((s.n_bins, 4));
    kin[(7, 3)] = f64::NAN;
    write_npy(dir.path().join("kinematics.npy"), &kin).unwrap();
    let e = read_err(dir.path());
    assert!(
        e.contains("kinematics.npy") && e.contains("bin 7") && e.contains("vel_y"),
        "{e}"
    );
}

#[test]
fn zero_bin_width_names_the_key() {
    let dir = tempfile::tempdir().unwrap();
    good_block(dir.path());
    let m = std::fs::read_to_string(dir.path().join("manifest.toml"))
        .unwrap()
        .replace("bin_ms = 20.0", "bin_ms = 0.0");
    std::fs::write(dir.path().join("manifest.toml"), m).unwrap();
    let e = read_err(dir.path());
    assert!(e.contains("manifest.toml") && e.contains("bin_ms"), "{e}");
}

#[test]
fn misspelt_manifest_key_is_named() {
    let dir = tempfile::tempdir().unwrap();
    good_block(dir.path());
    let m = std::fs::read_to_string(dir.path().join("manifest.toml"))
        .unwrap()
        .replace("bin_ms", "bin_width");
    std::fs::write(dir.path().join("manifest.toml"), m).unwrap();
    let e = read_err(dir.path());
    assert!(
        e.contains("manifest.toml") && e.contains("bin_width"),
        "{e}"
    );
}

#[test]
fn empty_block_is_refused() {
    let dir = tempfile::tempdir().unwrap();
    good_block(dir.path());
    write_npy(dir.path().join("counts.npy"), &Array2::<u16>::zeros((0, 8))).unwrap();
    let e = read_err(dir.path());
    assert!(e.contains("counts.npy") && e.contains("empty"), "{e}");
}

#[test]
fn trial_outside_the_block_names_the_line() {
    let dir = tempfile::tempdir().unwrap();
    let s = good_block(dir.path());
    let csv = format!(
        "trial,start_bin,end_bin,target_x,target_y\n0,0,10,1.0,0.0\n1,20,{},0.0,1.0\n",
        s.n_bins + 5
    );
    std::fs::write(dir.path().join("trials.csv"), csv).unwrap();
    let e = read_err(dir.path());
    assert!(
        e.contains("trials.csv") && e.contains("line 3") && e.contains("trial 1"),
        "{e}"
    );
}

#[test]
fn unknown_kinematic_column_lists_the_available_ones() {
    let dir = tempfile::tempdir().unwrap();
    good_block(dir.path());
    let s = Block::read(dir.path()).unwrap();
    let opts = KalmanFitOptions {
        state: vec!["vel_z".into(), "1".into()],
        outputs: vec!["vel_z".into()],
        ..Default::default()
    };
    let e = fit_kalman(&s, &opts).unwrap_err();
    assert!(matches!(e, TrainError::UnknownKinematic { .. }));
    let msg = e.to_string();
    assert!(msg.contains("vel_z") && msg.contains("vel_x"), "{msg}");
}

#[test]
fn a_directory_that_is_not_there_says_so() {
    let e = Block::read(Path::new("/nonexistent/block")).unwrap_err();
    assert!(matches!(e, BlockError::Missing { .. }), "{e}");
}

#[test]
fn valid_rows_round_trip_and_a_wrong_valid_file_is_named() {
    let dir = tempfile::tempdir().unwrap();
    let mut s = good_block(dir.path());
    let mut valid = vec![true; s.n_bins];
    valid[0] = false;
    valid[5] = false;
    s.valid = Some(valid.clone());
    s.write(dir.path()).unwrap();
    assert_eq!(Block::read(dir.path()).unwrap().valid, Some(valid));

    write_npy(
        dir.path().join("valid.npy"),
        &ndarray::Array1::from_vec(vec![true; s.n_bins - 1]),
    )
    .unwrap();
    let e = read_err(dir.path());
    assert!(e.contains("valid.npy") && e.contains("entries"), "{e}");
    write_npy(
        dir.path().join("valid.npy"),
        &ndarray::Array1::from_vec(vec![1.0f64; s.n_bins]),
    )
    .unwrap();
    let e = read_err(dir.path());
    assert!(e.contains("valid.npy") && e.contains("bool"), "{e}");
}

#[test]
fn training_leaves_out_rows_that_are_not_valid() {
    let dir = tempfile::tempdir().unwrap();
    let mut s = good_block(dir.path());
    let keep = s.clone();
    // Bins 10..20 are garbage (kinematics far off) and marked not valid:
    // the fit must equal the fit on the block without them.
    let kin = s.kinematics.as_mut().unwrap();
    for b in 10..20 {
        for c in 0..kin.cols {
            kin.set(b, c, 1e6);
        }
    }
    let mut valid = vec![true; s.n_bins];
    valid[10..20].iter_mut().for_each(|v| *v = false);
    s.valid = Some(valid);
    let only = s.valid_only();
    assert_eq!(only.n_bins, keep.n_bins - 10);
    assert_eq!(only.valid_runs(), vec![0..only.n_bins]);
    assert_eq!(s.valid_runs(), vec![0..10, 20..s.n_bins]);
    let mut cut = keep.clone();
    cut.counts.drain(10 * cut.n_channels..20 * cut.n_channels);
    let k = cut.kinematics.as_mut().unwrap();
    k.data.drain(10 * k.cols..20 * k.cols);
    k.rows -= 10;
    cut.n_bins -= 10;
    assert_eq!(only.counts, cut.counts);
    assert_eq!(only.kinematics, cut.kinematics);
    // Trials renumbered onto the kept bins.
    for (a, b) in only
        .trials
        .iter()
        .flatten()
        .zip(keep.trials.iter().flatten())
    {
        let shift = |x: usize| x - x.clamp(10, 20) + 10;
        assert_eq!(
            (a.start_bin, a.end_bin),
            (shift(b.start_bin), shift(b.end_bin))
        );
    }
    let opts = KalmanFitOptions::default();
    let (m, _) = fit_kalman(&only, &opts).unwrap();
    assert!(m.h.is_finite());
}

#[test]
fn the_simulator_writes_the_same_files_streaming_as_in_memory() {
    use decoder_core::sim::reaching::simulate_to_dir;
    let options = SimOptions {
        minutes: 0.5,
        n_channels: 9,
        seed: 5,
        recovery_ms: 3.0,
        ..SimOptions::default()
    };
    let (a, b) = (tempfile::tempdir().unwrap(), tempfile::tempdir().unwrap());
    let (block, _) = simulate(&options).unwrap();
    block.write(a.path()).unwrap();
    let written = simulate_to_dir(&options, b.path()).unwrap();
    assert_eq!(written.n_bins, block.n_bins);
    for f in [
        "manifest.toml",
        "counts.npy",
        "kinematics.npy",
        "trials.csv",
    ] {
        assert_eq!(
            std::fs::read(a.path().join(f)).unwrap(),
            std::fs::read(b.path().join(f)).unwrap(),
            "{f}"
        );
    }
}
