//! Parquet input, end to end through the real binary: the same rows as CSV and as Parquet give the same results.
//!
//! The rows are the project's fixtures drawn from scikit-learn's bundled `load_breast_cancer` (Street, Wolberg and
//! Mangasarian 1993): `tests/fixtures/cases/lightgbm_nan_cat_breast_cancer` (LightGBM 4.7.0, a categorical feature
//! with an unseen category, missing cells; written by `tests/fixtures/generate.py`) and `tests/fixtures/evaluate`
//! (labelled rows, `tests/fixtures/gen_evaluate.py`). Each CSV file is turned into Parquet (`support/parquet.rs`)
//! with the parquet crate's Arrow writer (snappy pages, several row groups), each column typed as a data frame
//! library would type it (integers, float64 with nulls for empty cells, a dictionary of strings for the categorical
//! feature, a boolean label); the reference for every check is the CSV path reading the same rows.

#![allow(clippy::unwrap_used, clippy::expect_used)]

use std::path::{Path, PathBuf};
use std::process::{Command, Output};

use serde_json::Value;

#[path = "support/parquet.rs"]
mod parquet_copy;
use parquet_copy::{to_parquet, As};

fn fixtures() -> PathBuf {
    PathBuf::from(env!("CARGO_MANIFEST_DIR")).join("../tests/fixtures")
}

fn probity(args: &[&str]) -> Output {
    Command::new(env!("CARGO_BIN_EXE_probity"))
        .args(args)
        .output()
        .expect("run probity")
}

fn ok(out: &Output) {
    assert!(
        out.status.success(),
        "{}",
        String::from_utf8_lossy(&out.stderr)
    );
}

fn s(p: &Path) -> &str {
    p.to_str().unwrap()
}

fn case_kind(name: &str) -> As {
    match name {
        "id" => As::Int,
        "texture_band" => As::Dictionary,
        _ => As::Float,
    }
}

#[test]
fn score_and_explain_give_the_same_bytes_from_csv_and_parquet() {
    let dir = tempfile::tempdir().unwrap();
    let case = fixtures().join("cases/lightgbm_nan_cat_breast_cancer");
    let model = fixtures().join("models/lightgbm_nan_cat_breast_cancer.json");
    // The fixture's rows, with a few cells of `mean_perimeter` made the edge cases of the numeric rule: not finite,
    // NaN (missing), digits a float64 needs all 17 of, a subnormal, a negative zero.
    let text = std::fs::read_to_string(case.join("rows.csv")).unwrap();
    let mut lines: Vec<String> = text.lines().map(str::to_string).collect();
    let column = lines[0]
        .split(',')
        .position(|h| h == "mean_perimeter")
        .unwrap();
    let edge = [
        "inf",
        "-inf",
        "NaN",
        "0.30000000000000004",
        "1e-320",
        "-0.0",
        "123.45678901234567",
    ];
    for (line, value) in lines[1..].iter_mut().zip(edge) {
        let mut cells: Vec<&str> = line.split(',').collect();
        cells[column] = value;
        *line = cells.join(",");
    }
    let csv = dir.path().join("rows.csv");
    std::fs::write(&csv, lines.join("\n") + "\n").unwrap();
    // Not named .parquet: the file is known by its first bytes.
    let pq = dir.path().join("rows.data");
    to_parquet(&csv, &pq, case_kind);
    assert_eq!(&std::fs::read(&pq).unwrap()[..4], b"PAR1");

    // score, at full precision, with the per-row notes (missing cells, the unseen category `5`).
    let mut outputs = Vec::new();
    for (input, name) in [(&csv, "from_csv.csv"), (&pq, "from_parquet.csv")] {
        let out = dir.path().join(name);
        ok(&probity(&[
            "score",
            "--model",
            s(&model),
            "--input",
            s(input),
            "--output",
            s(&out),
            "--keep-training-base-rate",
            "--full-precision",
            "--warnings-column",
            "-q",
        ]));
        outputs.push(std::fs::read_to_string(&out).unwrap());
    }
    assert_eq!(outputs[0], outputs[1]);
    assert_eq!(outputs[0].lines().count(), 192, "header and 191 rows");
    assert!(outputs[1].contains("texture_band: unknown category"));
    assert!(outputs[1].contains("mean_radius: missing"));
    assert!(outputs[1].contains("texture_band: missing"));
    assert!(outputs[1].contains("mean_perimeter: not finite, read as missing"));
    assert!(outputs[1].contains("mean_perimeter: missing"));

    // --keep-columns: every kept cell reads back as the CSV cell's value (a Parquet cell is written in its own
    // shortest form, which need not be the CSV file's text; the value is the check).
    let mut kept = Vec::new();
    for (input, name) in [(&csv, "k_csv.csv"), (&pq, "k_parquet.csv")] {
        let out = dir.path().join(name);
        ok(&probity(&[
            "score",
            "--model",
            s(&model),
            "--input",
            s(input),
            "--output",
            s(&out),
            "--keep-training-base-rate",
            "--full-precision",
            "--keep-columns",
            "-q",
        ]));
        let mut reader = csv::Reader::from_path(&out).unwrap();
        let header = reader.headers().unwrap().clone();
        let rows: Vec<csv::StringRecord> = reader.records().map(Result::unwrap).collect();
        kept.push((header, rows));
    }
    assert_eq!(kept[0].0, kept[1].0);
    assert_eq!(kept[0].1.len(), kept[1].1.len());
    for (a, b) in kept[0].1.iter().zip(&kept[1].1) {
        for (x, y) in a.iter().zip(b.iter()) {
            match (x.parse::<f64>(), y.parse::<f64>()) {
                (Ok(x), Ok(y)) if x.is_nan() => assert!(y.is_nan()),
                (Ok(x), Ok(y)) => assert_eq!(x.to_bits(), y.to_bits(), "{a:?} / {b:?}"),
                _ => assert_eq!(x, y),
            }
        }
    }

    // explain: the same contributions and reasons.
    let mut explained = Vec::new();
    for (input, name) in [(&csv, "x_csv.csv"), (&pq, "x_parquet.csv")] {
        let out = dir.path().join(name);
        ok(&probity(&[
            "explain",
            "--model",
            s(&model),
            "--input",
            s(input),
            "--output",
            s(&out),
            "-q",
        ]));
        explained.push(std::fs::read(&out).unwrap());
    }
    assert_eq!(explained[0], explained[1]);
}

#[test]
fn evaluate_and_calibrate_read_the_same_figures_from_parquet() {
    let dir = tempfile::tempdir().unwrap();
    let csv = fixtures().join("evaluate/labelled.csv");
    let model = fixtures().join("evaluate/champion.json");
    let challenger = fixtures().join("evaluate/challenger.json");
    let pq = dir.path().join("labelled.parquet");
    to_parquet(&csv, &pq, |name| match name {
        "id" => As::Int,
        "y" => As::Bool,
        _ => As::Float,
    });
    let evaluate = |input: &Path| -> Value {
        let out = probity(&[
            "evaluate",
            "--model",
            s(&model),
            "--challenger",
            s(&challenger),
            "--input",
            s(input),
            "--label-column",
            "y",
            "--threshold",
            "0.5",
            "--json",
        ]);
        ok(&out);
        serde_json::from_slice(&out.stdout).unwrap()
    };
    assert_eq!(evaluate(&csv), evaluate(&pq));

    // calibrate: the same fitted map from the same holdout (0/1 labels as integers this time).
    let pq_int = dir.path().join("labelled_int.parquet");
    to_parquet(&csv, &pq_int, |name| match name {
        "id" | "y" => As::Int,
        _ => As::Float,
    });
    let calibrate = |input: &Path, name: &str| -> Value {
        let out = dir.path().join(name);
        ok(&probity(&[
            "calibrate",
            "--model",
            s(&model),
            "--holdout",
            s(input),
            "--label-column",
            "y",
            "--method",
            "platt",
            "--output",
            s(&out),
        ]));
        serde_json::from_str(&std::fs::read_to_string(&out).unwrap()).unwrap()
    };
    let (a, b) = (calibrate(&csv, "a.json"), calibrate(&pq_int, "b.json"));
    assert!(a["calibration"].is_object(), "{a}");
    assert_eq!(a["calibration"], b["calibration"]);
    assert_eq!(a["base_rate"], b["base_rate"]);
}

#[test]
fn an_unreadable_column_type_and_a_wrong_label_are_named() {
    let dir = tempfile::tempdir().unwrap();
    let csv = fixtures().join("evaluate/labelled.csv");
    let model = fixtures().join("evaluate/champion.json");

    // A feature stored as a list: refused, naming the column and its type.
    let listed = dir.path().join("listed.parquet");
    to_parquet(&csv, &listed, |name| match name {
        "id" | "y" => As::Int,
        "mean_texture" => As::List,
        _ => As::Float,
    });
    let out = probity(&[
        "score",
        "--model",
        s(&model),
        "--input",
        s(&listed),
        "--output",
        s(&dir.path().join("never.csv")),
        "--keep-training-base-rate",
    ]);
    assert!(!out.status.success());
    let err = String::from_utf8_lossy(&out.stderr);
    assert!(
        err.contains("column `mean_texture`")
            && err.contains("List(")
            && err.contains("cannot read"),
        "{err}"
    );
    assert!(!dir.path().join("never.csv").exists());

    // A list column a command does not use is left alone: `score` reads the label column `y` as a list without
    // complaint, `evaluate` (which uses it) refuses it.
    let listed_label = dir.path().join("listed_label.parquet");
    to_parquet(&csv, &listed_label, |name| match name {
        "id" => As::Int,
        "y" => As::List,
        _ => As::Float,
    });
    let scored = dir.path().join("scored.csv");
    ok(&probity(&[
        "score",
        "--model",
        s(&model),
        "--input",
        s(&listed_label),
        "--output",
        s(&scored),
        "--keep-training-base-rate",
        "-q",
    ]));
    let out = probity(&[
        "evaluate",
        "--model",
        s(&model),
        "--input",
        s(&listed_label),
        "--label-column",
        "y",
    ]);
    assert!(!out.status.success());
    let err = String::from_utf8_lossy(&out.stderr);
    assert!(err.contains("column `y`") && err.contains("List("), "{err}");

    // A label that is neither 0 nor 1: the row and the column are named, as for CSV.
    let text = std::fs::read_to_string(&csv).unwrap();
    let mut lines: Vec<String> = text.lines().map(str::to_string).collect();
    let third = lines[3].rsplit_once(',').unwrap().0.to_string();
    lines[3] = format!("{third},2");
    let bad_csv = dir.path().join("bad.csv");
    std::fs::write(&bad_csv, lines.join("\n") + "\n").unwrap();
    let bad_pq = dir.path().join("bad.parquet");
    to_parquet(&bad_csv, &bad_pq, |name| match name {
        "id" | "y" => As::Int,
        _ => As::Float,
    });
    for (input, place) in [(&bad_csv, "row 3 (line 4)"), (&bad_pq, "row 3,")] {
        let out = probity(&[
            "evaluate",
            "--model",
            s(&model),
            "--input",
            s(input),
            "--label-column",
            "y",
        ]);
        assert!(!out.status.success());
        let err = String::from_utf8_lossy(&out.stderr);
        assert!(
            err.contains(place) && err.contains("column `y`: label `2` is not 0 or 1"),
            "{err}"
        );
    }
}

/// A float32 column is widened exactly (IEEE 754-2008, 3.2: every binary32 value is a binary64 value), not read
/// through its shortest text: the same bytes out as a float64 column holding each float32 value widened.
#[test]
fn float32_columns_are_widened_exactly() {
    let dir = tempfile::tempdir().unwrap();
    let csv = fixtures().join("evaluate/labelled.csv");
    let model = fixtures().join("evaluate/champion.json");
    let (narrow, wide) = (
        dir.path().join("f32.parquet"),
        dir.path().join("f64.parquet"),
    );
    to_parquet(&csv, &narrow, |name| match name {
        "id" | "y" => As::Int,
        _ => As::Float32,
    });
    to_parquet(&csv, &wide, |name| match name {
        "id" | "y" => As::Int,
        _ => As::Float32Widened,
    });
    let mut outputs = Vec::new();
    for (input, name) in [
        (&narrow, "narrow.csv"),
        (&wide, "wide.csv"),
        (&csv, "text.csv"),
    ] {
        let out = dir.path().join(name);
        ok(&probity(&[
            "score",
            "--model",
            s(&model),
            "--input",
            s(input),
            "--output",
            s(&out),
            "--keep-training-base-rate",
            "--full-precision",
            "-q",
        ]));
        outputs.push(std::fs::read_to_string(&out).unwrap());
    }
    assert_eq!(outputs[0], outputs[1]);
    // And not the float64 text values: the widened float32 values differ from them in the low bits.
    assert_ne!(outputs[0], outputs[2]);
}
