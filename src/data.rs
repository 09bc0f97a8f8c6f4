//! Loads the labelled source into a [`Dataset`]: a feature matrix, labels and
//! stable row ids (the 0-based position of the row in the file).
//!
//! This module owns reading and checking values. It knows nothing of splits or
//! models: the split column, if any, is handed on as text for `split` to judge.
//! Every refusal names the file, the column and the first offending file lines
//! (the header is line 1, so data row `i` is line `i + 2`; a quoted field that
//! spans lines would shift this, and anomark does not count such breaks).

use std::path::{Path, PathBuf};
use std::sync::Arc;

use ndarray::Array2;
use polars::prelude::*;

use crate::error::{Error, Location, Result};
use crate::spec::{Column, Plan, SplitPlan};

/// How many offending lines an error lists.
const SHOWN: usize = 5;

/// A row's 0-based position in the source file.
#[derive(Debug, Clone, Copy, PartialEq, Eq, PartialOrd, Ord, Hash, serde::Serialize)]
pub struct RowId(pub u64);

impl RowId {
    /// The row's line in the file, counting the header as line 1.
    pub fn line(self) -> u64 {
        self.0 + 2
    }
}

/// The labelled examples, checked.
#[derive(Debug, Clone)]
pub struct Dataset {
    /// The source file.
    pub path: PathBuf,
    /// Feature names, in spec order.
    pub features: Vec<String>,
    /// Feature values, one row per source row (`n × d`), all finite.
    pub x: Array2<f64>,
    /// `true` for a known anomaly, `false` for a normal example.
    pub is_anomaly: Vec<bool>,
    /// The id column's values, when the spec names one.
    pub ids: Option<Vec<String>>,
    /// The split column's values, when the split comes from a column.
    pub split_column: Option<Vec<String>>,
}

impl Dataset {
    /// Number of rows.
    pub fn len(&self) -> usize {
        self.is_anomaly.len()
    }

    /// `true` when there are no rows.
    pub fn is_empty(&self) -> bool {
        self.is_anomaly.is_empty()
    }
}

fn data_error(path: &Path, column: &str, message: String, bad: &[usize]) -> Error {
    Error::Data {
        path: path.to_path_buf(),
        column: Some(column.to_string()),
        message,
        lines: bad
            .iter()
            .take(SHOWN)
            .map(|&i| RowId(i as u64).line())
            .collect(),
        total: bad.len(),
    }
}

fn csv_error(path: &Path, e: PolarsError) -> Error {
    Error::Csv {
        path: path.to_path_buf(),
        message: e.to_string(),
    }
}

fn read(path: &Path, options: CsvReadOptions) -> Result<DataFrame> {
    options
        .try_into_reader_with_file_path(Some(path.to_path_buf()))
        .and_then(|r| r.finish())
        .map_err(|e| csv_error(path, e))
}

fn base_options() -> CsvReadOptions {
    // Only the empty field counts as missing; "NA" and the like are refused as
    // non-numeric so that nobody's missing-value convention is guessed at.
    CsvReadOptions::default()
        .with_has_header(true)
        .with_raise_if_empty(true)
}

/// The header's column names.
fn header(path: &Path) -> Result<Vec<String>> {
    if let Err(e) = std::fs::metadata(path) {
        return Err(Error::io(path, "reading data", e));
    }
    let df = read(
        path,
        base_options()
            .with_n_rows(Some(0))
            .with_infer_schema_length(Some(0)),
    )?;
    Ok(df
        .get_column_names()
        .iter()
        .map(|s| s.to_string())
        .collect())
}

fn missing_column(plan: &Plan, c: &Column, present: &[String]) -> Error {
    let text = String::from_utf8_lossy(&plan.spec_bytes);
    let line_text = text.lines().nth(c.at.line - 1).unwrap_or("").to_string();
    let mut shown: Vec<String> = present.iter().take(12).map(|p| format!("`{p}`")).collect();
    if present.len() > 12 {
        shown.push(format!("and {} more", present.len() - 12));
    }
    Error::Spec {
        at: Location { ..c.at.clone() },
        field: c.field.clone(),
        message: format!(
            "column `{}` is not in `{}` (its columns: {})",
            c.name,
            plan.data_path.display(),
            shown.join(", ")
        ),
        line_text,
    }
}

/// Loads and checks the data the plan names.
pub fn load(plan: &Plan) -> Result<Dataset> {
    let path = plan.data_path.as_path();
    let present = header(path)?;
    let split_col = match &plan.split {
        SplitPlan::FromColumn(c) => Some(c),
        SplitPlan::Protocol { .. } => None,
    };
    let text_cols: Vec<&Column> = std::iter::once(&plan.label)
        .chain(plan.id_column.iter())
        .chain(split_col)
        .collect();
    for c in plan.features.iter().chain(text_cols.iter().copied()) {
        if !present.contains(&c.name) {
            return Err(missing_column(plan, c, &present));
        }
    }

    let mut schema = Schema::default();
    for f in &plan.features {
        schema.with_column(f.name.as_str().into(), DataType::Float64);
    }
    for c in &text_cols {
        schema.with_column(c.name.as_str().into(), DataType::String);
    }
    let wanted: Arc<[PlSmallStr]> = plan
        .features
        .iter()
        .chain(text_cols.iter().copied())
        .map(|c| PlSmallStr::from_str(&c.name))
        .collect();
    let typed = read(
        path,
        base_options()
            .with_columns(Some(wanted.clone()))
            .with_schema_overwrite(Some(Arc::new(schema))),
    );
    let df = match typed {
        Ok(df) => df,
        // A value that does not parse as a number: read the feature columns as
        // text to name the rows. Only the failing path pays for this.
        Err(typed_err) => {
            diagnose_text(plan, path, &wanted)?;
            return Err(typed_err);
        }
    };

    let n = df.height();
    let d = plan.features.len();
    let mut x = Array2::<f64>::zeros((n, d));
    for (j, f) in plan.features.iter().enumerate() {
        let col = df
            .column(&f.name)
            .and_then(|c| c.f64().cloned())
            .map_err(|e| csv_error(path, e))?;
        let mut missing = Vec::new();
        let mut non_finite = Vec::new();
        for (i, v) in col.iter().enumerate() {
            match v {
                None => missing.push(i),
                Some(v) if !v.is_finite() => non_finite.push(i),
                Some(v) => x[(i, j)] = if v == 0.0 { 0.0 } else { v },
            }
        }
        if !missing.is_empty() {
            return Err(data_error(
                path,
                &f.name,
                "a feature value is missing".into(),
                &missing,
            ));
        }
        if !non_finite.is_empty() {
            return Err(data_error(
                path,
                &f.name,
                "a feature value is not a finite number".into(),
                &non_finite,
            ));
        }
    }

    let labels = text_column(&df, path, &plan.label.name)?;
    let mut is_anomaly = Vec::with_capacity(n);
    let mut bad = Vec::new();
    for (i, v) in labels.iter().enumerate() {
        match v.as_deref() {
            Some(s) if s == plan.normal_value => is_anomaly.push(false),
            Some(s) if s == plan.anomaly_value => is_anomaly.push(true),
            _ => {
                bad.push(i);
                is_anomaly.push(false);
            }
        }
    }
    if !bad.is_empty() {
        let first = labels[bad[0]].as_deref().unwrap_or("");
        return Err(data_error(
            path,
            &plan.label.name,
            format!(
                "label `{first}` is neither the normal value `{}` nor the anomaly value `{}`",
                plan.normal_value, plan.anomaly_value
            ),
            &bad,
        ));
    }

    let ids = match &plan.id_column {
        Some(c) => {
            let v = text_column(&df, path, &c.name)?;
            let empty: Vec<usize> = (0..n).filter(|&i| v[i].is_none()).collect();
            if !empty.is_empty() {
                return Err(data_error(path, &c.name, "an id is missing".into(), &empty));
            }
            Some(v.into_iter().map(|s| s.unwrap_or_default()).collect())
        }
        None => None,
    };
    let split_column = match split_col {
        Some(c) => Some(
            text_column(&df, path, &c.name)?
                .into_iter()
                .map(|s| s.unwrap_or_default())
                .collect(),
        ),
        None => None,
    };

    Ok(Dataset {
        path: path.to_path_buf(),
        features: plan.feature_names(),
        x,
        is_anomaly,
        ids,
        split_column,
    })
}

fn text_column(df: &DataFrame, path: &Path, name: &str) -> Result<Vec<Option<String>>> {
    let col = df
        .column(name)
        .and_then(|c| c.str().cloned())
        .map_err(|e| csv_error(path, e))?;
    Ok(col.iter().map(|s| s.map(str::to_string)).collect())
}

/// Reads the wanted columns as text and reports the first feature column with
/// a value that is missing or not a number.
fn diagnose_text(plan: &Plan, path: &Path, wanted: &Arc<[PlSmallStr]>) -> Result<()> {
    let df = read(
        path,
        base_options()
            .with_columns(Some(wanted.clone()))
            .with_infer_schema_length(Some(0)),
    )?;
    for f in &plan.features {
        let values = text_column(&df, path, &f.name)?;
        let mut missing = Vec::new();
        let mut not_number = Vec::new();
        for (i, v) in values.iter().enumerate() {
            match v.as_deref().map(str::trim) {
                None | Some("") => missing.push(i),
                Some(s) => match s.parse::<f64>() {
                    Ok(v) if v.is_finite() => {}
                    _ => not_number.push(i),
                },
            }
        }
        if !not_number.is_empty() {
            let first = values[not_number[0]].as_deref().unwrap_or("");
            return Err(data_error(
                path,
                &f.name,
                format!("value `{first}` is not a number"),
                &not_number,
            ));
        }
        if !missing.is_empty() {
            return Err(data_error(
                path,
                &f.name,
                "a feature value is missing".into(),
                &missing,
            ));
        }
    }
    Ok(())
}
