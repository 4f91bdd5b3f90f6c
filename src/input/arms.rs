//! The CSV files of a dataset with more than two arms: a units file whose
//! `treatment` column holds arm labels (and whose optional `propensity`
//! column holds the logged probability of the arm the unit got), and a
//! predictions file whose columns are named `MODEL:ARM`, one per model and
//! contrast.

use std::collections::HashMap;
use std::path::Path;

use ndarray::Array2;

use super::{
    column_index, open_sheet, outcome_kind, parse_number, take_id, InputError, Located,
    UnitsLayout, PROPENSITY, TREATMENT, UNIT_ID,
};
use crate::estimate::arms::{ArmModelPredictions, ArmTable};
use crate::estimate::{ModelPredictions, OutcomeKind};

/// A units file of a dataset with several arms.
#[derive(Debug)]
pub struct ArmUnitsFile {
    pub ids: Vec<String>,
    pub feature_names: Vec<String>,
    pub table: ArmTable,
}

/// Reads a units file whose treatments are labels of `arms` (the reference
/// first). An empty `propensity` cell means no logged probability for that
/// unit.
pub fn read_arm_units(
    file: &Path,
    kind: Option<OutcomeKind>,
    arms: &[String],
) -> Result<ArmUnitsFile, InputError> {
    let at = Located { file };
    let mut sheet = open_sheet(file)?;
    let layout = UnitsLayout::of(&sheet, &at)?;
    column_index(&sheet, &at, TREATMENT)?;
    let header = sheet.header.clone();
    let feature_names: Vec<String> = layout.features.iter().map(|&c| header[c].clone()).collect();
    let label: HashMap<&str, usize> = arms
        .iter()
        .enumerate()
        .map(|(k, a)| (a.as_str(), k))
        .collect();
    let (mut ids, mut seen) = (Vec::new(), HashMap::new());
    let (mut features, mut arm, mut outcome, mut logged) =
        (Vec::new(), Vec::new(), Vec::new(), Vec::new());
    sheet.for_each(&at, |row, rec| {
        take_id(&mut ids, &mut seen, &at, row, rec.get(layout.id))?;
        let cell = |j: usize| -> Result<f64, InputError> {
            parse_number(rec.get(j).unwrap_or(""))
                .map_err(|m| at.err(Some(row), Some(&header[j]), m))
        };
        for &j in &layout.features {
            features.push(cell(j)?);
        }
        let given = rec.get(layout.treatment).unwrap_or("").trim();
        match label.get(given) {
            Some(&k) => arm.push(k),
            None => {
                return Err(at.err(
                    Some(row),
                    Some(TREATMENT),
                    format!(
                        "arm {given:?} is not one of the declared arms ({})",
                        arms.join(", ")
                    ),
                ))
            }
        }
        outcome.push(cell(layout.outcome)?);
        if let Some(j) = layout.propensity {
            if rec.get(j).unwrap_or("").trim().is_empty() {
                logged.push(None);
            } else {
                let v = cell(j)?;
                if !(v > 0.0 && v <= 1.0) {
                    return Err(at.err(
                        Some(row),
                        Some(PROPENSITY),
                        format!(
                            "{v} is outside (0, 1]: the logged probability of the arm the unit \
                             got"
                        ),
                    ));
                }
                logged.push(Some(v));
            }
        }
        Ok(())
    })?;
    let n = ids.len();
    let kind = outcome_kind(kind, &outcome, &at)?;
    for (k, name) in arms.iter().enumerate() {
        if !arm.contains(&k) {
            return Err(at.err(
                None,
                Some(TREATMENT),
                format!("declared arm {name:?} has no units"),
            ));
        }
    }
    let features = Array2::from_shape_vec((n, layout.features.len()), features)
        .map_err(|e| at.err(None, None, format!("internal shape error: {e}")))?;
    let table = ArmTable::new(features, arm, outcome, logged, kind, arms.to_vec())
        .map_err(|e| at.err(None, None, e.to_string()))?;
    Ok(ArmUnitsFile {
        ids,
        feature_names,
        table,
    })
}

/// Groups aligned prediction columns named `MODEL:ARM` into one
/// [`ArmModelPredictions`] per model, in the order models first appear.
/// A column with no `:`, an unknown arm or the reference arm is an error
/// naming the column.
pub fn group_arm_predictions(
    columns: Vec<ModelPredictions>,
    arms: &[String],
    file: &Path,
) -> Result<Vec<ArmModelPredictions>, InputError> {
    let at = Located { file };
    let mut models: Vec<ArmModelPredictions> = Vec::new();
    for column in columns {
        let (model, k) = split_arm_column(&column.name, arms)
            .map_err(|m| at.err(None, Some(&column.name), m))?;
        let slot = match models.iter().position(|m| m.name == model) {
            Some(i) => i,
            None => {
                models.push(ArmModelPredictions {
                    name: model.to_string(),
                    effects: vec![None; arms.len() - 1],
                });
                models.len() - 1
            }
        };
        models[slot].effects[k - 1] = Some(column.effects);
    }
    Ok(models)
}

/// A prediction column's `MODEL:ARM` name as the model and the arm's index
/// (never the reference's); the error says what is wrong with the name.
/// `plumbline score --arms` and `plumbline ingest` read columns with it.
pub fn split_arm_column<'a>(name: &'a str, arms: &[String]) -> Result<(&'a str, usize), String> {
    let Some((model, arm)) = name.rsplit_once(':') else {
        return Err(format!(
            "with arms, a prediction column is named MODEL:ARM (the effect of ARM against {})",
            arms[0]
        ));
    };
    let (model, arm) = (model.trim(), arm.trim());
    let k = match arms.iter().position(|a| a == arm) {
        Some(0) => {
            return Err(format!(
                "{arm:?} is the reference arm: effects are against it"
            ))
        }
        Some(k) => k,
        None => {
            return Err(format!(
                "arm {arm:?} is not one of the declared arms ({})",
                arms.join(", ")
            ))
        }
    };
    if model.is_empty() || model == UNIT_ID {
        return Err("empty model name".into());
    }
    Ok((model, k))
}
