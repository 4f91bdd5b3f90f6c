//! `plumbline score`: the offline scoreboard from two CSV files.

use std::path::PathBuf;
use std::process::ExitCode;

use clap::{Args, ValueEnum};

use super::progress::StderrProgress;
use super::{render, EXIT_BAD_INPUT, EXIT_DEGENERATE};
use crate::estimate::crossfit::{NuisanceSettings, Recalibration, RecalibrationChoice};
use crate::estimate::{evaluate, EstimateError, OutcomeKind, Settings};
use crate::input::{align, read_predictions, read_units};
use crate::limits::MIN_FIT_UNITS;

#[derive(Debug, Clone, Copy, ValueEnum)]
pub enum Format {
    /// A ranked report for a person.
    Table,
    /// The full scoreboard as JSON (schema in the README).
    Json,
}

#[derive(Debug, Clone, Copy, ValueEnum)]
pub enum KindArg {
    Continuous,
    Binary,
}

#[derive(Debug, Args)]
pub struct ScoreArgs {
    /// Units CSV: unit_id, treatment (0/1, or an arm label with --arms), outcome, optional propensity (with --arms: of the arm the unit got; may be empty); other columns are numeric features.
    #[arg(long, value_name = "FILE")]
    pub units: PathBuf,
    /// Predictions CSV: unit_id, then one column of predicted effects per model (with --arms: per model and arm, named MODEL:ARM, the effect of ARM against the reference).
    #[arg(long, value_name = "FILE")]
    pub predictions: PathBuf,
    /// Outcome kind; detected from the data when omitted (binary if every outcome is 0 or 1).
    #[arg(long, value_enum)]
    pub outcome_kind: Option<KindArg>,
    /// Number of cross-fitting folds.
    #[arg(long, default_value_t = 5)]
    pub folds: usize,
    /// Seed for folds, inner splits, bootstrap and draw-share draws.
    #[arg(long, default_value_t = 0)]
    pub seed: u64,
    /// Fit the nuisance models on a seeded sample of at most this many units (stratified by arm); every unit is still scored by models that never saw it. Default: every unit.
    #[arg(long, value_name = "UNITS", value_parser = parse_max_fit_units)]
    pub max_fit_units: Option<usize>,
    /// Fold splits the cross-fit is repeated on, each unit's nuisance values averaged over them (less dependence on one split; each split costs a whole cross-fit).
    #[arg(long, value_name = "SPLITS", default_value_t = 1, value_parser = clap::value_parser!(u64).range(1..=20))]
    pub fold_repeats: u64,
    /// Recalibrate the fitted propensity fold by fold (a logistic curve in its logit, fitted on the other folds' out-of-fold propensities; with --arms, matrix scaling, its several-arm form): for a propensity whose report shows a calibration error well above its noise level.
    #[arg(long)]
    pub recalibrate_propensity: bool,
    /// Cost of treating one unit, in outcome units (for policy gain).
    #[arg(long, default_value_t = 0.0)]
    pub cost: f64,
    /// The dataset's arms, the reference first (e.g. none,text,mail): the treatment column holds these labels, and each contrast gets a board.
    #[arg(long, value_name = "REF,ARM,...", value_parser = super::score_arms::parse_arms)]
    pub arms: Option<super::score_arms::ArmList>,
    /// With --arms: cost of giving a unit each arm, in outcome units (ARM=COST,...; 0 where not named).
    #[arg(long, value_name = "ARM=COST,...", requires = "arms")]
    pub arm_cost: Option<String>,
    /// Family-wise level of the best set and the heterogeneity test.
    #[arg(long, default_value_t = 0.05)]
    pub alpha: f64,
    #[arg(long, value_enum, default_value_t = Format::Table)]
    pub format: Format,
    /// Tables with every column: each model's se, its interval taken alone,
    /// every estimator, the share treated and the BLP slope.
    #[arg(long)]
    pub wide: bool,
}

/// The propensity's last stage: chosen by out-of-fold loss, or the logistic
/// curve (matrix scaling with arms, its several-arm form) when asked for.
pub(super) fn recalibration(args: &ScoreArgs) -> RecalibrationChoice {
    if args.recalibrate_propensity {
        RecalibrationChoice::Fixed(Recalibration::Platt)
    } else {
        RecalibrationChoice::ByLoss
    }
}

/// The same floor as the server's `limits.max_fit_units`.
fn parse_max_fit_units(v: &str) -> Result<usize, String> {
    let units: usize = v.parse().map_err(|e| format!("{e}"))?;
    if units < MIN_FIT_UNITS {
        return Err(format!("at least {MIN_FIT_UNITS} units"));
    }
    Ok(units)
}

pub fn run(args: &ScoreArgs) -> ExitCode {
    let kind = args.outcome_kind.map(|k| match k {
        KindArg::Continuous => OutcomeKind::Continuous,
        KindArg::Binary => OutcomeKind::Binary,
    });
    if let Some(arms) = &args.arms {
        return super::score_arms::run(args, &arms.0, kind);
    }
    // The two files are independent until they are aligned: read them at
    // the same time.
    let (units, preds) = std::thread::scope(|s| {
        let preds = s.spawn(|| read_predictions(&args.predictions));
        let units = read_units(&args.units, kind);
        (units, preds.join())
    });
    let loaded = units.and_then(|units| {
        let preds = match preds {
            Ok(p) => p?,
            Err(panic) => std::panic::resume_unwind(panic),
        };
        let models = align(&units, &args.units, preds, &args.predictions)?;
        Ok((units, models))
    });
    let (units, models) = match loaded {
        Ok(v) => v,
        Err(e) => {
            eprintln!("plumbline score: {e}");
            return ExitCode::from(EXIT_BAD_INPUT);
        }
    };
    let settings = Settings {
        nuisance: NuisanceSettings {
            folds: args.folds,
            seed: args.seed,
            max_fit_units: args.max_fit_units,
            fold_repeats: args.fold_repeats as usize,
            propensity_recalibration: recalibration(args),
            ..NuisanceSettings::default()
        },
        cost: args.cost,
        alpha: args.alpha,
        ..Settings::default()
    };
    let progress = StderrProgress::start();
    let result = evaluate(
        &units.table,
        &units.feature_names,
        &models,
        &settings,
        &progress,
    );
    progress.finish();
    let kind = units.table.outcome_kind();
    finish(args, result, |board| {
        render::table(board, kind, args.folds, args.wide)
    })
}

/// Prints a pass's result as `args.format` asks (`table` renders it for a
/// person) and says how the command ends: a degenerate data set exits
/// with [`EXIT_DEGENERATE`], any other error with [`EXIT_BAD_INPUT`].
pub(super) fn finish<B: serde::Serialize>(
    args: &ScoreArgs,
    result: Result<B, EstimateError>,
    table: impl FnOnce(&B) -> String,
) -> ExitCode {
    let board = match result {
        Ok(b) => b,
        Err(EstimateError::Degenerate(state)) => {
            eprintln!(
                "plumbline score: {}: the data cannot support the estimates: {state}",
                args.units.display()
            );
            return ExitCode::from(EXIT_DEGENERATE);
        }
        Err(e) => {
            eprintln!("plumbline score: {e}");
            return ExitCode::from(EXIT_BAD_INPUT);
        }
    };
    let out = match args.format {
        Format::Json => match serde_json::to_string_pretty(&board) {
            Ok(s) => s,
            Err(e) => {
                eprintln!("plumbline score: cannot encode JSON: {e}");
                return ExitCode::FAILURE;
            }
        },
        Format::Table => table(&board),
    };
    println!("{out}");
    ExitCode::SUCCESS
}
