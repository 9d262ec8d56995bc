//! Agreement with the reference by pigmentation group, on a simulated
//! study whose veil grows with the fundus pigmentation grade: the
//! breakdown must find the two-band method's pigmentation bias, which the
//! pooled agreement hides.

use crate::common::{satstep, simulated};

#[test]
fn a_bias_that_grows_with_pigmentation_is_found() {
    let tmp = tempfile::tempdir().unwrap();
    let folder = simulated(
        tmp.path(),
        "tests/fixtures/pigmentation-scenario.yaml",
        "study",
    );
    let o = satstep(
        tmp.path(),
        &["--no-progress", "run", folder.to_str().unwrap()],
    );
    assert_eq!(o.code, 0, "{}", o.stderr);
    let stats = folder.join("results/statistics");
    let groups = std::fs::read_to_string(stats.join("agreement_by_group.csv")).unwrap();
    assert!(
        groups.starts_with(
            "method,attribute,group,captures,subjects,bias,precision,arms,loa_lower,loa_upper\n"
        ),
        "{groups}"
    );
    assert!(
        groups.lines().skip(1).all(|l| l.contains(",pigmentation,")),
        "{groups}"
    );
    let mut r = csv::Reader::from_path(stats.join("bias_difference.csv")).unwrap();
    let h = r.headers().unwrap().clone();
    let col = |n: &str| h.iter().position(|x| x == n).unwrap();
    let rows: Vec<csv::StringRecord> = r.records().map(Result::unwrap).collect();
    let row = |m: &str| {
        rows.iter()
            .find(|x| &x[col("method")] == m)
            .unwrap_or_else(|| panic!("no row for {m}"))
    };
    let num = |x: &csv::StringRecord, n: &str| x[col(n)].parse::<f64>().unwrap();
    let two = row("two-band");
    eprintln!(
        "two-band: grade {} − {}: {:.2} ({:.2} to {:.2}), p {:.4}",
        &two[col("high_group")],
        &two[col("low_group")],
        num(two, "bias_difference"),
        num(two, "lower"),
        num(two, "upper"),
        num(two, "p")
    );
    assert_eq!(&two[col("attribute")], "pigmentation");
    // A thicker veil lowers the two-band ODR's vessel contrast: the
    // darkest grade reads differently from the lightest, beyond chance.
    assert!(
        num(two, "lower") > 0.0 || num(two, "upper") < 0.0,
        "the pigmentation bias was not found"
    );
    let multi = row("multiband");
    eprintln!(
        "multiband: {:.2} ({:.2} to {:.2})",
        num(multi, "bias_difference"),
        num(multi, "lower"),
        num(multi, "upper")
    );
    // The joint fit has the veil as a parameter: a smaller difference.
    assert!(num(multi, "bias_difference").abs() < num(two, "bias_difference").abs());
    // The figure: one panel per method, the groups named on its axis.
    let svg = std::fs::read_to_string(folder.join("results/report/figures/agreement_by_group.svg"))
        .unwrap();
    for label in [
        "two-band",
        "multiband",
        "pigmentation",
        "limits of agreement",
    ] {
        assert!(svg.contains(label), "no `{label}` in the figure");
    }
    assert!(
        folder
            .join("results/report/figures/agreement_by_group.png")
            .is_file()
    );
    let report = std::fs::read_to_string(folder.join("results/report/report.md")).unwrap();
    assert!(
        report.contains("within each pigmentation group"),
        "methods text"
    );
    assert!(
        report.contains("Difference in bias against the reference"),
        "table"
    );
}
