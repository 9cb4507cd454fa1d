//! `replay-tool model show`: what a model file holds, as a short summary or
//! as the SPEC §4 JSON export.

use std::fmt::Write as _;
use std::path::Path;

use anyhow::Result;
use decoder_core::ModelFile;
use decoder_core::model_file::{DecoderModel, export_json};

pub fn run(path: &Path, json: bool) -> Result<()> {
    let model = ModelFile::read(path)?;
    if json {
        println!("{}", serde_json::to_string_pretty(&export_json(&model))?);
    } else {
        print!("{}", summary(&model));
    }
    Ok(())
}

pub fn summary(model: &ModelFile) -> String {
    let mut s = String::new();
    let p = &model.provenance;
    let _ = writeln!(s, "kind          {}", model.decoder.kind());
    let _ = writeln!(s, "bin width     {} ms", model.bin_ms);
    let _ = writeln!(s, "channels      {}", model.decoder.n_channels());
    let _ = writeln!(s, "outputs       {}", model.decoder.outputs().join(", "));
    match &model.decoder {
        DecoderModel::Kalman(k) => {
            let _ = writeln!(s, "state         {}", k.state.join(", "));
            let q = match &k.q {
                decoder_core::kalman::ObservationNoise::Full(_) => "full",
                decoder_core::kalman::ObservationNoise::Diagonal(_) => "diagonal",
            };
            let _ = writeln!(s, "Q             {q}");
            match &k.steady {
                Some(st) => {
                    let _ = writeln!(
                        s,
                        "steady state  converged in {} iterations (tolerance {:e})",
                        st.iterations, st.tolerance
                    );
                }
                None => {
                    let _ = writeln!(s, "steady state  no (full covariance update each bin)");
                }
            }
        }
        DecoderModel::Wiener(w) => {
            let _ = writeln!(s, "taps          {}", w.taps);
        }
    }
    let _ = writeln!(s, "trained at    {}", p.trained_at);
    let _ = writeln!(s, "tool version  {}", p.tool_version);
    let _ = writeln!(s, "data sha256   {}", p.data_sha256);
    let fit: serde_json::Value = serde_json::from_str(&p.fit_json).unwrap_or_default();
    if let Some(excluded) = fit["report"]["excluded_channels"].as_array()
        && !excluded.is_empty()
    {
        let _ = writeln!(
            s,
            "silent channels (no weight): {}",
            excluded
                .iter()
                .map(|v| v.to_string())
                .collect::<Vec<_>>()
                .join(", ")
        );
    }
    let cv: serde_json::Value = serde_json::from_str(&p.cv_json).unwrap_or_default();
    if let (Some(outputs), Some(mean)) = (cv["outputs"].as_array(), cv["mean"].as_array()) {
        for (o, m) in outputs.iter().zip(mean) {
            let _ = writeln!(
                s,
                "cv {:<10} CC {:.3}  R² {:.3}  RMSE {:.3}  ({} folds)",
                o.as_str().unwrap_or("?"),
                m["cc"].as_f64().unwrap_or(f64::NAN),
                m["r2"].as_f64().unwrap_or(f64::NAN),
                m["rmse"].as_f64().unwrap_or(f64::NAN),
                cv["folds"]
            );
        }
    } else {
        let _ = writeln!(s, "cv            not run");
    }
    s
}
