//! A session log written as a Neurodata Without Borders 2.x file
//! (PROTOCOL.md §5, `export LOG --nwb FILE`), the open standard archives
//! of neurophysiology ask for, so a lab can share a closed-loop session
//! without a converter of its own.
//!
//! What goes where, in NWB's own types: the binned counts (or features) as a
//! `TimeSeries` in `acquisition`; the cursor and target positions as
//! `SpatialSeries` in a `Position` and the cursor velocity as a
//! `TimeSeries` in a `BehavioralTimeSeries`, both under
//! `processing/behavior`; the trials as the `intervals/trials` table with
//! their targets; what the daemon sent (estimate, command, state, whether
//! the row is valid for training, and with a click decoder the click
//! probability and clicks) as `TimeSeries` under `processing/decoder`.
//! Every series has one row per bin slot, stamped at the end of its bin,
//! in seconds from `timestamps_reference_time` (when the daemon opened the
//! log). The model, the tool and the bin width are
//! in `general/notes` and `general/data_collection`; what the log cannot
//! know (subject, experimenter, institution …) comes from a metadata file.
//!
//! The file is assembled with `hdf5-pure` (pure Rust, as the import) and
//! written under a temporary name that is renamed at the end.

use std::path::Path;

use anyhow::{Context, Result, bail};
use decoder_core::ModelFile;
use decoder_core::formats::log_block::{LogBlock, read_log_block};
use decoder_core::formats::session_log::{LogReader, LogRecord};
use hdf5_pure::{AttrValue, FileBuilder, GroupBuilder};
use serde::Deserialize;
use sha2::{Digest, Sha256};

/// The NWB schema version the file declares.
pub const NWB_VERSION: &str = "2.8.0";

/// `--metadata FILE.toml`: what the log cannot know, in NWB's terms.
#[derive(Debug, Default, Deserialize)]
#[serde(deny_unknown_fields)]
pub struct Metadata {
    pub subject: Option<Subject>,
    #[serde(default)]
    pub session: SessionInfo,
}

#[derive(Debug, Default, Deserialize)]
#[serde(deny_unknown_fields)]
pub struct Subject {
    pub subject_id: Option<String>,
    pub species: Option<String>,
    pub sex: Option<String>,
    /// ISO 8601 duration, e.g. "P6Y".
    pub age: Option<String>,
    pub description: Option<String>,
}

#[derive(Debug, Default, Deserialize)]
#[serde(deny_unknown_fields)]
pub struct SessionInfo {
    pub session_description: Option<String>,
    pub experiment_description: Option<String>,
    #[serde(default)]
    pub experimenter: Vec<String>,
    pub institution: Option<String>,
    pub lab: Option<String>,
    #[serde(default)]
    pub keywords: Vec<String>,
}

impl Metadata {
    pub fn read(path: &Path) -> Result<Metadata> {
        let text = std::fs::read_to_string(path)
            .with_context(|| format!("--metadata {}: cannot read", path.display()))?;
        let m: Metadata = toml::from_str(&text)
            .map_err(|e| anyhow::anyhow!("--metadata {}: {}", path.display(), e.message()))
            .with_context(|| {
                "expected [subject] subject_id, species, sex, age, description and [session] session_description, experiment_description, experimenter, institution, lab, keywords"
            })?;
        if let Some(age) = m.subject.as_ref().and_then(|s| s.age.as_deref()) {
            if !age.starts_with('P') {
                bail!(
                    "--metadata {}: [subject] age = {age:?}: NWB wants an ISO 8601 duration, such as \"P6Y\" or \"P90D\"",
                    path.display()
                );
            }
        }
        Ok(m)
    }
}

/// What the export wrote, for its report.
pub struct Written {
    pub rows: usize,
    pub channels: usize,
    pub trials: usize,
    pub models: usize,
}

/// The first model the log holds, and how many it holds in all.
struct LoggedModels {
    first: Option<(ModelFile, String)>,
    count: usize,
}

fn logged_models(log: &Path) -> Result<LoggedModels> {
    let mut reader = LogReader::open(log).with_context(|| format!("{}", log.display()))?;
    let mut out = LoggedModels {
        first: None,
        count: 0,
    };
    while let Some(record) = reader.next_record() {
        if let LogRecord::Model { model_file, .. } = record {
            out.count += 1;
            if out.first.is_none() {
                let sha = format!("{:x}", Sha256::digest(&model_file));
                let what = format!("{}: its first model record", log.display());
                let model = ModelFile::from_bytes(&model_file, &what)?;
                out.first = Some((model, sha));
            }
        }
    }
    Ok(out)
}

/// An object id in the UUID form NWB asks for, made from the log's
/// identity and the object's path, so exporting the same log twice gives
/// the same ids.
struct ObjectIds(Vec<u8>);

impl ObjectIds {
    fn of(&self, path: &str) -> AttrValue {
        let mut h = Sha256::new();
        h.update(&self.0);
        h.update(path.as_bytes());
        let mut b: [u8; 16] = h.finalize()[..16].try_into().expect("16 bytes");
        b[6] = (b[6] & 0x0f) | 0x40; // version 4
        b[8] = (b[8] & 0x3f) | 0x80; // RFC 4122 variant
        let x: String = b.iter().map(|v| format!("{v:02x}")).collect();
        AttrValue::VarLenString(format!(
            "{}-{}-{}-{}-{}",
            &x[0..8],
            &x[8..12],
            &x[12..16],
            &x[16..20],
            &x[20..32]
        ))
    }
}

fn text(s: &str) -> AttrValue {
    AttrValue::VarLenString(s.to_string())
}

/// Marks a group as an NWB object of `kind` in `namespace`.
fn typed(g: &mut GroupBuilder, ids: &ObjectIds, path: &str, namespace: &str, kind: &str) {
    g.set_attr("namespace", text(namespace));
    g.set_attr("neurodata_type", text(kind));
    g.set_attr("object_id", ids.of(path));
}

/// A scalar string dataset.
fn scalar_text(g: &mut GroupBuilder, name: &str, value: &str) {
    g.create_dataset(name)
        .with_vlen_strings(&[value])
        .with_shape(&[]);
}

/// What one time series holds: its values (row-major, `cols` per row),
/// unit and description.
struct Series<'a> {
    name: &'a str,
    kind: &'a str,
    values: SeriesValues<'a>,
    cols: usize,
    unit: &'a str,
    description: &'a str,
    reference_frame: Option<&'a str>,
}

enum SeriesValues<'a> {
    F64(&'a [f64]),
    F32(&'a [f32]),
    U16(&'a [u16]),
    U8(&'a [u8]),
}

/// How a series says when its rows were: one timestamp per row, or the
/// first row's time and a rate.
enum RowTimes<'a> {
    Stamps(&'a [f64]),
    Regular { first: f64, rate: f64, rows: usize },
}

/// Adds a `TimeSeries` (or a subtype) named `s.name` to `parent`.
fn add_series(
    parent: &mut GroupBuilder,
    parent_path: &str,
    ids: &ObjectIds,
    s: &Series,
    times: &RowTimes,
) {
    let path = format!("{parent_path}/{}", s.name);
    let mut g = parent.create_group(s.name);
    typed(&mut g, ids, &path, "core", s.kind);
    g.set_attr("description", text(s.description));
    g.set_attr("comments", text("no comments"));
    let rows = match times {
        RowTimes::Stamps(t) => t.len(),
        RowTimes::Regular { rows, .. } => *rows,
    } as u64;
    let shape: Vec<u64> = if s.cols == 1 {
        vec![rows]
    } else {
        vec![rows, s.cols as u64]
    };
    let chunk_rows = rows.clamp(1, 4096);
    let chunks: Vec<u64> = if s.cols == 1 {
        vec![chunk_rows]
    } else {
        vec![chunk_rows, s.cols as u64]
    };
    {
        let d = g.create_dataset("data");
        match s.values {
            SeriesValues::F64(v) => d.with_f64_data(v),
            SeriesValues::F32(v) => d.with_f32_data(v),
            SeriesValues::U16(v) => d.with_u16_data(v),
            SeriesValues::U8(v) => d.with_u8_data(v),
        };
        d.with_shape(&shape)
            .with_chunks(&chunks)
            .with_deflate(4)
            .set_attr("unit", text(s.unit))
            .set_attr("conversion", AttrValue::F64(1.0))
            .set_attr("offset", AttrValue::F64(0.0))
            .set_attr("resolution", AttrValue::F64(-1.0));
    }
    match times {
        RowTimes::Stamps(t) => {
            g.create_dataset("timestamps")
                .with_f64_data(t)
                .with_chunks(&[chunk_rows])
                .with_deflate(4)
                .set_attr("interval", AttrValue::I32(1))
                .set_attr("unit", text("seconds"));
        }
        RowTimes::Regular { first, rate, .. } => {
            g.create_dataset("starting_time")
                .with_f64_data(&[*first])
                .with_shape(&[])
                .set_attr("rate", AttrValue::F64(*rate))
                .set_attr("unit", text("seconds"));
        }
    }
    if let Some(frame) = s.reference_frame {
        scalar_text(&mut g, "reference_frame", frame);
    }
    parent.add_group(g.finish());
}

/// Writes `log` as an NWB file at `out`.
pub fn export_nwb(log: &Path, out: &Path, meta: &Metadata) -> Result<Written> {
    let lb: LogBlock = read_log_block(log).with_context(|| format!("{}", log.display()))?;
    let reader = LogReader::open(log).with_context(|| format!("{}", log.display()))?;
    let header = reader.header().clone();
    drop(reader);
    let models = logged_models(log)?;
    let block = &lb.block;
    let rows = block.n_bins;
    let n = block.n_channels;
    let b = block.bin_width.seconds();
    let d_out = lb.estimates.cols;
    // Row r's bin ends when its packet's slot began to be answered: the
    // first slot's end, from the daemon's own clock, then one bin a row.
    let first_end = lb
        .sent_ns
        .first()
        .filter(|&&s| s > header.opened_ns)
        .map_or(b, |&s| (s - header.opened_ns) as f64 / 1e9);
    let timestamps: Vec<f64> = (0..rows).map(|r| first_end + r as f64 * b).collect();
    // The counts carry a timestamp per row; the series derived from them
    // say the same times as a start and a rate.
    let stamped = RowTimes::Stamps(&timestamps);
    let regular = RowTimes::Regular {
        first: first_end,
        rate: 1.0 / b,
        rows,
    };
    let start_time = humantime::parse_rfc3339_weak(&header.opened_at)
        .ok()
        .map(|_| header.opened_at.clone())
        .with_context(|| {
            format!(
                "{}: the log's opening time {:?} is not an RFC 3339 time; NWB needs the session's start",
                log.display(),
                header.opened_at
            )
        })?;

    let identity = {
        let mut h = Sha256::new();
        h.update(header.opened_at.as_bytes());
        h.update(header.opened_ns.to_le_bytes());
        h.update(log.file_name().map(|f| f.as_encoded_bytes()).unwrap_or(b""));
        h.finalize().to_vec()
    };
    let ids = ObjectIds(identity);
    let mut general_text: Vec<(&str, String)> = Vec::new();
    let mut f = FileBuilder::new();
    f.set_attr("namespace", text("core"));
    f.set_attr("neurodata_type", text("NWBFile"));
    f.set_attr("nwb_version", text(NWB_VERSION));
    f.set_attr("object_id", ids.of("/"));

    let now = humantime::format_rfc3339_micros(std::time::SystemTime::now()).to_string();
    f.create_dataset("file_create_date")
        .with_vlen_strings(&[now.as_str()]);
    let identifier = format!("decoderd-{}-{}", header.opened_at, hex8(&ids.0));
    f.create_dataset("identifier")
        .with_vlen_strings(&[identifier.as_str()])
        .with_shape(&[]);
    let description = meta
        .session
        .session_description
        .clone()
        .unwrap_or_else(|| "closed-loop velocity decoding session recorded by decoderd".into());
    f.create_dataset("session_description")
        .with_vlen_strings(&[description.as_str()])
        .with_shape(&[]);
    let experiment = meta.session.experiment_description.clone().unwrap_or_else(|| {
        "closed-loop brain-computer interface session: intended velocity decoded each bin from binned spike counts and sent to an actuator".into()
    });
    general_text.push(("experiment_description", experiment));
    for name in ["session_start_time", "timestamps_reference_time"] {
        f.create_dataset(name)
            .with_vlen_strings(&[start_time.as_str()])
            .with_shape(&[]);
    }

    // acquisition: the counts (or features) as received.
    let mut acquisition = f.create_group("acquisition");
    let features = block.input == decoder_core::wire::packet::BinKind::Features;
    let values_description = if features {
        format!(
            "continuous features (for example spike band power) per channel per {} ms bin, as decoderd received them from the front end (f32), one row per bin slot; zeros where the bin never came (processing/decoder/valid is 0 there)",
            block.bin_width.ms()
        )
    } else {
        format!(
            "spike counts (threshold crossings or sorted spikes) per channel per {} ms bin, as decoderd received them from the front end, one row per bin slot; zeros where the bin never came (processing/decoder/valid is 0 there)",
            block.bin_width.ms()
        )
    };
    add_series(
        &mut acquisition,
        "/acquisition",
        &ids,
        &Series {
            name: if features {
                "binned_features"
            } else {
                "binned_counts"
            },
            kind: "TimeSeries",
            values: if features {
                SeriesValues::F32(&block.features)
            } else {
                SeriesValues::U16(&block.counts)
            },
            cols: n,
            unit: if features {
                "front-end units"
            } else {
                "spikes per bin"
            },
            description: &values_description,
            reference_frame: None,
        },
        &stamped,
    );
    f.add_group(acquisition.finish());
    let analysis = f.create_group("analysis");
    f.add_group(analysis.finish());

    // processing: behavior (when the log has task state) and decoder.
    let mut processing = f.create_group("processing");
    let dims = block.kinematics.as_ref().map(|k| k.cols / 2);
    if let (Some(kin), Some(d)) = (&block.kinematics, dims) {
        if d > 3 {
            bail!(
                "{}: the task has {d} dimensions; an NWB SpatialSeries holds at most 3",
                log.display()
            );
        }
        let pos: Vec<f64> = (0..rows)
            .flat_map(|r| kin.data[r * 2 * d..r * 2 * d + d].iter().copied())
            .collect();
        let vel: Vec<f64> = (0..rows)
            .flat_map(|r| kin.data[r * 2 * d + d..(r + 1) * 2 * d].iter().copied())
            .collect();
        let target: Vec<f64> = lb
            .task
            .iter()
            .flat_map(|t| (0..d).map(move |i| t.map_or(0.0, |t| t.target_pos[i])))
            .collect();
        let mut behavior = processing.create_group("behavior");
        typed(
            &mut behavior,
            &ids,
            "/processing/behavior",
            "core",
            "ProcessingModule",
        );
        behavior.set_attr(
            "description",
            text("the task's cursor and target, as the task computer reported them"),
        );
        let mut position = behavior.create_group("Position");
        typed(
            &mut position,
            &ids,
            "/processing/behavior/Position",
            "core",
            "Position",
        );
        let frame = "task workspace: the task computer's own position units (unit n.a.: the log does not know them), origin at the workspace centre";
        for (name, values, description) in [
            (
                "cursor",
                &pos,
                "cursor position on screen while each bin was counted (the latest task packet with bin_seq < the row's seq); zeros before the first task packet",
            ),
            (
                "target",
                &target,
                "position of the current trial's target while each bin was counted; zeros before the first task packet",
            ),
        ] {
            add_series(
                &mut position,
                "/processing/behavior/Position",
                &ids,
                &Series {
                    name,
                    kind: "SpatialSeries",
                    values: SeriesValues::F64(values),
                    cols: d,
                    unit: "n.a.",
                    description,
                    reference_frame: Some(frame),
                },
                &regular,
            );
        }
        behavior.add_group(position.finish());
        let mut velocity = behavior.create_group("CursorVelocity");
        typed(
            &mut velocity,
            &ids,
            "/processing/behavior/CursorVelocity",
            "core",
            "BehavioralTimeSeries",
        );
        add_series(
            &mut velocity,
            "/processing/behavior/CursorVelocity",
            &ids,
            &Series {
                name: "cursor_velocity",
                kind: "TimeSeries",
                values: SeriesValues::F64(&vel),
                cols: d,
                unit: "task position units per second",
                description: "cursor velocity on screen while each bin was counted",
                reference_frame: None,
            },
            &regular,
        );
        behavior.add_group(velocity.finish());
        processing.add_group(behavior.finish());
    }
    let model_note = match &models.first {
        Some((m, sha)) => format!(
            "decoded by decoderd {} with a {} model over {} channels (model file sha256 {sha}); {} model record(s) in the session (the first is named here; later ones are operator loads or adaptation updates)",
            header.daemon_version,
            m.decoder.kind(),
            m.decoder.n_channels(),
            models.count
        ),
        None => format!(
            "decoded by decoderd {}; the log holds no model record",
            header.daemon_version
        ),
    };
    let mut decoder = processing.create_group("decoder");
    typed(
        &mut decoder,
        &ids,
        "/processing/decoder",
        "core",
        "ProcessingModule",
    );
    decoder.set_attr(
        "description",
        text(&format!(
            "what decoderd sent the actuator for each bin slot ({}); outputs {}",
            model_note,
            header.outputs.join(", ")
        )),
    );
    let valid: Vec<u8> = block.valid.as_ref().map_or_else(
        || vec![1; rows],
        |v| v.iter().map(|&b| u8::from(b)).collect(),
    );
    let outputs = header.outputs.join(", ");
    let est_description =
        format!("raw decoded velocity ({outputs}), for monitoring; the actuator follows command");
    let cmd_description = format!(
        "velocity command sent to the actuator ({outputs}): zero unless armed or coasting, after the speed and acceleration limits"
    );
    for s in [
        Series {
            name: "estimate",
            kind: "TimeSeries",
            values: SeriesValues::F64(&lb.estimates.data),
            cols: d_out,
            unit: "task position units per second",
            description: &est_description,
            reference_frame: None,
        },
        Series {
            name: "command",
            kind: "TimeSeries",
            values: SeriesValues::F64(&lb.commands.data),
            cols: d_out,
            unit: "task position units per second",
            description: &cmd_description,
            reference_frame: None,
        },
        Series {
            name: "state",
            kind: "TimeSeries",
            values: SeriesValues::U8(&lb.states),
            cols: 1,
            unit: "state code",
            description: "the daemon's state when it answered the slot: 0 disarmed, 1 armed, 2 coasting (the bin never came; predicted only), 3 halted",
            reference_frame: None,
        },
        Series {
            name: "valid",
            kind: "TimeSeries",
            values: SeriesValues::U8(&valid),
            cols: 1,
            unit: "flag",
            description: "1 where the bin came and the task had reported its state (rows usable for training), else 0",
            reference_frame: None,
        },
    ] {
        add_series(&mut decoder, "/processing/decoder", &ids, &s, &regular);
    }
    // The click decoder's output, when the session had one.
    if models
        .first
        .as_ref()
        .is_some_and(|(m, _)| m.click.is_some())
    {
        let prob: Vec<f64> = lb.clicks.iter().map(|(p, _)| f64::from(*p)).collect();
        let clicked: Vec<u8> = lb.clicks.iter().map(|(_, c)| u8::from(*c)).collect();
        for s in [
            Series {
                name: "click_probability",
                kind: "TimeSeries",
                values: SeriesValues::F64(&prob),
                cols: 1,
                unit: "probability",
                description: "the click decoder's probability that the participant was attempting a click, as the velocity packet carried it",
                reference_frame: None,
            },
            Series {
                name: "click",
                kind: "TimeSeries",
                values: SeriesValues::U8(&clicked),
                cols: 1,
                unit: "flag",
                description: "1 where the daemon decided a click (velocity packet flag bit 4), else 0",
                reference_frame: None,
            },
        ] {
            add_series(&mut decoder, "/processing/decoder", &ids, &s, &regular);
        }
    }
    processing.add_group(decoder.finish());
    f.add_group(processing.finish());

    // intervals/trials
    let mut intervals = f.create_group("intervals");
    let trials = block.trials.clone().unwrap_or_default();
    if !trials.is_empty() {
        let mut t = intervals.create_group("trials");
        typed(&mut t, &ids, "/intervals/trials", "core", "TimeIntervals");
        t.set_attr("description", text("one row per trial of the task"));
        t.set_attr(
            "colnames",
            AttrValue::VarLenStringArray(
                ["start_time", "stop_time", "target_x", "target_y"]
                    .map(String::from)
                    .to_vec(),
            ),
        );
        let edge = |bin: usize| first_end - b + bin as f64 * b;
        let ids_col: Vec<i64> = trials.iter().map(|t| i64::from(t.trial)).collect();
        t.create_dataset("id")
            .with_i64_data(&ids_col)
            .set_attr("namespace", text("hdmf-common"))
            .set_attr("neurodata_type", text("ElementIdentifiers"))
            .set_attr("object_id", ids.of("/intervals/trials/id"));
        let columns: [(&str, Vec<f64>, &str); 4] = [
            (
                "start_time",
                trials.iter().map(|t| edge(t.start_bin)).collect(),
                "start of the trial's first bin, in seconds",
            ),
            (
                "stop_time",
                trials.iter().map(|t| edge(t.end_bin)).collect(),
                "end of the trial's last bin, in seconds",
            ),
            (
                "target_x",
                trials.iter().map(|t| t.target_x).collect(),
                "target x, task position units",
            ),
            (
                "target_y",
                trials.iter().map(|t| t.target_y).collect(),
                "target y, task position units",
            ),
        ];
        for (name, values, description) in columns {
            t.create_dataset(name)
                .with_f64_data(&values)
                .set_attr("description", text(description))
                .set_attr("namespace", text("hdmf-common"))
                .set_attr("neurodata_type", text("VectorData"))
                .set_attr("object_id", ids.of(&format!("/intervals/trials/{name}")));
        }
        intervals.add_group(t.finish());
    }
    f.add_group(intervals.finish());

    // general: what the log knows, and what the metadata file adds.
    let mut general = f.create_group("general");
    for (name, value) in &general_text {
        scalar_text(&mut general, name, value);
    }
    scalar_text(
        &mut general,
        "data_collection",
        &format!(
            "binned by the front end at {} ms ({} channels) and sent to decoderd one datagram per bin; one row per bin slot, {} slots from seq {} to {}",
            block.bin_width.ms(),
            n,
            rows,
            lb.seqs.first().copied().unwrap_or(0),
            lb.seqs.last().copied().unwrap_or(0)
        ),
    );
    scalar_text(
        &mut general,
        "notes",
        &format!(
            "{model_note}; exported by replay-tool {} from {}",
            env!("CARGO_PKG_VERSION"),
            log.file_name()
                .map_or("the log".into(), |f| f.to_string_lossy().to_string())
        ),
    );
    let session = &meta.session;
    if !session.experimenter.is_empty() {
        let e: Vec<&str> = session.experimenter.iter().map(String::as_str).collect();
        general.create_dataset("experimenter").with_vlen_strings(&e);
    }
    if let Some(i) = &session.institution {
        scalar_text(&mut general, "institution", i);
    }
    if let Some(l) = &session.lab {
        scalar_text(&mut general, "lab", l);
    }
    if !session.keywords.is_empty() {
        let k: Vec<&str> = session.keywords.iter().map(String::as_str).collect();
        general.create_dataset("keywords").with_vlen_strings(&k);
    }
    if let Some(s) = &meta.subject {
        let mut g = general.create_group("subject");
        typed(&mut g, &ids, "/general/subject", "core", "Subject");
        for (name, value) in [
            ("subject_id", &s.subject_id),
            ("species", &s.species),
            ("sex", &s.sex),
            ("description", &s.description),
        ] {
            if let Some(v) = value {
                scalar_text(&mut g, name, v);
            }
        }
        if let Some(age) = &s.age {
            g.create_dataset("age")
                .with_vlen_strings(&[age.as_str()])
                .with_shape(&[])
                .set_attr("reference", text("birth"));
        }
        general.add_group(g.finish());
    }
    f.add_group(general.finish());
    let mut stimulus = f.create_group("stimulus");
    for name in ["presentation", "templates"] {
        let g = stimulus.create_group(name);
        stimulus.add_group(g.finish());
    }
    f.add_group(stimulus.finish());

    let parent = match out.parent() {
        Some(p) if !p.as_os_str().is_empty() => p.to_path_buf(),
        _ => std::path::PathBuf::from("."),
    };
    let staged = tempfile::Builder::new()
        .prefix(".nwb-export-")
        .tempfile_in(&parent)
        .with_context(|| format!("cannot write in {}", parent.display()))?;
    f.write(staged.path())
        .map_err(|e| anyhow::anyhow!("writing {}: {e}", out.display()))?;
    // A temporary file is private; the export is a file like any other.
    {
        use std::os::unix::fs::PermissionsExt;
        std::fs::set_permissions(staged.path(), std::fs::Permissions::from_mode(0o644))
            .with_context(|| format!("cannot write {}", out.display()))?;
    }
    staged
        .persist(out)
        .map_err(|e| anyhow::anyhow!("cannot write {}: {}", out.display(), e.error))?;
    Ok(Written {
        rows,
        channels: n,
        trials: trials.len(),
        models: models.count,
    })
}

fn hex8(bytes: &[u8]) -> String {
    bytes.iter().take(4).map(|b| format!("{b:02x}")).collect()
}
