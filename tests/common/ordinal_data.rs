//! Shared helpers for the ordinal and multinomial reference tests: read the CSV files written by
//! tests/reference/ordinal/make_reference.R (and make_reference.py) and compare numbers with an
//! explicit relative tolerance. Test support only; no library code lives here.
#![allow(dead_code)]

use std::collections::BTreeMap;
use std::path::PathBuf;

use nalgebra::DMatrix;

pub fn reference_dir() -> PathBuf {
    PathBuf::from(env!("CARGO_MANIFEST_DIR"))
        .join("tests")
        .join("reference")
        .join("ordinal")
}

/// A dataset as written by make_reference.R: response (0-based category), weight, then the
/// design columns without an intercept.
pub struct Dataset {
    pub response: Vec<usize>,
    pub weights: Vec<f64>,
    pub design: DMatrix<f64>,
    pub column_names: Vec<String>,
}

pub fn load_dataset(name: &str) -> Dataset {
    let path = reference_dir().join(format!("{name}_data.csv"));
    let text = std::fs::read_to_string(&path)
        .unwrap_or_else(|e| panic!("cannot read {}: {e}", path.display()));
    let mut lines = text.lines();
    let header: Vec<String> = lines
        .next()
        .expect("header")
        .split(',')
        .map(str::to_string)
        .collect();
    let mut response = Vec::new();
    let mut weights = Vec::new();
    let mut values = Vec::new();
    for line in lines.filter(|l| !l.trim().is_empty()) {
        let fields: Vec<&str> = line.split(',').collect();
        response.push(fields[0].parse::<usize>().expect("response"));
        weights.push(fields[1].parse::<f64>().expect("weight"));
        for field in &fields[2..] {
            values.push(field.parse::<f64>().expect("design value"));
        }
    }
    let n_columns = header.len() - 2;
    let design = DMatrix::from_row_slice(response.len(), n_columns, &values);
    Dataset {
        response,
        weights,
        design,
        column_names: header[2..].to_vec(),
    }
}

/// `(case, quantity) -> values in index order` from a case,quantity,index,value CSV.
pub fn load_reference(file: &str) -> BTreeMap<(String, String), Vec<f64>> {
    let path = reference_dir().join(file);
    let text = std::fs::read_to_string(&path)
        .unwrap_or_else(|e| panic!("cannot read {}: {e}", path.display()));
    let mut map: BTreeMap<(String, String), Vec<f64>> = BTreeMap::new();
    for line in text.lines().skip(1).filter(|l| !l.trim().is_empty()) {
        let fields: Vec<&str> = line.split(',').collect();
        let index: usize = fields[2].parse().expect("index");
        let value: f64 = fields[3].parse().expect("value");
        let entry = map
            .entry((fields[0].to_string(), fields[1].to_string()))
            .or_default();
        assert_eq!(entry.len(), index, "indices must be in order in {file}");
        entry.push(value);
    }
    map
}

pub fn reference<'a>(
    map: &'a BTreeMap<(String, String), Vec<f64>>,
    case: &str,
    quantity: &str,
) -> &'a [f64] {
    map.get(&(case.to_string(), quantity.to_string()))
        .unwrap_or_else(|| panic!("reference value {case}/{quantity} missing"))
}

/// Relative error `|a - b| / max(|b|, floor)`; the floor keeps values near zero from blowing up.
pub fn relative_error(actual: f64, expected: f64, floor: f64) -> f64 {
    (actual - expected).abs() / expected.abs().max(floor)
}

/// Asserts every element agrees to `tolerance` relative (with absolute floor `floor`) and returns
/// the largest relative error seen, so tests can report agreement.
pub fn assert_close(
    what: &str,
    actual: &[f64],
    expected: &[f64],
    tolerance: f64,
    floor: f64,
) -> f64 {
    assert_eq!(
        actual.len(),
        expected.len(),
        "{what}: length {} vs reference {}",
        actual.len(),
        expected.len()
    );
    let mut worst: f64 = 0.0;
    for (index, (&a, &e)) in actual.iter().zip(expected).enumerate() {
        let error = relative_error(a, e, floor);
        assert!(
            error <= tolerance,
            "{what}[{index}]: got {a:.17e}, reference {e:.17e}, relative error {error:.3e} > {tolerance:.0e}"
        );
        worst = worst.max(error);
    }
    eprintln!("{what}: max relative error {worst:.3e}");
    worst
}
