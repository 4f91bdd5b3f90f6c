//! `plumbline simulate`: writes a units / predictions CSV pair drawn from a
//! published design with known effects, for trying `score` and for
//! benchmarks. The true effect is written to a third file so results can be
//! checked.

use std::fs::File;
use std::io::{BufWriter, Write};
use std::path::PathBuf;
use std::process::ExitCode;

use clap::Args;

use super::client::{print_json, Output};
use super::EXIT_BAD_INPUT;
use crate::synth::{candidates, draw, effect_moments, Design};

#[derive(Debug, Args)]
pub struct SimulateArgs {
    /// nie-wager-a|b|c|d, wager-athey-heterogeneous, wager-athey-confounded.
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

/// Writes the three files; returns each model's name and true PEHE.
fn write_all(args: &SimulateArgs, design: Design) -> std::io::Result<Vec<(String, f64)>> {
    std::fs::create_dir_all(&args.out)?;
    let data = draw(design, args.units, args.features, args.sigma, args.seed);
    let (_, var_tau) = effect_moments(design, 200_000, args.seed ^ 0x5eed);
    let models = candidates(
        &data.tau,
        var_tau,
        args.models.clamp(1, 10),
        args.seed ^ 0xfeed,
    );

    let mut units = BufWriter::new(File::create(args.out.join("units.csv"))?);
    write!(units, "unit_id,treatment,outcome")?;
    for j in 0..data.features.ncols() {
        write!(units, ",x{}", j + 1)?;
    }
    writeln!(units)?;
    for i in 0..args.units {
        write!(units, "u{i},{},{}", data.treatment[i], data.outcome[i])?;
        for v in data.features.row(i) {
            write!(units, ",{v}")?;
        }
        writeln!(units)?;
    }
    units.flush()?;

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
        .map(|m| (m.predictions.name.clone(), m.true_pehe))
        .collect())
}

pub fn run(args: &SimulateArgs) -> ExitCode {
    let Some(design) = Design::from_key(&args.design) else {
        eprintln!("plumbline simulate: unknown design {:?}", args.design);
        return ExitCode::from(EXIT_BAD_INPUT);
    };
    match write_all(args, design) {
        Ok(models) if args.format == Output::Json => {
            let file = |f: &str| args.out.join(f).display().to_string();
            print_json(serde_json::json!({
                "design": args.design, "units": args.units, "features": args.features,
                "sigma": args.sigma, "seed": args.seed,
                "units_file": file("units.csv"), "predictions_file": file("predictions.csv"),
                "truth_file": file("truth.csv"),
                "models": models.iter().map(|(name, pehe)| serde_json::json!({
                    "name": name, "true_pehe": pehe,
                })).collect::<Vec<_>>(),
            }));
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
