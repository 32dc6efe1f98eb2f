//! The `flipswarm` binary: parse, dispatch, map errors to exit codes.

use clap::{CommandFactory, FromArgMatches};
use flipswarm::cli::{self, exit, Cli, Command};
use tracing_subscriber::EnvFilter;

/// Every configuration key, for `run --help`.
fn keys_help() -> String {
    let mut s = String::from("Configuration keys (unit in the name; also `flipswarm keys`):\n");
    for k in flipswarm::config::SCHEMA {
        s.push_str(&format!(
            "  {:<38} {} [default: {}]\n",
            k.path, k.meaning, k.default
        ));
    }
    s.push_str("\nExit codes: 0 success; 1 some trajectories failed; 2 bad usage or input (nothing was run);\n3 stopped on request, resumable with `flipswarm resume`; 4 runtime or I/O error.");
    s
}

fn main() {
    // Die quietly on a closed pipe (`flipswarm inspect run | head`), as
    // command-line tools do, instead of failing a print.
    // SAFETY: setting a signal disposition to its default at start-up, before any threads exist.
    unsafe {
        libc::signal(libc::SIGPIPE, libc::SIG_DFL);
    }
    let command = Cli::command().mut_subcommand("run", |c| c.after_long_help(keys_help()));
    let cli = match command
        .try_get_matches()
        .and_then(|m| Cli::from_arg_matches(&m))
    {
        Ok(c) => c,
        Err(e) => {
            let code = if e.use_stderr() {
                exit::INPUT
            } else {
                exit::OK
            };
            let _ = e.print();
            std::process::exit(code);
        }
    };
    let level = match (cli.quiet, cli.verbose) {
        (true, _) => "warn",
        (false, 0) => "info",
        (false, 1) => "debug",
        _ => "trace",
    };
    let filter = EnvFilter::try_from_env("FLIPSWARM_LOG").unwrap_or_else(|_| EnvFilter::new(level));
    tracing_subscriber::fmt()
        .with_env_filter(filter)
        .with_writer(std::io::stderr)
        .with_target(false)
        .init();
    let code = match &cli.command {
        Command::Run(args) => cli::run::execute(args),
        Command::Resume(args) => cli::resume::execute(args),
        Command::Inspect(args) => cli::inspect::execute(args),
        Command::Merge(args) => cli::merge::execute(args),
        Command::Export(args) => cli::export::execute(args),
        Command::Analyze(args) => cli::analyze::execute(args),
        Command::SinglePoint(args) => cli::single_point::execute(args),
        Command::Optimize(args) => cli::optimize::execute(args),
        Command::Modes(args) => cli::modes::execute(args),
        Command::Sample(args) => cli::sample::execute(args),
        Command::Spectrum(args) => cli::spectrum::execute(args),
        Command::Submit(args) => cli::submit::execute(args),
        Command::Status(args) => cli::status::execute(args),
        Command::Keys => {
            for k in flipswarm::config::SCHEMA {
                println!("{:<38} {}  [default: {}]", k.path, k.meaning, k.default);
            }
            exit::OK
        }
    };
    std::process::exit(code);
}
