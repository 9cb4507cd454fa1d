//! `replay-tool model show`: what a model file holds, as a short summary or
//! as the PROTOCOL.md §4 JSON export.

use std::fmt::Write as _;
use std::path::Path;

use anyhow::Result;
use decoder_core::ModelFile;
use decoder_core::decoders::DecoderModel;
use decoder_core::formats::model_file::export_json;

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
    let _ = writeln!(s, "bin width     {} ms", model.bin_width.ms());
    let _ = writeln!(s, "channels      {}", model.decoder.n_channels());
    let _ = writeln!(s, "outputs       {}", model.decoder.outputs().join(", "));
    match &model.decoder {
        DecoderModel::Kalman(k) => {
            let _ = writeln!(s, "state         {}", k.state.join(", "));
            let q = match &k.q {
                decoder_core::decoders::kalman::ObservationNoise::Full(_) => "full",
                decoder_core::decoders::kalman::ObservationNoise::Diagonal(_) => "diagonal",
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
        DecoderModel::PointProcess(m) => {
            let _ = writeln!(s, "state         {}", m.state.join(", "));
            let _ = writeln!(
                s,
                "history       {}",
                m.history_basis
                    .as_ref()
                    .map_or("none (LNP)".to_string(), |b| format!(
                        "{} raised cosines over {} bins",
                        b.n_basis, b.span_bins
                    ))
            );
            let coupled = m.channels.iter().flatten().any(|c| !c.coupling.is_empty());
            let _ = writeln!(s, "coupling      {}", if coupled { "yes" } else { "no" });
            let fitted: Vec<f64> = m
                .channels
                .iter()
                .flatten()
                .map(|c| 1.0 - c.deviance / c.null_deviance.max(f64::MIN_POSITIVE))
                .collect();
            if !fitted.is_empty() {
                let mean = fitted.iter().sum::<f64>() / fitted.len() as f64;
                let _ = writeln!(
                    s,
                    "fitted        {} channels, mean deviance explained {:.3}",
                    fitted.len(),
                    mean
                );
            }
            for (c, why) in &m.excluded {
                let _ = writeln!(s, "left out      channel {c}: {why}");
            }
        }
    }
    let _ = writeln!(s, "trained at    {}", p.trained_at);
    let _ = writeln!(s, "tool version  {}", p.tool_version);
    let _ = writeln!(s, "data sha256   {}", p.data_sha256);
    if !p.silent_channels.is_empty() {
        let _ = writeln!(
            s,
            "silent channels (no weight): {}",
            p.silent_channels
                .iter()
                .map(|c| c.to_string())
                .collect::<Vec<_>>()
                .join(", ")
        );
    }
    if let Some(cv) = &p.cv {
        for (o, m) in cv.outputs.iter().zip(&cv.mean) {
            let _ = writeln!(
                s,
                "cv {o:<10} CC {:.3}  R² {:.3}  RMSE {:.3}  ({} folds)",
                m.cc, m.r2, m.rmse, cv.folds
            );
        }
    } else {
        let _ = writeln!(s, "cv            not run");
    }
    s
}
