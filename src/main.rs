//! The `convoy` binary: parse the command line, set up logging, hand over to the library.

use clap::Parser;

fn main() -> std::process::ExitCode {
    tracing_subscriber::fmt()
        .with_env_filter(
            tracing_subscriber::EnvFilter::try_from_env("CONVOY_LOG")
                .unwrap_or_else(|_| tracing_subscriber::EnvFilter::new("info")),
        )
        .with_writer(std::io::stderr)
        // Colour only for a person at a terminal, never in log files.
        .with_ansi(std::io::IsTerminal::is_terminal(&std::io::stderr()))
        .init();
    let cli = convoy::cli::Cli::parse();
    match convoy::cli::dispatch(cli) {
        Ok(()) => std::process::ExitCode::SUCCESS,
        Err(e) => {
            eprintln!("convoy: {e}");
            std::process::ExitCode::FAILURE
        }
    }
}
