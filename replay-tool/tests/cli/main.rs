//! The replay-tool binary as a user runs it: verbs, outputs, exit codes and
//! the messages for bad input.

mod evaluate;
mod fixture;
mod live;
mod nwb;
mod recordings;
mod refusals;
mod train_and_replay;

use daemon_rig::protocol::{json_keys, protocol_table};
use std::path::{Path, PathBuf};
use std::process::{Command, Output};

use ndarray::Array2;
use ndarray_npy::ReadNpyExt;

fn tool(args: &[&str]) -> Output {
    Command::new(env!("CARGO_BIN_EXE_replay-tool"))
        .args(args)
        .output()
        .expect("runs")
}

fn ok(args: &[&str]) -> String {
    let out = tool(args);
    assert!(
        out.status.success(),
        "{args:?} failed: {}",
        String::from_utf8_lossy(&out.stderr)
    );
    String::from_utf8(out.stdout).unwrap()
}

fn fails_with(args: &[&str], code: i32) -> String {
    let out = tool(args);
    assert_eq!(
        out.status.code(),
        Some(code),
        "{args:?}: {}",
        String::from_utf8_lossy(&out.stderr)
    );
    let err = String::from_utf8(out.stderr).unwrap();
    assert_eq!(
        err.trim_end().lines().count(),
        1,
        "one-line message expected, got {err:?}"
    );
    err
}

fn p(path: &Path) -> &str {
    path.to_str().unwrap()
}

/// Records a short live session with the demo and returns its log.
fn recorded_session(dir: &Path) -> std::path::PathBuf {
    let out = dir.join("demo");
    let stdout = ok(&[
        "demo",
        "--out",
        p(&out),
        "--minutes",
        "1",
        "--channels",
        "16",
        "--live-seconds",
        "1",
    ]);
    let log = stdout
        .lines()
        .find_map(|l| l.trim().strip_prefix("recording -> "))
        .expect("the recording's path");
    std::path::PathBuf::from(log)
}

fn json_file(path: &Path) -> serde_json::Value {
    serde_json::from_str(&std::fs::read_to_string(path).unwrap()).unwrap()
}

fn bench_p99(report: &Path) -> f64 {
    let s = json_file(&report.join("summary.json"));
    // summary.json has the fields PROTOCOL.md §12 lists.
    assert_eq!(json_keys(&s), protocol_table("bench-summary-json"));
    s["recv_to_send_us"]["p99"].as_f64().unwrap()
}

/// `closed-loop` on `model` as fast as the loop turns, `trials` trials,
/// with `more` flags, reporting into `report`.
fn closed_loop_fast(model: &Path, trials: &str, more: &[&str], report: &Path) -> String {
    let mut args = vec![
        "closed-loop",
        "--model",
        p(model),
        "--time-scale",
        "0",
        "--trials",
        trials,
        "--report",
        p(report),
    ];
    args.extend_from_slice(more);
    ok(&args)
}

fn closed_loop_summary(report: &Path) -> serde_json::Value {
    let s = json_file(&report.join("closed-loop.json"));
    // closed-loop.json has the fields PROTOCOL.md §12 lists.
    assert_eq!(json_keys(&s), protocol_table("closed-loop-json"));
    s["summary"].clone()
}

/// The session log the closed loop's spawned daemon recorded.
fn closed_loop_log(report: &Path) -> PathBuf {
    let s: serde_json::Value =
        serde_json::from_str(&std::fs::read_to_string(report.join("closed-loop.json")).unwrap())
            .unwrap();
    PathBuf::from(s["session_log"].as_str().expect("a session log"))
}

/// The NWB files `tests/reference/make_nwb.py` wrote with pynwb, and
/// numpy's view of them (`VDEC_NWB_DIR` points at a fresh set in CI).
fn nwb_dir() -> PathBuf {
    std::env::var_os("VDEC_NWB_DIR")
        .map(PathBuf::from)
        .unwrap_or_else(|| Path::new(env!("CARGO_MANIFEST_DIR")).join("../tests/data/nwb"))
}

fn npy_f64(path: &Path) -> Array2<f64> {
    Array2::<f64>::read_npy(std::fs::File::open(path).unwrap()).unwrap()
}
