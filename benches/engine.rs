//! Throughput of the oximetry fits: joint segment fits (200 positions × 8
//! bands) and single-position fits per second, on one core and on all
//! cores. Run with `cargo bench --bench engine`.

// A benchmark reports on stdout.
#![allow(clippy::print_stdout)]

use satstep::oximetry::model::BLOOD_BACKSCATTER;
use std::time::Instant;

use rand::SeedableRng;
use rand_distr::{Distribution, Normal};
use rayon::prelude::*;
use satstep::oximetry::bands::SampledBand;
use satstep::oximetry::model::{Shared, VesselModel};
use satstep::oximetry::pointwise::fit_position;
use satstep::oximetry::segment::{FitSettings, SegmentSpectra, fit_segment};

fn segment(model: &VesselModel, seed: u64, n: usize) -> SegmentSpectra {
    let mut rng = rand_chacha::ChaCha8Rng::seed_from_u64(seed);
    let noise = Normal::new(0.0, 0.01).unwrap();
    let (mut d, mut t) = (vec![], vec![]);
    for p in 0..n {
        let f = p as f64 / n as f64;
        let mut out = vec![0.0; model.n_bands()];
        model.transmission(
            &Shared::new(0.6 + 0.35 * (seed % 2) as f64, 150.0, 0.3),
            0.3 + 0.1 * (9.0 * f).sin(),
            140.0 - 40.0 * f,
            &mut out,
            None,
        );
        d.push(140.0 - 40.0 * f);
        t.push(
            out.iter()
                .map(|v| v * (1.0 + noise.sample(&mut rng)))
                .collect(),
        );
    }
    SegmentSpectra {
        diameters_um: d,
        transmissions: t,
    }
}

fn main() {
    let bands: Vec<SampledBand> = [506.0, 522.0, 548.0, 560.0, 570.0, 586.0, 600.0, 616.0]
        .iter()
        .map(|c| SampledBand::gaussian(*c, 8.0))
        .collect();
    let model = VesselModel::new(&bands, |_| 1.0, BLOOD_BACKSCATTER);
    let settings = FitSettings::default();
    let segments: Vec<SegmentSpectra> = (0..24).map(|s| segment(&model, s, 200)).collect();
    let cores = std::thread::available_parallelism()
        .map(|n| n.get())
        .unwrap_or(1);
    println!("oximetry engine benchmark: 8 bands, Huber loss, {cores} cores available");
    for threads in [1, cores] {
        let pool = rayon::ThreadPoolBuilder::new()
            .num_threads(threads)
            .build()
            .unwrap();
        let t0 = Instant::now();
        let fits: Vec<_> = pool.install(|| {
            segments
                .par_iter()
                .map(|s| fit_segment(&model, s, &settings).unwrap())
                .collect()
        });
        let dt = t0.elapsed().as_secs_f64();
        let iters: usize = fits.iter().map(|f| f.iterations).sum();
        println!(
            "  joint segment fit, 200 positions: {:8.1} fits/s on {threads} core(s) ({:.1} ms per fit, {:.1} iterations on average)",
            segments.len() as f64 / dt,
            dt * 1e3 * threads as f64 / segments.len() as f64,
            iters as f64 / fits.len() as f64
        );
        let positions: Vec<(&Vec<f64>, f64)> = segments
            .iter()
            .take(4)
            .flat_map(|s| s.transmissions.iter().zip(s.diameters_um.iter().copied()))
            .collect();
        let t0 = Instant::now();
        let n = pool.install(|| {
            positions
                .par_iter()
                .map(|(t, d)| fit_position(&model, t, *d, &settings))
                .filter(|f| f.converged)
                .count()
        });
        let dt = t0.elapsed().as_secs_f64();
        println!(
            "  pointwise fit, one position:       {:8.1} fits/s on {threads} core(s) ({n}/{} converged)",
            positions.len() as f64 / dt,
            positions.len()
        );
    }
}
