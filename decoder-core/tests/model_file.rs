//! The model file refuses anything that is not a whole, current model, and
//! round-trips what it writes.

use decoder_core::formats::model_file::{ModelFile, ModelFileError, Provenance, export_json};
use decoder_core::sim::model::small_kalman;
use proptest::prelude::*;

fn small_model() -> ModelFile {
    let (m, s) = small_kalman(6, 1, 0.5);
    ModelFile {
        provenance: Provenance {
            trained_at: "2026-01-01T00:00:00Z".into(),
            tool_version: "test".into(),
            data_sha256: s.data_sha256(),
            fit_document: "{\"ridge\":1.0}".into(),
            silent_channels: vec![2],
            cv: None,
        },
        ..m
    }
}

#[test]
fn round_trip_is_exact() {
    let m = small_model();
    assert_eq!(ModelFile::from_bytes(&m.to_bytes(), "m").unwrap(), m);
}

#[test]
fn wrong_magic_is_refused() {
    let mut b = small_model().to_bytes();
    b[0] = b'X';
    assert!(matches!(
        ModelFile::from_bytes(&b, "m"),
        Err(ModelFileError::BadMagic { .. })
    ));
}

#[test]
fn future_version_is_refused() {
    let mut b = small_model().to_bytes();
    b[8] = 5;
    let e = ModelFile::from_bytes(&b, "m.model").unwrap_err();
    assert!(matches!(
        e,
        ModelFileError::UnsupportedVersion { found: 5, .. }
    ));
    assert!(e.to_string().starts_with("m.model"), "{e}");
}

#[test]
fn one_flipped_payload_byte_fails_the_checksum() {
    let mut b = small_model().to_bytes();
    let i = b.len() / 2;
    b[i] ^= 0x01;
    assert!(matches!(
        ModelFile::from_bytes(&b, "m"),
        Err(ModelFileError::Checksum { .. })
    ));
}

#[test]
fn truncated_file_is_refused() {
    let b = small_model().to_bytes();
    assert!(matches!(
        ModelFile::from_bytes(&b[..b.len() - 10], "m"),
        Err(ModelFileError::Truncated { .. })
    ));
}

/// PROTOCOL.md §4: the keys other programs read.
#[test]
fn json_export_has_the_contract_keys() {
    let j = export_json(&small_model());
    for key in [
        "kind",
        "bin_ms",
        "channels",
        "state",
        "outputs",
        "A",
        "W",
        "H",
        "Q",
        "x0",
        "P0",
        "count_offset",
        "count_scale",
        "trained_at",
        "tool_version",
        "data_sha256",
        "fit",
        "cv",
    ] {
        assert!(j.get(key).is_some(), "export lacks {key}");
    }
    assert_eq!(j["kind"], "kalman");
    assert_eq!(j["channels"], 6);
    assert_eq!(
        j["state"],
        serde_json::json!(["pos_x", "pos_y", "vel_x", "vel_y", "1"])
    );
    assert_eq!(j["H"].as_array().unwrap().len(), 6, "H is N rows");
    assert_eq!(j["H"][0].as_array().unwrap().len(), 5, "of d columns");
    assert_eq!(j["Q"].as_array().unwrap().len(), 6);
    assert_eq!(j["fit"]["ridge"], 1.0);
}

proptest! {
    /// Any bytes give a model or a typed error, never a panic.
    #[test]
    fn arbitrary_bytes_never_panic(bytes in proptest::collection::vec(any::<u8>(), 0..512)) {
        let _ = ModelFile::from_bytes(&bytes, "fuzz");
    }

    /// A valid header in front of arbitrary payload bytes is still refused cleanly.
    #[test]
    fn valid_header_with_garbage_payload_never_panics(payload in proptest::collection::vec(any::<u8>(), 0..512)) {
        let mut b = Vec::new();
        b.extend_from_slice(b"VDECMODL");
        b.extend_from_slice(&1u32.to_le_bytes());
        b.extend_from_slice(&(payload.len() as u64).to_le_bytes());
        b.extend_from_slice(&crc32fast::hash(&payload).to_le_bytes());
        b.extend_from_slice(&payload);
        prop_assert!(ModelFile::from_bytes(&b, "fuzz").is_err());
    }
}

/// Frames `payload` as a model file (PROTOCOL.md §8) with a right checksum.
fn framed(payload: &[u8]) -> Vec<u8> {
    let mut out = b"VDECMODL".to_vec();
    out.extend_from_slice(&2u32.to_le_bytes());
    out.extend_from_slice(&(payload.len() as u64).to_le_bytes());
    out.extend_from_slice(&crc32fast::hash(payload).to_le_bytes());
    out.extend_from_slice(payload);
    out
}

#[test]
fn trailing_bytes_are_refused() {
    let mut b = small_model().to_bytes();
    b.extend_from_slice(b"more");
    assert!(matches!(
        ModelFile::from_bytes(&b, "m"),
        Err(ModelFileError::TrailingBytes { extra: 4, .. })
    ));
}

#[test]
fn a_device_a_pipe_and_a_huge_file_are_refused_before_reading() {
    // /dev/zero never ends: reading it whole would never return.
    assert!(matches!(
        ModelFile::read(std::path::Path::new("/dev/zero")),
        Err(ModelFileError::NotAFile { .. })
    ));
    let dir = tempfile::tempdir().unwrap();
    let fifo = dir.path().join("pipe.model");
    let made = std::process::Command::new("mkfifo")
        .arg(&fifo)
        .status()
        .unwrap();
    assert!(made.success());
    // Opening a FIFO with no writer would block: it must not be opened.
    assert!(matches!(
        ModelFile::read(&fifo),
        Err(ModelFileError::NotAFile { .. })
    ));
    let huge = dir.path().join("huge.model");
    let f = std::fs::File::create(&huge).unwrap();
    f.set_len(10 << 30).unwrap(); // sparse: no disk used
    assert!(matches!(
        ModelFile::read(&huge),
        Err(ModelFileError::TooLarge { .. })
    ));
    assert!(matches!(
        ModelFile::read(dir.path()),
        Err(ModelFileError::NotAFile { .. })
    ));
}

/// Every way a decoded payload can be unusable is refused with its reason.
#[test]
fn invalid_payloads_of_each_kind_are_refused_with_the_reason() {
    use decoder_core::DecoderModel;
    let base = small_model();
    let DecoderModel::Kalman(k) = &base.decoder else {
        unreachable!()
    };
    let refused = |m: ModelFile, reason: &str| {
        let e = ModelFile::from_bytes(&m.to_bytes(), "bad.model").unwrap_err();
        assert!(matches!(e, ModelFileError::Invalid { .. }), "{reason}: {e}");
        assert!(e.to_string().contains(reason), "{reason}: {e}");
    };
    let with = |f: &dyn Fn(&mut decoder_core::decoders::kalman::KalmanModel)| {
        let mut k = k.clone();
        f(&mut k);
        ModelFile {
            decoder: DecoderModel::Kalman(k),
            ..base.clone()
        }
    };
    refused(
        with(&|k| k.a.data[0] = f64::NAN),
        "A has a value that is not finite",
    );
    refused(
        with(&|k| k.h.data[3] = f64::INFINITY),
        "H has a value that is not finite",
    );
    refused(
        with(&|k| k.count_scale[2] = 0.0),
        "count_scale of channel 2 is 0",
    );
    refused(
        with(&|k| k.count_scale[1] = -1.0),
        "count_scale of channel 1 is -1",
    );
    refused(
        with(&|k| k.outputs = vec!["vel_q".into()]),
        "\"vel_q\" is not a state component",
    );
    refused(with(&|k| k.x0.pop().map(|_| ()).unwrap()), "x0 has shape");

    let session = small_kalman(6, 1, 0.5).1;
    let w = decoder_core::fit::wiener::fit_wiener(&session, &Default::default()).unwrap();
    let mut bad_w = w.clone();
    bad_w.weights.cols -= 1;
    refused(
        ModelFile {
            decoder: DecoderModel::Wiener(bad_w),
            ..base.clone()
        },
        "weights are 2×",
    );
    let mut nan_w = w;
    nan_w.mean_counts[0] = f64::NAN;
    refused(
        ModelFile {
            decoder: DecoderModel::Wiener(nan_w),
            ..base.clone()
        },
        "not finite",
    );

    let opts = decoder_core::fit::point_process::PointProcessFitOptions {
        history: None,
        ..Default::default()
    };
    let (pp, _) = decoder_core::fit::point_process::fit_point_process(&session, &opts).unwrap();
    let mut nan_pp = pp.clone();
    let c = nan_pp.channels.iter().position(Option::is_some).unwrap();
    nan_pp.channels[c].as_mut().unwrap().b0 = f64::NAN;
    refused(
        ModelFile {
            decoder: DecoderModel::PointProcess(nan_pp),
            ..base.clone()
        },
        &format!("channel {c}: a coefficient is not finite"),
    );
    let mut no_out = pp;
    no_out.outputs.clear();
    refused(
        ModelFile {
            decoder: DecoderModel::PointProcess(no_out),
            ..base.clone()
        },
        "outputs 0 velocities",
    );
}

#[test]
fn a_bin_width_outside_a_tenth_of_a_millisecond_to_ten_seconds_is_refused() {
    let good = small_model().to_bytes();
    // The payload opens with the bin width as an f64 of milliseconds.
    for ms in [0.05, 10_001.0, 0.0, -20.0, f64::NAN, 16.66666] {
        let mut payload = good[24..].to_vec();
        payload[..8].copy_from_slice(&ms.to_le_bytes());
        let e = ModelFile::from_bytes(&framed(&payload), "m").unwrap_err();
        assert!(
            matches!(e, ModelFileError::Decode { .. }) && e.to_string().contains("bin width"),
            "{ms}: {e}"
        );
    }
    let mut payload = good[24..].to_vec();
    payload[..8].copy_from_slice(&0.1f64.to_le_bytes());
    assert!(ModelFile::from_bytes(&framed(&payload), "m").is_ok());
}
