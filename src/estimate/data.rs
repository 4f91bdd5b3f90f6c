//! The arrays the estimation core works on, and the checks that make them
//! safe to compute with.

use std::sync::Arc;

use ndarray::{Array2, ArrayView2, Axis};
use serde::{Deserialize, Serialize};

use super::error::{Degenerate, EstimateError};

/// Whether the outcome is a real number or an event (0/1).
#[derive(Debug, Clone, Copy, PartialEq, Eq, Serialize, Deserialize, Default)]
#[serde(rename_all = "snake_case")]
pub enum OutcomeKind {
    #[default]
    Continuous,
    Binary,
}

impl std::str::FromStr for OutcomeKind {
    type Err = String;
    fn from_str(s: &str) -> Result<Self, String> {
        match s {
            "continuous" => Ok(Self::Continuous),
            "binary" => Ok(Self::Binary),
            other => Err(format!(
                "unknown outcome kind {other:?} (expected continuous or binary)"
            )),
        }
    }
}

/// Units with a factual outcome, one row each.
///
/// Invariant (checked by [`UnitTable::new`]): all columns have `n` rows, every
/// value is finite, treatment is 0 or 1, logged propensities lie strictly in
/// (0, 1), and a binary outcome is 0 or 1.
#[derive(Debug, Clone)]
pub struct UnitTable {
    features: Array2<f64>,
    treatment: Vec<f64>,
    outcome: Vec<f64>,
    logged_propensity: Option<Vec<f64>>,
    outcome_kind: OutcomeKind,
}

impl UnitTable {
    pub fn new(
        features: Array2<f64>,
        treatment: Vec<f64>,
        outcome: Vec<f64>,
        logged_propensity: Option<Vec<f64>>,
        outcome_kind: OutcomeKind,
    ) -> Result<Self, EstimateError> {
        let n = features.nrows();
        if treatment.len() != n || outcome.len() != n {
            return Err(EstimateError::invalid(format!(
                "column lengths differ: {n} feature rows, {} treatments, {} outcomes",
                treatment.len(),
                outcome.len()
            )));
        }
        if let Some(p) = &logged_propensity {
            if p.len() != n {
                return Err(EstimateError::invalid(format!(
                    "{} logged propensities for {n} units",
                    p.len()
                )));
            }
        }
        let features = checked_features(features)?;
        for (row, &w) in treatment.iter().enumerate() {
            if w != 0.0 && w != 1.0 {
                return Err(EstimateError::invalid(format!(
                    "row {row}: treatment {w} is not 0 or 1"
                )));
            }
        }
        for (row, &y) in outcome.iter().enumerate() {
            if !y.is_finite() {
                return Err(EstimateError::invalid(format!(
                    "row {row}: outcome is not finite"
                )));
            }
            if outcome_kind == OutcomeKind::Binary && y != 0.0 && y != 1.0 {
                return Err(EstimateError::invalid(format!(
                    "row {row}: outcome {y} is not 0 or 1 for a binary outcome"
                )));
            }
        }
        if let Some(p) = &logged_propensity {
            for (row, &v) in p.iter().enumerate() {
                if !(v > 0.0 && v < 1.0) {
                    return Err(EstimateError::invalid(format!(
                        "row {row}: logged propensity {v} is outside (0, 1)"
                    )));
                }
            }
        }
        Ok(Self {
            features,
            treatment,
            outcome,
            logged_propensity,
            outcome_kind,
        })
    }

    pub fn len(&self) -> usize {
        self.outcome.len()
    }

    pub fn is_empty(&self) -> bool {
        self.outcome.is_empty()
    }

    pub fn n_features(&self) -> usize {
        self.features.ncols()
    }

    pub fn features(&self) -> ArrayView2<'_, f64> {
        self.features.view()
    }

    /// The feature rows, as the learners and overlap sums read them.
    pub fn rows(&self) -> FeatureRows<'_> {
        // `new` keeps the matrix in row-major layout, so the slice exists.
        FeatureRows::dense(
            self.features.as_slice().unwrap_or(&[]),
            self.features.ncols(),
        )
    }

    /// Treatment as 0.0 / 1.0, so it enters formulas directly.
    pub fn treatment(&self) -> &[f64] {
        &self.treatment
    }

    pub fn outcome(&self) -> &[f64] {
        &self.outcome
    }

    pub fn logged_propensity(&self) -> Option<&[f64]> {
        self.logged_propensity.as_deref()
    }

    pub fn outcome_kind(&self) -> OutcomeKind {
        self.outcome_kind
    }

    pub fn n_treated(&self) -> usize {
        self.treatment.iter().filter(|&&w| w == 1.0).count()
    }

    /// The states that make every estimate meaningless, checked up front.
    pub fn check_estimable(&self, folds: usize, per_fold: usize) -> Result<(), Degenerate> {
        let treated = self.n_treated();
        let control = self.len() - treated;
        for (arm, units) in [("treated", treated), ("control", control)] {
            if units == 0 {
                return Err(Degenerate::EmptyArm { arm: arm.into() });
            }
        }
        for (arm, units) in [("treated", treated), ("control", control)] {
            let needed = folds * per_fold;
            if units < needed {
                return Err(Degenerate::TooFewUnitsPerFold {
                    arm: arm.into(),
                    units,
                    folds,
                    per_fold,
                    needed,
                });
            }
        }
        let first = self.outcome[0];
        if self.outcome.iter().all(|&y| y == first) {
            return Err(Degenerate::ConstantOutcome { value: first });
        }
        Ok(())
    }
}

/// `features` with every value finite, in row-major layout (so that its
/// rows are contiguous slices for [`FeatureRows::dense`]); a value that is
/// not finite is an error naming its row and column.
pub(crate) fn checked_features(features: Array2<f64>) -> Result<Array2<f64>, EstimateError> {
    for (row, x) in features.outer_iter().enumerate() {
        if let Some(col) = x.iter().position(|v| !v.is_finite()) {
            return Err(EstimateError::invalid(format!(
                "row {row}: feature {col} is not finite"
            )));
        }
    }
    Ok(if features.is_standard_layout() {
        features
    } else {
        features.as_standard_layout().into_owned()
    })
}

/// Rows of features read in place: one row-major matrix, or chosen rows of
/// a store kept in fixed-size chunks (the service's cache), or chosen rows
/// of either (a capped cross-fit's sample), so that a refit or a scored
/// window reads the history's features where they are instead of copying
/// them. Every row is a contiguous slice of `width` values.
#[derive(Debug, Clone, Copy)]
pub struct FeatureRows<'a> {
    width: usize,
    layout: Layout<'a>,
}

#[derive(Debug, Clone, Copy)]
enum Layout<'a> {
    /// `values.len() / width` rows, one after another.
    Dense { values: &'a [f64] },
    /// Row `i` is stored row `index[i]`: chunk `index[i] / chunk_rows`,
    /// position `index[i] % chunk_rows` within it.
    Chunked {
        chunks: &'a [Arc<Vec<f64>>],
        chunk_rows: usize,
        index: &'a [usize],
    },
    /// Row `i` is row `index[i]` of `from`: a sample of a cross-fit's
    /// units, read where their rows already are.
    Picked {
        from: &'a FeatureRows<'a>,
        index: &'a [usize],
    },
}

impl<'a> FeatureRows<'a> {
    /// Rows laid out one after another, `width` values each.
    pub fn dense(values: &'a [f64], width: usize) -> Self {
        Self {
            width,
            layout: Layout::Dense { values },
        }
    }

    /// The rows of a row-major matrix; None for another layout.
    pub fn of_matrix(x: ArrayView2<'a, f64>) -> Option<Self> {
        let width = x.ncols();
        x.to_slice().map(|values| Self::dense(values, width))
    }

    /// Rows `index` of a store whose rows sit `chunk_rows` to a chunk.
    pub fn chunked(
        chunks: &'a [Arc<Vec<f64>>],
        chunk_rows: usize,
        width: usize,
        index: &'a [usize],
    ) -> Self {
        Self {
            width,
            layout: Layout::Chunked {
                chunks,
                chunk_rows,
                index,
            },
        }
    }

    /// Rows `index` of these rows, in that order, read in place.
    pub fn picked<'b>(&'b self, index: &'b [usize]) -> FeatureRows<'b>
    where
        'a: 'b,
    {
        FeatureRows {
            width: self.width,
            layout: Layout::Picked { from: self, index },
        }
    }

    /// Number of rows.
    pub fn len(&self) -> usize {
        match self.layout {
            Layout::Dense { values } => values.len().checked_div(self.width).unwrap_or(0),
            Layout::Chunked { index, .. } | Layout::Picked { index, .. } => index.len(),
        }
    }

    pub fn is_empty(&self) -> bool {
        self.len() == 0
    }

    /// Values per row.
    pub fn width(&self) -> usize {
        self.width
    }

    /// Row `i`.
    #[inline]
    pub fn row(&self, i: usize) -> &'a [f64] {
        let d = self.width;
        match self.layout {
            Layout::Dense { values } => &values[i * d..(i + 1) * d],
            Layout::Chunked {
                chunks,
                chunk_rows,
                index,
            } => {
                let u = index[i];
                let at = (u % chunk_rows) * d;
                &chunks[u / chunk_rows][at..at + d]
            }
            Layout::Picked { from, index } => from.row_for_pick(index[i]),
        }
    }

    /// Row `u`, for rows picked from these. Kept out of line so that
    /// [`FeatureRows::row`] never calls itself: a function that does is
    /// not inlined, and the plain layouts' rows are read in hot loops.
    #[inline(never)]
    fn row_for_pick(&self, u: usize) -> &'a [f64] {
        self.row(u)
    }

    /// A copy of the rows `rows` as a matrix.
    pub fn select(&self, rows: &[usize]) -> Array2<f64> {
        let mut out = Array2::zeros((rows.len(), self.width));
        for (mut o, &r) in out.axis_iter_mut(Axis(0)).zip(rows) {
            for (o, v) in o.iter_mut().zip(self.row(r)) {
                *o = *v;
            }
        }
        out
    }
}

/// One model's predicted effects, aligned with the rows of a [`UnitTable`].
#[derive(Debug, Clone)]
pub struct ModelPredictions {
    pub name: String,
    pub effects: Vec<f64>,
    /// Built-in reference models are scored like any other but labelled.
    pub baseline: bool,
}

impl ModelPredictions {
    pub fn new(name: impl Into<String>, effects: Vec<f64>) -> Self {
        Self {
            name: name.into(),
            effects,
            baseline: false,
        }
    }
}

/// Name of the built-in model that predicts no effect for anyone.
pub const ZERO_EFFECT: &str = "zero-effect";
/// Name of the built-in model that predicts the dataset's AIPW ATE for everyone.
pub const CONSTANT_EFFECT: &str = "constant-effect";
