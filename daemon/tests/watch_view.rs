//! `decoderd ctl watch` as an operator sees it: driven in a real terminal
//! (a tmux pane) against the real daemon, and its frames rendered from
//! real status snapshots.

mod support;

use std::process::Command;
use std::time::{Duration, Instant};

use daemon::status::TaskStatus;
use daemon::watch::{Snapshot, render};
use support::{BIN, Daemon, PATIENCE, TEST_TIMING};

/// Whether tmux is here; without it the pane tests are skipped, except
/// under CI (`CI` set), which installs it and must run them.
fn have_tmux() -> bool {
    let found = Command::new("tmux").arg("-V").output().is_ok();
    if !found {
        assert!(
            std::env::var_os("CI").is_none(),
            "tmux is needed for this test under CI (.ci/run installs it)"
        );
        eprintln!("skipped: tmux is not installed (apt install tmux to run this test)");
    }
    found
}

/// A tmux session, killed when dropped.
struct Pane(String);

impl Pane {
    fn open(command: &str) -> Pane {
        static NEXT: std::sync::atomic::AtomicUsize = std::sync::atomic::AtomicUsize::new(0);
        let n = NEXT.fetch_add(1, std::sync::atomic::Ordering::Relaxed);
        let name = format!("vdec-watch-{}-{n}", std::process::id());
        let ok = Command::new("tmux")
            .args([
                "new-session",
                "-d",
                "-s",
                &name,
                "-x",
                "120",
                "-y",
                "40",
                command,
            ])
            .status()
            .expect("tmux is needed for this test (apt install tmux; .ci/run installs it)");
        assert!(ok.success());
        Pane(name)
    }

    fn text(&self) -> String {
        let out = Command::new("tmux")
            .args(["capture-pane", "-p", "-t", &self.0])
            .output()
            .unwrap();
        String::from_utf8_lossy(&out.stdout).into_owned()
    }

    fn wait_for(&self, what: &[&str]) -> String {
        let start = Instant::now();
        loop {
            let t = self.text();
            if what.iter().all(|w| t.contains(w)) {
                return t;
            }
            assert!(
                start.elapsed() < PATIENCE,
                "the view never showed {what:?}:\n{t}"
            );
            std::thread::sleep(Duration::from_millis(50));
        }
    }

    fn key(&self, k: &str) {
        Command::new("tmux")
            .args(["send-keys", "-t", &self.0, k])
            .status()
            .unwrap();
    }
}

impl Drop for Pane {
    fn drop(&mut self) {
        let _ = Command::new("tmux")
            .args(["kill-session", "-t", &self.0])
            .status();
    }
}

fn task_packet(seq: u64) -> Vec<u8> {
    use decoder_core::wire::task_packet::{
        Phase, TASK_FLAG_CLOSED_LOOP, TASK_FLAG_TARGET_VALID, TaskState, encode_task,
    };
    let mut t = TaskState::new(2);
    t.phase = Phase::Reach;
    t.bin_seq = seq;
    t.trial = 7;
    t.flags = TASK_FLAG_CLOSED_LOOP | TASK_FLAG_TARGET_VALID;
    t.target_radius = 1.0;
    let mut b = Vec::new();
    encode_task(&t, &mut b);
    b
}

#[test]
fn the_view_shows_the_live_daemon_halts_on_one_key_and_exits_when_it_stops() {
    if !have_tmux() {
        return;
    }
    let mut d = Daemon::start(true, TEST_TIMING);
    let command = format!(
        "{} ctl --socket {} watch; echo VIEW-EXITED $?; sleep 60",
        env!("CARGO_BIN_EXE_decoderd"),
        d.socket.display()
    );
    let pane = Pane::open(&command);
    std::thread::scope(|s| {
        let d = &d;
        s.spawn(move || {
            let t0 = Instant::now();
            for seq in 0..150u64 {
                if let Some(w) = (t0 + BIN * seq as u32).checked_duration_since(Instant::now()) {
                    std::thread::sleep(w);
                }
                d.send_task(&task_packet(seq.saturating_sub(1)));
                d.send_bin(seq);
            }
        });
        let shown = pane.wait_for(&["STATE      ARMED", "bins/s decoded", "trial 7 reach"]);
        assert!(shown.contains("latency    p50"), "{shown}");
        assert!(shown.contains("h halt"), "{shown}");
        // One key halts the daemon.
        pane.key("h");
        d.wait_for_status("halted by the view", |s| s.state == "halted");
        pane.wait_for(&["STATE      HALTED", "operator halt"]);
    });
    d.stop();
    let t = pane.wait_for(&["decoderd stopped", "VIEW-EXITED 0"]);
    assert!(!t.contains("panicked"), "{t}");
}

#[test]
fn q_leaves_the_view_and_changes_nothing() {
    if !have_tmux() {
        return;
    }
    let d = Daemon::start(true, TEST_TIMING);
    d.stream(0..20, 0);
    // The sender stopped: the daemon halts by itself first.
    let before = d.wait_for_status("halted after the stream", |s| s.state == "halted");
    let command = format!(
        "{} ctl --socket {} watch; echo VIEW-EXITED $?; sleep 60",
        env!("CARGO_BIN_EXE_decoderd"),
        d.socket.display()
    );
    let pane = Pane::open(&command);
    pane.wait_for(&["STATE      HALTED"]);
    pane.key("x");
    pane.key("q");
    pane.wait_for(&["VIEW-EXITED 0"]);
    let after = d.status();
    assert_eq!(after.state, before.state);
    assert_eq!(after.counters.transitions, before.counters.transitions);
}

/// The frame is a pure function of two snapshots: the first is the real
/// daemon's status before any bin (nothing the host can change), the second
/// is built from it by hand, so every figure on it is the test's own — not
/// whatever a loaded host let the stream do.
#[test]
fn a_frame_holds_what_the_operator_needs() {
    let d = Daemon::start(true, TEST_TIMING);
    let first = Snapshot {
        status: d.status(),
        at: Instant::now(),
    };
    let frame = render(&first, None, "");
    assert!(frame.contains("no bin yet"), "{frame}");
    assert!(
        frame.contains("channels   not known before the first bin"),
        "{frame}"
    );
    assert!(frame.contains("task       no task packets yet"), "{frame}");
    assert!(frame.contains("measuring"), "{frame}");

    // Fifty bins in exactly two seconds, one slot coasted, a task packet.
    let mut status = first.status.clone();
    status.stream_started = true;
    status.next_seq = Some(50);
    status.last_bin_age_s = Some(0.012);
    let c = &mut status.counters;
    c.datagrams = 49;
    c.bins_decoded = 49;
    c.bins_missing = 1;
    c.slots_answered = 50;
    status.task = TaskStatus {
        received: 50,
        accepted: 50,
        last_phase: Some("reach".into()),
        last_trial: Some(7),
        last_bin_seq: Some(48),
        closed_loop: Some(true),
        last_age_s: Some(0.02),
        ..Default::default()
    };
    status.last_command = vec![0.25, -1.5];
    status.last_estimate = vec![0.5, -3.0];
    status.click = daemon::status::ClickStatus {
        decoder: true,
        probability: 0.93,
        clicks: 4,
        per_minute: 2.5,
        last_click_seq: Some(47),
    };
    let second = Snapshot {
        status,
        at: first.at + Duration::from_secs(2),
    };
    let frame = render(&second, Some(&first), "halt: armed -> halted at seq 3");
    assert!(
        frame.contains("stream     24.5 bins/s decoded, 25.0 slots/s"),
        "{frame}"
    );
    assert!(
        frame.contains("last bin   12 ms ago; next seq 50"),
        "{frame}"
    );
    assert!(
        frame.contains("dropouts   1 missing (coasted), 0 late"),
        "{frame}"
    );
    assert!(
        frame.contains("command    vel_x    +0.25  vel_y    -1.50"),
        "{frame}"
    );
    assert!(
        frame.contains("estimate   vel_x    +0.50  vel_y    -3.00"),
        "{frame}"
    );
    assert!(
        frame.contains("click      p 0.93   4 clicks (2.5/min), last at seq 47"),
        "{frame}"
    );
    // A model without a click decoder has no click line.
    assert!(!render(&first, None, "").contains("click      p"));
    assert!(frame.contains("trial 7 reach, closed loop"), "{frame}");
    assert!(frame.contains("adaptation off"), "{frame}");
    assert!(
        frame.ends_with("halt: armed -> halted at seq 3\n"),
        "{frame}"
    );
    assert!(!frame.contains('\x1b'), "a frame is plain text");
}
