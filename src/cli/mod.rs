//! The command line: parses arguments with clap and hands each command to the library.
//! Exit codes: 0 all went well, 1 a file failed (the others were still processed and
//! reported), 2 a usage error.

mod bench;
mod learn;
mod scans;

use std::path::PathBuf;
use std::process::ExitCode;

use clap::{Args, Parser, Subcommand};

use partsift::learn::DEFAULT_HOLDOUT;
use partsift::net::{Arch, Preset};
use partsift::prep::RecipeSettings;
use partsift::scan::Units;

#[derive(Parser)]
#[command(
    name = "partsift",
    version,
    about = "Sorts scanned parts by type. With no command, opens the desktop app.",
    after_help = learn::CAUTION
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
    /// Teach a model on a parts bin (one sub-folder of scans per part type) and save it.
    ///
    /// Progress goes to standard error; Ctrl-C stops after the current batch and keeps the
    /// best model so far. Exit code 1 when some scans could not be read (they are skipped;
    /// the model is still saved).
    Train {
        /// The parts bin: BIN/<part type>/<scan>.ply|.xyz|.pcd
        bin: PathBuf,
        /// The model file to write (.safetensors).
        #[arg(short, long, value_name = "MODEL")]
        output: PathBuf,
        /// quick (minutes on a laptop) or full (the paper's network, slower).
        #[arg(long, default_value = "quick")]
        preset: Preset,
        /// edgeconv, pointnet or gcn.
        #[arg(long, default_value = "edgeconv")]
        arch: Arch,
        /// Most epochs (training stops earlier when holdout accuracy stops improving).
        #[arg(long)]
        epochs: Option<usize>,
        /// Seed of the split, the weights and the augmentation: the same seed, bin and thread
        /// count give the same model file.
        #[arg(long, default_value_t = 1)]
        seed: u64,
        /// Share of each part type's scans held out to pick and calibrate the model.
        #[arg(long, default_value_t = DEFAULT_HOLDOUT)]
        holdout: f64,
        /// Worker threads (default: one per core).
        #[arg(long, value_parser = clap::value_parser!(u16).range(1..))]
        threads: Option<u16>,
        /// Print one JSON object as the last line: model, part_types, epochs, holdout_accuracy, seconds.
        #[arg(long)]
        json: bool,
    },
    /// Give every scan a verdict: part type, calibrated confidence, sure or review.
    ///
    /// Folders are searched recursively for .ply, .xyz and .pcd files. A bad file is reported
    /// and the rest go on (exit code 1).
    Classify {
        /// Scan files and folders of scans.
        #[arg(required = true, value_name = "SCAN_OR_DIR")]
        scans: Vec<PathBuf>,
        /// The model file.
        #[arg(short, long)]
        model: PathBuf,
        /// One JSON object per scan per line.
        #[arg(long, conflicts_with = "csv")]
        json: bool,
        /// CSV with a header line, the scores of every part type in the last columns.
        #[arg(long)]
        csv: bool,
        /// Copy (never move) each scan into DIR/<type>/, the ones to review into
        /// DIR/_to-review/<type>/; existing files are never overwritten.
        #[arg(long, value_name = "DIR")]
        copy_to: Option<PathBuf>,
    },
    /// Measure how well a model sorts a labelled parts bin: accuracy, per-type precision,
    /// recall and F1, the confusion matrix, the misclassified scans.
    Evaluate {
        /// The parts bin: BIN/<part type>/<scan>.ply|.xyz|.pcd
        bin: PathBuf,
        /// The model file.
        #[arg(short, long)]
        model: PathBuf,
        /// Print one JSON object.
        #[arg(long)]
        json: bool,
    },
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
        Some(Command::Train {
            bin,
            output,
            preset,
            arch,
            epochs,
            seed,
            holdout,
            threads,
            json,
        }) => learn::train_command(learn::TrainArgs {
            bin,
            output,
            preset,
            arch,
            epochs,
            seed,
            holdout,
            threads: threads.map(usize::from),
            json,
        }),
        Some(Command::Classify {
            scans,
            model,
            json,
            csv,
            copy_to,
        }) => {
            let format = match (json, csv) {
                (true, _) => learn::RowFormat::Json,
                (_, true) => learn::RowFormat::Csv,
                _ => learn::RowFormat::Human,
            };
            learn::classify_command(&scans, &model, format, copy_to.as_deref())
        }
        Some(Command::Evaluate { bin, model, json }) => learn::evaluate_command(&bin, &model, json),
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
