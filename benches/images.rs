//! Throughput of the image stage: captures per second through ingest,
//! registration to the eye's reference capture and profile analysis of 10
//! vessel segments, for 1024 × 1024-pixel captures with 8 bands (16-bit
//! multi-page TIFF on disk), on one core and on all cores. The captures are
//! rendered first with the simulator (not timed). Run with
//! `cargo bench --bench images`.

// A benchmark reports on stdout.
#![allow(clippy::print_stdout)]

use std::time::Instant;

use rand::SeedableRng;
use rayon::prelude::*;
use satstep::config::segments::{Segment, VesselKind};
use satstep::images::ingest::read_capture;
use satstep::images::profile::ProfileSettings;
use satstep::images::register::RegistrationTarget;
use satstep::oximetry::bands::SampledBand;
use satstep::simulate::render::{Motion, Scene, VesselState, render, write_tiff};
use satstep::stages::transmissions::{EyeReference, analyse_capture};

const SIZE: usize = 1024;

fn segments() -> Vec<Segment> {
    (0..10)
        .map(|k| {
            let a = -1.2 + 0.26 * k as f64;
            Segment {
                id: format!("S{k}"),
                kind: if k % 2 == 0 {
                    VesselKind::Arteriole
                } else {
                    VesselKind::Venule
                },
                points: (0..=16)
                    .map(|j| {
                        let s = 120.0 + 330.0 * j as f64 / 16.0;
                        let ang = a + 0.25 * s / 450.0;
                        (512.0 + s * ang.cos() - 200.0, 512.0 + s * ang.sin())
                    })
                    .collect(),
                notes: String::new(),
            }
        })
        .collect()
}

fn main() {
    let dir = tempfile::tempdir().unwrap();
    let bands: Vec<SampledBand> = [506.0, 522.0, 548.0, 560.0, 570.0, 586.0, 600.0, 616.0]
        .iter()
        .map(|c| SampledBand::gaussian(*c, 8.0))
        .collect();
    let segs = segments();
    let vs: Vec<VesselState> = segs
        .iter()
        .map(|s| VesselState {
            segment: s,
            so2: if s.kind == VesselKind::Arteriole {
                0.96
            } else {
                0.6
            },
            diameter_um: Box::new(|f| 140.0 - 30.0 * f),
            double_pass: Box::new(|_| 0.3),
        })
        .collect();
    let offsets = [(0.0, 0.0); 8];
    let scene = Scene {
        width: SIZE,
        height: SIZE,
        pixel_um: 12.0,
        bands: &bands,
        band_offsets: &offsets,
        pigmentation: 2.0,
        veil: 0.2,
        hb_g_per_l: 150.0,
        optics: Default::default(),
        well_electrons: 20_000.0,
        read_noise_electrons: 6.0,
    };
    let t0 = Instant::now();
    let mut rng = rand_chacha::ChaCha8Rng::seed_from_u64(3);
    let reference = render(
        &scene,
        &vs,
        Motion {
            dx: 0.0,
            dy: 0.0,
            angle_deg: 0.0,
        },
        1.0,
        &mut rng,
    );
    let moved = render(
        &scene,
        &vs,
        Motion {
            dx: 6.3,
            dy: -4.1,
            angle_deg: 0.7,
        },
        1.0,
        &mut rng,
    );
    let ref_path = dir.path().join("reference.tif");
    write_tiff(&ref_path, SIZE, SIZE, &reference).unwrap();
    let n = 8;
    let files: Vec<_> = (0..n)
        .map(|i| {
            let p = dir.path().join(format!("c{i}.tif"));
            write_tiff(&p, SIZE, SIZE, &moved).unwrap();
            p
        })
        .collect();
    println!(
        "image stage benchmark: {SIZE} × {SIZE} px × 8 bands, 10 segments; captures rendered in {:.1} s",
        t0.elapsed().as_secs_f64()
    );
    let reference = EyeReference::new(read_capture(&ref_path, 8, None).unwrap(), 4);
    let settings = ProfileSettings {
        half_length_px: 220.0 / 12.0 + 4.0,
        ..ProfileSettings::default()
    };
    // Where the time goes, per capture on one core: decoding (the floor),
    // registration, and the whole stage.
    let t = Instant::now();
    let images: Vec<_> = files
        .iter()
        .map(|f| read_capture(f, 8, Some((SIZE, SIZE))).unwrap())
        .collect();
    let t_read = t.elapsed().as_secs_f64() / n as f64;
    let target = RegistrationTarget::new(&reference.capture.bands[4], SIZE, SIZE);
    let t = Instant::now();
    let regs: Vec<_> = images
        .iter()
        .map(|img| target.register(&img.bands[4], 2.0))
        .collect();
    let t_reg = t.elapsed().as_secs_f64() / n as f64;
    let reg = regs[0];
    println!(
        "  per capture: read {t_read:.3} s, register {t_reg:.3} s (score {:.3}, dx {:.2}, dy {:.2}, angle {:.2}°)",
        reg.score, reg.dx, reg.dy, reg.angle_deg
    );
    let cores = std::thread::available_parallelism()
        .map(|n| n.get())
        .unwrap_or(1);
    for threads in [1, cores] {
        let pool = rayon::ThreadPoolBuilder::new()
            .num_threads(threads)
            .build()
            .unwrap();
        let t0 = Instant::now();
        let results: Vec<_> = pool.install(|| {
            files
                .par_iter()
                .enumerate()
                .map(|(i, f)| {
                    analyse_capture(
                        i,
                        false,
                        f,
                        &reference,
                        &segs,
                        8,
                        4,
                        &settings,
                        12.0,
                        &satstep::images::correct::Corrections::none(8),
                    )
                })
                .collect()
        });
        let dt = t0.elapsed().as_secs_f64();
        let positions: usize = results.iter().map(|r| r.1.len()).sum();
        assert!(
            results
                .iter()
                .all(|r| r.0.status == satstep::stages::transmissions::ImageOutcome::Ok),
            "{:?}",
            results[0].0
        );
        println!(
            "  {threads} thread(s): {n} captures in {dt:.2} s = {:.2} captures/s ({} profile positions per capture)",
            n as f64 / dt,
            positions / n
        );
        if threads == 1 {
            let per = dt / n as f64;
            println!(
                "  whole stage on one core: {per:.3} s per capture = {:.1}× decoding",
                per / t_read
            );
        }
    }
}
