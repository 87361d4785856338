//! Scan import: PLY, XYZ and PCD files to a [`PointCloud`], and the PLY / XYZ writers.
//!
//! Offers [`load`] (a file to a [`Scan`]: its points in the file's own units, what was in
//! the file, and the units to read it in), [`load_bytes`] (the same from bytes in memory),
//! [`guess_units`], [`PointCloud`], [`Units`] and [`ScanError`].
//! Everything inside partsift is millimetres: [`Scan::cloud_mm`] scales a scan to mm.
//!
//! The readers are hand-written (ply.rs, xyz.rs, pcd.rs) and parse one byte buffer holding
//! the whole file: binary records are read as fixed-stride slices, every count in a header is
//! checked against the bytes left before anything is allocated, and every loop consumes input,
//! so a hostile file gives a [`ScanError`] naming the file and the line or byte, never a panic
//! or a hang. surface.rs samples points on a PLY's faces.
//!
//! The ply-rs crate was measured and is not used here: it panics on an element count that
//! overflows u64, cannot read CR line endings (ascii or binary), rejects `nan`, `inf` and
//! `1E5` in ascii, and reads a million-point binary file about 100 times slower than these
//! readers (one map of owned strings per vertex). benches/scan_load.rs keeps the comparison.

use std::fmt;
use std::fs;
use std::io::Read;
use std::path::{Path, PathBuf};

mod pcd;
mod ply;
mod surface;
pub mod write;
mod xyz;

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
        finite_bounds(&self.positions).0
    }
}

/// Bounds of the points whose coordinates are all finite, and how many are not.
///
/// Scans rarely hold a non-finite value, so a first pass over the coordinates as one flat
/// slice, four points (12 values) at a time so that each lane keeps one axis, finds the
/// bounds and whether anything is non-finite; it vectorises (about 1 ms for a million points,
/// benches/scan_load.rs). Only when something is non-finite does a second pass go point by
/// point.
fn finite_bounds(positions: &[[f32; 3]]) -> (Option<[[f32; 3]; 2]>, usize) {
    let is_special = |v: f32| v.to_bits() & 0x7f80_0000 == 0x7f80_0000;
    let flat = positions.as_flattened();
    let mut lo = [f32::INFINITY; 12];
    let mut hi = [f32::NEG_INFINITY; 12];
    let mut special = false;
    let mut chunks = flat.chunks_exact(12);
    for chunk in &mut chunks {
        for k in 0..12 {
            let v = chunk[k];
            special |= is_special(v);
            lo[k] = if v < lo[k] { v } else { lo[k] };
            hi[k] = if v > hi[k] { v } else { hi[k] };
        }
    }
    for (k, &v) in chunks.remainder().iter().enumerate() {
        special |= is_special(v);
        lo[k] = lo[k].min(v);
        hi[k] = hi[k].max(v);
    }
    if special {
        return finite_bounds_point_by_point(positions);
    }
    let mut bounds = [[f32::INFINITY; 3], [f32::NEG_INFINITY; 3]];
    for k in 0..12 {
        bounds[0][k % 3] = bounds[0][k % 3].min(lo[k]);
        bounds[1][k % 3] = bounds[1][k % 3].max(hi[k]);
    }
    ((!positions.is_empty()).then_some(bounds), 0)
}

fn finite_bounds_point_by_point(positions: &[[f32; 3]]) -> (Option<[[f32; 3]; 2]>, usize) {
    let mut lo = [f32::INFINITY; 3];
    let mut hi = [f32::NEG_INFINITY; 3];
    let mut non_finite = 0;
    for p in positions {
        if p.iter().all(|c| c.is_finite()) {
            for a in 0..3 {
                lo[a] = lo[a].min(p[a]);
                hi[a] = hi[a].max(p[a]);
            }
        } else {
            non_finite += 1;
        }
    }
    ((lo[0] <= hi[0]).then_some([lo, hi]), non_finite)
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
    /// 0-based byte offset from the start of the file (for a compressed PCD body: of the
    /// compressed block).
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

    pub(crate) fn at_line(path: &Path, line: usize, what: impl Into<String>) -> Self {
        ScanError::new(path, Some(Location::Line(line)), what)
    }

    pub(crate) fn at_byte(path: &Path, byte: usize, what: impl Into<String>) -> Self {
        ScanError::new(path, Some(Location::Byte(byte as u64)), what)
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

/// Largest scan file partsift reads: 2 GiB. Bigger files are refused before a byte is read.
pub const MAX_FILE_BYTES: u64 = 2 << 30;

/// Reads a scan file: PLY (ascii, binary little- or big-endian), PCD v0.7 (ascii, binary,
/// binary_compressed) or XYZ text (.xyz, .txt, .csv, .pts).
///
/// The format is found from the content (`ply` magic line; PCD header), else from the
/// extension. Coordinates stay in the file's own units and frame ([`Scan::cloud_mm`] scales to
/// mm). Points with a NaN or infinite coordinate are dropped and counted. A PLY with faces is a
/// surface: `options.surface_points` points are sampled on it, area-weighted, seeded by
/// `options.seed` (0 keeps the vertices instead).
///
/// Bad input (unreadable, larger than [`MAX_FILE_BYTES`], truncated, counts that disagree with
/// the data, non-numeric text, missing x/y/z, no finite point left) gives a [`ScanError`]
/// naming the file and, where there is one, the line or byte offset.
pub fn load(path: &Path, options: &LoadOptions) -> Result<Scan, ScanError> {
    let bytes = read_whole_file(path)?;
    load_bytes(path, &bytes, options)
}

/// [`load`] for a file already in memory: `path` names it in errors, and its extension picks
/// XYZ text when the content is neither PLY nor PCD.
pub fn load_bytes(path: &Path, bytes: &[u8], options: &LoadOptions) -> Result<Scan, ScanError> {
    let want_triangles = options.surface_points > 0;
    let decoded = match detect_format(path, bytes)? {
        Detected::Ply => ply::decode(path, bytes, want_triangles)?,
        Detected::Pcd => pcd::decode(path, bytes)?,
        Detected::Xyz => xyz::decode(path, bytes)?,
    };
    finish(path, decoded, options)
}

/// The units that make a scan a plausible machined part, 3 to 1000 mm across (design.md).
///
/// `bounds` are `[min, max]` in the file's units; the largest extent (max - min over x, y, z)
/// is tried in mm, then m, then cm, then in, and the first unit that puts it within 3..=1000 mm
/// wins. When none does, the unit that brings it nearest to that range (by ratio) wins, ties
/// going to the earlier unit. `None`, a zero or a non-finite extent give mm.
pub fn guess_units(bounds: Option<[[f32; 3]; 2]>) -> Units {
    const PART_MM: (f64, f64) = (3.0, 1000.0);
    const PREFERENCE: [Units; 4] = [Units::Mm, Units::M, Units::Cm, Units::In];
    let Some([lo, hi]) = bounds else {
        return Units::Mm;
    };
    let extent = (0..3)
        .map(|a| hi[a] as f64 - lo[a] as f64)
        .fold(0.0, f64::max);
    if !(extent.is_finite() && extent > 0.0) {
        return Units::Mm;
    }
    // How far outside the part range the extent falls in these units (0 inside), on a log scale.
    let miss = |u: &Units| {
        let mm = extent * u.to_mm() as f64;
        (PART_MM.0 / mm).ln().max((mm / PART_MM.1).ln()).max(0.0)
    };
    PREFERENCE
        .into_iter()
        .min_by(|a, b| miss(a).total_cmp(&miss(b)))
        .unwrap_or(Units::Mm)
}

fn read_whole_file(path: &Path) -> Result<Vec<u8>, ScanError> {
    let fail = |what: String| ScanError::new(path, None, what);
    let meta = fs::metadata(path).map_err(|e| fail(format!("cannot read the file: {e}")))?;
    if meta.is_dir() {
        return Err(fail("this is a folder, not a scan file".into()));
    }
    if !meta.is_file() {
        return Err(fail("not a regular file".into()));
    }
    let too_big = |len: u64| {
        fail(format!(
            "the file is {:.1} GiB; partsift reads scans of at most {} GiB",
            len as f64 / (1u64 << 30) as f64,
            MAX_FILE_BYTES >> 30
        ))
    };
    if meta.len() > MAX_FILE_BYTES {
        return Err(too_big(meta.len()));
    }
    let file = fs::File::open(path).map_err(|e| fail(format!("cannot open the file: {e}")))?;
    let mut bytes = Vec::with_capacity(meta.len() as usize);
    // The limit holds even if the file grows between the size check and the read.
    file.take(MAX_FILE_BYTES + 1)
        .read_to_end(&mut bytes)
        .map_err(|e| fail(format!("cannot read the file: {e}")))?;
    if bytes.len() as u64 > MAX_FILE_BYTES {
        return Err(too_big(bytes.len() as u64));
    }
    Ok(bytes)
}

enum Detected {
    Ply,
    Pcd,
    Xyz,
}

fn detect_format(path: &Path, bytes: &[u8]) -> Result<Detected, ScanError> {
    if bytes.is_empty() {
        return Err(ScanError::new(path, None, "the file is empty (no points)"));
    }
    if ply::has_magic(bytes) {
        return Ok(Detected::Ply);
    }
    if pcd::has_header(bytes) {
        return Ok(Detected::Pcd);
    }
    let extension = path
        .extension()
        .and_then(|e| e.to_str())
        .map(|e| e.to_ascii_lowercase());
    match extension.as_deref() {
        Some("xyz" | "txt" | "csv" | "pts") => Ok(Detected::Xyz),
        Some("ply") => Err(ScanError::at_line(
            path,
            1,
            "not a PLY file: the first line is not 'ply'",
        )),
        Some("pcd") => Err(ScanError::at_line(
            path,
            1,
            "not a PCD file: no '# .PCD', VERSION or FIELDS header line",
        )),
        _ => Err(ScanError::new(
            path,
            None,
            "unknown scan format: the content is neither PLY nor PCD, and the name does not \
             end in .xyz, .txt, .csv or .pts (XYZ text)",
        )),
    }
}

fn finish(path: &Path, decoded: Decoded, options: &LoadOptions) -> Result<Scan, ScanError> {
    let Decoded {
        format,
        mut points,
        properties,
        faces,
        triangles,
    } = decoded;
    let stored_points = points.len();
    let (bounds, dropped_non_finite) = finite_bounds(&points.positions);
    let sampled = (options.surface_points > 0 && !triangles.is_empty())
        .then(|| {
            let mut rng = crate::rng::Rng::new(options.seed);
            surface::sample(
                &points.positions,
                &triangles,
                options.surface_points,
                &mut rng,
            )
        })
        .flatten();
    let cloud = match sampled {
        Some(cloud) => cloud,
        None => {
            if dropped_non_finite > 0 {
                drop_non_finite(&mut points);
            }
            points
        }
    };
    if cloud.is_empty() {
        let what = if dropped_non_finite > 0 {
            format!("no points: all {dropped_non_finite} stored points have a NaN or infinite coordinate")
        } else {
            "no points: the file holds no point".to_string()
        };
        return Err(ScanError::new(path, None, what));
    }
    let units_guess = guess_units(bounds);
    Ok(Scan {
        path: path.to_path_buf(),
        format,
        cloud,
        stored_points,
        faces,
        properties,
        dropped_non_finite,
        bounds,
        units_guess,
        units: options.units.unwrap_or(units_guess),
    })
}

/// Removes the points with a NaN or infinite coordinate, with their normals and colours.
fn drop_non_finite(cloud: &mut PointCloud) {
    let keep: Vec<bool> = cloud
        .positions
        .iter()
        .map(|p| p.iter().all(|c| c.is_finite()))
        .collect();
    fn filter<T>(items: &mut Vec<T>, keep: &[bool]) {
        let mut flags = keep.iter();
        items.retain(|_| flags.next().copied().unwrap_or(false));
    }
    filter(&mut cloud.positions, &keep);
    if let Some(n) = cloud.normals.as_mut() {
        filter(n, &keep);
    }
    if let Some(c) = cloud.colors.as_mut() {
        filter(c, &keep);
    }
}

/// What a reader found in a file, before non-finite points are dropped and faces sampled.
pub(crate) struct Decoded {
    pub(crate) format: ScanFormat,
    /// Every stored point, non-finite ones included (face indices refer to them).
    pub(crate) points: PointCloud,
    /// Names of the per-point properties, in file order.
    pub(crate) properties: Vec<String>,
    /// Faces as stored.
    pub(crate) faces: usize,
    /// The faces as triangles (polygons split into fans), when the caller asked for them.
    pub(crate) triangles: Vec<[u32; 3]>,
}

/// A number type in a scan file: the PLY scalar types, and PCD's TYPE with SIZE.
#[derive(Clone, Copy, Debug, PartialEq, Eq)]
pub(crate) enum ValueType {
    I8,
    U8,
    I16,
    U16,
    I32,
    U32,
    I64,
    U64,
    F32,
    F64,
}

/// `N` bytes at `at`, in little-endian order. The caller has checked the bounds.
#[inline(always)]
fn bytes_le<const N: usize>(bytes: &[u8], at: usize, big_endian: bool) -> [u8; N] {
    let mut a = [0u8; N];
    a.copy_from_slice(&bytes[at..at + N]);
    if big_endian {
        a.reverse();
    }
    a
}

impl ValueType {
    pub(crate) fn size(self) -> usize {
        match self {
            ValueType::I8 | ValueType::U8 => 1,
            ValueType::I16 | ValueType::U16 => 2,
            ValueType::I32 | ValueType::U32 | ValueType::F32 => 4,
            ValueType::I64 | ValueType::U64 | ValueType::F64 => 8,
        }
    }

    pub(crate) fn is_integer(self) -> bool {
        !matches!(self, ValueType::F32 | ValueType::F64)
    }

    /// The value at `bytes[at..at + self.size()]`; the caller has checked the bounds.
    #[inline(always)]
    pub(crate) fn read(self, bytes: &[u8], at: usize, big_endian: bool) -> f64 {
        let be = big_endian;
        match self {
            ValueType::I8 => bytes[at] as i8 as f64,
            ValueType::U8 => bytes[at] as f64,
            ValueType::I16 => i16::from_le_bytes(bytes_le(bytes, at, be)) as f64,
            ValueType::U16 => u16::from_le_bytes(bytes_le(bytes, at, be)) as f64,
            ValueType::I32 => i32::from_le_bytes(bytes_le(bytes, at, be)) as f64,
            ValueType::U32 => u32::from_le_bytes(bytes_le(bytes, at, be)) as f64,
            ValueType::I64 => i64::from_le_bytes(bytes_le(bytes, at, be)) as f64,
            ValueType::U64 => u64::from_le_bytes(bytes_le(bytes, at, be)) as f64,
            ValueType::F32 => f32::from_le_bytes(bytes_le(bytes, at, be)) as f64,
            ValueType::F64 => f64::from_le_bytes(bytes_le(bytes, at, be)),
        }
    }

    /// An integer value (a list length, a vertex index) at `at`, exactly; the caller has checked
    /// the bounds and that the type is an integer type. A u64 beyond i64 saturates.
    pub(crate) fn read_int(self, bytes: &[u8], at: usize, big_endian: bool) -> i64 {
        let be = big_endian;
        match self {
            ValueType::I8 => bytes[at] as i8 as i64,
            ValueType::U8 => bytes[at] as i64,
            ValueType::I16 => i16::from_le_bytes(bytes_le(bytes, at, be)) as i64,
            ValueType::U16 => u16::from_le_bytes(bytes_le(bytes, at, be)) as i64,
            ValueType::I32 => i32::from_le_bytes(bytes_le(bytes, at, be)) as i64,
            ValueType::U32 => u32::from_le_bytes(bytes_le(bytes, at, be)) as i64,
            ValueType::I64 => i64::from_le_bytes(bytes_le(bytes, at, be)),
            ValueType::U64 => {
                i64::try_from(u64::from_le_bytes(bytes_le(bytes, at, be))).unwrap_or(i64::MAX)
            }
            ValueType::F32 | ValueType::F64 => self.read(bytes, at, be) as i64,
        }
    }

    /// Parses a text word as this type: an integer type takes a whole number within its range,
    /// a floating type any decimal number (`nan` and `inf` too, which the caller drops).
    pub(crate) fn parse(self, word: &[u8]) -> Result<f64, String> {
        let bad = || format!("'{}' is not a number", shown(word));
        let text = std::str::from_utf8(word).map_err(|_| bad())?;
        if !self.is_integer() {
            return text.parse::<f64>().map_err(|_| bad());
        }
        let v: i128 = text.parse().map_err(|_| {
            if text.parse::<f64>().is_ok() {
                format!(
                    "'{text}' is not a whole number (the type is {})",
                    self.name()
                )
            } else {
                bad()
            }
        })?;
        let (lo, hi): (i128, i128) = match self {
            ValueType::I8 => (i8::MIN.into(), i8::MAX.into()),
            ValueType::U8 => (0, u8::MAX.into()),
            ValueType::I16 => (i16::MIN.into(), i16::MAX.into()),
            ValueType::U16 => (0, u16::MAX.into()),
            ValueType::I32 => (i32::MIN.into(), i32::MAX.into()),
            ValueType::U32 => (0, u32::MAX.into()),
            ValueType::I64 => (i64::MIN.into(), i64::MAX.into()),
            _ => (0, u64::MAX.into()),
        };
        if v < lo || v > hi {
            return Err(format!("{v} is out of range for {}", self.name()));
        }
        Ok(v as f64)
    }

    pub(crate) fn name(self) -> &'static str {
        match self {
            ValueType::I8 => "int8",
            ValueType::U8 => "uint8",
            ValueType::I16 => "int16",
            ValueType::U16 => "uint16",
            ValueType::I32 => "int32",
            ValueType::U32 => "uint32",
            ValueType::I64 => "int64",
            ValueType::U64 => "uint64",
            ValueType::F32 => "float32",
            ValueType::F64 => "float64",
        }
    }

    /// A colour channel of this type as 0..=255: integer types scale their positive range
    /// (uchar as is, ushort / 257, ...), floating types scale 0..1.
    fn colour_channel(self, v: f64) -> u8 {
        let full = match self {
            ValueType::I8 => i8::MAX as f64,
            ValueType::U8 => u8::MAX as f64,
            ValueType::I16 => i16::MAX as f64,
            ValueType::U16 => u16::MAX as f64,
            ValueType::I32 => i32::MAX as f64,
            ValueType::U32 => u32::MAX as f64,
            ValueType::I64 => i64::MAX as f64,
            ValueType::U64 => u64::MAX as f64,
            ValueType::F32 | ValueType::F64 => 1.0,
        };
        scale_to_u8(v, full)
    }
}

/// `v` in 0..=full as 0..=255, rounded; out-of-range and NaN values clamp.
pub(crate) fn scale_to_u8(v: f64, full: f64) -> u8 {
    let v = if v.is_nan() { 0.0 } else { v.clamp(0.0, full) };
    (v / full * 255.0).round() as u8
}

/// One per-point value of a record: the index of its property (PLY), field (PCD) or column,
/// and its type.
#[derive(Clone, Copy, Debug)]
pub(crate) struct Field {
    pub(crate) index: usize,
    pub(crate) ty: ValueType,
}

/// Where a point's colour comes from.
#[derive(Clone, Copy, Debug)]
pub(crate) enum ColourSource {
    /// Separate red, green, blue values.
    Channels([Field; 3]),
    /// One 32-bit value holding 0x00RRGGBB (PCD `rgb` / `rgba`; a float's bits for `rgb` F 4).
    Packed(Field),
}

/// Which values of a record make a point.
#[derive(Clone, Copy, Debug)]
pub(crate) struct PointLayout {
    pub(crate) xyz: [Field; 3],
    pub(crate) normal: Option<[Field; 3]>,
    pub(crate) colour: Option<ColourSource>,
}

fn unpack_rgb(bits: u32) -> [u8; 3] {
    [(bits >> 16) as u8, (bits >> 8) as u8, bits as u8]
}

impl PointLayout {
    /// An empty cloud with room for `capacity` points and the normals and colours this layout has.
    pub(crate) fn new_cloud(&self, capacity: usize) -> PointCloud {
        PointCloud {
            positions: Vec::with_capacity(capacity),
            normals: self.normal.map(|_| Vec::with_capacity(capacity)),
            colors: self.colour.map(|_| Vec::with_capacity(capacity)),
        }
    }

    /// Appends the points of `region`, records of `stride` bytes each, laid out as in
    /// [`PointLayout::push_binary`]. Little-endian float x y z (and normals) without colour,
    /// the common large scan, takes a loop that reads only those bytes: 10x faster than the
    /// general path, which matches on each value's type (measured in benches/scan_load.rs).
    pub(crate) fn push_records(
        &self,
        cloud: &mut PointCloud,
        region: &[u8],
        stride: usize,
        offsets: &[usize],
        big_endian: bool,
    ) {
        let records = region.chunks_exact(stride);
        let floats_at = |fields: [Field; 3]| {
            fields
                .iter()
                .all(|f| f.ty == ValueType::F32)
                .then(|| fields.map(|f| offsets[f.index]))
        };
        let f32_at = |record: &[u8], at: usize| f32::from_le_bytes(bytes_le(record, at, false));
        let fast = !big_endian && self.colour.is_none();
        let PointCloud {
            positions, normals, ..
        } = cloud;
        match (
            fast,
            floats_at(self.xyz),
            self.normal.map(floats_at),
            normals,
        ) {
            (true, Some(xyz), None, None) => {
                positions.extend(records.map(|r| xyz.map(|at| f32_at(r, at))));
            }
            (true, Some(xyz), Some(Some(n)), Some(normals)) => {
                // Two passes with `extend` (no capacity check per point) beat one with two
                // pushes per point.
                positions.extend(records.clone().map(|r| xyz.map(|at| f32_at(r, at))));
                normals.extend(records.map(|r| n.map(|at| f32_at(r, at))));
            }
            _ => {
                for r in records {
                    self.push_binary(cloud, r, offsets, big_endian);
                }
            }
        }
    }

    /// Appends the point of a binary record: value `i` starts at `record[offsets[i]]`.
    /// The caller has checked that every value lies inside `record`.
    #[inline(always)]
    pub(crate) fn push_binary(
        &self,
        cloud: &mut PointCloud,
        record: &[u8],
        offsets: &[usize],
        big_endian: bool,
    ) {
        let get = |f: Field| f.ty.read(record, offsets[f.index], big_endian);
        let triple = |fs: [Field; 3]| [get(fs[0]) as f32, get(fs[1]) as f32, get(fs[2]) as f32];
        cloud.positions.push(triple(self.xyz));
        if let (Some(fields), Some(normals)) = (self.normal, cloud.normals.as_mut()) {
            normals.push(triple(fields));
        }
        if let (Some(source), Some(colours)) = (self.colour, cloud.colors.as_mut()) {
            colours.push(match source {
                ColourSource::Channels(fs) => fs.map(|f| f.ty.colour_channel(get(f))),
                ColourSource::Packed(f) => unpack_rgb(u32::from_le_bytes(bytes_le(
                    record,
                    offsets[f.index],
                    big_endian,
                ))),
            });
        }
    }

    /// Appends the point whose values (one per property, field or column) are `values`.
    pub(crate) fn push_values(&self, cloud: &mut PointCloud, values: &[f64]) {
        let triple = |fs: [Field; 3]| fs.map(|f| values[f.index] as f32);
        cloud.positions.push(triple(self.xyz));
        if let (Some(fields), Some(normals)) = (self.normal, cloud.normals.as_mut()) {
            normals.push(triple(fields));
        }
        if let (Some(source), Some(colours)) = (self.colour, cloud.colors.as_mut()) {
            colours.push(match source {
                ColourSource::Channels(fs) => fs.map(|f| f.ty.colour_channel(values[f.index])),
                ColourSource::Packed(f) => {
                    let v = values[f.index];
                    unpack_rgb(match f.ty {
                        ValueType::F32 | ValueType::F64 => (v as f32).to_bits(),
                        _ => v as u32,
                    })
                }
            });
        }
    }
}

/// Lines of a text file or body, split at LF, CR LF or a lone CR, with 1-based line numbers.
pub(crate) struct TextLines<'a> {
    bytes: &'a [u8],
    pos: usize,
    line: usize,
}

impl<'a> TextLines<'a> {
    /// Lines from byte `start` on; the first one is line `first_line`.
    pub(crate) fn new(bytes: &'a [u8], start: usize, first_line: usize) -> Self {
        TextLines {
            bytes,
            pos: start.min(bytes.len()),
            line: first_line.saturating_sub(1),
        }
    }

    /// Byte offset of the first unread line.
    pub(crate) fn position(&self) -> usize {
        self.pos
    }

    /// Number of the last line returned (or the one before the first line, before any).
    pub(crate) fn line(&self) -> usize {
        self.line
    }

    /// The next line holding anything but whitespace.
    pub(crate) fn next_nonblank(&mut self) -> Option<(usize, &'a [u8])> {
        self.find(|(_, l)| !l.iter().all(|b| b.is_ascii_whitespace()))
    }
}

impl<'a> Iterator for TextLines<'a> {
    type Item = (usize, &'a [u8]);

    fn next(&mut self) -> Option<Self::Item> {
        let rest = self.bytes.get(self.pos..).filter(|r| !r.is_empty())?;
        let end = rest
            .iter()
            .position(|&b| b == b'\n' || b == b'\r')
            .unwrap_or(rest.len());
        let terminator = match rest.get(end) {
            Some(b'\r') if rest.get(end + 1) == Some(&b'\n') => 2,
            Some(_) => 1,
            None => 0,
        };
        // Always advances: `rest` is not empty, so `end + terminator` is at least 1.
        self.pos += end + terminator;
        self.line += 1;
        Some((self.line, &rest[..end]))
    }
}

/// The words of a text line, split at spaces and tabs.
pub(crate) fn words(line: &[u8]) -> impl Iterator<Item = &[u8]> {
    line.split(|b| b.is_ascii_whitespace())
        .filter(|w| !w.is_empty())
}

/// A word of a file, fit to quote in a message (lossy UTF-8, at most 40 characters).
pub(crate) fn shown(word: &[u8]) -> String {
    let text = String::from_utf8_lossy(word);
    match text.char_indices().nth(40) {
        Some((cut, _)) => format!("{}...", &text[..cut]),
        None => text.into_owned(),
    }
}

/// Checks a declared record count against the bytes left, before anything is allocated:
/// `count` records of at least `min_record_bytes` each must fit in `bytes_left`.
/// Returns the count as usize, or a message saying why not.
pub(crate) fn count_that_fits(
    what: &str,
    count: u64,
    min_record_bytes: usize,
    bytes_left: usize,
) -> Result<usize, String> {
    let need = (count as u128) * (min_record_bytes as u128);
    if need > bytes_left as u128 {
        return Err(format!(
            "{what}: {count} declared, at least {min_record_bytes} bytes each, need {need} bytes, \
             but only {bytes_left} bytes follow (a count that disagrees with the data, or \
             truncated data)"
        ));
    }
    usize::try_from(count).map_err(|_| format!("{what}: {count} declared is too many"))
}

#[cfg(test)]
mod tests {
    use super::*;

    fn extent(e: f32) -> Option<[[f32; 3]; 2]> {
        Some([[0.0, 0.0, 0.0], [e, e / 2.0, 0.0]])
    }

    #[test]
    fn units_guess_puts_the_part_at_3_to_1000_mm() {
        // The 3..1000 mm range is design.md's; the cases are worked by hand.
        assert_eq!(guess_units(extent(50.0)), Units::Mm); // 50 mm
        assert_eq!(guess_units(extent(0.05)), Units::M); // 0.05 mm no, 50 mm as m
        assert_eq!(guess_units(extent(2.0)), Units::Cm); // 2 mm no, 2000 mm no, 20 mm yes
        assert_eq!(guess_units(extent(1500.0)), Units::Mm); // nothing fits, mm is nearest
        assert_eq!(guess_units(extent(0.001)), Units::M); // 1 mm as m is nearest
        assert_eq!(guess_units(None), Units::Mm);
        assert_eq!(guess_units(extent(0.0)), Units::Mm);
    }

    #[test]
    fn fast_bounds_agree_with_point_by_point() {
        let mut rng = crate::rng::Rng::new(5);
        for n in [0, 1, 3, 4, 5, 11, 12, 13, 1000] {
            let mut points: Vec<[f32; 3]> = (0..n)
                .map(|_| [0, 1, 2].map(|_| rng.range(-50.0, 50.0) as f32))
                .collect();
            assert_eq!(
                finite_bounds(&points),
                finite_bounds_point_by_point(&points)
            );
            if n > 2 {
                points[n / 2][1] = f32::NAN;
                points[n - 1][2] = f32::NEG_INFINITY;
                let (bounds, dropped) = finite_bounds(&points);
                assert_eq!(dropped, 2);
                assert_eq!((bounds, dropped), finite_bounds_point_by_point(&points));
            }
        }
    }

    #[test]
    fn non_finite_points_leave_with_their_normals_and_colours() {
        let text = b"x y z nx ny nz r g b\n1 1 1 1 0 0 10 10 10\nnan 2 2 0 1 0 20 20 20\n\
                     3 3 3 0 0 1 30 30 30\n4 inf 4 0 0 1 40 40 40\n";
        let scan = load_bytes(Path::new("t.xyz"), text, &LoadOptions::default()).unwrap();
        assert_eq!(scan.stored_points, 4);
        assert_eq!(scan.dropped_non_finite, 2);
        assert_eq!(scan.cloud.positions, vec![[1.0; 3], [3.0; 3]]);
        assert_eq!(
            scan.cloud.normals,
            Some(vec![[1.0, 0.0, 0.0], [0.0, 0.0, 1.0]])
        );
        assert_eq!(scan.cloud.colors, Some(vec![[10; 3], [30; 3]]));
        assert_eq!(scan.bounds, Some([[1.0; 3], [3.0; 3]]));
    }

    #[test]
    fn format_comes_from_content_then_extension() {
        let options = LoadOptions::default();
        let ply = b"ply\nformat ascii 1.0\nelement vertex 1\nproperty float x\n\
                    property float y\nproperty float z\nend_header\n1 2 3\n";
        let scan = load_bytes(Path::new("scan.txt"), ply, &options).unwrap();
        assert_eq!(scan.format, ScanFormat::PlyAscii);
        let err = load_bytes(Path::new("a.ply"), b"1 2 3\n", &options)
            .err()
            .unwrap();
        assert!(err.what.contains("not a PLY file"), "{err}");
        let err = load_bytes(Path::new("a.obj"), b"1 2 3\n", &options)
            .err()
            .unwrap();
        assert!(err.what.contains("unknown scan format"), "{err}");
        let scan = load_bytes(Path::new("a.csv"), b"1,2,3\n", &options).unwrap();
        assert_eq!(scan.format, ScanFormat::Xyz);
        let err = load_bytes(Path::new("a.xyz"), b"# nothing\n", &options)
            .err()
            .unwrap();
        assert_eq!(err.to_string(), "a.xyz: no points: the file holds no point");
    }
}
