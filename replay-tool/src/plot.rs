//! Plots of decoded against true velocity, as SVG (for documents) and PNG
//! (for a quick look). PNG text needs a font compiled in: the tool bundles
//! DejaVu Sans (free licence, see assets/) and registers it once.

use std::path::Path;
use std::sync::Once;

use anyhow::{Context, Result, anyhow};

use crate::bench_meter::Envelope;
use decoder_core::fit::evaluate::HeldOutTrace;
use hdrhistogram::Histogram;
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

/// Draws the same figure twice, as `<stem>.svg` and `<stem>.png`, with
/// `$draw` called on each backend's root area (a closure cannot be
/// generic over the backend, a macro can).
macro_rules! svg_and_png {
    ($stem:expr, $size:expr, |$root:ident| $draw:expr) => {{
        let svg = $stem.with_extension("svg");
        {
            let $root = &SVGBackend::new(&svg, $size).into_drawing_area();
            $draw.with_context(|| format!("drawing {}", svg.display()))?;
        }
        let png = $stem.with_extension("png");
        {
            let $root = &BitMapBackend::new(&png, $size).into_drawing_area();
            $draw.with_context(|| format!("drawing {}", png.display()))?;
        }
        Ok(())
    }};
}

/// Writes `<stem>.svg` and `<stem>.png`: one panel per output, the true
/// velocity in black and each decoder in colour, the legend beside the
/// traces. `by_trial` says whether the held-out stretch is whole trials
/// (the block has trials.csv) or a run of bins.
pub fn held_out_velocity(
    traces: &[HeldOutTrace],
    bin_ms: f64,
    by_trial: bool,
    stem: &Path,
) -> Result<()> {
    register_font();
    let mut outputs: Vec<&str> = Vec::new();
    for t in traces {
        if !outputs.contains(&t.output.as_str()) {
            outputs.push(&t.output);
        }
    }
    let height = 280 * outputs.len().max(1) as u32;
    svg_and_png!(stem, (1200, height), |root| {
        draw(root, traces, &outputs, bin_ms, by_trial)
            .and_then(|()| root.present().map_err(|e| anyhow!("{e}")))
    })
}

fn draw<DB: DrawingBackend>(
    root: &DrawingArea<DB, Shift>,
    traces: &[HeldOutTrace],
    outputs: &[&str],
    bin_ms: f64,
    by_trial: bool,
) -> Result<()>
where
    DB::ErrorType: 'static,
{
    root.fill(&WHITE).map_err(|e| anyhow!("{e}"))?;
    let panels = root.split_evenly((outputs.len().max(1), 1));
    let x_desc = if by_trial {
        "time in held-out trials, s"
    } else {
        "time in the held-out bins, s"
    };
    for (panel, output) in panels.iter().zip(outputs) {
        let mine: Vec<&HeldOutTrace> = traces.iter().filter(|t| t.output == *output).collect();
        let Some(first) = mine.first() else { continue };
        let n = first.truth.len();
        let secs = n as f64 * bin_ms / 1000.0;
        let (mut lo, mut hi) = (f64::INFINITY, f64::NEG_INFINITY);
        for t in &mine {
            for v in t.truth.iter().chain(&t.estimate).filter(|v| v.is_finite()) {
                lo = lo.min(*v);
                hi = hi.max(*v);
            }
        }
        if !(lo.is_finite() && hi.is_finite()) || lo == hi {
            lo -= 1.0;
            hi += 1.0;
            if !(lo.is_finite() && hi.is_finite()) {
                (lo, hi) = (-1.0, 1.0);
            }
        }
        let pad = 0.05 * (hi - lo);
        // The legend gets its own strip to the right, so it never covers
        // a trace.
        let (plot_area, legend_area) = panel.split_horizontally(panel.dim_in_pixel().0 - 150);
        let mut chart = ChartBuilder::on(&plot_area)
            .caption(format!("held-out {output}"), ("sans-serif", 18))
            .margin(8)
            .x_label_area_size(40)
            .y_label_area_size(64)
            .build_cartesian_2d(0.0..secs.max(1e-3), (lo - pad)..(hi + pad))
            .map_err(|e| anyhow!("{e}"))?;
        chart
            .configure_mesh()
            .x_desc(x_desc)
            .y_desc(format!("{output}, position units/s"))
            .light_line_style(WHITE.mix(0.0))
            .label_style(("sans-serif", 13))
            .axis_desc_style(("sans-serif", 14))
            .draw()
            .map_err(|e| anyhow!("{e}"))?;
        let t_of = |i: usize| i as f64 * bin_ms / 1000.0;
        chart
            .draw_series(LineSeries::new(
                first.truth.iter().enumerate().map(|(i, v)| (t_of(i), *v)),
                BLACK.stroke_width(2),
            ))
            .map_err(|e| anyhow!("{e}"))?;
        let mut legend: Vec<(String, RGBColor, u32)> = vec![("true".into(), BLACK, 2)];
        for (k, t) in mine.iter().enumerate() {
            let colour = PALETTE[k % PALETTE.len()];
            chart
                .draw_series(LineSeries::new(
                    t.estimate.iter().enumerate().map(|(i, v)| (t_of(i), *v)),
                    colour.stroke_width(1),
                ))
                .map_err(|e| anyhow!("{e}"))?;
            legend.push((t.decoder.clone(), colour, 2));
        }
        for (i, (name, colour, width)) in legend.iter().enumerate() {
            let y = 50 + 22 * i as i32;
            legend_area
                .draw(&PathElement::new(
                    vec![(8, y), (30, y)],
                    colour.stroke_width(*width),
                ))
                .map_err(|e| anyhow!("{e}"))?;
            legend_area
                .draw(&Text::new(name.clone(), (36, y - 7), ("sans-serif", 13)))
                .map_err(|e| anyhow!("{e}"))?;
        }
    }
    Ok(())
}

/// Writes `<stem>.svg` and `<stem>.png`: a histogram of latencies in µs
/// (one series per name, each a running histogram in ns), on a
/// log-spaced axis from 1 µs.
pub fn latency_histogram(series: &[(&str, &Histogram<u64>)], stem: &Path) -> Result<()> {
    register_font();
    let max = series
        .iter()
        .filter(|(_, h)| !h.is_empty())
        .map(|(_, h)| h.max() as f64 / 1e3)
        .fold(1.0f64, f64::max);
    let edges: Vec<f64> = (0..=((max.log10() * 20.0).ceil() as i32 + 1))
        .map(|i| 10f64.powf(i as f64 / 20.0))
        .collect();
    let counts: Vec<(String, Vec<u64>)> = series
        .iter()
        .map(|(name, h)| {
            let mut c = vec![0u64; edges.len()];
            for v in h.iter_recorded() {
                let x = (v.value_iterated_to() as f64 / 1e3).max(1.0);
                let i = edges.partition_point(|&e| e <= x).saturating_sub(1);
                c[i.min(edges.len() - 1)] += v.count_at_value();
            }
            (name.to_string(), c)
        })
        .collect();
    svg_and_png!(stem, (900, 420), |root| draw_histogram(
        root, &edges, &counts
    ))
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
    // Bars stand on 0.5 so a bin of one count is a visible bar and an
    // empty bin is no bar at all (a log axis has no zero).
    let floor = 0.5f64;
    let x_min = edges
        .iter()
        .zip(0..)
        .find(|(_, i)| counts.iter().any(|(_, c)| c[*i] > 0))
        .map_or(1.0, |(e, _)| (e / 2.0).max(1.0));
    root.fill(&WHITE).map_err(|e| anyhow!("{e}"))?;
    let mut chart = ChartBuilder::on(root)
        .margin(12)
        .x_label_area_size(44)
        .y_label_area_size(64)
        .caption("latency of each bin", ("sans-serif", 18))
        .build_cartesian_2d(
            (x_min..*edges.last().unwrap_or(&10.0)).log_scale(),
            (floor..top as f64 * 2.0).log_scale(),
        )
        .map_err(|e| anyhow!("{e}"))?;
    chart
        .configure_mesh()
        .x_desc("latency, µs (log scale)")
        .y_desc("bins per interval (log scale)")
        .x_label_formatter(&|v| format!("{v:.0}"))
        .y_label_formatter(&|v| format!("{v:.0}"))
        .label_style(("sans-serif", 13))
        .axis_desc_style(("sans-serif", 14))
        .draw()
        .map_err(|e| anyhow!("{e}"))?;
    for (k, (name, c)) in counts.iter().enumerate() {
        let color = PALETTE[k % PALETTE.len()];
        chart
            .draw_series(
                edges
                    .windows(2)
                    .zip(c)
                    .filter(|(_, n)| **n > 0)
                    .map(|(w, n)| {
                        Rectangle::new([(w[0], floor), (w[1], *n as f64)], color.mix(0.35).filled())
                    }),
            )
            .map_err(|e| anyhow!("{e}"))?
            .label(name.as_str())
            .legend(move |(x, y)| {
                Rectangle::new([(x, y - 5), (x + 14, y + 5)], color.mix(0.6).filled())
            });
        chart
            .draw_series(
                edges
                    .windows(2)
                    .zip(c)
                    .filter(|(_, n)| **n > 0)
                    .map(|(w, n)| {
                        Rectangle::new([(w[0], floor), (w[1], *n as f64)], color.stroke_width(1))
                    }),
            )
            .map_err(|e| anyhow!("{e}"))?;
    }
    chart
        .configure_series_labels()
        .position(SeriesLabelPosition::UpperRight)
        .label_font(("sans-serif", 13))
        .background_style(WHITE.mix(0.85))
        .border_style(BLACK)
        .draw()
        .map_err(|e| anyhow!("{e}"))?;
    root.present().map_err(|e| anyhow!("{e}"))?;
    Ok(())
}

/// Writes `<stem>.svg` and `<stem>.png`: one panel per latency series,
/// stacked, each with its own log axis, drawing the run over time as
/// envelopes (median, p99 and max of each bucket) so no series hides
/// another and the files stay small whatever the run's length.
pub fn latency_envelopes(series: &[(&str, &[Envelope])], bucket_s: f64, stem: &Path) -> Result<()> {
    register_font();
    // At most MAX_PLOTTED points a panel: a longer run is drawn in wider
    // buckets, each the median of its buckets' medians and the largest of
    // their p99s and maxima (seconds.csv keeps every bucket).
    let longest = series.iter().map(|(_, e)| e.len()).max().unwrap_or(0);
    let group = longest.div_ceil(MAX_PLOTTED).max(1);
    let merged: Vec<(&str, Vec<Envelope>)> = series
        .iter()
        .map(|(name, e)| (*name, merge_envelopes(e, group, bucket_s)))
        .collect();
    let views: Vec<(&str, &[Envelope])> = merged.iter().map(|(n, e)| (*n, e.as_slice())).collect();
    let height = 40 + 230 * series.len().max(1) as u32;
    let width_s = bucket_s * group as f64;
    svg_and_png!(stem, (900, height), |root| draw_envelopes(
        root, &views, width_s
    ))
}

/// Points a latency panel draws at most (its plot is about 800 px wide).
const MAX_PLOTTED: usize = 400;

/// The bucket width, s, [`latency_envelopes`] draws `buckets` buckets of
/// `bucket_s` in.
pub fn plotted_bucket_s(buckets: usize, bucket_s: f64) -> f64 {
    bucket_s * buckets.div_ceil(MAX_PLOTTED).max(1) as f64
}

/// Consecutive groups of `group` buckets as one: the median of their
/// medians, the largest p99 and max.
fn merge_envelopes(e: &[Envelope], group: usize, bucket_s: f64) -> Vec<Envelope> {
    if group <= 1 {
        return e.to_vec();
    }
    let width = bucket_s * group as f64;
    let mut out: Vec<Envelope> = Vec::new();
    let mut i = 0;
    while i < e.len() {
        // The buckets of one wide bucket, by time (a bucket without
        // samples has no point).
        let wide = (e[i].t_s / width).floor();
        let mut j = i;
        while j < e.len() && (e[j].t_s / width).floor() == wide {
            j += 1;
        }
        let part = &e[i..j];
        let mut medians: Vec<f64> = part.iter().map(|p| p.median_us).collect();
        medians.sort_by(f64::total_cmp);
        out.push(Envelope {
            t_s: wide * width,
            median_us: medians[medians.len() / 2],
            p99_us: part.iter().map(|p| p.p99_us).fold(f64::MIN, f64::max),
            max_us: part.iter().map(|p| p.max_us).fold(f64::MIN, f64::max),
            count: part.iter().map(|p| p.count).sum(),
        });
        i = j;
    }
    out
}

/// One line of an envelope panel: its legend, the figure it draws, its style.
type EnvelopeLine = (&'static str, fn(&Envelope) -> f64, ShapeStyle);

fn draw_envelopes<DB: DrawingBackend>(
    root: &DrawingArea<DB, Shift>,
    series: &[(&str, &[Envelope])],
    bucket_s: f64,
) -> Result<()>
where
    DB::ErrorType: 'static,
{
    root.fill(&WHITE).map_err(|e| anyhow!("{e}"))?;
    let bucket = if bucket_s == 1.0 {
        "second".to_string()
    } else {
        format!("{bucket_s} s")
    };
    let (title, body) = root.split_vertically(40);
    title
        .titled(
            &format!("latency over the run: median, p99 and max of each {bucket}"),
            ("sans-serif", 18),
        )
        .map_err(|e| anyhow!("{e}"))?;
    let t_max = series
        .iter()
        .flat_map(|(_, e)| e.iter())
        .map(|e| e.t_s + bucket_s)
        .fold(1.0, f64::max);
    let panels = body.split_evenly((series.len().max(1), 1));
    for (k, ((name, points), area)) in series.iter().zip(&panels).enumerate() {
        let color = PALETTE[k % PALETTE.len()];
        let y_min = points
            .iter()
            .map(|e| e.median_us)
            .fold(f64::INFINITY, f64::min)
            .clamp(1.0, 1e9)
            / 2.0;
        // Headroom above the largest value for the legend.
        let y_max = points.iter().map(|e| e.max_us).fold(10.0, f64::max) * 6.0;
        let mut chart = ChartBuilder::on(area)
            .margin(8)
            .x_label_area_size(36)
            .y_label_area_size(64)
            .caption(*name, ("sans-serif", 15))
            .build_cartesian_2d(0.0..t_max, (y_min.max(0.5)..y_max).log_scale())
            .map_err(|e| anyhow!("{e}"))?;
        chart
            .configure_mesh()
            .x_desc("time in the run, s")
            .y_desc("µs (log scale)")
            .y_labels(6)
            .light_line_style(WHITE)
            .y_label_formatter(&|v| format!("{v:.0}"))
            .label_style(("sans-serif", 12))
            .axis_desc_style(("sans-serif", 13))
            .draw()
            .map_err(|e| anyhow!("{e}"))?;
        let mid = |e: &Envelope| e.t_s + bucket_s / 2.0;
        let lines: [EnvelopeLine; 3] = [
            ("max", |e| e.max_us, color.mix(0.4).stroke_width(1)),
            ("p99", |e| e.p99_us, color.mix(0.7).stroke_width(1)),
            ("median", |e| e.median_us, color.stroke_width(2)),
        ];
        for (label, value, style) in lines {
            chart
                .draw_series(LineSeries::new(
                    points.iter().map(|e| (mid(e), value(e).max(y_min))),
                    style,
                ))
                .map_err(|e| anyhow!("{e}"))?
                .label(label)
                .legend(move |(x, y)| PathElement::new(vec![(x, y), (x + 16, y)], style));
        }
        chart
            .configure_series_labels()
            .position(SeriesLabelPosition::UpperRight)
            .label_font(("sans-serif", 12))
            .background_style(WHITE.mix(0.85))
            .border_style(BLACK)
            .draw()
            .map_err(|e| anyhow!("{e}"))?;
    }
    root.present().map_err(|e| anyhow!("{e}"))?;
    Ok(())
}

/// Writes `<stem>.svg` and `<stem>.png`: one small KS plot per channel
/// (time rescaling, Brown et al. 2002): the rescaled intervals' quantiles
/// against uniform quantiles, one line per point-process decoder, with the
/// diagonal and the 95 % band, at most 8 panels a row so the page fits
/// 1280 px.
pub fn ks_plots(
    goodness: &[decoder_core::fit::evaluate::DecoderGoodness],
    stem: &Path,
) -> Result<()> {
    register_font();
    let n = goodness.first().map_or(0, |g| g.curves.len());
    let cols = n.clamp(1, 8);
    let rows = n.div_ceil(cols).max(1);
    let size = (cols as u32 * 155 + 20, rows as u32 * 155 + 70);
    svg_and_png!(stem, size, |root| draw_ks(root, goodness, n, (rows, cols)))
}

fn draw_ks<DB: DrawingBackend>(
    root: &DrawingArea<DB, Shift>,
    goodness: &[decoder_core::fit::evaluate::DecoderGoodness],
    n: usize,
    (rows, cols): (usize, usize),
) -> Result<()>
where
    DB::ErrorType: 'static,
{
    let band_colour = RGBColor(150, 150, 150);
    root.fill(&WHITE).map_err(|e| anyhow!("{e}"))?;
    let (head, body) = root.split_vertically(70);
    head.draw(&Text::new(
        "KS plots of each channel's encoding model on held-out bins: x = uniform quantile, y = rescaled interval quantile",
        (10, 8),
        ("sans-serif", 14),
    ))
    .map_err(|e| anyhow!("{e}"))?;
    // The legend, by name.
    let mut x = 10;
    let mut entries: Vec<(String, RGBColor)> = goodness
        .iter()
        .enumerate()
        .map(|(k, g)| (g.decoder.clone(), PALETTE[k % PALETTE.len()]))
        .collect();
    entries.push(("diagonal (a perfect fit)".into(), BLACK));
    entries.push(("95 % band, ±1.36/√n".into(), band_colour));
    for (name, colour) in &entries {
        head.draw(&PathElement::new(
            vec![(x, 45), (x + 22, 45)],
            colour.stroke_width(3),
        ))
        .map_err(|e| anyhow!("{e}"))?;
        head.draw(&Text::new(name.clone(), (x + 28, 38), ("sans-serif", 13)))
            .map_err(|e| anyhow!("{e}"))?;
        x += 40 + 7 * name.chars().count() as i32;
    }
    let panels = body.split_evenly((rows, cols));
    for (c, panel) in panels.iter().enumerate().take(n) {
        let mut chart = ChartBuilder::on(panel)
            .margin(4)
            .x_label_area_size(18)
            .y_label_area_size(26)
            .caption(format!("channel {c}"), ("sans-serif", 12))
            .build_cartesian_2d(0.0f64..1.0, 0.0f64..1.0)
            .map_err(|e| anyhow!("{e}"))?;
        chart
            .configure_mesh()
            .disable_mesh()
            .x_labels(3)
            .y_labels(3)
            .x_label_formatter(&|v| format!("{v:.1}"))
            .y_label_formatter(&|v| format!("{v:.1}"))
            .label_style(("sans-serif", 10))
            .draw()
            .map_err(|e| anyhow!("{e}"))?;
        chart
            .draw_series(LineSeries::new(
                [(0.0, 0.0), (1.0, 1.0)],
                BLACK.stroke_width(1),
            ))
            .map_err(|e| anyhow!("{e}"))?;
        for (k, g) in goodness.iter().enumerate() {
            let fit = &g.channels[c];
            if fit.spikes < 2 {
                continue;
            }
            let band = fit.band;
            if k == 0 {
                for offset in [band, -band] {
                    chart
                        .draw_series(LineSeries::new(
                            [(0.0, offset), (1.0, 1.0 + offset)],
                            band_colour.stroke_width(1),
                        ))
                        .map_err(|e| anyhow!("{e}"))?;
                }
            }
            chart
                .draw_series(LineSeries::new(
                    g.curves[c].iter().copied(),
                    PALETTE[k % PALETTE.len()].stroke_width(1),
                ))
                .map_err(|e| anyhow!("{e}"))?;
        }
    }
    root.present().map_err(|e| anyhow!("{e}"))?;
    Ok(())
}

/// Writes `<stem>.svg` and `<stem>.png`: per decoder, its cross-validated
/// CC (mean over outputs) at each session index, for a merged evaluation.
pub fn cc_by_session(series: &[(String, Vec<(f64, f64)>)], max_x: f64, stem: &Path) -> Result<()> {
    register_font();
    svg_and_png!(stem, (900, 480), |root| {
        draw_cc_by_session(root, series, max_x)
            .and_then(|()| root.present().map_err(|e| anyhow!("{e}")))
    })
}

fn draw_cc_by_session<DB: DrawingBackend>(
    root: &DrawingArea<DB, Shift>,
    series: &[(String, Vec<(f64, f64)>)],
    max_x: f64,
) -> Result<()>
where
    DB::ErrorType: 'static,
{
    let e = |e: DrawingAreaErrorKind<DB::ErrorType>| anyhow!("{e}");
    root.fill(&WHITE).map_err(e)?;
    let mut chart = ChartBuilder::on(root)
        .caption("Cross-validated CC per session", ("sans-serif", 20))
        .margin(12)
        .x_label_area_size(44)
        .y_label_area_size(60)
        .build_cartesian_2d(-0.5..max_x + 0.5, -0.2f64..1.0)
        .map_err(e)?;
    chart
        .configure_mesh()
        .x_desc("session (its line in the list, from 0)")
        .x_labels((max_x as usize + 2).min(24))
        .x_label_formatter(&|x| {
            if x.fract() == 0.0 && *x >= 0.0 {
                format!("{x:.0}")
            } else {
                String::new()
            }
        })
        .y_desc("CC, mean over outputs")
        .label_style(("sans-serif", 14))
        .draw()
        .map_err(e)?;
    for (i, (name, pts)) in series.iter().enumerate() {
        let colour = PALETTE[i % PALETTE.len()];
        chart
            .draw_series(LineSeries::new(pts.iter().copied(), colour.stroke_width(2)))
            .map_err(e)?
            .label(name.as_str())
            .legend(move |(x, y)| {
                PathElement::new(vec![(x, y), (x + 16, y)], colour.stroke_width(2))
            });
        chart
            .draw_series(pts.iter().map(|p| Circle::new(*p, 4, colour.filled())))
            .map_err(e)?;
    }
    chart
        .configure_series_labels()
        .position(SeriesLabelPosition::LowerRight)
        .background_style(WHITE.mix(0.9))
        .border_style(BLACK)
        .label_font(("sans-serif", 14))
        .draw()
        .map_err(e)?;
    Ok(())
}

#[cfg(test)]
mod tests {
    use super::*;

    /// A long run is drawn in wider buckets: the median of the medians and
    /// the largest p99 and max of each group, by time.
    #[test]
    fn envelopes_merge_into_wider_buckets_by_time() {
        let e: Vec<Envelope> = (0..10)
            .filter(|t| *t != 5) // a second with no sample has no point
            .map(|t| Envelope {
                t_s: t as f64,
                median_us: t as f64,
                p99_us: 10.0 * t as f64,
                max_us: 100.0 - t as f64,
                count: 1,
            })
            .collect();
        let m = merge_envelopes(&e, 4, 1.0);
        let got: Vec<(f64, f64, f64, f64, usize)> = m
            .iter()
            .map(|p| (p.t_s, p.median_us, p.p99_us, p.max_us, p.count))
            .collect();
        assert_eq!(
            got,
            vec![
                (0.0, 2.0, 30.0, 100.0, 4),
                (4.0, 6.0, 70.0, 96.0, 3),
                (8.0, 9.0, 90.0, 92.0, 2)
            ]
        );
        assert_eq!(plotted_bucket_s(7200, 1.0), 18.0);
        assert_eq!(plotted_bucket_s(300, 1.0), 1.0);
    }
}
