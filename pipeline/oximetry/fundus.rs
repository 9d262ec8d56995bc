//! The fundus reflectance spectrum behind a vessel, read from the captures'
//! own background levels, to weight the bands with.
//!
//! A band's transmission is an average over wavelength, and the light that
//! reaches the camera over a vessel and beside it was reflected by the
//! fundus, so the fundus reflectance weights that average as much as the
//! band's response does. The fundus rises steeply between about 570 and
//! 610 nm (melanin and blood in the choroid; a fact of the trade), and
//! oxygenated blood's absorption falls steeply there too: a band near
//! 586 nm averaged over its response alone misses by 1–3 % in T, which is
//! enough to make the base model misfit where the optics are otherwise
//! what it assumes.
//!
//! With the bands' relative gains known (the instrument's `gain`, from a
//! white target), each band's background level over its gain is the
//! fundus reflectance averaged over that band, up to one common factor
//! that cancels in the weighting. The spectrum between the bands is a
//! natural cubic spline of its logarithm through the bands' mean
//! wavelengths, continued straight beyond the outermost ones (into those
//! bands' tails); its knots are then
//! corrected until the spline's band averages reproduce the measured ones
//! (a band's average of a curved spectrum is not its value at the band's
//! centre).

use super::bands::SampledBand;

/// A smooth spectrum `R(λ)` through measured band averages.
#[derive(Debug, Clone, PartialEq)]
pub struct FundusSpectrum {
    /// Knot wavelengths (nm, increasing) and `ln R` there.
    nm: Vec<f64>,
    ln_r: Vec<f64>,
    /// Second derivatives of the spline at the knots.
    m: Vec<f64>,
}

/// Corrections of the knots so that band averages match. On the
/// simulator's fundus through eight 8 nm bands the averages are off by
/// 5e-3 before any, 2e-5 after two and 7e-7 after four (the spectrum
/// itself stays within 0.7 % of the rendered one from 540 to 620 nm).
const KNOT_PASSES: usize = 4;

impl FundusSpectrum {
    /// The spectrum whose averages over `bands` are `levels` (any common
    /// scale). None with fewer than two bands, or a level that is not
    /// positive and finite.
    pub fn from_band_levels(bands: &[SampledBand], levels: &[f64]) -> Option<Self> {
        if bands.len() < 2
            || bands.len() != levels.len()
            || levels.iter().any(|v| !(v.is_finite() && *v > 0.0))
        {
            return None;
        }
        let mut order: Vec<usize> = (0..bands.len()).collect();
        let centre: Vec<f64> = bands.iter().map(|b| b.centroid_nm()).collect();
        order.sort_by(|a, b| centre[*a].total_cmp(&centre[*b]));
        // Bands at the same mean wavelength cannot both be knots.
        order.dedup_by(|a, b| (centre[*a] - centre[*b]).abs() < 0.5);
        if order.len() < 2 {
            return None;
        }
        let target: Vec<f64> = order.iter().map(|i| levels[*i].ln()).collect();
        let mut s = Self::through(order.iter().map(|i| centre[*i]).collect(), target.clone());
        for _ in 0..KNOT_PASSES {
            let ln_r: Vec<f64> = order
                .iter()
                .zip(&target)
                .zip(&s.ln_r)
                .map(|((i, t), y)| y + t - bands[*i].average(|l| s.at(l)).ln())
                .collect();
            s = Self::through(s.nm.clone(), ln_r);
        }
        Some(s)
    }

    /// The natural cubic spline through `(nm, ln_r)`.
    fn through(nm: Vec<f64>, ln_r: Vec<f64>) -> Self {
        let n = nm.len();
        let mut m = vec![0.0; n];
        if n > 2 {
            // Tridiagonal system for the inner second derivatives (Thomas).
            let h: Vec<f64> = nm.windows(2).map(|w| w[1] - w[0]).collect();
            let mut diag = vec![0.0; n];
            let mut rhs = vec![0.0; n];
            for i in 1..n - 1 {
                diag[i] = 2.0 * (h[i - 1] + h[i]);
                rhs[i] =
                    6.0 * ((ln_r[i + 1] - ln_r[i]) / h[i] - (ln_r[i] - ln_r[i - 1]) / h[i - 1]);
            }
            for i in 2..n - 1 {
                let f = h[i - 1] / diag[i - 1];
                diag[i] -= f * h[i - 1];
                rhs[i] -= f * rhs[i - 1];
            }
            for i in (1..n - 1).rev() {
                let next = if i + 1 < n - 1 { h[i] * m[i + 1] } else { 0.0 };
                m[i] = (rhs[i] - next) / diag[i];
            }
        }
        FundusSpectrum { nm, ln_r, m }
    }

    /// The slope of ln R at the outer end of the piece from knot `j` to
    /// `j + 1` (`j` 0: its left end; otherwise its right end).
    fn end_slope(&self, j: usize) -> f64 {
        let h = self.nm[j + 1] - self.nm[j];
        let chord = (self.ln_r[j + 1] - self.ln_r[j]) / h;
        if j == 0 {
            chord - h * (2.0 * self.m[0] + self.m[1]) / 6.0
        } else {
            chord + h * (self.m[j] + 2.0 * self.m[j + 1]) / 6.0
        }
    }

    /// `R(λ)` on the scale of the levels it was made from.
    pub fn at(&self, nm: f64) -> f64 {
        let n = self.nm.len();
        // Beyond the outermost knots, on into the outer bands' tails: the
        // natural spline's own continuation, a straight line in ln R.
        if nm <= self.nm[0] {
            return (self.ln_r[0] + self.end_slope(0) * (nm - self.nm[0])).exp();
        }
        if nm >= self.nm[n - 1] {
            return (self.ln_r[n - 1] + self.end_slope(n - 2) * (nm - self.nm[n - 1])).exp();
        }
        let j = self.nm.partition_point(|x| *x <= nm).clamp(1, n - 1);
        let (a, b) = (self.nm[j - 1], self.nm[j]);
        let h = b - a;
        let (u, v) = ((b - nm) / h, (nm - a) / h);
        let y = u * self.ln_r[j - 1]
            + v * self.ln_r[j]
            + ((u.powi(3) - u) * self.m[j - 1] + (v.powi(3) - v) * self.m[j]) * h * h / 6.0;
        y.exp()
    }
}

#[cfg(test)]
mod tests {
    use super::*;

    fn bands() -> Vec<SampledBand> {
        [506.0, 522.0, 548.0, 560.0, 570.0, 586.0, 600.0, 616.0]
            .iter()
            .map(|c| SampledBand::gaussian(*c, 8.0))
            .collect()
    }

    #[test]
    fn a_straight_log_spectrum_is_reproduced() {
        // A spectrum exponential in λ is a straight line in ln R, which a
        // natural spline and its straight continuation reproduce exactly.
        let r = |l: f64| (0.02 * (l - 560.0)).exp();
        let b = bands();
        let levels: Vec<f64> = b.iter().map(|x| x.average(r)).collect();
        let s = FundusSpectrum::from_band_levels(&b, &levels).unwrap();
        for l in [490.0, 515.0, 540.0, 577.0, 593.0, 608.0, 630.0] {
            let rel = s.at(l) / r(l) - 1.0;
            assert!(rel.abs() < 1e-6, "{l} nm: {rel:e}");
        }
    }

    #[test]
    fn band_averages_match_the_measured_levels() {
        // The simulator's fundus (`simulate::render::background_reflectance`
        // at grade 4), written out so that this module stands alone.
        let r = |l: f64| {
            (0.04 + 0.18 / (1.0 + (-(l - 590.0) / 18.0).exp())) * (-(550.0 / l).powi(4)).exp()
        };
        let b = bands();
        let levels: Vec<f64> = b.iter().map(|x| x.average(r)).collect();
        let s = FundusSpectrum::from_band_levels(&b, &levels).unwrap();
        for (x, want) in b.iter().zip(&levels) {
            let got = x.average(|l| s.at(l));
            assert!((got / want - 1.0).abs() < 2e-6, "{got} vs {want}");
        }
        // Between the bands the spline is not the sigmoid, but close.
        let worst = (540..=620)
            .map(|l| (s.at(l as f64) / r(l as f64) - 1.0).abs())
            .fold(0.0, f64::max);
        assert!(worst < 0.01, "{worst}");
    }

    #[test]
    fn unusable_levels_give_no_spectrum() {
        let b = bands();
        assert!(FundusSpectrum::from_band_levels(&b[..1], &[1.0]).is_none());
        let mut levels = vec![1.0; 8];
        levels[3] = 0.0;
        assert!(FundusSpectrum::from_band_levels(&b, &levels).is_none());
        levels[3] = f64::NAN;
        assert!(FundusSpectrum::from_band_levels(&b, &levels).is_none());
    }
}
