//! Molar extinction coefficients of oxy- and deoxyhemoglobin, 250–1000 nm.
//!
//! Source: S. Prahl, "Tabulated molar extinction coefficient for hemoglobin
//! in water", Oregon Medical Laser Center (1998), compiled from W. B. Gratzer
//! and N. Kollias; the 2 nm table is built into the binary unchanged.
//!
//! Units: decadic molar extinction, cm⁻¹/M, so that the absorbance of a
//! layer is `eps · c · d` with `c` in mol/L and `d` in cm. Whole blood holds
//! about 150 g/L hemoglobin at 64 500 g/mol (per tetramer), c ≈ 2.33 mM.
//! Between tabulated wavelengths the values are interpolated linearly.

use std::sync::OnceLock;

const TABLE: &str = include_str!("data/hb_extinction_prahl.tsv");

/// Molar mass of hemoglobin (tetramer), g/mol.
pub(crate) const HB_MOLAR_MASS_G_PER_MOL: f64 = 64_500.0;

pub(crate) const MIN_NM: f64 = 250.0;
pub(crate) const MAX_NM: f64 = 1000.0;

/// One row: (wavelength nm, eps HbO2, eps Hb).
pub fn table() -> &'static [(f64, f64, f64)] {
    static T: OnceLock<Vec<(f64, f64, f64)>> = OnceLock::new();
    T.get_or_init(|| {
        TABLE
            .lines()
            .filter(|l| !l.starts_with('#') && !l.starts_with("wavelength"))
            .filter(|l| !l.trim().is_empty())
            .map(|l| {
                let f: Vec<f64> = l
                    .split('\t')
                    .map(|x| x.trim().parse().expect("built-in table is numeric"))
                    .collect();
                (f[0], f[1], f[2])
            })
            .collect()
    })
}

/// (eps HbO2, eps Hb) at `nm`, cm⁻¹/M; `None` outside 250–1000 nm.
pub fn extinction(nm: f64) -> Option<(f64, f64)> {
    let t = table();
    if !(MIN_NM..=MAX_NM).contains(&nm) {
        return None;
    }
    let i = t.partition_point(|r| r.0 <= nm).clamp(1, t.len() - 1);
    let (a, b) = (t[i - 1], t[i]);
    let w = (nm - a.0) / (b.0 - a.0);
    Some((a.1 + w * (b.1 - a.1), a.2 + w * (b.2 - a.2)))
}

/// Wavelengths (nm) in `[lo, hi]` where the two curves cross, by linear
/// interpolation between tabulated points.
pub fn isosbestic_points(lo: f64, hi: f64) -> Vec<f64> {
    let t = table();
    let mut out = Vec::new();
    for w in t.windows(2) {
        let (a, b) = (w[0], w[1]);
        if a.0 < lo || b.0 > hi {
            continue;
        }
        let (da, db) = (a.1 - a.2, b.1 - b.2);
        if da == 0.0 {
            out.push(a.0);
        } else if da * db < 0.0 {
            out.push(a.0 + (b.0 - a.0) * da / (da - db));
        }
    }
    out
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn interpolates_between_rows() {
        let (o, d) = extinction(501.0).unwrap();
        assert!((o - 0.5 * (20932.8 + 20596.4)).abs() < 1e-9);
        assert!((d - 0.5 * (20862.0 + 21832.8)).abs() < 1e-9);
        assert!(extinction(249.0).is_none() && extinction(1000.5).is_none());
        assert_eq!(
            extinction(1000.0).unwrap(),
            (table().last().unwrap().1, table().last().unwrap().2)
        );
    }
}
