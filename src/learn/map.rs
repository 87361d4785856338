//! A 2D map of a parts bin from the network's features of every scan: the first two
//! principal components place the dots, and a scan whose nearest neighbours in feature space
//! mostly carry another label is marked as likely mislabelled.

use crate::graph::feature::feature_knn;

/// Neighbours (besides the scan itself) asked about each scan's label.
pub const MAP_NEIGHBOURS: usize = 5;

/// Rounds of power iteration per component: plenty for the two largest of a few hundred
/// scans (each round multiplies the error by the ratio of the next eigenvalue to this one).
const POWER_ROUNDS: usize = 200;

/// One scan on the map.
#[derive(Clone, Copy, Debug, PartialEq)]
pub struct MapPoint {
    /// Coordinates along the first and second principal component (feature units).
    pub xy: [f32; 2],
    /// More than half of its [`MAP_NEIGHBOURS`] nearest scans in feature space carry another
    /// label.
    pub suspicious: bool,
}

/// Places `labels.len()` scans whose features are the rows of `features` (`width` wide,
/// row-major). Deterministic. Fewer than two scans, or features with no spread, give dots at
/// the origin.
///
/// Panics if `features.len() != labels.len() * width`.
pub fn feature_map(features: &[f32], width: usize, labels: &[usize]) -> Vec<MapPoint> {
    let n = labels.len();
    assert_eq!(features.len(), n * width, "one row of features per label");
    let xy = principal_coordinates(features, n, width);
    let suspicious = outvoted_by_neighbours(features, n, width, labels);
    xy.into_iter()
        .zip(suspicious)
        .map(|(xy, suspicious)| MapPoint { xy, suspicious })
        .collect()
}

/// The rows' coordinates on the first two principal axes (power iteration on the centred
/// data, the second axis kept orthogonal to the first). Each axis's sign is set so that its
/// largest entry is positive, so the same data always gives the same picture.
fn principal_coordinates(features: &[f32], n: usize, width: usize) -> Vec<[f32; 2]> {
    if n < 2 || width == 0 {
        return vec![[0.0; 2]; n];
    }
    let mut mean = vec![0.0f64; width];
    for row in features.chunks_exact(width) {
        for (m, &x) in mean.iter_mut().zip(row) {
            *m += f64::from(x);
        }
    }
    mean.iter_mut().for_each(|m| *m /= n as f64);
    let centred: Vec<f64> = features
        .chunks_exact(width)
        .flat_map(|row| row.iter().zip(&mean).map(|(&x, m)| f64::from(x) - m))
        .collect();
    let mut axes: Vec<Vec<f64>> = Vec::with_capacity(2);
    let mut scores = vec![0.0f64; n];
    for component in 0..2 {
        // A start that is not orthogonal to any axis in practice, and the same every run.
        let mut axis: Vec<f64> = (0..width)
            .map(|j| 1.0 + ((j * 7 + component * 3) % 11) as f64 / 11.0)
            .collect();
        for _ in 0..POWER_ROUNDS {
            for (s, row) in scores.iter_mut().zip(centred.chunks_exact(width)) {
                *s = dot(row, &axis);
            }
            axis.fill(0.0);
            for (&s, row) in scores.iter().zip(centred.chunks_exact(width)) {
                for (a, &x) in axis.iter_mut().zip(row) {
                    *a += s * x;
                }
            }
            for earlier in &axes {
                let along = dot(&axis, earlier);
                axis.iter_mut()
                    .zip(earlier)
                    .for_each(|(a, e)| *a -= along * e);
            }
            let norm = dot(&axis, &axis).sqrt();
            // No spread left (or not a number): this axis places every dot at 0.
            if norm.is_nan() || norm <= 1e-12 {
                axis.fill(0.0);
                break;
            }
            axis.iter_mut().for_each(|a| *a /= norm);
        }
        let largest = axis
            .iter()
            .copied()
            .fold(0.0f64, |m, a| if a.abs() > m.abs() { a } else { m });
        if largest < 0.0 {
            axis.iter_mut().for_each(|a| *a = -*a);
        }
        axes.push(axis);
    }
    centred
        .chunks_exact(width)
        .map(|row| [dot(row, &axes[0]) as f32, dot(row, &axes[1]) as f32])
        .collect()
}

fn dot(a: &[f64], b: &[f64]) -> f64 {
    a.iter().zip(b).map(|(x, y)| x * y).sum()
}

/// For each row: whether most of its nearest other rows carry another label.
fn outvoted_by_neighbours(features: &[f32], n: usize, width: usize, labels: &[usize]) -> Vec<bool> {
    let k = (MAP_NEIGHBOURS + 1).min(n);
    if k < 2 || width == 0 {
        return vec![false; n];
    }
    let mut neighbours = vec![0u32; n * k];
    feature_knn(features, n, width, k, &mut neighbours);
    neighbours
        .chunks_exact(k)
        .enumerate()
        .map(|(i, row)| {
            let others: Vec<usize> = row
                .iter()
                .map(|&j| j as usize)
                .filter(|&j| j != i)
                .take(k - 1)
                .collect();
            let disagree = others.iter().filter(|&&j| labels[j] != labels[i]).count();
            disagree * 2 > others.len()
        })
        .collect()
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn points_on_a_line_lie_on_the_first_axis() {
        // Rows t * (1, 2, 2) / 3 + c: all spread is along one unit direction, so the first
        // coordinate is t minus its mean (up to sign, fixed here by the positive largest
        // entry) and the second is 0. Derived by hand.
        let ts = [-2.0f32, -1.0, 0.5, 1.0, 1.5];
        let features: Vec<f32> = ts
            .iter()
            .flat_map(|&t| [t / 3.0 + 5.0, 2.0 * t / 3.0 - 1.0, 2.0 * t / 3.0])
            .collect();
        let points = feature_map(&features, 3, &[0; 5]);
        let mean = ts.iter().sum::<f32>() / 5.0;
        for (p, &t) in points.iter().zip(&ts) {
            assert!((p.xy[0] - (t - mean)).abs() < 1e-4, "{p:?} for t {t}");
            assert!(p.xy[1].abs() < 1e-4, "{p:?}");
            assert!(!p.suspicious);
        }
    }

    #[test]
    fn second_axis_is_the_next_largest_spread() {
        // Spread 3 along x, 1 along y, none along z: the axes are x then y (by hand).
        let rows = [
            [3.0f32, 0.0, 7.0],
            [-3.0, 0.0, 7.0],
            [0.0, 1.0, 7.0],
            [0.0, -1.0, 7.0],
        ];
        let features: Vec<f32> = rows.iter().flatten().copied().collect();
        let points = feature_map(&features, 3, &[0, 0, 1, 1]);
        let xy: Vec<[f32; 2]> = points.iter().map(|p| p.xy).collect();
        let expected = [[3.0, 0.0], [-3.0, 0.0], [0.0, 1.0], [0.0, -1.0]];
        for (got, want) in xy.iter().zip(&expected) {
            assert!((got[0] - want[0]).abs() < 1e-4 && (got[1].abs() - want[1].abs()).abs() < 1e-4);
        }
    }

    #[test]
    fn a_scan_among_another_types_scans_is_marked() {
        // Two tight groups of six; scan 3 sits in the first group but carries the second's label.
        let mut features = Vec::new();
        for i in 0..12 {
            let centre = if i < 6 { 0.0 } else { 10.0 };
            features.extend([centre + i as f32 * 0.01, centre]);
        }
        let mut labels = vec![0; 6];
        labels.extend([1; 6]);
        labels[3] = 1;
        let marked: Vec<usize> = feature_map(&features, 2, &labels)
            .iter()
            .enumerate()
            .filter(|(_, p)| p.suspicious)
            .map(|(i, _)| i)
            .collect();
        assert_eq!(marked, [3]);
    }

    #[test]
    fn too_few_scans_give_dots_at_the_origin() {
        assert_eq!(feature_map(&[], 4, &[]), []);
        let one = feature_map(&[1.0, 2.0], 2, &[0]);
        assert_eq!(
            one,
            [MapPoint {
                xy: [0.0; 2],
                suspicious: false
            }]
        );
    }
}
