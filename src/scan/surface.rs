//! Points sampled on a triangle mesh, area-weighted, so that a PLY with faces (a reference
//! scan made from CAD) becomes a point cloud like a sensor's.

use super::PointCloud;
use crate::rng::Rng;

type V3 = [f64; 3];

fn sub(a: V3, b: V3) -> V3 {
    [a[0] - b[0], a[1] - b[1], a[2] - b[2]]
}

fn cross(a: V3, b: V3) -> V3 {
    [
        a[1] * b[2] - a[2] * b[1],
        a[2] * b[0] - a[0] * b[2],
        a[0] * b[1] - a[1] * b[0],
    ]
}

/// Samples `count` points uniformly over the surface of `triangles` (indices into `vertices`,
/// all in range: the reader checked them), in the vertices' units.
///
/// A triangle is picked with probability proportional to its area, and a point inside it by
/// P = (1 - √r1) A + √r1 (1 - r2) B + √r1 r2 C with r1, r2 uniform in [0, 1) (Osada et al.,
/// "Shape Distributions", ACM Transactions on Graphics 21(4), 2002, section 4.2). Each point's
/// normal is its triangle's, by the right-hand rule on the corner order. A triangle with a
/// non-finite corner counts as area 0. Returns `None` when the total area is 0 (no triangle
/// has an area), so the caller can keep the vertices instead.
pub(crate) fn sample(
    vertices: &[[f32; 3]],
    triangles: &[[u32; 3]],
    count: usize,
    rng: &mut Rng,
) -> Option<PointCloud> {
    let corners = |t: &[u32; 3]| t.map(|i| vertices[i as usize].map(f64::from));
    let mut cumulative = Vec::with_capacity(triangles.len());
    let mut total = 0.0;
    let mut last_with_area = 0;
    for (i, t) in triangles.iter().enumerate() {
        let [a, b, c] = corners(t);
        let n = cross(sub(b, a), sub(c, a));
        let area = 0.5 * (n[0] * n[0] + n[1] * n[1] + n[2] * n[2]).sqrt();
        if area.is_finite() && area > 0.0 {
            total += area;
            last_with_area = i;
        }
        cumulative.push(total);
    }
    if total <= 0.0 || !total.is_finite() {
        return None;
    }
    let mut positions = Vec::with_capacity(count);
    let mut normals = Vec::with_capacity(count);
    for _ in 0..count {
        let target = rng.uniform() * total;
        // The first triangle whose running area passes the target: zero-area ones never do.
        let i = cumulative
            .partition_point(|&c| c <= target)
            .min(last_with_area);
        let [a, b, c] = corners(&triangles[i]);
        let s = rng.uniform().sqrt();
        let r = rng.uniform();
        let (wa, wb, wc) = (1.0 - s, s * (1.0 - r), s * r);
        positions.push([0, 1, 2].map(|k| (wa * a[k] + wb * b[k] + wc * c[k]) as f32));
        let n = cross(sub(b, a), sub(c, a));
        let len = (n[0] * n[0] + n[1] * n[1] + n[2] * n[2]).sqrt();
        normals.push(n.map(|v| (v / len) as f32));
    }
    Some(PointCloud {
        positions,
        normals: Some(normals),
        colors: None,
    })
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn samples_follow_area_and_stay_on_their_triangle() {
        // Two triangles in z = 0 with areas 1.5 and 0.5 (x < 0 and x > 10): three quarters of
        // the points must land on the first (binomial, n = 40,000: sd 0.2 %, allow 1 %). Their
        // mean must be the triangle's centroid (the centroid of a uniform density on a triangle
        // is the mean of its corners; handbook fact).
        let vertices = [
            [-3.0, 0.0, 0.0],
            [-1.0, 0.0, 0.0],
            [-3.0, 1.5, 0.0],
            [11.0, 0.0, 0.0],
            [12.0, 0.0, 0.0],
            [11.0, 1.0, 0.0],
            [f32::NAN, 0.0, 0.0],
        ];
        let triangles = [[0, 1, 2], [3, 4, 5], [6, 0, 1], [0, 0, 1]];
        let n = 40_000;
        let cloud = sample(&vertices, &triangles, n, &mut Rng::new(3)).unwrap();
        assert_eq!(cloud.len(), n);
        let first: Vec<_> = cloud.positions.iter().filter(|p| p[0] < 0.0).collect();
        let share = first.len() as f64 / n as f64;
        assert!((share - 0.75).abs() < 0.01, "share {share}");
        let mean = first
            .iter()
            .fold([0.0f64; 2], |m, p| [m[0] + p[0] as f64, m[1] + p[1] as f64]);
        let mean = mean.map(|v| v / first.len() as f64);
        assert!((mean[0] - (-7.0 / 3.0)).abs() < 0.01, "{mean:?}");
        assert!((mean[1] - 0.5).abs() < 0.01, "{mean:?}");
        for p in &cloud.positions {
            assert!(p[2] == 0.0 && p[0].is_finite() && p[1] >= 0.0);
        }
        assert!(cloud.normals.unwrap().iter().all(|n| *n == [0.0, 0.0, 1.0]));
    }

    #[test]
    fn no_area_gives_none() {
        let vertices = [[0.0, 0.0, 0.0], [1.0, 1.0, 1.0]];
        assert!(sample(&vertices, &[[0, 1, 1]], 10, &mut Rng::new(1)).is_none());
    }
}
