//! REML fit time for 10 000 observations with three nested grouping factors
//! (subject, subject:eye, subject:eye:vessel), and the same data fitted by
//! lme4 when R is installed. Run with `cargo bench --bench mixed`.

// A benchmark reports on stdout.
#![allow(clippy::print_stdout)]

use std::process::Command;
use std::time::Instant;

use rand::SeedableRng;
use rand_distr::{Distribution, Normal};
use satstep::config::csvfile::read_csv;
use satstep::config::diag::Findings;
use satstep::stats::design::{RandomSpec, Spec, build};
use satstep::stats::lmm::{Criterion, Model};

fn main() {
    let mut rng = rand_chacha::ChaCha8Rng::seed_from_u64(2026);
    let n = |s: f64| Normal::new(0.0, s).unwrap();
    let mut csv = String::from("subject,eye,vessel,epoch,so2\n");
    let mut rows = 0;
    for s in 0..20 {
        let us = n(3.0).sample(&mut rng);
        for eye in ["OD", "OS"] {
            let ue = n(1.5).sample(&mut rng);
            for v in 0..10 {
                let uv = n(2.0).sample(&mut rng);
                for (e, eff) in [
                    ("air", 0.0),
                    ("low", -7.0),
                    ("recovery", -1.0),
                    ("air2", 0.0),
                    ("low2", -7.5),
                ] {
                    for _ in 0..5 {
                        let y = 95.0 + eff + us + ue + uv + n(2.5).sample(&mut rng);
                        csv.push_str(&format!("S{s:02},{eye},V{v},{e},{y:.4}\n"));
                        rows += 1;
                    }
                }
            }
        }
    }
    let dir = tempfile::tempdir().unwrap();
    let path = dir.path().join("data.csv");
    std::fs::write(&path, &csv).unwrap();
    println!(
        "mixed-model benchmark: {rows} observations, groups subject (20), subject:eye (40), subject:eye:vessel (400)"
    );
    let mut f = Findings::new();
    let t = read_csv(&path, &mut f).unwrap();
    let spec = Spec {
        response: "so2".into(),
        fixed: vec!["epoch".into()],
        random: ["subject", "subject:eye", "subject:eye:vessel"]
            .iter()
            .map(|r| RandomSpec::parse(r).unwrap())
            .collect(),
        reference: vec![("epoch".into(), "air".into())],
    };
    let t0 = Instant::now();
    let d = build(&t, &path, &spec, &mut f).unwrap();
    let m = Model::new(d.data, Criterion::Reml);
    let fit = m.fit().unwrap();
    let dt = t0.elapsed().as_secs_f64();
    println!(
        "  satstep REML fit: {dt:.2} s ({} deviance evaluations, criterion {:.4})",
        fit.evaluations, fit.deviance
    );
    let script = dir.path().join("fit.R");
    std::fs::write(
        &script,
        "suppressMessages(library(lme4)); d <- read.csv(commandArgs(TRUE)[1]); d$epoch <- relevel(factor(d$epoch), 'air');\n\
         t <- system.time(m <- lmer(so2 ~ epoch + (1|subject) + (1|subject:eye) + (1|subject:eye:vessel), data = d, REML = TRUE));\n\
         cat(sprintf('%.3f %.4f\\n', t[['elapsed']], REMLcrit(m)))\n",
    )
    .unwrap();
    match Command::new("Rscript").arg(&script).arg(&path).output() {
        Ok(o) if o.status.success() => {
            let s = String::from_utf8_lossy(&o.stdout);
            let f: Vec<&str> = s.split_whitespace().collect();
            println!(
                "  lme4 REML fit:    {} s (criterion {})",
                f.first().unwrap_or(&"?"),
                f.get(1).unwrap_or(&"?")
            );
        }
        _ => println!("  lme4: R with lme4 is not installed; no side-by-side figure"),
    }
}
