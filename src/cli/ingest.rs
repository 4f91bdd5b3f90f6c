//! `plumbline ingest units|outcomes|predictions --dataset NAME FILE`: CSV
//! backfills through the Intake API, with a progress bar. Safe to re-run
//! after an interruption: rows the server already holds come back as
//! duplicates and change nothing.
//!
//! Columns (a header row; names as in `plumbline score`):
//! - units: `unit_id`, `treatment`, optional `propensity`, `cohort` and
//!   `assigned_at_ms`, and one column per dataset feature (by name; other
//!   columns, such as `outcome`, are ignored);
//! - outcomes: `unit_id`, `outcome`, optional `observed_at_ms`;
//! - predictions: `unit_id`, optional `predicted_at_ms`, then one column per
//!   model holding its predicted effects.

use std::path::PathBuf;
use std::process::ExitCode;

use clap::{Args, ValueEnum};
use indicatif::{ProgressBar, ProgressStyle};

use super::client::{connect, request, status, Connection};
use crate::api::pb;
use crate::api::status::receipt_of;

#[derive(Debug, Clone, Copy, ValueEnum)]
pub enum Kind {
    Units,
    Outcomes,
    Predictions,
}

#[derive(Debug, Args)]
pub struct IngestArgs {
    /// What the file holds.
    #[arg(value_enum)]
    pub kind: Kind,
    /// Dataset name.
    #[arg(long)]
    pub dataset: String,
    /// The CSV file.
    pub file: PathBuf,
    /// Rows per batch (one transaction each).
    #[arg(long, default_value_t = 1000)]
    pub batch: usize,
}

fn cell(rec: &csv::StringRecord, col: usize) -> &str {
    rec.get(col).unwrap_or("").trim()
}

fn number(rec: &csv::StringRecord, col: usize, row: usize, name: &str) -> Result<f64, String> {
    let v = cell(rec, col);
    v.parse::<f64>()
        .ok()
        .filter(|x| x.is_finite())
        .ok_or_else(|| format!("row {row}, column {name:?}: {v:?} is not a finite number"))
}

fn optional_int(
    rec: &csv::StringRecord,
    col: Option<usize>,
    row: usize,
    name: &str,
) -> Result<i64, String> {
    match col {
        None => Ok(0),
        Some(c) if cell(rec, c).is_empty() => Ok(0),
        Some(c) => cell(rec, c).parse::<i64>().map_err(|_| {
            format!(
                "row {row}, column {name:?}: {:?} is not an integer",
                cell(rec, c)
            )
        }),
    }
}

struct Sheet {
    header: Vec<String>,
    rows: Vec<csv::StringRecord>,
}

impl Sheet {
    fn col(&self, name: &str) -> Option<usize> {
        self.header.iter().position(|h| h == name)
    }
    fn need(&self, name: &str) -> Result<usize, String> {
        self.col(name)
            .ok_or_else(|| format!("column {name:?} is missing"))
    }
}

fn read(path: &PathBuf) -> Result<Sheet, String> {
    let mut r = csv::Reader::from_path(path).map_err(|e| format!("{}: {e}", path.display()))?;
    let header = r
        .headers()
        .map_err(|e| format!("{}: {e}", path.display()))?
        .iter()
        .map(|h| h.trim().to_string())
        .collect();
    let rows = r
        .records()
        .collect::<Result<Vec<_>, _>>()
        .map_err(|e| format!("{}: {e}", path.display()))?;
    Ok(Sheet { header, rows })
}

fn bar(total: u64, what: &str) -> ProgressBar {
    let pb = ProgressBar::new(total);
    if let Ok(style) = ProgressStyle::with_template(
        "{spinner} {msg} [{bar:40}] {pos}/{len} rows ({per_sec}, eta {eta})",
    ) {
        pb.set_style(style.progress_chars("=> "));
    }
    pb.set_message(what.to_string());
    pb
}

pub fn run(c: &Connection, a: &IngestArgs) -> ExitCode {
    let work = async {
        ingest(c, a)
            .await
            .map_err(|e| (1, format!("{}: {e}", a.file.display())))
    };
    match super::client::block_on_command("plumbline ingest", work) {
        Ok(()) => ExitCode::SUCCESS,
        Err(code) => code,
    }
}

async fn ingest(c: &Connection, a: &IngestArgs) -> Result<(), String> {
    let sheet = read(&a.file)?;
    let channel = connect(c).await?;
    let id = sheet.need("unit_id")?;
    let batch = a.batch.clamp(1, 10_000);
    let dataset = a.dataset.clone();
    let mut intake = pb::intake_client::IntakeClient::new(channel.clone());
    let progress = bar(
        sheet.rows.len() as u64,
        &format!("{:?}", a.kind).to_lowercase(),
    );
    let result = match a.kind {
        Kind::Units => {
            let mut registry = pb::dataset_registry_client::DatasetRegistryClient::new(channel);
            let spec = registry
                .get_dataset(request(
                    c,
                    pb::GetDatasetRequest {
                        name: dataset.clone(),
                    },
                )?)
                .await
                .map_err(status)?
                .into_inner()
                .spec
                .unwrap_or_default();
            let features: Vec<usize> = spec
                .feature_names
                .iter()
                .map(|f| sheet.need(f))
                .collect::<Result<_, _>>()?;
            let (w, p) = (sheet.need("treatment")?, sheet.col("propensity"));
            let (cohort, at) = (sheet.col("cohort"), sheet.col("assigned_at_ms"));
            let mut batches = Vec::new();
            for (b, chunk) in sheet.rows.chunks(batch).enumerate() {
                let mut rows = Vec::with_capacity(chunk.len());
                for (i, rec) in chunk.iter().enumerate() {
                    let row = b * batch + i + 1;
                    let x = features
                        .iter()
                        .zip(&spec.feature_names)
                        .map(|(&col, name)| number(rec, col, row, name))
                        .collect::<Result<Vec<_>, _>>()?;
                    rows.push(pb::UnitRow {
                        key: cell(rec, id).to_string(),
                        features: x,
                        treatment: number(rec, w, row, "treatment")? as u32,
                        propensity: match p {
                            Some(col) if !cell(rec, col).is_empty() => {
                                Some(number(rec, col, row, "propensity")?)
                            }
                            _ => None,
                        },
                        cohort: cohort
                            .map(|col| cell(rec, col).to_string())
                            .unwrap_or_default(),
                        assigned_at_ms: optional_int(rec, at, row, "assigned_at_ms")?,
                    });
                }
                batches.push(pb::UnitBatch {
                    dataset: dataset.clone(),
                    rows,
                });
            }
            let pbar = progress.clone();
            let stream = tokio_stream::iter(
                batches
                    .into_iter()
                    .inspect(move |b| pbar.inc(b.rows.len() as u64)),
            );
            intake.send_units(request(c, stream)?).await
        }
        Kind::Outcomes => {
            let (y, at) = (sheet.need("outcome")?, sheet.col("observed_at_ms"));
            let mut batches = Vec::new();
            for (b, chunk) in sheet.rows.chunks(batch).enumerate() {
                let mut rows = Vec::with_capacity(chunk.len());
                for (i, rec) in chunk.iter().enumerate() {
                    let row = b * batch + i + 1;
                    rows.push(pb::OutcomeRow {
                        unit_key: cell(rec, id).to_string(),
                        value: number(rec, y, row, "outcome")?,
                        observed_at_ms: optional_int(rec, at, row, "observed_at_ms")?,
                    });
                }
                batches.push(pb::OutcomeBatch {
                    dataset: dataset.clone(),
                    rows,
                });
            }
            let pbar = progress.clone();
            let stream = tokio_stream::iter(
                batches
                    .into_iter()
                    .inspect(move |b| pbar.inc(b.rows.len() as u64)),
            );
            intake.send_outcomes(request(c, stream)?).await
        }
        Kind::Predictions => {
            let at = sheet.col("predicted_at_ms");
            let models: Vec<(usize, String)> = sheet
                .header
                .iter()
                .enumerate()
                .filter(|(i, h)| *i != id && Some(*i) != at && !h.is_empty())
                .map(|(i, h)| (i, h.clone()))
                .collect();
            progress.set_length((sheet.rows.len() * models.len()) as u64);
            let mut batches = Vec::new();
            for (mcol, model) in &models {
                for (b, chunk) in sheet.rows.chunks(batch).enumerate() {
                    let mut rows = Vec::with_capacity(chunk.len());
                    for (i, rec) in chunk.iter().enumerate() {
                        let row = b * batch + i + 1;
                        rows.push(pb::PredictionRow {
                            model: model.clone(),
                            unit_key: cell(rec, id).to_string(),
                            effect: number(rec, *mcol, row, model)?,
                            predicted_at_ms: optional_int(rec, at, row, "predicted_at_ms")?,
                        });
                    }
                    batches.push(pb::PredictionBatch {
                        dataset: dataset.clone(),
                        rows,
                    });
                }
            }
            let pbar = progress.clone();
            let stream = tokio_stream::iter(
                batches
                    .into_iter()
                    .inspect(move |b| pbar.inc(b.rows.len() as u64)),
            );
            intake.send_predictions(request(c, stream)?).await
        }
    };
    progress.finish_and_clear();
    match result {
        Ok(r) => {
            let r = r.into_inner();
            eprintln!(
                "plumbline ingest: {} batches committed: {} rows new, {} already stored",
                r.batches, r.accepted, r.duplicate
            );
            Ok(())
        }
        Err(s) => {
            let committed = receipt_of(&s)
                .map(|r| {
                    format!(
                        "; {} batches ({} new rows) were committed before it — re-run to resume",
                        r.batches, r.accepted
                    )
                })
                .unwrap_or_default();
            Err(format!("{}{committed}", status(s)))
        }
    }
}
