//! Step 2: the table plane. A RANSAC plane fit (Fischler and Bolles, 1981), refined by least
//! squares, then a test that the plane is the part's support and not one of its faces.

use serde::{Deserialize, Serialize};

use super::geom::{
    centroid_of, convex_hull, cross, dot, inside_convex, norm, rotate, rotation_to_z, scatter_of,
    sub, symmetric_eigen,
};
use crate::graph::spatial::SpatialIndex;
use crate::rng::Rng;

/// A plane `normal · p + offset_mm = 0`, with a unit `normal`.
#[derive(Clone, Copy, Debug, PartialEq, Serialize, Deserialize)]
pub struct Plane {
    pub normal: [f32; 3],
    pub offset_mm: f32,
}

impl Plane {
    /// Signed distance (mm) of `p`, positive on the side the normal points to.
    pub fn signed_distance(&self, p: [f32; 3]) -> f32 {
        dot(self.normal, p) + self.offset_mm
    }

    fn flipped(self) -> Plane {
        Plane {
            normal: self.normal.map(|c| -c),
            offset_mm: -self.offset_mm,
        }
    }
}

/// Points on which candidate planes are scored: enough to tell a 5 % plane from noise, few
/// enough that a thousand candidates cost a few milliseconds.
const SCORE_SAMPLE: usize = 4096;
/// RANSAC stops once the best plane so far would have been drawn with this probability.
const CONFIDENCE: f64 = 0.999;

/// The plane with the most points within `threshold_mm`, by RANSAC over at most
/// `iterations` candidates (each through three random points, scored on a random sample),
/// then refined by a least-squares fit to its inliers among all points (twice). Returns the
/// plane and its inlier count among all `points`, or `None` with fewer than 3 points or no
/// non-degenerate candidate. Deterministic for a given `seed`.
pub fn ransac_plane(
    points: &[[f32; 3]],
    threshold_mm: f32,
    iterations: u32,
    seed: u64,
) -> Option<(Plane, usize)> {
    if points.len() < 3 {
        return None;
    }
    let mut rng = Rng::new(seed);
    let sample: Vec<[f32; 3]> = if points.len() <= SCORE_SAMPLE {
        points.to_vec()
    } else {
        (0..SCORE_SAMPLE)
            .map(|_| points[rng.below(points.len())])
            .collect()
    };
    let scale = extent(sample.iter().copied());
    let mut best: Option<(Plane, usize)> = None;
    let mut needed = iterations as f64;
    let mut done = 0u32;
    while (done as f64) < needed.min(iterations as f64) {
        done += 1;
        let [a, b, c] = [0; 3].map(|_| sample[rng.below(sample.len())]);
        let n = cross(sub(b, a), sub(c, a));
        let len = norm(n);
        // Collinear or repeated picks give no plane.
        if len.is_nan() || len <= 1e-6 * scale * scale {
            continue;
        }
        let normal = n.map(|v| v / len);
        let plane = Plane {
            normal,
            offset_mm: -dot(normal, a),
        };
        let count = sample
            .iter()
            .filter(|&&p| plane.signed_distance(p).abs() <= threshold_mm)
            .count();
        if best.is_none_or(|(_, c)| count > c) {
            best = Some((plane, count));
            let w = count as f64 / sample.len() as f64;
            let miss = 1.0 - w * w * w;
            if miss <= 0.0 {
                break;
            }
            needed = ((1.0 - CONFIDENCE).ln() / miss.ln()).ceil();
        }
    }
    let (mut plane, _) = best?;
    for _round in 0..2 {
        plane = refit(points, plane, threshold_mm);
    }
    let inliers = points
        .iter()
        .filter(|&&p| plane.signed_distance(p).abs() <= threshold_mm)
        .count();
    Some((plane, inliers))
}

/// Diagonal (mm) of the bounding box of the points; 0 for none.
fn extent(points: impl Iterator<Item = [f32; 3]>) -> f32 {
    let mut lo = [f32::INFINITY; 3];
    let mut hi = [f32::NEG_INFINITY; 3];
    for p in points {
        for a in 0..3 {
            lo[a] = lo[a].min(p[a]);
            hi[a] = hi[a].max(p[a]);
        }
    }
    if lo[0] > hi[0] {
        0.0
    } else {
        norm(sub(hi, lo))
    }
}

/// The plane through the centroid along the two largest principal axes of the points at
/// `indices`; `None` for fewer than 3 points.
fn least_squares_plane(
    points: &[[f32; 3]],
    indices: impl Iterator<Item = usize> + Clone,
) -> Option<Plane> {
    indices.clone().nth(2)?;
    let c = centroid_of(points, indices.clone())?;
    let (_, vectors) = symmetric_eigen(scatter_of(points, indices, c));
    let n = vectors[0];
    let normal = n.map(|v| v as f32);
    let offset = -(n[0] * c[0] + n[1] * c[1] + n[2] * c[2]);
    Some(Plane {
        normal,
        offset_mm: offset as f32,
    })
}

/// What [`find_table`] decided.
#[derive(Clone, Debug, PartialEq)]
pub(crate) enum TableSearch {
    Found(TableFound),
    /// No plane passed; the reason is for the report.
    NotFound(String),
}

#[derive(Clone, Debug, PartialEq)]
pub(crate) struct TableFound {
    /// Normal pointing from the table to the part.
    pub plane: Plane,
    /// Points within this distance (mm) of the plane, and all below it, are table.
    pub threshold_mm: f32,
}

/// How to look for the table.
pub(crate) struct TableSearchSettings {
    /// RANSAC inlier distance (mm): set by the user, or three spacings by default.
    pub ransac_threshold_mm: f32,
    /// Set the final threshold to 3 standard deviations of the range noise on the table,
    /// at least half a spacing (off when the user set the distance).
    pub adapt_to_noise: bool,
    pub min_fraction: f32,
    pub iterations: u32,
    /// The scan's point spacing (mm), to tell what stands on the plane from noise.
    pub spacing_mm: f32,
    pub seed: u64,
}

/// Planes tried before giving up: the table is the largest plane unless a face of the part
/// is larger, so later tries find it under a big flat part, or round a close-up hex nut whose
/// end face and three flats each hold more points than the table band around it.
const PLANE_TRIES: usize = 5;
/// A table has (nearly) nothing below it: range noise past 3 standard deviations, a few
/// reflections. A plane with more than this share of the scan on its far side is a wall of
/// the part (a bracket's upright flange) with the table on both sides.
const MOST_BELOW: f64 = 0.05;
/// The table's noise band (the threshold) is thin beside the table's size; a plane through
/// the middle of a sparse model gathers a band as thick as the model.
const THICKEST_BAND: f32 = 0.05;
/// A plane with more of its points than this under what stands on it is a face of the part,
/// not a table (see [`share_under_part`]). A washer's hole or an elbow's inner corner shows
/// some table under the part's outline, but not this much.
const MOST_UNDER_PART: f64 = 0.75;

/// Finds the table: the largest plane (among [`PLANE_TRIES`]) that holds at least
/// `min_fraction` of the points, has the scan's origin (the sensor, in a camera-frame scan)
/// not behind it, has (nearly) nothing beyond it on the side away from the rest, and does
/// not lie mostly under what stands on it (see [`share_under_part`]). The last three reject
/// faces of the part. Each plane found first moves to a parallel plane behind it where
/// there is one (see [`plane_behind`]).
pub(crate) fn find_table(points: &[[f32; 3]], settings: &TableSearchSettings) -> TableSearch {
    let min_inliers = (settings.min_fraction as f64 * points.len() as f64).ceil() as usize;
    let mut candidates: Vec<[f32; 3]> = points.to_vec();
    let mut failures: Vec<String> = Vec::new();
    for attempt in 0..PLANE_TRIES {
        let seed = settings.seed.wrapping_add(attempt as u64);
        let Some((plane, inliers)) = ransac_plane(
            &candidates,
            settings.ransac_threshold_mm,
            settings.iterations,
            seed,
        ) else {
            break;
        };
        if inliers < min_inliers.max(3) {
            let why = format!(
                "the largest plane holds {:.1} % of the points (a table needs {:.1} %)",
                100.0 * inliers as f64 / points.len() as f64,
                100.0 * settings.min_fraction
            );
            failures.push(why);
            break;
        }
        let fit = |plane: Plane| {
            let plane = part_side_up(points, plane, settings.ransac_threshold_mm);
            if settings.adapt_to_noise {
                fit_to_noise(
                    points,
                    plane,
                    settings.ransac_threshold_mm,
                    0.5 * settings.spacing_mm,
                )
            } else {
                (plane, settings.ransac_threshold_mm)
            }
        };
        // First behind the RANSAC band (a noise fit on a plane tilted across a face and the
        // table measures both, and its band hides the table behind), then behind the band
        // fitted to the noise.
        let (mut plane, mut threshold_mm) = (plane, settings.ransac_threshold_mm);
        let mut fitted = false;
        for _move in 0..=MOST_MOVES_BEHIND {
            // Counted in its fitted band: a RANSAC band thinner than the noise (a dense
            // scan) holds only part of a table.
            let moved = plane_behind(points, &plane, threshold_mm, settings, min_inliers, seed)
                .map(&fit)
                .filter(|(p, t)| count_within(points, p, *t) >= min_inliers);
            match moved {
                Some(m) => (plane, threshold_mm) = m,
                None if fitted => break,
                None => (plane, threshold_mm) = fit(plane),
            }
            fitted = true;
        }
        if !fitted {
            (plane, threshold_mm) = fit(plane);
        }
        let below = points
            .iter()
            .filter(|&&p| plane.signed_distance(p) < -threshold_mm)
            .count();
        let below_share = below as f64 / points.len() as f64;
        let band_extent = extent(
            points
                .iter()
                .copied()
                .filter(|&p| plane.signed_distance(p).abs() <= threshold_mm),
        );
        let why = if threshold_mm > THICKEST_BAND * band_extent {
            format!(
                "the points near the largest plane spread {threshold_mm:.3} mm from it, too far \
                 for a table {band_extent:.1} mm across, so it is a cut through the part"
            )
        } else if plane.offset_mm < -threshold_mm {
            // The origin of a camera-frame scan is the sensor, which looks at the table from
            // the part's side; a face of the part seen from the front has the rest of the
            // part behind it, away from the sensor. (A scan in another frame whose origin
            // lies below the table would lose its table here: the report says so.)
            "the scan's origin (the sensor) is behind the largest plane, away from the rest, \
             so it is a face of the part seen from the front"
                .to_string()
        } else if below_share > MOST_BELOW {
            format!(
                "{:.0} % of the scan lies beyond the largest plane on the side away from the \
                 rest, so it is not a table under the part",
                100.0 * below_share
            )
        } else {
            match share_under_part(points, &plane, threshold_mm, settings.spacing_mm) {
                Some(share) if share <= MOST_UNDER_PART => {
                    return TableSearch::Found(TableFound {
                        plane,
                        threshold_mm,
                    })
                }
                Some(share) => format!(
                    "{:.0} % of the largest plane lies under the rest of the scan, so it is \
                     taken for a face of the part",
                    100.0 * share
                ),
                None => "nothing stands on the largest plane".to_string(),
            }
        };
        failures.push(why);
        candidates.retain(|&p| plane.signed_distance(p).abs() > threshold_mm);
    }
    if failures.is_empty() {
        failures.push("no plane through the points".into());
    }
    TableSearch::NotFound(failures.join("; next, "))
}

/// Moves to a plane behind at most this many times: each move goes farther from the sensor.
const MOST_MOVES_BEHIND: usize = 3;
/// A plane behind is parallel enough to be the table under a face within this angle (cosine
/// of 20°): a face tilted across the face and the table is a few degrees off; a wall of the
/// part is far more.
const PARALLEL_COS: f32 = 0.94;

/// A table holds the part up to the sensor, so nothing but noise lies behind it. When a
/// plane has a plane of its own behind it (on the side away from the scan's origin, the
/// sensor in a camera-frame scan), nearly parallel and large enough for a table
/// (`min_inliers`), that one is nearer the table: the first was a face of the part (a
/// washer's top) or a plane tilted across a face and the table. Returns it (RANSAC on the
/// points behind), or `None`. A plane through the origin has no behind.
fn plane_behind(
    points: &[[f32; 3]],
    plane: &Plane,
    threshold_mm: f32,
    settings: &TableSearchSettings,
    min_inliers: usize,
    seed: u64,
) -> Option<Plane> {
    let origin_side = plane.offset_mm;
    if origin_side.abs() <= threshold_mm {
        return None;
    }
    let behind: Vec<[f32; 3]> = points
        .iter()
        .copied()
        .filter(|&p| plane.signed_distance(p) * origin_side.signum() < -threshold_mm)
        .collect();
    if behind.len() < min_inliers.max(3) {
        return None;
    }
    let (found, _) = ransac_plane(
        &behind,
        settings.ransac_threshold_mm,
        settings.iterations,
        seed,
    )?;
    (dot(found.normal, plane.normal).abs() >= PARALLEL_COS).then_some(found)
}

/// Points within `threshold_mm` of `plane`.
fn count_within(points: &[[f32; 3]], plane: &Plane, threshold_mm: f32) -> usize {
    points
        .iter()
        .filter(|&&p| plane.signed_distance(p).abs() <= threshold_mm)
        .count()
}

/// One estimate of the table distance from the range noise: 3 robust standard deviations
/// (1.4826 x the median absolute residual, the normal-consistent MAD: common practice, no
/// source), at least `floor_mm`, of the points within `window_mm` *below* the plane: nothing
/// real is there, while above it the foot of the part would pass for noise. `None` if no
/// point is in the window. `plane`'s normal must point to the part.
fn noise_estimate(
    points: &[[f32; 3]],
    plane: &Plane,
    window_mm: f32,
    floor_mm: f32,
    residuals: &mut Vec<f32>,
) -> Option<f32> {
    residuals.clear();
    residuals.extend(
        points
            .iter()
            .map(|&p| -plane.signed_distance(p))
            .filter(|&d| d > 0.0 && d <= window_mm),
    );
    if residuals.is_empty() {
        return None;
    }
    let mid = residuals.len() / 2;
    let (_, median, _) = residuals.select_nth_unstable_by(mid, f32::total_cmp);
    Some(floor_mm.max(3.0 * 1.4826 * *median))
}

/// A measured table distance is trusted to grow by at most this factor when measured again
/// in a window 3 times as wide. Gaussian noise gives back the same figure (the window holds
/// 9 standard deviations); residuals spread evenly over the window (a plane tilted across a
/// face of the part and the table, its far half a slab of points) give 6.7 times it, and
/// then every round again: a runaway, not noise.
const MOST_GROWTH: f32 = 2.0;

/// Alternately measures the noise ([`noise_estimate`], twice: in a window of 3 x the RANSAC
/// distance, then of 3 x the first estimate, so a noise larger than the first guess is
/// still measured) and refits the plane to the points within 2 standard deviations of it,
/// three times: the RANSAC distance may be far from the noise, and a refit on too wide a
/// band leans on the foot of the part. Stops at the last estimate when a new one grows more
/// than [`MOST_GROWTH`] times. Keeps the normal's side. Returns the plane and the distance.
fn fit_to_noise(
    points: &[[f32; 3]],
    mut plane: Plane,
    start_mm: f32,
    floor_mm: f32,
) -> (Plane, f32) {
    let mut threshold = start_mm;
    let mut measured = false;
    let mut residuals: Vec<f32> = Vec::with_capacity(points.len() / 2);
    for round in 0..4 {
        for _estimate in 0..2 {
            let Some(estimate) =
                noise_estimate(points, &plane, 3.0 * threshold, floor_mm, &mut residuals)
            else {
                break;
            };
            if measured && estimate > MOST_GROWTH * threshold {
                return (plane, threshold);
            }
            threshold = estimate;
            measured = true;
        }
        if round < 3 {
            // Refit on 2 sigma, not the 3 of the table distance: less of the part's foot.
            plane = refit(points, plane, threshold * (2.0 / 3.0));
        }
    }
    (plane, threshold)
}

/// The least-squares plane of the points within `threshold_mm` of `plane`, normal on the
/// same side; `plane` itself if fewer than 3 points are that close.
fn refit(points: &[[f32; 3]], plane: Plane, threshold_mm: f32) -> Plane {
    let inliers =
        (0..points.len()).filter(|&i| plane.signed_distance(points[i]).abs() <= threshold_mm);
    match least_squares_plane(points, inliers) {
        Some(r) if dot(r.normal, plane.normal) < 0.0 => r.flipped(),
        Some(r) => r,
        None => plane,
    }
}

/// The plane turned so its normal points to the side holding more points beyond the
/// threshold (the part stands above the table; below it there is only noise).
fn part_side_up(points: &[[f32; 3]], plane: Plane, threshold_mm: f32) -> Plane {
    let (mut above, mut below) = (0usize, 0usize);
    for &p in points {
        let s = plane.signed_distance(p);
        if s > threshold_mm {
            above += 1;
        } else if s < -threshold_mm {
            below += 1;
        }
    }
    if below > above {
        plane.flipped()
    } else {
        plane
    }
}

/// Points above the plane count for the footprint only with at least this many others
/// above it within [`SOLID_RADIUS_SPACINGS`] spacings: range noise just past the threshold
/// is scattered thinly over the whole table and must not count as something standing on it.
const SOLID_NEIGHBOURS: usize = 4;
const SOLID_RADIUS_SPACINGS: f32 = 3.0;
/// Points above the plane tested for the footprint at most (evenly strided).
const FOOTPRINT_SAMPLE: usize = 4096;

/// The share of the plane's points that lie under what stands on the plane: inside the
/// convex hull of its footprint (its points projected along the normal). Under a part on a
/// table the sensor sees no table (only through holes and into concave corners), so a table
/// has a small share. A face of a part has a large one: the rest of the part stands on the
/// face's rim or over it (a closed surface, such as a sampled CAD model, covers each face
/// entirely). What stands on the plane: the points above the threshold with neighbours
/// above it too (see [`SOLID_NEIGHBOURS`]). `None` if nothing stands on it.
fn share_under_part(
    points: &[[f32; 3]],
    plane: &Plane,
    threshold_mm: f32,
    spacing_mm: f32,
) -> Option<f64> {
    let r = rotation_to_z(plane.normal);
    let above: Vec<[f32; 3]> = points
        .iter()
        .filter(|&&p| plane.signed_distance(p) > threshold_mm)
        .map(|&p| rotate(&r, p))
        .collect();
    let index = SpatialIndex::new(&above);
    let radius = SOLID_RADIUS_SPACINGS * spacing_mm;
    // The hull needs the outline, not every point: an even sample keeps it to a few ms.
    let stride = above.len().div_ceil(FOOTPRINT_SAMPLE).max(1);
    let mut footprint: Vec<[f64; 2]> = above
        .iter()
        .step_by(stride)
        .filter(|&&q| {
            let mut near = 0usize;
            index.for_each_within(q, radius, |_, _| near += 1);
            near > SOLID_NEIGHBOURS // the point itself is among them
        })
        .map(|q| [q[0] as f64, q[1] as f64])
        .collect();
    if footprint.len() * 10 < above.len().min(FOOTPRINT_SAMPLE) {
        // Hardly anything above is dense: not a noisy scan of a part on a table but a sparse
        // cloud (a few points sampled on a model), where every point above counts.
        footprint = above
            .iter()
            .step_by(stride)
            .map(|q| [q[0] as f64, q[1] as f64])
            .collect();
    }
    if footprint.is_empty() {
        return None;
    }
    let hull = convex_hull(&mut footprint);
    let (mut on_plane, mut under) = (0usize, 0usize);
    for &p in points {
        if plane.signed_distance(p).abs() <= threshold_mm {
            on_plane += 1;
            let q = rotate(&r, p);
            if inside_convex(&hull, [q[0] as f64, q[1] as f64]) {
                under += 1;
            }
        }
    }
    Some(under as f64 / on_plane.max(1) as f64)
}

#[cfg(test)]
mod tests {
    use super::*;

    /// Points on the known plane z = 0.3 x - 0.2 y - 5 (mm; the origin, where a sensor would
    /// be, above it) with Gaussian noise along z,
    /// and `clutter` uniform points in a box above it.
    fn noisy_plane(n: usize, clutter: usize, sigma: f64, rng: &mut Rng) -> Vec<[f32; 3]> {
        let mut pts: Vec<[f32; 3]> = (0..n)
            .map(|_| {
                let (x, y) = (rng.range(-100.0, 100.0), rng.range(-100.0, 100.0));
                let z = 0.3 * x - 0.2 * y - 5.0 + sigma * rng.normal();
                [x as f32, y as f32, z as f32]
            })
            .collect();
        pts.extend((0..clutter).map(|_| {
            let (x, y) = (rng.range(-30.0, 30.0), rng.range(-30.0, 30.0));
            let z = 0.3 * x - 0.2 * y - 5.0 + rng.range(5.0, 60.0);
            [x as f32, y as f32, z as f32]
        }));
        pts
    }

    /// The known plane's unit normal and offset: z - 0.3 x + 0.2 y + 5 = 0, normalised.
    fn known_plane() -> Plane {
        let n = [-0.3f32, 0.2, 1.0];
        let len = norm(n);
        Plane {
            normal: n.map(|c| c / len),
            offset_mm: 5.0 / len,
        }
    }

    fn assert_close_plane(got: &Plane, want: &Plane, angle_deg: f32, offset_mm: f32) {
        let (g, w) = if dot(got.normal, want.normal) < 0.0 {
            (got.flipped(), *want)
        } else {
            (*got, *want)
        };
        let angle = dot(g.normal, w.normal).clamp(-1.0, 1.0).acos().to_degrees();
        assert!(angle < angle_deg, "normal off by {angle}°: {g:?} vs {w:?}");
        assert!(
            (g.offset_mm - w.offset_mm).abs() < offset_mm,
            "{g:?} vs {w:?}"
        );
    }

    #[test]
    fn ransac_recovers_a_known_plane_under_clutter() {
        // Ground truth by construction: 40 % of the points on a plane, 60 % clutter.
        let mut rng = Rng::new(3);
        let pts = noisy_plane(4000, 6000, 0.2, &mut rng);
        let (plane, inliers) = ransac_plane(&pts, 0.8, 1000, 9).unwrap();
        assert_close_plane(&plane, &known_plane(), 0.2, 0.1);
        assert!((3900..=4100).contains(&inliers), "{inliers}");
        // Same seed, same answer.
        assert_eq!(ransac_plane(&pts, 0.8, 1000, 9).unwrap(), (plane, inliers));
    }

    #[test]
    fn ransac_on_too_few_or_degenerate_points_gives_none() {
        assert!(ransac_plane(&[[0.0; 3], [1.0, 0.0, 0.0]], 1.0, 100, 0).is_none());
        let line: Vec<[f32; 3]> = (0..50).map(|i| [i as f32, 0.0, 0.0]).collect();
        assert!(ransac_plane(&line, 0.1, 100, 0).is_none());
        assert!(ransac_plane(&vec![[2.0; 3]; 20], 0.1, 100, 0).is_none());
    }

    fn settings(threshold: f32, spacing_mm: f32) -> TableSearchSettings {
        TableSearchSettings {
            spacing_mm,
            ransac_threshold_mm: threshold,
            adapt_to_noise: true,
            min_fraction: 0.1,
            iterations: 1000,
            seed: 1,
        }
    }

    #[test]
    fn table_is_found_with_the_part_above_and_noise_covered() {
        let mut rng = Rng::new(4);
        let mut pts = noisy_plane(8000, 3000, 0.5, &mut rng);
        // A few points below the table (reflections) must not turn the plane over.
        pts.extend((0..50).map(|i| [i as f32, 0.0, -50.0]));
        let TableSearch::Found(t) = find_table(&pts, &settings(0.4, 2.0)) else {
            panic!("no table")
        };
        assert_close_plane(&t.plane, &known_plane(), 0.3, 0.1);
        assert!(t.plane.normal[2] > 0.0, "part is above: {:?}", t.plane);
        // Noise sigma 0.5 mm (along z; 0.48 along the normal): the threshold widens from
        // 0.4 to about 1.45 mm.
        assert!((1.2..1.8).contains(&t.threshold_mm), "{}", t.threshold_mm);
    }

    #[test]
    fn a_face_of_a_part_is_not_a_table() {
        // A box surface without a table: its largest face has the rest of the box above it.
        let mut rng = Rng::new(5);
        let mut pts = Vec::new();
        for _ in 0..6000 {
            let (u, v) = (rng.range(-1.0, 1.0) as f32, rng.range(-1.0, 1.0) as f32);
            let face = rng.below(5);
            pts.push(match face {
                0 | 1 => [60.0 * u, 40.0 * v, 0.0], // a large bottom face (twice the points)
                2 => [60.0 * u, 40.0, 10.0 + 10.0 * v],
                3 => [60.0, 40.0 * u, 10.0 + 10.0 * v],
                _ => [60.0 * u, 40.0 * v, 20.0],
            });
        }
        match find_table(&pts, &settings(0.3, 1.0)) {
            TableSearch::NotFound(why) => assert!(why.contains("face of the part"), "{why}"),
            TableSearch::Found(t) => panic!("took a face for the table: {t:?}"),
        }
    }

    #[test]
    fn a_wall_with_table_on_both_sides_is_not_the_table() {
        // Sensor at the origin looking down -z: a table at z = -100 and a wall x = 0 rising
        // from it with more points than the table; the wall has table on both sides.
        let mut rng = Rng::new(7);
        let mut pts: Vec<[f32; 3]> = (0..5000)
            .map(|_| {
                [
                    0.05 * rng.normal() as f32,
                    rng.range(-40.0, 40.0) as f32,
                    rng.range(-100.0, -40.0) as f32,
                ]
            })
            .collect();
        pts.extend((0..4000).map(|_| {
            let x = rng.range(10.0, 80.0) * if rng.uniform() < 0.5 { -1.0 } else { 1.0 };
            [
                x as f32,
                rng.range(-80.0, 80.0) as f32,
                (-100.0 + 0.05 * rng.normal()) as f32,
            ]
        }));
        let TableSearch::Found(t) = find_table(&pts, &settings(0.2, 1.0)) else {
            panic!("no table")
        };
        assert!(t.plane.normal[2] > 0.999, "{t:?}");
        assert!((t.plane.offset_mm - 100.0).abs() < 0.1, "{t:?}");
    }

    #[test]
    fn a_face_seen_from_the_front_is_not_a_table() {
        // No table: a box top facing the sensor at the origin, its sides going away from it.
        let mut rng = Rng::new(8);
        let mut pts: Vec<[f32; 3]> = (0..4000)
            .map(|_| {
                [
                    rng.range(-30.0, 30.0) as f32,
                    rng.range(-20.0, 20.0) as f32,
                    -50.0,
                ]
            })
            .collect();
        pts.extend((0..300).map(|_| {
            [
                30.0,
                rng.range(-20.0, 20.0) as f32,
                rng.range(-80.0, -50.0) as f32,
            ]
        }));
        pts.extend((0..300).map(|_| {
            [
                rng.range(-30.0, 30.0) as f32,
                20.0,
                rng.range(-80.0, -50.0) as f32,
            ]
        }));
        match find_table(&pts, &settings(0.2, 1.0)) {
            TableSearch::NotFound(why) => assert!(why.contains("behind"), "{why}"),
            TableSearch::Found(t) => panic!("took a face for the table: {t:?}"),
        }
    }

    #[test]
    fn a_cut_through_a_thick_cloud_is_not_a_table() {
        // Points filling a 100 x 100 x 14 mm slab below the origin: the best "plane" is its
        // middle, with a noise band half as thick as the slab: not a table.
        let mut rng = Rng::new(9);
        let pts: Vec<[f32; 3]> = (0..6000)
            .map(|_| {
                [
                    rng.range(-50.0, 50.0) as f32,
                    rng.range(-50.0, 50.0) as f32,
                    rng.range(-107.0, -93.0) as f32,
                ]
            })
            .collect();
        match find_table(&pts, &settings(1.5, 1.5)) {
            TableSearch::NotFound(why) => assert!(why.contains("cut through"), "{why}"),
            TableSearch::Found(t) => panic!("{t:?}"),
        }
    }

    /// Sensor at the origin looking down -z: a table at z = -100 (a 120 mm square) and on
    /// it a thin disc (radius 40 mm, 1.5 mm thick) holding more points than the table
    /// around it, range noise 0.1 mm.
    fn disc_on_table(rng: &mut Rng) -> Vec<[f32; 3]> {
        let mut pts = Vec::new();
        while pts.len() < 4000 {
            let (x, y) = (rng.range(-60.0, 60.0), rng.range(-60.0, 60.0));
            if x * x + y * y > 40.0 * 40.0 {
                pts.push([x as f32, y as f32, (-100.0 + 0.1 * rng.normal()) as f32]);
            }
        }
        while pts.len() < 10000 {
            let (x, y) = (rng.range(-40.0, 40.0), rng.range(-40.0, 40.0));
            if x * x + y * y <= 40.0 * 40.0 {
                pts.push([x as f32, y as f32, (-98.5 + 0.1 * rng.normal()) as f32]);
            }
        }
        pts
    }

    #[test]
    fn the_plane_behind_a_disc_top_is_the_table() {
        let mut rng = Rng::new(10);
        let pts = disc_on_table(&mut rng);
        let disc_top = Plane {
            normal: [0.0, 0.0, 1.0],
            offset_mm: 98.5,
        };
        let behind = plane_behind(&pts, &disc_top, 0.3, &settings(0.3, 1.0), 1000, 1)
            .expect("the table behind the disc");
        assert_close_plane(&behind, &known_table(), 0.5, 0.2);
        // Nothing but noise behind the table itself.
        assert_eq!(
            plane_behind(&pts, &known_table(), 0.3, &settings(0.3, 1.0), 1000, 1),
            None
        );
    }

    fn known_table() -> Plane {
        Plane {
            normal: [0.0, 0.0, 1.0],
            offset_mm: 100.0,
        }
    }

    #[test]
    fn a_thin_disc_on_the_table_is_kept_off_it() {
        // End to end: whichever plane is found first, the table comes out, with the disc
        // above its band.
        let mut rng = Rng::new(11);
        let pts = disc_on_table(&mut rng);
        let TableSearch::Found(t) = find_table(&pts, &settings(0.3, 1.0)) else {
            panic!("no table")
        };
        assert_close_plane(&t.plane, &known_table(), 0.2, 0.1);
        let disc_on_table_band = pts[4000..]
            .iter()
            .filter(|&&p| t.plane.signed_distance(p) <= t.threshold_mm)
            .count();
        assert_eq!(disc_on_table_band, 0, "{t:?}");
    }

    /// Sensor at the origin looking down -z: a table at z = -100 (120 x 80 mm, points 1 mm
    /// apart on average, noise 0.15 mm) with a plate 3 mm thick on it (40 x 40 mm), as an
    /// angle bracket's flange lying on the table within a few RANSAC distances of it.
    fn plate_on_table(rng: &mut Rng) -> Vec<[f32; 3]> {
        let on_plate = |x: f64, y: f64| (0.0..40.0).contains(&x) && y.abs() < 20.0;
        let mut pts = Vec::new();
        while pts.len() < 8000 {
            let (x, y) = (rng.range(-60.0, 60.0), rng.range(-40.0, 40.0));
            let z = if on_plate(x, y) { -97.0 } else { -100.0 };
            pts.push([x as f32, y as f32, (z + 0.15 * rng.normal()) as f32]);
        }
        pts
    }

    #[test]
    fn the_plane_behind_a_plane_tilted_across_plate_and_table_is_the_table() {
        let mut rng = Rng::new(13);
        let pts = plate_on_table(&mut rng);
        // Through the table at x = -60 and the plate's top at x = 40: 1.7° off.
        let n = [-0.03f32, 0.0, 1.0];
        let len = norm(n);
        let tilted = Plane {
            normal: n.map(|c| c / len),
            offset_mm: 98.2 / len,
        };
        let behind = plane_behind(&pts, &tilted, 1.0, &settings(1.0, 1.0), 800, 1)
            .expect("the table behind the tilted plane");
        assert_close_plane(&behind, &known_table(), 0.5, 0.3);
    }

    #[test]
    fn a_plate_on_the_table_is_kept_off_it() {
        let mut rng = Rng::new(14);
        let pts = plate_on_table(&mut rng);
        let TableSearch::Found(t) = find_table(&pts, &settings(1.0, 1.0)) else {
            panic!("no table")
        };
        assert_close_plane(&t.plane, &known_table(), 0.2, 0.1);
        let plate_in_table_band = pts
            .iter()
            .filter(|p| p[2] > -98.5 && t.plane.signed_distance(**p) <= t.threshold_mm)
            .count();
        assert_eq!(plate_in_table_band, 0, "{t:?}");
    }

    #[test]
    fn the_noise_fit_does_not_run_away_over_a_slab_below() {
        // A plane z = 0 with noise 0.1 mm over a dense slab of points 0.6 to 40 mm below it,
        // as below a plane tilted across a face of the part and the table: each wider
        // window finds more of the slab, so each estimate would be several times the last.
        let mut rng = Rng::new(12);
        let mut pts: Vec<[f32; 3]> = (0..1000)
            .map(|_| {
                let (x, y) = (rng.range(-50.0, 50.0), rng.range(-50.0, 50.0));
                [x as f32, y as f32, (0.1 * rng.normal()) as f32]
            })
            .collect();
        pts.extend((0..20000).map(|_| {
            let (x, y) = (rng.range(-50.0, 50.0), rng.range(-50.0, 50.0));
            [x as f32, y as f32, rng.range(-40.0, -0.6) as f32]
        }));
        let plane = Plane {
            normal: [0.0, 0.0, 1.0],
            offset_mm: 0.0,
        };
        let (_, threshold) = fit_to_noise(&pts, plane, 1.0, 0.05);
        assert!(threshold < 10.0, "{threshold}");
    }

    #[test]
    fn too_small_a_plane_is_not_a_table() {
        let mut rng = Rng::new(6);
        let mut pts = noisy_plane(200, 0, 0.1, &mut rng);
        pts.extend((0..5000).map(|_| [0, 0, 0].map(|_| rng.range(-100.0, 100.0) as f32)));
        match find_table(&pts, &settings(0.3, 2.0)) {
            TableSearch::NotFound(why) => assert!(why.contains("holds"), "{why}"),
            TableSearch::Found(t) => panic!("{t:?}"),
        }
    }
}
