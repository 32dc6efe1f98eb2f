//! The `flipswarm` binary: parse, dispatch, map errors to exit codes.

use clap::Parser;
use flipswarm::cli::{self, exit, Cli, Command};
use tracing_subscriber::EnvFilter;

fn main() {
    let cli = match Cli::try_parse() {
        Ok(c) => c,
        Err(e) => {
            let code = if e.use_stderr() { exit::INPUT } else { exit::OK };
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
    tracing_subscriber::fmt().with_env_filter(filter).with_writer(std::io::stderr).with_target(false).init();
    let code = match &cli.command {
        Command::Run(args) => cli::run::execute(args),
        Command::Keys => {
            for k in flipswarm::config::SCHEMA {
                println!("{:<38} {}  [default: {}]", k.path, k.meaning, k.default);
            }
            exit::OK
        }
    };
    std::process::exit(code);
}
