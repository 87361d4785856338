//! Command-line parsing; each command hands over to the library.

use std::path::PathBuf;
use std::process::ExitCode;

use clap::{Parser, Subcommand};

#[derive(Parser)]
#[command(
    name = "partsift",
    version,
    about = "Sorts scanned parts by type. With no command, opens the desktop app."
)]
struct Cli {
    #[command(subcommand)]
    command: Option<Command>,
}

#[derive(Subcommand)]
enum Command {
    /// Open the desktop app (the default with no command).
    App {
        /// Parts bin to open (default: the bundled sample scans).
        #[arg(long)]
        bin: Option<PathBuf>,
        /// Model file to open.
        #[arg(long)]
        model: Option<PathBuf>,
    },
}

pub fn main() -> ExitCode {
    let cli = Cli::parse();
    match cli.command {
        None => open_app(None, None),
        Some(Command::App { bin, model }) => open_app(bin, model),
    }
}

#[cfg(feature = "gui")]
fn open_app(bin: Option<PathBuf>, model: Option<PathBuf>) -> ExitCode {
    match crate::app::run(crate::app::StartOptions { bin, model }) {
        Ok(()) => ExitCode::SUCCESS,
        Err(e) => {
            eprintln!("partsift: the app could not start: {e}");
            ExitCode::from(1)
        }
    }
}

#[cfg(not(feature = "gui"))]
fn open_app(_bin: Option<PathBuf>, _model: Option<PathBuf>) -> ExitCode {
    eprintln!("partsift: this build has no desktop app (built without the `gui` feature)");
    ExitCode::from(2)
}
