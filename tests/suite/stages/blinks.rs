//! Captures that read and register as a whole but must not be analysed:
//! part of the image hides the fundus (a partial blink, glare). Each is
//! flagged with its reason, counted in the report's capture accounting,
//! and kept out of the fits and statistics; the rest of the study runs.

use crate::common::*;

#[test]
fn a_partial_blink_is_flagged_counted_and_left_out() {
    let dir = tempfile::tempdir().unwrap();
    let s = simulated(dir.path(), "tests/fixtures/runner-scenario.yaml", "s");
    // The top 30 % of every band hidden by a lid: smooth skin, a little
    // brighter than the fundus, no vessels.
    let tif = s.join("subjects/V02/captures/c005.tif");
    let img = satstep::images::ingest::read_capture(&tif, 4, None).unwrap();
    let top = img.height * 3 / 10 * img.width;
    let pages: Vec<Vec<u16>> = img
        .bands
        .iter()
        .map(|b| {
            let mean = b.iter().map(|v| f64::from(*v)).sum::<f64>() / b.len() as f64;
            b.iter()
                .enumerate()
                .map(|(i, v)| {
                    let y = (i / img.width) as f64;
                    if i < top {
                        (1.2 * mean + 0.5 * y) as u16
                    } else {
                        *v as u16
                    }
                })
                .collect()
        })
        .collect();
    satstep::simulate::render::write_tiff(&tif, img.width, img.height, &pages).unwrap();

    let o = satstep(dir.path(), &["run", s.to_str().unwrap()]);
    // Exit 1: the run finished and wrote its outputs, and some items failed.
    assert_eq!(o.code, 1, "{}", o.stderr);
    assert!(o.stderr.contains("wrote `"), "{}", o.stderr);
    assert!(
        o.stderr
            .contains("capture `captures/c005.tif` (part-unmatched)"),
        "{}",
        o.stderr
    );

    let mut flagged = 0;
    for r in records(&s.join("results/transmissions/captures.csv")) {
        let region: f64 = r["worst_region_score"].parse().unwrap();
        if r["subject"] == "V02" && r["capture"] == "captures/c005.tif" {
            // Registered as a whole: the whole-image score alone would pass it.
            let whole: f64 = r["match_score"].parse().unwrap();
            assert!(whole >= 0.8, "{r:?}");
            assert!(region < 0.3, "{r:?}");
            assert_eq!(r["image_status"], "part-unmatched", "{r:?}");
            assert!(r["message"].contains("partial blink"), "{r:?}");
            flagged += 1;
        } else {
            assert!(
                region > 0.9,
                "an untouched capture matches everywhere: {r:?}"
            );
            assert_eq!(r["image_status"], "ok", "{r:?}");
        }
    }
    assert_eq!(flagged, 1);

    // No fit from it, and the report counts it under its reason.
    for r in records(&s.join("results/fits/so2.csv")) {
        if r["subject"] == "V02" && r["capture"] == "captures/c005.tif" {
            assert_eq!(r["so2"], "", "a part-unmatched capture was fitted: {r:?}");
        }
    }
    let total: usize = records(&s.join("results/report/tables/capture_accounting.csv"))
        .iter()
        .filter(|r| r["subject"] != "all")
        .map(|r| {
            r.get("part-unmatched")
                .unwrap_or_else(|| panic!("no part-unmatched column: {r:?}"))
                .parse::<usize>()
                .unwrap()
        })
        .sum();
    assert_eq!(total, 1);
}
