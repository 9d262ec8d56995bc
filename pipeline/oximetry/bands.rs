//! Spectral band responses and band-integrated quantities. A band is never
//! reduced to its centre wavelength: every band quantity is an average over
//! the band's response on a 1 nm grid (the hemoglobin table has 2 nm steps).

use crate::config::study::BandResponse;

/// Grid step for band integration, nm.
pub(crate) const GRID_NM: f64 = 1.0;

/// A band sampled on the integration grid: (wavelength nm, weight), weights summing to 1.
#[derive(Debug, Clone, PartialEq)]
pub struct SampledBand {
    pub samples: Vec<(f64, f64)>,
}

impl SampledBand {
    /// Gaussian response from centre and full width at half maximum, cut at
    /// ±2.5 FWHM (where the response is below 1e-7 of its peak) and at the
    /// 250–1000 nm range of the hemoglobin table. Grid points are whole nm.
    pub fn gaussian(centre_nm: f64, fwhm_nm: f64) -> Self {
        let sigma = fwhm_nm / (2.0 * (2.0 * std::f64::consts::LN_2).sqrt());
        let (lo, hi) = (
            (centre_nm - 2.5 * fwhm_nm).floor().max(250.0),
            (centre_nm + 2.5 * fwhm_nm).ceil().min(1000.0),
        );
        let n = ((hi - lo) / GRID_NM).floor() as usize;
        let raw: Vec<(f64, f64)> = (0..=n)
            .map(|i| {
                let l = lo + i as f64 * GRID_NM;
                (l, (-0.5 * ((l - centre_nm) / sigma).powi(2)).exp())
            })
            .collect();
        Self::normalised(raw)
    }

    /// Tabulated response, resampled linearly onto the grid.
    pub fn tabulated(points: &[(f64, f64)]) -> Self {
        let lo = points.first().map(|p| p.0).unwrap_or(250.0).max(250.0);
        let hi = points.last().map(|p| p.0).unwrap_or(250.0).min(1000.0);
        let n = ((hi - lo) / GRID_NM).floor() as usize;
        let raw = (0..=n)
            .map(|i| {
                let l = lo + i as f64 * GRID_NM;
                let j = points
                    .partition_point(|p| p.0 <= l)
                    .clamp(1, points.len() - 1);
                let (a, b) = (points[j - 1], points[j]);
                let w = ((l - a.0) / (b.0 - a.0)).clamp(0.0, 1.0);
                (l, a.1 + w * (b.1 - a.1))
            })
            .collect();
        Self::normalised(raw)
    }

    pub fn from_response(r: &BandResponse) -> Self {
        match r {
            BandResponse::Gaussian { centre_nm, fwhm_nm } => Self::gaussian(*centre_nm, *fwhm_nm),
            BandResponse::Table { points, .. } => Self::tabulated(points),
        }
    }

    fn normalised(raw: Vec<(f64, f64)>) -> Self {
        let sum: f64 = raw.iter().map(|p| p.1).sum();
        SampledBand {
            samples: raw
                .into_iter()
                .filter(|p| p.1 > 0.0)
                .map(|(l, w)| (l, w / sum))
                .collect(),
        }
    }

    /// Response-weighted mean of `f(λ)`.
    pub fn average(&self, f: impl Fn(f64) -> f64) -> f64 {
        self.samples.iter().map(|(l, w)| w * f(*l)).sum()
    }

    pub fn centroid_nm(&self) -> f64 {
        self.average(|l| l)
    }
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn gaussian_is_normalised_and_centred() {
        let b = SampledBand::gaussian(570.0, 10.0);
        let s: f64 = b.samples.iter().map(|p| p.1).sum();
        assert!((s - 1.0).abs() < 1e-12);
        assert!((b.centroid_nm() - 570.0).abs() < 1e-9);
        // Second moment of a Gaussian: sigma² = (FWHM / 2.3548)².
        let var = b.average(|l| (l - 570.0).powi(2));
        assert!(
            (var.sqrt() - 10.0 / 2.354_820_045).abs() < 0.01,
            "{}",
            var.sqrt()
        );
    }

    #[test]
    fn a_nonlinear_function_differs_from_its_value_at_the_centre() {
        // exp(−x) is convex: the band average exceeds the value at the centre.
        let b = SampledBand::gaussian(560.0, 20.0);
        let f = |l: f64| (-(l - 560.0).powi(2) / 50.0).exp();
        assert!(b.average(f) < f(560.0));
    }

    #[test]
    fn tabulated_box_response_averages_over_its_support() {
        let b = SampledBand::tabulated(&[(595.0, 0.0), (596.0, 1.0), (604.0, 1.0), (605.0, 0.0)]);
        assert!((b.centroid_nm() - 600.0).abs() < 1e-9);
    }
}
