//! The clean-up recipe: from a raw scan in mm to a prepared cloud that keeps the part's true size.
//!
//! Offers [`RecipeSettings`] (what a user sets) and its checked form [`Recipe`], whose
//! [`Recipe::run`] turns a [`PointCloud`] into [`Prepared`]: `N` points, centred, unit
//! radius, table normal +Z, with the part's [`PartSize`] in mm, the [`Fate`] of every input
//! point and a [`Report`] of each step's numbers. The steps, each in its own file:
//! 1. drop non-finite points, optional crop box (here);
//! 2. table plane: RANSAC, moved to a parallel plane behind it if there is one, refit to
//!    the measured range noise, tests that it is the table and not a face of the part,
//!    level the cloud (`plane.rs`);
//! 3. stray points: statistical outlier removal (`strays.rs`);
//! 4. keep the part: the largest Euclidean cluster, with nearby pieces of it joined
//!    (`cluster.rs`);
//! 5. even density: voxel centroids (`density.rs`), farthest point sampling (`sample.rs`);
//! 6. centre, measure, turn the footprint's long side to +X, scale to unit radius (`size.rs`).
//!
//! Every distance is derived from the measured point spacing unless set in mm, so the
//! defaults fit dense and sparse scans, in any units once converted to mm. The step
//! functions [`ransac_plane`], [`voxel_centroids`] and [`farthest_point_sample`] are public
//! because they are checked against outside references in `tests/prep_reference.rs`.

mod cluster;
mod density;
mod geom;
mod plane;
mod report;
mod sample;
mod settings;
mod size;
mod strays;

pub use density::voxel_centroids;
pub use plane::{ransac_plane, Plane};
pub use report::{Counts, PlaneReport, Report, StepLine, Warning};
pub use sample::farthest_point_sample;
pub use settings::{Recipe, RecipeError, RecipeSettings};
pub use size::PartSize;

use serde::{Deserialize, Serialize};

use crate::graph::spatial::SpatialIndex;
use crate::scan::PointCloud;
use cluster::UNLABELLED;
use geom::{rotate, rotation_to_z};
use plane::{TableSearch, TableSearchSettings};

/// What the recipe did with one input point.
#[derive(Clone, Copy, Debug, PartialEq, Eq, Hash, Serialize, Deserialize)]
#[serde(rename_all = "kebab-case")]
pub enum Fate {
    /// Kept: part of the largest object.
    Part,
    /// A coordinate was NaN or infinite.
    NonFinite,
    /// Outside the crop box.
    Cropped,
    /// On the table plane or below it.
    Table,
    /// A stray point (statistical outlier).
    Stray,
    /// Part of another, smaller object.
    OtherCluster,
}

/// A scan after clean-up.
#[derive(Clone, Debug, PartialEq, Serialize, Deserialize)]
pub struct Prepared {
    /// `recipe.points()` points, centred at their centroid, scaled to unit radius (the
    /// farthest point at distance 1), table normal +Z, the footprint's long side along X
    /// (when the recipe faces it). Dimensionless.
    pub points: Vec<[f32; 3]>,
    /// The true size of the part, mm.
    pub size: PartSize,
    /// Indices into the input cloud of the points kept (the part, before resampling), in
    /// input order.
    pub kept: Vec<u32>,
    /// One per input point.
    pub fate: Vec<Fate>,
    /// Maps an input point (mm) to the prepared frame.
    pub frame: Frame,
    pub report: Report,
}

/// The similarity transform from the input frame (mm) to the prepared frame:
/// `prepared = (rotation · p + translation_mm) * scale`.
#[derive(Clone, Copy, Debug, PartialEq, Serialize, Deserialize)]
pub struct Frame {
    /// Row-major rotation turning the table normal to +Z (none without a table), then the
    /// footprint's long side to +X (when the recipe asks for it).
    pub rotation: [[f32; 3]; 3],
    pub translation_mm: [f32; 3],
    /// 1 / radius in mm (1 for a part of radius 0).
    pub scale: f32,
}

impl Frame {
    /// An input point (mm) in the prepared frame.
    pub fn apply(&self, p: [f32; 3]) -> [f32; 3] {
        let q = rotate(&self.rotation, p);
        [0, 1, 2].map(|a| (q[a] + self.translation_mm[a]) * self.scale)
    }
}

/// Why a scan could not be prepared.
#[derive(Clone, Debug, PartialEq, thiserror::Error)]
pub enum PrepError {
    #[error("the scan has no points")]
    Empty,
    #[error("the scan has no finite points ({0} with NaN or infinite coordinates)")]
    NoFinitePoints(usize),
    #[error("the crop box leaves no points (of {0})")]
    CropLeavesNothing(usize),
}

const IDENTITY: [[f32; 3]; 3] = [[1.0, 0.0, 0.0], [0.0, 1.0, 0.0], [0.0, 0.0, 1.0]];

/// The fixed seed of the RANSAC plane search: the same scan always gives the same result.
const RANSAC_SEED: u64 = 0x7AB1E;
/// The even-density grid is coarsened to leave about this many voxels per prepared point
/// (when the voxel size is not set in mm): farthest point sampling from 4N points spreads
/// them as well as from 20N, at a fifth of the cost.
const FPS_INPUT_PER_POINT: usize = 4;
/// Points on which the spacing is measured: a median of 4096 is stable to about 2 %.
const SPACING_SAMPLE: usize = 4096;

impl Recipe {
    /// Cleans up `cloud_mm` (positions in mm). Deterministic (fixed seeds; the result does
    /// not depend on the number of threads). Any frame works; in a sensor's own frame (origin
    /// at the sensor, as raw depth-camera files are) the table test also uses the sensor's
    /// side of the plane, and a scan in another frame with its origin below the table gets
    /// a "no table" warning rather than a wrong table. Errors only when no point survives
    /// step 1; every later step keeps at least one point (the table step needs points above
    /// the table to accept it, clustering keeps the largest cluster).
    pub fn run(&self, cloud_mm: &PointCloud) -> Result<Prepared, PrepError> {
        let s = self.settings();
        let input = &cloud_mm.positions;
        if input.is_empty() {
            return Err(PrepError::Empty);
        }
        let mut fate = vec![Fate::Part; input.len()];
        let mut counts = Counts {
            input: input.len(),
            ..Counts::default()
        };
        let mut warnings = Vec::new();

        // 1. finite, inside the crop box
        let mut kept = keep_finite_in_box(input, s.crop_box_mm, &mut fate);
        counts.non_finite = fate.iter().filter(|&&f| f == Fate::NonFinite).count();
        counts.cropped = fate.iter().filter(|&&f| f == Fate::Cropped).count();
        if kept.is_empty() {
            return Err(if counts.cropped == 0 {
                PrepError::NoFinitePoints(counts.non_finite)
            } else {
                PrepError::CropLeavesNothing(input.len() - counts.non_finite)
            });
        }
        let mut points: Vec<[f32; 3]> = kept.iter().map(|&i| input[i as usize]).collect();
        let scan_spacing_mm = measure_spacing(&points);

        // 2. table plane
        let mut rotation = IDENTITY;
        let mut lift = [0.0f32; 3];
        let plane_report = if s.table_plane {
            let search = TableSearchSettings {
                ransac_threshold_mm: s
                    .table_distance_mm
                    .unwrap_or(s.table_distance_spacings * scan_spacing_mm),
                adapt_to_noise: s.table_distance_mm.is_none(),
                min_fraction: s.table_min_fraction,
                iterations: s.ransac_iterations,
                spacing_mm: scan_spacing_mm,
                seed: RANSAC_SEED,
            };
            match plane::find_table(&points, &search) {
                TableSearch::Found(t) => {
                    let (on, below) = remove_table(&mut points, &mut kept, &mut fate, &t);
                    counts.table = on + below;
                    rotation = rotation_to_z(t.plane.normal);
                    lift = [0.0, 0.0, t.plane.offset_mm];
                    for p in &mut points {
                        let q = rotate(&rotation, *p);
                        *p = [q[0], q[1], q[2] + lift[2]];
                    }
                    PlaneReport::Found {
                        normal: t.plane.normal,
                        offset_mm: t.plane.offset_mm,
                        threshold_mm: t.threshold_mm,
                        inliers: on,
                        below,
                    }
                }
                TableSearch::NotFound(reason) => {
                    warnings.push(Warning::NoTable {
                        reason: reason.clone(),
                    });
                    PlaneReport::NotFound { reason }
                }
            }
        } else {
            PlaneReport::Off
        };

        // 3. stray points
        let index = SpatialIndex::new(&points);
        let strays = strays::find_strays(&index, &points, s.stray_neighbours, s.stray_std_ratio);
        let active: Vec<bool> = strays.is_stray.iter().map(|&x| !x).collect();
        for (&i, _) in kept.iter().zip(&strays.is_stray).filter(|(_, &x)| x) {
            fate[i as usize] = Fate::Stray;
        }
        counts.strays = strays.is_stray.iter().filter(|&&x| x).count();

        // 4. the largest cluster
        let part_spacing_mm = strays.spacing_mm;
        let cluster_radius_mm = s.cluster_radius_spacings * part_spacing_mm;
        let mut clusters = cluster::euclidean_clusters(&index, &points, &active, cluster_radius_mm);
        // Not every point can be a stray (a stray is above the mean), so there is a cluster.
        let largest = clusters.two_largest().0.unwrap_or(0);
        let members = (0..points.len()).filter(|&i| clusters.labels[i] == largest);
        let largest_radius_mm = reach_from_centroid(&points, members);
        let piece_min = (clusters.sizes[largest as usize] / 100).max(1);
        let joined = cluster::join_pieces(
            &points,
            &mut clusters,
            largest,
            s.cluster_join_fraction * largest_radius_mm,
            piece_min,
        );
        let second = clusters.two_largest().1;
        let largest_size = clusters.sizes.get(largest as usize).copied().unwrap_or(0);
        let second_size = second.map_or(0, |l| clusters.sizes[l as usize]);
        if second_size as f64 >= s.second_cluster_warn_fraction as f64 * largest_size as f64
            && second_size > 0
        {
            warnings.push(Warning::SecondObject {
                largest: largest_size,
                second: second_size,
            });
        }
        let mut part = Vec::with_capacity(largest_size);
        let mut part_kept = Vec::with_capacity(largest_size);
        for ((&i, &p), &label) in kept.iter().zip(&points).zip(&clusters.labels) {
            if label == largest {
                part.push(p);
                part_kept.push(i);
            } else if label != UNLABELLED {
                fate[i as usize] = Fate::OtherCluster;
                counts.other_clusters += 1;
            }
        }
        counts.kept = part.len();
        let kept = part_kept;

        // 5. even density, then N points
        let mut voxel_mm = s
            .voxel_size_mm
            .unwrap_or(s.voxel_size_spacings * part_spacing_mm);
        let mut even = if voxel_mm > 0.0 {
            density::voxel_centroids(&part, voxel_mm)
        } else {
            part.clone()
        };
        // Farthest point sampling costs (points in) x (points out): a dense part gets a
        // coarser grid, sized (voxel counts go with the inverse square of the edge on a
        // surface) for about FPS_INPUT_PER_POINT x N voxels.
        let most = FPS_INPUT_PER_POINT * s.points;
        if s.voxel_size_mm.is_none() && even.len() > most && voxel_mm > 0.0 {
            voxel_mm *= (even.len() as f32 / most as f32).sqrt();
            even = density::voxel_centroids(&part, voxel_mm);
        }
        counts.voxels = even.len();
        let voxel_grid_skipped = even.len() < s.points && part.len() > even.len();
        if voxel_grid_skipped {
            even = part;
        }
        let mut picked = farthest_point_sample(&even, s.points, 0);
        let unique = picked.len();
        let padded = sample::pad_by_repetition(&mut picked, s.points);
        if padded > 0 {
            warnings.push(Warning::Padded {
                points: unique,
                wanted: s.points,
            });
        }
        counts.padded = padded;

        // 6. centre, measure, face +X, unit radius
        let unique_points: Vec<[f32; 3]> =
            picked[..unique].iter().map(|&i| even[i as usize]).collect();
        let measured = size::measure(&unique_points).unwrap_or(size::Measured {
            centre: [0.0; 3],
            size: PartSize {
                radius_mm: 0.0,
                extents_mm: [0.0; 3],
            },
            long_side: [1.0, 0.0],
        });
        let (centre, size) = (measured.centre, measured.size);
        let facing = if s.face_long_side {
            size::facing_turn(&unique_points, &measured)
        } else {
            IDENTITY
        };
        let scale = if size.radius_mm > 0.0 {
            1.0 / size.radius_mm
        } else {
            1.0
        };
        let prepared: Vec<[f32; 3]> = picked
            .iter()
            .map(|&i| {
                let p = even[i as usize];
                let q = rotate(&facing, [0, 1, 2].map(|a| p[a] - centre[a]));
                q.map(|v| v * scale)
            })
            .collect();
        let frame = Frame {
            rotation: geom::compose(&facing, &rotation),
            translation_mm: rotate(&facing, [0, 1, 2].map(|a| lift[a] - centre[a])),
            scale,
        };
        let report = Report {
            counts,
            scan_spacing_mm,
            part_spacing_mm,
            plane: plane_report,
            stray_limit_mm: strays.limit_mm,
            cluster_radius_mm,
            clusters: clusters.sizes.iter().filter(|&&n| n > 0).count(),
            joined_clusters: joined,
            second_cluster: second_size,
            voxel_mm,
            voxel_grid_skipped,
            size,
            warnings,
        };
        Ok(Prepared {
            points: prepared,
            size,
            kept,
            fate,
            frame,
            report,
        })
    }
}

/// Step 1: indices of the finite points inside `crop` (mm, inclusive), in input order;
/// marks the others' fate.
fn keep_finite_in_box(
    points: &[[f32; 3]],
    crop: Option<[[f32; 3]; 2]>,
    fate: &mut [Fate],
) -> Vec<u32> {
    let mut kept = Vec::with_capacity(points.len());
    for (i, p) in points.iter().enumerate() {
        if !p.iter().all(|c| c.is_finite()) {
            fate[i] = Fate::NonFinite;
        } else if crop.is_some_and(|[lo, hi]| (0..3).any(|a| p[a] < lo[a] || p[a] > hi[a])) {
            fate[i] = Fate::Cropped;
        } else {
            kept.push(i as u32);
        }
    }
    kept
}

/// The median distance (mm) from a point to its nearest other point, over an evenly strided
/// sample of at most [`SPACING_SAMPLE`] points; exact duplicates are skipped (a distance of
/// 0 says nothing about the density). 0 when every point is a duplicate.
fn measure_spacing(points: &[[f32; 3]]) -> f32 {
    let index = SpatialIndex::new(points);
    let stride = points.len().div_ceil(SPACING_SAMPLE).max(1);
    let mut nearest: Vec<f32> = points
        .iter()
        .step_by(stride)
        .filter_map(|&p| {
            index
                .knn(p, 2)
                .iter()
                .map(|n| n.dist_sq)
                .find(|&d| d > 0.0)
                .map(f32::sqrt)
        })
        .collect();
    strays::median(&mut nearest)
}

/// Largest distance (mm) of the points at `indices` from their centroid; 0 if none.
fn reach_from_centroid(points: &[[f32; 3]], indices: impl Iterator<Item = usize> + Clone) -> f32 {
    let Some(c) = geom::centroid_of(points, indices.clone()) else {
        return 0.0;
    };
    let c = c.map(|v| v as f32);
    indices
        .map(|i| geom::norm(geom::sub(points[i], c)))
        .fold(0.0, f32::max)
}

/// Step 2's removal: drops the points within the table threshold or below it (keeping the
/// order), marks them `Table`; returns (on the plane, below it).
fn remove_table(
    points: &mut Vec<[f32; 3]>,
    kept: &mut Vec<u32>,
    fate: &mut [Fate],
    table: &plane::TableFound,
) -> (usize, usize) {
    let (mut on, mut below) = (0, 0);
    let mut write = 0;
    for read in 0..points.len() {
        let d = table.plane.signed_distance(points[read]);
        if d > table.threshold_mm {
            points[write] = points[read];
            kept[write] = kept[read];
            write += 1;
        } else {
            if d < -table.threshold_mm {
                below += 1;
            } else {
                on += 1;
            }
            fate[kept[read] as usize] = Fate::Table;
        }
    }
    points.truncate(write);
    kept.truncate(write);
    (on, below)
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn non_finite_and_cropped_points_are_marked() {
        let pts = [
            [0.0f32, 0.0, 0.0],
            [f32::NAN, 0.0, 0.0],
            [5.0, 5.0, 5.0],
            [1.0, f32::NEG_INFINITY, 0.0],
            [1.0, 1.0, 1.0],
        ];
        let mut fate = vec![Fate::Part; 5];
        let kept = keep_finite_in_box(&pts, Some([[-1.0; 3], [2.0; 3]]), &mut fate);
        assert_eq!(kept, vec![0, 4]);
        assert_eq!(
            fate,
            vec![
                Fate::Part,
                Fate::NonFinite,
                Fate::Cropped,
                Fate::NonFinite,
                Fate::Part
            ]
        );
        let mut fate = vec![Fate::Part; 5];
        assert_eq!(keep_finite_in_box(&pts, None, &mut fate), vec![0, 2, 4]);
    }

    #[test]
    fn spacing_of_a_grid_ignores_duplicates() {
        let mut pts: Vec<[f32; 3]> = (0..2500)
            .map(|i| [(i % 50) as f32 * 0.5, (i / 50) as f32 * 0.5, 0.0])
            .collect();
        pts.extend_from_slice(&pts.clone()[..1000]);
        assert_eq!(measure_spacing(&pts), 0.5);
        assert_eq!(measure_spacing(&[[1.0; 3]; 10]), 0.0);
    }

    #[test]
    fn empty_all_nan_and_over_cropped_scans_are_errors() {
        let recipe = Recipe::default();
        assert_eq!(recipe.run(&PointCloud::default()), Err(PrepError::Empty));
        let nan = PointCloud::from_positions(vec![[f32::NAN; 3]; 4]);
        assert_eq!(recipe.run(&nan), Err(PrepError::NoFinitePoints(4)));
        let cropped = RecipeSettings {
            crop_box_mm: Some([[100.0; 3], [200.0; 3]]),
            ..Default::default()
        }
        .check()
        .unwrap();
        let cloud = PointCloud::from_positions(vec![[0.0; 3], [1.0; 3], [f32::NAN; 3]]);
        assert_eq!(cropped.run(&cloud), Err(PrepError::CropLeavesNothing(2)));
    }

    #[test]
    fn a_few_points_are_padded_and_a_single_point_survives() {
        let recipe = Recipe::default();
        let cloud =
            PointCloud::from_positions(vec![[1.0, 2.0, 3.0], [2.0, 2.0, 3.0], [1.0, 3.0, 3.0]]);
        let out = recipe.run(&cloud).unwrap();
        assert_eq!(out.points.len(), 1024);
        assert_eq!(out.report.counts.padded, 1021);
        assert!(out
            .report
            .warnings
            .iter()
            .any(|w| matches!(w, Warning::Padded { points: 3, .. })));
        let one = recipe
            .run(&PointCloud::from_positions(vec![[4.0; 3]]))
            .unwrap();
        assert_eq!(one.size.radius_mm, 0.0);
        assert!(one.points.iter().all(|p| *p == [0.0; 3]));
        assert_eq!(one.kept, vec![0]);
    }
}
