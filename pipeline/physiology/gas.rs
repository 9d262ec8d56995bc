//! Gas laws and the dissociation curve.
//!
//! - ISO 2533:1975 standard atmosphere, troposphere (0–11 km):
//!   `p = 101325 · (1 − 2.25577e-5 · h)^5.25588` Pa.
//! - Alveolar gas equation (simplified form):
//!   `PAO2 = FiO2 · (PB − PH2O) − PaCO2 / R`, PH2O = 47 mmHg at 37 °C.
//! - Severinghaus J. W. (1979), "Simple, accurate equations for human blood
//!   O2 dissociation computations", J Appl Physiol 46:599–602:
//!   `S = 1 / (23400 / (PO2³ + 150 · PO2) + 1)`.
//!
//! An altitude is made equivalent to an O2 fraction at sea level by equal
//! inspired PO2: `FiO2_eq = 0.21 · (PB(h) − 47) / (760 − 47)`. Room air is
//! taken as FiO2 0.21, as the trade writes it (dry air is 0.2095).

/// Room air, as protocols write it.
pub const AIR_O2_FRACTION: f64 = 0.21;
/// Saturated water vapour pressure at 37 °C.
pub const WATER_VAPOUR_MMHG: f64 = 47.0;
/// Standard sea-level pressure, 101 325 Pa.
pub const SEA_LEVEL_MMHG: f64 = 760.0;
/// 1 Pa in mmHg (1 mmHg = 133.322 387 Pa).
pub const MMHG_PER_PA: f64 = 1.0 / 133.322_387;

const ISO_LAPSE: f64 = 2.25577e-5;
const ISO_EXPONENT: f64 = 5.25588;

/// Barometric pressure in mmHg at geopotential altitude `h_m` (ISO 2533, valid to 11 km).
pub fn pressure_at_altitude_mmhg(h_m: f64) -> f64 {
    101_325.0 * (1.0 - ISO_LAPSE * h_m).powf(ISO_EXPONENT) * MMHG_PER_PA
}

/// Inverse of [`pressure_at_altitude_mmhg`].
pub fn altitude_for_pressure_m(p_mmhg: f64) -> f64 {
    (1.0 - (p_mmhg / MMHG_PER_PA / 101_325.0).powf(1.0 / ISO_EXPONENT)) / ISO_LAPSE
}

/// Alveolar PO2 in mmHg.
pub fn alveolar_po2_mmhg(
    fio2: f64,
    pb_mmhg: f64,
    paco2_mmhg: f64,
    respiratory_quotient: f64,
) -> f64 {
    fio2 * (pb_mmhg - WATER_VAPOUR_MMHG) - paco2_mmhg / respiratory_quotient
}

/// Sea-level O2 fraction with the same inspired PO2 as air at `h_m`.
pub fn equivalent_o2_fraction(h_m: f64) -> f64 {
    AIR_O2_FRACTION * (pressure_at_altitude_mmhg(h_m) - WATER_VAPOUR_MMHG)
        / (SEA_LEVEL_MMHG - WATER_VAPOUR_MMHG)
}

/// Altitude at which air gives the inspired PO2 of `fio2` at sea level;
/// `None` for hyperoxic mixtures, which no altitude matches.
pub fn equivalent_altitude_m(fio2: f64) -> Option<f64> {
    if fio2 > AIR_O2_FRACTION + 1e-12 {
        return None;
    }
    let pb = fio2 / AIR_O2_FRACTION * (SEA_LEVEL_MMHG - WATER_VAPOUR_MMHG) + WATER_VAPOUR_MMHG;
    Some(altitude_for_pressure_m(pb).max(0.0))
}

/// Haemoglobin O2 saturation (0–1) at `po2_mmhg` (Severinghaus 1979).
pub fn severinghaus_saturation(po2_mmhg: f64) -> f64 {
    let p = po2_mmhg.max(0.0);
    1.0 / (23_400.0 / (p * p * p + 150.0 * p) + 1.0)
}

#[cfg(test)]
mod tests {
    use super::*;
    use approx::assert_abs_diff_eq;

    // Worked example of the alveolar gas equation (any respiratory physiology
    // text): FiO2 0.21, PB 760 mmHg, PaCO2 40 mmHg, R 0.8 → 99.73 mmHg.
    #[test]
    fn alveolar_gas_equation_worked_example() {
        assert_abs_diff_eq!(
            alveolar_po2_mmhg(0.21, 760.0, 40.0, 0.8),
            99.73,
            epsilon = 0.005
        );
    }

    // Severinghaus (1979) curve: S(40) ≈ 0.749, S(100) ≈ 0.977, P50 ≈ 26.9 mmHg
    // (values as quoted in the paper's tables, to three digits).
    #[test]
    fn severinghaus_reference_points() {
        assert_abs_diff_eq!(severinghaus_saturation(40.0), 0.749, epsilon = 0.0006);
        assert_abs_diff_eq!(severinghaus_saturation(100.0), 0.977, epsilon = 0.0006);
        // P50 by bisection
        let (mut lo, mut hi) = (10.0, 50.0);
        for _ in 0..60 {
            let mid = 0.5 * (lo + hi);
            if severinghaus_saturation(mid) < 0.5 {
                lo = mid
            } else {
                hi = mid
            }
        }
        assert_abs_diff_eq!(lo, 26.9, epsilon = 0.06);
    }

    // ISO 2533 standard atmosphere: 3000 m → 70 121 Pa ≈ 525.9 mmHg.
    #[test]
    fn iso_2533_at_3000_m() {
        assert_abs_diff_eq!(pressure_at_altitude_mmhg(3000.0), 525.9, epsilon = 0.1);
        assert_abs_diff_eq!(pressure_at_altitude_mmhg(0.0), 760.0, epsilon = 0.01);
        assert_abs_diff_eq!(
            altitude_for_pressure_m(pressure_at_altitude_mmhg(2500.0)),
            2500.0,
            epsilon = 1e-6
        );
    }

    #[test]
    fn equivalences_invert_each_other() {
        for h in [0.0, 1000.0, 2500.0, 4500.0] {
            let f = equivalent_o2_fraction(h);
            assert_abs_diff_eq!(equivalent_altitude_m(f).unwrap(), h, epsilon = 1e-6);
        }
        assert!(equivalent_altitude_m(1.0).is_none());
        // FiO2 0.15 is commonly quoted as about 2 700 m of altitude (common
        // practice, no single source).
        let h = equivalent_altitude_m(0.15).unwrap();
        assert!((2500.0..2900.0).contains(&h), "{h}");
    }
}
