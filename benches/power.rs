//! Power by simulation, whole process: `satstep power` on a grid of 20
//! designs (6–24 subjects × 3 or 6 captures per epoch, 4 segments, one
//! eye) × 1 000 simulated studies of the step-down protocol, on all cores
//! (the target: under a minute on two). Beside it, the same simulation and
//! analysis in R (lme4 + lmerTest: the same model with a subject-specific
//! deviation per epoch, Satterthwaite's test of the contrast) for 20
//! studies of the grid's middle design, its time per study scaled to the
//! grid's 20 000 studies on one core. Run with `cargo bench --bench power`.

// A benchmark reports on stdout.
#![allow(clippy::print_stdout)]

use std::process::Command;
use std::time::Instant;

const R_SCRIPT: &str = r#"suppressMessages({library(lme4); library(lmerTest)})
set.seed(1)
epochs <- c("air", "low-15", "low-12", "recovery")
change <- c(0, -4, 0, 0); resp <- c(1.5, 2.5, 4, 1.5)
one <- function(n, captures) {
  d <- expand.grid(capture = 1:captures, epoch = 1:4, segment = 1:4, subject = 1:n)
  us <- rnorm(n, 0, 4); ug <- matrix(rnorm(n * 4, 0, 3), n); ur <- matrix(rnorm(n * 4, 0, rep(resp, each = n)), n)
  d$so2 <- 90 + change[d$epoch] + us[d$subject] + ug[cbind(d$subject, d$segment)] +
    ur[cbind(d$subject, d$epoch)] + rnorm(nrow(d), 0, 3)
  d$epoch <- factor(epochs[d$epoch], levels = epochs); d$subject <- factor(d$subject)
  m <- suppressMessages(lmer(so2 ~ epoch + (1 | subject) + (1 | subject:segment) +
    (0 + dummy(epoch, "air") | subject) + (0 + dummy(epoch, "low-15") | subject) +
    (0 + dummy(epoch, "low-12") | subject) + (0 + dummy(epoch, "recovery") | subject), data = d))
  L <- c(0, 1, 0, 0)
  contest(m, L, joint = FALSE)$`Pr(>|t|)`
}
t0 <- proc.time()[["elapsed"]]
p <- sapply(1:20, function(i) one(14, 4))
cat(sprintf("%.4f %.3f\n", (proc.time()[["elapsed"]] - t0) / 20, mean(p < 0.05)))
"#;

fn main() {
    let dir = tempfile::tempdir().unwrap();
    let protocol = concat!(
        env!("CARGO_MANIFEST_DIR"),
        "/protocols/step-down-hypoxia.yaml"
    );
    let t0 = Instant::now();
    let o = Command::new(env!("CARGO_BIN_EXE_satstep"))
        .args(["power", protocol, "--effect", "low-15 - air=-4"])
        .args([
            "--sd",
            "subject=4",
            "--sd",
            "segment=3",
            "--sd",
            "residual=3",
        ])
        .args([
            "--sd",
            "response=1.5",
            "--sd",
            "response:low-15=2.5",
            "--sd",
            "response:low-12=4",
        ])
        .args([
            "--subjects",
            "6..24/2",
            "--captures",
            "3,6",
            "--simulations",
            "1000",
            "--out",
        ])
        .arg(dir.path())
        .output()
        .unwrap();
    let ours = t0.elapsed().as_secs_f64();
    assert!(o.status.success(), "{}", String::from_utf8_lossy(&o.stderr));
    let threads = std::thread::available_parallelism().map_or(1, |n| n.get());
    println!("power by simulation: 20 designs × 1 000 studies (20 000 analyses)");
    println!("  satstep power, {threads} threads: {ours:.1} s (target: under 60 s on two cores)");
    let script = dir.path().join("power.R");
    std::fs::write(&script, R_SCRIPT).unwrap();
    let r = Command::new("Rscript")
        .arg(&script)
        .env("OMP_NUM_THREADS", "1")
        .env("OPENBLAS_NUM_THREADS", "1")
        .output();
    match r {
        Ok(o) if o.status.success() => {
            let out = String::from_utf8_lossy(&o.stdout);
            let mut it = out.split_whitespace();
            let per: f64 = it.next().and_then(|v| v.parse().ok()).unwrap_or(f64::NAN);
            let power = it.next().unwrap_or("?");
            println!(
                "  R lme4 + lmerTest, one core: {:.3} s per study (14 subjects, 4 captures; power {power} over 20 studies) → about {:.0} s for the grid on one core, {:.0} s on {threads}",
                per,
                per * 20_000.0,
                per * 20_000.0 / threads as f64
            );
        }
        _ => println!("  R with lme4 and lmerTest is not installed: no peer figure"),
    }
}
