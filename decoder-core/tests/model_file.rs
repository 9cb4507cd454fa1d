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
    b[8] = 3;
    let e = ModelFile::from_bytes(&b, "m.model").unwrap_err();
    assert!(matches!(
        e,
        ModelFileError::UnsupportedVersion { found: 3, .. }
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
