//! Plots of decoded against true velocity, as SVG (for documents) and PNG
//! (for a quick look). PNG text needs a font compiled in: the tool bundles
//! DejaVu Sans (free licence, see assets/) and registers it once.

use std::path::Path;
use std::sync::Once;

use anyhow::{Context, Result, anyhow};
use decoder_core::evaluate::HeldOutTrace;
use plotters::coord::Shift;
use plotters::prelude::*;

static FONT: &[u8] = include_bytes!("../assets/DejaVuSans.ttf");
static REGISTER: Once = Once::new();

fn register_font() {
    REGISTER.call_once(|| {
        plotters::style::register_font("sans-serif", FontStyle::Normal, FONT)
            .map_err(|_| ())
            .expect("bundled font parses");
    });
}

const PALETTE: [RGBColor; 4] = [
    RGBColor(200, 60, 40),
    RGBColor(40, 110, 200),
    RGBColor(40, 160, 80),
    RGBColor(150, 80, 170),
];

/// Writes `<stem>.svg` and `<stem>.png`: one panel per output, the true
/// velocity in black and each decoder in colour.
pub fn held_out_velocity(traces: &[HeldOutTrace], bin_ms: f64, stem: &Path) -> Result<()> {
    register_font();
    let mut outputs: Vec<&str> = Vec::new();
    for t in traces {
        if !outputs.contains(&t.output.as_str()) {
            outputs.push(&t.output);
        }
    }
    let height = 260 * outputs.len().max(1) as u32;
    let svg = stem.with_extension("svg");
    let png = stem.with_extension("png");
    {
        let root = SVGBackend::new(&svg, (1000, height)).into_drawing_area();
        draw(&root, traces, &outputs, bin_ms)
            .with_context(|| format!("drawing {}", svg.display()))?;
        root.present()
            .map_err(|e| anyhow!("writing {}: {e}", svg.display()))?;
    }
    {
        let root = BitMapBackend::new(&png, (1000, height)).into_drawing_area();
        draw(&root, traces, &outputs, bin_ms)
            .with_context(|| format!("drawing {}", png.display()))?;
        root.present()
            .map_err(|e| anyhow!("writing {}: {e}", png.display()))?;
    }
    Ok(())
}

fn draw<DB: DrawingBackend>(
    root: &DrawingArea<DB, Shift>,
    traces: &[HeldOutTrace],
    outputs: &[&str],
    bin_ms: f64,
) -> Result<()>
where
    DB::ErrorType: 'static,
{
    root.fill(&WHITE).map_err(|e| anyhow!("{e}"))?;
    let panels = root.split_evenly((outputs.len().max(1), 1));
    for (panel, output) in panels.iter().zip(outputs) {
        let mine: Vec<&HeldOutTrace> = traces.iter().filter(|t| t.output == *output).collect();
        let Some(first) = mine.first() else { continue };
        let n = first.truth.len();
        let secs = n as f64 * bin_ms / 1000.0;
        let (mut lo, mut hi) = (f64::INFINITY, f64::NEG_INFINITY);
        for t in &mine {
            for v in t.truth.iter().chain(&t.estimate) {
                lo = lo.min(*v);
                hi = hi.max(*v);
            }
        }
        if !(lo.is_finite() && hi.is_finite()) || lo == hi {
            lo = -1.0;
            hi = 1.0;
        }
        let pad = 0.05 * (hi - lo);
        let mut chart = ChartBuilder::on(panel)
            .caption(format!("held-out {output}"), ("sans-serif", 18))
            .margin(8)
            .x_label_area_size(32)
            .y_label_area_size(56)
            .build_cartesian_2d(0.0..secs.max(1e-3), (lo - pad)..(hi + pad))
            .map_err(|e| anyhow!("{e}"))?;
        chart
            .configure_mesh()
            .x_desc("time in held-out trials (s)")
            .y_desc(format!("{output} (units/s)"))
            .light_line_style(WHITE.mix(0.0))
            .draw()
            .map_err(|e| anyhow!("{e}"))?;
        let t_of = |i: usize| i as f64 * bin_ms / 1000.0;
        chart
            .draw_series(LineSeries::new(
                first.truth.iter().enumerate().map(|(i, v)| (t_of(i), *v)),
                BLACK.stroke_width(2),
            ))
            .map_err(|e| anyhow!("{e}"))?
            .label("true")
            .legend(|(x, y)| PathElement::new(vec![(x, y), (x + 16, y)], BLACK.stroke_width(2)));
        for (k, t) in mine.iter().enumerate() {
            let colour = PALETTE[k % PALETTE.len()];
            chart
                .draw_series(LineSeries::new(
                    t.estimate.iter().enumerate().map(|(i, v)| (t_of(i), *v)),
                    colour.stroke_width(1),
                ))
                .map_err(|e| anyhow!("{e}"))?
                .label(t.decoder.clone())
                .legend(move |(x, y)| {
                    PathElement::new(vec![(x, y), (x + 16, y)], colour.stroke_width(2))
                });
        }
        chart
            .configure_series_labels()
            .background_style(WHITE.mix(0.8))
            .border_style(BLACK)
            .position(SeriesLabelPosition::UpperRight)
            .draw()
            .map_err(|e| anyhow!("{e}"))?;
    }
    Ok(())
}
