//! Scan import: PLY, XYZ and PCD files to a [`PointCloud`], and the PLY / XYZ writers.
//!
//! Offers [`load`] (a file to a [`Scan`]: its points in the file's own units, what was in
//! the file, and the units to read it in), [`PointCloud`], [`Units`] and [`ScanError`].
//! Everything inside partsift is millimetres: [`Scan::cloud_mm`] scales a scan to mm.

use std::fmt;
use std::path::{Path, PathBuf};

pub mod write;

/// Points of one scan, with optional per-point normals and colours (same length as `positions`).
#[derive(Clone, Debug, Default, PartialEq)]
pub struct PointCloud {
    pub positions: Vec<[f32; 3]>,
    pub normals: Option<Vec<[f32; 3]>>,
    pub colors: Option<Vec<[u8; 3]>>,
}

impl PointCloud {
    pub fn from_positions(positions: Vec<[f32; 3]>) -> Self {
        PointCloud {
            positions,
            normals: None,
            colors: None,
        }
    }

    pub fn len(&self) -> usize {
        self.positions.len()
    }

    pub fn is_empty(&self) -> bool {
        self.positions.is_empty()
    }

    /// The points at `indices`, in that order, with their normals and colours.
    pub fn select(&self, indices: &[u32]) -> PointCloud {
        let pick = |v: &Vec<[f32; 3]>| indices.iter().map(|&i| v[i as usize]).collect();
        PointCloud {
            positions: pick(&self.positions),
            normals: self.normals.as_ref().map(pick),
            colors: self
                .colors
                .as_ref()
                .map(|c| indices.iter().map(|&i| c[i as usize]).collect()),
        }
    }

    /// Axis-aligned bounds `[min, max]`, or `None` for an empty cloud. Non-finite points are skipped.
    pub fn bounds(&self) -> Option<[[f32; 3]; 2]> {
        let mut lo = [f32::INFINITY; 3];
        let mut hi = [f32::NEG_INFINITY; 3];
        for p in self
            .positions
            .iter()
            .filter(|p| p.iter().all(|c| c.is_finite()))
        {
            for a in 0..3 {
                lo[a] = lo[a].min(p[a]);
                hi[a] = hi[a].max(p[a]);
            }
        }
        (lo[0] <= hi[0]).then_some([lo, hi])
    }
}

/// Length units a scan file may be written in.
#[derive(Clone, Copy, Debug, PartialEq, Eq, Hash, serde::Serialize, serde::Deserialize)]
#[serde(rename_all = "lowercase")]
pub enum Units {
    Mm,
    Cm,
    M,
    In,
}

impl Units {
    pub const ALL: [Units; 4] = [Units::Mm, Units::Cm, Units::M, Units::In];

    /// Millimetres per unit (an inch is exactly 25.4 mm: ISO 80000-3 / the 1959 international yard).
    pub fn to_mm(self) -> f32 {
        match self {
            Units::Mm => 1.0,
            Units::Cm => 10.0,
            Units::M => 1000.0,
            Units::In => 25.4,
        }
    }

    pub fn name(self) -> &'static str {
        match self {
            Units::Mm => "mm",
            Units::Cm => "cm",
            Units::M => "m",
            Units::In => "in",
        }
    }
}

impl fmt::Display for Units {
    fn fmt(&self, f: &mut fmt::Formatter<'_>) -> fmt::Result {
        f.write_str(self.name())
    }
}

impl std::str::FromStr for Units {
    type Err = String;
    fn from_str(s: &str) -> Result<Self, String> {
        Units::ALL
            .into_iter()
            .find(|u| u.name().eq_ignore_ascii_case(s))
            .ok_or_else(|| format!("unknown units '{s}' (expected mm, cm, m or in)"))
    }
}

/// Where in a file an error was found.
#[derive(Clone, Copy, Debug, PartialEq, Eq)]
pub enum Location {
    /// 1-based line of a text file or text header.
    Line(usize),
    /// 0-based byte offset into a binary body.
    Byte(u64),
}

/// A scan that could not be read: which file, where in it, and what was wrong.
#[derive(Debug, thiserror::Error)]
pub struct ScanError {
    pub path: PathBuf,
    pub location: Option<Location>,
    pub what: String,
}

impl ScanError {
    pub fn new(path: &Path, location: Option<Location>, what: impl Into<String>) -> Self {
        ScanError {
            path: path.to_path_buf(),
            location,
            what: what.into(),
        }
    }
}

impl fmt::Display for ScanError {
    fn fmt(&self, f: &mut fmt::Formatter<'_>) -> fmt::Result {
        write!(f, "{}", self.path.display())?;
        match self.location {
            Some(Location::Line(n)) => write!(f, ", line {n}")?,
            Some(Location::Byte(b)) => write!(f, ", byte {b}")?,
            None => {}
        }
        write!(f, ": {}", self.what)
    }
}

/// The file formats partsift reads.
#[derive(Clone, Copy, Debug, PartialEq, Eq, Hash)]
pub enum ScanFormat {
    PlyAscii,
    PlyBinaryLe,
    PlyBinaryBe,
    Xyz,
    PcdAscii,
    PcdBinary,
    PcdBinaryCompressed,
}

impl ScanFormat {
    /// The name used in `partsift info --json` and in messages.
    pub fn name(self) -> &'static str {
        match self {
            ScanFormat::PlyAscii => "ply-ascii",
            ScanFormat::PlyBinaryLe => "ply-binary-le",
            ScanFormat::PlyBinaryBe => "ply-binary-be",
            ScanFormat::Xyz => "xyz",
            ScanFormat::PcdAscii => "pcd-ascii",
            ScanFormat::PcdBinary => "pcd-binary",
            ScanFormat::PcdBinaryCompressed => "pcd-binary-compressed",
        }
    }
}

/// How to read a scan.
#[derive(Clone, Debug)]
pub struct LoadOptions {
    /// The file's units; `None` guesses them from the extent (see [`guess_units`]).
    pub units: Option<Units>,
    /// How many points to sample on a surface (a PLY with faces), area-weighted.
    pub surface_points: usize,
    /// Seed for the surface sampling, so the same file always gives the same points.
    pub seed: u64,
}

impl Default for LoadOptions {
    fn default() -> Self {
        LoadOptions {
            units: None,
            surface_points: 20_000,
            seed: 0,
        }
    }
}

/// One scan file as read.
#[derive(Clone, Debug)]
pub struct Scan {
    pub path: PathBuf,
    pub format: ScanFormat,
    /// The points in the file's own units and frame, non-finite ones dropped. For a surface
    /// (a PLY with faces) these are points sampled on the faces.
    pub cloud: PointCloud,
    /// Vertices (PLY), rows (XYZ) or points (PCD) as stored, before anything was dropped.
    pub stored_points: usize,
    /// Faces as stored (0 for a point cloud).
    pub faces: usize,
    /// Names of the per-point properties in the file, in file order.
    pub properties: Vec<String>,
    /// Points dropped because a coordinate was NaN or infinite.
    pub dropped_non_finite: usize,
    /// Bounds of the finite stored points, in the file's own units.
    pub bounds: Option<[[f32; 3]; 2]>,
    /// Units guessed from the extent.
    pub units_guess: Units,
    /// Units used: the caller's choice, else the guess.
    pub units: Units,
}

impl Scan {
    /// The points scaled to millimetres.
    pub fn cloud_mm(&self) -> PointCloud {
        let s = self.units.to_mm();
        let mut cloud = self.cloud.clone();
        for p in &mut cloud.positions {
            *p = [p[0] * s, p[1] * s, p[2] * s];
        }
        cloud
    }
}
