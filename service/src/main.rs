//! `probity`: the command-line tool. Offline commands (check a model file, score a CSV file, the demo) live in
//! [`cli`]; each subcommand is one variant of [`Command`] with its own argument struct.
#![warn(clippy::unwrap_used, clippy::expect_used)]

use std::process::ExitCode;

use clap::{Parser, Subcommand};

mod cli;

/// mimalloc rather than the C library's allocator: a request allocates many small strings (named features),
/// and memory freed after loading a large model file goes back to the system instead of staying resident.
#[global_allocator]
static ALLOCATOR: mimalloc::MiMalloc = mimalloc::MiMalloc;

/// Serve binary classifiers as calibrated probabilities, and watch them.
#[derive(Debug, Parser)]
#[command(name = "probity", version, about)]
struct Cli {
    #[command(subcommand)]
    command: Command,
}

#[derive(Debug, Subcommand)]
enum Command {
    /// Load and validate a model file, then print a summary of it.
    Check(cli::check::CheckArgs),
    /// Score every row of a CSV or Parquet file with a model and write the results as CSV.
    Score(cli::score::ScoreArgs),
    /// Explain every row of a CSV or Parquet file: each feature's contribution to the log-odds and the top reasons.
    Explain(cli::explain::ExplainArgs),
    /// Write the demo scenario's invented card transactions (Harbourline Card Services) as CSV.
    GenerateDemoData(cli::demo_data::GenerateArgs),
    /// Run the demo: generate transactions, score them with both demo models, show how well each does.
    Demo(cli::demo::DemoArgs),
    /// Fit a calibration map from a labelled holdout (CSV or Parquet) and write a new model file version carrying it.
    Calibrate(cli::calibrate::CalibrateArgs),
    /// The report's figures on a labelled CSV or Parquet file, offline: calibration, log-loss, Brier, AUC, KS,
    /// gains, the operating point, and a paired comparison with a challenger (table, JSON, SVG).
    Evaluate(cli::evaluate::EvaluateArgs),
    /// Report from a prediction store: calibration, log-loss, Brier, AUC, KS, gains, PSI, operating points at the
    /// served decision rules (table, JSON, SVG).
    Report(cli::report::ReportArgs),
    /// Champion against challenger on one route, from a prediction store (table, JSON, SVG).
    Compare(cli::compare::CompareArgs),
    /// Send outcomes (prediction id, label, optional time) from a CSV file to a running server, in batches.
    SendOutcomes(cli::send_outcomes::SendOutcomesArgs),
    /// Make a challenger a route's champion on a running server (the `admin` role); recorded in the history.
    Promote(cli::promote::PromoteArgs),
    /// Return a route to its previous champion from the route history, on a running server (the `admin` role);
    /// recorded in the history like a promotion.
    Restore(cli::promote::RestoreArgs),
    /// A running server's route history: promotions and restores.
    RouteHistory(cli::promote::HistoryArgs),
    /// Run the gRPC scoring service until SIGTERM or SIGINT.
    Serve(probity::serve::ServeArgs),
}

/// Flags of earlier releases and their new names: refused, never silently accepted.
const RENAMED_FLAGS: [(&str, &str); 1] = [("--log", "--store")];

/// The first flag of an earlier release among `args`, as an error naming the new flag.
fn renamed_flag(args: &[std::ffi::OsString]) -> Option<String> {
    args.iter().find_map(|a| {
        let a = a.to_str()?;
        RENAMED_FLAGS.iter().find_map(|(old, new)| {
            let exact = a == *old || a.strip_prefix(old).is_some_and(|r| r.starts_with('='));
            exact.then(|| format!("{old} was renamed {new} (the prediction store); --log-level and --log-format are the process log"))
        })
    })
}

fn run() -> anyhow::Result<()> {
    let args: Vec<std::ffi::OsString> = std::env::args_os().collect();
    if let Some(message) = renamed_flag(&args) {
        anyhow::bail!(message);
    }
    match Cli::parse_from(args).command {
        Command::Check(args) => cli::check::run(&args),
        Command::Score(args) => cli::score::run(&args),
        Command::Explain(args) => cli::explain::run(&args),
        Command::GenerateDemoData(args) => cli::demo_data::run(&args),
        Command::Demo(args) => cli::demo::run(&args),
        Command::Calibrate(args) => cli::calibrate::run(&args),
        Command::Evaluate(args) => cli::evaluate::run(&args),
        Command::Report(args) => cli::report::run(&args),
        Command::Compare(args) => cli::compare::run(&args),
        Command::SendOutcomes(args) => cli::send_outcomes::run(&args),
        Command::Promote(args) => cli::promote::run_promote(&args),
        Command::Restore(args) => cli::promote::run_restore(&args),
        Command::RouteHistory(args) => cli::promote::run_history(&args),
        Command::Serve(args) => Ok(probity::serve::run(&args)?),
    }
}

fn main() -> ExitCode {
    match run() {
        Ok(()) => ExitCode::SUCCESS,
        // The reader of a pipe exited early (`probity report --json | head`): nothing more to say.
        Err(err) if cli::is_broken_pipe(&err) => ExitCode::SUCCESS,
        Err(err) => {
            // One line: the error and its causes, outermost first.
            eprintln!("error: {}", probity::client::error_line(&err));
            ExitCode::FAILURE
        }
    }
}
