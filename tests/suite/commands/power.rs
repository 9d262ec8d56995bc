//! `satstep power` as a user runs it: from a protocol with stated
//! variances, from a variance components table, the same bytes whatever
//! the thread count, and clear refusals of what cannot be planned.

use std::path::Path;

use crate::common::{repo, satstep, write};

fn protocol() -> String {
    repo()
        .join("protocols/step-down-hypoxia.yaml")
        .to_string_lossy()
        .into_owned()
}

const STATED: &[&str] = &[
    "--sd",
    "subject=4",
    "--sd",
    "segment=3",
    "--sd",
    "residual=3",
    "--sd",
    "response=1.5",
    "--sd",
    "response:low-15=2.5",
];

fn plan(dir: &Path, out: &str, jobs: &str) -> crate::common::Output {
    let p = protocol();
    let mut args = vec![
        "power",
        p.as_str(),
        "--jobs",
        jobs,
        "--effect",
        "low-15 - air=-3",
        "--subjects",
        "4,8",
        "--captures",
        "2,4",
        "--segments",
        "3",
        "--simulations",
        "60",
        "--out",
        out,
    ];
    args.extend_from_slice(STATED);
    satstep(dir, &args)
}

#[test]
fn power_from_a_protocol_writes_its_table_figure_and_text() {
    let dir = tempfile::tempdir().unwrap();
    let o = plan(dir.path(), "plan", "2");
    assert_eq!(o.code, 0, "{}", o.stderr);
    let out = dir.path().join("plan");
    let csv = std::fs::read_to_string(out.join("power.csv")).unwrap();
    let lines: Vec<&str> = csv.lines().collect();
    assert_eq!(
        lines[0],
        "subjects,eyes,sessions,segments_per_eye,captures_per_epoch,method,kind,contrast,effect,effect_source,simulations,power,mc_se,type1"
    );
    // 2 subject counts × 2 capture counts × 3 contrasts of the protocol.
    assert_eq!(lines.len(), 1 + 2 * 2 * 3, "{csv}");
    assert!(lines[1].starts_with("4,1,1,3,2,stated,any vessel,low-15 - air,-3.0,stated,60,"));
    assert!(csv.contains("low-12 - air,0.0,implied,60,"));
    for f in [
        "power.parquet",
        "smallest.csv",
        "smallest.parquet",
        "power_curve.svg",
    ] {
        assert!(out.join(f).is_file(), "{f} missing");
    }
    // The figure is drawn: the PNG decodes and is not one colour.
    let png = image::open(out.join("power_curve.png")).unwrap().to_rgb8();
    let first = *png.get_pixel(0, 0);
    assert!(png.pixels().filter(|p| **p != first).count() > 1000);
    let text = std::fs::read_to_string(out.join("power.md")).unwrap();
    for needle in [
        "Research use only",
        "-3 points of SO2 in `low-15 - air`",
        "stated by the investigators",
        "Satterthwaite",
        "Monte Carlo standard error",
    ] {
        assert!(text.contains(needle), "`{needle}` not in:\n{text}");
    }
    assert!(
        o.stderr.contains("studies simulated and analysed"),
        "{}",
        o.stderr
    );
}

#[test]
fn power_gives_the_same_bytes_whatever_the_thread_count() {
    let dir = tempfile::tempdir().unwrap();
    assert_eq!(plan(dir.path(), "one", "1").code, 0);
    assert_eq!(plan(dir.path(), "two", "2").code, 0);
    for f in [
        "power.csv",
        "smallest.csv",
        "power.md",
        "power_curve.svg",
        "power_curve.png",
    ] {
        assert_eq!(
            std::fs::read(dir.path().join("one").join(f)).unwrap(),
            std::fs::read(dir.path().join("two").join(f)).unwrap(),
            "{f} differs between --jobs 1 and --jobs 2"
        );
    }
}

#[test]
fn power_reads_a_variance_components_table_and_names_what_it_lacks() {
    let dir = tempfile::tempdir().unwrap();
    let table = write(
        dir.path(),
        "vc.csv",
        "method,kind,group,levels,variance,sd,boundary\n\
         multiband,arteriole,subject,8,9,3,no\n\
         multiband,arteriole,subject:eye:segment,26,4,2,no\n\
         multiband,arteriole,subject:epoch=air,8,0,0,yes\n\
         multiband,arteriole,subject:epoch=low-15,8,4,2,no\n\
         multiband,arteriole,subject:epoch=low-12,8,16,4,no\n\
         multiband,arteriole,subject:epoch=recovery,8,1,1,no\n\
         multiband,arteriole,Residual,495,1,1,no\n",
    );
    let p = protocol();
    let o = satstep(
        dir.path(),
        &[
            "power",
            &p,
            "--variances",
            table.to_str().unwrap(),
            "--effect",
            "low-12 - air=-3",
            "--subjects",
            "6",
            "--eyes",
            "1,2",
            "--simulations",
            "40",
            "--out",
            "plan",
        ],
    );
    assert_eq!(o.code, 0, "{}", o.stderr);
    // Two eyes are planned, and the pilot had one: the eye variance is missing.
    assert!(
        o.stderr
            .contains("no variance component subject:eye (multiband, arteriole)")
            && o.stderr.contains("--sd"),
        "{}",
        o.stderr
    );
    let text = std::fs::read_to_string(dir.path().join("plan/power.md")).unwrap();
    assert!(
        text.contains(
            "subject-specific response per epoch air 0.00, low-15 2.00, low-12 4.00, recovery 1.00"
        ),
        "{text}"
    );
    assert!(
        text.contains("The table had no component subject:eye"),
        "{text}"
    );
    // Stating it silences the warning.
    let o = satstep(
        dir.path(),
        &[
            "power",
            &p,
            "--variances",
            table.to_str().unwrap(),
            "--effect",
            "low-12 - air=-3",
            "--subjects",
            "6",
            "--eyes",
            "1,2",
            "--sd",
            "eye=1",
            "--simulations",
            "20",
            "--out",
            "plan2",
        ],
    );
    assert_eq!(o.code, 0, "{}", o.stderr);
    assert!(!o.stderr.contains("no variance component"), "{}", o.stderr);
}

#[test]
fn power_refuses_what_it_cannot_plan_and_says_how_to_fix_it() {
    let dir = tempfile::tempdir().unwrap();
    let p = protocol();
    let run = |extra: &[&str]| {
        let mut a = vec!["power", p.as_str(), "--simulations", "20", "--out", "x"];
        a.extend_from_slice(extra);
        satstep(dir.path(), &a)
    };
    let cases: &[(&[&str], &str)] = &[
        (&["--sd", "residual=2"], "state the effect to detect"),
        (
            &["--effect", "low-16 - air=-3", "--sd", "residual=2"],
            "no contrast `low-16 - air` in the protocol",
        ),
        (
            &["--effect", "low-15 - air=four", "--sd", "residual=2"],
            "`four` is not a number",
        ),
        (
            &["--effect", "low-15 - air=-3"],
            "state the variance components with `--sd",
        ),
        (
            &["--effect", "low-15 - air=-3", "--sd", "iris=2"],
            "unknown group `iris`",
        ),
        (
            &[
                "--effect",
                "low-15 - air=-3",
                "--sd",
                "residual=2",
                "--subjects",
                "8..4",
            ],
            "`--subjects`",
        ),
        (
            &[
                "--effect",
                "low-15 - air=-3",
                "--sd",
                "residual=2",
                "--target",
                "80",
            ],
            "between 0 and 1",
        ),
    ];
    for (args, needle) in cases {
        let o = run(args);
        assert_eq!(o.code, 1, "{args:?}: {}", o.stderr);
        assert!(
            o.stderr.contains(needle),
            "{args:?}: `{needle}` not in {}",
            o.stderr
        );
    }
    assert!(
        !dir.path().join("x").exists(),
        "nothing is written on a refusal"
    );
}
