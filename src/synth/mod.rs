//! Practice scans of our own: a machine shop's mixed-parts bin seen by a simulated depth sensor.
//!
//! Offers the [`PartType`]s of the bin, [`part_mesh`] (a random instance of a type as a closed
//! triangle mesh, mm), [`generate_scan`] / [`capture_scan`] (one simulated scan in the camera
//! frame, mm, with or without its ground truth), [`write_parts_bin`] (a whole parts bin on disk)
//! and [`SensorSettings`]. The same seed gives the same scans and the same bytes on every
//! machine and for every thread count.

mod geom;
mod parts;
mod sensor;

use std::fmt;
use std::io;
use std::path::{Path, PathBuf};

use rayon::prelude::*;

pub use parts::Mesh;
pub use sensor::{Capture, Intrinsics, PointLabel, SensorSettings};

use crate::rng::Rng;
use crate::scan::write::{write_ply, write_xyz, PlyEncoding};
use crate::scan::{PointCloud, ScanFormat, Units};

/// The part types of the practice bin; each name is its sub-folder in a parts bin.
/// `HexNutM8` and `HexNutM12` differ only in size.
#[derive(Clone, Copy, Debug, PartialEq, Eq, Hash, PartialOrd, Ord)]
pub enum PartType {
    HexNutM8,
    HexNutM12,
    FlatWasher,
    HexBolt,
    SocketScrew,
    AngleBracket,
    SpurGear,
    PipeElbow,
    FlangedBushing,
}

impl PartType {
    pub const ALL: [PartType; 9] = [
        PartType::HexNutM8,
        PartType::HexNutM12,
        PartType::FlatWasher,
        PartType::HexBolt,
        PartType::SocketScrew,
        PartType::AngleBracket,
        PartType::SpurGear,
        PartType::PipeElbow,
        PartType::FlangedBushing,
    ];

    /// The snake_case name, used as the sub-folder name in a parts bin.
    pub fn name(self) -> &'static str {
        match self {
            PartType::HexNutM8 => "hex_nut_m8",
            PartType::HexNutM12 => "hex_nut_m12",
            PartType::FlatWasher => "flat_washer",
            PartType::HexBolt => "hex_bolt",
            PartType::SocketScrew => "socket_screw",
            PartType::AngleBracket => "angle_bracket",
            PartType::SpurGear => "spur_gear",
            PartType::PipeElbow => "pipe_elbow",
            PartType::FlangedBushing => "flanged_bushing",
        }
    }
}

impl fmt::Display for PartType {
    fn fmt(&self, f: &mut fmt::Formatter<'_>) -> fmt::Result {
        f.write_str(self.name())
    }
}

impl std::str::FromStr for PartType {
    type Err = SynthError;
    /// Parses a sub-folder name such as `hex_nut_m8`.
    fn from_str(s: &str) -> Result<Self, SynthError> {
        PartType::ALL
            .into_iter()
            .find(|t| t.name() == s)
            .ok_or_else(|| SynthError::UnknownPartType {
                name: s.to_string(),
            })
    }
}

/// What can go wrong making practice scans.
#[derive(Debug, thiserror::Error)]
pub enum SynthError {
    #[error("setting `{name}` is {value}; expected {expected}")]
    InvalidSetting {
        name: &'static str,
        value: String,
        expected: &'static str,
    },
    #[error("unknown part type `{name}` (the types are {})", part_type_list())]
    UnknownPartType { name: String },
    #[error("could not write {}: {source}", path.display())]
    Write {
        path: PathBuf,
        #[source]
        source: io::Error,
    },
}

fn part_type_list() -> String {
    PartType::ALL.map(PartType::name).join(", ")
}

/// A random instance of `part_type` for `seed`: a closed triangle mesh in its own frame, mm
/// (turned parts along +Z). The same seed gives the same mesh as [`generate_scan`] scans.
pub fn part_mesh(part_type: PartType, seed: u64) -> Mesh {
    parts::build(part_type, &mut Rng::new(seed).fork(PART_STREAM)).mesh
}

/// Sub-streams of a scan's seed, so the part's shape does not depend on the sensor settings.
const PART_STREAM: u64 = 1;
const SENSOR_STREAM: u64 = 2;
const FILE_STREAM: u64 = 3;

/// One simulated scan of a random `part_type` instance, with its ground truth (labels, the
/// posed mesh, the table plane). Camera frame, mm. Bad settings: [`SynthError::InvalidSetting`].
pub fn capture_scan(
    part_type: PartType,
    seed: u64,
    settings: &SensorSettings,
) -> Result<Capture, SynthError> {
    settings.check()?;
    let part = parts::build(part_type, &mut Rng::new(seed).fork(PART_STREAM));
    Ok(sensor::capture(
        &part,
        settings,
        &mut Rng::new(seed).fork(SENSOR_STREAM),
    ))
}

/// One simulated scan of a random `part_type` instance: the points as the sensor reports them,
/// camera frame (x right, y down, z along the view), mm. Bad settings:
/// [`SynthError::InvalidSetting`].
pub fn generate_scan(
    part_type: PartType,
    seed: u64,
    settings: &SensorSettings,
) -> Result<PointCloud, SynthError> {
    capture_scan(part_type, seed, settings).map(|c| c.cloud)
}

/// One scan file written by [`write_parts_bin`].
#[derive(Clone, Debug, PartialEq)]
pub struct ScanRecord {
    pub path: PathBuf,
    pub part_type: PartType,
    pub format: ScanFormat,
    /// The units the coordinates are written in.
    pub units: Units,
    pub points: usize,
}

/// What [`write_parts_bin`] wrote, ordered by part type then index.
#[derive(Clone, Debug, Default, PartialEq)]
pub struct BinSummary {
    pub scans: Vec<ScanRecord>,
}

impl BinSummary {
    pub fn total_points(&self) -> usize {
        self.scans.iter().map(|s| s.points).sum()
    }
}

/// Most scans per part type one call writes (refused before any work).
const MAX_PER_TYPE: usize = 100_000;

/// Coordinates in files are rounded to this step (mm): far below the sensor noise, and it
/// keeps text files short.
const FILE_STEP_MM: f64 = 0.01;

/// Writes a parts bin: `out_dir/<type>/<type>_<nnn>.ply|.xyz` for every part type, `per_type`
/// scans each (nnn from 000). About 60 % binary little-endian PLY, 20 % ascii PLY and 20 % XYZ,
/// and one in six written in metres instead of mm, all chosen by each scan's seed; coordinates
/// are those of [`generate_scan`] rounded to 0.01 mm (in the file's units). Existing
/// files of the same names are replaced (atomically); other files are left alone.
///
/// Deterministic for `seed`, whatever the number of threads: scans run in parallel, each from
/// its own seed derived from `seed`, the type and the index.
///
/// Errors: `per_type` outside 1 to 100,000 or bad settings ([`SynthError::InvalidSetting`]); a folder or file
/// that cannot be written ([`SynthError::Write`], naming it).
pub fn write_parts_bin(
    out_dir: &Path,
    per_type: usize,
    seed: u64,
    settings: &SensorSettings,
) -> Result<BinSummary, SynthError> {
    if !(1..=MAX_PER_TYPE).contains(&per_type) {
        return Err(SynthError::InvalidSetting {
            name: "per_type",
            value: per_type.to_string(),
            expected: "1 to 100000 scans per part type",
        });
    }
    settings.check()?;
    for part_type in PartType::ALL {
        let dir = out_dir.join(part_type.name());
        std::fs::create_dir_all(&dir).map_err(|source| SynthError::Write { path: dir, source })?;
    }
    let jobs: Vec<(PartType, usize)> = PartType::ALL
        .into_iter()
        .flat_map(|t| (0..per_type).map(move |i| (t, i)))
        .collect();
    let scans = jobs
        .par_iter()
        .map(|&(part_type, index)| write_one_scan(out_dir, part_type, index, seed, settings))
        .collect::<Result<Vec<_>, _>>()?;
    Ok(BinSummary { scans })
}

/// FNV-1a, 64 bit (Fowler, Noll and Vo): a hash that never changes between Rust versions.
fn fnv1a(bytes: &[u8]) -> u64 {
    bytes.iter().fold(0xCBF2_9CE4_8422_2325, |h, &b| {
        (h ^ u64::from(b)).wrapping_mul(0x0000_0100_0000_01B3)
    })
}

/// The seed of scan `index` of `part_type` in the bin made from `bin_seed`.
fn scan_seed(bin_seed: u64, part_type: PartType, index: usize) -> u64 {
    Rng::new(bin_seed ^ fnv1a(part_type.name().as_bytes()))
        .fork(index as u64)
        .next_u64()
}

fn write_one_scan(
    out_dir: &Path,
    part_type: PartType,
    index: usize,
    bin_seed: u64,
    settings: &SensorSettings,
) -> Result<ScanRecord, SynthError> {
    let seed = scan_seed(bin_seed, part_type, index);
    let mut cloud = generate_scan(part_type, seed, settings)?;
    let mut choice = Rng::new(seed).fork(FILE_STREAM);
    let pick = choice.uniform();
    let format = if pick < 0.6 {
        ScanFormat::PlyBinaryLe
    } else if pick < 0.8 {
        ScanFormat::PlyAscii
    } else {
        ScanFormat::Xyz
    };
    let units = if choice.below(6) == 0 {
        Units::M
    } else {
        Units::Mm
    };
    let steps_per_unit = f64::from(units.to_mm()) / FILE_STEP_MM;
    for p in &mut cloud.positions {
        *p = p.map(|c| ((f64::from(c) / FILE_STEP_MM).round() / steps_per_unit) as f32);
    }
    let name = part_type.name();
    let extension = if format == ScanFormat::Xyz {
        "xyz"
    } else {
        "ply"
    };
    let path = out_dir
        .join(name)
        .join(format!("{name}_{index:03}.{extension}"));
    let written = match format {
        ScanFormat::PlyAscii => write_ply(&path, &cloud, PlyEncoding::Ascii),
        ScanFormat::Xyz => write_xyz(&path, &cloud),
        _ => write_ply(&path, &cloud, PlyEncoding::BinaryLe),
    };
    written.map_err(|source| SynthError::Write {
        path: path.clone(),
        source,
    })?;
    Ok(ScanRecord {
        path,
        part_type,
        format,
        units,
        points: cloud.len(),
    })
}
