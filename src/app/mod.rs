//! The desktop app: one `App` state, one file per tab.

use std::path::PathBuf;

/// What the app opens with.
pub struct StartOptions {
    pub bin: Option<PathBuf>,
    pub model: Option<PathBuf>,
}

pub fn run(_options: StartOptions) -> eframe::Result {
    Ok(())
}
