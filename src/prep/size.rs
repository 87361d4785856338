//! Step 6: centre and scale, keeping the true size. Two part types may differ only in size
//! (an M8 and an M12 nut), so the size in mm travels beside the unit-radius cloud.

use serde::{Deserialize, Serialize};

use super::geom::convex_hull;

/// The true size of a prepared part, in mm.
#[derive(Clone, Copy, Debug, PartialEq, Serialize, Deserialize)]
pub struct PartSize {
    /// Largest distance of a point from the centroid.
    pub radius_mm: f32,
    /// `[long, short, height]`: the sides of the smallest-area rectangle around the
    /// footprint (the points seen from above, +Z), longer first, then the extent along the
    /// up axis. Turning the part about the up axis does not change them (a square stays a
    /// square, which principal axes would not guarantee).
    pub extents_mm: [f32; 3],
}

/// Sizes below this (mm) are taken as this in [`PartSize::log_features`], so a flat or
/// single-point scan gives finite features.
const SMALLEST_MM: f32 = 1e-3;

impl PartSize {
    /// `[ln radius, ln long, ln short, ln height]` with sizes in mm, each size first raised
    /// to at least 0.001 mm: the network's size input (a log so that a 10 % larger part is
    /// the same step at any size).
    pub fn log_features(&self) -> [f32; 4] {
        let [a, b, c] = self.extents_mm;
        [self.radius_mm, a, b, c].map(|v| v.max(SMALLEST_MM).ln())
    }
}

/// What [`measure`] finds.
#[derive(Clone, Copy, Debug, PartialEq)]
pub(crate) struct Measured {
    pub centre: [f32; 3],
    pub size: PartSize,
    /// Unit direction (x, y) of the long side of the footprint's smallest rectangle.
    pub long_side: [f32; 2],
}

/// Measures the points (mm, up axis +Z): centroid, radius, extents and the footprint's long
/// side. `None` if empty.
pub(crate) fn measure(points: &[[f32; 3]]) -> Option<Measured> {
    if points.is_empty() {
        return None;
    }
    let n = points.len() as f64;
    let mut c = [0f64; 3];
    for p in points {
        for a in 0..3 {
            c[a] += p[a] as f64;
        }
    }
    let c = c.map(|s| s / n);
    let mut radius_sq = 0f64;
    let (mut zlo, mut zhi) = (f64::INFINITY, f64::NEG_INFINITY);
    let mut footprint: Vec<[f64; 2]> = Vec::with_capacity(points.len());
    for p in points {
        let d = [0, 1, 2].map(|a| p[a] as f64 - c[a]);
        radius_sq = radius_sq.max(d[0] * d[0] + d[1] * d[1] + d[2] * d[2]);
        zlo = zlo.min(d[2]);
        zhi = zhi.max(d[2]);
        footprint.push([d[0], d[1]]);
    }
    let ([long, short], long_side) = smallest_rectangle(&mut footprint);
    let size = PartSize {
        radius_mm: radius_sq.sqrt() as f32,
        extents_mm: [long as f32, short as f32, (zhi - zlo) as f32],
    };
    Some(Measured {
        centre: c.map(|x| x as f32),
        size,
        long_side: long_side.map(|x| x as f32),
    })
}

/// The turn about the up axis (row-major) that lays the footprint's long side along X, the
/// end with the larger third moment (the heavier, more spread end of a bolt: its head) on
/// +X. Parts then reach the network in one pose up to their own symmetry, and a small
/// training set need not teach every heading (our choice; measured in DEVELOPERS.md).
pub(crate) fn facing_turn(points: &[[f32; 3]], measured: &Measured) -> [[f32; 3]; 3] {
    let [ux, uy] = measured.long_side;
    let c = measured.centre;
    let third_moment: f64 = points
        .iter()
        .map(|p| f64::from((p[0] - c[0]) * ux + (p[1] - c[1]) * uy).powi(3))
        .sum();
    let sign = if third_moment < 0.0 { -1.0 } else { 1.0 };
    let (ux, uy) = (sign * ux, sign * uy);
    [[ux, uy, 0.0], [-uy, ux, 0.0], [0.0, 0.0, 1.0]]
}

/// Sides `[long, short]` of the smallest-area rectangle around the 2D points (reorders
/// them) and the unit direction of its long side ([1, 0] when there is no rectangle). It has a side along an edge of the convex hull (Freeman and Shapira, "Determining
/// the minimum-area encasing rectangle for an arbitrary closed curve", CACM 1975), so each
/// hull edge is tried. Fewer than 3 distinct points give the bounding box of what there is.
fn smallest_rectangle(points: &mut [[f64; 2]]) -> ([f64; 2], [f64; 2]) {
    let hull = convex_hull(points);
    let mut best = (f64::INFINITY, [0.0, 0.0], [1.0, 0.0]);
    for (i, &a) in hull.iter().enumerate() {
        let b = hull[(i + 1) % hull.len()];
        let (dx, dy) = (b[0] - a[0], b[1] - a[1]);
        let len = dx.hypot(dy);
        if len == 0.0 {
            continue;
        }
        let (ux, uy) = (dx / len, dy / len);
        let mut span = [(f64::INFINITY, f64::NEG_INFINITY); 2];
        for p in &hull {
            let along = p[0] * ux + p[1] * uy;
            let across = -p[0] * uy + p[1] * ux;
            span[0] = (span[0].0.min(along), span[0].1.max(along));
            span[1] = (span[1].0.min(across), span[1].1.max(across));
        }
        let (w, h) = (span[0].1 - span[0].0, span[1].1 - span[1].0);
        if w * h < best.0 {
            let long_side = if w >= h { [ux, uy] } else { [-uy, ux] };
            best = (w * h, [w.max(h), w.min(h)], long_side);
        }
    }
    if best.0.is_finite() {
        (best.1, best.2)
    } else {
        ([0.0, 0.0], [1.0, 0.0])
    }
}

#[cfg(test)]
mod tests {
    use super::*;

    fn box_corners(a: f32, b: f32, h: f32) -> Vec<[f32; 3]> {
        let mut pts = Vec::new();
        for x in [0.0, a] {
            for y in [0.0, b] {
                for z in [0.0, h] {
                    pts.push([x + 100.0, y - 50.0, z + 7.0]);
                }
            }
        }
        pts
    }

    #[test]
    fn box_size_by_hand_and_unchanged_by_turning_about_up() {
        // Corners of a 40 x 10 x 6 mm box: radius is half the diagonal,
        // sqrt(40² + 10² + 6²) / 2 = 20.83 mm.
        let pts = box_corners(40.0, 10.0, 6.0);
        let Measured {
            centre: c, size, ..
        } = measure(&pts).unwrap();
        assert!(
            (c[0] - 120.0).abs() < 1e-4 && (c[1] + 45.0).abs() < 1e-4 && (c[2] - 10.0).abs() < 1e-4
        );
        assert!((size.radius_mm - 20.833).abs() < 1e-2, "{size:?}");
        for (got, want) in size.extents_mm.iter().zip([40.0, 10.0, 6.0]) {
            assert!((got - want).abs() < 1e-3, "{size:?}");
        }
        for deg in [17.0f32, 90.0, 133.0] {
            let (s, co) = deg.to_radians().sin_cos();
            let turned: Vec<[f32; 3]> = pts
                .iter()
                .map(|p| [co * p[0] - s * p[1], s * p[0] + co * p[1], p[2]])
                .collect();
            let t = measure(&turned).unwrap().size;
            for (got, want) in t.extents_mm.iter().zip(size.extents_mm) {
                assert!((got - want).abs() < 1e-3, "{deg}: {t:?}");
            }
            assert!((t.radius_mm - size.radius_mm).abs() < 1e-3);
        }
    }

    #[test]
    fn a_square_footprint_stays_a_square_when_turned() {
        // A 30 x 30 mm square outline: principal axes are undefined, the rectangle is not.
        let mut pts = Vec::new();
        for i in 0..=30 {
            let t = i as f32;
            pts.extend([[t, 0.0, 0.0], [t, 30.0, 0.0], [0.0, t, 1.0], [30.0, t, 1.0]]);
        }
        for deg in [0.0f32, 10.0, 45.0, 71.0] {
            let (s, co) = deg.to_radians().sin_cos();
            let turned: Vec<[f32; 3]> = pts
                .iter()
                .map(|p| [co * p[0] - s * p[1], s * p[0] + co * p[1], p[2]])
                .collect();
            let size = measure(&turned).unwrap().size;
            assert!((size.extents_mm[0] - 30.0).abs() < 1e-3, "{deg}: {size:?}");
            assert!((size.extents_mm[1] - 30.0).abs() < 1e-3, "{deg}: {size:?}");
            assert!((size.extents_mm[2] - 1.0).abs() < 1e-6);
        }
    }

    /// A "bolt" footprint: a 40 x 6 mm shank along X and a 10 x 14 mm head at its end.
    fn bolt(head_at_plus_x: bool) -> Vec<[f32; 3]> {
        let mut pts = Vec::new();
        for i in 0..=80 {
            for j in 0..=6 {
                pts.push([i as f32 * 0.5, j as f32 - 3.0, 0.0]);
            }
        }
        for i in 0..=20 {
            for j in 0..=28 {
                pts.push([40.0 + i as f32 * 0.5, j as f32 * 0.5 - 7.0, 1.0]);
            }
        }
        if !head_at_plus_x {
            pts.iter_mut().for_each(|p| p[0] = -p[0]);
        }
        pts
    }

    #[test]
    fn facing_turn_lays_the_long_side_on_x_with_the_head_at_plus_x() {
        for head_at_plus_x in [true, false] {
            for deg in [0.0f32, 33.0, 90.0, 200.0, 301.0] {
                let (s, co) = deg.to_radians().sin_cos();
                let turned: Vec<[f32; 3]> = bolt(head_at_plus_x)
                    .iter()
                    .map(|p| [co * p[0] - s * p[1] + 5.0, s * p[0] + co * p[1] - 2.0, p[2]])
                    .collect();
                let m = measure(&turned).unwrap();
                let r = facing_turn(&turned, &m);
                let faced: Vec<[f32; 3]> = turned
                    .iter()
                    .map(|p| {
                        let d = [0, 1, 2].map(|a| p[a] - m.centre[a]);
                        super::super::geom::rotate(&r, d)
                    })
                    .collect();
                // The head (z = 1) ends up on +X, and the footprint spans 50 mm along X.
                let head_x = faced.iter().filter(|p| p[2] > 0.5).map(|p| p[0]);
                assert!(head_x.clone().all(|x| x > 0.0), "{head_at_plus_x} {deg}");
                let (lo, hi) = faced
                    .iter()
                    .fold((f32::MAX, f32::MIN), |(l, h), p| (l.min(p[0]), h.max(p[0])));
                assert!((hi - lo - 50.0).abs() < 1e-3, "{deg}: {}", hi - lo);
                // A proper turn: determinant +1.
                let det = r[0][0] * r[1][1] - r[0][1] * r[1][0];
                assert!((det - 1.0).abs() < 1e-6);
            }
        }
    }

    #[test]
    fn hull_of_collinear_and_repeated_points() {
        let mut line = vec![[0.0, 0.0], [1.0, 1.0], [2.0, 2.0], [2.0, 2.0]];
        let (sides, long_side) = smallest_rectangle(&mut line);
        let h = 0.5f64.sqrt();
        assert!((long_side[0].abs() - h).abs() < 1e-12 && (long_side[1].abs() - h).abs() < 1e-12);
        assert!(
            (sides[0] - 8f64.sqrt()).abs() < 1e-12 && sides[1].abs() < 1e-12,
            "{sides:?}"
        );
        assert_eq!(smallest_rectangle(&mut [[1.0, 1.0]; 3]).0, [0.0, 0.0]);
    }

    #[test]
    fn log_features_are_finite_for_a_point() {
        let size = measure(&[[1.0, 2.0, 3.0]]).unwrap().size;
        assert_eq!(size.radius_mm, 0.0);
        let f = size.log_features();
        assert!(f.iter().all(|v| v.is_finite()));
        assert!((f[0] - 1e-3f32.ln()).abs() < 1e-6);
        let s = PartSize {
            radius_mm: std::f32::consts::E,
            extents_mm: [1.0, 1.0, 1.0],
        };
        assert!((s.log_features()[0] - 1.0).abs() < 1e-6);
        assert!(measure(&[]).is_none());
    }
}
