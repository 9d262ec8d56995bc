//! The least-squares engine against NIST StRD nonlinear regression
//! (certified values in tests/fixtures/nist-strd, source in SOURCE.md).
//! Accuracy is the log relative error, LRE = −log10(|b − b_cert| / |b_cert|),
//! over all parameters; StRD asks for about 6 digits from the higher-difficulty
//! problems.

use nalgebra::{DMatrix, DVector};
use satstep::fit::dense::{DenseProblem, covariance};
use satstep::fit::{Options, minimize};

struct Dataset {
    x: Vec<f64>,
    y: Vec<f64>,
    start1: Vec<f64>,
    start2: Vec<f64>,
    certified: Vec<f64>,
    certified_sd: Vec<f64>,
    rss: f64,
}

fn load(name: &str) -> Dataset {
    let dir = std::path::PathBuf::from(env!("CARGO_MANIFEST_DIR")).join("tests/fixtures/nist-strd");
    let text = std::fs::read_to_string(dir.join(format!("{name}.dat"))).unwrap();
    let lines: Vec<&str> = text.lines().collect();
    let data_at = lines
        .iter()
        .rposition(|l| l.trim_start().starts_with("Data:"))
        .unwrap();
    let (mut x, mut y) = (vec![], vec![]);
    for l in &lines[data_at + 1..] {
        let v: Vec<f64> = l
            .split_whitespace()
            .filter_map(|s| s.parse().ok())
            .collect();
        if v.len() == 2 {
            y.push(v[0]);
            x.push(v[1]);
        }
    }
    let cert = std::fs::read_to_string(dir.join("certified_values.tsv")).unwrap();
    let (mut s1, mut s2, mut c, mut sd) = (vec![], vec![], vec![], vec![]);
    for l in cert.lines().skip(1) {
        let f: Vec<&str> = l.split('\t').collect();
        if f[0] == name {
            s1.push(f[4].parse().unwrap());
            s2.push(f[5].parse().unwrap());
            c.push(f[6].parse().unwrap());
            sd.push(f[7].parse().unwrap());
        }
    }
    let summary = std::fs::read_to_string(dir.join("certified_summary.tsv")).unwrap();
    let rss = summary
        .lines()
        .map(|l| l.split('\t').collect::<Vec<_>>())
        .find(|f| f[0] == name)
        .unwrap()[5]
        .parse()
        .unwrap();
    Dataset {
        x,
        y,
        start1: s1,
        start2: s2,
        certified: c,
        certified_sd: sd,
        rss,
    }
}

/// Model value and gradient for each StRD problem (formulas from the .dat files).
fn model(name: &str, b: &[f64], x: f64) -> (f64, Vec<f64>) {
    match name {
        "Misra1a" | "BoxBOD" => {
            let e = (-b[1] * x).exp();
            (b[0] * (1.0 - e), vec![1.0 - e, b[0] * x * e])
        }
        "Thurber" => {
            let num = b[0] + b[1] * x + b[2] * x * x + b[3] * x.powi(3);
            let den = 1.0 + b[4] * x + b[5] * x * x + b[6] * x.powi(3);
            let f = num / den;
            (
                f,
                vec![
                    1.0 / den,
                    x / den,
                    x * x / den,
                    x.powi(3) / den,
                    -f * x / den,
                    -f * x * x / den,
                    -f * x.powi(3) / den,
                ],
            )
        }
        "MGH09" => {
            let num = x * x + x * b[1];
            let den = x * x + x * b[2] + b[3];
            let f = b[0] * num / den;
            (f, vec![num / den, b[0] * x / den, -f * x / den, -f / den])
        }
        "Lanczos3" => {
            let (e1, e2, e3) = ((-b[1] * x).exp(), (-b[3] * x).exp(), (-b[5] * x).exp());
            (
                b[0] * e1 + b[2] * e2 + b[4] * e3,
                vec![e1, -b[0] * x * e1, e2, -b[2] * x * e2, e3, -b[4] * x * e3],
            )
        }
        "Eckerle4" => {
            let u = (x - b[2]) / b[1];
            let e = (-0.5 * u * u).exp();
            let f = b[0] / b[1] * e;
            (
                f,
                vec![
                    e / b[1],
                    -b[0] / (b[1] * b[1]) * e + f * u * u / b[1],
                    f * u / b[1],
                ],
            )
        }
        "Rat43" => {
            let e = (b[1] - b[2] * x).exp();
            let base = 1.0 + e;
            let f = b[0] / base.powf(1.0 / b[3]);
            (
                f,
                vec![
                    f / b[0],
                    -f / b[3] * e / base,
                    f / b[3] * x * e / base,
                    f * base.ln() / (b[3] * b[3]),
                ],
            )
        }
        "Bennett5" => {
            let base = b[1] + x;
            let f = b[0] * base.powf(-1.0 / b[2]);
            (
                f,
                vec![f / b[0], -f / (b[2] * base), f * base.ln() / (b[2] * b[2])],
            )
        }
        _ => unreachable!(),
    }
}

/// Fits `name` from a start vector; returns (LRE of parameters, LRE of SDs, LRE of RSS, termination).
fn fit(name: &str, start: &[f64]) -> (f64, f64, f64, String) {
    let d = load(name);
    let n = start.len();
    let f = |b: &[f64], r: &mut DVector<f64>, j: Option<&mut DMatrix<f64>>| {
        let mut j = j;
        for i in 0..d.x.len() {
            let (v, g) = model(name, b, d.x[i]);
            r[i] = v - d.y[i];
            if let Some(j) = j.as_deref_mut() {
                for k in 0..n {
                    j[(i, k)] = g[k];
                }
            }
        }
        true
    };
    let p = DenseProblem::new(n, d.x.len(), &f);
    let opt = Options {
        max_iterations: 5000,
        ..Options::default()
    };
    let rep = minimize(&p, start, &opt);
    let lre = |v: f64, c: f64| -(((v - c).abs() / c.abs()).max(1e-16)).log10();
    let lre_b = (0..n)
        .map(|k| lre(rep.x[k], d.certified[k]))
        .fold(f64::INFINITY, f64::min);
    let Some((r, j)) = p.evaluate(&rep.x) else {
        return (lre_b, 0.0, 0.0, rep.termination.as_str().to_string());
    };
    let lre_sd = match covariance(&j, &r) {
        Some(cov) => (0..n)
            .map(|k| lre(cov[(k, k)].sqrt(), d.certified_sd[k]))
            .fold(f64::INFINITY, f64::min),
        None => 0.0,
    };
    let lre_rss = lre(r.norm_squared(), d.rss);
    (lre_b, lre_sd, lre_rss, rep.termination.as_str().to_string())
}

const PROBLEMS: [&str; 8] = [
    "Misra1a", "Thurber", "MGH09", "Lanczos3", "BoxBOD", "Eckerle4", "Rat43", "Bennett5",
];

#[test]
fn certified_values_from_start_2() {
    for name in PROBLEMS {
        let d = load(name);
        let (b, sd, rss, why) = fit(name, &d.start2);
        assert!(
            b >= 6.0,
            "{name} from start 2: parameter LRE {b:.2} ({why})"
        );
        assert!(sd >= 4.0, "{name} from start 2: SD LRE {sd:.2}");
        assert!(rss >= 6.0, "{name} from start 2: RSS LRE {rss:.2}");
    }
}

/// From start 1, far from the solution. Problems that this fitter does not
/// solve from start 1 are listed with the reason; the rest must reach 6 digits.
#[test]
fn certified_values_from_start_1() {
    // BoxBOD from start 1 (b2 = 1): the first Gauss–Newton step sends b2 to
    // about 68, where exp(−b2·x) vanishes for every x; the model is then the
    // constant b1 (sum of squares 9771.5) with no gradient left in b2, a
    // plateau that undamped and damped Gauss–Newton methods alike stop on.
    let known_failures: &[&str] = &["BoxBOD"];
    for name in PROBLEMS {
        let d = load(name);
        let (b, _, _, why) = fit(name, &d.start1);
        eprintln!("{name} from start 1: LRE {b:.2} ({why})");
        if known_failures.contains(&name) {
            eprintln!("{name} from start 1: LRE {b:.2} ({why}) — listed as not reached");
            continue;
        }
        assert!(
            b >= 6.0,
            "{name} from start 1: parameter LRE {b:.2} ({why})"
        );
    }
}
