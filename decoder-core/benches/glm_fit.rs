//! Fitting the point-process encoding models at scale, for the comparison
//! with statsmodels in `compare_statsmodels.sh`: 192 channels × 90 000 bins
//! with 15 coefficients each (intercept, 2 velocity, 12 history basis
//! functions), by `fit_channels` (all channels side by side in the same
//! passes over the block) on one thread, and on all cores with the
//! channels dealt to one group per core.
//! The designs and the fitted coefficients of the first channels are
//! written as .npy into the directory given as the first argument (or
//! target/glm-bench) so statsmodels can fit the same designs.
//!
//! `cargo bench -p decoder-core --bench glm_fit`

use std::path::PathBuf;
use std::time::Instant;

use decoder_core::fit::point_process::{
    ChannelDesigns, HistoryOptions, PointProcessFitOptions, fit_channels,
};
use decoder_core::sim::reaching::{SimOptions, simulate};
use ndarray::{Array1, Array2};
use ndarray_npy::WriteNpyExt;

const CHANNELS: usize = 192;
const WRITTEN: usize = 8;

fn main() {
    let out = std::env::args()
        .skip(1)
        .find(|a| !a.starts_with('-'))
        .map(PathBuf::from)
        .unwrap_or_else(|| PathBuf::from("target/glm-bench"));
    std::fs::create_dir_all(&out).unwrap();
    eprintln!("simulating 30 min × {CHANNELS} channels at 20 ms bins ...");
    let (session, _) = simulate(&SimOptions {
        minutes: 30.0,
        n_channels: CHANNELS,
        ..SimOptions::default()
    })
    .unwrap();
    assert_eq!(session.n_bins, 90_000);
    let options = PointProcessFitOptions {
        history: Some(HistoryOptions {
            n_basis: 12,
            span_bins: 25,
        }),
        ridge: 0.0,
        ..PointProcessFitOptions::default()
    };

    let one = Instant::now();
    let everyone: Vec<usize> = (0..CHANNELS).collect();
    let fits = fit_channels(&session, &options, &everyone).unwrap();
    let single = one.elapsed().as_secs_f64();
    let threads = std::thread::available_parallelism().map_or(1, |t| t.get());
    let all = Instant::now();
    std::thread::scope(|scope| {
        for t in 0..threads {
            let (session, options) = (&session, &options);
            scope.spawn(move || {
                let group: Vec<usize> = (t..CHANNELS).step_by(threads).collect();
                std::hint::black_box(fit_channels(session, options, &group).ok());
            });
        }
    });
    let parallel = all.elapsed().as_secs_f64();
    let failed = fits.iter().filter(|f| f.is_err()).count();

    for (c, fit) in fits.iter().enumerate().take(WRITTEN) {
        let designs = ChannelDesigns::new(&session, &options, vec![c]).unwrap();
        let (mut x, mut y, mut cols) = (Vec::new(), Vec::new(), 0);
        designs
            .each_row(&[true], &mut |_, row, count| {
                x.extend_from_slice(row);
                y.push(count);
                cols = row.len();
            })
            .unwrap();
        Array2::from_shape_vec((y.len(), cols), x)
            .unwrap()
            .write_npy(std::fs::File::create(out.join(format!("design_{c}.npy"))).unwrap())
            .unwrap();
        Array1::from(y)
            .write_npy(std::fs::File::create(out.join(format!("counts_{c}.npy"))).unwrap())
            .unwrap();
        let g = fit.as_ref().unwrap();
        let mut coef = vec![g.b0];
        coef.extend_from_slice(&g.beta);
        coef.extend_from_slice(&g.history);
        Array1::from(coef)
            .write_npy(std::fs::File::create(out.join(format!("coef_{c}.npy"))).unwrap())
            .unwrap();
    }
    let json = format!(
        "{{\"channels\": {CHANNELS}, \"bins\": {}, \"coefficients\": 15, \"single_thread_s\": {single:.3}, \"threads\": {threads}, \"all_cores_s\": {parallel:.3}, \"failed\": {failed}, \"per_channel_ms\": {:.2}}}",
        session.n_bins,
        1000.0 * single / CHANNELS as f64
    );
    std::fs::write(out.join("rust.json"), &json).unwrap();
    println!(
        "fit {CHANNELS} channels × {} bins × 15 coefficients: {single:.2} s on one thread ({:.1} ms per channel), {parallel:.2} s on {threads} cores; {failed} failed",
        session.n_bins,
        1000.0 * single / CHANNELS as f64
    );
    println!("designs of channels 0..{WRITTEN} -> {}", out.display());
}
