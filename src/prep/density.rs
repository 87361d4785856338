//! Step 5a: even density. A voxel grid: the points of each occupied voxel are replaced by
//! their centroid, so dense regions (near the camera) no longer outweigh sparse ones.

/// The centroid of the points (mm) in each occupied cube of edge `voxel_mm`.
///
/// The grid follows Open3D's `voxel_down_sample` (checked against it in
/// `tests/prep_reference.rs`): it starts half a voxel below the points' minimum on each axis,
/// a point's voxel is `floor((p - start) / voxel_mm)` computed in f64, and each centroid is
/// the f64 mean of its points. The output is in lexicographic order of the voxel (x, then y,
/// then z), so it does not depend on the order of the input. Empty input gives an empty
/// output. `voxel_mm` must be positive and finite (a recipe guarantees it; anything else
/// gives one centroid per distinct point). A voxel index past `u32::MAX` (a point more than
/// four billion voxels from the minimum) is clamped into the last voxel of its axis.
pub fn voxel_centroids(points: &[[f32; 3]], voxel_mm: f32) -> Vec<[f32; 3]> {
    let Some(lo) = min_corner(points) else {
        return Vec::new();
    };
    let v = voxel_mm as f64;
    let start = lo.map(|c| c as f64 - 0.5 * v);
    let mut keyed: Vec<([u32; 3], u32)> = points
        .iter()
        .enumerate()
        .map(|(i, p)| {
            // `as u32` saturates: negative (impossible here) to 0, huge to u32::MAX.
            let key = [0, 1, 2].map(|a| ((p[a] as f64 - start[a]) / v).floor() as u32);
            (key, i as u32)
        })
        .collect();
    keyed.sort_unstable();
    let mut out = Vec::new();
    for run in keyed.chunk_by(|a, b| a.0 == b.0) {
        let mut sum = [0f64; 3];
        for &(_, i) in run {
            for a in 0..3 {
                sum[a] += points[i as usize][a] as f64;
            }
        }
        out.push(sum.map(|s| (s / run.len() as f64) as f32));
    }
    out
}

fn min_corner(points: &[[f32; 3]]) -> Option<[f32; 3]> {
    let first = *points.first()?;
    Some(
        points
            .iter()
            .fold(first, |lo, p| [0, 1, 2].map(|a| lo[a].min(p[a]))),
    )
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn centroids_per_voxel_worked_by_hand() {
        // Voxel 1 mm; minimum (0, 0, 0) so the grid starts at -0.5: voxels are centred on
        // integers. (0.1, 0, 0) and (0.3, 0.2, 0) share voxel (0, 0, 0), centroid
        // (0.2, 0.1, 0); (0.6, 0, 0) is in voxel (1, 0, 0); (0, 0, 0) joins the first.
        let points = [
            [0.6f32, 0.0, 0.0],
            [0.1, 0.0, 0.0],
            [0.3, 0.2, 0.0],
            [0.0, 0.0, 0.0],
        ];
        let got = voxel_centroids(&points, 1.0);
        assert_eq!(got.len(), 2);
        let want = [[0.4f32 / 3.0, 0.2 / 3.0, 0.0], [0.6, 0.0, 0.0]];
        for (g, w) in got.iter().zip(&want) {
            for a in 0..3 {
                assert!((g[a] - w[a]).abs() < 1e-6, "{got:?}");
            }
        }
    }

    #[test]
    fn order_of_input_does_not_matter_and_empty_is_empty() {
        let points: Vec<[f32; 3]> = (0..500)
            .map(|i| {
                [
                    (i * 7 % 31) as f32 * 0.37,
                    (i * 3 % 17) as f32 * 0.21,
                    (i % 5) as f32,
                ]
            })
            .collect();
        let mut reversed = points.clone();
        reversed.reverse();
        assert_eq!(
            voxel_centroids(&points, 0.9),
            voxel_centroids(&reversed, 0.9)
        );
        assert!(voxel_centroids(&[], 1.0).is_empty());
        assert_eq!(
            voxel_centroids(&[[1.0, 2.0, 3.0]; 5], 0.5),
            vec![[1.0, 2.0, 3.0]]
        );
    }
}
