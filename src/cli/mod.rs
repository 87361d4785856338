//! The command line: parses arguments with clap and hands each command to the library.
//! Exit codes: 0 all went well, 1 a file failed (the others were still processed and
//! reported), 2 a usage error.

mod bench;
mod scans;

use std::path::PathBuf;
use std::process::ExitCode;

use clap::{Args, Parser, Subcommand};

use partsift::prep::RecipeSettings;
use partsift::scan::Units;

#[derive(Parser)]
#[command(
    name = "partsift",
    version,
    about = "Sorts scanned parts by type. With no command, opens the desktop app.",
    after_help = "The verdict supports, and does not replace, the plant's inspection procedures, \
                  gauges and sign-off. Verdicts marked `review` go to a person."
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
    /// Describe scan files: format, points, properties, bounds, guessed units, what clean-up would remove.
    Info {
        /// Scan files (PLY, XYZ, PCD).
        #[arg(required = true)]
        scans: Vec<PathBuf>,
        /// One JSON object per scan per line.
        #[arg(long)]
        json: bool,
        #[command(flatten)]
        read: ReadArgs,
    },
    /// Run the clean-up recipe on a scan and write the points it kept.
    Clean {
        /// Scan file (PLY, XYZ, PCD).
        scan: PathBuf,
        /// Output PLY file.
        #[arg(short, long)]
        output: PathBuf,
        /// Write the final prepared cloud (mm, up axis +Z, centred) instead of the kept points
        /// in the input's own coordinates.
        #[arg(long)]
        prepared: bool,
        /// Write ascii PLY instead of binary little-endian.
        #[arg(long)]
        ascii: bool,
        #[command(flatten)]
        read: ReadArgs,
        #[command(flatten)]
        recipe: RecipeArgs,
    },
    /// Write a parts bin of practice scans of our own machine-shop parts.
    Synth {
        /// Folder to write `<part type>/<scan>` files into.
        out_dir: PathBuf,
        /// Scans per part type.
        #[arg(long, default_value_t = 12)]
        per_type: usize,
        /// Seed: the same seed writes the same files.
        #[arg(long, default_value_t = 1)]
        seed: u64,
        /// Sensor image width and height in pixels (about 30k-60k points a scan at 640x480).
        #[arg(long, num_args = 2, value_names = ["WIDTH", "HEIGHT"], default_values_t = [640, 480])]
        resolution: Vec<u32>,
    },
    /// Measure training and inference speed, one-scan latency, peak memory and matrix-product rates.
    Bench(bench::BenchArgs),
}

/// How to read scan files.
#[derive(Args, Clone)]
struct ReadArgs {
    /// Units of the files' coordinates (default: guessed from the extent; a part is 3 to 1000 mm across).
    #[arg(long, value_parser = clap::value_parser!(Units))]
    units: Option<Units>,
}

/// Clean-up recipe settings; each distance is derived from the scan's point spacing unless set.
#[derive(Args, Clone)]
struct RecipeArgs {
    /// Points in the prepared cloud.
    #[arg(long)]
    points: Option<usize>,
    /// Keep only points inside the box XMIN YMIN ZMIN XMAX YMAX ZMAX (mm, the input's frame).
    #[arg(long, num_args = 6, allow_negative_numbers = true, value_names = ["XMIN", "YMIN", "ZMIN", "XMAX", "YMAX", "ZMAX"])]
    crop: Option<Vec<f32>>,
    /// Do not look for a table plane.
    #[arg(long)]
    no_table: bool,
    /// Distance from the table plane (mm) within which a point is table.
    #[arg(long, value_name = "MM")]
    table_distance: Option<f32>,
    /// Neighbours whose mean distance decides whether a point is a stray.
    #[arg(long)]
    stray_neighbours: Option<usize>,
    /// Standard deviations above the mean neighbour distance that make a stray.
    #[arg(long)]
    stray_ratio: Option<f32>,
    /// Points closer than this many point spacings belong to one object.
    #[arg(long, value_name = "SPACINGS")]
    cluster_radius: Option<f32>,
    /// Voxel edge of the even-density step (mm).
    #[arg(long, value_name = "MM")]
    voxel: Option<f32>,
}

impl RecipeArgs {
    fn settings(&self) -> RecipeSettings {
        let mut s = RecipeSettings::default();
        if let Some(points) = self.points {
            s.points = points;
        }
        if let Some(c) = &self.crop {
            s.crop_box_mm = Some([[c[0], c[1], c[2]], [c[3], c[4], c[5]]]);
        }
        s.table_plane = !self.no_table;
        s.table_distance_mm = self.table_distance.or(s.table_distance_mm);
        s.stray_neighbours = self.stray_neighbours.unwrap_or(s.stray_neighbours);
        s.stray_std_ratio = self.stray_ratio.unwrap_or(s.stray_std_ratio);
        s.cluster_radius_spacings = self.cluster_radius.unwrap_or(s.cluster_radius_spacings);
        s.voxel_size_mm = self.voxel.or(s.voxel_size_mm);
        s
    }
}

/// How a command ended.
pub(crate) enum Outcome {
    Ok,
    /// At least one file failed; the rest were processed.
    SomeFailed,
    /// The command could not run as asked (bad settings, missing folder).
    Usage(String),
}

pub fn main() -> ExitCode {
    let cli = Cli::parse();
    let outcome = match cli.command {
        None => open_app(None, None),
        Some(Command::App { bin, model }) => open_app(bin, model),
        Some(Command::Info { scans, json, read }) => scans::info(&scans, json, read.units),
        Some(Command::Clean {
            scan,
            output,
            prepared,
            ascii,
            read,
            recipe,
        }) => scans::clean(
            &scan,
            &output,
            prepared,
            ascii,
            read.units,
            recipe.settings(),
        ),
        Some(Command::Synth {
            out_dir,
            per_type,
            seed,
            resolution,
        }) => scans::synth(&out_dir, per_type, seed, [resolution[0], resolution[1]]),
        Some(Command::Bench(args)) => bench::bench(args),
    };
    match outcome {
        Outcome::Ok => ExitCode::SUCCESS,
        Outcome::SomeFailed => ExitCode::from(1),
        Outcome::Usage(message) => {
            eprintln!("partsift: {message}");
            ExitCode::from(2)
        }
    }
}

#[cfg(feature = "gui")]
fn open_app(bin: Option<PathBuf>, model: Option<PathBuf>) -> Outcome {
    match crate::app::run(crate::app::StartOptions { bin, model }) {
        Ok(()) => Outcome::Ok,
        Err(e) => {
            eprintln!("partsift: the app could not start: {e}");
            Outcome::SomeFailed
        }
    }
}

#[cfg(not(feature = "gui"))]
fn open_app(_bin: Option<PathBuf>, _model: Option<PathBuf>) -> Outcome {
    Outcome::Usage("this build has no desktop app (built without the `gui` feature)".into())
}
