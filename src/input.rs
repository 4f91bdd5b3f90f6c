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

mod arms;
mod fast;

pub use arms::{group_arm_predictions, read_arm_units, split_arm_column, ArmUnitsFile};

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

/// Where the columns of a units file are.
struct UnitsLayout {
    width: usize,
    id: usize,
    treatment: usize,
    outcome: usize,
    propensity: Option<usize>,
    features: Vec<usize>,
}

impl UnitsLayout {
    /// The layout a units file's header gives; the id, treatment and
    /// outcome columns are required, every unnamed column is a feature.
    fn of(sheet: &Sheet, at: &Located<'_>) -> Result<Self, InputError> {
        let id = column_index(sheet, at, UNIT_ID)?;
        let treatment = column_index(sheet, at, TREATMENT)?;
        let outcome = column_index(sheet, at, OUTCOME)?;
        let propensity = sheet.header.iter().position(|h| h == PROPENSITY);
        let width = sheet.header.len();
        Ok(Self {
            width,
            id,
            treatment,
            outcome,
            propensity,
            features: (0..width)
                .filter(|&c| c != id && c != treatment && c != outcome && Some(c) != propensity)
                .collect(),
        })
    }
}

/// The data columns of a units file, row by row.
#[derive(Default)]
struct UnitColumns {
    ids: Vec<String>,
    /// Row-major, one row of features per unit.
    features: Vec<f64>,
    treatment: Vec<f64>,
    outcome: Vec<f64>,
    propensity: Option<Vec<f64>>,
}

impl UnitColumns {
    fn new(layout: &UnitsLayout) -> Self {
        Self {
            propensity: layout.propensity.map(|_| Vec::new()),
            ..Self::default()
        }
    }

    /// Room for every piece's rows at once.
    fn reserve(&mut self, pieces: &[UnitColumns]) {
        let rows: usize = pieces.iter().map(|p| p.ids.len()).sum();
        let values: usize = pieces.iter().map(|p| p.features.len()).sum();
        self.ids.reserve(rows);
        self.features.reserve(values);
        self.treatment.reserve(rows);
        self.outcome.reserve(rows);
        if let Some(p) = self.propensity.as_mut() {
            p.reserve(rows);
        }
    }

    fn append(&mut self, mut other: UnitColumns) {
        self.ids.append(&mut other.ids);
        self.features.append(&mut other.features);
        self.treatment.append(&mut other.treatment);
        self.outcome.append(&mut other.outcome);
        if let (Some(p), Some(q)) = (self.propensity.as_mut(), other.propensity.as_mut()) {
            p.append(q);
        }
    }
}

/// The units file's rows by the parallel fast path ([`fast`]); None when it
/// does not apply or any row breaks a rule, and the careful reader must
/// read the file (and name the first problem).
fn units_fast(file: &Path, start: u64, layout: &UnitsLayout) -> Option<UnitColumns> {
    let pieces = fast::pieces(file, start, |piece| {
        let mut c = UnitColumns::new(layout);
        fast::each_row(piece, layout.width, |cells| {
            let id = cells[layout.id].trim();
            if id.is_empty() {
                return None;
            }
            c.ids.push(id.to_string());
            for &j in &layout.features {
                c.features.push(parse_number(cells[j]).ok()?);
            }
            let w = parse_number(cells[layout.treatment]).ok()?;
            if w != 0.0 && w != 1.0 {
                return None;
            }
            c.treatment.push(w);
            c.outcome.push(parse_number(cells[layout.outcome]).ok()?);
            if let (Some(j), Some(p)) = (layout.propensity, c.propensity.as_mut()) {
                let v = parse_number(cells[j]).ok()?;
                if !(v > 0.0 && v < 1.0) {
                    return None;
                }
                p.push(v);
            }
            Some(())
        })?;
        Some(c)
    })?;
    let mut all = UnitColumns::new(layout);
    all.reserve(&pieces);
    for piece in pieces {
        all.append(piece);
    }
    (!all.ids.is_empty() && ids_unique(&all.ids)).then_some(all)
}

/// Whether no id appears twice.
fn ids_unique(ids: &[String]) -> bool {
    let mut seen = HashSet::with_capacity(ids.len());
    ids.iter().all(|id| seen.insert(id.as_str()))
}

/// The units file's rows by the careful reader, stopping at the first
/// problem with its row and column.
fn units_careful(
    sheet: &mut Sheet,
    at: &Located<'_>,
    layout: &UnitsLayout,
) -> Result<UnitColumns, InputError> {
    let header = sheet.header.clone();
    let mut c = UnitColumns::new(layout);
    let mut seen = HashMap::new();
    sheet.for_each(at, |row, rec| {
        take_id(&mut c.ids, &mut seen, at, row, rec.get(layout.id))?;
        let cell = |j: usize| -> Result<f64, InputError> {
            parse_number(rec.get(j).unwrap_or("")).map_err(|m| at.err(Some(row), Some(&header[j]), m))
        };
        for &j in &layout.features {
            c.features.push(cell(j)?);
        }
        let w = cell(layout.treatment)?;
        if w != 0.0 && w != 1.0 {
            return Err(at.err(Some(row), Some(TREATMENT), format!("{w} is not 0 or 1")));
        }
        c.treatment.push(w);
        c.outcome.push(cell(layout.outcome)?);
        if let (Some(j), Some(p)) = (layout.propensity, c.propensity.as_mut()) {
            let v = cell(j)?;
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
    Ok(c)
}

/// The outcome kind given, or detected when `kind` is None (binary when
/// every outcome is 0 or 1); a binary kind with another value is an error
/// naming its row.
fn outcome_kind(
    kind: Option<OutcomeKind>,
    outcome: &[f64],
    at: &Located<'_>,
) -> Result<OutcomeKind, InputError> {
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
    Ok(kind)
}

/// Reads a units file. `kind` None detects the outcome kind: binary when every
/// outcome is 0 or 1.
pub fn read_units(file: &Path, kind: Option<OutcomeKind>) -> Result<UnitsFile, InputError> {
    let at = Located { file };
    let mut sheet = open_sheet(file)?;
    let layout = UnitsLayout::of(&sheet, &at)?;
    let feature_names: Vec<String> = layout
        .features
        .iter()
        .map(|&c| sheet.header[c].clone())
        .collect();
    let d = layout.features.len();
    let start = sheet.reader.position().byte();
    let UnitColumns {
        ids,
        features,
        treatment,
        outcome,
        propensity,
    } = match units_fast(file, start, &layout) {
        Some(c) => c,
        None => units_careful(&mut sheet, &at, &layout)?,
    };
    let n = ids.len();
    let kind = outcome_kind(kind, &outcome, &at)?;
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
    /// `values[model][row]`
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
    let start = sheet.reader.position().byte();
    let (ids, values) = match predictions_fast(file, start, header.len(), id_col, &model_cols) {
        Some(v) => v,
        None => {
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
            (ids, values)
        }
    };
    Ok(PredictionsFile {
        ids,
        models: model_cols.iter().map(|&c| header[c].clone()).collect(),
        values,
    })
}

/// Ids and values per model: the predictions file by the parallel fast path;
/// None when the careful reader must read it (see [`units_fast`]).
fn predictions_fast(
    file: &Path,
    start: u64,
    width: usize,
    id_col: usize,
    model_cols: &[usize],
) -> Option<(Vec<String>, Vec<Vec<f64>>)> {
    let pieces = fast::pieces(file, start, |piece| {
        let mut ids = Vec::new();
        let mut values = vec![Vec::new(); model_cols.len()];
        fast::each_row(piece, width, |cells| {
            let id = cells[id_col].trim();
            if id.is_empty() {
                return None;
            }
            ids.push(id.to_string());
            for (v, &c) in values.iter_mut().zip(model_cols) {
                v.push(parse_number(cells[c]).ok()?);
            }
            Some(())
        })?;
        Some((ids, values))
    })?;
    let rows: usize = pieces.iter().map(|p| p.0.len()).sum();
    let mut ids = Vec::with_capacity(rows);
    let (piece_ids, mut piece_values): (Vec<_>, Vec<_>) = pieces.into_iter().unzip();
    for mut p in piece_ids {
        ids.append(&mut p);
    }
    // One model's column at a time, each piece's part freed once copied:
    // the file's values are held about once, not twice (a sweep of a
    // thousand models at 100,000 units is 763 MiB of them).
    let values = (0..model_cols.len())
        .map(|m| {
            let mut column = Vec::with_capacity(rows);
            for piece in piece_values.iter_mut() {
                column.extend_from_slice(&std::mem::take(&mut piece[m]));
            }
            column
        })
        .collect();
    (!ids.is_empty() && ids_unique(&ids)).then_some((ids, values))
}

/// Lines predictions up with the units' rows by unit id. Every unit needs a
/// prediction from every model, and every prediction needs a unit.
///
/// Takes the file's columns: a column that lines up is moved, one that
/// does not is reordered and its source freed, so the predictions are held
/// about once.
pub fn align(
    units: &UnitsFile,
    units_path: &Path,
    preds: PredictionsFile,
    preds_path: &Path,
) -> Result<Vec<ModelPredictions>, InputError> {
    align_ids(&units.ids, units_path, preds, preds_path)
}

/// [`align`] for the units whose ids are `unit_ids`, in their file's order
/// (a units file of a dataset with several arms, too).
pub fn align_ids(
    unit_ids: &[String],
    units_path: &Path,
    preds: PredictionsFile,
    preds_path: &Path,
) -> Result<Vec<ModelPredictions>, InputError> {
    // Files written together list the units in the same order: then the
    // columns line up as they are, with no lookup.
    if preds.ids == *unit_ids {
        return Ok(preds
            .models
            .into_iter()
            .zip(preds.values)
            .map(|(name, vals)| ModelPredictions::new(name, vals))
            .collect());
    }
    let position: HashMap<&str, usize> = preds
        .ids
        .iter()
        .enumerate()
        .map(|(i, id)| (id.as_str(), i))
        .collect();
    let known: HashSet<&str> = unit_ids.iter().map(String::as_str).collect();
    if let Some((i, id)) = preds
        .ids
        .iter()
        .enumerate()
        .find(|(_, id)| !known.contains(id.as_str()))
    {
        return Err(InputError {
            file: preds_path.to_path_buf(),
            row: Some(i + 1),
            column: Some(UNIT_ID.into()),
            message: format!("unit id {id:?} is not in {}", units_path.display()),
        });
    }
    let mut order = Vec::with_capacity(unit_ids.len());
    for (i, id) in unit_ids.iter().enumerate() {
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
    drop(position);
    Ok(preds
        .models
        .into_iter()
        .zip(preds.values)
        .map(|(name, vals)| ModelPredictions::new(name, order.iter().map(|&p| vals[p]).collect()))
        .collect())
}

#[cfg(test)]
mod tests {
    use super::*;

    /// A file in the system's temporary directory, removed on drop.
    struct Temp(PathBuf);

    impl Temp {
        fn with(name: &str, text: &str) -> Self {
            let path = std::env::temp_dir()
                .join(format!("plumbline-input-{}-{name}.csv", std::process::id()));
            std::fs::write(&path, text).expect("write temporary file");
            Self(path)
        }
    }

    impl Drop for Temp {
        fn drop(&mut self) {
            let _ = std::fs::remove_file(&self.0);
        }
    }

    fn units_text(rows: usize, line_break: &str) -> String {
        let mut s = format!("unit_id,x1,treatment,outcome,propensity,x2{line_break}");
        for i in 0..rows {
            s.push_str(&format!(
                "u{i}, {}.25,{},{},0.{},-{}e-3{line_break}",
                i % 17,
                i % 2,
                (i as f64) / 7.0,
                1 + i % 9,
                i
            ));
        }
        s
    }

    fn both_paths(file: &Path) -> (Option<UnitColumns>, UnitColumns) {
        let at = Located { file };
        let mut sheet = open_sheet(file).expect("header");
        let layout = UnitsLayout::of(&sheet, &at).expect("layout");
        let start = sheet.reader.position().byte();
        let fast = units_fast(file, start, &layout);
        let careful = units_careful(&mut sheet, &at, &layout).expect("careful read");
        (fast, careful)
    }

    fn same(a: &UnitColumns, b: &UnitColumns) -> bool {
        let bits = |v: &[f64]| v.iter().map(|x| x.to_bits()).collect::<Vec<_>>();
        a.ids == b.ids
            && bits(&a.features) == bits(&b.features)
            && bits(&a.treatment) == bits(&b.treatment)
            && bits(&a.outcome) == bits(&b.outcome)
            && a.propensity.as_deref().map(bits) == b.propensity.as_deref().map(bits)
    }

    #[test]
    fn the_fast_path_reads_plain_files_as_the_careful_reader_does() {
        for (name, line_break) in [("lf", "\n"), ("crlf", "\r\n")] {
            // Enough rows for several parallel pieces.
            let f = Temp::with(name, &units_text(60_000, line_break));
            let (fast, careful) = both_paths(&f.0);
            let fast = fast.expect("a plain file takes the fast path");
            assert_eq!(fast.ids.len(), 60_000);
            assert!(same(&fast, &careful), "{name}");
        }
    }

    #[test]
    fn files_the_fast_path_declines_are_read_carefully() {
        // A quoted id with a comma inside: the careful reader takes it.
        let text = units_text(50, "\n").replace("u7,", "\"u,7\",");
        let f = Temp::with("quoted", &text);
        let (fast, careful) = both_paths(&f.0);
        assert!(fast.is_none());
        assert_eq!(careful.ids[7], "u,7");
        let read = read_units(&f.0, None).expect("read");
        assert_eq!(read.ids[7], "u,7");

        // A repeated id: declined by the fast path, named by the careful one.
        let text = units_text(50, "\n").replace("u9,", "u3,");
        let f = Temp::with("repeated", &text);
        let e = read_units(&f.0, None).expect_err("repeated id");
        assert_eq!(e.row, Some(10));
        assert!(e.message.contains("row 4"), "{e}");
    }
}
