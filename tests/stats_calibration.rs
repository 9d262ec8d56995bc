//! Calibration of the mixed-model tests by simulation: over studies with no
//! epoch effect the contrast test rejects at α = 0.05 about 5 % of the time,
//! and over studies with an effect the 95 % interval covers the true
//! contrast about 95 % of the time. 2 000 studies each (the binomial SE of a
//! 5 % rate is then 0.5 points, so the 3.5–6.5 % band is ±3 SE).

use rand::SeedableRng;
use rand_distr::{Distribution, Normal};
use rayon::prelude::*;
use satstep::stats::infer::contrast;
use satstep::stats::lmm::{Criterion, LmmData, Model, RandomTerm};

/// 8 subjects × 2 eyes × 3 epochs × 2 captures; SDs 3 (subject), 1.5 (eye), 2.5 (residual).
fn study(seed: u64, effect: f64) -> LmmData {
    let mut rng = rand_chacha::ChaCha8Rng::seed_from_u64(seed);
    let (ns, ne, np, nr) = (8, 2, 3, 2);
    let (mut y, mut xrows, mut gs, mut ge) = (vec![], vec![], vec![], vec![]);
    let (ds, de, dr) = (Normal::new(0.0, 3.0).unwrap(), Normal::new(0.0, 1.5).unwrap(), Normal::new(0.0, 2.5).unwrap());
    for s in 0..ns {
        let us = ds.sample(&mut rng);
        for e in 0..ne {
            let ue = de.sample(&mut rng);
            for p in 0..np {
                for _ in 0..nr {
                    let eff = if p == 1 { effect } else { 0.0 };
                    y.push(95.0 + eff + us + ue + dr.sample(&mut rng));
                    xrows.push([1.0, (p == 1) as u8 as f64, (p == 2) as u8 as f64]);
                    gs.push(s);
                    ge.push(s * ne + e);
                }
            }
        }
    }
    let n = y.len();
    let x = nalgebra::DMatrix::from_fn(n, 3, |i, j| xrows[i][j]);
    let term = |name: &str, levels: usize, group: Vec<usize>| RandomTerm {
        name: name.into(),
        levels: (0..levels).map(|l| l.to_string()).collect(),
        group,
        column_names: vec!["(Intercept)".into()],
        columns: vec![vec![1.0; n]],
    };
    LmmData { y, x, x_names: vec!["(Intercept)".into(), "low".into(), "recovery".into()], terms: vec![term("subject", ns, gs), term("subject:eye", ns * ne, ge)] }
}

#[test]
fn null_rejection_rate_and_interval_coverage() {
    let runs = 2000u64;
    let l = [0.0, 1.0, 0.0];
    let null_rejects = (0..runs)
        .into_par_iter()
        .filter(|s| {
            let m = Model::new(study(*s, 0.0), Criterion::Reml);
            let f = m.fit().unwrap();
            contrast(&m, &f, "low - air", &l).p < 0.05
        })
        .count();
    let covered = (0..runs)
        .into_par_iter()
        .filter(|s| {
            let m = Model::new(study(100_000 + *s, -7.0), Criterion::Reml);
            let f = m.fit().unwrap();
            let c = contrast(&m, &f, "low - air", &l);
            c.lower <= -7.0 && -7.0 <= c.upper
        })
        .count();
    let (rate, cov) = (null_rejects as f64 / runs as f64, covered as f64 / runs as f64);
    eprintln!("rejection under the null {:.2} %, coverage {:.2} %", rate * 100.0, cov * 100.0);
    assert!((0.035..=0.065).contains(&rate), "{rate}");
    assert!((0.93..=0.97).contains(&cov), "{cov}");
}
