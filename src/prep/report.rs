//! The clean-up report: each step's numbers, the table plane, warnings.

use std::fmt;

use serde::{Deserialize, Serialize};

use super::size::PartSize;

/// Points counted through the steps. Every input point is in exactly one of `non_finite`,
/// `cropped`, `table`, `strays`, `other_clusters` or `kept`.
#[derive(Clone, Copy, Debug, Default, PartialEq, Eq, Serialize, Deserialize)]
pub struct Counts {
    pub input: usize,
    pub non_finite: usize,
    pub cropped: usize,
    /// On the table plane or below it.
    pub table: usize,
    pub strays: usize,
    /// In clusters other than the largest.
    pub other_clusters: usize,
    /// The part: the largest cluster.
    pub kept: usize,
    /// Occupied voxels of the part.
    pub voxels: usize,
    /// Repeated points added to reach the recipe's point count.
    pub padded: usize,
}

/// What the table step found.
#[derive(Clone, Debug, PartialEq, Serialize, Deserialize)]
#[serde(rename_all = "kebab-case", tag = "status")]
pub enum PlaneReport {
    /// Removed and levelled: `normal · p + offset_mm = 0` in the input frame, normal towards
    /// the part.
    Found {
        normal: [f32; 3],
        offset_mm: f32,
        /// Points within this distance of the plane were table.
        threshold_mm: f32,
        /// Points within the threshold.
        inliers: usize,
        /// Points below the plane, beyond the threshold.
        below: usize,
    },
    /// Looked for, none accepted; the cloud is used as it is.
    NotFound { reason: String },
    /// The recipe does not look for a table.
    Off,
}

/// Something the user should know about a scan that was still prepared.
#[derive(Clone, Debug, PartialEq, Serialize, Deserialize)]
#[serde(rename_all = "kebab-case", tag = "warning")]
pub enum Warning {
    /// No table plane was accepted: no up axis, the cloud keeps its own frame.
    NoTable { reason: String },
    /// The second-largest object is large: maybe two parts in one scan.
    SecondObject { largest: usize, second: usize },
    /// The part had fewer points than wanted; the rest repeat them.
    Padded { points: usize, wanted: usize },
}

impl fmt::Display for Warning {
    fn fmt(&self, f: &mut fmt::Formatter<'_>) -> fmt::Result {
        match self {
            Warning::NoTable { reason } => write!(f, "no table plane: {reason}; up axis not known"),
            Warning::SecondObject { largest, second } => write!(
                f,
                "a second object of {second} points beside the part of {largest}: two parts in one scan?"
            ),
            Warning::Padded { points, wanted } => write!(
                f,
                "only {points} points on the part: repeated them to make {wanted}"
            ),
        }
    }
}

/// What the recipe did to one scan.
#[derive(Clone, Debug, PartialEq, Serialize, Deserialize)]
pub struct Report {
    pub counts: Counts,
    /// Median nearest-neighbour distance of the whole scan (mm).
    pub scan_spacing_mm: f32,
    /// The same after the table is removed (mm): the part's spacing.
    pub part_spacing_mm: f32,
    pub plane: PlaneReport,
    /// Points whose mean neighbour distance exceeded this (mm) were strays.
    pub stray_limit_mm: f32,
    pub cluster_radius_mm: f32,
    /// Clusters after the strays were removed and pieces were joined to the part.
    pub clusters: usize,
    /// Clusters joined to the part as pieces of it.
    pub joined_clusters: usize,
    /// Points in the second-largest cluster (0 if none).
    pub second_cluster: usize,
    pub voxel_mm: f32,
    /// The voxel grid would have left fewer points than wanted, so the part's own points
    /// were sampled instead.
    pub voxel_grid_skipped: bool,
    pub size: PartSize,
    pub warnings: Vec<Warning>,
}

/// One line of the report: a step of the recipe, how many points it concerns (the input's
/// count, the points a step removed, or the points kept) and what it found.
#[derive(Clone, Debug, PartialEq)]
pub struct StepLine {
    pub step: &'static str,
    pub points: usize,
    pub note: String,
}

impl Report {
    /// The report's lines in the recipe's order: the input, each step with the points it
    /// removed, and the points kept.
    pub fn steps(&self) -> Vec<StepLine> {
        let c = &self.counts;
        let line = |step, points, note: String| StepLine { step, points, note };
        let table_note = match &self.plane {
            PlaneReport::Found {
                normal,
                offset_mm,
                threshold_mm,
                inliers,
                below,
            } => format!(
                "normal ({:.3}, {:.3}, {:.3}), offset {:.2} mm, within {:.2} mm: {inliers} on, {below} below",
                normal[0], normal[1], normal[2], offset_mm, threshold_mm
            ),
            PlaneReport::NotFound { .. } => "none found".into(),
            PlaneReport::Off => "not looked for".into(),
        };
        vec![
            line(
                "input points",
                c.input,
                format!("spacing {:.3} mm", self.scan_spacing_mm),
            ),
            line("non-finite", c.non_finite, String::new()),
            line("crop box", c.cropped, String::new()),
            line("table plane", c.table, table_note),
            line(
                "strays",
                c.strays,
                format!("mean neighbour distance over {:.3} mm", self.stray_limit_mm),
            ),
            line(
                "other objects",
                c.other_clusters,
                format!(
                    "{} clusters at {:.3} mm ({} joined to the part), second largest {} points",
                    self.clusters,
                    self.cluster_radius_mm,
                    self.joined_clusters,
                    self.second_cluster
                ),
            ),
            line(
                "kept",
                c.kept,
                format!(
                    "part spacing {:.3} mm; {} voxels of {:.3} mm{}; {} padded",
                    self.part_spacing_mm,
                    c.voxels,
                    self.voxel_mm,
                    if self.voxel_grid_skipped {
                        " (too few: skipped)"
                    } else {
                        ""
                    },
                    c.padded
                ),
            ),
        ]
    }
}

impl fmt::Display for Report {
    fn fmt(&self, f: &mut fmt::Formatter<'_>) -> fmt::Result {
        for (k, line) in self.steps().iter().enumerate() {
            writeln!(f, "  {:<15} {:>9}  {}", line.step, line.points, line.note)?;
            if k == 0 {
                writeln!(f, "  {:<15} {:>9}", "step", "removed")?;
            }
        }
        let [a, b, h] = self.size.extents_mm;
        writeln!(
            f,
            "  size: radius {:.2} mm, footprint {:.2} x {:.2} mm, height {:.2} mm",
            self.size.radius_mm, a, b, h
        )?;
        for w in &self.warnings {
            writeln!(f, "  warning: {w}")?;
        }
        Ok(())
    }
}
