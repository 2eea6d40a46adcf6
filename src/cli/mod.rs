//! The `tamis` command line: argument parsing, dispatch, and exit codes.
//!
//! Exit codes (documented in `--help` and the README):
//! 0 success; 1 an operational failure (I/O on output, internal error, a store that
//! failed, a next hop that could not take released mail); 2 bad input (a file that is not
//! mail, unreadable input, invalid arguments); 3 partly done — an operator command ran, but
//! some of what it was asked did not happen (a report recorded as unmatched or refused, a
//! message not found or already released); each such item is named in the output.

mod audit;
mod check;
mod config_check;
mod corpus;
mod demo;
mod eval;
mod extract;
mod features;
mod figures;
mod held;
mod input;
mod ops;
mod report;
mod score;
mod serve;
mod train;
mod tune;

use std::process::ExitCode;

use clap::{Parser, Subcommand};

/// Exit code for success.
pub const EXIT_OK: u8 = 0;
/// Exit code for an operational failure.
pub const EXIT_FAILURE: u8 = 1;
/// Exit code for bad input: unreadable files, files that are not mail, invalid arguments.
pub const EXIT_BAD_INPUT: u8 = 2;
/// Exit code of an operator command that ran but did not do all it was asked: some report
/// was not counted (unmatched or refused), some message was not found, already released or
/// being released elsewhere.
pub const EXIT_PARTIAL: u8 = 3;

/// tamis — an inline mail filter for relay operators.
///
/// It reads each message the way a person would see it, turns the words into hashed
/// n-gram features and scores them with a linear model trained on your own mail.
///
/// Exit codes: 0 success, 1 operational failure, 2 bad input (a file that is not mail,
/// an unreadable file, invalid arguments), 3 partly done (an operator command that could
/// not do everything it was asked: some report not counted, some message not released;
/// each is named in its output).
#[derive(Parser, Debug)]
#[command(name = "tamis", version, about, long_about)]
struct Cli {
    #[command(subcommand)]
    command: Command,
}

#[derive(Subcommand, Debug)]
enum Command {
    /// Show what the filter sees in messages: tokens per field, URL hosts, signals, features.
    Extract(extract::ExtractArgs),
    /// Write the invented demonstration corpus (labelled junk and legitimate mail).
    Corpus(corpus::CorpusArgs),
    /// Train a model from labelled mail (cross-validation picks n-gram order and C).
    Train(train::TrainArgs),
    /// Measure a model on labelled mail: ROC AUC, junk caught at 0.1% / 1% false positives.
    Eval(eval::EvalArgs),
    /// Choose per-domain tag and quarantine thresholds for a false-positive target.
    Tune(tune::TuneArgs),
    /// Score messages: margin, probability and the features that weighed most.
    Score(score::ScoreArgs),
    /// Write the feature vectors of labelled mail in svmlight/libsvm format.
    Features(features::FeaturesArgs),
    /// Run the daemon a relay talks to (relay protocol, metrics, reload on SIGHUP).
    Serve(serve::ServeArgs),
    /// Send messages to a running daemon and print its verdicts.
    Check(check::CheckArgs),
    /// Run the whole story on invented mail: corpus, training, daemon, verdicts per domain.
    Demo(demo::DemoArgs),
    /// Work with configuration files.
    #[command(subcommand)]
    Config(config_check::ConfigCommand),
    /// Held (quarantined) mail: list, show, release, delete, purge.
    Held(held::HeldArgs),
    /// Report messages as junk or legitimate, by file or verdict id.
    Report(report::ReportArgs),
    /// Review a random sample of held mail and record the answers.
    Audit(audit::AuditArgs),
    /// Per-domain figures: actions, reports, releases, false-positive and catch rates.
    Figures(figures::FiguresArgs),
}

/// Parses the process arguments, runs the subcommand and maps its outcome to an exit code.
pub fn main() -> ExitCode {
    let cli = match Cli::try_parse() {
        Ok(cli) => cli,
        Err(e) => {
            // clap prints help and version to stdout with success, usage errors to stderr.
            let code = if e.use_stderr() {
                EXIT_BAD_INPUT
            } else {
                EXIT_OK
            };
            let _ = e.print();
            return ExitCode::from(code);
        }
    };
    let outcome = match cli.command {
        Command::Extract(args) => extract::run(&args),
        Command::Corpus(args) => corpus::run(&args).map(|()| EXIT_OK),
        Command::Train(args) => train::run(&args),
        Command::Eval(args) => eval::run(&args),
        Command::Tune(args) => tune::run(&args),
        Command::Score(args) => score::run(&args),
        Command::Features(args) => features::run(&args),
        Command::Serve(args) => serve::run(&args),
        Command::Check(args) => check::run(&args),
        Command::Config(command) => config_check::run(&command),
        Command::Demo(args) => demo::run(&args),
        Command::Held(args) => held::run(&args),
        Command::Report(args) => report::run(&args),
        Command::Audit(args) => audit::run(&args),
        Command::Figures(args) => figures::run(&args),
    };
    match outcome {
        Ok(code) => ExitCode::from(code),
        Err(e) => {
            eprintln!("tamis: {e:#}");
            let bad_input = e.chain().any(|cause| cause.is::<input::BadInput>());
            ExitCode::from(if bad_input {
                EXIT_BAD_INPUT
            } else {
                EXIT_FAILURE
            })
        }
    }
}
