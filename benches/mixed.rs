//! Mixed models, whole process against R: `satstep mixed` (read the CSV,
//! REML fit, Satterthwaite df for every fixed effect and a contrast, write
//! the tables) beside `Rscript` with lme4 + lmerTest doing the same
//! (`lmer`, `summary` with Satterthwaite df, the same contrast by
//! `contest`), on one core, for 10 000, 40 000 and 100 000 observations of
//! subjects × 2 eyes × 6 vessels × 4 epochs × 6 captures with three nested
//! random intercepts (subject, subject:eye, subject:eye:vessel). Prints both
//! times and both contrast estimates and df. Run with
//! `cargo bench --bench mixed`.

// A benchmark reports on stdout.
#![allow(clippy::print_stdout)]

use std::path::Path;
use std::process::Command;
use std::time::Instant;

use rand::SeedableRng;
use rand_distr::{Distribution, Normal};

/// The design above with `subjects` subjects (288 observations each).
fn data(subjects: usize, path: &Path) -> usize {
    let mut rng = rand_chacha::ChaCha8Rng::seed_from_u64(2026);
    let n = |s: f64| Normal::new(0.0, s).unwrap();
    let mut csv = String::from("subject,eye,vessel,epoch,so2\n");
    let mut rows = 0;
    for s in 0..subjects {
        let us = n(3.0).sample(&mut rng);
        for eye in ["OD", "OS"] {
            let ue = n(1.5).sample(&mut rng);
            for v in 0..6 {
                let uv = n(2.0).sample(&mut rng);
                for (e, eff) in [
                    ("air", 0.0),
                    ("low15", -7.0),
                    ("low12", -20.0),
                    ("recovery", -1.0),
                ] {
                    for _ in 0..6 {
                        let y = 95.0 + eff + us + ue + uv + n(2.5).sample(&mut rng);
                        csv.push_str(&format!("S{s:03},{eye},V{v},{e},{y:.4}\n"));
                        rows += 1;
                    }
                }
            }
        }
    }
    std::fs::write(path, csv).unwrap();
    rows
}

const R_SCRIPT: &str = r#"suppressMessages({library(lme4); library(lmerTest)})
a <- commandArgs(TRUE)
d <- read.csv(a[1]); d$epoch <- relevel(factor(d$epoch), "air")
m <- lmer(so2 ~ epoch + (1|subject) + (1|subject:eye) + (1|subject:eye:vessel), data = d, REML = TRUE)
s <- summary(m)
L <- setNames(rep(0, length(fixef(m))), names(fixef(m))); L["epochlow12"] <- 1
k <- contest(m, L, joint = FALSE)
cat(sprintf("%.6f %.3f\n", k$Estimate, k$df))
"#;

fn main() {
    let dir = tempfile::tempdir().unwrap();
    let script = dir.path().join("fit.R");
    std::fs::write(&script, R_SCRIPT).unwrap();
    let r_ok = Command::new("Rscript")
        .args(["-e", "suppressMessages({library(lme4); library(lmerTest)})"])
        .output()
        .is_ok_and(|o| o.status.success());
    println!("mixed models, whole process, one core: satstep mixed vs Rscript (lme4 + lmerTest)");
    println!(
        "{:>8}  {:>10}  {:>10}  {:>7}  contrast low12 - air (estimate, df)",
        "rows", "satstep", "R", "ratio"
    );
    for subjects in [35, 139, 348] {
        let path = dir.path().join(format!("d{subjects}.csv"));
        let rows = data(subjects, &path);
        let out = dir.path().join(format!("out{subjects}"));
        let t0 = Instant::now();
        let o = Command::new(env!("CARGO_BIN_EXE_satstep"))
            .args([
                "mixed",
                "--jobs",
                "1",
                "-q",
                "--response",
                "so2",
                "--fixed",
                "epoch",
            ])
            .args([
                "--random",
                "subject",
                "--random",
                "subject:eye",
                "--random",
                "subject:eye:vessel",
            ])
            .args([
                "--reference",
                "epoch=air",
                "--contrast",
                "low12 - air",
                "--data",
            ])
            .arg(&path)
            .arg("--out")
            .arg(&out)
            .output()
            .unwrap();
        let ours = t0.elapsed().as_secs_f64();
        assert!(o.status.success(), "{}", String::from_utf8_lossy(&o.stderr));
        let contrasts = std::fs::read_to_string(out.join("contrasts.csv")).unwrap();
        let mut rd = csv::Reader::from_reader(contrasts.as_bytes());
        let head = rd.headers().unwrap().clone();
        let row = rd.records().next().unwrap().unwrap();
        let get = |n: &str| row[head.iter().position(|h| h == n).unwrap()].to_string();
        let mine = format!("{} ({})", get("estimate"), get("df"));
        let (theirs, rt) = if r_ok {
            let t0 = Instant::now();
            let o = Command::new("Rscript")
                .arg(&script)
                .arg(&path)
                .env("OMP_NUM_THREADS", "1")
                .env("OPENBLAS_NUM_THREADS", "1")
                .output()
                .unwrap();
            let rt = t0.elapsed().as_secs_f64();
            let s = String::from_utf8_lossy(&o.stdout).trim().replace(' ', " (") + ")";
            (s, format!("{rt:.2} s"))
        } else {
            (
                "R with lme4 and lmerTest is not installed".into(),
                "-".into(),
            )
        };
        let ratio = rt
            .trim_end_matches(" s")
            .parse::<f64>()
            .map_or("-".into(), |r| format!("{:.0}×", r / ours));
        println!(
            "{rows:>8}  {:>8.2} s  {rt:>10}  {ratio:>7}  satstep {mine}; lme4 {theirs}",
            ours
        );
    }
}
