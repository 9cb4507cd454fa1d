//! `replay-tool import FILE.nwb --out DIR --bin-ms B [--position PATH]
//! [--start S] [--stop S]`: a Neurodata Without Borders 2.x file (the open
//! standard for neurophysiology data; HDF5 underneath) written as a
//! session directory (PROTOCOL.md §3, §5), so a lab's archive comes in
//! without a conversion script of its own.
//!
//! One channel per row of the `units` table (its ragged `spike_times`,
//! cut by `spike_times_index`), binned as half-open intervals
//! [S + kB, S + (k+1)B); the position SpatialSeries (data × `conversion`,
//! timestamps regular or not) interpolated linearly at bin centres, with
//! velocity the displacement over the bin; trials from `intervals/trials`.
//! The HDF5 file is read by `hdf5-pure`, a pure-Rust reader, so the build
//! needs no C library.

use std::path::{Path, PathBuf};

use anyhow::{Context, Result, bail};
use decoder_core::Block;
use decoder_core::formats::block::Trial;
use decoder_core::formats::log_block::kinematic_names;
use decoder_core::linalg::Mat;
use hdf5_pure::{AttrValue, File};

#[derive(Debug, clap::Args)]
pub struct Args {
    /// The NWB file (.nwb).
    pub file: PathBuf,
    /// Session directory to write.
    #[arg(long)]
    pub out: PathBuf,
    /// Bin width in ms.
    #[arg(long)]
    pub bin_ms: f64,
    /// The position SpatialSeries, as its path in the file (default: the
    /// first one under processing/behavior/Position).
    #[arg(long)]
    pub position: Option<String>,
    /// First bin's start, s [default: the position's first timestamp].
    #[arg(long)]
    pub start: Option<f64>,
    /// Bins end at or before this time, s [default: the position's last
    /// timestamp].
    #[arg(long)]
    pub stop: Option<f64>,
}

/// What an import read, before it is a block.
pub struct Imported {
    pub block: Block,
    pub position_path: String,
    pub spikes: usize,
}

fn dataset_f64(f: &File, file: &Path, path: &str) -> Result<Vec<f64>> {
    f.dataset(path)
        .map_err(|e| anyhow::anyhow!("{}: {path}: {e}", file.display()))?
        .read_f64()
        .map_err(|e| anyhow::anyhow!("{}: {path}: cannot read: {e}", file.display()))
}

fn f64_attr(attrs: &std::collections::HashMap<String, AttrValue>, key: &str) -> Option<f64> {
    match attrs.get(key)? {
        AttrValue::F64(v) => Some(*v),
        AttrValue::F64Array(v) => v.first().copied(),
        AttrValue::I64(v) => Some(*v as f64),
        _ => None,
    }
}

/// The position series' timestamps and (T, D) values with `conversion`
/// applied.
fn read_position(f: &File, file: &Path, series: &str) -> Result<(Vec<f64>, Vec<f64>, usize)> {
    let data_path = format!("{series}/data");
    let ds = f.dataset(&data_path).map_err(|e| {
        anyhow::anyhow!(
            "{}: --position {series}: no such SpatialSeries ({e}); list the series under processing/behavior/Position",
            file.display()
        )
    })?;
    let shape = ds
        .shape()
        .map_err(|e| anyhow::anyhow!("{}: {data_path}: {e}", file.display()))?;
    let (rows, dims) = match shape.as_slice() {
        [r] => (*r as usize, 1),
        [r, d] => (*r as usize, *d as usize),
        other => bail!(
            "{}: {data_path}: shape {other:?}; expected (time, dimensions)",
            file.display()
        ),
    };
    if !(1..=8).contains(&dims) {
        bail!(
            "{}: {data_path}: {dims} position dimensions; 1 to 8 are supported",
            file.display()
        );
    }
    let attrs = ds
        .attrs()
        .map_err(|e| anyhow::anyhow!("{}: {data_path}: {e}", file.display()))?;
    let conversion = f64_attr(&attrs, "conversion").unwrap_or(1.0);
    let offset = f64_attr(&attrs, "offset").unwrap_or(0.0);
    let mut values = ds
        .read_f64()
        .map_err(|e| anyhow::anyhow!("{}: {data_path}: cannot read: {e}", file.display()))?;
    for v in &mut values {
        *v = *v * conversion + offset;
    }
    let ts_path = format!("{series}/timestamps");
    let timestamps = if f.dataset(&ts_path).is_ok() {
        dataset_f64(f, file, &ts_path)?
    } else {
        let st_path = format!("{series}/starting_time");
        let st = f.dataset(&st_path).map_err(|_| {
            anyhow::anyhow!(
                "{}: {series} has neither timestamps nor starting_time",
                file.display()
            )
        })?;
        let rate = f64_attr(&st.attrs().unwrap_or_default(), "rate")
            .with_context(|| format!("{}: {st_path} has no rate", file.display()))?;
        let t0 = dataset_f64(f, file, &st_path)?
            .first()
            .copied()
            .unwrap_or(0.0);
        (0..rows).map(|i| t0 + i as f64 / rate).collect()
    };
    if timestamps.len() != rows {
        bail!(
            "{}: {ts_path} has {} timestamps for {rows} samples",
            file.display(),
            timestamps.len()
        );
    }
    if let Some(i) = (1..rows).find(|&i| timestamps[i] < timestamps[i - 1]) {
        bail!(
            "{}: {ts_path}: timestamps go backwards at sample {i} ({} after {}); the position cannot be interpolated",
            file.display(),
            timestamps[i],
            timestamps[i - 1]
        );
    }
    if let Some(i) = values.iter().position(|v| !v.is_finite()) {
        bail!(
            "{}: {data_path}: sample {} is not finite",
            file.display(),
            i / dims
        );
    }
    Ok((timestamps, values, dims))
}

/// `numpy.interp`: linear between the samples, the end values outside.
fn interp(x: f64, t: &[f64], y: &[f64], dims: usize, d: usize) -> f64 {
    let n = t.len();
    if x <= t[0] {
        return y[d];
    }
    if x >= t[n - 1] {
        return y[(n - 1) * dims + d];
    }
    // The last sample at or before x.
    let j = t.partition_point(|v| *v <= x) - 1;
    let (x0, x1) = (t[j], t[j + 1]);
    let (y0, y1) = (y[j * dims + d], y[(j + 1) * dims + d]);
    if x1 == x0 {
        return y0;
    }
    let slope = (y1 - y0) / (x1 - x0);
    slope * (x - x0) + y0
}

pub fn import(args: &Args) -> Result<Imported> {
    let file = &args.file;
    let bin_width = super::bin_width_flag(args.bin_ms)?;
    let b = bin_width.seconds();
    let f = File::open(file)
        .map_err(|e| anyhow::anyhow!("{}: not a readable HDF5/NWB file: {e}", file.display()))?;
    // Units.
    let units = f.group("units").map_err(|_| {
        anyhow::anyhow!(
            "{}: no units table (/units); an import needs the sorted or thresholded spike times of each channel there",
            file.display()
        )
    })?;
    let members = units.datasets().unwrap_or_default();
    if !members.iter().any(|m| m == "spike_times") {
        bail!(
            "{}: the units table has no spike_times column",
            file.display()
        );
    }
    let flat = dataset_f64(&f, file, "units/spike_times")?;
    let index: Vec<i64> = f
        .dataset("units/spike_times_index")
        .and_then(|d| d.read_i64())
        .map_err(|e| anyhow::anyhow!("{}: units/spike_times_index: {e}", file.display()))?;
    let ids: Vec<i64> = f
        .dataset("units/id")
        .and_then(|d| d.read_i64())
        .unwrap_or_else(|_| (0..index.len() as i64).collect());
    if index.is_empty() {
        bail!("{}: the units table has no rows", file.display());
    }
    let mut channels = Vec::with_capacity(index.len());
    let mut from = 0usize;
    for (row, &end) in index.iter().enumerate() {
        if end < from as i64 || end as usize > flat.len() {
            bail!(
                "{}: units/spike_times_index[{row}] = {end} is outside {from}..={} (spike_times holds {} values); the file is damaged",
                file.display(),
                flat.len(),
                flat.len()
            );
        }
        channels.push(&flat[from..end as usize]);
        from = end as usize;
    }
    // Position.
    let series = match &args.position {
        Some(p) => p.trim_start_matches('/').to_string(),
        None => {
            let group = "processing/behavior/Position";
            let g = f.group(group).map_err(|_| {
                anyhow::anyhow!(
                    "{}: no {group}; name the position series with --position PATH",
                    file.display()
                )
            })?;
            let mut names = g.groups().unwrap_or_default();
            names.sort();
            let first = names
                .into_iter()
                .next()
                .with_context(|| format!("{}: {group} holds no SpatialSeries", file.display()))?;
            format!("{group}/{first}")
        }
    };
    let (t, pos, dims) = read_position(&f, file, &series)?;
    let start = args.start.unwrap_or(t[0]);
    let stop = args.stop.unwrap_or(t[t.len() - 1]);
    if !(start.is_finite() && stop.is_finite() && stop > start) {
        bail!("--start {start} --stop {stop}: the stop must come after the start");
    }
    let n_bins = ((stop - start) / b).floor() as usize;
    if n_bins == 0 {
        bail!(
            "{}: {start} s to {stop} s holds no whole {} ms bin",
            file.display(),
            args.bin_ms
        );
    }
    let edges: Vec<f64> = (0..=n_bins).map(|k| start + k as f64 * b).collect();
    let n = channels.len();
    let mut counts = vec![0u16; n_bins * n];
    let mut spikes = 0usize;
    for (ch, times) in channels.iter().enumerate() {
        for &s in *times {
            if !(s >= edges[0] && s < edges[n_bins]) {
                continue;
            }
            // The bin whose [edge, next edge) holds s.
            let k = edges.partition_point(|e| *e <= s) - 1;
            let c = &mut counts[k * n + ch];
            *c = c.saturating_add(1);
            spikes += 1;
        }
    }
    let mut kin = Mat::zeros(n_bins, 2 * dims);
    for k in 0..n_bins {
        let centre = start + (k as f64 + 0.5) * b;
        for d in 0..dims {
            kin.set(k, d, interp(centre, &t, &pos, dims, d));
            let p0 = interp(edges[k], &t, &pos, dims, d);
            let p1 = interp(edges[k + 1], &t, &pos, dims, d);
            kin.set(k, dims + d, (p1 - p0) / b);
        }
    }
    let trials = read_trials(&f, file, start, b, n_bins)?;
    let block = Block {
        bin_width,
        n_bins,
        n_channels: n,
        counts,
        kinematic_names: kinematic_names(dims),
        kinematics: Some(kin),
        trials,
        channel_labels: Some(ids.iter().map(|i| i.to_string()).collect()),
        notes: Some(format!(
            "imported from {}: units table ({n} channels), position {series}, {start} s to {stop} s",
            file.display()
        )),
        valid: None,
    };
    Ok(Imported {
        block,
        position_path: series,
        spikes,
    })
}

fn read_trials(
    f: &File,
    file: &Path,
    start: f64,
    b: f64,
    n_bins: usize,
) -> Result<Option<Vec<Trial>>> {
    let Ok(g) = f.group("intervals/trials") else {
        return Ok(None);
    };
    let cols = g.datasets().unwrap_or_default();
    let has = |c: &str| cols.iter().any(|x| x == c);
    if !(has("start_time") && has("stop_time")) {
        bail!(
            "{}: intervals/trials has no start_time and stop_time columns",
            file.display()
        );
    }
    let starts = dataset_f64(f, file, "intervals/trials/start_time")?;
    let stops = dataset_f64(f, file, "intervals/trials/stop_time")?;
    let ids: Vec<i64> = f
        .dataset("intervals/trials/id")
        .and_then(|d| d.read_i64())
        .unwrap_or_else(|_| (0..starts.len() as i64).collect());
    let target = |c: &str| -> Result<Vec<f64>> {
        if has(c) {
            dataset_f64(f, file, &format!("intervals/trials/{c}"))
        } else {
            Ok(vec![0.0; starts.len()])
        }
    };
    let (tx, ty) = (target("target_x")?, target("target_y")?);
    let mut trials = Vec::new();
    for i in 0..starts.len().min(stops.len()) {
        // A trial cut by the window keeps the part inside it.
        let s = ((starts[i] - start) / b).floor().max(0.0);
        let e = ((stops[i] - start) / b).ceil().min(n_bins as f64);
        if !(s.is_finite() && e.is_finite()) || e <= s {
            continue;
        }
        trials.push(Trial {
            trial: ids.get(i).copied().unwrap_or(i as i64).max(0) as u32,
            start_bin: s as usize,
            end_bin: e as usize,
            target_x: tx.get(i).copied().unwrap_or(0.0),
            target_y: ty.get(i).copied().unwrap_or(0.0),
        });
    }
    Ok(Some(trials))
}

pub fn run(args: &Args) -> Result<()> {
    let imported = import(args)?;
    let b = &imported.block;
    b.write(&args.out)
        .with_context(|| format!("writing {}", args.out.display()))?;
    println!(
        "imported {} -> {}: {} bins of {} ms, {} channels ({} spikes in range), position {} ({}), {} trials",
        args.file.display(),
        args.out.display(),
        b.n_bins,
        b.bin_width.ms(),
        b.n_channels,
        imported.spikes,
        imported.position_path,
        b.kinematic_names.join(", "),
        b.trials.as_ref().map_or(0, Vec::len)
    );
    Ok(())
}
