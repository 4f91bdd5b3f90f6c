//! The client commands that change or ask something of a server beyond
//! reading boards: `dataset create|show|list`, `model register|retire|list`,
//! `recompute` and `compare`. With them a person with only a shell can do
//! the whole job the Python client does.
//!
//! `dataset create` takes every setting of the wire's `DatasetSpec` from
//! flags or a TOML file (flags win). A setting left out is sent as zero,
//! which the server reads as its default; the command then prints the
//! dataset as the server stored it, so every effective value is on screen.

use std::path::PathBuf;
use std::process::ExitCode;

use clap::{Args, Subcommand, ValueEnum};
use serde::Deserialize;
use serde_json::{json, Value};

use super::client::{
    connect, failed, ms_to_text, print_json, request, run_async, window, Connection, DatasetArg,
    Failure, Output, WindowArg,
};
use super::EXIT_BAD_INPUT;
use crate::api::pb;
use crate::domain::spec as defaults;

#[derive(Debug, Subcommand)]
pub enum DatasetAction {
    /// Create a dataset from flags and/or a TOML file; prints it as stored.
    Create(Box<CreateArgs>),
    /// One dataset's settings (defaults filled in) and counts.
    Show {
        /// Dataset name.
        name: String,
    },
    /// Every dataset the token may read (the same as `plumbline datasets`).
    List,
}

#[derive(Debug, Subcommand)]
pub enum ModelAction {
    /// Register one or more models on a dataset (re-registering the same
    /// name, version and description changes nothing).
    Register {
        #[command(flatten)]
        dataset: DatasetArg,
        /// Model names, as they head the predictions file's columns.
        #[arg(required = true, value_name = "NAME")]
        names: Vec<String>,
        /// Version label, e.g. a training run id.
        #[arg(long, default_value = "")]
        version: String,
        /// Description for people.
        #[arg(long, default_value = "")]
        description: String,
    },
    /// Register a window's current blend (the scoreboard's blend row) as a
    /// model: the server predicts, for every unit all its members have
    /// predicted, the weighted sum of their predictions, with the weights
    /// frozen now. It is ranked from the next recompute; its error there is
    /// in-sample for the weights (the blend row stays the honest figure).
    RegisterBlend {
        #[command(flatten)]
        dataset: DatasetArg,
        /// The new model's name.
        name: String,
        #[command(flatten)]
        window: WindowArg,
        /// Version label.
        #[arg(long, default_value = "")]
        version: String,
        /// Description for people.
        #[arg(long, default_value = "")]
        description: String,
    },
    /// Retire a model: it stops being ranked; its data is kept.
    Retire {
        #[command(flatten)]
        dataset: DatasetArg,
        /// Model name.
        name: String,
    },
    /// A dataset's models (the same as `plumbline models`).
    List {
        #[command(flatten)]
        dataset: DatasetArg,
        /// Include retired models.
        #[arg(long)]
        retired: bool,
    },
}

#[derive(Debug, Clone, Copy, ValueEnum, Deserialize, PartialEq, Eq)]
#[serde(rename_all = "lowercase")]
pub enum OutcomeKindArg {
    Continuous,
    Binary,
}

/// Help for a setting the server fills in when it is left out.
fn server_default(what: &str, default: impl std::fmt::Display) -> String {
    format!("{what} [server default: {default}]")
}

/// Every setting of a dataset. The same names serve as flags (with
/// dashes) and as keys of the `--spec` file, so a stored dataset printed by
/// `dataset show` can be copied into a file as it stands.
#[derive(Debug, Default, Args, Deserialize)]
#[serde(deny_unknown_fields)]
#[command(next_help_heading = "Dataset settings (each also a --spec file key)")]
pub struct SpecSettings {
    /// The dataset's name: only in the file (on the command line it is the
    /// first argument).
    #[arg(skip)]
    pub name: Option<String>,
    /// Feature names, in the order every unit carries them (comma-separated).
    #[arg(long = "features", value_delimiter = ',', value_name = "NAME,...")]
    #[serde(alias = "feature_names")]
    pub features: Option<Vec<String>>,
    /// continuous (outcome models are regressions) or binary (0/1 outcomes).
    #[arg(long, value_enum, value_name = "KIND")]
    pub outcome_kind: Option<OutcomeKindArg>,
    #[arg(long, help = server_default("Cost of treating one unit, in outcome units, for policy gain", 0))]
    pub treatment_cost: Option<f64>,
    #[arg(long, help = server_default("Cross-fitting folds, 2 to 20", defaults::DEFAULT_FOLDS))]
    pub folds: Option<u32>,
    #[arg(long, help = server_default("Propensities outside [eps, 1 - eps] count as extreme", defaults::DEFAULT_EPS))]
    pub overlap_eps: Option<f64>,
    #[arg(long, help = server_default("Overlap is degraded above this share of extreme units", defaults::DEFAULT_MAX_EXTREME_SHARE))]
    pub overlap_max_extreme_share: Option<f64>,
    #[arg(long, help = server_default("Overlap is degraded when an arm's effective sample falls below this share of it", defaults::DEFAULT_MIN_EFFECTIVE_SHARE))]
    pub overlap_min_effective_share: Option<f64>,
    #[arg(long, help = server_default(
        "The recent window's last N units with outcomes (0 = not limited by count)",
        format!("{} when --recent-last-days is not set either", defaults::DEFAULT_RECENT_OUTCOMES)
    ))]
    pub recent_last_outcomes: Option<u32>,
    #[arg(long, help = server_default("The recent window's last D days of outcomes (0 = not limited by time)", 0))]
    pub recent_last_days: Option<u32>,
    #[arg(long, help = server_default("Recompute after this many new outcomes", defaults::DEFAULT_EVERY_OUTCOMES))]
    pub recompute_every_outcomes: Option<u32>,
    #[arg(long, help = server_default("Recompute at least this often while outcomes wait, in seconds", defaults::DEFAULT_EVERY_SECONDS))]
    pub recompute_every_seconds: Option<u32>,
    #[arg(long, help = server_default("Refit the nuisance models when the data grew by this share since the last fit", defaults::DEFAULT_REFIT_GROWTH))]
    pub refit_growth: Option<f64>,
    #[arg(long, help = server_default("Refit at least this often, in seconds (0 = never on a schedule)", 0))]
    pub refit_every_seconds: Option<u32>,
    #[arg(long, help = server_default("Recompute the rank and calibration metrics when the cumulative window grew by this share", defaults::DEFAULT_RANK_REFRESH_GROWTH))]
    pub rank_refresh_growth: Option<f64>,
    #[arg(long, help = server_default("Recomputes within which an alert's chance of any false alarm stays at most alpha", defaults::DEFAULT_ALERT_HORIZON))]
    pub alert_horizon: Option<u32>,
    #[arg(long, help = server_default("A model is ranked only if it predicted at least this share of a window's units", defaults::DEFAULT_MIN_COVERAGE))]
    pub min_coverage: Option<f64>,
    #[arg(long, help = server_default("Family-wise level of the best set and the heterogeneity test", defaults::DEFAULT_ALPHA))]
    pub alpha: Option<f64>,
    #[arg(long, help = server_default("Seed of folds, inner splits and draws", 0))]
    pub seed: Option<u64>,
    /// The arms of a dataset with more than two, the reference first
    /// (comma-separated); left out, the dataset is binary (treatment 0 or 1).
    /// Units then name their arm in `treatment`, and predictions the arm
    /// whose effect against the reference they are (`MODEL:ARM` columns).
    #[arg(long, value_delimiter = ',', value_name = "REF,ARM,...")]
    pub arms: Option<Vec<String>>,
    /// With --arms: the cost of giving a unit an arm, in outcome units, as
    /// ARM=COST,... (arms not named cost 0; --treatment-cost is for two arms).
    #[arg(long, value_name = "ARM=COST,...")]
    pub arm_cost: Option<String>,
}

#[derive(Debug, Args)]
pub struct CreateArgs {
    /// Dataset name: 1 to 128 characters of letters, digits, '.', '_' and '-'
    /// (or `name` in the --spec file).
    pub name: Option<String>,
    /// A TOML file of settings, keyed as the flags without their dashes
    /// (`features = ["x1", "x2"]`, `outcome_kind = "binary"`, `folds = 5`, and
    /// `name`); a flag given as well wins.
    #[arg(long, value_name = "FILE")]
    pub spec: Option<PathBuf>,
    #[command(flatten)]
    pub settings: SpecSettings,
}

fn bad_input(message: String) -> Failure {
    Failure::new(EXIT_BAD_INPUT, message)
}

fn read_spec_file(path: &PathBuf) -> Result<SpecSettings, Failure> {
    let text = std::fs::read_to_string(path)
        .map_err(|e| bad_input(format!("--spec {}: {e}", path.display())))?;
    toml::from_str(&text).map_err(|e| bad_input(format!("--spec {}: {e}", path.display())))
}

impl SpecSettings {
    /// Each setting from `self` when given, else from `file`.
    fn over(self, file: SpecSettings) -> SpecSettings {
        SpecSettings {
            name: self.name.or(file.name),
            features: self.features.or(file.features),
            outcome_kind: self.outcome_kind.or(file.outcome_kind),
            treatment_cost: self.treatment_cost.or(file.treatment_cost),
            folds: self.folds.or(file.folds),
            overlap_eps: self.overlap_eps.or(file.overlap_eps),
            overlap_max_extreme_share: self
                .overlap_max_extreme_share
                .or(file.overlap_max_extreme_share),
            overlap_min_effective_share: self
                .overlap_min_effective_share
                .or(file.overlap_min_effective_share),
            recent_last_outcomes: self.recent_last_outcomes.or(file.recent_last_outcomes),
            recent_last_days: self.recent_last_days.or(file.recent_last_days),
            recompute_every_outcomes: self
                .recompute_every_outcomes
                .or(file.recompute_every_outcomes),
            recompute_every_seconds: self
                .recompute_every_seconds
                .or(file.recompute_every_seconds),
            refit_growth: self.refit_growth.or(file.refit_growth),
            refit_every_seconds: self.refit_every_seconds.or(file.refit_every_seconds),
            rank_refresh_growth: self.rank_refresh_growth.or(file.rank_refresh_growth),
            alert_horizon: self.alert_horizon.or(file.alert_horizon),
            min_coverage: self.min_coverage.or(file.min_coverage),
            alpha: self.alpha.or(file.alpha),
            seed: self.seed.or(file.seed),
            arms: self.arms.or(file.arms),
            arm_cost: self.arm_cost.or(file.arm_cost),
        }
    }

    /// The wire's spec; what is left out goes as zero (the server's default).
    fn to_wire(&self, name: String) -> Result<pb::DatasetSpec, Failure> {
        let features = self.features.clone().unwrap_or_default();
        if features.iter().all(|f| f.trim().is_empty()) {
            return Err(bad_input(
                "features: name the dataset's features (--features a,b,c or `features` in --spec)"
                    .into(),
            ));
        }
        let kind = match self.outcome_kind {
            Some(OutcomeKindArg::Continuous) => pb::OutcomeKind::Continuous,
            Some(OutcomeKindArg::Binary) => pb::OutcomeKind::Binary,
            None => {
                return Err(bad_input(
                    "outcome_kind: required (--outcome-kind continuous|binary)".into(),
                ))
            }
        };
        let arms: Vec<String> = self
            .arms
            .iter()
            .flatten()
            .map(|a| a.trim().to_string())
            .collect();
        if self
            .arm_cost
            .as_deref()
            .is_some_and(|c| !c.trim().is_empty())
            && arms.is_empty()
        {
            return Err(bad_input(
                "arm_cost: needs --arms (a binary dataset has --treatment-cost)".into(),
            ));
        }
        let arm_costs = if arms.is_empty() {
            Vec::new()
        } else {
            super::score_arms::arm_costs(self.arm_cost.as_deref(), &arms)
                .map_err(bad_input)?
                .into_iter()
                .zip(&arms)
                .filter(|(cost, _)| *cost != 0.0)
                .map(|(cost, arm)| pb::ArmCost {
                    arm: arm.clone(),
                    cost,
                })
                .collect()
        };
        Ok(pb::DatasetSpec {
            name,
            feature_names: features.iter().map(|f| f.trim().to_string()).collect(),
            outcome_kind: kind as i32,
            treatment_cost: self.treatment_cost.unwrap_or(0.0),
            folds: self.folds.unwrap_or(0),
            overlap: Some(pb::OverlapThresholds {
                eps: self.overlap_eps.unwrap_or(0.0),
                max_extreme_share: self.overlap_max_extreme_share.unwrap_or(0.0),
                min_effective_share: self.overlap_min_effective_share.unwrap_or(0.0),
            }),
            recent: Some(pb::RecentWindow {
                last_outcomes: self.recent_last_outcomes.unwrap_or(0),
                last_days: self.recent_last_days.unwrap_or(0),
            }),
            recompute: Some(pb::RecomputePolicy {
                every_outcomes: self.recompute_every_outcomes.unwrap_or(0),
                every_seconds: self.recompute_every_seconds.unwrap_or(0),
                refit_growth: self.refit_growth.unwrap_or(0.0),
                refit_every_seconds: self.refit_every_seconds.unwrap_or(0),
                rank_refresh_growth: self.rank_refresh_growth.unwrap_or(0.0),
                alert_horizon: self.alert_horizon.unwrap_or(0),
            }),
            min_coverage: self.min_coverage.unwrap_or(0.0),
            alpha: self.alpha.unwrap_or(0.0),
            seed: self.seed.unwrap_or(0),
            arms,
            arm_costs,
        })
    }
}

/// The request `dataset create` sends: the file's settings under the flags'.
fn create_request(a: CreateArgs) -> Result<pb::DatasetSpec, Failure> {
    let file = match &a.spec {
        Some(path) => read_spec_file(path)?,
        None => SpecSettings::default(),
    };
    let settings = SpecSettings {
        name: a.name,
        ..a.settings
    }
    .over(file);
    let name = settings.name.clone().ok_or_else(|| {
        bad_input("name: required (as the first argument or `name` in --spec)".into())
    })?;
    settings.to_wire(name)
}

/// A stored dataset's settings and counts, in the order `dataset show`
/// prints them; the keys are those of the `--spec` file.
fn dataset_fields(d: &pb::Dataset) -> Vec<(&'static str, Value)> {
    let s = d.spec.clone().unwrap_or_default();
    let o = s.overlap.unwrap_or_default();
    let r = s.recent.unwrap_or_default();
    let p = s.recompute.unwrap_or_default();
    let kind = match pb::OutcomeKind::try_from(s.outcome_kind) {
        Ok(pb::OutcomeKind::Continuous) => "continuous",
        Ok(pb::OutcomeKind::Binary) => "binary",
        _ => "unspecified",
    };
    let mut fields = vec![
        ("name", json!(s.name)),
        ("features", json!(s.feature_names)),
        ("outcome_kind", json!(kind)),
        ("treatment_cost", json!(s.treatment_cost)),
        ("folds", json!(s.folds)),
        ("overlap_eps", json!(o.eps)),
        ("overlap_max_extreme_share", json!(o.max_extreme_share)),
        ("overlap_min_effective_share", json!(o.min_effective_share)),
        ("recent_last_outcomes", json!(r.last_outcomes)),
        ("recent_last_days", json!(r.last_days)),
        ("recompute_every_outcomes", json!(p.every_outcomes)),
        ("recompute_every_seconds", json!(p.every_seconds)),
        ("refit_growth", json!(p.refit_growth)),
        ("refit_every_seconds", json!(p.refit_every_seconds)),
        ("rank_refresh_growth", json!(p.rank_refresh_growth)),
        ("alert_horizon", json!(p.alert_horizon)),
        ("min_coverage", json!(s.min_coverage)),
        ("alpha", json!(s.alpha)),
        ("seed", json!(s.seed)),
        ("created_at_ms", json!(d.created_at_ms)),
        ("units", json!(d.units)),
        ("outcomes", json!(d.outcomes)),
        ("predictions", json!(d.predictions)),
        ("active_models", json!(d.active_models)),
    ];
    // A binary dataset's settings read as they always did.
    if !s.arms.is_empty() {
        let costs: Vec<String> = s
            .arm_costs
            .iter()
            .filter(|c| c.cost != 0.0)
            .map(|c| format!("{}={}", c.arm, c.cost))
            .collect();
        let at = fields.len() - 5;
        fields.insert(at, ("arms", json!(s.arms)));
        fields.insert(at + 1, ("arm_cost", json!(costs.join(","))));
    }
    fields
}

pub fn dataset_json(d: &pb::Dataset) -> Value {
    Value::Object(
        dataset_fields(d)
            .into_iter()
            .map(|(k, v)| (k.to_string(), v))
            .collect(),
    )
}

/// One setting per line, keyed as in the `--spec` file.
fn dataset_text(d: &pb::Dataset) -> String {
    let mut out = String::new();
    for (key, value) in dataset_fields(d) {
        let text = match (key, &value) {
            ("created_at_ms", _) => {
                out.push_str(&format!(
                    "{:<28} {}\n",
                    "created",
                    ms_to_text(d.created_at_ms)
                ));
                continue;
            }
            (_, Value::Array(items)) => items
                .iter()
                .map(|i| i.as_str().unwrap_or_default())
                .collect::<Vec<_>>()
                .join(", "),
            (_, Value::String(s)) => s.clone(),
            (_, v) => v.to_string(),
        };
        out.push_str(&format!("{key:<28} {text}\n"));
    }
    out
}

fn registry(
    channel: tonic::transport::Channel,
) -> pb::dataset_registry_client::DatasetRegistryClient<tonic::transport::Channel> {
    pb::dataset_registry_client::DatasetRegistryClient::new(channel)
}

pub fn dataset(c: &Connection, action: DatasetAction) -> ExitCode {
    match action {
        DatasetAction::List => datasets(c),
        DatasetAction::Show { name } => run_async(async move {
            let d = registry(connect(c).await?)
                .get_dataset(request(c, pb::GetDatasetRequest { name })?)
                .await
                .map_err(failed)?
                .into_inner();
            show_dataset(c, &d);
            Ok(())
        }),
        DatasetAction::Create(a) => run_async(async move {
            let spec = create_request(*a)?;
            let d = registry(connect(c).await?)
                .create_dataset(request(c, pb::CreateDatasetRequest { spec: Some(spec) })?)
                .await
                .map_err(failed)?
                .into_inner();
            if c.format == Output::Table {
                eprintln!("plumbline: dataset created; as the server stored it:");
            }
            show_dataset(c, &d);
            Ok(())
        }),
    }
}

fn show_dataset(c: &Connection, d: &pb::Dataset) {
    match c.format {
        Output::Json => print_json(dataset_json(d)),
        Output::Table => print!("{}", dataset_text(d)),
    }
}

/// `dataset list` and `datasets`: one line per dataset, or every setting
/// of each in JSON.
pub fn datasets(c: &Connection) -> ExitCode {
    run_async(async {
        let list = registry(connect(c).await?)
            .list_datasets(request(c, pb::ListDatasetsRequest {})?)
            .await
            .map_err(failed)?
            .into_inner()
            .datasets;
        if c.format == Output::Json {
            print_json(json!(list.iter().map(dataset_json).collect::<Vec<_>>()));
            return Ok(());
        }
        println!(
            "{:<24} {:>9} {:>9} {:>11} {:>6} {:>8}  created",
            "dataset", "units", "outcomes", "predictions", "models", "features"
        );
        for d in list {
            let s = d.spec.clone().unwrap_or_default();
            println!(
                "{:<24} {:>9} {:>9} {:>11} {:>6} {:>8}  {}",
                s.name,
                d.units,
                d.outcomes,
                d.predictions,
                d.active_models,
                s.feature_names.len(),
                ms_to_text(d.created_at_ms)
            );
        }
        Ok(())
    })
}

fn model_json(m: &pb::Model) -> Value {
    json!({
        "dataset": m.dataset, "name": m.name, "version": m.version,
        "description": m.description, "predictions": m.predictions,
        "registered_at_ms": m.registered_at_ms, "retired_at_ms": m.retired_at_ms,
        "retired": m.retired_at_ms > 0,
        "blend": m.blend.as_ref().map(|b| json!({
            "snapshot_id": b.snapshot_id,
            "members": b.members.iter()
                .map(|x| json!({"model": x.model, "weight": x.weight}))
                .collect::<Vec<_>>(),
        })),
    })
}

/// The models table: name, version, predictions, registration and state,
/// then the description (cut so a line stays within 100 columns).
fn models_text(list: &[pb::Model]) -> String {
    let mut out = format!(
        "{:<24} {:<10} {:>11}  {:<20}  {:<7}  description\n",
        "model", "version", "predictions", "registered", "state"
    );
    for m in list {
        let state = if m.retired_at_ms > 0 {
            "retired"
        } else {
            "active"
        };
        let line = format!(
            "{:<24} {:<10} {:>11}  {:<20}  {:<7}  {}",
            m.name,
            m.version,
            m.predictions,
            ms_to_text(m.registered_at_ms),
            state,
            m.description
        );
        out.push_str(cut(&line, 100).trim_end());
        out.push('\n');
    }
    out
}

/// `line` cut to `width` characters, the cut marked with "...".
pub fn cut(line: &str, width: usize) -> String {
    if line.chars().count() <= width {
        return line.to_string();
    }
    let mut s: String = line.chars().take(width.saturating_sub(3)).collect();
    s.push_str("...");
    s
}

fn models_client(
    channel: tonic::transport::Channel,
) -> pb::model_registry_client::ModelRegistryClient<tonic::transport::Channel> {
    pb::model_registry_client::ModelRegistryClient::new(channel)
}

/// `model list` and `models`.
pub fn models(c: &Connection, d: &DatasetArg, include_retired: bool) -> ExitCode {
    run_async(async {
        let list = models_client(connect(c).await?)
            .list_models(request(
                c,
                pb::ListModelsRequest {
                    dataset: d.dataset.clone(),
                    include_retired,
                },
            )?)
            .await
            .map_err(failed)?
            .into_inner()
            .models;
        match c.format {
            Output::Json => print_json(json!(list.iter().map(model_json).collect::<Vec<_>>())),
            Output::Table => print!("{}", models_text(&list)),
        }
        Ok(())
    })
}

pub fn model(c: &Connection, action: ModelAction) -> ExitCode {
    match action {
        ModelAction::List { dataset, retired } => models(c, &dataset, retired),
        ModelAction::Register {
            dataset,
            names,
            version,
            description,
        } => run_async(async move {
            let mut client = models_client(connect(c).await?);
            let mut done = Vec::new();
            for name in names {
                let m = client
                    .register_model(request(
                        c,
                        pb::RegisterModelRequest {
                            dataset: dataset.dataset.clone(),
                            name,
                            version: version.clone(),
                            description: description.clone(),
                        },
                    )?)
                    .await
                    .map_err(failed)?
                    .into_inner();
                done.push(m);
            }
            match c.format {
                Output::Json => print_json(json!(done.iter().map(model_json).collect::<Vec<_>>())),
                Output::Table => print!("{}", models_text(&done)),
            }
            Ok(())
        }),
        ModelAction::RegisterBlend {
            dataset,
            name,
            window: w,
            version,
            description,
        } => run_async(async move {
            let m = models_client(connect(c).await?)
                .register_blend(request(
                    c,
                    pb::RegisterBlendRequest {
                        dataset: dataset.dataset,
                        name,
                        version,
                        description,
                        window: Some(window(&w.window)?),
                    },
                )?)
                .await
                .map_err(failed)?
                .into_inner();
            match c.format {
                Output::Json => print_json(model_json(&m)),
                Output::Table => {
                    print!("{}", models_text(std::slice::from_ref(&m)));
                    if let Some(b) = &m.blend {
                        println!(
                            "the {} board's blend of snapshot {}, predicted by the server as",
                            w.window, b.snapshot_id
                        );
                        for x in &b.members {
                            println!("  {:>8.4}  {}", x.weight, x.model);
                        }
                        println!(
                            "ranked from the next recompute; its error there is in-sample for \
                             these weights"
                        );
                    }
                }
            }
            Ok(())
        }),
        ModelAction::Retire { dataset, name } => run_async(async move {
            let m = models_client(connect(c).await?)
                .retire_model(request(
                    c,
                    pb::RetireModelRequest {
                        dataset: dataset.dataset,
                        name,
                    },
                )?)
                .await
                .map_err(failed)?
                .into_inner();
            match c.format {
                Output::Json => print_json(model_json(&m)),
                Output::Table => println!(
                    "model {} of {} retired at {}; its {} predictions are kept, and it leaves \
                     the next scoreboard",
                    m.name,
                    m.dataset,
                    ms_to_text(m.retired_at_ms),
                    m.predictions
                ),
            }
            Ok(())
        }),
    }
}

#[derive(Debug, Args)]
pub struct RecomputeArgs {
    #[command(flatten)]
    pub dataset: DatasetArg,
    /// Refit the nuisance models from scratch instead of scoring new units
    /// with the current fits.
    #[arg(long)]
    pub refit: bool,
    /// Recompute the cumulative window's rank and calibration metrics over
    /// every unit, even if it has not grown enough since they last were.
    #[arg(long)]
    pub refresh_ranks: bool,
}

/// Asks for a recompute and waits for it: a refit of a large dataset can
/// take minutes, so there is no deadline but the user's Ctrl-C.
pub fn recompute(c: &Connection, a: &RecomputeArgs) -> ExitCode {
    run_async(async {
        let r = pb::scoring_client::ScoringClient::new(connect(c).await?)
            .recompute(request(
                c,
                pb::RecomputeRequest {
                    dataset: a.dataset.dataset.clone(),
                    refit: a.refit,
                    refresh_ranks: a.refresh_ranks,
                },
            )?)
            .await
            .map_err(failed)?
            .into_inner();
        match c.format {
            Output::Json => print_json(json!({
                "dataset": a.dataset.dataset, "snapshot_id": r.snapshot_id,
                "refitted": r.refitted, "units": r.units, "millis": r.millis,
            })),
            Output::Table => {
                println!(
                    "{}: snapshot {} in {:.0} ms, {} units in the cumulative window",
                    a.dataset.dataset, r.snapshot_id, r.millis, r.units
                );
                println!(
                    "nuisance models {}",
                    if r.refitted {
                        "refitted"
                    } else {
                        "kept: the new units were scored with the current fits"
                    }
                );
            }
        }
        Ok(())
    })
}

#[derive(Debug, Args)]
pub struct CompareArgs {
    #[command(flatten)]
    pub dataset: DatasetArg,
    /// The first model (or a baseline: zero-effect, constant-effect).
    pub first: String,
    /// The second model.
    pub second: String,
    #[command(flatten)]
    pub window: WindowArg,
    /// On a dataset with arms, the contrast to compare on: the arm whose
    /// board against the reference holds the pair.
    #[arg(long, value_name = "ARM")]
    pub arm: Option<String>,
}

/// The reading of a difference for people: which model errs less, if the
/// interval says so.
fn compare_verdict(first: &str, second: &str, d: &pb::Difference) -> String {
    if d.ci_high < 0.0 {
        format!("{first} has the lower error")
    } else if d.ci_low > 0.0 {
        format!("{second} has the lower error")
    } else {
        "the two are not distinguishable on these units".into()
    }
}

/// What a policy-gain difference says, in words.
fn policy_verdict(first: &str, second: &str, d: &pb::Difference) -> String {
    if d.ci_low > 0.0 {
        format!("{first}'s targeting is worth more")
    } else if d.ci_high < 0.0 {
        format!("{second}'s targeting is worth more")
    } else {
        "the two policies are not distinguishable on these units".into()
    }
}

/// CompareModels: the first model's corrected PEHE minus the second's on
/// the units both cover. When the server cannot answer (no recompute yet,
/// a model not ranked in the window) its own message is printed.
pub fn compare(c: &Connection, a: &CompareArgs) -> ExitCode {
    run_async(async {
        let r = pb::scoring_client::ScoringClient::new(connect(c).await?)
            .compare_models(request(
                c,
                pb::CompareModelsRequest {
                    dataset: a.dataset.dataset.clone(),
                    first: a.first.clone(),
                    second: a.second.clone(),
                    window: Some(window(&a.window.window)?),
                    arm: a.arm.clone().unwrap_or_default(),
                },
            )?)
            .await
            .map_err(failed)?
            .into_inner();
        let d = r.difference.unwrap_or_default();
        match c.format {
            Output::Json => {
                let policy = r.policy_difference.map(|p| {
                    json!({
                        "estimate": p.estimate, "se": p.se, "ci_low": p.ci_low,
                        "ci_high": p.ci_high, "p_value": p.p_value,
                        "joint_low": p.joint_low, "joint_high": p.joint_high,
                    })
                });
                print_json(json!({
                    "dataset": a.dataset.dataset, "window": a.window.window,
                    "first": a.first, "second": a.second, "units": r.units,
                    "estimate": d.estimate, "se": d.se, "ci_low": d.ci_low, "ci_high": d.ci_high,
                    "p_value": d.p_value, "joint_low": d.joint_low, "joint_high": d.joint_high,
                    "policy_difference": policy,
                }))
            }
            Output::Table => {
                println!(
                    "{} minus {}, corrected PEHE ({} window, {} units both predicted):",
                    a.first, a.second, a.window.window, r.units
                );
                println!(
                    "  difference {:.4} (se {:.4}), 95% CI [{:.4}, {:.4}], p {:.3}",
                    d.estimate, d.se, d.ci_low, d.ci_high, d.p_value
                );
                println!("  {}", compare_verdict(&a.first, &a.second, &d));
                if let Some(p) = r.policy_difference {
                    println!(
                        "{} minus {}, policy gain per unit (treating where the predicted effect \
                         exceeds the cost):",
                        a.first, a.second
                    );
                    println!(
                        "  difference {:+.4} (se {:.4}), 95% CI [{:+.4}, {:+.4}], p {:.3}",
                        p.estimate, p.se, p.ci_low, p.ci_high, p.p_value
                    );
                    println!("  {}", policy_verdict(&a.first, &a.second, &p));
                }
            }
        }
        Ok(())
    })
}

#[cfg(test)]
mod tests {
    use super::*;
    use clap::Parser;

    #[derive(Debug, Parser)]
    struct Probe {
        #[command(flatten)]
        create: CreateArgs,
    }

    fn temp_file(text: &str) -> PathBuf {
        let p = std::env::temp_dir().join(format!(
            "plumbline-spec-{}-{:?}.toml",
            std::process::id(),
            std::thread::current().id()
        ));
        std::fs::write(&p, text).expect("write spec");
        p
    }

    #[test]
    fn flags_override_the_file_and_the_rest_goes_as_zero() {
        let file = temp_file(
            "name = \"from-file\"\nfeatures = [\"a\", \"b\"]\noutcome_kind = \"binary\"\n\
             folds = 7\nalpha = 0.1\nrecent_last_days = 30\n",
        );
        let path = file.display().to_string();
        let probe = Probe::parse_from([
            "probe", "flagged", "--spec", &path, "--folds", "3", "--seed", "9",
        ]);
        let spec = create_request(probe.create).expect("valid");
        let _ = std::fs::remove_file(&file);
        assert_eq!(spec.name, "flagged");
        assert_eq!(spec.feature_names, ["a", "b"]);
        assert_eq!(spec.outcome_kind, pb::OutcomeKind::Binary as i32);
        assert_eq!(spec.folds, 3, "the flag wins");
        assert_eq!(spec.seed, 9);
        assert_eq!(spec.alpha, 0.1, "the file fills what no flag gave");
        assert_eq!(spec.recent.unwrap_or_default().last_days, 30);
        assert_eq!(spec.min_coverage, 0.0, "left to the server's default");
    }

    #[test]
    fn a_misspelt_file_key_or_a_missing_setting_is_bad_input() {
        let file = temp_file("name = \"x\"\nfeatures = [\"a\"]\nfolds_typo = 3\n");
        let path = file.display().to_string();
        let err = create_request(Probe::parse_from(["probe", "--spec", &path]).create)
            .expect_err("unknown key");
        let _ = std::fs::remove_file(&file);
        assert_eq!(err.code(), EXIT_BAD_INPUT);
        assert!(err.message().contains("folds_typo"), "{}", err.message());

        let err = create_request(Probe::parse_from(["probe", "x", "--features", "a"]).create)
            .expect_err("no outcome kind");
        assert!(
            err.message().starts_with("outcome_kind"),
            "{}",
            err.message()
        );
        let err = create_request(
            Probe::parse_from(["probe", "--features", "a", "--outcome-kind", "binary"]).create,
        )
        .expect_err("no name");
        assert!(err.message().starts_with("name"), "{}", err.message());
    }

    #[test]
    fn every_setting_of_a_stored_dataset_is_shown_within_100_columns() {
        let d = pb::Dataset {
            spec: Some(pb::DatasetSpec {
                name: "d".into(),
                feature_names: vec!["x1".into(), "x2".into()],
                outcome_kind: pb::OutcomeKind::Continuous as i32,
                folds: 5,
                ..Default::default()
            }),
            ..Default::default()
        };
        let text = dataset_text(&d);
        for key in [
            "treatment_cost",
            "folds",
            "overlap_eps",
            "overlap_max_extreme_share",
            "overlap_min_effective_share",
            "recent_last_outcomes",
            "recent_last_days",
            "recompute_every_outcomes",
            "recompute_every_seconds",
            "refit_growth",
            "refit_every_seconds",
            "rank_refresh_growth",
            "alert_horizon",
            "min_coverage",
            "alpha",
            "seed",
        ] {
            assert!(
                text.lines().any(|l| l.starts_with(key)),
                "{key} missing:\n{text}"
            );
        }
        assert!(text.contains("x1, x2"), "{text}");
        assert!(text.lines().all(|l| l.chars().count() <= 100), "{text}");
    }
}
