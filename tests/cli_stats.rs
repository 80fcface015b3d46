//! `lotdrift compare` and `lotdrift adjust` as scripts use them, checked against published
//! values. Sources are named beside each check; the data files are copies of the published
//! data sets (see tests/data/stats/ and ../shared/reference/REFERENCES.md).

mod common;

use std::path::{Path, PathBuf};

use common::*;

fn data(name: &str) -> PathBuf {
    Path::new(env!("CARGO_MANIFEST_DIR"))
        .join("tests/data/stats")
        .join(name)
}

fn compare(args: &[&str]) -> serde_json::Value {
    let dir = tempfile::tempdir().unwrap();
    let out = cmd(dir.path())
        .arg("compare")
        .args(args)
        .arg("--json")
        .output()
        .unwrap();
    assert!(
        out.status.success(),
        "compare {args:?}: {}",
        text(&out.stderr)
    );
    serde_json::from_slice(&out.stdout).unwrap()
}

fn close(actual: &serde_json::Value, expected: f64, rel: f64) {
    let a = actual
        .as_f64()
        .unwrap_or_else(|| panic!("not a number: {actual}"));
    assert!(
        ((a - expected) / expected).abs() <= rel,
        "{a} vs {expected} (relative tolerance {rel})"
    );
}

/// Values of one group of a two-column `group,value` CSV, written to a temp file.
fn group_file(dir: &Path, csv: &str, group: &str) -> PathBuf {
    let text = std::fs::read_to_string(data(csv)).unwrap();
    let values: Vec<&str> = text
        .lines()
        .skip(1)
        .filter_map(|l| l.split_once(','))
        .filter(|(g, _)| *g == group)
        .map(|(_, v)| v)
        .collect();
    let path = dir.join(format!("{group}.txt"));
    std::fs::write(&path, values.join("\n")).unwrap();
    path
}

#[test]
fn pooled_t_matches_nist_auto83b() {
    // NIST/SEMATECH e-Handbook §1.3.5.3 "Two-Sample t-Test for Equal Means", AUTO83B.DAT,
    // US vs Japan mpg: T = -12.62059, df = 326; 95 % interval (-11.947653, -8.725216) from the
    // handbook's R companion output.
    let us = data("nist_auto83b_us_mpg.txt");
    let jp = data("nist_auto83b_japan_mpg.txt");
    let r = compare(&[
        "--a",
        us.to_str().unwrap(),
        "--b",
        jp.to_str().unwrap(),
        "--test",
        "pooled",
    ]);
    assert_eq!(r["test"], "pooled");
    close(&r["statistic"], -12.62059, 1e-6);
    close(&r["df"], 326.0, 1e-12);
    close(&r["ci"][0], -11.947653, 1e-6);
    close(&r["ci"][1], -8.725216, 1e-6);
    close(&r["estimate"], 20.14458 - 30.48101, 1e-5);
    assert!(r["p_value"].as_f64().unwrap() < 2.2e-16);
}

#[test]
fn welch_t_matches_published_values_on_auto83b() {
    // Welch on the same data: t = -12.946273275, df = 136.8749767 from raw data (REFERENCES.md
    // §1, scipy; Boost.Math "Comparing the means of two samples with the Students-t test"
    // gives -12.94627 / 136.87499 from rounded summaries); R t.test interval
    // (-11.915248, -8.757621).
    let us = data("nist_auto83b_us_mpg.txt");
    let jp = data("nist_auto83b_japan_mpg.txt");
    let r = compare(&["--a", us.to_str().unwrap(), "--b", jp.to_str().unwrap()]);
    assert_eq!(r["test"], "welch");
    close(&r["statistic"], -12.946273275, 1e-9);
    close(&r["df"], 136.8749767, 1e-8);
    close(&r["ci"][0], -11.915248, 1e-6);
    close(&r["ci"][1], -8.757621, 1e-6);
    // Two-sided p 1.571e-25 (Boost.Math, same page).
    close(&r["p_value"], 1.570854784e-25, 1e-3);
    // One-sided, and a hypothesised difference: the interval becomes a bound.
    let r = compare(&[
        "--a",
        us.to_str().unwrap(),
        "--b",
        jp.to_str().unwrap(),
        "--alternative",
        "less",
        "--delta",
        "-5",
    ]);
    assert!(r["ci"][0].is_null(), "{r}");
    // Upper bound = estimate + t(0.95, 136.874977) * se, with t = 1.656062 (REFERENCES.md §1,
    // scipy) and se = |estimate / t| from the two-sided run above.
    let se = (20.1445783 - 30.4810127f64).abs() / 12.946273275;
    close(&r["ci"][1], (20.1445783 - 30.4810127) + 1.656062 * se, 1e-6);
    close(
        &r["statistic"],
        ((20.1445783 - 30.4810127) + 5.0) / se,
        1e-6,
    );
}

#[test]
fn f_test_matches_nist_jahanmi2() {
    // NIST/SEMATECH e-Handbook §1.3.5.9 "F-Test for Equality of Two Variances", JAHANMI2.DAT
    // batch 1 vs batch 2: F = 1.123037 (printed; exact 1.1230375233), df 239 and 239;
    // two-sided p 0.3704 (R var.test, REFERENCES.md §2).
    let a = data("nist_jahanmi2_batch1_strength.txt");
    let b = data("nist_jahanmi2_batch2_strength.txt");
    let r = compare(&[
        "--a",
        a.to_str().unwrap(),
        "--b",
        b.to_str().unwrap(),
        "--test",
        "f",
    ]);
    close(&r["statistic"], 1.1230375233, 1e-9);
    assert_eq!(r["df"], serde_json::json!([239.0, 239.0]));
    close(&r["p_value"], 0.370383, 1e-5);
    close(&r["estimate"], 1.1230375233, 1e-9);
}

#[test]
fn mann_whitney_matches_shier_2004() {
    // R. Shier (2004), "Statistics: 2.3 The Mann-Whitney U Test", Mathematics Learning Support
    // Centre: diabetes ages, 5 men vs 4 women, U_M = 17, exact two-sided p = 0.111 (0.1111111
    // in R wilcox.test).
    let dir = tempfile::tempdir().unwrap();
    let m = group_file(dir.path(), "mw_shier2004_diabetes_ages.csv", "male");
    let f = group_file(dir.path(), "mw_shier2004_diabetes_ages.csv", "female");
    let r = compare(&[
        "--a",
        m.to_str().unwrap(),
        "--b",
        f.to_str().unwrap(),
        "--test",
        "mann-whitney",
    ]);
    close(&r["statistic"], 17.0, 1e-12);
    close(&r["p_value"], 0.111111111, 1e-6);
    assert!(r["df"].is_null());
}

#[test]
fn adjust_matches_benjamini_hochberg_1995() {
    // Benjamini & Hochberg (1995), JRSS B 57(1):289-300, Section 3: 15 p-values; at 0.05 the
    // step-up procedure rejects 4, Bonferroni 3. Adjusted values for every method: statsmodels
    // multipletests = R p.adjust (REFERENCES.md §4, cross-library).
    let table = std::fs::read_to_string(data("bh1995_adjusted_pvalues.csv")).unwrap();
    let mut lines = table.lines();
    let header: Vec<&str> = lines.next().unwrap().split(',').collect();
    let rows: Vec<Vec<f64>> = lines
        .map(|l| l.split(',').map(|v| v.parse().unwrap()).collect())
        .collect();
    let dir = tempfile::tempdir().unwrap();
    let p = data("bh1995_pvalues.txt");
    for (method, expected_rejects) in [
        ("bonferroni", 3),
        ("holm", 3),
        ("hochberg", 3),
        ("bh", 4),
        ("by", 3),
    ] {
        let col = header.iter().position(|h| *h == method).unwrap();
        let out = cmd(dir.path())
            .args(["adjust", "--method", method, "--level", "0.05", "--json"])
            .arg(&p)
            .output()
            .unwrap();
        assert!(out.status.success(), "{}", text(&out.stderr));
        let v: serde_json::Value = serde_json::from_slice(&out.stdout).unwrap();
        assert_eq!(v["method"], method);
        let adjusted = v["adjusted"].as_array().unwrap();
        assert_eq!(adjusted.len(), rows.len());
        for (a, row) in adjusted.iter().zip(&rows) {
            let e = row[col];
            assert!(
                (a.as_f64().unwrap() - e).abs() <= 1e-12 * e.max(1e-3),
                "{method}: {a} vs {e}"
            );
        }
        let rejects = v["reject"]
            .as_array()
            .unwrap()
            .iter()
            .filter(|r| r.as_bool().unwrap())
            .count();
        assert_eq!(rejects, expected_rejects, "{method}");
    }
}

#[test]
fn adjust_reads_standard_input() {
    use std::io::Write;
    let dir = tempfile::tempdir().unwrap();
    let mut child = cmd(dir.path())
        .args(["adjust", "--method", "holm", "--json", "-"])
        .stdin(std::process::Stdio::piped())
        .stdout(std::process::Stdio::piped())
        .spawn()
        .unwrap();
    child
        .stdin
        .take()
        .unwrap()
        .write_all(b"0.01, 0.04 0.03\n")
        .unwrap();
    let out = child.wait_with_output().unwrap();
    assert!(out.status.success());
    let v: serde_json::Value = serde_json::from_slice(&out.stdout).unwrap();
    // Holm by hand (common practice): sorted 0.01*3, max(0.03*2, 0.03), max(0.04, 0.06).
    assert_eq!(v["adjusted"], serde_json::json!([0.03, 0.06, 0.06]));
}

#[test]
fn bad_input_is_a_usage_error_naming_the_problem() {
    let dir = tempfile::tempdir().unwrap();
    std::fs::write(dir.path().join("a.txt"), "1 2 3\n4,x\n").unwrap();
    std::fs::write(dir.path().join("b.txt"), "1 2 3 5\n").unwrap();
    let out = cmd(dir.path())
        .args(["compare", "--a", "a.txt", "--b", "b.txt"])
        .output()
        .unwrap();
    assert_eq!(out.status.code(), Some(2));
    let err = text(&out.stderr);
    assert!(
        err.contains("a.txt") && err.contains("line 2") && err.contains("\"x\""),
        "{err}"
    );

    std::fs::write(dir.path().join("a.txt"), "1 2 3\n").unwrap();
    let out = cmd(dir.path())
        .args(["compare", "--a", "a.txt", "--b", "b.txt", "--test", "sign"])
        .output()
        .unwrap();
    assert_eq!(out.status.code(), Some(2));
    let err = text(&out.stderr);
    assert!(
        err.contains("--test") && err.contains("welch, pooled, mann-whitney, f, brown-forsythe"),
        "{err}"
    );

    let out = cmd(dir.path())
        .args(["adjust", "--method", "fdr"])
        .arg("b.txt")
        .output()
        .unwrap();
    assert_eq!(out.status.code(), Some(2));
    assert!(text(&out.stderr).contains("--method"));

    // Zero variance in both samples: a runtime error, not a NaN.
    std::fs::write(dir.path().join("c.txt"), "2 2 2\n").unwrap();
    let out = cmd(dir.path())
        .args(["compare", "--a", "c.txt", "--b", "c.txt"])
        .output()
        .unwrap();
    assert_eq!(out.status.code(), Some(1));
    assert!(
        text(&out.stderr).contains("variance"),
        "{}",
        text(&out.stderr)
    );
}

#[test]
fn a_reader_that_closes_the_pipe_early_is_no_crash() {
    // Regression: `lotdrift ... | head` panicked (exit 101) writing to the closed pipe. 50,000
    // adjusted p-values are far more than a pipe buffers, so the writer meets the closed end.
    let dir = tempfile::tempdir().unwrap();
    let input = dir.path().join("p.txt");
    let p: Vec<String> = (1..=50_000)
        .map(|i| format!("{}", i as f64 / 50_001.0))
        .collect();
    std::fs::write(&input, p.join("\n")).unwrap();
    let script = format!(
        "'{}' adjust --method bh '{}' 2>&1 | head -n 1 >/dev/null; exit ${{PIPESTATUS[0]}}",
        env!("CARGO_BIN_EXE_lotdrift"),
        input.display()
    );
    let out = std::process::Command::new("bash")
        .args(["-c", &script])
        .output()
        .unwrap();
    assert_eq!(
        out.status.code(),
        Some(0),
        "{}",
        String::from_utf8_lossy(&out.stderr)
    );
}

#[test]
fn an_error_says_what_failed_where_and_its_cause_once() {
    // Regression: causes were printed twice (the variant's text and the chain both carried
    // them).
    let dir = tempfile::tempdir().unwrap();
    let missing = dir.path().join("nowhere/lotdrift.toml");
    let out = std::process::Command::new(env!("CARGO_BIN_EXE_lotdrift"))
        .args(["status", "--config"])
        .arg(&missing)
        .output()
        .unwrap();
    let err = String::from_utf8_lossy(&out.stderr);
    assert_eq!(out.status.code(), Some(2), "{err}");
    assert!(err.contains("cannot read config file"), "{err}");
    assert!(err.contains(&missing.display().to_string()), "{err}");
    assert_eq!(err.matches("No such file or directory").count(), 1, "{err}");
}
