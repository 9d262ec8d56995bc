//! The mixed-model layer against lme4 1.1-31 / lmerTest 3.1-3 (R 4.2.2), whose
//! full output is in tests/fixtures/mixed-models/lmm_reference.out (sources in
//! SOURCE.md). Tolerances (relative): estimates 1e-6, standard errors and
//! variance components 1e-4 (two correct optimisers agree to about that),
//! Satterthwaite df 1e-3 (lmerTest's are numerical), REML criterion 1e-6.

use std::path::PathBuf;

use satstep::config::csvfile::read_csv;
use satstep::config::diag::Findings;
use satstep::stats::design::{Design, RandomSpec, Spec, build};
use satstep::stats::infer::{contrast, f_test};
use satstep::stats::lmm::{Criterion, Fit, Model};

fn design(file: &str, response: &str, fixed: &[&str], random: &[&str]) -> Design {
    let p = PathBuf::from(env!("CARGO_MANIFEST_DIR"))
        .join("tests/fixtures/mixed-models")
        .join(file);
    let mut f = Findings::new();
    let t = read_csv(&p, &mut f).unwrap();
    let spec = Spec {
        response: response.into(),
        fixed: fixed.iter().map(|s| s.to_string()).collect(),
        random: random
            .iter()
            .map(|r| RandomSpec::parse(r).unwrap())
            .collect(),
        reference: vec![],
    };
    build(&t, &p, &spec, &mut f).unwrap()
}

fn close(what: &str, got: f64, want: f64, rel: f64) {
    assert!(
        ((got - want) / want).abs() <= rel,
        "{what}: got {got}, lme4/lmerTest {want} (relative tolerance {rel})"
    );
}

struct Expected<'a> {
    est: &'a [f64],
    se: &'a [f64],
    df: &'a [f64],
    /// Variances in the order of the model's terms and columns, then the residual.
    vc: &'a [f64],
    criterion: f64,
}

fn check(model: &Model, fit: &Fit, e: &Expected) {
    assert!(fit.converged);
    close("REML criterion", fit.deviance, e.criterion, 1e-6);
    let p = fit.beta.len();
    for k in 0..p {
        let mut l = vec![0.0; p];
        l[k] = 1.0;
        let t = contrast(model, fit, "", &l);
        close(&format!("estimate {k}"), t.estimate, e.est[k], 1e-6);
        close(&format!("SE {k}"), t.std_error, e.se[k], 1e-4);
        close(&format!("df {k}"), t.df, e.df[k], 1e-3);
    }
    let comps = model.components(fit);
    let mut got: Vec<f64> = comps
        .terms
        .iter()
        .flat_map(|(_, cols, cov)| (0..cols.len()).map(move |i| cov[(i, i)]))
        .collect();
    got.push(comps.residual);
    assert_eq!(got.len(), e.vc.len());
    for (i, (g, w)) in got.iter().zip(e.vc).enumerate() {
        close(&format!("variance component {i}"), *g, *w, 1e-4);
    }
}

// Also Bates et al. (2015), J Stat Softw 67(1): 251.405 (6.825), 10.467 (1.546),
// subject SDs 24.741 and 5.922, residual SD 25.592, REML criterion 1743.6; and the
// lmerTest 3.1-3 documentation (contest1D): df 16.99998, t 6.771481, p 3.263824e-06.
#[test]
fn sleepstudy_random_slopes() {
    let d = design("sleepstudy.csv", "Reaction", &["Days"], &["Subject@Days"]);
    let m = Model::new(d.data, Criterion::Reml);
    let fit = m.fit().unwrap();
    check(
        &m,
        &fit,
        &Expected {
            est: &[251.405104848, 10.4672859596],
            se: &[6.82459669495, 1.54578964391],
            df: &[16.9997262885, 16.9999837256],
            vc: &[612.100158025, 35.0717144509, 654.94000826],
            criterion: 1743.62827196,
        },
    );
    let c = m.components(&fit);
    let cov = &c.terms[0].2;
    close(
        "slope-intercept covariance",
        cov[(1, 0)],
        9.60440895116,
        1e-3,
    );
    let t = contrast(&m, &fit, "Days", &[0.0, 1.0]);
    close("t", t.t, 6.771481489, 1e-4);
    close("p", t.p, 3.26382446993e-06, 1e-3);
}

#[test]
fn sleepstudy_random_intercepts() {
    let d = design("sleepstudy.csv", "Reaction", &["Days"], &["Subject"]);
    let m = Model::new(d.data, Criterion::Reml);
    let fit = m.fit().unwrap();
    check(
        &m,
        &fit,
        &Expected {
            est: &[251.405104848, 10.4672859596],
            se: &[9.74671626921, 0.804221428945],
            df: &[22.8101989553, 161.000000055],
            vc: &[1378.17851381, 960.45657856],
            criterion: 1786.46508539,
        },
    );
}

#[test]
fn sleepstudy_ml_likelihood_ratio() {
    let slope = Model::new(
        design("sleepstudy.csv", "Reaction", &["Days"], &["Subject@Days"]).data,
        Criterion::Ml,
    );
    let icpt = Model::new(
        design("sleepstudy.csv", "Reaction", &["Days"], &["Subject"]).data,
        Criterion::Ml,
    );
    let (a, b) = (slope.fit().unwrap(), icpt.fit().unwrap());
    close("ML deviance, slope model", a.deviance, 1751.93934449, 1e-6);
    close(
        "ML deviance, intercept model",
        b.deviance,
        1794.07864301,
        1e-6,
    );
    close("LRT chi-square", b.deviance - a.deviance, 42.139, 1e-4);
}

#[test]
// Degrees of freedom compared here are exact by construction.
#[allow(clippy::float_cmp)]
fn simulated_nested_balanced() {
    let d = design(
        "sim_nested_balanced.csv",
        "so2",
        &["epoch"],
        &["subject", "subject:eye"],
    );
    let l = d.contrast("hypoxia - recovery").unwrap();
    let m = Model::new(d.data, Criterion::Reml);
    let fit = m.fit().unwrap();
    check(
        &m,
        &fit,
        &Expected {
            est: &[96.7220216667, -7.99831, -1.020045],
            se: &[1.27288136929, 0.46532938308, 0.46532938308],
            df: &[9.85762411448, 157.99996644, 157.999966444],
            vc: &[13.7925340742, 2.65415710971, 6.49594304274],
            criterion: 895.041897629,
        },
    );
    let c = contrast(&m, &fit, "hypoxia - recovery", &l);
    close("contrast", c.estimate, -6.978265, 1e-6);
    close("contrast SE", c.std_error, 0.46532938308, 1e-4);
    close("contrast df", c.df, 157.999966425, 1e-3);
    close("contrast lower", c.lower, -7.89733337723, 1e-4);
    close("contrast upper", c.upper, -6.05919662277, 1e-4);
    let lm = nalgebra::DMatrix::from_row_slice(2, 3, &[0.0, 1.0, 0.0, 0.0, 0.0, 1.0]);
    let (f, ndf, ddf, _) = f_test(&m, &fit, &lm);
    close("F", f, 175.04716, 1e-4);
    assert_eq!(ndf, 2.0);
    close("F denominator df", ddf, 157.999966436, 1e-3);
}

#[test]
fn simulated_nested_unbalanced() {
    let d = design(
        "sim_nested_unbalanced.csv",
        "so2",
        &["epoch"],
        &["subject", "subject:eye"],
    );
    let m = Model::new(d.data, Criterion::Reml);
    let fit = m.fit().unwrap();
    check(
        &m,
        &fit,
        &Expected {
            est: &[96.993378753, -8.24780764862, -0.901404334086],
            se: &[1.3039723114, 0.477181980519, 0.487085778071],
            df: &[9.76541604955, 133.623739791, 134.372448915],
            vc: &[14.5998932136, 2.64108219441, 5.99328706693],
            criterion: 763.708654533,
        },
    );
}
