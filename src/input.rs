//! Reading units and predictions from CSV files.
//!
//! Every error names the file, the data row (1-based, header excluded), the
//! line in the file and the column, so a person can jump straight to it.
//! Nothing is partially accepted: a file either loads whole or not at all.

use std::collections::{HashMap, HashSet};
use std::fmt;
use std::path::{Path, PathBuf};

use ndarray::Array2;

use crate::estimate::{ModelPredictions, OutcomeKind, UnitTable};

/// Columns of a units file that are not features.
pub const UNIT_ID: &str = "unit_id";
pub const TREATMENT: &str = "treatment";
pub const OUTCOME: &str = "outcome";
pub const PROPENSITY: &str = "propensity";

/// A located problem in an input file.
#[derive(Debug, Clone, PartialEq)]
pub struct InputError {
    pub file: PathBuf,
    /// Data row, 1-based (the header is not a data row).
    pub row: Option<usize>,
    pub column: Option<String>,
    pub message: String,
}

impl fmt::Display for InputError {
    fn fmt(&self, f: &mut fmt::Formatter<'_>) -> fmt::Result {
        write!(f, "{}", self.file.display())?;
        if let Some(row) = self.row {
            write!(f, ", row {row} (line {})", row + 1)?;
        }
        if let Some(col) = &self.column {
            write!(f, ", column \"{col}\"")?;
        }
        write!(f, ": {}", self.message)
    }
}

impl std::error::Error for InputError {}

struct Located<'a> {
    file: &'a Path,
}

impl Located<'_> {
    fn err(
        &self,
        row: Option<usize>,
        column: Option<&str>,
        message: impl Into<String>,
    ) -> InputError {
        InputError {
            file: self.file.to_path_buf(),
            row,
            column: column.map(str::to_string),
            message: message.into(),
        }
    }
}

/// Parses a finite number; names the problem otherwise.
fn parse_number(cell: &str) -> Result<f64, String> {
    let trimmed = cell.trim();
    if trimmed.is_empty() {
        return Err("empty cell (a number is required)".into());
    }
    match trimmed.parse::<f64>() {
        Ok(v) if v.is_finite() => Ok(v),
        Ok(v) => Err(format!("{trimmed:?} is {v}, not a finite number")),
        Err(_) => Err(format!("{trimmed:?} is not a number")),
    }
}

/// An open CSV file whose header has been read and checked. Records are
/// parsed one at a time, so a file is never held in memory as text.
struct Sheet {
    header: Vec<String>,
    reader: csv::Reader<std::fs::File>,
}

fn open_sheet(file: &Path) -> Result<Sheet, InputError> {
    let at = Located { file };
    let mut reader = csv::ReaderBuilder::new()
        .has_headers(true)
        .flexible(false)
        .from_path(file)
        .map_err(|e| at.err(None, None, format!("cannot open: {e}")))?;
    let header: Vec<String> = reader
        .headers()
        .map_err(|e| at.err(None, None, format!("cannot read the header row: {e}")))?
        .iter()
        .map(|h| h.trim().to_string())
        .collect();
    let mut seen = HashSet::new();
    for h in &header {
        if h.is_empty() {
            return Err(at.err(None, None, "the header row has an empty column name"));
        }
        if !seen.insert(h.as_str()) {
            return Err(at.err(None, Some(h), "duplicate column in the header row"));
        }
    }
    Ok(Sheet { header, reader })
}

impl Sheet {
    /// Calls `each(row, record)` for every data row (1-based), stopping at
    /// the first error. Fails on a file with no data rows.
    fn for_each(
        &mut self,
        at: &Located<'_>,
        mut each: impl FnMut(usize, &csv::StringRecord) -> Result<(), InputError>,
    ) -> Result<usize, InputError> {
        let mut record = csv::StringRecord::new();
        let mut row = 0;
        loop {
            match self.reader.read_record(&mut record) {
                Ok(true) => {
                    row += 1;
                    each(row, &record)?;
                }
                Ok(false) => break,
                Err(e) => {
                    // The record index counts the header as record 0, so it
                    // is the data row even when quoted cells span lines.
                    let at_row = e
                        .position()
                        .map(|p| p.record() as usize)
                        .filter(|&r| r > 0)
                        .unwrap_or(row + 1);
                    let column = match e.kind() {
                        csv::ErrorKind::Utf8 { err, .. } => self.header.get(err.field()),
                        _ => None,
                    };
                    return Err(at.err(
                        Some(at_row),
                        column.map(String::as_str),
                        format!("malformed CSV record: {e}"),
                    ));
                }
            }
        }
        if row == 0 {
            return Err(at.err(None, None, "no data rows"));
        }
        Ok(row)
    }
}

fn column_index(sheet: &Sheet, at: &Located<'_>, name: &str) -> Result<usize, InputError> {
    sheet
        .header
        .iter()
        .position(|h| h == name)
        .ok_or_else(|| at.err(None, Some(name), "required column is missing"))
}

/// Checks a unit id cell and records it; ids must be non-empty and unique.
fn take_id(
    ids: &mut Vec<String>,
    seen: &mut HashMap<String, usize>,
    at: &Located<'_>,
    row: usize,
    cell: Option<&str>,
) -> Result<(), InputError> {
    let id = cell.unwrap_or("").trim();
    if id.is_empty() {
        return Err(at.err(Some(row), Some(UNIT_ID), "empty unit id"));
    }
    if let Some(first) = seen.insert(id.to_string(), row) {
        return Err(at.err(
            Some(row),
            Some(UNIT_ID),
            format!("unit id {id:?} already appeared in row {first}"),
        ));
    }
    ids.push(id.to_string());
    Ok(())
}

/// A units file: ids, features and factual data.
#[derive(Debug)]
pub struct UnitsFile {
    pub ids: Vec<String>,
    pub feature_names: Vec<String>,
    pub table: UnitTable,
}

/// Reads a units file. `kind` None detects the outcome kind: binary when every
/// outcome is 0 or 1.
pub fn read_units(file: &Path, kind: Option<OutcomeKind>) -> Result<UnitsFile, InputError> {
    let at = Located { file };
    let mut sheet = open_sheet(file)?;
    let id_col = column_index(&sheet, &at, UNIT_ID)?;
    let w_col = column_index(&sheet, &at, TREATMENT)?;
    let y_col = column_index(&sheet, &at, OUTCOME)?;
    let p_col = sheet.header.iter().position(|h| h == PROPENSITY);
    let feature_cols: Vec<usize> = (0..sheet.header.len())
        .filter(|&c| c != id_col && c != w_col && c != y_col && Some(c) != p_col)
        .collect();
    let feature_names: Vec<String> = feature_cols
        .iter()
        .map(|&c| sheet.header[c].clone())
        .collect();
    let header = sheet.header.clone();

    let d = feature_cols.len();
    let (mut ids, mut seen) = (Vec::new(), HashMap::new());
    let mut features = Vec::new();
    let mut treatment = Vec::new();
    let mut outcome = Vec::new();
    let mut propensity = p_col.map(|_| Vec::new());
    let n = sheet.for_each(&at, |row, rec| {
        take_id(&mut ids, &mut seen, &at, row, rec.get(id_col))?;
        let cell = |c: usize| -> Result<f64, InputError> {
            parse_number(rec.get(c).unwrap_or("")).map_err(|m| at.err(Some(row), Some(&header[c]), m))
        };
        for &c in &feature_cols {
            features.push(cell(c)?);
        }
        let w = cell(w_col)?;
        if w != 0.0 && w != 1.0 {
            return Err(at.err(Some(row), Some(TREATMENT), format!("{w} is not 0 or 1")));
        }
        treatment.push(w);
        outcome.push(cell(y_col)?);
        if let (Some(c), Some(p)) = (p_col, propensity.as_mut()) {
            let v = cell(c)?;
            if !(v > 0.0 && v < 1.0) {
                return Err(at.err(
                    Some(row),
                    Some(PROPENSITY),
                    format!("{v} is outside (0, 1): a logged propensity must be strictly between 0 and 1"),
                ));
            }
            p.push(v);
        }
        Ok(())
    })?;
    let binary_values = outcome.iter().all(|&y| y == 0.0 || y == 1.0);
    let kind = match kind {
        Some(k) => k,
        None if binary_values => OutcomeKind::Binary,
        None => OutcomeKind::Continuous,
    };
    if kind == OutcomeKind::Binary {
        if let Some(i) = outcome.iter().position(|&y| y != 0.0 && y != 1.0) {
            return Err(at.err(
                Some(i + 1),
                Some(OUTCOME),
                format!(
                    "{} is not 0 or 1, but the outcome kind is binary",
                    outcome[i]
                ),
            ));
        }
    }
    let features = Array2::from_shape_vec((n, d), features)
        .map_err(|e| at.err(None, None, format!("internal shape error: {e}")))?;
    let table = UnitTable::new(features, treatment, outcome, propensity, kind)
        .map_err(|e| at.err(None, None, e.to_string()))?;
    Ok(UnitsFile {
        ids,
        feature_names,
        table,
    })
}

/// A predictions file: one column of predicted effects per model.
#[derive(Debug)]
pub struct PredictionsFile {
    pub ids: Vec<String>,
    pub models: Vec<String>,
    /// values[model][row]
    pub values: Vec<Vec<f64>>,
}

pub fn read_predictions(file: &Path) -> Result<PredictionsFile, InputError> {
    let at = Located { file };
    let mut sheet = open_sheet(file)?;
    let id_col = column_index(&sheet, &at, UNIT_ID)?;
    let model_cols: Vec<usize> = (0..sheet.header.len()).filter(|&c| c != id_col).collect();
    if model_cols.is_empty() {
        return Err(at.err(
            None,
            None,
            "no model columns: after unit_id, each column holds one model's predicted effects",
        ));
    }
    let header = sheet.header.clone();
    let (mut ids, mut seen) = (Vec::new(), HashMap::new());
    let mut values = vec![Vec::new(); model_cols.len()];
    sheet.for_each(&at, |row, rec| {
        take_id(&mut ids, &mut seen, &at, row, rec.get(id_col))?;
        for (m, &c) in model_cols.iter().enumerate() {
            let v = parse_number(rec.get(c).unwrap_or(""))
                .map_err(|msg| at.err(Some(row), Some(&header[c]), msg))?;
            values[m].push(v);
        }
        Ok(())
    })?;
    Ok(PredictionsFile {
        ids,
        models: model_cols
            .iter()
            .map(|&c| sheet.header[c].clone())
            .collect(),
        values,
    })
}

/// Lines predictions up with the units' rows by unit id. Every unit needs a
/// prediction from every model, and every prediction needs a unit.
pub fn align(
    units: &UnitsFile,
    units_path: &Path,
    preds: &PredictionsFile,
    preds_path: &Path,
) -> Result<Vec<ModelPredictions>, InputError> {
    let position: HashMap<&str, usize> = preds
        .ids
        .iter()
        .enumerate()
        .map(|(i, id)| (id.as_str(), i))
        .collect();
    let unit_ids: HashSet<&str> = units.ids.iter().map(String::as_str).collect();
    if let Some((i, id)) = preds
        .ids
        .iter()
        .enumerate()
        .find(|(_, id)| !unit_ids.contains(id.as_str()))
    {
        return Err(InputError {
            file: preds_path.to_path_buf(),
            row: Some(i + 1),
            column: Some(UNIT_ID.into()),
            message: format!("unit id {id:?} is not in {}", units_path.display()),
        });
    }
    let mut order = Vec::with_capacity(units.ids.len());
    for (i, id) in units.ids.iter().enumerate() {
        match position.get(id.as_str()) {
            Some(&p) => order.push(p),
            None => {
                return Err(InputError {
                    file: units_path.to_path_buf(),
                    row: Some(i + 1),
                    column: Some(UNIT_ID.into()),
                    message: format!(
                        "unit id {id:?} has no predictions in {}",
                        preds_path.display()
                    ),
                })
            }
        }
    }
    Ok(preds
        .models
        .iter()
        .zip(&preds.values)
        .map(|(name, vals)| {
            ModelPredictions::new(name.clone(), order.iter().map(|&p| vals[p]).collect())
        })
        .collect())
}
