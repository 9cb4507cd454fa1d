//! Session logs from `decoderd`: `verify`, `export`, training from a recording and what a recording without task packets cannot give.

use super::*;

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

/// A session recorded through the daemon with task packets is a
/// calibration block (PROTOCOL.md §5 `export`, §6): one row per slot, the
/// kinematics of the screen shown while each bin was counted, trials, valid
/// rows, and what the daemon sent; and `train --session LOG` trains on it
/// exactly as on its export.
#[test]
fn a_closed_loop_recording_exports_as_a_session_directory_and_trains() {
    let dir = tempfile::tempdir().unwrap();
    let (_, model) = fixture::calibration_16();
    let report = dir.path().join("cl");
    closed_loop_fast(&model, "4", &[], &report);
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
/// adapts with no operator action, each update goes in at its landing slot
/// (`land_after_s` after its batch's last slot, whenever the worker
/// finished), so the same seeds give the same session every run; and
/// `verify` reproduces the session, every update included, bit for bit.
#[test]
fn an_adaptive_closed_loop_session_repeats_and_verifies_bit_for_bit() {
    let dir = tempfile::tempdir().unwrap();
    let (_, model) = fixture::calibration_16();
    let config = dir.path().join("daemon.toml");
    std::fs::write(
        &config,
        "[adaptation]\nbatch_s = 2.0\nhalf_life_s = 10.0\nland_after_s = 0.4\n",
    )
    .unwrap();
    let run = |name: &str| {
        let report = dir.path().join(name);
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
        let s: serde_json::Value = serde_json::from_str(
            &std::fs::read_to_string(report.join("closed-loop.json")).unwrap(),
        )
        .unwrap();
        (s, report)
    };
    let (first, report) = run("cl");
    let a = &first["adaptation"];
    let updates = a["updates"].as_u64().unwrap();
    assert!(updates >= 2, "{a}");
    // 0.4 s of 20 ms slots after the batch's last slot, never later.
    assert_eq!(a["land_after_bins"], 20, "{a}");
    assert_eq!(a["updates_late"], 0, "{a}");
    let last = &a["last_update"];
    assert_eq!(
        last["from_seq"].as_u64().unwrap(),
        last["report"]["last_seq"].as_u64().unwrap() + 20,
        "{a}"
    );
    let (second, _) = run("cl-again");
    assert_eq!(first["trials"], second["trials"]);
    assert_eq!(first["adaptation"], second["adaptation"]);
    let said = ok(&["verify", p(&closed_loop_log(&report))]);
    assert!(said.contains("bit for bit"), "{said}");
}

/// A recording made without a task computer holds no kinematics: train
/// says so and what to do.
#[test]
fn a_recording_without_task_packets_is_refused_for_training_with_the_reason() {
    let dir = tempfile::tempdir().unwrap();
    let (_, model) = fixture::calibration_16();
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

/// A session decoded with a click decoder — every packet carrying its
/// click probability, clicks where the gate decided them, targets selected
/// by them, adaptation on — verifies bit for bit from its log.
#[test]
fn a_session_with_a_click_decoder_verifies_bit_for_bit() {
    let dir = tempfile::tempdir().unwrap();
    let model = fixture::kalman_with_click(&fixture::block("1", "16", &["--click"]));
    // Selecting by click, with online adaptation swapping in new velocity
    // decoders (each keeps the click decoder) as the session goes on.
    let config = dir.path().join("daemon.toml");
    std::fs::write(&config, "[adaptation]\nbatch_s = 2.0\nhalf_life_s = 10.0\n").unwrap();
    let report = dir.path().join("cl");
    closed_loop_fast(
        &model,
        "8",
        &["--select", "click", "--adapt", "--config", p(&config)],
        &report,
    );
    let s = json_file(&report.join("closed-loop.json"));
    assert!(
        s["adaptation"]["updates"].as_u64().unwrap() >= 1,
        "{}",
        s["adaptation"]
    );
    let log = closed_loop_log(&report);
    let said = ok(&["verify", p(&log)]);
    assert!(said.contains("bit for bit"), "{said}");
    // The packets did carry a click probability, and `replay --click-out`
    // writes each slot's probability and click as the packets carried them.
    let mut reader = decoder_core::formats::session_log::LogReader::open(&log).unwrap();
    let mut sent = Vec::new();
    while let Some(r) = reader.next_record() {
        if let decoder_core::formats::session_log::LogRecord::Sent { packet, .. } = r {
            let v = decoder_core::wire::packet::VelocityPacket::parse(&packet).unwrap();
            sent.push((
                f64::from(v.click_prob),
                f64::from(u8::from(
                    v.flags & decoder_core::wire::packet::FLAG_CLICK != 0,
                )),
            ));
        }
    }
    assert!(sent.iter().any(|(p, _)| *p > 0.0));
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
    let table = npy_f64(&clicks);
    assert_eq!(table.nrows(), sent.len());
    for (row, (p, c)) in table.rows().into_iter().zip(&sent) {
        assert_eq!((row[0], row[1]), (*p, *c));
    }
    assert!(sent.iter().any(|(_, c)| *c == 1.0), "a click selected");
}

#[test]
fn a_session_with_drift_handling_leaving_channels_out_and_back_verifies_bit_for_bit() {
    let dir = tempfile::tempdir().unwrap();
    let (_, model) = fixture::calibration_16();
    // A fifth of the channels fall silent from 0.1 to 0.3 minutes; drift
    // handling (on from the configuration) leaves them out after 1 s of
    // silence and takes them back after 2 s of firing again; the velocity
    // bias is corrected too (off by default), so its path is verified.
    let config = dir.path().join("daemon.toml");
    std::fs::write(
        &config,
        "[drift]\nenabled = true\ncorrect_bias = true\ndead_after_s = 1.0\nrestore_after_s = 2.0\ndead_min_rate_hz = 1.0\n",
    )
    .unwrap();
    let report = dir.path().join("cl");
    closed_loop_fast(
        &model,
        "16",
        &["--silent", "0.2@0.1-0.3", "--config", p(&config)],
        &report,
    );
    let log = closed_loop_log(&report);
    let mut reader = decoder_core::formats::session_log::LogReader::open(&log).unwrap();
    let (mut left_out, mut restored) = (0, 0);
    let mut end = None;
    while let Some(r) = reader.next_record() {
        match r {
            decoder_core::formats::session_log::LogRecord::Event { json, .. } => {
                left_out += usize::from(json.contains("\"channel_left_out\""));
                restored += usize::from(json.contains("\"channel_restored\""));
            }
            decoder_core::formats::session_log::LogRecord::End { json, .. } => end = Some(json),
            _ => {}
        }
    }
    assert!(left_out >= 2, "{left_out} channels left out");
    assert!(restored >= 1, "{restored} channels restored");
    // Each change reached the Kalman filter as its reduced form (built by
    // the daemon's worker, or at its bin when the worker was late: which,
    // the host's scheduler decides).
    let status: serde_json::Value = serde_json::from_str(&end.expect("an end record")).unwrap();
    assert!(
        status["drift"]["reduced_forms"].as_u64().unwrap() >= 2,
        "{}",
        status["drift"]
    );
    let bias = status["drift"]["bias"].as_array().unwrap();
    assert!(
        bias.iter().any(|b| b.as_f64().unwrap() != 0.0),
        "a bias followed and subtracted: {}",
        status["drift"]
    );
    let said = ok(&["verify", p(&log)]);
    assert!(said.contains("bit for bit"), "{said}");
}
