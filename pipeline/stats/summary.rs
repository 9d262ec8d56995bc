//! The two summaries every table needs, computed one way everywhere so that
//! the same values give the same bits in every table.

/// Arithmetic mean; NaN for no values.
pub fn mean(v: &[f64]) -> f64 {
    v.iter().sum::<f64>() / v.len() as f64
}

/// Sample standard deviation (n − 1 in the denominator); NaN for fewer than
/// two values.
pub fn sd(v: &[f64]) -> f64 {
    if v.len() < 2 {
        return f64::NAN;
    }
    let m = mean(v);
    (v.iter().map(|x| (x - m).powi(2)).sum::<f64>() / (v.len() - 1) as f64).sqrt()
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn mean_and_sd_of_a_worked_example() {
        // 2, 4, 4, 4, 5, 5, 7, 9: mean 5, sample variance 32/7.
        let v = [2.0, 4.0, 4.0, 4.0, 5.0, 5.0, 7.0, 9.0];
        assert!((mean(&v) - 5.0).abs() < 1e-15);
        assert!((sd(&v) - (32.0f64 / 7.0).sqrt()).abs() < 1e-15);
        assert!(mean(&[]).is_nan() && sd(&[1.0]).is_nan());
    }
}
