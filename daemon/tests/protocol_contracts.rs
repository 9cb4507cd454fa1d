//! The daemon's side of PROTOCOL.md §10–§11, held to the page: the
//! control socket's requests and reply, the status document's fields (on
//! the wire, from a running daemon) and the session log's event names.

mod support;

use daemon::control::{Reply, Request};
use daemon_rig::protocol::{json_keys, protocol_table};
use decoder_core::engine::slot_engine::EngineEvent;
use decoder_core::engine::supervisor::{SupervisorState, Transition, TransitionReason};
use support::{Daemon, TEST_TIMING};

#[test]
fn every_control_request_is_the_one_protocol_names() {
    let requests = [
        Request::Status,
        Request::Arm,
        Request::Disarm,
        Request::Halt,
        Request::Load {
            path: "m.model".into(),
        },
        Request::Adapt { on: true },
        Request::Drift { on: true },
    ];
    let cmds: std::collections::BTreeSet<String> = requests
        .iter()
        .map(|r| {
            serde_json::to_value(r).unwrap()["cmd"]
                .as_str()
                .unwrap()
                .to_string()
        })
        .collect();
    assert_eq!(cmds, protocol_table("control-requests"));
    // The arguments are the ones named beside them.
    let load = serde_json::to_value(&requests[4]).unwrap();
    assert_eq!(json_keys(&load), ["cmd", "path"].map(String::from).into());
    for switch in &requests[5..] {
        let v = serde_json::to_value(switch).unwrap();
        assert_eq!(json_keys(&v), ["cmd", "on"].map(String::from).into());
    }
}

#[test]
fn the_status_document_on_the_wire_has_the_fields_protocol_lists() {
    let d = Daemon::start(true, TEST_TIMING);
    d.stream(0..5, 0);
    d.wait_for_seq(4);
    let reply: Reply = d.ctl(Request::Status);
    let wire = serde_json::to_value(&reply).unwrap();
    assert_eq!(json_keys(&wire), protocol_table("control-reply"));
    let status = &wire["status"];
    assert_eq!(status["status_version"], 1);
    assert_eq!(json_keys(status), protocol_table("status-fields"));
    assert_eq!(json_keys(&status["model"]), protocol_table("status-model"));
    assert_eq!(
        json_keys(&status["counters"]),
        protocol_table("status-counters")
    );
    assert_eq!(
        json_keys(&status["adaptation"]),
        protocol_table("status-adaptation")
    );
    // The drift object's fields, as §11 lists them in its row.
    assert_eq!(
        json_keys(&status["drift"]),
        [
            "baseline_ratio",
            "bias",
            "enabled",
            "left_out",
            "left_out_total",
            "reduced_forms",
            "reduced_forms_built_at_the_bin",
            "restored_total"
        ]
        .map(String::from)
        .into()
    );
    // Without the status, a reply has only `ok` and `message`.
    let arm = serde_json::to_value(d.ctl(Request::Arm)).unwrap();
    assert_eq!(json_keys(&arm), ["message", "ok"].map(String::from).into());
}

#[test]
fn every_engine_event_in_the_log_is_one_protocol_names() {
    let t = Transition {
        seq: 3,
        from: SupervisorState::Armed,
        to: SupervisorState::Halted,
        reason: TransitionReason::OperatorHalt,
    };
    let events = [
        EngineEvent::StreamStarted { seq: 0, t0_ns: 1 },
        EngineEvent::NewStream {
            expected_seq: 9,
            seq: 100,
        },
        EngineEvent::Transition(t),
        EngineEvent::Rejected(decoder_core::wire::packet::RejectReason::BadMagic),
        EngineEvent::Late { seq: 1 },
        EngineEvent::Duplicate { seq: 1 },
        EngineEvent::Stray { seq: 1 },
        EngineEvent::ModelChanged { seq: 1 },
        EngineEvent::ChannelLeftOut {
            seq: 1,
            channel: 2,
            reason: decoder_core::engine::drift::LeftOutReason::Noisy,
        },
        EngineEvent::ChannelRestored { seq: 1, channel: 2 },
        EngineEvent::DriftHandling {
            seq: 1,
            enabled: true,
        },
    ];
    let mut named = protocol_table("log-events");
    // The daemon's own events beside the engine's (rt_loop.rs).
    for own in ["adaptation", "adaptation_update"] {
        assert!(named.remove(own), "{own} is not in PROTOCOL.md §11");
    }
    let written: std::collections::BTreeSet<String> = events
        .iter()
        .map(|e| {
            serde_json::to_value(e).unwrap()["event"]
                .as_str()
                .unwrap()
                .to_string()
        })
        .collect();
    assert_eq!(written, named);
}

#[test]
fn every_drift_key_is_one_protocol_names() {
    let settings = decoder_core::engine::drift::DriftSettings::default();
    let keys = json_keys(&serde_json::to_value(settings).unwrap());
    assert_eq!(keys, protocol_table("drift-keys"));
}
