//! Plots of decoded against true velocity, as SVG (for documents) and PNG
//! (for a quick look). PNG text needs a font compiled in: the tool bundles
//! DejaVu Sans (free licence, see assets/) and registers it once.

use std::path::Path;
use std::sync::Once;

use anyhow::{Context, Result, anyhow};
use decoder_core::fit::evaluate::HeldOutTrace;
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

/// Writes `<stem>.svg` and `<stem>.png`: a histogram of latencies in µs
/// (one series per name), on a log-spaced axis from 1 µs.
pub fn latency_histogram(series: &[(&str, &[f64])], stem: &Path) -> Result<()> {
    register_font();
    let max = series
        .iter()
        .flat_map(|(_, v)| v.iter())
        .copied()
        .fold(1.0f64, f64::max);
    let edges: Vec<f64> = (0..=((max.log10() * 20.0).ceil() as i32 + 1))
        .map(|i| 10f64.powf(i as f64 / 20.0))
        .collect();
    let counts: Vec<(String, Vec<u64>)> = series
        .iter()
        .map(|(name, v)| {
            let mut c = vec![0u64; edges.len()];
            for &x in v.iter() {
                let i = edges
                    .partition_point(|&e| e <= x.max(1.0))
                    .saturating_sub(1);
                c[i.min(edges.len() - 1)] += 1;
            }
            (name.to_string(), c)
        })
        .collect();
    let svg = stem.with_extension("svg");
    draw_histogram(
        &SVGBackend::new(&svg, (900, 420)).into_drawing_area(),
        &edges,
        &counts,
    )
    .with_context(|| format!("drawing {}", svg.display()))?;
    let png = stem.with_extension("png");
    draw_histogram(
        &BitMapBackend::new(&png, (900, 420)).into_drawing_area(),
        &edges,
        &counts,
    )
    .with_context(|| format!("drawing {}", png.display()))?;
    Ok(())
}

fn draw_histogram<DB: DrawingBackend>(
    root: &DrawingArea<DB, Shift>,
    edges: &[f64],
    counts: &[(String, Vec<u64>)],
) -> Result<()>
where
    DB::ErrorType: 'static,
{
    let top = counts
        .iter()
        .flat_map(|(_, c)| c)
        .copied()
        .max()
        .unwrap_or(1)
        .max(1);
    root.fill(&WHITE).map_err(|e| anyhow!("{e}"))?;
    let mut chart = ChartBuilder::on(root)
        .margin(12)
        .x_label_area_size(36)
        .y_label_area_size(56)
        .caption("latency", ("sans-serif", 18))
        .build_cartesian_2d(
            (1.0f64..*edges.last().unwrap_or(&10.0)).log_scale(),
            (1u64..top * 2).log_scale(),
        )
        .map_err(|e| anyhow!("{e}"))?;
    chart
        .configure_mesh()
        .x_desc("µs")
        .y_desc("bins")
        .draw()
        .map_err(|e| anyhow!("{e}"))?;
    for (k, (name, c)) in counts.iter().enumerate() {
        let color = PALETTE[k % PALETTE.len()];
        chart
            .draw_series(LineSeries::new(
                edges
                    .iter()
                    .zip(c)
                    .filter(|(_, n)| **n > 0)
                    .map(|(e, n)| (*e, *n)),
                color.stroke_width(2),
            ))
            .map_err(|e| anyhow!("{e}"))?
            .label(name.as_str())
            .legend(move |(x, y)| PathElement::new(vec![(x, y), (x + 16, y)], color));
    }
    chart
        .configure_series_labels()
        .background_style(WHITE.mix(0.8))
        .border_style(BLACK)
        .draw()
        .map_err(|e| anyhow!("{e}"))?;
    root.present().map_err(|e| anyhow!("{e}"))?;
    Ok(())
}

/// Writes `<stem>.svg` and `<stem>.png`: latency (µs) of each bin against
/// time (s) in the run.
pub fn latency_over_time(points: &[(f64, f64)], stem: &Path) -> Result<()> {
    register_font();
    let svg = stem.with_extension("svg");
    draw_over_time(
        &SVGBackend::new(&svg, (900, 360)).into_drawing_area(),
        points,
    )
    .with_context(|| format!("drawing {}", svg.display()))?;
    let png = stem.with_extension("png");
    draw_over_time(
        &BitMapBackend::new(&png, (900, 360)).into_drawing_area(),
        points,
    )
    .with_context(|| format!("drawing {}", png.display()))?;
    Ok(())
}

fn draw_over_time<DB: DrawingBackend>(
    root: &DrawingArea<DB, Shift>,
    points: &[(f64, f64)],
) -> Result<()>
where
    DB::ErrorType: 'static,
{
    let t_max = points.iter().map(|p| p.0).fold(1e-3, f64::max);
    let y_max = points.iter().map(|p| p.1).fold(1.0, f64::max);
    root.fill(&WHITE).map_err(|e| anyhow!("{e}"))?;
    let mut chart = ChartBuilder::on(root)
        .margin(12)
        .x_label_area_size(36)
        .y_label_area_size(56)
        .caption("recv → send latency over the run", ("sans-serif", 18))
        .build_cartesian_2d(0.0..t_max, (1.0..y_max * 1.5).log_scale())
        .map_err(|e| anyhow!("{e}"))?;
    chart
        .configure_mesh()
        .x_desc("s")
        .y_desc("µs")
        .draw()
        .map_err(|e| anyhow!("{e}"))?;
    chart
        .draw_series(
            points
                .iter()
                .map(|&(t, y)| Circle::new((t, y.max(1.0)), 1, PALETTE[1].filled())),
        )
        .map_err(|e| anyhow!("{e}"))?;
    root.present().map_err(|e| anyhow!("{e}"))?;
    Ok(())
}

/// One small KS plot per channel (time-rescaling, Brown et al. 2002): the
/// sorted rescaled intervals against uniform quantiles, one line per
/// point-process decoder, with the diagonal and the 95 % band.
pub fn ks_plots(
    goodness: &[decoder_core::fit::evaluate::DecoderGoodness],
    path: &Path,
) -> Result<()> {
    register_font();
    let n = goodness.first().map_or(0, |g| g.intervals.len());
    let cols = (n as f64).sqrt().ceil().max(1.0) as usize;
    let rows = n.div_ceil(cols).max(1);
    let root =
        SVGBackend::new(path, (cols as u32 * 150, rows as u32 * 150 + 30)).into_drawing_area();
    root.fill(&WHITE).map_err(|e| anyhow!("{e}"))?;
    let (title, body) = root.split_vertically(30);
    let legend: Vec<String> = goodness
        .iter()
        .enumerate()
        .map(|(k, g)| format!("{} = colour {}", g.decoder, k + 1))
        .collect();
    title
        .titled(
            &format!(
                "KS plots per channel (95 % band dashed); {}",
                legend.join(", ")
            ),
            ("sans-serif", 14),
        )
        .map_err(|e| anyhow!("{e}"))?;
    let panels = body.split_evenly((rows, cols));
    for (c, panel) in panels.iter().enumerate().take(n) {
        let mut chart = ChartBuilder::on(panel)
            .margin(6)
            .caption(format!("ch {c}"), ("sans-serif", 11))
            .build_cartesian_2d(0.0f64..1.0, 0.0f64..1.0)
            .map_err(|e| anyhow!("{e}"))?;
        chart
            .draw_series(LineSeries::new(
                [(0.0, 0.0), (1.0, 1.0)],
                BLACK.stroke_width(1),
            ))
            .map_err(|e| anyhow!("{e}"))?;
        for (k, g) in goodness.iter().enumerate() {
            let mut u = g.intervals[c].clone();
            if u.is_empty() {
                continue;
            }
            u.sort_by(f64::total_cmp);
            let m = u.len() as f64;
            let band = 1.36 / m.sqrt();
            if k == 0 {
                for offset in [band, -band] {
                    chart
                        .draw_series(LineSeries::new(
                            [(0.0, offset), (1.0, 1.0 + offset)],
                            RGBColor(150, 150, 150).stroke_width(1),
                        ))
                        .map_err(|e| anyhow!("{e}"))?;
                }
            }
            let step = (u.len() / 200).max(1);
            chart
                .draw_series(LineSeries::new(
                    u.iter()
                        .enumerate()
                        .step_by(step)
                        .map(|(i, &v)| ((i as f64 + 0.5) / m, v)),
                    PALETTE[k % PALETTE.len()].stroke_width(1),
                ))
                .map_err(|e| anyhow!("{e}"))?;
        }
    }
    root.present().map_err(|e| anyhow!("{e}"))?;
    Ok(())
}
