//! `plumbline simulate`: writes a units / predictions CSV pair drawn from a
//! published design with known effects, for trying `score` and for
//! benchmarks. The true effect is written to a third file so results can be
//! checked.

use std::fs::File;
use std::io::{BufWriter, Write};
use std::path::PathBuf;
use std::process::ExitCode;

use clap::Args;
use ndarray::Array2;

use super::client::{print_json, Output};
use super::EXIT_BAD_INPUT;
use crate::synth::{
    candidates, draw, draw_arms, effect_moments, Candidate, Design, ARM_EFFECT_MOMENTS, ARM_NAMES,
};

#[derive(Debug, Args)]
pub struct SimulateArgs {
    /// nie-wager-a|b|c|d, wager-athey-heterogeneous, wager-athey-confounded, or three-arms (arms none, text and mail: score it with --arms none,text,mail).
    #[arg(long, default_value = "nie-wager-b")]
    pub design: String,
    #[arg(long, default_value_t = 5000)]
    pub units: usize,
    /// Number of features (at least 5).
    #[arg(long, default_value_t = 10)]
    pub features: usize,
    /// Number of candidate models (1 to 10).
    #[arg(long, default_value_t = 10)]
    pub models: usize,
    /// Noise sd of the outcome.
    #[arg(long, default_value_t = 1.0)]
    pub sigma: f64,
    #[arg(long, default_value_t = 1)]
    pub seed: u64,
    /// Directory for units.csv, predictions.csv and truth.csv.
    #[arg(long, value_name = "DIR")]
    pub out: PathBuf,
    /// table: a line on stderr; json: what was written, on stdout.
    #[arg(long, value_enum, default_value_t = Output::Table)]
    pub format: Output,
}

/// units.csv: `unit_id`, `treatment` (what `treatment(i)` writes: 0 or 1,
/// or an arm's label), `outcome`, then the features x1, x2, ...
fn write_units<T: std::fmt::Display>(
    args: &SimulateArgs,
    features: &Array2<f64>,
    outcome: &[f64],
    treatment: impl Fn(usize) -> T,
) -> std::io::Result<()> {
    let mut units = BufWriter::new(File::create(args.out.join("units.csv"))?);
    write!(units, "unit_id,treatment,outcome")?;
    for j in 0..features.ncols() {
        write!(units, ",x{}", j + 1)?;
    }
    writeln!(units)?;
    for (i, y) in outcome.iter().enumerate() {
        write!(units, "u{i},{},{y}", treatment(i))?;
        for v in features.row(i) {
            write!(units, ",{v}")?;
        }
        writeln!(units)?;
    }
    units.flush()
}

/// The design key of the three-arm draw ([`draw_arms`]).
const THREE_ARMS: &str = "three-arms";

/// The three-arm files: units.csv with arm labels in `treatment`,
/// predictions.csv with a `MODEL:ARM` column per model and contrast, and
/// truth.csv with each model's true PEHE per contrast. Returns what
/// truth.csv holds.
fn write_arms(args: &SimulateArgs) -> std::io::Result<Vec<ModelTruth>> {
    std::fs::create_dir_all(&args.out)?;
    let data = draw_arms(args.units, args.features, args.sigma, args.seed);
    // One set of candidates per contrast, under the same names.
    let per_contrast: Vec<Vec<Candidate>> = data
        .tau
        .iter()
        .zip(ARM_EFFECT_MOMENTS)
        .enumerate()
        .map(|(c, (tau, (_, var)))| {
            candidates(
                tau,
                var,
                args.models.clamp(1, 10),
                args.seed ^ 0xfeed ^ (c as u64 + 1),
            )
        })
        .collect();

    write_units(args, &data.features, &data.outcome, |i| {
        ARM_NAMES[data.arm[i]]
    })?;

    let mut preds = BufWriter::new(File::create(args.out.join("predictions.csv"))?);
    write!(preds, "unit_id")?;
    for (c, models) in per_contrast.iter().enumerate() {
        for m in models {
            write!(preds, ",{}:{}", m.predictions.name, ARM_NAMES[c + 1])?;
        }
    }
    writeln!(preds)?;
    for i in 0..args.units {
        write!(preds, "u{i}")?;
        for models in &per_contrast {
            for m in models {
                write!(preds, ",{}", m.predictions.effects[i])?;
            }
        }
        writeln!(preds)?;
    }
    preds.flush()?;

    let rows: Vec<ModelTruth> = per_contrast
        .iter()
        .enumerate()
        .flat_map(|(c, models)| {
            models.iter().map(move |m| ModelTruth {
                name: m.predictions.name.clone(),
                arm: Some(ARM_NAMES[c + 1]),
                true_pehe: m.true_pehe,
            })
        })
        .collect();
    let mut truth = BufWriter::new(File::create(args.out.join("truth.csv"))?);
    writeln!(truth, "model,arm,true_pehe")?;
    for m in &rows {
        writeln!(truth, "{},{},{}", m.name, m.arm.unwrap_or(""), m.true_pehe)?;
    }
    truth.flush()?;
    Ok(rows)
}

/// Writes the three files; returns what truth.csv holds.
fn write_all(args: &SimulateArgs, design: Design) -> std::io::Result<Vec<ModelTruth>> {
    std::fs::create_dir_all(&args.out)?;
    let data = draw(design, args.units, args.features, args.sigma, args.seed);
    let (_, var_tau) = effect_moments(design, 200_000, args.seed ^ 0x5eed);
    let models = candidates(
        &data.tau,
        var_tau,
        args.models.clamp(1, 10),
        args.seed ^ 0xfeed,
    );

    write_units(args, &data.features, &data.outcome, |i| data.treatment[i])?;

    let mut preds = BufWriter::new(File::create(args.out.join("predictions.csv"))?);
    write!(preds, "unit_id")?;
    for m in &models {
        write!(preds, ",{}", m.predictions.name)?;
    }
    writeln!(preds)?;
    for i in 0..args.units {
        write!(preds, "u{i}")?;
        for m in &models {
            write!(preds, ",{}", m.predictions.effects[i])?;
        }
        writeln!(preds)?;
    }
    preds.flush()?;

    let mut truth = BufWriter::new(File::create(args.out.join("truth.csv"))?);
    writeln!(truth, "model,true_pehe")?;
    for m in &models {
        writeln!(truth, "{},{}", m.predictions.name, m.true_pehe)?;
    }
    truth.flush()?;
    Ok(models
        .iter()
        .map(|m| ModelTruth {
            name: m.predictions.name.clone(),
            arm: None,
            true_pehe: m.true_pehe,
        })
        .collect())
}

/// One model's true PEHE as written to truth.csv: on a design with arms,
/// per contrast (the arm it is for).
struct ModelTruth {
    name: String,
    arm: Option<&'static str>,
    true_pehe: f64,
}

pub fn run(args: &SimulateArgs) -> ExitCode {
    let arms = args.design == THREE_ARMS;
    let written = if arms {
        write_arms(args)
    } else {
        let Some(design) = Design::from_key(&args.design) else {
            eprintln!("plumbline simulate: unknown design {:?}", args.design);
            return ExitCode::from(EXIT_BAD_INPUT);
        };
        write_all(args, design)
    };
    match written {
        Ok(models) if args.format == Output::Json => {
            let file = |f: &str| args.out.join(f).display().to_string();
            let mut doc = serde_json::json!({
                "design": args.design, "units": args.units, "features": args.features,
                "sigma": args.sigma, "seed": args.seed,
                "units_file": file("units.csv"), "predictions_file": file("predictions.csv"),
                "truth_file": file("truth.csv"),
                "models": models.iter().map(|m| {
                    let mut row = serde_json::json!({"name": m.name, "true_pehe": m.true_pehe});
                    if let Some(arm) = m.arm {
                        row["arm"] = arm.into();
                    }
                    row
                }).collect::<Vec<_>>(),
            });
            if arms {
                doc["arms"] = serde_json::json!(ARM_NAMES);
            }
            print_json(doc);
            ExitCode::SUCCESS
        }
        Ok(_) if arms => {
            eprintln!(
                "plumbline simulate: wrote {} units with arms {} and {} models per contrast to {} \
                 (score with --arms {})",
                args.units,
                ARM_NAMES.join(", "),
                args.models.clamp(1, 10),
                args.out.display(),
                ARM_NAMES.join(",")
            );
            ExitCode::SUCCESS
        }
        Ok(_) => {
            eprintln!(
                "plumbline simulate: wrote {} units and {} models to {}",
                args.units,
                args.models.clamp(1, 10),
                args.out.display()
            );
            ExitCode::SUCCESS
        }
        Err(e) => {
            eprintln!("plumbline simulate: {}: {e}", args.out.display());
            ExitCode::FAILURE
        }
    }
}
