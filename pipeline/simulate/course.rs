//! A subject's blood oxygen through a session, second by second.
//!
//! FiO2 steps at the (actual) switch times. The alveolar gas equation gives
//! PAO2 from FiO2, the barometric pressure (ISO 2533 at the site's
//! altitude) and PaCO2, which falls under hypoxia as ventilation rises.
//! PaO2 = PAO2 − A–a gradient; the target SaO2 follows from the Severinghaus
//! curve and arterial saturation approaches it with a first-order time
//! constant of minutes. Venous saturation follows from an O2-content
//! balance: a fixed extraction, reduced under hyperoxia because the choroid
//! then supplies more of the inner retina's oxygen (a modelling choice for
//! the simulator, sized so that 100 % O2 raises venules by about 20 points).

use crate::physiology::{AIR_O2_FRACTION, alveolar_po2_mmhg, severinghaus_saturation};

/// Physiological parameters of one simulated subject.
#[derive(Debug, Clone, serde::Serialize)]
pub struct SubjectPhysiology {
    pub paco2_air_mmhg: f64,
    /// PaCO2 fall (mmHg) per 0.06 drop of FiO2 below air.
    pub ventilatory_gain_mmhg: f64,
    pub a_a_gradient_mmhg: f64,
    pub time_constant_s: f64,
    /// Fraction of arterial O2 content extracted on air.
    pub extraction: f64,
    pub hb_g_per_l: f64,
    /// Retinal arterioles read this many points below SaO2.
    pub arteriole_offset: f64,
}

/// Saturation time courses at 1 Hz, index 0 at `t0_s` from the session start.
pub struct Course {
    pub t0_s: f64,
    pub sao2: Vec<f64>,
    pub svo2: Vec<f64>,
    pub pao2: Vec<f64>,
}

impl Course {
    fn at(v: &[f64], t0: f64, t: f64) -> f64 {
        let x = (t - t0).max(0.0);
        let i = (x.floor() as usize).min(v.len() - 2);
        let w = (x - i as f64).min(1.0);
        v[i] * (1.0 - w) + v[i + 1] * w
    }
    pub fn sao2_at(&self, t: f64) -> f64 {
        Self::at(&self.sao2, self.t0_s, t)
    }
    pub fn svo2_at(&self, t: f64) -> f64 {
        Self::at(&self.svo2, self.t0_s, t)
    }
}

/// Steady-state PaO2 and SaO2 at `fio2`.
pub(crate) fn steady_state(p: &SubjectPhysiology, fio2: f64, pb_mmhg: f64) -> (f64, f64) {
    let drop = ((AIR_O2_FRACTION - fio2) / 0.06).max(0.0);
    let paco2 = p.paco2_air_mmhg - p.ventilatory_gain_mmhg * drop.min(2.5);
    let pao2 = (alveolar_po2_mmhg(fio2, pb_mmhg, paco2, 0.8) - p.a_a_gradient_mmhg).max(15.0);
    (pao2, severinghaus_saturation(pao2))
}

/// Venous saturation from arterial saturation and PaO2.
pub(crate) fn venous(p: &SubjectPhysiology, sao2: f64, pao2: f64) -> f64 {
    let cap = 1.34 * p.hb_g_per_l / 10.0; // mL O2 per dL per unit saturation
    let ca = cap * sao2 + 0.003 * pao2;
    let hyper = ((pao2 - 100.0) / 500.0).clamp(0.0, 1.0);
    let extracted = p.extraction * cap * 0.975 * (1.0 - 0.4 * hyper);
    ((ca - extracted - 0.003 * 40.0) / cap).clamp(0.0, 1.0)
}

/// Integrates the course from `t0_s` to `t1_s` with FiO2 given per second.
pub fn simulate(
    p: &SubjectPhysiology,
    fio2_at: impl Fn(f64) -> f64,
    pb_mmhg: f64,
    t0_s: f64,
    t1_s: f64,
) -> Course {
    let n = ((t1_s - t0_s).ceil() as usize).max(2) + 1;
    let (mut pao2, mut sao2) = steady_state(p, fio2_at(t0_s), pb_mmhg);
    let a = 1.0 - (-1.0 / p.time_constant_s).exp();
    let mut c = Course {
        t0_s,
        sao2: Vec::with_capacity(n),
        svo2: Vec::with_capacity(n),
        pao2: Vec::with_capacity(n),
    };
    for i in 0..n {
        let t = t0_s + i as f64;
        let (pt, st) = steady_state(p, fio2_at(t), pb_mmhg);
        sao2 += a * (st - sao2);
        pao2 += a * (pt - pao2);
        c.sao2.push(sao2);
        c.pao2.push(pao2);
        c.svo2.push(venous(p, sao2, pao2));
    }
    c
}

#[cfg(test)]
mod tests {
    use super::*;

    fn typical() -> SubjectPhysiology {
        SubjectPhysiology {
            paco2_air_mmhg: 40.0,
            ventilatory_gain_mmhg: 4.0,
            a_a_gradient_mmhg: 6.0,
            time_constant_s: 100.0,
            extraction: 0.34,
            hb_g_per_l: 145.0,
            arteriole_offset: 1.0,
        }
    }

    // Published breathing-challenge studies report SpO2 at FiO2 0.15 at sea
    // level in the high 80s to low 90s (common practice, no single source).
    #[test]
    fn fio2_015_lands_in_the_high_80s_to_low_90s() {
        let (_, s) = steady_state(&typical(), 0.15, 760.0);
        assert!((0.87..=0.92).contains(&s), "{s}");
        let (_, s_air) = steady_state(&typical(), 0.21, 760.0);
        assert!((0.96..=0.985).contains(&s_air), "{s_air}");
    }

    #[test]
    fn venules_near_60_on_air_and_about_20_points_higher_on_oxygen() {
        let p = typical();
        let (pa, sa) = steady_state(&p, 0.21, 760.0);
        let (po, so) = steady_state(&p, 1.0, 760.0);
        let v_air = venous(&p, sa, pa);
        let v_o2 = venous(&p, so, po);
        assert!((0.55..=0.68).contains(&v_air), "{v_air}");
        assert!((0.14..=0.28).contains(&(v_o2 - v_air)), "{}", v_o2 - v_air);
    }

    #[test]
    fn first_order_equilibration_reaches_90_percent_in_about_2_3_time_constants() {
        let p = typical();
        let c = simulate(
            &p,
            |t| if t < 0.0 { 0.21 } else { 0.15 },
            760.0,
            -60.0,
            900.0,
        );
        let (s0, s1) = (c.sao2_at(-1.0), c.sao2_at(900.0));
        let target = s0 + 0.9 * (s1 - s0);
        let t90 = (0..900)
            .map(|t| t as f64)
            .find(|t| c.sao2_at(*t) <= target)
            .unwrap();
        assert!((200.0..=260.0).contains(&t90), "{t90}");
    }
}
