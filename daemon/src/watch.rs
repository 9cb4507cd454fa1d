//! `decoderd ctl watch`: the operator's live view of a running daemon, in
//! a terminal, redrawn four times a second from the same status the
//! control socket gives `ctl status` — nothing more is read. One key
//! (`h`) halts the daemon; `q` (or Ctrl-C) leaves the view and changes
//! nothing. When the daemon stops, the view says so and exits.
//!
//! Rendering is a pure function of two status snapshots (rates come from
//! their difference), so it is tested without a terminal; the loop around
//! it only reads keys, asks for status and writes the frame.

use std::fmt::Write as _;
use std::io::{IsTerminal, Read, Write};
use std::path::Path;
use std::time::{Duration, Instant};

use anyhow::Result;

use crate::control::{Reply, Request, request};
use crate::status::{Percentiles, Status, plural};

/// How often the view is redrawn.
pub const REFRESH: Duration = Duration::from_millis(250);

/// A status snapshot and when it was taken.
pub struct Snapshot {
    pub status: Status,
    pub at: Instant,
}

/// Bins per second between two snapshots (decoded bins, answered slots).
fn rates(now: &Snapshot, before: Option<&Snapshot>) -> Option<(f64, f64)> {
    let b = before?;
    let dt = now.at.duration_since(b.at).as_secs_f64();
    if dt <= 0.0 {
        return None;
    }
    let (c, p) = (&now.status.counters, &b.status.counters);
    Some((
        c.bins_decoded.saturating_sub(p.bins_decoded) as f64 / dt,
        c.slots_answered.saturating_sub(p.slots_answered) as f64 / dt,
    ))
}

fn vector(v: &[f64], names: &[String]) -> String {
    if v.is_empty() {
        return "-".into();
    }
    v.iter()
        .zip(names)
        .map(|(x, n)| format!("{n} {x:+8.2}"))
        .collect::<Vec<_>>()
        .join("  ")
}

fn latency(p: &Percentiles) -> String {
    if p.count == 0 {
        "no samples yet".into()
    } else {
        format!(
            "p50 {:.1} µs   p99 {:.1} µs   max {:.1} µs",
            p.p50, p.p99, p.max
        )
    }
}

fn channels(v: &[usize]) -> String {
    match v.len() {
        0 => "none".into(),
        n if n <= 12 => v
            .iter()
            .map(|c| c.to_string())
            .collect::<Vec<_>>()
            .join(", "),
        n => format!(
            "{} … ({n} in all)",
            v[..12]
                .iter()
                .map(|c| c.to_string())
                .collect::<Vec<_>>()
                .join(", ")
        ),
    }
}

/// One frame of the view, plain text, no terminal codes.
pub fn render(now: &Snapshot, before: Option<&Snapshot>, note: &str) -> String {
    let s = &now.status;
    let c = &s.counters;
    let mut f = String::new();
    let _ = writeln!(
        f,
        "decoderd {} — {} — up {:.0} s",
        s.daemon_version, s.model.path, s.uptime_s
    );
    let why = s
        .last_change
        .as_ref()
        .map(|c| format!("  since seq {}: {} (from {})", c.seq, c.reason, c.from))
        .unwrap_or_default();
    let _ = writeln!(f, "STATE      {}{why}", s.state.to_uppercase());
    for w in &s.model_warnings {
        let _ = writeln!(f, "WARNING    {w}");
    }
    if let Some(a) = s.recording.as_ref().and_then(|r| r.alarm.as_ref()) {
        let _ = writeln!(f, "RECORDING  {a}");
    }
    let rate = match rates(now, before) {
        Some((decoded, slots)) => format!("{decoded:.1} bins/s decoded, {slots:.1} slots/s"),
        None => "measuring…".into(),
    };
    let _ = writeln!(f, "stream     {rate}");
    let age = match s.last_bin_age_s {
        Some(a) => format!("{:.0} ms ago", a * 1000.0),
        None => "no bin yet".into(),
    };
    let _ = writeln!(
        f,
        "last bin   {age}; next seq {}",
        s.next_seq.map_or("-".into(), |n| n.to_string())
    );
    let _ = writeln!(f, "latency    {}", latency(&s.latency.recv_to_send_us));
    let _ = writeln!(
        f,
        "dropouts   {} missing (coasted), {} late, {} duplicate, {} stray, {} rejected",
        c.bins_missing, c.bins_late, c.bins_duplicate, c.bins_stray, c.rejected
    );
    let _ = writeln!(
        f,
        "command    {}",
        vector(&s.last_command, &s.model.outputs)
    );
    let _ = writeln!(
        f,
        "estimate   {}",
        vector(&s.last_estimate, &s.model.outputs)
    );
    if s.click.decoder {
        let _ = writeln!(
            f,
            "click      p {:.2}   {} clicks ({:.1}/min){}",
            s.click.probability,
            s.click.clicks,
            s.click.per_minute,
            s.click
                .last_click_seq
                .map_or(String::new(), |q| format!(", last at seq {q}"))
        );
    }
    if s.drift.enabled {
        let d = &s.drift;
        let out = if d.left_out.is_empty() {
            "none".to_string()
        } else {
            d.left_out
                .iter()
                .map(|c| format!("{} {}", c.channel, c.reason))
                .collect::<Vec<_>>()
                .join(", ")
        };
        let _ = writeln!(
            f,
            "drift      baselines ×{:.2} (×{:.2}..×{:.2})   bias {}   left out: {}",
            d.baseline_ratio[1],
            d.baseline_ratio[0],
            d.baseline_ratio[2],
            vector(&d.bias, &s.model.outputs),
            out
        );
    } else {
        let _ = writeln!(f, "drift      handling off");
    }
    if s.stream_started {
        let _ = writeln!(
            f,
            "channels   silent: {}   saturated: {}",
            channels(&s.dead_channels),
            channels(&s.saturated_channels)
        );
    } else {
        let _ = writeln!(f, "channels   not known before the first bin");
    }
    let t = &s.task;
    let task = match (&t.last_phase, t.last_trial, t.last_age_s) {
        (Some(phase), Some(trial), Some(age)) => format!(
            "trial {trial} {phase}, {}, {:.0} ms ago ({} received, {} rejected)",
            if t.closed_loop == Some(true) {
                "closed loop"
            } else {
                "task moves the cursor"
            },
            age * 1000.0,
            t.received,
            t.received - t.accepted
        ),
        _ => t.line(),
    };
    let _ = writeln!(f, "task       {task}");
    let _ = writeln!(f, "adaptation {}", s.adaptation.line());
    let _ = writeln!(
        f,
        "recording  {}",
        s.recording.as_ref().map_or("off".to_string(), |r| format!(
            "{} written, {}",
            plural(r.records_written, "record", "records"),
            plural(r.records_lost, "lost", "lost")
        ))
    );
    let _ = writeln!(f);
    let _ = writeln!(f, "h halt    q quit the view (the daemon keeps running)");
    if !note.is_empty() {
        let _ = writeln!(f, "{note}");
    }
    f
}

/// Puts the terminal in a mode where single keys arrive without Enter
/// (and Ctrl-C arrives as a key), and restores it when dropped.
struct RawKeys {
    saved: Option<libc::termios>,
}

impl RawKeys {
    fn new() -> RawKeys {
        let stdin = std::io::stdin();
        if !stdin.is_terminal() {
            return RawKeys { saved: None };
        }
        // SAFETY: termios is plain data; tcgetattr fills it for fd 0.
        let mut t: libc::termios = unsafe { std::mem::zeroed() };
        // SAFETY: fd 0 is a terminal (checked) and `t` is writable.
        if unsafe { libc::tcgetattr(0, &mut t) } != 0 {
            return RawKeys { saved: None };
        }
        let saved = t;
        t.c_lflag &= !(libc::ICANON | libc::ECHO | libc::ISIG);
        t.c_cc[libc::VMIN] = 0;
        t.c_cc[libc::VTIME] = 0;
        // SAFETY: a termios derived from the current one, for fd 0.
        unsafe { libc::tcsetattr(0, libc::TCSANOW, &t) };
        RawKeys { saved: Some(saved) }
    }

    /// The keys pressed since the last call.
    fn keys(&self) -> Vec<u8> {
        if self.saved.is_none() {
            return Vec::new();
        }
        let mut buf = [0u8; 64];
        match std::io::stdin().read(&mut buf) {
            Ok(n) => buf[..n].to_vec(),
            Err(_) => Vec::new(),
        }
    }
}

impl Drop for RawKeys {
    fn drop(&mut self) {
        if let Some(t) = self.saved {
            // SAFETY: restoring the settings read at start.
            unsafe { libc::tcsetattr(0, libc::TCSANOW, &t) };
        }
    }
}

fn status(socket: &Path) -> Option<Status> {
    match request(socket, &Request::Status) {
        Ok(Reply {
            status: Some(s), ..
        }) => Some(*s),
        _ => None,
    }
}

/// Runs the view until `q`, Ctrl-C or the daemon stops.
pub fn run(socket: &Path) -> Result<()> {
    let Some(first) = status(socket) else {
        anyhow::bail!(
            "no daemon answers on {}; is decoderd running (and is this its --socket)?",
            socket.display()
        );
    };
    let keys = RawKeys::new();
    let tty = std::io::stdout().is_terminal();
    let mut out = std::io::stdout();
    let mut before: Option<Snapshot> = None;
    let mut now = Snapshot {
        status: first,
        at: Instant::now(),
    };
    let mut note = String::new();
    loop {
        let frame = render(&now, before.as_ref(), &note);
        if tty {
            // Home, draw, clear what the last frame left below.
            let _ = write!(out, "\x1b[H\x1b[2J{}", frame.replace('\n', "\r\n"));
        } else {
            let _ = writeln!(out, "{frame}");
        }
        let _ = out.flush();
        let wake = Instant::now() + REFRESH;
        while Instant::now() < wake {
            for k in keys.keys() {
                match k {
                    b'q' | b'Q' | 0x03 => return Ok(()),
                    b'h' | b'H' => {
                        note = match request(socket, &Request::Halt) {
                            Ok(r) if r.ok => format!("halt: {}", r.message),
                            Ok(r) => format!("halt refused: {}", r.message),
                            Err(e) => format!("halt failed: {e:#}"),
                        };
                    }
                    _ => {}
                }
            }
            std::thread::sleep(Duration::from_millis(20));
        }
        match status(socket) {
            Some(s) => {
                before = Some(std::mem::replace(
                    &mut now,
                    Snapshot {
                        status: s,
                        at: Instant::now(),
                    },
                ));
            }
            None => {
                drop(keys);
                let _ = writeln!(
                    out,
                    "{}decoderd stopped: its control socket {} no longer answers",
                    if tty { "\r\n" } else { "" },
                    socket.display()
                );
                return Ok(());
            }
        }
    }
}
