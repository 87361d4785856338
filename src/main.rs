//! The `partsift` binary: the command line, and the desktop app when run with no command.

#[cfg(feature = "gui")]
mod app;
mod cli;

fn main() -> std::process::ExitCode {
    cli::main()
}
