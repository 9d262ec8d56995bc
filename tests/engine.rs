//! The oximetry engine against outside references and known truth.

use rand::SeedableRng;
use rand_distr::{Distribution, Normal};
use rayon::prelude::*;
use satstep::oximetry::bands::SampledBand;
use satstep::oximetry::hemoglobin::{extinction, isosbestic_points};
use satstep::oximetry::model::{Shared, VesselModel};
use satstep::oximetry::pointwise::fit_pointwise;
use satstep::oximetry::segment::{fit_segment, FitSettings, RobustLoss, SegmentSpectra};
use satstep::oximetry::sensitivity::{so2_errors, OperatingPoint};

/// Prahl's table (tests/fixtures/hb_extinction_prahl.tsv, source line in the file).
fn source_table() -> Vec<(f64, f64, f64)> {
    let p = std::path::PathBuf::from(env!("CARGO_MANIFEST_DIR")).join("tests/fixtures/hb_extinction_prahl.tsv");
    std::fs::read_to_string(p)
        .unwrap()
        .lines()
        .filter(|l| !l.starts_with('#') && !l.starts_with("wavelength"))
        .map(|l| {
            let f: Vec<f64> = l.split('\t').map(|v| v.parse().unwrap()).collect();
            (f[0], f[1], f[2])
        })
        .collect()
}

#[test]
fn built_in_extinction_equals_the_source_at_every_tabulated_wavelength() {
    let t = source_table();
    assert_eq!(t.len(), 376);
    assert_eq!((t[0].0, t[t.len() - 1].0), (250.0, 1000.0));
    for (nm, o, d) in t {
        assert_eq!(extinction(nm), Some((o, d)), "{nm} nm");
    }
}

#[test]
fn isosbestic_points_where_the_literature_puts_them() {
    // Crossings of this table by linear interpolation (../shared/reference README).
    let found = isosbestic_points(480.0, 820.0);
    for want in [500.1, 529.2, 545.3, 570.2, 584.1, 796.8] {
        let near = found.iter().map(|f| (f - want).abs()).fold(f64::INFINITY, f64::min);
        assert!(near <= 0.5, "no crossing within 0.5 nm of {want}: {found:?}");
    }
}

fn eight_bands() -> Vec<SampledBand> {
    // Eight bands between 500 and 620 nm.
    [506.0, 522.0, 548.0, 560.0, 570.0, 586.0, 600.0, 616.0].iter().map(|c| SampledBand::gaussian(*c, 8.0)).collect()
}

/// Spectra of one segment from the model at known SO2 and veil, with 1 %
/// multiplicative noise. Diameters and double-pass fractions vary along it.
fn spectra(model: &VesselModel, so2: f64, veil: f64, n: usize, rng: &mut impl rand::Rng) -> SegmentSpectra {
    let noise = Normal::new(0.0, 0.01).unwrap();
    let mut d = Vec::new();
    let mut t = Vec::new();
    for p in 0..n {
        let f = p as f64 / n as f64;
        let diam = 130.0 - 30.0 * f;
        let f2 = 0.3 + 0.1 * (7.0 * f).sin();
        let mut out = vec![0.0; model.n_bands()];
        model.transmission(&Shared { so2, hb_g_per_l: 150.0, veil }, f2, diam, &mut out, None);
        d.push(diam);
        t.push(out.iter().map(|v| v * (1.0 + noise.sample(rng))).collect());
    }
    SegmentSpectra { diameters_um: d, transmissions: t }
}

#[test]
fn joint_fit_recovers_so2_with_honest_standard_errors() {
    let model = VesselModel::new(&eight_bands(), |_| 1.0, 0.04);
    let settings = FitSettings { loss: RobustLoss::Squared, ..FitSettings::default() };
    let cases: Vec<(f64, f64)> = [0.3, 0.5, 0.7, 0.85, 1.0].iter().flat_map(|s| [0.0, 0.2, 0.4, 0.6].map(|k| (*s, k))).collect();
    let results: Vec<(f64, f64, f64, f64, f64)> = cases
        .par_iter()
        .map(|&(so2, veil)| {
            let mut rng = rand_chacha::ChaCha8Rng::seed_from_u64((so2 * 1000.0 + veil * 10.0) as u64);
            let fits: Vec<_> = (0..200).map(|_| fit_segment(&model, &spectra(&model, so2, veil, 30, &mut rng), &settings).unwrap()).collect();
            assert!(fits.iter().all(|f| f.converged), "SO2 {so2} k {veil}: {:?}", fits.iter().map(|f| f.termination).collect::<Vec<_>>());
            let est: Vec<f64> = fits.iter().map(|f| f.so2 * 100.0).collect();
            let mean = est.iter().sum::<f64>() / est.len() as f64;
            let sd = (est.iter().map(|v| (v - mean).powi(2)).sum::<f64>() / (est.len() - 1) as f64).sqrt();
            let se = fits.iter().map(|f| f.so2_se * 100.0).sum::<f64>() / fits.len() as f64;
            let chi2 = fits.iter().map(|f| f.reduced_chi2).sum::<f64>() / fits.len() as f64;
            (mean - so2 * 100.0, sd, se, chi2, veil)
        })
        .collect();
    for ((so2, veil), (bias, sd, se, chi2, _)) in cases.iter().zip(&results) {
        eprintln!("SO2 {so2:.2} k {veil:.1}: bias {bias:+.3} points, SD {sd:.3}, mean SE {se:.3}, reduced chi2 {chi2:.3}");
        assert!(bias.abs() < 1.0, "SO2 {so2} k {veil}: bias {bias}");
        assert!(se / sd < 1.5 && sd / se < 1.5, "SO2 {so2} k {veil}: SE {se} vs SD {sd}");
        assert!((0.8..1.2).contains(chi2), "reduced chi-square {chi2}");
    }
}

#[test]
fn pointwise_fits_spread_more_than_the_joint_fit() {
    let model = VesselModel::new(&eight_bands(), |_| 1.0, 0.04);
    let settings = FitSettings { loss: RobustLoss::Squared, ..FitSettings::default() };
    for (so2, veil) in [(0.95, 0.2), (0.6, 0.4)] {
        let mut rng = rand_chacha::ChaCha8Rng::seed_from_u64(99);
        let (joint, point): (Vec<f64>, Vec<(f64, f64)>) = (0..40)
            .map(|_| {
                let s = spectra(&model, so2, veil, 30, &mut rng);
                let p = fit_pointwise(&model, &s, &settings);
                (fit_segment(&model, &s, &settings).unwrap().so2, (p.so2, p.so2_sd))
            })
            .unzip();
        let sd = |v: &[f64]| {
            let m = v.iter().sum::<f64>() / v.len() as f64;
            (v.iter().map(|x| (x - m).powi(2)).sum::<f64>() / (v.len() - 1) as f64).sqrt()
        };
        let sj = sd(&joint) * 100.0;
        let means: Vec<f64> = point.iter().map(|p| p.0).collect();
        let sp_mean = sd(&means) * 100.0;
        let along = point.iter().map(|p| p.1).sum::<f64>() / point.len() as f64 * 100.0;
        eprintln!("SO2 {so2} k {veil}: joint SD {sj:.3} points; pointwise: SD along the segment {along:.3}, SD of the segment mean {sp_mean:.3}");
        // Single positions scatter far more than the joint estimate, and
        // averaging them along the segment does not beat the joint fit.
        assert!(along > 3.0 * sj, "along-segment SD {along} vs joint {sj}");
        assert!(sp_mean > 0.9 * sj, "pointwise mean {sp_mean} vs joint {sj}");
    }
}

#[test]
fn huber_loss_resists_a_crossing() {
    // Six of thirty positions lie over a crossing vessel: their transmission
    // is 15 % lower in every band. The robust fit stays near the truth, the
    // squared loss is dragged further.
    let model = VesselModel::new(&eight_bands(), |_| 1.0, 0.04);
    let mut rng = rand_chacha::ChaCha8Rng::seed_from_u64(5);
    let mut s = spectra(&model, 0.9, 0.2, 30, &mut rng);
    for p in 12..18 {
        for t in s.transmissions[p].iter_mut() {
            *t *= 0.85;
        }
    }
    let robust = fit_segment(&model, &s, &FitSettings::default()).unwrap();
    let plain = fit_segment(&model, &s, &FitSettings { loss: RobustLoss::Squared, ..FitSettings::default() }).unwrap();
    eprintln!("robust {:.4} (down-weighted positions {}), squared {:.4}", robust.so2, robust.downweighted_positions, plain.so2);
    // Huber bounds the influence of the crossing but does not remove it.
    assert!((robust.so2 - 0.9).abs() < 0.03, "{}", robust.so2);
    assert!((robust.so2 - 0.9).abs() < 0.5 * (plain.so2 - 0.9).abs());
    assert!(robust.downweighted_positions >= 6);
}

/// The veil inflates error propagation (a fact of the trade), most steeply
/// as k approaches 1. The least-squares combination of eight bands
/// re-weights the bands as k grows (each row of the Jacobian of ln T_obs is
/// scaled by (1 − k)·T/T_obs, more for dark bands), so a band's own
/// coefficient can pass near zero at small k: in this band set 548, 560,
/// 570 and 586 nm dip between k = 0 and 0.2. From k = 0.2 on every band
/// grows; the all-band figure grows throughout.
#[test]
fn the_veil_inflates_error_propagation() {
    let model = VesselModel::new(&eight_bands(), |_| 1.0, 0.04);
    let op = OperatingPoint::default();
    let ks: Vec<f64> = (0..=18).map(|i| i as f64 / 20.0).collect();
    let rows: Vec<(Vec<f64>, f64)> = ks.iter().map(|k| so2_errors(&model, &op, *k, 0.01).unwrap()).collect();
    for b in 0..model.n_bands() {
        for (i, w) in rows.windows(2).enumerate() {
            if ks[i] >= 0.2 {
                assert!(w[1].0[b] > w[0].0[b], "band {b} at k {}: {} then {}", ks[i], w[0].0[b], w[1].0[b]);
            }
        }
        assert!(rows[18].0[b] > 3.0 * rows[0].0[b], "band {b}");
    }
    for w in rows.windows(2) {
        assert!(w[1].1 > w[0].1);
    }
    // Steepest as k approaches 1: the last step adds more than the first.
    assert!(rows[18].1 - rows[17].1 > rows[1].1 - rows[0].1);
    eprintln!("k = 0: per band {:?}, all bands {:.2} points", rows[0].0.iter().map(|v| format!("{v:.2}")).collect::<Vec<_>>(), rows[0].1);
}
