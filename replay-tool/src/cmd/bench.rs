//! `replay-tool bench`: the whole loop's latency and dropouts, measured the
//! way a rig sees them, with a pass or fail a user can act on before a
//! session.
//!
//! It spawns `decoderd` (or streams to a running one with `--daemon`), streams bins at the
//! bin rate from a paced front end — optionally with a fault schedule of
//! dropped, malformed and bursty bins — and collects every velocity packet
//! in an actuator sink. Per bin it takes the daemon's recv→send from the
//! packet itself (`sent_ns − recv_ns`), the round trip from the front end's
//! send to the sink, and the send-time jitter against the bin clock; the
//! loopback floor (the same traffic through a relay that does not decode)
//! is measured in the same run. It writes JSON, CSV, plots and a one-page
//! HTML report, and exits 1 when a slot got no packet, a bin that was sent
//! was not decoded, or recv→send p99 is over `--budget-p99-us`.

use std::fmt::Write as _;
use std::net::UdpSocket;
use std::path::{Path, PathBuf};
use std::time::Duration;

use anyhow::{Context, Result, bail};
use daemon::status::Percentiles;
use daemon_rig::{ActuatorSink, BinFault, Launch, SinkRecord, loopback_floor, paced_send};
use decoder_core::sim::reaching::{SimOptions, simulate};
use decoder_core::wire::packet::{self, FLAG_BIN_MISSING};
use decoder_core::{Block, ModelFile};
use serde_json::json;

use crate::output::write_atomic;
use crate::{CheckFailed, plot};

#[derive(Debug, clap::Args)]
#[command(after_help = crate::NOT_NEXT_TO_A_PERSON)]
pub struct Args {
    /// Model to run (default: the daemon config's model.path; without
    /// either, a synthetic model is trained on a simulated block).
    #[arg(long)]
    pub model: Option<PathBuf>,
    /// The daemon configuration to bench with (the spawned daemon runs it).
    #[arg(long)]
    pub config: Option<PathBuf>,
    /// Channels of the synthetic model (when no model is given).
    #[arg(long, default_value_t = 96)]
    pub channels: usize,
    /// Bin width of the synthetic model, ms.
    #[arg(long, default_value_t = 20.0)]
    pub bin_ms: f64,
    /// Seconds to stream.
    #[arg(long, default_value_t = 60.0)]
    pub seconds: f64,
    /// Fail when decoderd's recv→send p99 exceeds this many µs.
    #[arg(long)]
    pub budget_p99_us: Option<f64>,
    /// Directory for summary.json, bins.csv, plots and report.html.
    #[arg(long, default_value = "bench-report")]
    pub report: PathBuf,
    /// The decoderd binary (default: the one beside replay-tool).
    #[arg(long)]
    pub decoderd: Option<PathBuf>,
    /// Bench a running daemon listening here instead of spawning one (it
    /// must be armed, and its network.actuator must be --actuator).
    #[arg(long, requires = "actuator", conflicts_with = "decoderd")]
    pub daemon: Option<String>,
    /// With --daemon: where to receive its velocity packets (bound here).
    #[arg(long, requires = "daemon")]
    pub actuator: Option<String>,
    /// Fault schedule: drop every K-th bin.
    #[arg(long)]
    pub drop_every: Option<usize>,
    /// Fault schedule: send every K-th bin malformed (bad magic).
    #[arg(long)]
    pub malformed_every: Option<usize>,
    /// Fault schedule: every K bins, hold 3 bins back and send them in a burst.
    #[arg(long)]
    pub burst_every: Option<usize>,
}

fn fault_schedule(args: &Args) -> impl Fn(usize) -> BinFault + '_ {
    move |k| {
        let hit = |every: Option<usize>| every.is_some_and(|e| e > 0 && k % e == e - 1);
        if hit(args.drop_every) {
            BinFault::Drop
        } else if hit(args.malformed_every) {
            BinFault::Malformed
        } else if args
            .burst_every
            .is_some_and(|e| e > 0 && k % e >= e.saturating_sub(3))
        {
            BinFault::Hold
        } else {
            BinFault::None
        }
    }
}

/// The model to bench: given, from the config, or trained here.
fn bench_model(args: &Args, work: &Path) -> Result<(PathBuf, ModelFile)> {
    let from_config = match &args.config {
        Some(c) => {
            let raw = daemon::config::RawConfig::from_file(c)?;
            raw.model.path
        }
        None => None,
    };
    if let Some(p) = args.model.clone().or(from_config) {
        let m = ModelFile::read(&p)?;
        return Ok((p, m));
    }
    if args.channels == 0 || args.channels > packet::MAX_CHANNELS {
        bail!("--channels {}: must be 1..=16384", args.channels);
    }
    let (model, _) = decoder_core::sim::model::simulated_kalman(
        &SimOptions {
            minutes: 2.0,
            n_channels: args.channels,
            bin_width: super::bin_width_flag(args.bin_ms)?,
            ..SimOptions::default()
        },
        &decoder_core::fit::config::TrainConfig::default().kalman,
    )?;
    let path = work.join("bench.model");
    write_atomic(&path, &model.to_bytes())?;
    Ok((path, model))
}

fn bins_for(model: &ModelFile) -> Result<(Vec<Vec<u8>>, Block)> {
    let (session, _) = simulate(&SimOptions {
        minutes: 0.5,
        n_channels: model.decoder.n_channels(),
        bin_width: model.bin_width,
        seed: 77,
        ..SimOptions::default()
    })?;
    let bin_us = model.bin_width.us();
    let bins = (0..session.n_bins)
        .map(|t| packet::bin_datagram(session.bin_counts(t), bin_us))
        .collect();
    Ok((bins, session))
}

struct Outcome {
    missed_slots: usize,
    unexpected_dropouts: usize,
    faults_flagged: usize,
    faults: usize,
    recv_to_send: Percentiles,
    round_trip: Percentiles,
    jitter: Percentiles,
    floor: Percentiles,
    /// Per seq: |send time − bin clock| in µs (NaN without a packet).
    jitter_us: Vec<f64>,
}

/// What was benched, where and when, for the report's header.
struct RunFacts {
    model: String,
    model_sha256: String,
    config: String,
    date: String,
    host: String,
    version: &'static str,
}

impl RunFacts {
    fn gather(model_path: &Path, config: Option<&Path>) -> RunFacts {
        use sha2::Digest;
        let model_sha256 = std::fs::read(model_path)
            .map(|b| format!("{:x}", sha2::Sha256::digest(&b)))
            .unwrap_or_else(|e| format!("unreadable ({e})"));
        RunFacts {
            model: model_path.display().to_string(),
            model_sha256,
            config: config.map_or("defaults (no --config)".into(), |c| c.display().to_string()),
            date: humantime::format_rfc3339_seconds(std::time::SystemTime::now()).to_string(),
            host: std::fs::read_to_string("/proc/sys/kernel/hostname")
                .map(|h| h.trim().to_string())
                .unwrap_or_else(|_| "unknown".into()),
            version: env!("CARGO_PKG_VERSION"),
        }
    }
}

pub fn run(args: &Args) -> Result<()> {
    if !(args.seconds.is_finite() && args.seconds > 0.0) {
        bail!("--seconds {}: must be above 0", args.seconds);
    }
    std::fs::create_dir_all(&args.report)
        .with_context(|| format!("cannot create {}", args.report.display()))?;
    let work = args.report.join("daemon");
    let (model_path, model) = bench_model(args, &args.report)?;
    let rate_hz = 1000.0 / model.bin_width.ms();
    let n = (args.seconds * rate_hz).round().max(1.0) as usize;
    let dims = model.decoder.outputs().len();
    let (bins, _) = bins_for(&model)?;
    let channels = model.decoder.n_channels();
    println!(
        "bench: {n} bins at {rate_hz:.0} Hz × {channels} channels ({:.0} s), model {}",
        args.seconds,
        model_path.display()
    );

    let floor_n = n.min((10.0 * rate_hz) as usize).max(1);
    let floor_ns = loopback_floor(&bins, floor_n, rate_hz, dims)?;
    let floor_ns: Vec<u64> = floor_ns.into_iter().filter(|&v| v > 0).collect();

    let faults = fault_schedule(args);
    let (rec, daemon_note) = match (&args.daemon, &args.actuator) {
        (Some(daemon), Some(actuator)) => {
            let target = super::socket_addr("--daemon", daemon)?;
            let actuator = super::socket_addr("--actuator", actuator)?;
            let sink = ActuatorSink::start(UdpSocket::bind(actuator).with_context(|| {
                format!("cannot bind --actuator {actuator}; it must be the daemon's network.actuator, on this machine and not in use")
            })?)?;
            let sender = UdpSocket::bind("127.0.0.1:0")?;
            paced_send(&sender, target, &bins, n, rate_hz, &faults);
            wait_for_last(&sink, n, rate_hz);
            (
                sink.finish_per_seq(0, n),
                format!("running daemon at {target}"),
            )
        }
        _ => {
            let exe = super::find_decoderd(args.decoderd.as_deref())?;
            let sink = ActuatorSink::on_loopback()?;
            let d = Launch::new(&model_path, &work, sink.addr)
                .binary(exe.as_deref())
                .config(args.config.as_deref())
                .arm(true)
                .start()?;
            let sender = UdpSocket::bind("127.0.0.1:0")?;
            paced_send(&sender, d.listen, &bins, n, rate_hz, &faults);
            wait_for_last(&sink, n, rate_hz);
            let note = if d.is_process() {
                "spawned decoderd".to_string()
            } else {
                "decoderd in-process".to_string()
            };
            d.stop()?;
            (sink.finish_per_seq(0, n), note)
        }
    };
    let outcome = analyse(&rec, n, rate_hz, &faults, &floor_ns);
    let facts = RunFacts::gather(&model_path, args.config.as_deref());
    write_report(
        args,
        &rec,
        &outcome,
        n,
        rate_hz,
        channels,
        &daemon_note,
        &floor_ns,
        &faults,
        &facts,
    )?;
    print_summary(&outcome, args);
    println!("report -> {}", args.report.join("report.html").display());

    let mut failures = Vec::new();
    if outcome.missed_slots > 0 {
        failures.push(format!(
            "{} slots got no velocity packet",
            outcome.missed_slots
        ));
    }
    if outcome.unexpected_dropouts > 0 {
        failures.push(format!(
            "{} bins that were sent on time were not decoded (coasted)",
            outcome.unexpected_dropouts
        ));
    }
    if let Some(b) = args.budget_p99_us {
        if outcome.recv_to_send.p99 > b {
            failures.push(format!(
                "recv→send p99 {:.1} µs is over the budget of {b} µs",
                outcome.recv_to_send.p99
            ));
        }
    }
    if !failures.is_empty() {
        return Err(CheckFailed(format!("bench failed: {}", failures.join("; "))).into());
    }
    println!("bench passed");
    Ok(())
}

/// Waits until the packet for the last bin has come (the daemon answers
/// it one deadline after it is due), or a second past that.
fn wait_for_last(sink: &ActuatorSink, n: usize, rate_hz: f64) {
    let patience = Duration::from_secs(1) + Duration::from_secs_f64(4.0 / rate_hz);
    let _ = sink.wait_for_seq(n as u64 - 1, patience);
}

fn html_escape(s: &str) -> String {
    s.replace('&', "&amp;")
        .replace('<', "&lt;")
        .replace('>', "&gt;")
}

fn analyse(
    rec: &SinkRecord,
    n: usize,
    rate_hz: f64,
    faults: &impl Fn(usize) -> BinFault,
    floor_ns: &[u64],
) -> Outcome {
    let period_ns = 1e9 / rate_hz;
    let mut recv_to_send = Vec::new();
    let mut round_trip = Vec::new();
    // Per seq: when its packet left, against the bin clock (NaN: none).
    let mut offsets = vec![f64::NAN; n];
    let (mut missed, mut unexpected, mut flagged, mut n_faults) = (0, 0, 0, 0);
    for (k, offset) in offsets.iter_mut().enumerate() {
        let f = faults(k);
        let injected = matches!(f, BinFault::Drop | BinFault::Malformed);
        n_faults += usize::from(injected);
        let Some(p) = &rec.packets[k] else {
            missed += 1;
            continue;
        };
        *offset = p.sent_ns as f64 - k as f64 * period_ns;
        let coasted = p.flags & FLAG_BIN_MISSING != 0;
        if injected {
            flagged += usize::from(coasted);
        } else if coasted && f == BinFault::None {
            unexpected += 1;
        }
        if !coasted {
            recv_to_send.push(p.sent_ns.saturating_sub(p.recv_ns));
            if p.origin_ns != 0 && rec.received_ns[k] >= p.origin_ns {
                round_trip.push(rec.received_ns[k] - p.origin_ns);
            }
        }
    }
    let mut sorted: Vec<f64> = offsets.iter().copied().filter(|o| !o.is_nan()).collect();
    sorted.sort_by(f64::total_cmp);
    let reference = sorted.get(sorted.len() / 2).copied().unwrap_or(0.0);
    let jitter_us: Vec<f64> = offsets
        .iter()
        .map(|o| (o - reference).abs() / 1e3)
        .collect();
    let jitter: Vec<u64> = jitter_us
        .iter()
        .filter(|j| !j.is_nan())
        .map(|j| (j * 1e3).round() as u64)
        .collect();
    Outcome {
        missed_slots: missed,
        unexpected_dropouts: unexpected,
        faults_flagged: flagged,
        faults: n_faults,
        recv_to_send: Percentiles::of_samples_ns(&recv_to_send),
        round_trip: Percentiles::of_samples_ns(&round_trip),
        jitter: Percentiles::of_samples_ns(&jitter),
        floor: Percentiles::of_samples_ns(floor_ns),
        jitter_us,
    }
}

fn print_summary(o: &Outcome, args: &Args) {
    let line = |name: &str, p: &Percentiles| {
        println!(
            "  {name:<24} p50 {:8.1}  p90 {:8.1}  p99 {:8.1}  p99.9 {:8.1}  max {:9.1} µs",
            p.p50, p.p90, p.p99, p.p999, p.max
        )
    };
    line("decoderd recv→send", &o.recv_to_send);
    line("front end → actuator", &o.round_trip);
    line("loopback floor (relay)", &o.floor);
    line("send jitter vs bin clock", &o.jitter);
    println!(
        "  missed slots {}   bins sent but not decoded {}   injected faults {} ({} answered as missing)",
        o.missed_slots, o.unexpected_dropouts, o.faults, o.faults_flagged
    );
    if let Some(b) = args.budget_p99_us {
        println!("  budget: recv→send p99 ≤ {b} µs");
    }
}

#[allow(clippy::too_many_arguments)]
fn write_report(
    args: &Args,
    rec: &SinkRecord,
    o: &Outcome,
    n: usize,
    rate_hz: f64,
    channels: usize,
    daemon_note: &str,
    floor_ns: &[u64],
    faults: &impl Fn(usize) -> BinFault,
    facts: &RunFacts,
) -> Result<()> {
    let dir = &args.report;
    let summary = json!({
        "bins": n, "rate_hz": rate_hz, "channels": channels, "daemon": daemon_note,
        "model": facts.model, "model_sha256": facts.model_sha256, "config": facts.config,
        "date": facts.date, "host": facts.host, "tool_version": facts.version,
        "recv_to_send_us": serde_json::to_value(&o.recv_to_send)?,
        "round_trip_us": serde_json::to_value(&o.round_trip)?,
        "loopback_floor_round_trip_us": serde_json::to_value(&o.floor)?,
        "send_jitter_us": serde_json::to_value(&o.jitter)?,
        "missed_slots": o.missed_slots,
        "bins_sent_not_decoded": o.unexpected_dropouts,
        "injected_faults": o.faults,
        "injected_faults_answered_missing": o.faults_flagged,
        "heartbeats_after_stream": rec.extra,
        "repeated_packets": rec.repeated,
        "budget_p99_us": args.budget_p99_us,
    });
    write_atomic(
        &dir.join("summary.json"),
        serde_json::to_string_pretty(&summary)?.as_bytes(),
    )?;
    let mut csv =
        String::from("seq,fault,state,flags,recv_to_send_us,round_trip_us,send_jitter_us\n");
    let mut over_time = Vec::new();
    let mut rt_over_time = Vec::new();
    let mut jitter_over_time = Vec::new();
    let mut r2s = Vec::new();
    let mut rts = Vec::new();
    for k in 0..n {
        let fault = match faults(k) {
            BinFault::None => "",
            BinFault::Drop => "drop",
            BinFault::Malformed => "malformed",
            BinFault::Hold => "burst",
        };
        match &rec.packets[k] {
            None => {
                let _ = writeln!(csv, "{k},{fault},,,,");
            }
            Some(p) => {
                let decoded = p.flags & FLAG_BIN_MISSING == 0;
                let r = if decoded {
                    (p.sent_ns.saturating_sub(p.recv_ns)) as f64 / 1e3
                } else {
                    f64::NAN
                };
                let t = if decoded && p.origin_ns != 0 && rec.received_ns[k] >= p.origin_ns {
                    (rec.received_ns[k] - p.origin_ns) as f64 / 1e3
                } else {
                    f64::NAN
                };
                let jit = o.jitter_us[k];
                let _ = writeln!(csv, "{k},{fault},{},{},{r},{t},{jit}", p.state, p.flags);
                let at = k as f64 / rate_hz;
                if jit.is_finite() {
                    jitter_over_time.push((at, jit));
                }
                if decoded {
                    over_time.push((at, r));
                    if t.is_finite() {
                        rt_over_time.push((at, t));
                    }
                    r2s.push(r);
                    if t.is_finite() {
                        rts.push(t);
                    }
                }
            }
        }
    }
    write_atomic(&dir.join("bins.csv"), csv.as_bytes())?;
    let floor_us: Vec<f64> = floor_ns.iter().map(|&v| v as f64 / 1e3).collect();
    plot::latency_histogram(
        &[
            ("decoderd recv→send", &r2s),
            ("front end → actuator", &rts),
            ("loopback floor", &floor_us),
        ],
        &dir.join("latency-histogram"),
    )?;
    plot::latency_over_time(
        &[
            ("decoderd recv→send", &over_time),
            ("front end → actuator", &rt_over_time),
            ("send jitter vs bin clock", &jitter_over_time),
        ],
        &dir.join("latency-over-time"),
    )?;
    let verdict = if o.missed_slots == 0
        && o.unexpected_dropouts == 0
        && args.budget_p99_us.is_none_or(|b| o.recv_to_send.p99 <= b)
    {
        "<p class=pass>PASS</p>"
    } else {
        "<p class=fail>FAIL</p>"
    };
    let row = |name: &str, p: &Percentiles| {
        format!(
            "<tr><td>{name}</td><td>{:.1}</td><td>{:.1}</td><td>{:.1}</td><td>{:.1}</td><td>{:.1}</td><td>{}</td></tr>",
            p.p50, p.p90, p.p99, p.p999, p.max, p.count
        )
    };
    let few = [&o.recv_to_send, &o.round_trip, &o.floor, &o.jitter]
        .iter()
        .map(|p| p.count)
        .min()
        .unwrap_or(0);
    let few_note = if few < 1000 {
        format!(
            "<p class=note>p99.9 from fewer than 1000 samples ({few} in the smallest row) is the largest one or two values, not a stable estimate of the tail; bench longer (--seconds) to estimate it.</p>"
        )
    } else {
        String::new()
    };
    let html = format!(
        r#"<!doctype html><meta charset=utf-8><title>decoderd bench</title>
<style>body{{font-family:sans-serif;max-width:960px;margin:2em auto}}table{{border-collapse:collapse}}td,th{{border:1px solid #ccc;padding:4px 10px;text-align:right}}td:first-child,th:first-child{{text-align:left}}.pass{{color:#1a7f37;font-size:2em}}.fail{{color:#c62828;font-size:2em}}.note{{color:#555;font-size:0.9em}}img{{max-width:100%}}table.facts td{{text-align:left}}</style>
<h1>decoderd loop bench</h1>
{verdict}
<table class=facts>
<tr><td>model</td><td>{model}</td></tr>
<tr><td>model sha256</td><td><code>{sha}</code></td></tr>
<tr><td>daemon configuration</td><td>{config}</td></tr>
<tr><td>daemon</td><td>{daemon_note}</td></tr>
<tr><td>run</td><td>{date} on {host}, replay-tool {version}</td></tr>
<tr><td>stream</td><td>{n} bins at {rate_hz:.0} Hz × {channels} channels</td></tr>
<tr><td>budget</td><td>{budget}</td></tr>
</table>
<h2>Latency</h2>
<table><tr><th>latency (µs)</th><th>p50</th><th>p90</th><th>p99</th><th>p99.9</th><th>max</th><th>samples</th></tr>
{r1}{r2}{r3}{r4}</table>
<p class=note><b>decoderd recv→send</b>: from the daemon reading a bin to it sending the velocity packet, stamped by the daemon itself.
<b>front end → actuator</b>: from the front end's send to the actuator sink's read, the whole loop as a rig sees it.
<b>loopback floor</b>: the same bins through a relay thread on this machine that receives and sends without decoding — the part of the round trip no decoder can remove.
<b>send jitter</b>: how far each packet left from the bin clock (the median offset taken as zero); a slot whose bin was missing is answered at its deadline, so it leaves late by the deadline slack on purpose.</p>
{few_note}
<h2>Dropouts</h2>
<p>Missed slots (no packet): <b>{missed}</b>. Bins sent on time but not decoded: <b>{dropouts}</b>. Injected faults: {faults} ({flagged} answered as missing).
Heartbeat packets after the stream: {extra} — after the last bin the daemon keeps answering every slot (halted packets), so an actuator can tell a stopped stream from a dead daemon; they are not misses.</p>
<h2>Latency histogram</h2><img src="latency-histogram.svg" alt="latency histogram">
<h2>Latency over the run</h2><img src="latency-over-time.svg" alt="latency of each bin over the run">
<p>Per-bin figures: <a href="bins.csv">bins.csv</a>; summary: <a href="summary.json">summary.json</a>.</p>
"#,
        model = html_escape(&facts.model),
        sha = facts.model_sha256,
        config = html_escape(&facts.config),
        date = facts.date,
        host = html_escape(&facts.host),
        version = facts.version,
        budget = args
            .budget_p99_us
            .map_or("none".to_string(), |b| format!("recv→send p99 ≤ {b} µs")),
        r1 = row("decoderd recv→send", &o.recv_to_send),
        r2 = row("front end → actuator", &o.round_trip),
        r3 = row("loopback floor (relay)", &o.floor),
        r4 = row("send jitter vs bin clock", &o.jitter),
        missed = o.missed_slots,
        dropouts = o.unexpected_dropouts,
        faults = o.faults,
        flagged = o.faults_flagged,
        extra = rec.extra,
    );
    write_atomic(&dir.join("report.html"), html.as_bytes())?;
    Ok(())
}
