//! `plumbline ingest units|outcomes|predictions --dataset NAME FILE`: CSV
//! backfills through the Intake API. Safe to re-run after an interruption:
//! rows the server already holds come back as duplicates and change
//! nothing.
//!
//! Columns (a header row; names as in `plumbline score`):
//! - units: `unit_id`, `treatment`, optional `propensity`, `cohort` and
//!   `assigned_at_ms`, and one column per dataset feature (by name; other
//!   columns, such as `outcome`, are ignored);
//! - outcomes: `unit_id`, `outcome`, optional `observed_at_ms`;
//! - predictions: `unit_id`, optional `predicted_at_ms`, then one column per
//!   model holding its predicted effects.
//!
//! On a dataset with arms, `treatment` holds a declared arm's label and a
//! prediction column is named `MODEL:ARM` (the effect of ARM against the
//! reference), as `plumbline score --arms` reads them.
//!
//! The file is read twice and never held whole: once to check every row
//! (so a typo in the last row is found before anything is written), then
//! again while its batches stream to the server. Both passes show a
//! progress bar on a terminal, measured in bytes of the file, so a large
//! file shows progress from the start; anywhere else only the final
//! summary is written. Rows are numbered as `plumbline score` numbers them:
//! data rows from 1, the header not counted (row r is line r + 1).

use std::path::{Path, PathBuf};
use std::process::ExitCode;

use clap::{Args, ValueEnum};
use indicatif::{ProgressBar, ProgressDrawTarget, ProgressStyle};
use serde_json::json;
use tokio_stream::wrappers::ReceiverStream;

use super::client::{connect, print_json, request, status, Connection, Output};
use super::EXIT_BAD_INPUT;
use crate::api::pb;
use crate::api::status::receipt_of;
use crate::input::InputError;

#[derive(Debug, Clone, Copy, ValueEnum, PartialEq, Eq)]
pub enum Kind {
    Units,
    Outcomes,
    Predictions,
}

impl Kind {
    fn name(self) -> &'static str {
        match self {
            Kind::Units => "units",
            Kind::Outcomes => "outcomes",
            Kind::Predictions => "predictions",
        }
    }
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
    /// Rows per batch (one transaction each; at most 10,000). For
    /// predictions a row is one model's prediction for one unit.
    #[arg(long, default_value_t = 1000)]
    pub batch: usize,
}

/// Which columns hold what, found once from the header.
enum Plan {
    Units {
        features: Vec<(usize, String)>,
        treatment: usize,
        propensity: Option<usize>,
        cohort: Option<usize>,
        assigned_at: Option<usize>,
        /// The dataset's arms (empty: binary), whose labels `treatment`
        /// holds.
        arms: Vec<String>,
    },
    Outcomes {
        outcome: usize,
        observed_at: Option<usize>,
    },
    Predictions {
        /// Each prediction column: its index and header.
        models: Vec<(usize, String)>,
        /// Per column, the model and the arm label it is for (`MODEL:ARM`
        /// on a dataset with arms; the header and "" on a binary one).
        targets: Vec<(String, String)>,
        predicted_at: Option<usize>,
    },
}

/// The rows one line of the file becomes.
enum Parsed {
    Unit(pb::UnitRow),
    Outcome(pb::OutcomeRow),
    Predictions(Vec<pb::PredictionRow>),
}

struct Layout {
    file: PathBuf,
    id: usize,
    plan: Plan,
}

impl Layout {
    fn err(&self, row: Option<usize>, column: Option<&str>, message: String) -> InputError {
        InputError {
            file: self.file.clone(),
            row,
            column: column.map(str::to_string),
            message,
        }
    }

    /// Wire rows each line of the file becomes (one per model for
    /// predictions).
    fn rows_per_line(&self) -> usize {
        match &self.plan {
            Plan::Predictions { models, .. } => models.len().max(1),
            _ => 1,
        }
    }

    /// The column a server's field name refers to, and the model for
    /// predictions, given the row's index within its batch.
    fn column_of(&self, field: &str, row_in_batch: usize) -> String {
        match (&self.plan, field) {
            (_, "unit_key" | "key") => "unit_id".into(),
            (Plan::Outcomes { .. }, "value") => "outcome".into(),
            (Plan::Predictions { models, .. }, "effect" | "model") => models
                .get(row_in_batch % models.len().max(1))
                .map(|(_, m)| m.clone())
                .unwrap_or_else(|| field.into()),
            (Plan::Units { features, .. }, f) if f.starts_with("features[") => f
                .trim_start_matches("features[")
                .trim_end_matches(']')
                .parse::<usize>()
                .ok()
                .and_then(|i| features.get(i))
                .map(|(_, name)| name.clone())
                .unwrap_or_else(|| field.into()),
            _ => field.into(),
        }
    }

    fn cell(rec: &csv::StringRecord, col: usize) -> &str {
        rec.get(col).unwrap_or("").trim()
    }

    fn number(
        &self,
        rec: &csv::StringRecord,
        col: usize,
        row: usize,
        name: &str,
    ) -> Result<f64, InputError> {
        let v = Self::cell(rec, col);
        v.parse::<f64>()
            .ok()
            .filter(|x| x.is_finite())
            .ok_or_else(|| {
                self.err(
                    Some(row),
                    Some(name),
                    format!("{v:?} is not a finite number"),
                )
            })
    }

    fn optional_int(
        &self,
        rec: &csv::StringRecord,
        col: Option<usize>,
        row: usize,
        name: &str,
    ) -> Result<i64, InputError> {
        match col {
            Some(c) if !Self::cell(rec, c).is_empty() => {
                let v = Self::cell(rec, c);
                v.parse::<i64>().map_err(|_| {
                    self.err(Some(row), Some(name), format!("{v:?} is not an integer"))
                })
            }
            _ => Ok(0),
        }
    }

    /// The unit's treatment and arm label: 0 or 1 and "" on a binary
    /// dataset, 0 and a declared arm's label on a dataset with arms.
    fn treatment(
        &self,
        rec: &csv::StringRecord,
        col: usize,
        row: usize,
        arms: &[String],
    ) -> Result<(u32, String), InputError> {
        if !arms.is_empty() {
            let label = Self::cell(rec, col);
            return if arms.iter().any(|a| a == label) {
                Ok((0, label.to_string()))
            } else {
                Err(self.err(
                    Some(row),
                    Some("treatment"),
                    format!(
                        "arm {label:?} is not one of the dataset's arms ({})",
                        arms.join(", ")
                    ),
                ))
            };
        }
        match Self::cell(rec, col) {
            "0" | "0.0" => Ok((0, String::new())),
            "1" | "1.0" => Ok((1, String::new())),
            v => Err(self.err(Some(row), Some("treatment"), format!("{v:?} is not 0 or 1"))),
        }
    }

    /// One data row (1-based) as wire rows.
    fn parse(&self, rec: &csv::StringRecord, row: usize) -> Result<Parsed, InputError> {
        let key = Self::cell(rec, self.id).to_string();
        Ok(match &self.plan {
            Plan::Units {
                features,
                treatment,
                propensity,
                cohort,
                assigned_at,
                arms,
            } => {
                let (treatment, arm) = self.treatment(rec, *treatment, row, arms)?;
                Parsed::Unit(pb::UnitRow {
                    features: features
                        .iter()
                        .map(|(col, name)| self.number(rec, *col, row, name))
                        .collect::<Result<_, _>>()?,
                    treatment,
                    propensity: match propensity {
                        Some(col) if !Self::cell(rec, *col).is_empty() => {
                            Some(self.number(rec, *col, row, "propensity")?)
                        }
                        _ => None,
                    },
                    cohort: cohort
                        .map(|col| Self::cell(rec, col).to_string())
                        .unwrap_or_default(),
                    assigned_at_ms: self.optional_int(rec, *assigned_at, row, "assigned_at_ms")?,
                    key,
                    arm,
                })
            }
            Plan::Outcomes {
                outcome,
                observed_at,
            } => Parsed::Outcome(pb::OutcomeRow {
                value: self.number(rec, *outcome, row, "outcome")?,
                observed_at_ms: self.optional_int(rec, *observed_at, row, "observed_at_ms")?,
                unit_key: key,
            }),
            Plan::Predictions {
                models,
                targets,
                predicted_at,
            } => {
                let at = self.optional_int(rec, *predicted_at, row, "predicted_at_ms")?;
                Parsed::Predictions(
                    models
                        .iter()
                        .zip(targets)
                        .map(|((col, header), (model, arm))| {
                            Ok(pb::PredictionRow {
                                model: model.clone(),
                                unit_key: key.clone(),
                                effect: self.number(rec, *col, row, header)?,
                                predicted_at_ms: at,
                                arm: arm.clone(),
                            })
                        })
                        .collect::<Result<_, InputError>>()?,
                )
            }
        })
    }

    /// Reads every data row in order, handing each to `each` with its
    /// number, and moves `bar` to the byte reached. Returns the rows read.
    fn each_row(
        &self,
        bar: &ProgressBar,
        mut each: impl FnMut(usize, Parsed) -> Result<(), InputError>,
    ) -> Result<usize, InputError> {
        let mut reader = open(&self.file)?;
        let mut record = csv::StringRecord::new();
        let mut row = 0;
        loop {
            match reader.read_record(&mut record) {
                Ok(true) => {
                    row += 1;
                    each(row, self.parse(&record, row)?)?;
                    if row % 256 == 0 {
                        bar.set_position(reader.position().byte());
                    }
                }
                Ok(false) => break,
                Err(e) => {
                    return Err(self.err(Some(row + 1), None, format!("malformed CSV record: {e}")))
                }
            }
        }
        bar.set_position(reader.position().byte());
        if row == 0 {
            return Err(self.err(None, None, "no data rows".into()));
        }
        Ok(row)
    }
}

fn open(path: &Path) -> Result<csv::Reader<std::fs::File>, InputError> {
    csv::ReaderBuilder::new()
        .has_headers(true)
        .flexible(false)
        .from_path(path)
        .map_err(|e| InputError {
            file: path.to_path_buf(),
            row: None,
            column: None,
            message: format!("cannot open: {e}"),
        })
}

/// The columns of `file` for `kind`, checked against the dataset's
/// features (units) and arms (units and predictions).
fn layout(
    kind: Kind,
    file: &Path,
    features: &[String],
    arms: &[String],
) -> Result<Layout, InputError> {
    let at = |column: Option<&str>, message: &str| InputError {
        file: file.to_path_buf(),
        row: None,
        column: column.map(str::to_string),
        message: message.into(),
    };
    let header: Vec<String> = open(file)?
        .headers()
        .map_err(|e| at(None, &format!("cannot read the header row: {e}")))?
        .iter()
        .map(|h| h.trim().to_string())
        .collect();
    let col = |name: &str| header.iter().position(|h| h == name);
    let need = |name: &str| col(name).ok_or_else(|| at(Some(name), "required column is missing"));
    let id = need("unit_id")?;
    let plan = match kind {
        Kind::Units => Plan::Units {
            features: features
                .iter()
                .map(|f| {
                    need(f).map(|c| (c, f.clone())).map_err(|e| InputError {
                        message: "the dataset's feature is missing from the file".into(),
                        ..e
                    })
                })
                .collect::<Result<_, _>>()?,
            treatment: need("treatment")?,
            propensity: col("propensity"),
            cohort: col("cohort"),
            assigned_at: col("assigned_at_ms"),
            arms: arms.to_vec(),
        },
        Kind::Outcomes => Plan::Outcomes {
            outcome: need("outcome")?,
            observed_at: col("observed_at_ms"),
        },
        Kind::Predictions => {
            let predicted_at = col("predicted_at_ms");
            let models: Vec<(usize, String)> = header
                .iter()
                .enumerate()
                .filter(|(i, h)| *i != id && Some(*i) != predicted_at && !h.is_empty())
                .map(|(i, h)| (i, h.clone()))
                .collect();
            if models.is_empty() {
                return Err(at(None, "no model columns (one per model after unit_id)"));
            }
            let targets = models
                .iter()
                .map(|(_, header)| {
                    if arms.is_empty() {
                        return Ok((header.clone(), String::new()));
                    }
                    let (model, k) = crate::input::split_arm_column(header, arms)
                        .map_err(|m| at(Some(header), &m))?;
                    Ok((model.to_string(), arms[k].clone()))
                })
                .collect::<Result<_, InputError>>()?;
            Plan::Predictions {
                models,
                targets,
                predicted_at,
            }
        }
    };
    Ok(Layout {
        file: file.to_path_buf(),
        id,
        plan,
    })
}

/// A bar in bytes of the file, drawn on stderr only when it is a terminal
/// (indicatif hides a stderr target that is not one).
fn bar(bytes: u64, stage: &str) -> ProgressBar {
    let pb = ProgressBar::with_draw_target(Some(bytes), ProgressDrawTarget::stderr());
    if let Ok(style) = ProgressStyle::with_template(
        "{msg:<24} [{bar:30}] {bytes}/{total_bytes} ({bytes_per_sec}, eta {eta})",
    ) {
        pb.set_style(style.progress_chars("=> "));
    }
    pb.set_message(stage.to_string());
    pb.tick();
    pb
}

/// How an ingest ended, for the summary and the JSON receipt.
struct Outcome {
    lines: usize,
    receipt: pb::IntakeReceipt,
    /// The refusal, when a batch was refused: its status.
    refused: Option<tonic::Status>,
}

pub fn run(c: &Connection, a: &IngestArgs) -> ExitCode {
    let work = async {
        match ingest(c, a).await {
            Ok(o) => report(c, a, &o),
            Err(Failed::Input(e)) => Err((EXIT_BAD_INPUT, e.to_string())),
            Err(Failed::Other(e)) => Err((1, format!("{}: {e}", a.file.display()))),
        }
    };
    match super::client::block_on_command("plumbline ingest", work) {
        Ok(()) => ExitCode::SUCCESS,
        Err(code) => code,
    }
}

enum Failed {
    Input(InputError),
    Other(String),
}

impl From<InputError> for Failed {
    fn from(e: InputError) -> Self {
        Failed::Input(e)
    }
}

impl From<String> for Failed {
    fn from(e: String) -> Self {
        Failed::Other(e)
    }
}

/// The dataset's features and arms (empty: binary).
async fn dataset_features(
    c: &Connection,
    a: &IngestArgs,
    channel: tonic::transport::Channel,
) -> Result<(Vec<String>, Vec<String>), Failed> {
    if a.kind == Kind::Outcomes {
        return Ok((Vec::new(), Vec::new()));
    }
    let spec = pb::dataset_registry_client::DatasetRegistryClient::new(channel)
        .get_dataset(request(
            c,
            pb::GetDatasetRequest {
                name: a.dataset.clone(),
            },
        )?)
        .await
        .map_err(status)?
        .into_inner()
        .spec
        .unwrap_or_default();
    Ok((spec.feature_names, spec.arms))
}

async fn ingest(c: &Connection, a: &IngestArgs) -> Result<Located, Failed> {
    let bytes = std::fs::metadata(&a.file)
        .map_err(|e| InputError {
            file: a.file.clone(),
            row: None,
            column: None,
            message: format!("cannot open: {e}"),
        })?
        .len();
    let channel = connect(c).await?;
    let (features, arms) = dataset_features(c, a, channel.clone()).await?;
    let layout = std::sync::Arc::new(layout(a.kind, &a.file, &features, &arms)?);

    // Pass 1: every row checked before anything is sent.
    let check = std::sync::Arc::clone(&layout);
    let lines = tokio::task::spawn_blocking(move || {
        let checking = bar(bytes, "checking");
        let n = check.each_row(&checking, |_, _| Ok(()));
        checking.finish_and_clear();
        n
    })
    .await
    .map_err(|e| e.to_string())??;

    // Pass 2: batches stream out as they are read; the channel's bound
    // keeps the reader (and the bar) at the pace of the server.
    let lines_per_batch = (a.batch.clamp(1, 10_000) / layout.rows_per_line()).max(1);
    let (tx, rx) = tokio::sync::mpsc::channel::<Vec<Parsed>>(2);
    let send = std::sync::Arc::clone(&layout);
    let reader = tokio::task::spawn_blocking(move || {
        let sending = bar(bytes, "sending");
        let mut batch = Vec::with_capacity(lines_per_batch);
        let result = send.each_row(&sending, |_, parsed| {
            batch.push(parsed);
            if batch.len() == lines_per_batch {
                // A closed channel means the call ended (a refusal); its
                // status says why, so reading simply stops.
                let full = std::mem::replace(&mut batch, Vec::with_capacity(lines_per_batch));
                if tx.blocking_send(full).is_err() {
                    return Err(InputError {
                        file: PathBuf::new(),
                        row: None,
                        column: None,
                        message: String::new(),
                    });
                }
            }
            Ok(())
        });
        if result.is_ok() && !batch.is_empty() {
            let _ = tx.blocking_send(batch);
        }
        sending.finish_and_clear();
        // The closed-channel stop carries no file; anything else is a row
        // the first pass accepted and this one did not (the file changed).
        result.err().filter(|e| !e.file.as_os_str().is_empty())
    });
    let dataset = a.dataset.clone();
    let mut intake = pb::intake_client::IntakeClient::new(channel);
    let lines_in = ReceiverStream::new(rx);
    use tokio_stream::StreamExt;
    let result = match a.kind {
        Kind::Units => {
            let s = lines_in.map(move |b| pb::UnitBatch {
                dataset: dataset.clone(),
                rows: b
                    .into_iter()
                    .filter_map(|p| match p {
                        Parsed::Unit(u) => Some(u),
                        _ => None,
                    })
                    .collect(),
            });
            intake.send_units(request(c, s)?).await
        }
        Kind::Outcomes => {
            let s = lines_in.map(move |b| pb::OutcomeBatch {
                dataset: dataset.clone(),
                rows: b
                    .into_iter()
                    .filter_map(|p| match p {
                        Parsed::Outcome(o) => Some(o),
                        _ => None,
                    })
                    .collect(),
            });
            intake.send_outcomes(request(c, s)?).await
        }
        Kind::Predictions => {
            let s = lines_in.map(move |b| pb::PredictionBatch {
                dataset: dataset.clone(),
                rows: b
                    .into_iter()
                    .flat_map(|p| match p {
                        Parsed::Predictions(rows) => rows,
                        _ => Vec::new(),
                    })
                    .collect(),
            });
            intake.send_predictions(request(c, s)?).await
        }
    };
    if let Ok(Some(e)) = reader.await {
        return Err(Failed::Input(InputError {
            message: format!(
                "{} (the file changed while it was sent; the batches before this row may be \
                 committed: run the command again to resume)",
                e.message
            ),
            ..e
        }));
    }
    Ok(match result {
        Ok(r) => Outcome {
            lines,
            receipt: r.into_inner(),
            refused: None,
        },
        Err(s) => match receipt_of(&s) {
            Some(receipt) => Outcome {
                lines,
                receipt,
                refused: Some(s),
            },
            None => return Err(Failed::Other(status(s))),
        },
    }
    .with_lines_per_batch(lines_per_batch, &layout))
}

/// One refused row as the file numbers it.
struct RefusedRow {
    row: usize,
    /// The model whose prediction was refused (predictions files only).
    model: Option<String>,
    column: String,
    reason: String,
}

/// The refused rows of a receipt, numbered as the file's data rows.
fn refused_rows(
    receipt: &pb::IntakeReceipt,
    lines_per_batch: usize,
    layout: &Layout,
) -> Vec<RefusedRow> {
    let per_line = layout.rows_per_line();
    receipt
        .rejections
        .iter()
        .map(|r| RefusedRow {
            row: r.batch as usize * lines_per_batch + r.row as usize / per_line + 1,
            model: match &layout.plan {
                Plan::Predictions { models, .. } => models
                    .get(r.row as usize % per_line)
                    .map(|(_, m)| m.clone()),
                _ => None,
            },
            column: layout.column_of(&r.field, r.row as usize),
            reason: r.reason.clone(),
        })
        .collect()
}

impl Outcome {
    fn with_lines_per_batch(self, lines_per_batch: usize, layout: &Layout) -> Located {
        let rows = refused_rows(&self.receipt, lines_per_batch, layout);
        Located {
            outcome: self,
            rows,
            file: layout.file.clone(),
            lines_per_batch,
            models: layout.rows_per_line(),
            predictions: matches!(layout.plan, Plan::Predictions { .. }),
        }
    }
}

/// An ended ingest with its refused rows numbered as in the file.
struct Located {
    outcome: Outcome,
    rows: Vec<RefusedRow>,
    file: PathBuf,
    lines_per_batch: usize,
    /// Wire rows per line of the file (the models, for predictions).
    models: usize,
    predictions: bool,
}

/// `n thing` or `n things` (`batches` for `batch`).
fn count(n: u64, thing: &str) -> String {
    let plural = if thing.ends_with("ch") { "es" } else { "s" };
    format!("{n} {thing}{}", if n == 1 { "" } else { plural })
}

/// A status code as the gRPC specification spells it (FAILED_PRECONDITION).
fn code_name(code: tonic::Code) -> String {
    let mut out = String::new();
    for (i, ch) in format!("{code:?}").chars().enumerate() {
        if ch.is_uppercase() && i > 0 {
            out.push('_');
        }
        out.push(ch.to_ascii_uppercase());
    }
    out
}

/// The message for a refused batch: which rows of the file it held, how
/// many were refused (counted by the server over the whole batch, not from
/// the reasons it lists), each listed reason with its data row and column,
/// and what is committed (said once).
fn refusal_text(l: &Located, code: tonic::Code) -> String {
    let r = &l.outcome.receipt;
    let refused = r.rejected.max(l.rows.len() as u64);
    let first = r.batches as usize * l.lines_per_batch + 1;
    let last = (first + l.lines_per_batch - 1).min(l.outcome.lines.max(first));
    let what = if l.predictions && l.models > 1 {
        format!(
            "{} ({} a row)",
            count(refused, "prediction"),
            count(l.models as u64, "model")
        )
    } else {
        count(refused, "row")
    };
    let mut s = format!(
        "{}: the batch of data rows {first} to {last} was refused ({}), nothing of it written; \
         {what} refused",
        l.file.display(),
        code_name(code),
    );
    if (l.rows.len() as u64) < refused {
        s.push_str(&format!(", the first {} listed", l.rows.len()));
    }
    s.push(':');
    for row in &l.rows {
        let model = row
            .model
            .as_ref()
            .map(|m| format!(", model {m:?}"))
            .unwrap_or_default();
        s.push_str(&format!(
            "\n  row {} (line {}){model}, column {:?}: {}",
            row.row,
            row.row + 1,
            row.column,
            row.reason
        ));
    }
    if last < l.outcome.lines {
        s.push_str(&format!(
            "\nrows {} to {} were not sent",
            last + 1,
            l.outcome.lines
        ));
    }
    if r.batches == 0 {
        s.push_str("\nnothing was committed; fix the rows and run the command again");
    } else {
        s.push_str(&format!(
            "\n{} committed before it ({} new, {} already stored); fix the rows and run the \
             command again: what is committed counts as already stored",
            count(u64::from(r.batches), "batch"),
            count(r.accepted, "row"),
            r.duplicate
        ));
    }
    s
}

fn report(c: &Connection, a: &IngestArgs, l: &Located) -> Result<(), (u8, String)> {
    let r = &l.outcome.receipt;
    if c.format == Output::Json {
        print_json(json!({
            "dataset": a.dataset, "kind": a.kind.name(), "file": a.file.display().to_string(),
            "rows_read": l.outcome.lines, "batches": r.batches,
            "accepted": r.accepted, "duplicate": r.duplicate,
            "refused": l.outcome.refused.as_ref().map(|s| json!({
                "code": code_name(s.code()),
                "refused": r.rejected.max(l.rows.len() as u64),
                "reasons": l.rows.iter().map(|x| json!({
                    "row": x.row, "model": x.model, "column": x.column, "reason": x.reason,
                })).collect::<Vec<_>>(),
            })),
        }));
    }
    match &l.outcome.refused {
        None => {
            eprintln!(
                "plumbline ingest: {} of {} read; {} committed: {} new, {} already stored",
                count(l.outcome.lines as u64, "row"),
                a.kind.name(),
                count(u64::from(r.batches), "batch"),
                count(r.accepted, "row"),
                r.duplicate
            );
            Ok(())
        }
        Some(s) => Err((EXIT_BAD_INPUT, refusal_text(l, s.code()))),
    }
}

#[cfg(test)]
mod tests {
    use super::*;

    fn predictions_layout() -> Layout {
        Layout {
            file: PathBuf::from("p.csv"),
            id: 0,
            plan: Plan::Predictions {
                models: vec![(1, "m1".into()), (2, "m2".into())],
                targets: vec![("m1".into(), String::new()), ("m2".into(), String::new())],
                predicted_at: None,
            },
        }
    }

    fn rejection(batch: u32, row: u32) -> pb::RowRejection {
        pb::RowRejection {
            batch,
            row,
            field: "unit_key".into(),
            reason: "unit already has an outcome".into(),
        }
    }

    #[test]
    fn refused_rows_are_numbered_as_the_files_data_rows_from_1() {
        let layout = predictions_layout();
        let receipt = pb::IntakeReceipt {
            batches: 0,
            rejected: 1000,
            rejections: vec![rejection(0, 0), rejection(0, 1), rejection(2, 5)],
            ..Default::default()
        };
        // 500 lines per batch, two models a line: batch 2, row 5 is the
        // third line of that batch.
        let rows = refused_rows(&receipt, 500, &layout);
        let numbers: Vec<usize> = rows.iter().map(|r| r.row).collect();
        assert_eq!(numbers, [1, 1, 1003]);
        assert_eq!(rows[0].column, "unit_id");
        assert_eq!(layout.column_of("effect", 1), "m2");
    }

    #[test]
    fn a_refusal_counts_every_refused_row_and_says_committed_once() {
        let layout = predictions_layout();
        let receipt = pb::IntakeReceipt {
            rejected: 1000,
            rejections: (0..37).map(|i| rejection(0, i)).collect(),
            ..Default::default()
        };
        let l = Outcome {
            lines: 500,
            receipt,
            refused: None,
        }
        .with_lines_per_batch(500, &layout);
        let text = refusal_text(&l, tonic::Code::FailedPrecondition);
        assert!(
            text.contains("1000 predictions (2 models a row) refused, the first 37 listed"),
            "{text}"
        );
        assert!(text.contains("data rows 1 to 500"), "{text}");
        assert!(text.contains("(FAILED_PRECONDITION)"), "{text}");
        assert!(text.contains("row 1 (line 2), model \"m2\""), "{text}");
        assert!(!text.contains("row 0"), "{text}");
        assert_eq!(text.matches("committed").count(), 1, "{text}");
        assert_eq!(count(3, "batch"), "3 batches");
        assert_eq!(count(1, "row"), "1 row");
    }
}
