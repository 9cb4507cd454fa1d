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
//! is measured in the same run. Packets are measured as they come
//! ([`crate::bench_meter`]), so a bench of hours holds no more memory than
//! one of a minute. It writes JSON, CSV, plots and a one-page HTML report, and exits 1 when a slot got no packet, a bin that was sent
//! was not decoded, or recv→send p99 is over `--budget-p99-us`.

use std::fmt::Write as _;
use std::net::UdpSocket;
use std::path::{Path, PathBuf};
use std::sync::{Arc, Mutex};
use std::time::Duration;

use anyhow::{Context, Result, bail};
use daemon::status::Percentiles;
use daemon_rig::actuator::Arrival;
use daemon_rig::{ActuatorSink, Launch, loopback_floor, paced_send};
use decoder_core::ModelFile;
use decoder_core::sim::reaching::{SimOptions, simulate};
use decoder_core::wire::packet;
use hdrhistogram::Histogram;
use serde_json::json;

use crate::bench_meter::{BenchMeter, FaultSchedule, Measured};
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

fn fault_schedule(args: &Args) -> FaultSchedule {
    FaultSchedule {
        drop_every: args.drop_every,
        malformed_every: args.malformed_every,
        burst_every: args.burst_every,
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
    // Two minutes of bins, or 20 000 when that is fewer: plenty for a
    // synthetic model, and a 1 kHz × 1 024-channel block stays at 40 MB.
    let bins_in_two_minutes = 120_000.0 / args.bin_ms;
    let (model, _) = decoder_core::sim::model::simulated_kalman(
        &SimOptions {
            minutes: 2.0 * (20_000.0 / bins_in_two_minutes).min(1.0),
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

/// The distinct bins the front end cycles through: half a minute of a
/// simulated session, or 4 096 bins when that is fewer, so a 1 kHz ×
/// 1 024-channel bench holds 8 MB of datagrams rather than 60. Bins of
/// the model's kind: counts, or features (version 2 packets of kind 1).
fn bins_for(model: &ModelFile) -> Result<Vec<Vec<u8>>> {
    let bins_in_half_a_minute = 30_000.0 / model.bin_width.ms();
    let (session, _) = simulate(&SimOptions {
        minutes: 0.5 * (4096.0 / bins_in_half_a_minute).min(1.0),
        n_channels: model.decoder.n_channels(),
        bin_width: model.bin_width,
        seed: 77,
        features: model.input == packet::BinKind::Features,
        ..SimOptions::default()
    })?;
    let bin_us = model.bin_width.us();
    let bins = (0..session.n_bins)
        .map(|t| packet::values_datagram(session.bin_values(t), bin_us))
        .collect();
    Ok(bins)
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
    let bins = bins_for(&model)?;
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
    let table = args.report.join("bins.csv");
    let meter = Arc::new(Mutex::new(
        BenchMeter::new(n, rate_hz, faults, Some(&table))
            .with_context(|| format!("cannot write {}", table.display()))?,
    ));
    let into = meter.clone();
    let on_arrival = move |a: Arrival| into.lock().unwrap().arrive(&a);
    let send = |sender: &UdpSocket, target| {
        paced_send(sender, target, &bins, n, rate_hz, |k| faults.at(k))
    };
    let daemon_note = match (&args.daemon, &args.actuator) {
        (Some(daemon), Some(actuator)) => {
            let target = super::socket_addr("--daemon", daemon)?;
            let actuator = super::socket_addr("--actuator", actuator)?;
            let sink = ActuatorSink::metered(UdpSocket::bind(actuator).with_context(|| {
                format!("cannot bind --actuator {actuator}; it must be the daemon's network.actuator, on this machine and not in use")
            })?, on_arrival)?;
            send(&UdpSocket::bind("127.0.0.1:0")?, target);
            wait_for_last(&sink, n, rate_hz);
            sink.finish();
            format!("running daemon at {target}")
        }
        _ => {
            let exe = super::find_decoderd(args.decoderd.as_deref())?;
            let sink = ActuatorSink::metered(UdpSocket::bind("127.0.0.1:0")?, on_arrival)?;
            let d = Launch::new(&model_path, &work, sink.addr)
                .binary(exe.as_deref())
                .config(args.config.as_deref())
                .arm(true)
                .start()?;
            send(&UdpSocket::bind("127.0.0.1:0")?, d.listen);
            wait_for_last(&sink, n, rate_hz);
            let note = if d.is_process() {
                "spawned decoderd".to_string()
            } else {
                "decoderd in-process".to_string()
            };
            d.stop()?;
            sink.finish();
            note
        }
    };
    let meter = Arc::try_unwrap(meter)
        .map_err(|_| anyhow::anyhow!("the actuator sink still holds the bench's meter"))?
        .into_inner()
        .unwrap();
    let measured = meter.finish().map_err(anyhow::Error::msg)?;
    let floor = Percentiles::of_samples_ns(&floor_ns);
    let facts = RunFacts::gather(&model_path, args.config.as_deref());
    let run = Run {
        n,
        rate_hz,
        channels,
        daemon_note: &daemon_note,
        facts: &facts,
    };
    write_report(args, &run, &measured, &floor, &floor_ns)?;
    print_summary(&measured, &floor, args);
    println!("report -> {}", args.report.join("report.html").display());

    let mut failures = Vec::new();
    if measured.missed_slots > 0 {
        failures.push(format!(
            "{} slots got no velocity packet",
            measured.missed_slots
        ));
    }
    if measured.unexpected_dropouts > 0 {
        failures.push(format!(
            "{} bins that were sent on time were not decoded (coasted)",
            measured.unexpected_dropouts
        ));
    }
    let recv_to_send = measured.recv_to_send.percentiles();
    if let Some(b) = args.budget_p99_us {
        if recv_to_send.p99 > b {
            failures.push(format!(
                "recv→send p99 {:.1} µs is over the budget of {b} µs",
                recv_to_send.p99
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

/// What the stream was, for the report.
struct Run<'a> {
    n: usize,
    rate_hz: f64,
    channels: usize,
    daemon_note: &'a str,
    facts: &'a RunFacts,
}

fn print_summary(m: &Measured, floor: &Percentiles, args: &Args) {
    let line = |name: &str, p: &Percentiles| {
        println!(
            "  {name:<24} p50 {:8.1}  p90 {:8.1}  p99 {:8.1}  p99.9 {:8.1}  max {:9.1} µs",
            p.p50, p.p90, p.p99, p.p999, p.max
        )
    };
    line("decoderd recv→send", &m.recv_to_send.percentiles());
    line("front end → actuator", &m.round_trip.percentiles());
    line("loopback floor (relay)", floor);
    line("send jitter vs bin clock", &m.jitter.percentiles());
    println!(
        "  missed slots {}   bins sent but not decoded {}   injected faults {} ({} answered as missing)",
        m.missed_slots, m.unexpected_dropouts, m.faults, m.faults_flagged
    );
    if let Some(b) = args.budget_p99_us {
        println!("  budget: recv→send p99 ≤ {b} µs");
    }
}

/// `seconds.csv`: one row per envelope bucket, three figures per series.
fn envelope_table(m: &Measured) -> String {
    let series = [&m.recv_to_send, &m.round_trip, &m.jitter];
    let mut csv = String::from("t_s");
    for key in ["recv_to_send", "round_trip", "send_jitter"] {
        for stat in ["median_us", "p99_us", "max_us", "count"] {
            let _ = write!(csv, ",{key}_{stat}");
        }
    }
    csv.push('\n');
    // The buckets any series has, in time order (a bucket in which every
    // bin was missing has no point in any series).
    let mut times: Vec<f64> = series
        .iter()
        .flat_map(|s| s.envelopes.iter().map(|e| e.t_s))
        .collect();
    times.sort_by(f64::total_cmp);
    times.dedup();
    let mut at = [0usize; 3];
    for t in times {
        let _ = write!(csv, "{t}");
        for (s, i) in series.iter().zip(at.iter_mut()) {
            match s.envelopes.get(*i) {
                Some(e) if e.t_s == t => {
                    let _ = write!(
                        csv,
                        ",{:.1},{:.1},{:.1},{}",
                        e.median_us, e.p99_us, e.max_us, e.count
                    );
                    *i += 1;
                }
                _ => csv.push_str(",,,,0"),
            }
        }
        csv.push('\n');
    }
    csv
}

fn write_report(
    args: &Args,
    run: &Run,
    m: &Measured,
    floor: &Percentiles,
    floor_ns: &[u64],
) -> Result<()> {
    let dir = &args.report;
    let facts = run.facts;
    let (r2s, rt, jit) = (
        m.recv_to_send.percentiles(),
        m.round_trip.percentiles(),
        m.jitter.percentiles(),
    );
    let summary = json!({
        "bins": run.n, "rate_hz": run.rate_hz, "channels": run.channels, "daemon": run.daemon_note,
        "model": facts.model, "model_sha256": facts.model_sha256, "config": facts.config,
        "date": facts.date, "host": facts.host, "tool_version": facts.version,
        "recv_to_send_us": serde_json::to_value(&r2s)?,
        "round_trip_us": serde_json::to_value(&rt)?,
        "loopback_floor_round_trip_us": serde_json::to_value(floor)?,
        "send_jitter_us": serde_json::to_value(&jit)?,
        "missed_slots": m.missed_slots,
        "bins_sent_not_decoded": m.unexpected_dropouts,
        "injected_faults": m.faults,
        "injected_faults_answered_missing": m.faults_flagged,
        "heartbeats_after_stream": m.extra,
        "repeated_packets": m.repeated,
        "packets_after_window": m.after_window,
        "envelope_bucket_s": m.bucket_s,
        "budget_p99_us": args.budget_p99_us,
    });
    write_atomic(
        &dir.join("summary.json"),
        serde_json::to_string_pretty(&summary)?.as_bytes(),
    )?;
    write_atomic(&dir.join("seconds.csv"), envelope_table(m).as_bytes())?;
    let mut floor_hist = Histogram::<u64>::new_with_bounds(1, 3_600_000_000_000, 3)?;
    for &v in floor_ns {
        floor_hist.saturating_record(v.max(1));
    }
    plot::latency_histogram(
        &[
            ("decoderd recv→send", &m.recv_to_send.histogram),
            ("front end → actuator", &m.round_trip.histogram),
            ("loopback floor", &floor_hist),
        ],
        &dir.join("latency-histogram"),
    )?;
    plot::latency_envelopes(
        &[
            (m.recv_to_send.name, &m.recv_to_send.envelopes),
            (m.round_trip.name, &m.round_trip.envelopes),
            (m.jitter.name, &m.jitter.envelopes),
        ],
        m.bucket_s,
        &dir.join("latency-over-time"),
    )?;
    let verdict = if m.missed_slots == 0
        && m.unexpected_dropouts == 0
        && args.budget_p99_us.is_none_or(|b| r2s.p99 <= b)
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
    let few = [&r2s, &rt, floor, &jit]
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
    let bucket = if m.bucket_s == 1.0 {
        "second".to_string()
    } else {
        format!("{} s", m.bucket_s)
    };
    let longest = [&m.recv_to_send, &m.round_trip, &m.jitter]
        .iter()
        .map(|s| s.envelopes.len())
        .max()
        .unwrap_or(0);
    let drawn_s = plot::plotted_bucket_s(longest, m.bucket_s);
    let drawn = if drawn_s == m.bucket_s {
        format!("For each {bucket} of the run")
    } else {
        format!(
            "Drawn in buckets of {drawn_s} s (each the median of its {bucket} medians, and the largest p99 and max), so the run fits the page; seconds.csv has every {bucket}. For each bucket"
        )
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
<tr><td>stream</td><td>{n} bins at {rate_hz:.0} Hz × {channels} channels ({minutes:.1} min)</td></tr>
<tr><td>budget</td><td>{budget}</td></tr>
</table>
<h2>Latency</h2>
<table><tr><th>latency (µs)</th><th>p50</th><th>p90</th><th>p99</th><th>p99.9</th><th>max</th><th>samples</th></tr>
{r1}{r2}{r3}{r4}</table>
<p class=note><b>decoderd recv→send</b>: from the daemon reading a bin to it sending the velocity packet, stamped by the daemon itself.
<b>front end → actuator</b>: from the front end's send to the actuator sink's read, the whole loop as a rig sees it.
<b>loopback floor</b>: the same bins through a relay thread on this machine that receives and sends without decoding — the part of the round trip no decoder can remove (the first {floor_s:.0} s of the stream).
<b>send jitter</b>: how far each packet left from the bin clock (the median offset of the first second taken as zero); a slot whose bin was missing is answered at its deadline, so it leaves late by the deadline slack on purpose.
Percentiles come from running histograms with three significant digits (within 0.1 % of the exact order statistic).</p>
{few_note}
<h2>Dropouts</h2>
<p>Missed slots (no packet): <b>{missed}</b>. Bins sent on time but not decoded: <b>{dropouts}</b>. Injected faults: {faults} ({flagged} answered as missing).
Heartbeat packets after the stream: {extra} — after the last bin the daemon keeps answering every slot (halted packets), so an actuator can tell a stopped stream from a dead daemon; they are not misses.</p>
<h2>Latency histogram</h2><img src="latency-histogram.svg" alt="latency histogram">
<h2>Latency over the run</h2>
<p class=note>One panel per series. {drawn}: the median (dark line), the p99 (middle line) and the largest value (light line) of the bins in it.</p>
<img src="latency-over-time.svg" alt="per-{bucket} median, p99 and max of each latency series over the run">
<p>Per-{bucket} figures: <a href="seconds.csv">seconds.csv</a>; per-bin figures: <a href="bins.csv">bins.csv</a> (written as the bins were measured; about 60 bytes a bin); summary: <a href="summary.json">summary.json</a>.</p>
"#,
        model = html_escape(&facts.model),
        sha = facts.model_sha256,
        config = html_escape(&facts.config),
        daemon_note = run.daemon_note,
        date = facts.date,
        host = html_escape(&facts.host),
        version = facts.version,
        n = run.n,
        rate_hz = run.rate_hz,
        channels = run.channels,
        minutes = run.n as f64 / run.rate_hz / 60.0,
        budget = args
            .budget_p99_us
            .map_or("none".to_string(), |b| format!("recv→send p99 ≤ {b} µs")),
        r1 = row("decoderd recv→send", &r2s),
        r2 = row("front end → actuator", &rt),
        r3 = row("loopback floor (relay)", floor),
        r4 = row("send jitter vs bin clock", &jit),
        floor_s = (run.n.min((10.0 * run.rate_hz) as usize)) as f64 / run.rate_hz,
        missed = m.missed_slots,
        dropouts = m.unexpected_dropouts,
        faults = m.faults,
        flagged = m.faults_flagged,
        extra = m.extra,
    );
    write_atomic(&dir.join("report.html"), html.as_bytes())?;
    Ok(())
}
