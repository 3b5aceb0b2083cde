//! The `labelweir` binary: parses the command line, runs a subcommand, maps errors to exit codes.

use std::process::ExitCode;

use clap::{CommandFactory, Parser, Subcommand};
mod cli;

use cli::{exit, Failure};

/// labelweir: guards a training pool against poisoned and systematically wrong vendor labels.
///
/// A flag is a suspicion for human review, not proof.
#[derive(Debug, Parser)]
#[command(name = "labelweir", version, about, long_about = None)]
struct Cli {
    #[command(subcommand)]
    command: Command,
    /// Log lines as `text` or `json` (daemon and demo). Default: text on a terminal, JSON otherwise
    /// (e.g. under systemd). The filter comes from LABELWEIR_LOG (default `info`).
    #[arg(long, global = true, value_enum, value_name = "FORMAT")]
    log_format: Option<cli::logging::LogFormat>,
}

#[derive(Debug, Subcommand)]
enum Command {
    Assess(cli::assess::Args),
    Init(cli::init::Args),
    Run(cli::run::Args),
    Demo(cli::demo::Args),
    Config(cli::config_cmd::Args),
    Quarantine(cli::quarantine::Args),
    Trusted(cli::trusted::Args),
    Pool(cli::pool::Args),
    Vendor(cli::vendor::Args),
    SpotCheck(cli::spot::Args),
    Audit(cli::audit::Args),
    Bench(cli::bench::Args),
    Features(cli::features::Args),
    Generate(cli::generate::Args),
}

/// Give SIGPIPE back its default action, so a command whose output pipe closes early (`labelweir assess
/// ... --json | head -1`) ends quietly, as Unix filters do, instead of failing on the write (the Rust
/// runtime ignores SIGPIPE, which turns every later print into an error). Not for `run` and `demo`: the
/// daemon writes to sockets whose peers may go away, and must see that as an error on the one connection.
/// The admin client sends with `MSG_NOSIGNAL` for the same reason.
fn restore_sigpipe() {
    // SAFETY: called once at start, before any other thread exists; SIG_DFL is a valid disposition for
    // SIGPIPE and no handler function is involved.
    unsafe {
        libc::signal(libc::SIGPIPE, libc::SIG_DFL);
    }
}

fn main() -> ExitCode {
    let cli = match Cli::try_parse() {
        Ok(cli) => cli,
        Err(e) => {
            let code = if e.use_stderr() {
                exit::INPUT
            } else {
                exit::OK
            };
            let _ = e.print();
            return ExitCode::from(code);
        }
    };
    if !matches!(cli.command, Command::Run(_) | Command::Demo(_)) {
        restore_sigpipe();
    }
    cli::logging::choose(cli.log_format);
    let result = match cli.command {
        Command::Assess(a) => cli::assess::run(a),
        Command::Init(a) => cli::init::run(a),
        Command::Run(a) => cli::run::run(a),
        Command::Demo(a) => cli::demo::run(a),
        Command::Config(a) => cli::config_cmd::run(a),
        Command::Quarantine(a) => cli::quarantine::run(a),
        Command::Trusted(a) => cli::trusted::run(a),
        Command::Pool(a) => cli::pool::run(a),
        Command::Vendor(a) => cli::vendor::run(a),
        Command::SpotCheck(a) => cli::spot::run(a),
        Command::Audit(a) => cli::audit::run(a),
        Command::Bench(a) => cli::bench::run(a),
        Command::Features(a) => cli::features::run(a),
        Command::Generate(a) => cli::generate::run(a, Cli::command()),
    };
    match result {
        Ok(code) => ExitCode::from(code),
        Err(err) => {
            let code = err
                .downcast_ref::<Failure>()
                .map(|f| f.code)
                .unwrap_or(exit::INTERNAL);
            if std::env::args().any(|a| a == "--json") {
                // Under --json the error is JSON too (on stderr, one line), for scripts.
                let v = serde_json::json!({ "error": format!("{err:#}"), "exit_code": code });
                eprintln!("{v}");
            } else {
                eprintln!("labelweir: {err:#}");
            }
            ExitCode::from(code)
        }
    }
}
