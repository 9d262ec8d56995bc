//! The image stage on real TIFF files: ingest checks, and registration
//! against captures rendered with known eye motion.

use rand::SeedableRng;
use satstep::config::segments::{Segment, VesselKind};
use satstep::images::ingest::{CaptureError, read_capture};
use satstep::images::register::register;
use satstep::oximetry::bands::SampledBand;
use satstep::oximetry::model::BLOOD_BACKSCATTER;
use satstep::simulate::render::{Motion, Scene, VesselState, render, write_tiff};

fn vessels() -> Vec<Segment> {
    let arc = |id: &str, kind, a: f64, bend: f64| Segment {
        id: id.into(),
        kind,
        points: (0..=12)
            .map(|k| {
                let s = 20.0 + 150.0 * k as f64 / 12.0;
                let ang = a + bend * s / 160.0;
                (20.0 + s * ang.cos(), 80.0 + s * ang.sin())
            })
            .collect(),
        notes: String::new(),
    };
    vec![
        arc("A1", VesselKind::Arteriole, -0.6, 0.3),
        arc("V1", VesselKind::Venule, -0.2, -0.2),
        arc("A2", VesselKind::Arteriole, 0.25, 0.25),
        arc("V2", VesselKind::Venule, 0.6, -0.3),
    ]
}

fn capture(motion: Motion, noise_seed: Option<u64>) -> Vec<Vec<u16>> {
    let bands = vec![
        SampledBand::gaussian(570.0, 10.0),
        SampledBand::gaussian(600.0, 10.0),
    ];
    let segs = vessels();
    let vs: Vec<VesselState> = segs
        .iter()
        .map(|s| VesselState {
            segment: s,
            so2: if s.kind == VesselKind::Arteriole {
                0.96
            } else {
                0.6
            },
            diameter_um: Box::new(|_| 130.0),
            double_pass: Box::new(|_| 0.3),
        })
        .collect();
    let offsets = [(0.0, 0.0), (0.0, 0.0)];
    let scene = Scene {
        width: 160,
        height: 160,
        pixel_um: 12.0,
        bands: &bands,
        band_offsets: &offsets,
        pigmentation: 2.0,
        veil: 0.1,
        hb_g_per_l: 150.0,
        optics: Default::default(),
        // Without noise: an enormous well makes shot noise negligible.
        well_electrons: if noise_seed.is_some() { 20_000.0 } else { 1e15 },
        read_noise_electrons: if noise_seed.is_some() { 6.0 } else { 0.0 },
    };
    let mut rng = rand_chacha::ChaCha8Rng::seed_from_u64(noise_seed.unwrap_or(0));
    render(&scene, &vs, motion, 1.0, &mut rng)
}

fn as_f32(p: &[u16]) -> Vec<f32> {
    p.iter().map(|v| *v as f32).collect()
}

#[test]
fn registration_recovers_known_motion() {
    for (noise, m) in [
        (
            None,
            Motion {
                dx: 3.37,
                dy: -2.81,
                angle_deg: 0.6,
            },
        ),
        (
            Some(3),
            Motion {
                dx: -5.2,
                dy: 4.45,
                angle_deg: -0.85,
            },
        ),
        (
            Some(4),
            Motion {
                dx: 0.4,
                dy: 1.1,
                angle_deg: 0.0,
            },
        ),
    ] {
        let reference = capture(Motion::default(), noise.map(|s| s + 100));
        let moved = capture(m, noise);
        let r = register(&as_f32(&reference[0]), &as_f32(&moved[0]), 160, 160, 2.0);
        eprintln!("true {m:?} found {r:?}");
        assert!(
            (r.dx - m.dx).abs() < 0.1 && (r.dy - m.dy).abs() < 0.1,
            "{r:?} vs {m:?}"
        );
        assert!((r.angle_deg - m.angle_deg).abs() < 0.1, "{r:?} vs {m:?}");
        assert!(r.score > 0.9, "{r:?}");
    }
}

#[test]
// Pixel values compared here are exact by construction.
#[allow(clippy::float_cmp)]
fn ingest_reads_every_supported_depth_and_refuses_the_rest() {
    let dir = tempfile::tempdir().unwrap();
    let pages = capture(Motion::default(), Some(1));
    let good = dir.path().join("good.tif");
    write_tiff(&good, 160, 160, &pages).unwrap();
    let c = read_capture(&good, 2, Some((160, 160))).unwrap();
    assert_eq!(
        (c.width, c.height, c.bands.len(), c.bit_depth),
        (160, 160, 2, 16)
    );
    assert_eq!(c.at(1, 10, 20), pages[1][20 * 160 + 10] as f32);

    // 8-bit and 32-bit float pages.
    for (name, depth) in [("u8.tif", 8u8), ("f32.tif", 32)] {
        let p = dir.path().join(name);
        let f = std::fs::File::create(&p).unwrap();
        let mut enc = tiff::encoder::TiffEncoder::new(std::io::BufWriter::new(f)).unwrap();
        for _ in 0..2 {
            if depth == 8 {
                enc.write_image::<tiff::encoder::colortype::Gray8>(4, 3, &[7u8; 12])
                    .unwrap();
            } else {
                enc.write_image::<tiff::encoder::colortype::Gray32Float>(4, 3, &[0.25f32; 12])
                    .unwrap();
            }
        }
        drop(enc);
        let c = read_capture(&p, 2, None).unwrap();
        assert_eq!(c.bit_depth, depth);
        assert_eq!(c.bands[1][5], if depth == 8 { 7.0 } else { 0.25 });
    }

    // Wrong band count, wrong size.
    assert!(matches!(
        read_capture(&good, 3, None),
        Err(CaptureError::BandCount {
            found: 2,
            expected: 3,
            ..
        })
    ));
    let e = read_capture(&good, 2, Some((256, 256))).unwrap_err();
    assert_eq!(
        e.to_string(),
        format!(
            "`{}` is 160×160 pixels; this eye's captures are 256×256",
            good.display()
        )
    );

    // Truncated, not a TIFF, empty, missing, RGB.
    let bytes = std::fs::read(&good).unwrap();
    let trunc = dir.path().join("trunc.tif");
    std::fs::write(&trunc, &bytes[..bytes.len() / 3]).unwrap();
    assert!(
        matches!(
            read_capture(&trunc, 2, None),
            Err(CaptureError::Decode { .. })
        ),
        "{:?}",
        read_capture(&trunc, 2, None)
    );
    let png = dir.path().join("fake.tif");
    std::fs::write(&png, b"\x89PNG\r\n\x1a\nnot a tiff at all").unwrap();
    assert!(matches!(
        read_capture(&png, 2, None),
        Err(CaptureError::Decode { page: 1, .. })
    ));
    let empty = dir.path().join("empty.tif");
    std::fs::write(&empty, b"").unwrap();
    assert!(matches!(
        read_capture(&empty, 2, None),
        Err(CaptureError::Decode { .. })
    ));
    assert!(matches!(
        read_capture(&dir.path().join("none.tif"), 2, None),
        Err(CaptureError::Open { .. })
    ));
    let rgb = dir.path().join("rgb.tif");
    {
        let f = std::fs::File::create(&rgb).unwrap();
        let mut enc = tiff::encoder::TiffEncoder::new(std::io::BufWriter::new(f)).unwrap();
        enc.write_image::<tiff::encoder::colortype::RGB8>(2, 2, &[1u8; 12])
            .unwrap();
    }
    let e = read_capture(&rgb, 1, None).unwrap_err();
    assert!(matches!(e, CaptureError::PixelType { .. }), "{e:?}");
    assert!(
        e.to_string()
            .contains("page 1 is RGB colour, 8-bit; expected single-channel 8-bit, 16-bit or 32-bit float grey"),
        "{e}"
    );
    // Pages of different sizes.
    let mixed = dir.path().join("mixed.tif");
    {
        let f = std::fs::File::create(&mixed).unwrap();
        let mut enc = tiff::encoder::TiffEncoder::new(std::io::BufWriter::new(f)).unwrap();
        enc.write_image::<tiff::encoder::colortype::Gray16>(4, 4, &[1u16; 16])
            .unwrap();
        enc.write_image::<tiff::encoder::colortype::Gray16>(4, 2, &[1u16; 8])
            .unwrap();
    }
    assert!(matches!(
        read_capture(&mixed, 2, None),
        Err(CaptureError::PageSize { page: 2, .. })
    ));
}

/// One straight vessel (an arteriole from (20, 40) to (140, 120)) of
/// constant diameter, rendered in two bands at 12 µm/px on a 160 px image,
/// noise-free unless `noisy`.
fn straight_vessel(
    bands: &[SampledBand],
    d_um: f64,
    so2: f64,
    veil: f64,
    noisy: bool,
    optics: satstep::simulate::optics::Optics,
) -> (Segment, satstep::images::ingest::Multiband) {
    let seg = Segment {
        id: "A1".into(),
        kind: VesselKind::Arteriole,
        points: vec![(20.0, 40.0), (140.0, 120.0)],
        notes: String::new(),
    };
    let vs = vec![VesselState {
        segment: &seg,
        so2,
        diameter_um: Box::new(move |_| d_um),
        double_pass: Box::new(|_| 0.3),
    }];
    let offsets = vec![(0.0, 0.0); bands.len()];
    let scene = Scene {
        width: 160,
        height: 160,
        pixel_um: 12.0,
        bands,
        band_offsets: &offsets,
        pigmentation: std::env::var("PIG")
            .map(|v| v.parse().unwrap())
            .unwrap_or(2.0),
        veil,
        hb_g_per_l: 150.0,
        optics,
        well_electrons: if noisy { 20_000.0 } else { 1e15 },
        read_noise_electrons: if noisy { 6.0 } else { 0.0 },
    };
    let mut rng = rand_chacha::ChaCha8Rng::seed_from_u64(9);
    let pages = render(&scene, &vs, Motion::default(), 1.0, &mut rng);
    drop(vs);
    let img = satstep::images::ingest::Multiband {
        width: 160,
        height: 160,
        bands: pages.iter().map(|p| as_f32(p)).collect(),
        bit_depth: 16,
    };
    (seg, img)
}

#[test]
fn profiles_recover_known_transmission_and_diameter() {
    use satstep::images::profile::{ProfileSettings, analyse_segment};
    use satstep::oximetry::model::{Shared, VesselModel};
    use satstep::simulate::render::background_reflectance;
    // One straight vessel, 130 µm at 12 µm/px, no noise: T and diameter are known.
    let bands = vec![
        SampledBand::gaussian(570.0, 10.0),
        SampledBand::gaussian(600.0, 10.0),
    ];
    for (d_um, so2, veil, noisy) in [
        (130.0, 0.96, 0.1, false),
        (90.0, 0.6, 0.3, false),
        (150.0, 0.6, 0.0, true),
    ] {
        let (seg, img) = straight_vessel(&bands, d_um, so2, veil, noisy, Default::default());
        let model = VesselModel::new(
            &bands,
            |l| background_reflectance(l, 2.0),
            BLOOD_BACKSCATTER,
        );
        let mut truth = vec![0.0; 2];
        model.transmission(&Shared::new(so2, 150.0, veil), 0.3, d_um, &mut truth, None);
        let res = analyse_segment(&img, &seg.points, &[], 0, &ProfileSettings::default());
        assert!(res.len() > 40);
        let ok: Vec<_> = res.iter().filter(|r| r.flags.is_empty()).collect();
        assert!(
            ok.len() > res.len() * 9 / 10,
            "{:?}",
            res.iter().map(|r| &r.flags).collect::<Vec<_>>()
        );
        let mean = |f: &dyn Fn(&satstep::images::profile::ProfileResult) -> f64| {
            ok.iter().map(|r| f(r)).sum::<f64>() / ok.len() as f64
        };
        let d = mean(&|r| r.diameter_px) * 12.0;
        eprintln!(
            "d {d_um} µm: found {d:.1}; T truth {truth:?}, found {:.4} {:.4}",
            mean(&|r| r.transmission[0]),
            mean(&|r| r.transmission[1])
        );
        assert!((d - d_um).abs() / d_um < 0.05, "diameter {d} vs {d_um}");
        for b in 0..2 {
            let t = mean(&|r| r.transmission[b]);
            let tol = if noisy { 0.02 } else { 0.01 };
            assert!(
                (t - truth[b]).abs() / truth[b] < tol,
                "band {b}: T {t} vs {}",
                truth[b]
            );
        }
    }
}

/// A profile line beside the vessel rather than on it: the vessel's axis
/// lies 10 or 12 px to one side, beyond the 8 px the shape fit lets the
/// centre move (half the 16 px half-length). The fit can only end on that
/// limit, wherever its path takes it (without the check, at 10 px every
/// position passed with a diameter of 5.6 px against the true 9.2), and
/// such positions must carry a flag.
#[test]
fn a_fit_that_ends_on_its_limits_is_flagged() {
    use satstep::images::profile::{Flag, ProfileSettings, analyse_segment};
    let bands = vec![
        SampledBand::gaussian(570.0, 10.0),
        SampledBand::gaussian(600.0, 10.0),
    ];
    let (seg, img) = straight_vessel(&bands, 110.0, 0.96, 0.1, true, Default::default());
    // The vessel runs along (20, 40)–(140, 120); its unit normal is (−0.55, 0.83).
    let (nx, ny) = (-0.5547, 0.8321);
    for offset in [10.0, 12.0] {
        let beside: Vec<(f64, f64)> = seg
            .points
            .iter()
            .map(|(x, y)| (x + offset * nx, y + offset * ny))
            .collect();
        let res = analyse_segment(&img, &beside, &[], 0, &ProfileSettings::default());
        let inside: Vec<_> = res
            .iter()
            .filter(|r| !r.flags.contains(&Flag::OffImage))
            .collect();
        assert!(inside.len() > 30);
        let unflagged: Vec<_> = inside.iter().filter(|r| r.flags.is_empty()).collect();
        assert!(
            unflagged.is_empty(),
            "{offset} px aside: {} of {} positions unflagged, e.g. diameter {:.1} px",
            unflagged.len(),
            inside.len(),
            unflagged[0].diameter_px
        );
    }
    // On the vessel itself the same settings leave the positions unflagged.
    let on = analyse_segment(&img, &seg.points, &[], 0, &ProfileSettings::default());
    assert!(on.iter().filter(|r| r.flags.is_empty()).count() > on.len() * 9 / 10);
}

#[test]
fn dark_flat_and_band_offsets_are_corrected() {
    use satstep::config::study::{Band, BandResponse, Instrument};
    use satstep::images::correct::Corrections;
    use satstep::images::ingest::Multiband;
    use satstep::images::profile::{Neighbour, ProfileSettings, analyse_segment};
    // Four vessels in different directions (a single straight one would
    // leave the shift along it undetermined), noise-free; band 2 is
    // misregistered by a known offset, every page has a dark offset and
    // vignetting.
    let bands = vec![
        SampledBand::gaussian(570.0, 10.0),
        SampledBand::gaussian(600.0, 10.0),
    ];
    let mut segs = vessels();
    for (k, x) in [(0, 60.0), (1, 120.0)] {
        segs.push(Segment {
            id: format!("V{}", k + 3),
            kind: VesselKind::Venule,
            points: vec![(x, 10.0), (x + 12.0, 80.0), (x - 6.0, 150.0)],
            notes: String::new(),
        });
    }
    let seg = segs[0].clone();
    let vs: Vec<VesselState> = segs
        .iter()
        .map(|s| VesselState {
            segment: s,
            so2: 0.96,
            diameter_um: Box::new(|_| 130.0),
            double_pass: Box::new(|_| 0.3),
        })
        .collect();
    let draw = |offsets: &[(f64, f64)]| {
        let scene = Scene {
            width: 160,
            height: 160,
            pixel_um: 12.0,
            bands: &bands,
            band_offsets: offsets,
            pigmentation: 2.0,
            veil: 0.1,
            hb_g_per_l: 150.0,
            optics: Default::default(),
            well_electrons: 1e15,
            read_noise_electrons: 0.0,
        };
        render(
            &scene,
            &vs,
            Motion::default(),
            1.0,
            &mut rand_chacha::ChaCha8Rng::seed_from_u64(1),
        )
    };
    let clean = draw(&[(0.0, 0.0), (0.0, 0.0)]);
    let shift = (1.4, -0.7);
    let moved = draw(&[(0.0, 0.0), shift]);
    let (w, h) = (160usize, 160usize);
    let gain = |i: usize| {
        let (x, y) = ((i % w) as f64 - 80.0, (i / w) as f64 - 80.0);
        1.0 - 0.35 * (x * x + y * y) / (2.0 * 80.0 * 80.0)
    };
    let dark_level = 900.0;
    let raw: Vec<Vec<u16>> = moved
        .iter()
        .map(|p| {
            p.iter()
                .enumerate()
                .map(|(i, v)| (*v as f64 * gain(i) + dark_level).round() as u16)
                .collect()
        })
        .collect();
    let dir = tempfile::tempdir().unwrap();
    let dark: Vec<Vec<u16>> = (0..2).map(|_| vec![dark_level as u16; w * h]).collect();
    let flat: Vec<Vec<u16>> = (0..2)
        .map(|_| {
            (0..w * h)
                .map(|i| (dark_level + 40_000.0 * gain(i)).round() as u16)
                .collect()
        })
        .collect();
    write_tiff(&dir.path().join("dark.tif"), w, h, &dark).unwrap();
    write_tiff(&dir.path().join("flat.tif"), w, h, &flat).unwrap();
    let band = |name: &str, c: f64| Band {
        name: name.into(),
        response: BandResponse::Gaussian {
            centre_nm: c,
            fwhm_nm: 10.0,
        },
        offset_px: None,
        gain: None,
    };
    let mut inst = Instrument {
        name: "test".into(),
        pixel_size_um: 12.0,
        bands: vec![band("b570", 570.0), band("b600", 600.0)],
        dark: Some(dir.path().join("dark.tif")),
        flat: Some(dir.path().join("flat.tif")),
        estimate_band_offsets: true,
        layout: Default::default(),
        psf_sd_px: 0.0,
    };
    let as_img = |pages: &[Vec<u16>]| Multiband {
        width: w,
        height: h,
        bands: pages.iter().map(|p| as_f32(p)).collect(),
        bit_depth: 16,
    };
    let st = ProfileSettings::default();
    let centre_t = |img: &Multiband| -> Vec<f64> {
        let lines: Vec<Vec<(f64, f64)>> = segs.iter().map(|s| s.points.clone()).collect();
        let others = Neighbour::all_but(&lines, &[], 0);
        let ok: Vec<_> = analyse_segment(img, &seg.points, &others, 0, &st)
            .into_iter()
            .filter(|r| r.flags.is_empty())
            .collect();
        assert!(ok.len() > 10);
        (0..2)
            .map(|b| ok.iter().map(|r| r.transmission[b]).sum::<f64>() / ok.len() as f64)
            .collect()
    };
    let truth = centre_t(&as_img(&clean));

    // Estimated offsets: the known misregistration, to 0.1 px.
    let mut img = as_img(&raw);
    let used = Corrections::load(&inst, 0)
        .unwrap()
        .apply(&mut img)
        .unwrap();
    assert!(
        (used[1].0 - shift.0).abs() < 0.1 && (used[1].1 - shift.1).abs() < 0.1,
        "estimated {:?}, rendered {shift:?}",
        used[1]
    );
    let corrected = centre_t(&img);
    for b in 0..2 {
        assert!(
            (corrected[b] - truth[b]).abs() / truth[b] < 0.01,
            "band {b}: corrected T {} vs {}",
            corrected[b],
            truth[b]
        );
    }
    // Offsets given in the instrument file do the same.
    inst.estimate_band_offsets = false;
    inst.bands[1].offset_px = Some(shift);
    let mut img = as_img(&raw);
    assert_eq!(
        Corrections::load(&inst, 0)
            .unwrap()
            .apply(&mut img)
            .unwrap()[1],
        shift
    );
    let given = centre_t(&img);
    assert!(
        (given[1] - truth[1]).abs() / truth[1] < 0.01,
        "{given:?} vs {truth:?}"
    );
    // Without the dark frame the transmission is biased.
    let uncorrected = centre_t(&as_img(&raw));
    assert!(
        (uncorrected[0] - truth[0]).abs() / truth[0] > 0.03,
        "the dark offset should bias T: {uncorrected:?} vs {truth:?}"
    );
}

#[test]
fn a_central_reflex_does_not_bias_the_transmission() {
    use satstep::images::ingest::Multiband;
    use satstep::images::profile::{ProfileSettings, analyse_segment};
    use satstep::oximetry::model::{Shared, VesselModel};
    use satstep::simulate::render::background_reflectance;
    // A straight arteriole, noise-free; then a bright stripe of 25 % on its
    // axis (Gaussian, σ = 0.12 × radius), as a central reflex. Unhandled,
    // such a reflex raises the centre-line T by 10–25 %.
    let bands = vec![
        SampledBand::gaussian(570.0, 10.0),
        SampledBand::gaussian(600.0, 10.0),
    ];
    let (d_um, so2, veil) = (130.0, 0.96, 0.1);
    let (seg, plain) = straight_vessel(&bands, d_um, so2, veil, false, Default::default());
    let (a, b) = (seg.points[0], seg.points[1]);
    let sigma = 0.12 * d_um / 2.0 / 12.0;
    let len = (b.0 - a.0).hypot(b.1 - a.1);
    let dist = |i: usize| {
        let (x, y) = ((i % 160) as f64 - a.0, (i / 160) as f64 - a.1);
        (x * (b.1 - a.1) - y * (b.0 - a.0)).abs() / len
    };
    let with_reflex: Vec<Vec<f32>> = plain
        .bands
        .iter()
        .map(|p| {
            p.iter()
                .enumerate()
                .map(|(i, v)| {
                    (*v as f64 * (1.0 + 0.25 * (-dist(i).powi(2) / (2.0 * sigma * sigma)).exp()))
                        as f32
                })
                .collect()
        })
        .collect();
    let model = VesselModel::new(
        &bands,
        |l| background_reflectance(l, 2.0),
        BLOOD_BACKSCATTER,
    );
    let mut truth = vec![0.0; 2];
    model.transmission(&Shared::new(so2, 150.0, veil), 0.3, d_um, &mut truth, None);
    for (bands_px, reflex) in [(plain.bands.clone(), false), (with_reflex, true)] {
        let img = Multiband {
            width: 160,
            height: 160,
            bands: bands_px,
            bit_depth: 16,
        };
        let res = analyse_segment(&img, &seg.points, &[], 0, &ProfileSettings::default());
        let ok: Vec<_> = res.iter().filter(|r| r.flags.is_empty()).collect();
        let found = ok.iter().filter(|r| r.reflex).count();
        eprintln!(
            "reflex {reflex}: {} of {} positions usable, reflex at {found}",
            ok.len(),
            res.len()
        );
        assert!(
            ok.len() * 10 > res.len() * 8,
            "reflex {reflex}: {:?}",
            res.iter().map(|r| &r.flags).collect::<Vec<_>>()
        );
        if reflex {
            assert!(
                found * 10 >= ok.len() * 8,
                "the reflex was found at {found} of {} positions",
                ok.len()
            );
        } else {
            assert!(
                found * 10 <= ok.len(),
                "false reflexes at {found} of {} positions",
                ok.len()
            );
        }
        for band in 0..2 {
            let t = ok.iter().map(|r| r.transmission[band]).sum::<f64>() / ok.len() as f64;
            eprintln!("  band {band}: T {t:.4} vs {:.4}", truth[band]);
            // Read beside the reflex, where the chord is a little shorter: a
            // residual bias of about 5 % at strong absorption, against 25 %.
            let tol = if reflex { 0.06 } else { 0.01 };
            assert!(
                (t - truth[band]).abs() / truth[band] < tol,
                "reflex {reflex}, band {band}: T {t} vs {}",
                truth[band]
            );
        }
    }
}

#[test]
fn a_capture_with_pixels_that_are_not_numbers_is_refused_with_the_share() {
    let dir = tempfile::tempdir().unwrap();
    let p = dir.path().join("nan.tif");
    let f = std::fs::File::create(&p).unwrap();
    let mut enc = tiff::encoder::TiffEncoder::new(std::io::BufWriter::new(f)).unwrap();
    let mut page = vec![0.5f32; 100];
    page[3] = f32::NAN;
    page[7] = f32::INFINITY;
    for _ in 0..2 {
        enc.write_image::<tiff::encoder::colortype::Gray32Float>(10, 10, &page)
            .unwrap();
    }
    drop(enc);
    let e = read_capture(&p, 2, None).unwrap_err();
    assert_eq!(
        e.to_string(),
        format!(
            "`{}` page 1 has 2 pixels that are not numbers (NaN or infinite, 2.00 % of the page)",
            p.display()
        )
    );
}

/// The per-region score judges regions big enough to correlate: on an
/// image of a few dozen pixels it is the whole-image score, not −1 (which
/// would mark every such capture as partly unmatched).
#[test]
fn small_images_are_not_partly_unmatched_by_construction() {
    let (w, h) = (48, 48);
    let img: Vec<f32> = (0..w * h)
        .map(|i| {
            let (x, y) = ((i % w) as f32, (i / w) as f32);
            1000.0 + 200.0 * (0.4 * x).sin() * (0.3 * y).cos() + 150.0 * (0.23 * (x + y)).sin()
        })
        .collect();
    let r = register(&img, &img, w, h, 2.0);
    assert!(r.score > 0.99, "{r:?}");
    assert!(r.worst_region > 0.99, "{r:?}");
}

/// The simulator's optical blur and central reflex (scenario `optics:`)
/// render what they claim, seen through the image stage on one noise-free
/// arteriole of 130 µm: the blur leaves the image's light unchanged and
/// widens the measured vessel (today's profile fit has no point-spread
/// function: about +17 % at σ = 1.5 px, DEVELOPERS.md), and the reflex is a
/// bright stripe the profile analysis finds on the axis.
#[test]
fn the_simulator_renders_blur_and_a_central_reflex() {
    use satstep::images::profile::{ProfileSettings, analyse_segment};
    use satstep::simulate::optics::Optics;
    let bands = vec![
        SampledBand::gaussian(570.0, 10.0),
        SampledBand::gaussian(600.0, 10.0),
    ];
    let look = |optics: Optics| {
        let (seg, img) = straight_vessel(&bands, 130.0, 0.96, 0.1, false, optics);
        let total: f64 = img.bands[0].iter().map(|v| *v as f64).sum();
        let res = analyse_segment(&img, &seg.points, &[], 0, &ProfileSettings::default());
        let ok: Vec<_> = res.iter().filter(|r| r.flags.is_empty()).collect();
        let n = ok.len() as f64;
        (
            total,
            ok.iter().map(|r| r.diameter_px * 12.0).sum::<f64>() / n,
            ok.iter().filter(|r| r.reflex).count() as f64 / n,
        )
    };
    let (light, sharp, sharp_reflex) = look(Optics::default());
    let (light_blur, blurred, _) = look(Optics {
        psf_px: 1.5,
        ..Default::default()
    });
    let (_, _, reflex) = look(Optics {
        reflex: 0.4,
        ..Default::default()
    });
    eprintln!(
        "diameter {sharp:.1} µm sharp, {blurred:.1} blurred; reflex found at {:.0} % of positions ({:.0} % without one)",
        reflex * 100.0,
        sharp_reflex * 100.0
    );
    assert!(
        (light_blur - light).abs() / light < 0.01,
        "{light} {light_blur}"
    );
    assert!((sharp - 130.0).abs() < 0.05 * 130.0, "{sharp}");
    assert!(blurred > sharp * 1.08, "{blurred} vs {sharp}");
    assert!(
        reflex > 0.8 && sharp_reflex < 0.05,
        "{reflex} {sharp_reflex}"
    );
}

/// A frame holding two 3 × 2 px bands at given rectangles (with a margin
/// and a gap between them) is cut into exactly those pixels; a frame with
/// two pages, or tiles beyond the frame, is refused with the reason.
#[test]
fn tiles_are_cut_from_one_frame() {
    use satstep::config::study::SensorLayout;
    use satstep::images::ingest::read_laid_out;
    use satstep::simulate::render::write_tiff;
    let dir = tempfile::tempdir().unwrap();
    let (fw, fh) = (9usize, 4usize);
    let frame: Vec<u16> = (0..fw * fh).map(|i| i as u16).collect();
    let path = dir.path().join("frame.tif");
    write_tiff(&path, fw, fh, std::slice::from_ref(&frame)).unwrap();
    let layout = SensorLayout::Tiles(vec![[1, 1, 3, 2], [5, 2, 3, 2]]);
    let img = read_laid_out(&path, &layout, 2, Some((3, 2))).unwrap();
    assert_eq!((img.width, img.height), (3, 2));
    let at = |x: usize, y: usize| (y * fw + x) as f32;
    assert_eq!(
        img.bands[0],
        vec![at(1, 1), at(2, 1), at(3, 1), at(1, 2), at(2, 2), at(3, 2)]
    );
    assert_eq!(
        img.bands[1],
        vec![at(5, 2), at(6, 2), at(7, 2), at(5, 3), at(6, 3), at(7, 3)]
    );
    let outside = SensorLayout::Tiles(vec![[1, 1, 3, 2], [7, 2, 3, 2]]);
    let e = read_laid_out(&path, &outside, 2, None)
        .unwrap_err()
        .to_string();
    assert!(
        e.contains("band 2's tile [7, 2, 3, 2] reaches beyond the 9 × 4 px frame"),
        "{e}"
    );
    let uneven = SensorLayout::Grid {
        columns: 2,
        rows: 1,
    };
    let e = read_laid_out(&path, &uneven, 2, None)
        .unwrap_err()
        .to_string();
    assert!(e.contains("does not divide a 9 × 4 px frame"), "{e}");
    let two = dir.path().join("two.tif");
    write_tiff(&two, fw, fh, &[frame.clone(), frame]).unwrap();
    let e = read_laid_out(&two, &layout, 2, None)
        .unwrap_err()
        .to_string();
    assert!(
        e.contains("has 2 pages; with the instrument's tiled `layout`"),
        "{e}"
    );
}

/// With the instrument's point-spread function given, the profiles are
/// fitted through it: on blurred arterioles of 80–160 µm (σ = 1 and 2 px),
/// with and without a central reflex (40 % of the absorbed light given
/// back over the central third, before the blur), the diameter is within
/// 5 % of the truth while σ is at most a sixth of the diameter (10 %
/// beyond: +8.5 % measured at 80 µm and σ = 2 px), and the reflex is found where it is, while the blur leaves it
/// a bump (σ ≤ 1 px, or vessels of 130 µm and more), and not where it is
/// not. Without the PSF the same images give diameters 8–30 % too wide
/// (the test above).
#[test]
fn a_blurred_vessel_is_measured_through_the_point_spread_function() {
    use satstep::images::profile::{ProfileSettings, analyse_segment};
    use satstep::simulate::optics::Optics;
    let bands = vec![
        SampledBand::gaussian(570.0, 10.0),
        SampledBand::gaussian(600.0, 10.0),
    ];
    let median = |mut v: Vec<f64>| {
        v.sort_by(f64::total_cmp);
        v[v.len() / 2]
    };
    for d_um in [80.0, 100.0, 130.0, 160.0] {
        for psf in [1.0, 2.0] {
            for reflex in [0.0, 0.4] {
                let (seg, img) = straight_vessel(
                    &bands,
                    d_um,
                    0.96,
                    0.1,
                    true,
                    Optics {
                        psf_px: psf,
                        reflex,
                        ..Default::default()
                    },
                );
                let st = ProfileSettings {
                    psf_sd_px: psf,
                    ..ProfileSettings::default()
                };
                let res = analyse_segment(&img, &seg.points, &[], 0, &st);
                let ok: Vec<_> = res.iter().filter(|r| r.flags.is_empty()).collect();
                let case = format!("{d_um} µm, σ {psf} px, reflex {reflex}");
                assert!(
                    ok.len() * 10 >= res.len() * 9,
                    "{case}: {} of {} usable",
                    ok.len(),
                    res.len()
                );
                let d = median(ok.iter().map(|r| r.diameter_px * 12.0).collect());
                let found = ok.iter().filter(|r| r.reflex).count() as f64 / ok.len() as f64;
                eprintln!(
                    "{case}: diameter {d:.1} µm ({:+.1} %), reflex at {:.0} % of positions",
                    (d / d_um - 1.0) * 100.0,
                    found * 100.0
                );
                let tol = if psf * 12.0 <= d_um / 6.0 { 0.05 } else { 0.1 };
                assert!((d / d_um - 1.0).abs() < tol, "{case}: {d}");
                if reflex == 0.0 {
                    assert!(found < 0.1, "{case}: false reflex at {found}");
                } else if psf <= 1.0 || d_um >= 130.0 {
                    assert!(found > 0.8, "{case}: reflex at {found}");
                }
            }
        }
    }
}

/// A venule running beside an arteriole, 17 px apart axis to axis (the
/// arteriole 120 µm, the venule 150 µm at 12 µm/px, so 4 px of fundus
/// between them), noise-free in eight bands. The venule's dark band lies
/// in the outer part of the arteriole's profiles, where the background is
/// fitted. Kept out by the neighbour's radius ([`vessel_radii`]), the
/// arteriole's T comes within 2 % of the truth in every band and its
/// diameter within 5 %; taken into the background, T is read far too low
/// where the blood absorbs most.
#[test]
fn a_neighbour_is_kept_out_of_the_background() {
    use satstep::images::profile::{Neighbour, ProfileSettings, analyse_segment, vessel_radii};
    use satstep::oximetry::model::{Shared, VesselModel};
    use satstep::simulate::render::background_reflectance;
    let bands: Vec<SampledBand> = [506.0, 522.0, 548.0, 560.0, 570.0, 586.0, 600.0, 616.0]
        .iter()
        .map(|c| SampledBand::gaussian(*c, 8.0))
        .collect();
    // Both run from upper left to lower right; the venule 17 px to the
    // arteriole's lower left, along the normal (−0.6, 0.8).
    let (dx, dy) = (-0.6 * 17.0, 0.8 * 17.0);
    let segs = [
        Segment {
            id: "A1".into(),
            kind: VesselKind::Arteriole,
            points: vec![(30.0, 30.0), (150.0, 120.0)],
            notes: String::new(),
        },
        Segment {
            id: "V1".into(),
            kind: VesselKind::Venule,
            points: vec![(30.0 + dx, 30.0 + dy), (150.0 + dx, 120.0 + dy)],
            notes: String::new(),
        },
    ];
    let (d_a, so2, veil, hb) = (120.0, 0.95, 0.1, 150.0);
    let vs: Vec<VesselState> = segs
        .iter()
        .zip([(d_a, so2), (150.0, 0.6)])
        .map(|(seg, (d, s))| VesselState {
            segment: seg,
            so2: s,
            diameter_um: Box::new(move |_| d),
            double_pass: Box::new(|_| 0.3),
        })
        .collect();
    let offsets = vec![(0.0, 0.0); bands.len()];
    let scene = Scene {
        width: 180,
        height: 180,
        pixel_um: 12.0,
        bands: &bands,
        band_offsets: &offsets,
        pigmentation: 2.0,
        veil,
        hb_g_per_l: hb,
        optics: Default::default(),
        well_electrons: 1e15,
        read_noise_electrons: 0.0,
    };
    let mut rng = rand_chacha::ChaCha8Rng::seed_from_u64(3);
    let pages = render(&scene, &vs, Motion::default(), 1.0, &mut rng);
    let img = satstep::images::ingest::Multiband {
        width: 180,
        height: 180,
        bands: pages.iter().map(|p| as_f32(p)).collect(),
        bit_depth: 16,
    };
    let model = VesselModel::new(
        &bands,
        |l| background_reflectance(l, 2.0),
        BLOOD_BACKSCATTER,
    );
    let mut truth = vec![0.0; bands.len()];
    model.transmission(&Shared::new(so2, hb, veil), 0.3, d_a, &mut truth, None);

    let lines: Vec<Vec<(f64, f64)>> = segs.iter().map(|s| s.points.clone()).collect();
    let st = ProfileSettings::default();
    let radii = vessel_radii(&img, &lines, 0, &st);
    eprintln!("radii {radii:?} px (truth 5.0 and 6.25)");
    assert!((radii[1] - 6.25).abs() < 0.6, "{radii:?}");
    // (worst relative T error over the bands, diameter error, usable positions)
    let measure = |radii: &[f64]| {
        let all = analyse_segment(
            &img,
            &lines[0],
            &Neighbour::all_but(&lines, radii, 0),
            0,
            &st,
        );
        let ok: Vec<_> = all.into_iter().filter(|r| r.flags.is_empty()).collect();
        let mean = |f: &dyn Fn(&satstep::images::profile::ProfileResult) -> f64| {
            ok.iter().map(f).sum::<f64>() / ok.len() as f64
        };
        let worst = (0..bands.len())
            .map(|b| mean(&|r| r.transmission[b]) / truth[b] - 1.0)
            .fold(0.0f64, |a, e| if e.abs() > a.abs() { e } else { a });
        (worst, mean(&|r| r.diameter_px) * 12.0 / d_a - 1.0, ok.len())
    };
    let (kept_out, d_out, n_out) = measure(&radii);
    let (taken_in, d_in, n_in) = measure(&[]);
    eprintln!(
        "neighbour kept out: worst T error {:+.2} %, diameter {:+.1} % ({n_out} positions); \
         taken in: {:+.2} %, {:+.1} % ({n_in})",
        100.0 * kept_out,
        100.0 * d_out,
        100.0 * taken_in,
        100.0 * d_in
    );
    assert!(n_out > 40, "{n_out}");
    // Measured: +1.5 % (the image stage's own reading of a lone vessel of
    // this size is about +1 %), 1.6 % wide; taken in, −14.5 % and 5 %.
    assert!(kept_out.abs() < 0.02, "{kept_out}");
    assert!(d_out.abs() < 0.05, "{d_out}");
    assert!(
        taken_in.abs() > 2.0 * kept_out.abs(),
        "{taken_in} vs {kept_out}"
    );
}
