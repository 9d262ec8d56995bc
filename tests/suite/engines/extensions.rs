//! The vessel model's extensions on spectra whose physics departs from the
//! base model as real eyes do, rendered by the simulator's own optics
//! (`simulate::optics`), which none of the extensions describes exactly:
//! a veil that changes with wavelength, a blood backscatter that follows
//! the albedo at another scattering coefficient, a double-pass share that
//! follows the fundus reflectance.

use rand::SeedableRng;
use rand_distr::{Distribution, Normal};
use rayon::prelude::*;
use satstep::oximetry::bands::SampledBand;
use satstep::oximetry::model::{BLOOD_BACKSCATTER, Extensions, VesselModel};
use satstep::oximetry::segment::{
    Adequacy, Candidate, EyeFit, FitSettings, SegmentFit, SegmentSpectra, base_describes_eye,
    choose_for_eye, eye_misfits, fit_candidates, fit_segment,
};
use satstep::simulate::optics::{BandOptics, Optics};
use satstep::simulate::render::background_reflectance;

const CENTRES: [f64; 8] = [506.0, 522.0, 548.0, 560.0, 570.0, 586.0, 600.0, 616.0];

/// [`CENTRES`] with three blue bands before them, where blood absorbs so
/// much more that its albedo, and with it the backscatter, changes far
/// more than between 506 and 616 nm.
const WIDE: [f64; 11] = [
    450.0, 470.0, 490.0, 506.0, 522.0, 548.0, 560.0, 570.0, 586.0, 600.0, 616.0,
];

fn bands_at(centres: &[f64]) -> Vec<SampledBand> {
    centres
        .iter()
        .map(|c| SampledBand::gaussian(*c, 8.0))
        .collect()
}

fn bands() -> Vec<SampledBand> {
    bands_at(&CENTRES)
}

/// One segment's spectra through `bands` under `optics` at veil `k`, with
/// the image stage's noise scaled by `scale` (0: none; 1: 1 % independent
/// per position and band plus 1 % that wanders along the segment, AR(1),
/// ρ = 0.9).
fn spectra_with_noise(
    bands: &[SampledBand],
    optics: &Optics,
    so2: f64,
    k: f64,
    n: usize,
    seed: u64,
    scale: f64,
) -> SegmentSpectra {
    let mut rng = rand_chacha::ChaCha8Rng::seed_from_u64(seed);
    let fundus = |l: f64| background_reflectance(l, 2.0);
    let bo: Vec<BandOptics> = bands
        .iter()
        .map(|b| BandOptics::new(b, optics, |_| 1.0, fundus))
        .collect();
    let white = Normal::new(0.0, 0.01).unwrap();
    let innovation = Normal::new(0.0, 0.01 * (1.0f64 - 0.81).sqrt()).unwrap();
    let mut drift: Vec<f64> = (0..bo.len()).map(|_| white.sample(&mut rng)).collect();
    let (mut d, mut t) = (Vec::new(), Vec::new());
    for p in 0..n {
        let f = p as f64 / n as f64;
        let diam = 130.0 - 30.0 * f;
        let f2 = 0.3 + 0.1 * (7.0 * f).sin();
        let row: Vec<f64> = bo
            .iter()
            .enumerate()
            .map(|(b, o)| {
                let (c0, c1) = o.terms(optics, so2, 150.0, diam);
                let kb = o.veil(optics, k);
                drift[b] = 0.9 * drift[b] + innovation.sample(&mut rng);
                let e = white.sample(&mut rng) + drift[b];
                ((1.0 - kb) * (c0 + f2 * c1) + kb) * (1.0 + scale * e)
            })
            .collect();
        d.push(diam);
        t.push(row);
    }
    SegmentSpectra {
        diameters_um: d,
        transmissions: t,
    }
}

pub fn model(ext: Extensions) -> VesselModel {
    model_at(&bands(), ext)
}

fn model_at(bands: &[SampledBand], ext: Extensions) -> VesselModel {
    VesselModel::new(bands, |_| 1.0, BLOOD_BACKSCATTER).with_extensions(ext)
}

/// How a fit is chosen: one model, or the information criterion over all,
/// as `model: auto` chooses: once per eye, over all its segments (here
/// [`EYES`] eyes, each with segments at both saturations).
#[derive(Clone, Copy)]
pub enum Fitting {
    One(Extensions),
    Auto,
}

/// Eyes the fits are grouped into, for `auto`'s choice and for the
/// adequacy test of an eye's fits together: with [`REPS`] segments per
/// saturation, ten segments each, as many as an eye of the simulated
/// studies has (six to eight, each over many captures).
pub const EYES: u64 = 16;

/// Segments per saturation in the table's rows. With 20 the Monte Carlo
/// SE of a row's contrast was about 0.02, and `auto`'s contrasts at veil
/// 0.4 read 1.06–1.07; with 80 they read 1.02–1.03 (SE about 0.01).
pub const REPS: u64 = 80;

pub struct Summary {
    pub bias: f64,
    pub rms: f64,
    /// Share of fits the adequacy test calls misfits on their own.
    pub misfit: f64,
    /// Share of fits that misfit on their own or with their eye.
    pub misfit_with_eye: f64,
    /// The change from SO2 60 to 95 % the fits measure, over the true 35
    /// points: what an epoch contrast would report.
    pub contrast: f64,
    /// Its Monte Carlo standard error, from the scatter of the fits.
    pub contrast_se: f64,
    pub chosen: Vec<(String, usize)>,
}

/// Fits [`REPS`] segments at SO2 60 and 95 % and the given veil through
/// the eight bands.
pub fn summary(optics: &Optics, k: f64, fitting: Fitting) -> Summary {
    summary_at(&bands(), optics, k, fitting)
}

/// [`summary`] through `bands`.
fn summary_at(bands: &[SampledBand], optics: &Optics, k: f64, fitting: Fitting) -> Summary {
    let candidates =
        satstep::oximetry::sensitivity::supported_models(&model_at(bands, Extensions::BASE));
    let cases: Vec<(f64, u64)> = [0.6, 0.95]
        .iter()
        .flat_map(|s| (0..REPS).map(move |i| (*s, i)))
        .collect();
    let fitted: Vec<Vec<SegmentFit>> = cases
        .par_iter()
        .map(|(s, i)| {
            let seed = i * 7919 + (s * 100.0) as u64;
            let data = spectra_with_noise(bands, optics, *s, k, 60, seed, 1.0);
            match fitting {
                Fitting::One(e) => fit_segment(&model_at(bands, e), &data, &FitSettings::default())
                    .map(|f| vec![f]),
                Fitting::Auto => fit_candidates(&candidates, &data, &FitSettings::default()),
            }
            .unwrap()
        })
        .collect();
    let mut fits: Vec<(f64, SegmentFit, bool)> = Vec::new();
    for eye in 0..EYES {
        let members: Vec<usize> = (0..cases.len())
            .filter(|c| cases[*c].1 % EYES == eye)
            .collect();
        let summaries: Vec<Vec<Candidate>> = members
            .iter()
            .map(|c| fitted[*c].iter().map(Candidate::of).collect())
            .collect();
        // Each segment is fitted in one capture here, so a segment's band
        // means are its fit's.
        let names: Vec<String> = members.iter().map(|c| c.to_string()).collect();
        let base: Vec<&SegmentFit> = members
            .iter()
            .filter_map(|c| fitted[*c].iter().find(|f| f.model == Extensions::BASE))
            .collect();
        let keep_base = base.len() == members.len() && base_describes_eye(&eye_fits(&names, &base));
        let mut chosen = Vec::new();
        let segments: Vec<&str> = names.iter().map(String::as_str).collect();
        let choice = choose_for_eye(&summaries, &segments, keep_base);
        for (c, choice) in members.iter().zip(choice.picks) {
            let (j, se) = choice.unwrap();
            let mut f = fitted[*c][j].clone();
            f.so2_se = se;
            chosen.push((cases[*c].0, f));
        }
        let refs: Vec<&SegmentFit> = chosen.iter().map(|(_, f)| f).collect();
        let eye_misfit = eye_misfits(&eye_fits(&names, &refs));
        fits.extend(chosen.into_iter().map(|(s, f)| (s, f, eye_misfit)));
    }
    let n = fits.len() as f64;
    let err: Vec<f64> = fits.iter().map(|(s, f, _)| (f.so2 - s) * 100.0).collect();
    let mut chosen: std::collections::BTreeMap<String, usize> = Default::default();
    for (_, f, _) in &fits {
        *chosen.entry(f.model.name()).or_default() += 1;
    }
    let share = |p: &dyn Fn(&SegmentFit, bool) -> bool| {
        fits.iter().filter(|(_, f, e)| p(f, *e)).count() as f64 / n
    };
    // Mean and its squared standard error at each saturation.
    let mean_at = |s: f64| {
        let v: Vec<f64> = fits
            .iter()
            .filter(|(t, ..)| (*t - s).abs() < 1e-9)
            .map(|(_, f, _)| f.so2)
            .collect();
        let n = v.len() as f64;
        let m = v.iter().sum::<f64>() / n;
        let var = v.iter().map(|x| (x - m).powi(2)).sum::<f64>() / (n - 1.0);
        (m, var / n)
    };
    let ((lo, lo_v), (hi, hi_v)) = (mean_at(0.6), mean_at(0.95));
    Summary {
        contrast: (hi - lo) / 0.35,
        contrast_se: (lo_v + hi_v).sqrt() / 0.35,
        bias: err.iter().sum::<f64>() / n,
        rms: (err.iter().map(|e| e * e).sum::<f64>() / n).sqrt(),
        misfit: share(&|f, _| f.adequacy == Adequacy::Misfit),
        misfit_with_eye: share(&|f, e| f.adequacy == Adequacy::Misfit || e),
        chosen: chosen.into_iter().collect(),
    }
}

/// Fits as the eye's adequacy test sees them, each its own segment.
fn eye_fits<'a>(names: &'a [String], fits: &[&'a SegmentFit]) -> Vec<EyeFit<'a>> {
    fits.iter()
        .zip(names)
        .map(|(f, n)| EyeFit {
            segment: n,
            band_residuals: &f.band_residuals,
            adequacy: f.adequacy,
        })
        .collect()
}

/// What an effect leaves for the adequacy test to see: the largest band
/// mean residual of the base model's fit (in % of the transmission) on
/// noise-free spectra at SO2 60 and 95 %. An effect the base model takes
/// up in S, hb and the veil leaves little, however it moves SO2.
fn noise_free_residual(optics: &Optics, k: f64) -> f64 {
    [0.6, 0.95]
        .iter()
        .map(|s| {
            let data = spectra_with_noise(&bands(), optics, *s, k, 60, 1, 0.0);
            let f = fit_segment(&model(Extensions::BASE), &data, &FitSettings::default()).unwrap();
            f.band_residuals
                .iter()
                .fold(0.0f64, |m, r| m.max(r.abs() * 100.0))
        })
        .fold(0.0, f64::max)
}

fn ext(name: &str) -> Extensions {
    Extensions::BASE.with(name).unwrap()
}

/// The effects and levels of the table in DEVELOPERS.md ("Model
/// extensions"), each with the extension that describes it.
fn effects() -> Vec<(&'static str, Optics, Option<Extensions>)> {
    let o = Optics::default;
    vec![
        ("none", o(), None),
        (
            "veil slope 0.05",
            Optics {
                veil_slope: 0.05,
                ..o()
            },
            Some(ext("veil-slope")),
        ),
        (
            "veil slope 0.09",
            Optics {
                veil_slope: 0.09,
                ..o()
            },
            Some(ext("veil-slope")),
        ),
        (
            "fundus exponent 0.3",
            Optics {
                fundus_exponent: 0.3,
                ..o()
            },
            Some(ext("fundus-slope")),
        ),
        (
            "fundus exponent 0.6",
            Optics {
                fundus_exponent: 0.6,
                ..o()
            },
            Some(ext("fundus-slope")),
        ),
        (
            "backscatter 0.2",
            Optics {
                backscatter_scale: 0.2,
                ..o()
            },
            Some(ext("backscatter-spectrum")),
        ),
        (
            "backscatter 0.4",
            Optics {
                backscatter_scale: 0.4,
                ..o()
            },
            Some(ext("backscatter-spectrum")),
        ),
    ]
}

/// Per effect and veil: bias and RMS of SO2 for the base model, the
/// effect's own extension and `auto`, and the base fits' misfit share.
/// Prints the table of DEVELOPERS.md; asserts what the issue of model
/// adequacy asks where this band set can deliver it:
/// - the base model is biased by each veil and fundus effect (> 4 points),
///   its own extension and `auto` bring SO2 within 2 points at veils up to
///   0.4, and `auto` stays within 1 point where there is no effect;
/// - `auto`'s change from SO2 60 to 95 % is within 5 % of the truth at
///   veils up to 0.4 (measured 1.005–1.013 at 0.1 and 1.020–1.032 at 0.4;
///   the base model's 0.67–1.32);
/// - the adequacy test, each fit's with its eye's, flags the base fits of
///   every veil and fundus effect at both veils in ≥ 90 % of segments, and
///   < 5 % where there is no effect.
///
/// The backscatter spectrum is refused for these bands (its SO2 standard
/// error is 3 times the base model's, `support`), so `auto` leaves its bias
/// of 0.6–2.1 points; the test holds it below 3. It shifts both saturations
/// alike, so the contrasts stay within 1 % (with bands in the blue it is
/// supported and removed:
/// [`blue_bands_identify_the_backscatter_spectrum`]). Nor can the
/// adequacy test see it reliably: on noise-free spectra the base model's
/// largest band residual is below 1 % (0.2–0.7 %), under the noise of a
/// single segment's band means and near the eye's floor.
#[test]
fn extensions_remove_the_biases_the_base_model_cannot_see() {
    let mut failures = Vec::new();
    eprintln!(
        "| effect | veil k | base bias | base RMS | base misfits, alone / with the eye | base residual, no noise | extension bias | extension RMS | auto bias | auto RMS | auto misfits, alone / with the eye | contrast, base / auto |"
    );
    eprintln!("|---|---|---|---|---|---|---|---|---|---|---|---|");
    for (name, optics, own) in effects() {
        for k in [0.1, 0.4] {
            let base = summary(&optics, k, Fitting::One(Extensions::BASE));
            let own_fit = own.map(|e| summary(&optics, k, Fitting::One(e)));
            let auto = summary(&optics, k, Fitting::Auto);
            let residual = noise_free_residual(&optics, k);
            eprintln!(
                "| {name} | {k} | {:+.2} | {:.2} | {:.0} / {:.0} % | {residual:.2} % | {} | {} | {:+.2} | {:.2} | {:.0} / {:.0} % | {:.3} / {:.3} (SE {:.3}) |",
                base.bias,
                base.rms,
                base.misfit * 100.0,
                base.misfit_with_eye * 100.0,
                own_fit
                    .as_ref()
                    .map_or("–".into(), |s| format!("{:+.2}", s.bias)),
                own_fit
                    .as_ref()
                    .map_or("–".into(), |s| format!("{:.2}", s.rms)),
                auto.bias,
                auto.rms,
                auto.misfit * 100.0,
                auto.misfit_with_eye * 100.0,
                base.contrast,
                auto.contrast,
                auto.contrast_se
            );
            eprintln!("    auto chose {:?}", auto.chosen);
            let mut check = |ok: bool, what: String| {
                if !ok {
                    failures.push(format!("{name}, k {k}: {what}"));
                }
            };
            match name {
                "none" => {
                    check(auto.bias.abs() < 1.0, format!("auto bias {:.2}", auto.bias));
                    check(
                        base.misfit_with_eye < 0.05,
                        format!("base misfits {:.2}", base.misfit_with_eye),
                    );
                    check(
                        auto.misfit_with_eye < 0.05,
                        format!("auto misfits {:.2}", auto.misfit_with_eye),
                    );
                }
                n if n.starts_with("backscatter") => {
                    check(auto.bias.abs() < 3.0, format!("auto bias {:.2}", auto.bias));
                    // Why the adequacy test cannot flag it: S, hb and the
                    // veil take up all but a fraction of the noise.
                    check(residual < 1.0, format!("residual {residual:.2} %"));
                }
                _ => {
                    let own_fit = own_fit.unwrap();
                    check(
                        base.bias.abs() > 4.0,
                        format!("base bias only {:.2}", base.bias),
                    );
                    check(
                        own_fit.bias.abs() < 2.0,
                        format!("extension bias {:.2}", own_fit.bias),
                    );
                    check(auto.bias.abs() < 2.0, format!("auto bias {:.2}", auto.bias));
                    // At veil 0.4 the extended fits' contrasts come out
                    // 2–3 % large (SE about 0.01): their SO2 is biased by
                    // the noise itself, more at 60 % than at 95 % (none
                    // without noise, half as much at half the noise).
                    check(
                        (auto.contrast - 1.0).abs() < 0.05,
                        format!(
                            "auto contrast {:.3} (SE {:.3})",
                            auto.contrast, auto.contrast_se
                        ),
                    );
                    check(
                        base.misfit_with_eye >= 0.9,
                        format!("base misfits only {:.2}", base.misfit_with_eye),
                    );
                }
            }
        }
    }
    assert!(failures.is_empty(), "{failures:#?}");
}

/// With three bands in the blue (450–490 nm) beside the eight, the
/// backscatter spectrum is separated from SO2 (`support`), and its
/// extension, and `auto` choosing among what these bands support, bring
/// SO2 within 2 points of the truth at both veils (measured: the
/// extension within 0.63, `auto` within 1.29), where the base model is off
/// by up to 1.3 points and the eight bands leave `auto` up to 2.1 off (the
/// table above).
#[test]
fn blue_bands_identify_the_backscatter_spectrum() {
    use satstep::oximetry::sensitivity::support;
    let wide = bands_at(&WIDE);
    let backscatter = ext("backscatter-spectrum");
    let s = support(&model_at(&wide, Extensions::BASE));
    let of = |e: Extensions| s.iter().find(|x| x.extensions == e).unwrap();
    assert!(
        of(backscatter).supported,
        "inflation {:.2}",
        of(backscatter).inflation
    );
    let mut failures = Vec::new();
    for (name, optics, _) in effects()
        .into_iter()
        .filter(|(n, ..)| n.starts_with("backscatter"))
    {
        for k in [0.1, 0.4] {
            let base = summary_at(&wide, &optics, k, Fitting::One(Extensions::BASE));
            let own = summary_at(&wide, &optics, k, Fitting::One(backscatter));
            let auto = summary_at(&wide, &optics, k, Fitting::Auto);
            eprintln!(
                "{name}, k {k}, eleven bands: base {:+.2} (RMS {:.2}, misfits {:.0} / {:.0} %, contrast {:.3}), extension {:+.2} ({:.2}, contrast {:.3}), auto {:+.2} ({:.2}, contrast {:.3}), auto chose {:?}",
                base.bias,
                base.rms,
                base.misfit * 100.0,
                base.misfit_with_eye * 100.0,
                base.contrast,
                own.bias,
                own.rms,
                own.contrast,
                auto.bias,
                auto.rms,
                auto.contrast,
                auto.chosen
            );
            for (what, v) in [("extension", own.bias), ("auto", auto.bias)] {
                if v.abs() >= 2.0 {
                    failures.push(format!("{name}, k {k}: {what} bias {v:.2}"));
                }
            }
        }
    }
    assert!(failures.is_empty(), "{failures:#?}");
}

#[test]
fn the_bands_say_which_extensions_they_can_identify() {
    use satstep::oximetry::sensitivity::support;
    let supported = |m: &VesselModel| -> Vec<String> {
        support(m)
            .into_iter()
            .filter(|s| s.supported)
            .map(|s| s.extensions.name())
            .collect()
    };
    // Eight bands over 506–616 nm: both slopes, alone and together; the
    // backscatter spectrum is too close to what S and hb already do.
    assert_eq!(
        supported(&model(Extensions::BASE)),
        [
            "base",
            "veil-slope",
            "fundus-slope",
            "veil-slope+fundus-slope"
        ]
    );
    let s = support(&model(Extensions::BASE));
    assert!((s[0].inflation - 1.0).abs() < 1e-12);
    assert!(s.iter().all(|x| x.inflation >= 1.0 - 1e-9));
    // Five bands: only the veil slope remains.
    let five: Vec<SampledBand> = [506.0, 548.0, 570.0, 600.0, 616.0]
        .iter()
        .map(|c| SampledBand::gaussian(*c, 8.0))
        .collect();
    assert_eq!(
        supported(&VesselModel::new(&five, |_| 1.0, BLOOD_BACKSCATTER)),
        ["base", "veil-slope"]
    );
}
