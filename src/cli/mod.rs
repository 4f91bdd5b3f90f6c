//! The `plumbline` command line. One file per command; each parses its
//! arguments into a request and applies it.

mod admin;
mod board_table;
mod client;
mod clock;
mod demo;
mod demo_arms;
mod ingest;
mod loadtest;
mod progress;
mod render;
mod score;
mod score_arms;
mod serve;
mod simulate;
mod summary;
mod token;

use std::process::ExitCode;

use clap::{CommandFactory, FromArgMatches, Parser, Subcommand};

pub use demo::DemoArgs;
pub use score::ScoreArgs;
pub use serve::ServeArgs;
pub use simulate::SimulateArgs;

#[derive(Debug, Parser)]
#[command(
    name = "plumbline",
    version,
    about = "Score treatment-effect (CATE / uplift) models against factual outcomes",
    long_about = "plumbline scores treatment-effect models without counterfactuals: it cross-fits \
                  propensity and outcome models, forms AIPW pseudo-outcomes, and reports each \
                  model's influence-function-corrected error with honest standard errors."
)]
pub struct Cli {
    #[command(subcommand)]
    pub command: Command,
}

#[derive(Debug, Subcommand)]
pub enum Command {
    /// Run the service: gRPC API, SQLite store, recomputes, alerts and metrics.
    Serve(ServeArgs),
    /// Run the service in-process on an invented scenario and drive it through the API.
    Demo(DemoArgs),
    /// Score models offline from a units CSV and a predictions CSV.
    Score(ScoreArgs),
    /// Write a units / predictions CSV pair from a design with known effects.
    Simulate(SimulateArgs),
    /// Create a dataset, show one, or list them.
    Dataset {
        #[command(flatten)]
        connection: client::Connection,
        #[command(subcommand)]
        action: admin::DatasetAction,
    },
    /// Register, retire or list a dataset's models.
    Model {
        #[command(flatten)]
        connection: client::Connection,
        #[command(subcommand)]
        action: admin::ModelAction,
    },
    /// Recompute a dataset's scores now (optionally with a nuisance refit) and say what it did.
    Recompute {
        #[command(flatten)]
        connection: client::Connection,
        #[command(flatten)]
        args: admin::RecomputeArgs,
    },
    /// Compare two models: corrected PEHE of the first minus the second's, with its interval.
    Compare {
        #[command(flatten)]
        connection: client::Connection,
        #[command(flatten)]
        args: admin::CompareArgs,
    },
    /// List the datasets of a running server (`dataset list`).
    Datasets {
        #[command(flatten)]
        connection: client::Connection,
    },
    /// List a dataset's models (`model list`).
    Models {
        #[command(flatten)]
        connection: client::Connection,
        #[command(flatten)]
        dataset: client::DatasetArg,
        /// Include retired models.
        #[arg(long)]
        retired: bool,
    },
    /// The latest scoreboard of a window.
    Scoreboard {
        #[command(flatten)]
        connection: client::Connection,
        #[command(flatten)]
        dataset: client::DatasetArg,
        #[command(flatten)]
        window: client::WindowArg,
        /// Every column: each model's se, its interval taken alone, and
        /// every estimator's score.
        #[arg(long)]
        wide: bool,
    },
    /// One model's score over time.
    History {
        #[command(flatten)]
        connection: client::Connection,
        #[command(flatten)]
        args: client::HistoryArgs,
    },
    /// Events; --follow keeps streaming.
    Events {
        #[command(flatten)]
        connection: client::Connection,
        #[command(flatten)]
        args: client::EventsArgs,
    },
    /// The overlap report of a window.
    Overlap {
        #[command(flatten)]
        connection: client::Connection,
        #[command(flatten)]
        dataset: client::DatasetArg,
        #[command(flatten)]
        window: client::WindowArg,
        /// On a dataset with arms, the contrast whose overlap to read: the
        /// arm compared with the reference.
        #[arg(long, value_name = "ARM")]
        arm: Option<String>,
    },
    /// Drive a server on this machine with concurrent clients, recomputes and a refit; report throughput and read latency.
    Loadtest(loadtest::LoadtestArgs),
    /// Create, revoke or list access tokens on a server's data directory.
    Token(token::TokenArgs),
    /// Backfill units, outcomes or predictions from a CSV file.
    Ingest {
        #[command(flatten)]
        connection: client::Connection,
        #[command(flatten)]
        args: ingest::IngestArgs,
    },
}

/// Exit status for bad input (files, columns, values, arguments).
pub const EXIT_BAD_INPUT: u8 = 2;
/// Exit status when the data cannot support the estimates (named state).
pub const EXIT_DEGENERATE: u8 = 3;

/// Commands that print for a person or a pipeline stop quietly when what
/// reads their output goes away (`plumbline scoreboard ... | head -1`), as
/// other command-line tools do, instead of failing on the closed pipe.
/// The server keeps Rust's default (the signal ignored; its sockets report
/// the error to the call that wrote).
fn stop_quietly_on_closed_pipe() {
    #[cfg(unix)]
    // SAFETY: restores the default disposition of one signal before any
    // thread is started; no handler runs Rust code.
    unsafe {
        libc::signal(libc::SIGPIPE, libc::SIG_DFL);
    }
}

/// Environment variables whose values must never reach a screen or a log
/// (a token; a store URL may hold a password).
const SECRET_VARIABLES: [&str; 2] = ["PLUMBLINE_TOKEN", "PLUMBLINE_STORE_URL"];

/// Help shows an option's variable as `[env: NAME=value]`, and as
/// `[env: NAME=]` when it is not set, which reads as "set to empty". The
/// value is shown only when the variable is set and not a secret.
fn tidy_env_help(command: clap::Command) -> clap::Command {
    let command = command.mut_args(|arg| {
        let hide = match arg.get_env() {
            Some(name) => {
                std::env::var_os(name).is_none()
                    || SECRET_VARIABLES
                        .iter()
                        .any(|s| name == std::ffi::OsStr::new(s))
            }
            None => false,
        };
        if hide {
            arg.hide_env_values(true)
        } else {
            arg
        }
    });
    let names: Vec<String> = command
        .get_subcommands()
        .map(|s| s.get_name().to_string())
        .collect();
    names
        .iter()
        .fold(command, |c, name| c.mut_subcommand(name, tidy_env_help))
}

/// The command line as parsed, with the help tidied by [`tidy_env_help`].
pub fn parse() -> Cli {
    let matches = tidy_env_help(Cli::command()).get_matches();
    Cli::from_arg_matches(&matches).unwrap_or_else(|e| e.exit())
}

pub fn run() -> ExitCode {
    let cli = parse();
    if !matches!(cli.command, Command::Serve(_) | Command::Demo(_)) {
        stop_quietly_on_closed_pipe();
    }
    match cli.command {
        Command::Demo(args) => demo::run(&args),
        Command::Dataset { connection, action } => admin::dataset(&connection, action),
        Command::Model { connection, action } => admin::model(&connection, action),
        Command::Recompute { connection, args } => admin::recompute(&connection, &args),
        Command::Compare { connection, args } => admin::compare(&connection, &args),
        Command::Datasets { connection } => admin::datasets(&connection),
        Command::Models {
            connection,
            dataset,
            retired,
        } => admin::models(&connection, &dataset, retired),
        Command::Scoreboard {
            connection,
            dataset,
            window,
            wide,
        } => client::scoreboard(&connection, &dataset, &window, wide),
        Command::History { connection, args } => client::history(&connection, &args),
        Command::Events { connection, args } => client::events(&connection, &args),
        Command::Overlap {
            connection,
            dataset,
            window,
            arm,
        } => client::overlap(&connection, &dataset, &window, arm.as_deref()),
        Command::Ingest { connection, args } => ingest::run(&connection, &args),
        Command::Score(args) => score::run(&args),
        Command::Simulate(args) => simulate::run(&args),
        Command::Serve(args) => serve::run(&args),
        Command::Token(args) => token::run(&args),
        Command::Loadtest(args) => loadtest::run(&args),
    }
}
