//! Step 3: stray points, by statistical outlier removal (Rusu et al., "Towards 3D Point
//! Cloud Based Object Maps for Household Environments", 2008; as in PCL's
//! StatisticalOutlierRemoval): a point whose mean distance to its k nearest neighbours is
//! more than `ratio` standard deviations above the cloud's mean of that distance is a stray.

use rayon::prelude::*;

use crate::graph::spatial::SpatialIndex;

/// What the stray filter found.
#[derive(Clone, Debug, PartialEq)]
pub(crate) struct Strays {
    /// One per point: `true` for a stray.
    pub is_stray: Vec<bool>,
    /// Mean distance limit (mm) above which a point was a stray.
    pub limit_mm: f32,
    /// Median distance (mm) from a point to its nearest other point: the cloud's spacing.
    pub spacing_mm: f32,
}

/// Marks the strays of `points` (mm), with `index` built over the same points. The point
/// itself is not counted among its `k` neighbours (PCL's convention). Exact duplicates count
/// as neighbours at distance 0. Clouds with at most `k` points have no strays: there is no
/// neighbourhood to compare with. In parallel over points (each query independent, results
/// collected in order): the one clean-up step where rayon is used. The others stay
/// sequential: clustering is a flood fill, farthest point sampling needs the previous pick
/// before the next pass (a parallel pass per pick over a few thousand points costs more in
/// hand-offs than it saves), and the voxel sort and table passes take a few ms.
pub(crate) fn find_strays(
    index: &SpatialIndex,
    points: &[[f32; 3]],
    k: usize,
    ratio: f32,
) -> Strays {
    // (mean distance to the k nearest others, distance to the nearest other)
    let per_point: Vec<(f32, f32)> = points
        .par_iter()
        .enumerate()
        .map(|(i, &p)| {
            let near = index.knn(p, k + 1);
            let mut others = near.iter().filter(|n| n.index as usize != i).take(k);
            let nearest = others.next().map_or(0.0, |n| n.dist_sq.sqrt());
            let rest: f32 = others.map(|n| n.dist_sq.sqrt()).sum();
            let count = near.len().saturating_sub(1).clamp(1, k);
            ((nearest + rest) / count as f32, nearest)
        })
        .collect();
    let mut nearest: Vec<f32> = per_point.iter().map(|&(_, d)| d).collect();
    let spacing_mm = median(&mut nearest);
    if points.len() <= k {
        return Strays {
            is_stray: vec![false; points.len()],
            limit_mm: f32::INFINITY,
            spacing_mm,
        };
    }
    let n = per_point.len() as f64;
    let mean = per_point.iter().map(|&(m, _)| m as f64).sum::<f64>() / n;
    let var = per_point
        .iter()
        .map(|&(m, _)| (m as f64 - mean).powi(2))
        .sum::<f64>()
        / n;
    let limit_mm = (mean + ratio as f64 * var.sqrt()) as f32;
    Strays {
        is_stray: per_point.iter().map(|&(m, _)| m > limit_mm).collect(),
        limit_mm,
        spacing_mm,
    }
}

/// Median of the values (reorders them); 0 for none.
pub(crate) fn median(values: &mut [f32]) -> f32 {
    if values.is_empty() {
        return 0.0;
    }
    let mid = values.len() / 2;
    *values.select_nth_unstable_by(mid, f32::total_cmp).1
}

#[cfg(test)]
mod tests {
    use super::*;
    use crate::rng::Rng;

    #[test]
    fn far_points_are_strays_and_a_grid_is_not() {
        // A 1 mm grid of 40 x 40 points with 5 points far off: those 5 and no others.
        let mut points: Vec<[f32; 3]> = (0..1600)
            .map(|i| [(i % 40) as f32, (i / 40) as f32, 0.0])
            .collect();
        let mut rng = Rng::new(2);
        for _ in 0..5 {
            points.push([0, 0, 0].map(|_| rng.range(200.0, 300.0) as f32));
        }
        let index = SpatialIndex::new(&points);
        let s = find_strays(&index, &points, 8, 3.0);
        assert_eq!(s.spacing_mm, 1.0);
        let strays: Vec<usize> = (0..points.len()).filter(|&i| s.is_stray[i]).collect();
        assert_eq!(strays, (1600..1605).collect::<Vec<_>>());
    }

    #[test]
    fn mean_and_limit_follow_the_definition() {
        // Four points on a line at 0, 1, 2, 10 with k = 1: nearest-other distances
        // 1, 1, 1, 8; mean 2.75, population std sqrt(((1.75^2) * 3 + 5.25^2) / 4) = 3.031...
        // so with ratio 1 the limit is 5.781 and only the point at 10 is a stray (by hand).
        let points = [
            [0.0f32, 0.0, 0.0],
            [1.0, 0.0, 0.0],
            [2.0, 0.0, 0.0],
            [10.0, 0.0, 0.0],
        ];
        let index = SpatialIndex::new(&points);
        let s = find_strays(&index, &points, 1, 1.0);
        assert!((s.limit_mm - 5.7811).abs() < 1e-3, "{}", s.limit_mm);
        assert_eq!(s.is_stray, vec![false, false, false, true]);
    }

    #[test]
    fn tiny_clouds_and_duplicates_have_no_strays() {
        let points = [[0.0f32; 3], [5.0, 0.0, 0.0], [50.0, 0.0, 0.0]];
        let index = SpatialIndex::new(&points);
        assert_eq!(
            find_strays(&index, &points, 8, 1.0).is_stray,
            vec![false; 3]
        );
        let same = vec![[1.0f32; 3]; 30];
        let index = SpatialIndex::new(&same);
        let s = find_strays(&index, &same, 4, 2.0);
        assert_eq!(s.spacing_mm, 0.0);
        assert!(s.is_stray.iter().all(|&x| !x));
    }
}
