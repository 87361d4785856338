//! k nearest neighbours in feature space: blocked distance matrix and partial selection.
//!
//! The squared distances of a block of rows to every point come from one matrix product,
//! `|a|^2 - 2 a.b + |b|^2`, and each row keeps its `k` smallest by partial selection
//! (`select_nth_unstable_by`), so the cost is one product of `n x c` by `c x n` plus `O(n)`
//! per row, never a full sort.

use std::cmp::Ordering;

use ndarray::linalg::general_mat_mul;
use ndarray::{ArrayView2, ArrayViewMut2};
use rayon::prelude::*;

/// Rows of the distance matrix made per matrix product. 64 rows of 1024 f32 distances are
/// 256 KiB: the block stays in the second-level cache while its rows are selected from,
/// and the product is still tall enough to run near the matrix-product peak.
const BLOCK_ROWS: usize = 64;

/// The `k` nearest neighbours of every point of one cloud in feature space.
///
/// `features` holds `n` points of `c` values each, row-major (`n x c`, any unit). For point
/// `i`, `out[i * k..(i + 1) * k]` receives the indices of the `k` points nearest to it by
/// squared Euclidean distance, nearest first. The point itself always comes first, even when
/// duplicates of it exist; the others follow by distance, equal distances by index
/// (so of `m > k` duplicates, a point keeps itself and the lowest-indexed others).
/// Distances come from
/// `|a|^2 - 2 a.b + |b|^2` in f32, so two points whose distances differ by less than its
/// rounding (about 1e-7 of the squared norms) may come in either order.
///
/// When `k >= n` each point gets all `n` points, nearest first, and the list then repeats
/// from its start until it holds `k` entries (entry `t` is the `t % n`-th nearest).
/// Non-finite features do not panic: a NaN distance sorts after every number.
///
/// Runs in parallel over blocks of rows on the global rayon pool.
///
/// Panics if `features.len() != n * c`, `out.len() != n * k` or `n` does not fit in `u32`.
///
/// ```
/// use partsift::graph::feature::feature_knn;
/// // three points on a line at 0, 1 and 3
/// let points = [0.0f32, 1.0, 3.0];
/// let mut out = [0u32; 6];
/// feature_knn(&points, 3, 1, 2, &mut out);
/// assert_eq!(out, [0, 1, 1, 0, 2, 1]);
/// ```
pub fn feature_knn(features: &[f32], n: usize, c: usize, k: usize, out: &mut [u32]) {
    let norms = checked_norms(features, n, c, k, out);
    if n == 0 || k == 0 {
        return;
    }
    out.par_chunks_mut(BLOCK_ROWS * k)
        .enumerate()
        .for_each_init(KnnScratch::default, |scratch, (block, rows)| {
            knn_block(features, &norms, c, k, block * BLOCK_ROWS, rows, scratch);
        });
}

/// [`feature_knn`] on the calling thread only, with scratch buffers the caller keeps across
/// calls: for callers that are already parallel at a coarser level (samples of a batch).
pub(crate) fn feature_knn_serial(
    features: &[f32],
    n: usize,
    c: usize,
    k: usize,
    out: &mut [u32],
    scratch: &mut KnnScratch,
) {
    let norms = checked_norms(features, n, c, k, out);
    if n == 0 || k == 0 {
        return;
    }
    for (block, rows) in out.chunks_mut(BLOCK_ROWS * k).enumerate() {
        knn_block(features, &norms, c, k, block * BLOCK_ROWS, rows, scratch);
    }
}

/// Buffers one block needs: the block's inner products and one row of candidates.
#[derive(Default)]
pub(crate) struct KnnScratch {
    products: Vec<f32>,
    candidates: Vec<(f32, u32)>,
}

/// Checks the shapes and returns the squared norm of every point.
fn checked_norms(features: &[f32], n: usize, c: usize, k: usize, out: &[u32]) -> Vec<f32> {
    assert_eq!(features.len(), n * c, "features must be n x c");
    assert_eq!(out.len(), n * k, "out must be n x k");
    assert!(u32::try_from(n).is_ok(), "too many points for u32 indices");
    if c == 0 {
        return vec![0.0; n];
    }
    features
        .chunks_exact(c)
        .map(|p| p.iter().map(|v| v * v).sum())
        .collect()
}

/// Orders candidates by distance, then by index (a total order, NaN last).
fn by_distance_then_index(a: &(f32, u32), b: &(f32, u32)) -> Ordering {
    a.0.total_cmp(&b.0).then(a.1.cmp(&b.1))
}

/// Neighbours of the rows `first..first + out.len() / k`.
fn knn_block(
    features: &[f32],
    norms: &[f32],
    c: usize,
    k: usize,
    first: usize,
    out: &mut [u32],
    scratch: &mut KnnScratch,
) {
    let n = norms.len();
    let rows = out.len() / k;
    scratch.products.resize(rows * n, 0.0);
    if c > 0 {
        let all = ArrayView2::from_shape((n, c), features).expect("n x c checked");
        let block = all.slice(ndarray::s![first..first + rows, ..]);
        let mut products =
            ArrayViewMut2::from_shape((rows, n), &mut scratch.products[..]).expect("rows x n");
        general_mat_mul(1.0, &block, &all.t(), 0.0, &mut products);
    } else {
        scratch.products.fill(0.0);
    }
    let kept = k.min(n);
    for (r, neighbours) in out.chunks_exact_mut(k).enumerate() {
        let i = first + r;
        let products = &scratch.products[r * n..(r + 1) * n];
        scratch.candidates.clear();
        scratch.candidates.extend(
            products
                .iter()
                .zip(norms)
                .enumerate()
                .map(|(j, (&ab, &bb))| {
                    let d = norms[i] - 2.0 * ab + bb;
                    // Rounding can make a distance slightly negative (or -0.0, which total_cmp
                    // would order before 0.0): clamp to 0 so such ties go by index.
                    (if d <= 0.0 { 0.0 } else { d }, j as u32)
                }),
        );
        // The point itself ranks before everything, duplicates of it included.
        scratch.candidates[i].0 = f32::NEG_INFINITY;
        let candidates = &mut scratch.candidates[..];
        if kept < n {
            candidates.select_nth_unstable_by(kept - 1, by_distance_then_index);
        }
        candidates[..kept].sort_unstable_by(by_distance_then_index);
        for (t, slot) in neighbours.iter_mut().enumerate() {
            *slot = candidates[t % kept].1;
        }
    }
}

#[cfg(test)]
mod tests {
    use super::*;
    use crate::rng::Rng;

    /// Brute force: exact squared distances in f64, the point itself first, the rest fully
    /// sorted by (distance, index).
    fn brute_force(features: &[f32], n: usize, c: usize, k: usize) -> Vec<u32> {
        let mut out = Vec::with_capacity(n * k);
        for i in 0..n {
            let mut all: Vec<(f64, u32)> = (0..n)
                .map(|j| {
                    let d = (0..c)
                        .map(|t| {
                            let diff = features[i * c + t] as f64 - features[j * c + t] as f64;
                            diff * diff
                        })
                        .sum();
                    (if i == j { f64::NEG_INFINITY } else { d }, j as u32)
                })
                .collect();
            all.sort_by(|a, b| a.0.total_cmp(&b.0).then(a.1.cmp(&b.1)));
            out.extend((0..k).map(|t| all[t % n].1));
        }
        out
    }

    fn squared(features: &[f32], c: usize, i: usize, j: u32) -> f64 {
        let j = j as usize;
        (0..c)
            .map(|t| (features[i * c + t] as f64 - features[j * c + t] as f64).powi(2))
            .sum()
    }

    fn knn(features: &[f32], n: usize, c: usize, k: usize) -> Vec<u32> {
        let mut out = vec![0; n * k];
        feature_knn(features, n, c, k, &mut out);
        let mut serial = vec![0; n * k];
        feature_knn_serial(features, n, c, k, &mut serial, &mut KnnScratch::default());
        assert_eq!(out, serial, "parallel and serial drivers disagree");
        out
    }

    #[test]
    fn random_features_match_brute_force_distances() {
        let mut rng = Rng::new(11);
        // 300 points: more than four blocks, the last one partial.
        for &(n, c, k) in &[(300, 3, 20), (300, 16, 7), (130, 64, 16), (5, 2, 1)] {
            let features: Vec<f32> = (0..n * c).map(|_| rng.normal() as f32 * 3.0).collect();
            let got = knn(&features, n, c, k);
            let want = brute_force(&features, n, c, k);
            for i in 0..n {
                assert_eq!(got[i * k], i as u32, "the point itself comes first");
                for t in 0..k {
                    let (dg, dw) = (
                        squared(&features, c, i, got[i * k + t]),
                        squared(&features, c, i, want[i * k + t]),
                    );
                    // f32 rounding of |a|^2 - 2ab + |b|^2: a few ulp of the squared norms.
                    let norm: f64 = features[i * c..(i + 1) * c]
                        .iter()
                        .map(|&v| (v as f64).powi(2))
                        .sum();
                    let scale = 1e-5 * (1.0 + norm + dw);
                    assert!(
                        (dg - dw).abs() <= scale,
                        "n {n} c {c} point {i} rank {t}: {dg} vs {dw}"
                    );
                }
            }
        }
    }

    #[test]
    fn exact_ties_on_integer_grid_are_ordered_by_index() {
        // Small integers: every product and sum is exact in f32, so the distances are
        // exact and many tie; the order must be exactly the brute force's.
        let mut rng = Rng::new(5);
        let (n, c, k) = (150, 4, 12);
        let features: Vec<f32> = (0..n * c).map(|_| rng.below(5) as f32 - 2.0).collect();
        assert_eq!(knn(&features, n, c, k), brute_force(&features, n, c, k));
    }

    #[test]
    fn duplicate_points_and_k_at_least_n() {
        // All points identical: every distance is 0, so after itself the others go by index.
        let same = vec![2.5f32; 10 * 3];
        let got = knn(&same, 10, 3, 4);
        assert_eq!(&got[..4], &[0, 1, 2, 3]);
        assert_eq!(&got[5 * 4..6 * 4], &[5, 0, 1, 2]);
        assert_eq!(got, brute_force(&same, 10, 3, 4));
        // Clusters of duplicates with k >= n: every point, nearest first, then repeated.
        let mut rng = Rng::new(9);
        let (n, c) = (7, 2);
        let features: Vec<f32> = (0..n)
            .flat_map(|_| {
                let v = rng.below(3) as f32;
                [v, -v]
            })
            .collect();
        for k in [n, n + 3, 3 * n] {
            let got = knn(&features, n, c, k);
            assert_eq!(got, brute_force(&features, n, c, k), "k {k}");
            for (i, row) in got.chunks_exact(k).enumerate() {
                assert_eq!(row[0], i as u32);
                assert!((0..k).all(|t| row[t] == row[t % n]), "k {k}: repeats");
            }
        }
    }

    #[test]
    fn empty_inputs_and_zero_width_do_not_panic() {
        let mut out = [];
        feature_knn(&[], 0, 3, 4, &mut out);
        let mut out = [0u32; 3];
        feature_knn(&[], 3, 0, 1, &mut out);
        assert_eq!(out, [0, 1, 2], "all at distance 0: each point itself");
        let mut out = [0u32; 4];
        feature_knn(&[f32::NAN, 1.0], 2, 1, 2, &mut out);
        assert_eq!(out[2..], [1, 0]);
    }
}
