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
//! needs no C library, and read as a stream: the position a window of
//! rows at a time, the spike times unit after unit in file order (binned
//! into a scratch file of columns), the bins written a chunk at a time, so
//! a multi-gigabyte recording imports in the memory of a short one.

use std::path::{Path, PathBuf};

use anyhow::{Context, Result, bail};
use decoder_core::formats::block::{
    COUNTS_FILE, KINEMATICS_FILE, Trial, write_manifest, write_trials,
};
use decoder_core::formats::log_block::kinematic_names;
use decoder_core::formats::npy_stream::NpyWriter;
use hdf5_pure::{AttrValue, Dataset, File};

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

/// What an import wrote.
pub struct Imported {
    pub n_bins: usize,
    pub n_channels: usize,
    pub dims: usize,
    pub trials: usize,
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

/// A series without timestamps: its `starting_time` and that dataset's
/// `rate` attribute.
fn regular_clock(f: &File, file: &Path, series: &str) -> Result<(f64, f64)> {
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
    Ok((t0, rate))
}

/// Position samples read at a time.
const WINDOW_ROWS: usize = 4096;

/// Where the position series' times come from.
enum Clock {
    /// A `timestamps` dataset, read a window at a time.
    Stamps(String),
    /// `starting_time` and `rate`: sample i at t0 + i / rate.
    Regular { t0: f64, rate: f64 },
}

/// The position SpatialSeries, read a window of samples at a time: its
/// data (× `conversion` + `offset`) and times.
struct Position<'f> {
    file: &'f Path,
    series: String,
    data: Dataset,
    stamps: Option<Dataset>,
    clock: Clock,
    rows: usize,
    dims: usize,
    conversion: f64,
    offset: f64,
}

/// One window of position samples, rows `base .. base + t.len()`.
#[derive(Default)]
struct PositionWindow {
    base: usize,
    t: Vec<f64>,
    y: Vec<f64>,
}

impl<'f> Position<'f> {
    fn open(f: &'f File, file: &'f Path, series: &str) -> Result<Position<'f>> {
        let data_path = format!("{series}/data");
        let data = f.dataset(&data_path).map_err(|e| {
            anyhow::anyhow!(
                "{}: --position {series}: no such SpatialSeries ({e}); list the series under processing/behavior/Position",
                file.display()
            )
        })?;
        let shape = data
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
        if rows == 0 {
            bail!("{}: {data_path} holds no samples", file.display());
        }
        let attrs = data
            .attrs()
            .map_err(|e| anyhow::anyhow!("{}: {data_path}: {e}", file.display()))?;
        let conversion = f64_attr(&attrs, "conversion").unwrap_or(1.0);
        let offset = f64_attr(&attrs, "offset").unwrap_or(0.0);
        let ts_path = format!("{series}/timestamps");
        let (stamps, clock) = match f.dataset(&ts_path) {
            Ok(ts) => {
                let n = ts
                    .shape()
                    .map_err(|e| anyhow::anyhow!("{}: {ts_path}: {e}", file.display()))?
                    .first()
                    .copied()
                    .unwrap_or(0) as usize;
                if n != rows {
                    bail!(
                        "{}: {ts_path} has {n} timestamps for {rows} samples",
                        file.display()
                    );
                }
                (Some(ts), Clock::Stamps(ts_path))
            }
            Err(_) => {
                let (t0, rate) = regular_clock(f, file, series)?;
                (None, Clock::Regular { t0, rate })
            }
        };
        Ok(Position {
            file,
            series: series.to_string(),
            data,
            stamps,
            clock,
            rows,
            dims,
            conversion,
            offset,
        })
    }

    /// Rows `base .. base + len` (clipped to the series).
    fn window(&self, base: usize, len: usize) -> Result<PositionWindow> {
        let len = len.min(self.rows - base);
        let data_path = format!("{}/data", self.series);
        let mut y = self
            .data
            .read_f64_rows(base as u64, len as u64)
            .map_err(|e| {
                anyhow::anyhow!("{}: {data_path}: cannot read: {e}", self.file.display())
            })?;
        for v in &mut y {
            *v = *v * self.conversion + self.offset;
        }
        let t = match (&self.clock, &self.stamps) {
            (Clock::Stamps(path), Some(ts)) => {
                ts.read_f64_rows(base as u64, len as u64).map_err(|e| {
                    anyhow::anyhow!("{}: {path}: cannot read: {e}", self.file.display())
                })?
            }
            (Clock::Regular { t0, rate }, _) => {
                (base..base + len).map(|i| t0 + i as f64 / rate).collect()
            }
            (Clock::Stamps(_), None) => unreachable!("a timestamps clock has its dataset"),
        };
        Ok(PositionWindow { base, t, y })
    }

    /// Checks the whole series a window at a time (times never go back,
    /// every value finite) and returns its first and last timestamps.
    fn check(&self) -> Result<(f64, f64)> {
        let ts_path = format!("{}/timestamps", self.series);
        let data_path = format!("{}/data", self.series);
        let (mut first, mut last) = (f64::NAN, f64::NAN);
        let mut base = 0;
        while base < self.rows {
            let w = self.window(base, WINDOW_ROWS)?;
            for (i, &t) in w.t.iter().enumerate() {
                if base + i == 0 {
                    first = t;
                } else if t < last {
                    bail!(
                        "{}: {ts_path}: timestamps go backwards at sample {} ({t} after {last}); the position cannot be interpolated",
                        self.file.display(),
                        base + i
                    );
                }
                last = t;
            }
            if let Some(i) = w.y.iter().position(|v| !v.is_finite()) {
                bail!(
                    "{}: {data_path}: sample {} is not finite",
                    self.file.display(),
                    base + i / self.dims
                );
            }
            base += w.t.len();
        }
        Ok((first, last))
    }
}

/// `numpy.interp` of the position at times that never decrease, reading
/// the series a window at a time: linear between the samples, the end
/// values outside.
struct Interp<'p, 'f> {
    position: &'p Position<'f>,
    first: PositionWindow,
    last: PositionWindow,
    window: PositionWindow,
    /// The last sample at or before the previous x.
    j: usize,
}

impl<'p, 'f> Interp<'p, 'f> {
    fn new(position: &'p Position<'f>) -> Result<Interp<'p, 'f>> {
        let n = position.rows;
        Ok(Interp {
            position,
            first: position.window(0, 1)?,
            last: position.window(n - 1, 1)?,
            window: position.window(0, WINDOW_ROWS)?,
            j: 0,
        })
    }

    /// Sample `i`'s time, reading the window that holds it (and the rows
    /// after it) when it is not in the current one.
    fn t(&mut self, i: usize) -> Result<f64> {
        let w = &self.window;
        if i < w.base || i >= w.base + w.t.len() {
            self.window = self.position.window(i, WINDOW_ROWS)?;
        }
        Ok(self.window.t[i - self.window.base])
    }

    fn y(&mut self, i: usize, d: usize) -> Result<f64> {
        self.t(i)?;
        Ok(self.window.y[(i - self.window.base) * self.position.dims + d])
    }

    /// p(x) for every dimension into `out`.
    fn at(&mut self, x: f64, out: &mut [f64]) -> Result<()> {
        let n = self.position.rows;
        let dims = self.position.dims;
        if x <= self.first.t[0] {
            out.copy_from_slice(&self.first.y[..dims]);
            return Ok(());
        }
        if x >= self.last.t[0] {
            out.copy_from_slice(&self.last.y[..dims]);
            return Ok(());
        }
        while self.j + 1 < n && self.t(self.j + 1)? <= x {
            self.j += 1;
        }
        let j = self.j;
        let (x0, x1) = (self.t(j)?, self.t(j + 1)?);
        for (d, o) in out.iter_mut().enumerate() {
            let (y0, y1) = (self.y(j, d)?, self.y(j + 1, d)?);
            *o = if x1 == x0 {
                y0
            } else {
                let slope = (y1 - y0) / (x1 - x0);
                slope * (x - x0) + y0
            };
        }
        Ok(())
    }
}

/// One unit's range of the ragged `spike_times` column.
struct UnitRange {
    row: usize,
    from: usize,
    end: usize,
}

/// Spike times read per call: 4 MB, so a column stored in large chunks
/// is read a chunk at a time, in file order.
const SPIKE_WINDOW: usize = 1 << 19;

/// The units table, binned one unit at a time in file order into a
/// scratch file of columns (one unit's counts after another), which is
/// then read back a chunk of bins at a time. Spike times lie unit after
/// unit in the file; binning them in that order reads each stored chunk
/// once, where binning a span of time at a time would read every chunk
/// again for every span.
struct Units<'f> {
    file: &'f Path,
    spike_times: Dataset,
    units: Vec<UnitRange>,
    /// Spike times read per call.
    window: usize,
    /// Column-major counts, `n_bins` u16 per unit, once binned.
    columns: Option<(std::fs::File, usize)>,
}

impl<'f> Units<'f> {
    fn open(f: &'f File, file: &'f Path) -> Result<(Units<'f>, Vec<i64>)> {
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
        let spike_times = f
            .dataset("units/spike_times")
            .map_err(|e| anyhow::anyhow!("{}: units/spike_times: {e}", file.display()))?;
        let total = spike_times
            .shape()
            .map_err(|e| anyhow::anyhow!("{}: units/spike_times: {e}", file.display()))?
            .first()
            .copied()
            .unwrap_or(0) as usize;
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
        let mut list = Vec::with_capacity(index.len());
        let mut from = 0usize;
        for (row, &end) in index.iter().enumerate() {
            if end < from as i64 || end as usize > total {
                bail!(
                    "{}: units/spike_times_index[{row}] = {end} is outside {from}..={total} (spike_times holds {total} values); the file is damaged",
                    file.display(),
                );
            }
            list.push(UnitRange {
                row,
                from,
                end: end as usize,
            });
            from = end as usize;
        }
        Ok((
            Units {
                file,
                spike_times,
                units: list,
                window: SPIKE_WINDOW,
                columns: None,
            },
            ids,
        ))
    }

    /// Bins every unit's spikes in [edge(0), edge(n_bins)) into the
    /// scratch file `scratch`, bin k holding [edge(k), edge(k + 1)). Spike
    /// times must ascend within a unit, as NWB asks. Returns the spikes
    /// counted.
    fn bin_all(
        &mut self,
        n_bins: usize,
        edge: impl Fn(usize) -> f64,
        scratch: std::fs::File,
    ) -> Result<usize> {
        use std::os::unix::fs::FileExt;
        let (lo, hi) = (edge(0), edge(n_bins));
        let width = (hi - lo) / n_bins as f64;
        // The last edge at or before s: a guess from the width, settled
        // against the edges themselves, so the bin is the one the edges
        // say, to the last bit.
        let bin_of = |s: f64| {
            let mut k = (((s - lo) / width) as usize).min(n_bins - 1);
            while k > 0 && edge(k) > s {
                k -= 1;
            }
            while k + 1 < n_bins && edge(k + 1) <= s {
                k += 1;
            }
            k
        };
        let mut column = vec![0u16; n_bins];
        let mut bytes = Vec::with_capacity(2 * n_bins);
        let mut spikes = 0;
        for (ch, u) in self.units.iter().enumerate() {
            column.fill(0);
            let mut previous = f64::NEG_INFINITY;
            let mut next = u.from;
            'unit: while next < u.end {
                let len = self.window.min(u.end - next);
                let window = self
                    .spike_times
                    .read_f64_rows(next as u64, len as u64)
                    .map_err(|e| {
                        anyhow::anyhow!(
                            "{}: units/spike_times: cannot read: {e}",
                            self.file.display()
                        )
                    })?;
                next += len;
                for &s in &window {
                    if s < previous {
                        bail!(
                            "{}: units row {}: spike_times go backwards ({s} after {previous}); an import reads each unit's spike times in ascending order, as NWB asks — sort them in the file",
                            self.file.display(),
                            u.row,
                        );
                    }
                    previous = s;
                    if s >= hi {
                        break 'unit;
                    }
                    // NaN and spikes before the first bin are left out.
                    if s >= lo {
                        let k = bin_of(s);
                        column[k] = column[k].saturating_add(1);
                        spikes += 1;
                    }
                }
            }
            bytes.clear();
            bytes.extend(column.iter().flat_map(|c| c.to_le_bytes()));
            scratch
                .write_all_at(&bytes, (ch * 2 * n_bins) as u64)
                .context("cannot write the import's scratch file")?;
        }
        self.columns = Some((scratch, n_bins));
        Ok(spikes)
    }

    /// Bins `k0 .. k0 + len` of every unit, as rows, into `counts`.
    fn read_chunk(&self, k0: usize, len: usize, counts: &mut [u16]) -> Result<()> {
        use std::os::unix::fs::FileExt;
        let (scratch, n_bins) = self.columns.as_ref().expect("binned before read");
        let n = self.units.len();
        let mut bytes = vec![0u8; 2 * len];
        for ch in 0..n {
            scratch
                .read_exact_at(&mut bytes, (2 * (ch * n_bins + k0)) as u64)
                .context("cannot read the import's scratch file")?;
            for (k, c) in bytes.chunks_exact(2).enumerate() {
                counts[k * n + ch] = u16::from_le_bytes([c[0], c[1]]);
            }
        }
        Ok(())
    }
}

/// Counts already binned: the first `TimeSeries` in `acquisition` whose
/// data is (time, channels), one row per bin stamped at the bin's end (as
/// `export --nwb` writes), read a window of rows at a time.
struct BinnedCounts {
    path: String,
    data: Dataset,
    rows: usize,
    channels: usize,
    /// Start of row 0's bin, s.
    first_start: f64,
    /// The source row of the import's first bin.
    first_row: usize,
}

impl BinnedCounts {
    fn find(f: &File, file: &Path, b: f64) -> Result<Option<BinnedCounts>> {
        let Ok(acq) = f.group("acquisition") else {
            return Ok(None);
        };
        let mut names = acq.groups().unwrap_or_default();
        names.sort();
        for name in names {
            let path = format!("acquisition/{name}");
            let Ok(data) = f.dataset(&format!("{path}/data")) else {
                continue;
            };
            let Ok(shape) = data.shape() else { continue };
            let [rows, channels] = shape.as_slice() else {
                continue;
            };
            let (rows, channels) = (*rows as usize, *channels as usize);
            if rows == 0 || channels == 0 {
                continue;
            }
            let (t0, width) = if let Ok(ts) = f.dataset(&format!("{path}/timestamps")) {
                let first = ts.read_f64_rows(0, rows.min(2) as u64).map_err(|e| {
                    anyhow::anyhow!("{}: {path}/timestamps: cannot read: {e}", file.display())
                })?;
                (first[0], first.get(1).map_or(b, |t1| t1 - first[0]))
            } else {
                let (t0, rate) = regular_clock(f, file, &path)?;
                (t0, 1.0 / rate)
            };
            if (width - b).abs() > 1e-6 * b {
                // In ms, to the µs the bin width is kept in.
                let ms = (width * 1e6).round() / 1e3;
                bail!(
                    "{}: {path} holds counts binned at {ms} ms; import it with --bin-ms {ms}",
                    file.display(),
                );
            }
            return Ok(Some(BinnedCounts {
                path,
                data,
                rows,
                channels,
                first_start: t0 - b,
                first_row: 0,
            }));
        }
        Ok(None)
    }

    /// The source rows for `n_bins` bins from `start`, which must fall on
    /// one of the series' bin edges.
    fn select(&mut self, file: &Path, start: f64, b: f64, n_bins: usize) -> Result<()> {
        let j = ((start - self.first_start) / b).round();
        if (start - (self.first_start + j * b)).abs() > 1e-6 * b {
            bail!(
                "{}: --start {start}: the counts in {} are already binned; start on one of their bin edges ({} + k × {} s)",
                file.display(),
                self.path,
                self.first_start,
                b
            );
        }
        if j < 0.0 || j as usize + n_bins > self.rows {
            bail!(
                "{}: {} holds bins from {} s to {} s; --start and --stop must lie within them",
                file.display(),
                self.path,
                self.first_start,
                self.first_start + self.rows as f64 * b
            );
        }
        self.first_row = j as usize;
        Ok(())
    }

    /// Bins `k0 .. k0 + len` of the import into `counts`; returns their sum.
    fn read_chunk(&self, file: &Path, k0: usize, len: usize, counts: &mut [u16]) -> Result<usize> {
        let values = self
            .data
            .read_f64_rows((self.first_row + k0) as u64, len as u64)
            .map_err(|e| {
                anyhow::anyhow!("{}: {}/data: cannot read: {e}", file.display(), self.path)
            })?;
        let mut total = 0usize;
        for (i, (c, v)) in counts.iter_mut().zip(&values).enumerate() {
            if !(v.fract() == 0.0 && (0.0..=f64::from(u16::MAX)).contains(v)) {
                bail!(
                    "{}: {}/data row {}, channel {}: {v} is not a count (0 to 65535)",
                    file.display(),
                    self.path,
                    self.first_row + k0 + i / self.channels,
                    i % self.channels
                );
            }
            *c = *v as u16;
            total += *c as usize;
        }
        Ok(total)
    }
}

/// Where an import's counts come from.
enum Counts<'f> {
    Units(Units<'f>),
    Binned(BinnedCounts),
}

/// Bins written at a time.
const CHUNK_BINS: usize = 4096;

/// Reads the file a window at a time and writes the session directory
/// `out` a chunk of bins at a time, so memory does not grow with the
/// recording. `out` is written under a temporary name beside it and
/// renamed at the end: a file refused halfway leaves nothing behind.
pub fn import(args: &Args) -> Result<Imported> {
    let file = &args.file;
    let bin_width = super::bin_width_flag(args.bin_ms)?;
    let b = bin_width.seconds();
    if args.out.exists() {
        bail!(
            "--out {}: already exists; import writes a new session directory (choose another --out or remove it)",
            args.out.display()
        );
    }
    let f = File::open_streaming(file)
        .map_err(|e| anyhow::anyhow!("{}: not a readable HDF5/NWB file: {e}", file.display()))?;
    let (mut source, ids) = if f.group("units").is_err() {
        match BinnedCounts::find(&f, file, b)? {
            Some(binned) => {
                let ids = (0..binned.channels as i64).collect();
                (Counts::Binned(binned), ids)
            }
            None => bail!(
                "{}: no units table (/units) and no binned counts in acquisition; an import needs the sorted or thresholded spike times of each channel in the units table, or counts already binned as a (time, channels) TimeSeries in acquisition",
                file.display()
            ),
        }
    } else {
        let (units, ids) = Units::open(&f, file)?;
        (Counts::Units(units), ids)
    };
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
    let position = Position::open(&f, file, &series)?;
    let (t_first, t_last) = position.check()?;
    let dims = position.dims;
    // Spike times are binned from the position's span; binned counts keep
    // their own bins.
    let (t_first, t_last) = match &source {
        Counts::Units(_) => (t_first, t_last),
        Counts::Binned(c) => (c.first_start, c.first_start + c.rows as f64 * b),
    };
    let start = args.start.unwrap_or(t_first);
    let stop = args.stop.unwrap_or(t_last);
    if !(start.is_finite() && stop.is_finite() && stop > start) {
        bail!("--start {start} --stop {stop}: the stop must come after the start");
    }
    // T = floor((stop − start) / B); binned counts span a whole number of
    // their bins, which rounding must not cut by one.
    let span = (stop - start) / b;
    let whole = matches!(source, Counts::Binned(_))
        && (span - span.round()).abs() < 1e-9 * span.abs().max(1.0);
    let n_bins = if whole { span.round() } else { span.floor() } as usize;
    if n_bins == 0 {
        bail!(
            "{}: {start} s to {stop} s holds no whole {} ms bin",
            file.display(),
            args.bin_ms
        );
    }
    let trials = read_trials(&f, file, start, b, n_bins)?;
    if let Counts::Binned(c) = &mut source {
        c.select(file, start, b, n_bins)?;
    }

    let parent = match args.out.parent() {
        Some(p) if !p.as_os_str().is_empty() => p.to_path_buf(),
        _ => PathBuf::from("."),
    };
    std::fs::create_dir_all(&parent)
        .with_context(|| format!("cannot create {}", parent.display()))?;
    let staging = tempfile::Builder::new()
        .prefix(".import-")
        .tempdir_in(&parent)
        .with_context(|| format!("cannot write in {}", parent.display()))?;
    let dir = staging.path();
    let n = match &source {
        Counts::Units(u) => u.units.len(),
        Counts::Binned(c) => c.channels,
    };
    write_manifest(
        dir,
        bin_width,
        &kinematic_names(dims),
        Some(ids.iter().map(|i| i.to_string()).collect()),
        Some(format!(
            "imported from {}: {} ({n} channels), position {series}, {start} s to {stop} s",
            file.display(),
            match &source {
                Counts::Units(_) => "units table".to_string(),
                Counts::Binned(c) => format!("binned counts {}", c.path),
            }
        )),
    )?;
    let mut counts_out = NpyWriter::create_u16(&dir.join(COUNTS_FILE), n_bins, n)?;
    let mut kin_out = NpyWriter::create(&dir.join(KINEMATICS_FILE), n_bins, 2 * dims)?;
    let edge = |k: usize| start + k as f64 * b;
    let mut interp = Interp::new(&position)?;
    let (mut p_start, mut p_centre, mut p_end) =
        (vec![0.0; dims], vec![0.0; dims], vec![0.0; dims]);
    interp.at(edge(0), &mut p_start)?;
    let mut spikes = 0;
    if let Counts::Units(u) = &mut source {
        let scratch =
            tempfile::tempfile_in(dir).context("cannot create the import's scratch file")?;
        spikes = u.bin_all(n_bins, edge, scratch)?;
    }
    let mut k0 = 0;
    while k0 < n_bins {
        let len = CHUNK_BINS.min(n_bins - k0);
        let mut counts = vec![0u16; len * n];
        match &source {
            Counts::Units(u) => u.read_chunk(k0, len, &mut counts)?,
            Counts::Binned(c) => spikes += c.read_chunk(file, k0, len, &mut counts)?,
        }
        counts_out.write_u16_rows(&counts)?;
        let mut kin = Vec::with_capacity(len * 2 * dims);
        for k in k0..k0 + len {
            interp.at(start + (k as f64 + 0.5) * b, &mut p_centre)?;
            interp.at(edge(k + 1), &mut p_end)?;
            kin.extend_from_slice(&p_centre);
            kin.extend(p_start.iter().zip(&p_end).map(|(p0, p1)| (p1 - p0) / b));
            std::mem::swap(&mut p_start, &mut p_end);
        }
        kin_out.write_rows(&kin)?;
        k0 += len;
    }
    counts_out.finish()?;
    kin_out.finish()?;
    let n_trials = trials.as_ref().map_or(0, Vec::len);
    if let Some(trials) = &trials {
        write_trials(dir, trials)?;
    }
    let staged = staging.keep();
    std::fs::rename(&staged, &args.out).with_context(|| {
        format!(
            "cannot move the imported block from {} to {}",
            staged.display(),
            args.out.display()
        )
    })?;
    Ok(Imported {
        n_bins,
        n_channels: n,
        dims,
        trials: n_trials,
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
    println!(
        "imported {} -> {}: {} bins of {} ms, {} channels ({} spikes in range), position {} ({}), {} trials",
        args.file.display(),
        args.out.display(),
        imported.n_bins,
        args.bin_ms,
        imported.n_channels,
        imported.spikes,
        imported.position_path,
        kinematic_names(imported.dims).join(", "),
        imported.trials
    );
    Ok(())
}

#[cfg(test)]
mod tests {
    use super::*;
    use hdf5_pure::FileBuilder;

    /// Binning unit after unit, a few spike times per read, gives what
    /// counting each unit's spikes directly gives, bin by bin.
    #[test]
    fn units_binned_in_small_windows_count_every_spike_once() {
        let spikes: [Vec<f64>; 3] = [
            (0..50).map(|i| 0.013 * i as f64).collect(),
            vec![],
            (0..37).map(|i| 0.5 + 0.007 * i as f64).collect(),
        ];
        let flat: Vec<f64> = spikes.iter().flatten().copied().collect();
        let index: Vec<i64> = spikes
            .iter()
            .scan(0i64, |end, s| {
                *end += s.len() as i64;
                Some(*end)
            })
            .collect();
        let mut fb = FileBuilder::new();
        let mut units = fb.create_group("units");
        units.create_dataset("spike_times").with_f64_data(&flat);
        units
            .create_dataset("spike_times_index")
            .with_i64_data(&index);
        fb.add_group(units.finish());
        let dir = tempfile::tempdir().unwrap();
        let path = dir.path().join("u.nwb");
        fb.write(&path).unwrap();
        let f = File::open_streaming(&path).unwrap();
        let (mut u, ids) = Units::open(&f, &path).unwrap();
        assert_eq!(ids, [0, 1, 2]);
        u.window = 7;
        let (n_bins, b) = (40usize, 0.02);
        let edge = |k: usize| 0.1 + k as f64 * b;
        let total = u
            .bin_all(n_bins, edge, tempfile::tempfile().unwrap())
            .unwrap();
        let mut counts = vec![0u16; n_bins * 3];
        u.read_chunk(0, n_bins, &mut counts).unwrap();
        let mut want = vec![0u16; n_bins * 3];
        for (ch, times) in spikes.iter().enumerate() {
            for &s in times {
                if let Some(k) = (0..n_bins).find(|&k| edge(k) <= s && s < edge(k + 1)) {
                    want[k * 3 + ch] += 1;
                }
            }
        }
        assert_eq!(counts, want);
        assert_eq!(total, want.iter().map(|&c| c as usize).sum::<usize>());
        // And a chunk from the middle reads the same rows.
        let mut part = vec![0u16; 5 * 3];
        u.read_chunk(11, 5, &mut part).unwrap();
        assert_eq!(part, want[11 * 3..16 * 3]);
    }
}
