//! k nearest neighbours in feature space for the fast path: the same answer as
//! [`crate::graph::feature::feature_knn`] (the point itself first, then by squared distance
//! `|a|^2 - 2 a.b + |b|^2`, clamped at 0, equal distances by index; with `k >= n` the list
//! repeats), made faster in two ways. The distances of a block of rows come from one product
//! on the `gemm` crate, and each row keeps its `k` best by a threshold scan instead of a
//! partial sort: a candidate is looked at only when it beats the current `k`-th best, which
//! after the first few dozen candidates is rare (about `k ln(n / k)` insertions a row), and the
//! comparison with the threshold runs over [`LANES`] candidates at a time.
//!
//! Differences from `feature_knn`: NaN distances sort after every number (there a NaN of
//! either sign could come anywhere), and the products' rounding differs, so distances equal to
//! within about 1e-7 of the squared norms may be ordered the other way.

use crate::net::fast::gemm::{matmul, MatMut, MatRef, Site, Threads};
use crate::net::fast::simd::{load, vectorised, LANES};

/// Rows of the distance matrix per product. 64 rows of 1024 f32 distances are 256 KiB: the
/// block stays in the second-level cache while its rows are scanned.
pub(crate) const BLOCK_ROWS: usize = 64;

/// Squared norm of each of the `n` rows of a `n x c` matrix with row stride `stride`.
pub(crate) fn squared_norms(x: &[f32], n: usize, c: usize, stride: usize, out: &mut [f32]) {
    assert_eq!(out.len(), n, "one norm per row");
    for (i, o) in out.iter_mut().enumerate() {
        *o = x[i * stride..i * stride + c].iter().map(|v| v * v).sum();
    }
}

/// Neighbours of rows `first..first + out.len() / k` of one cloud's features `x` (`n` rows
/// of `c` values, `stride` apart), with their squared `norms`; `out` gets `k` indices a row.
/// `products` is scratch (grown to `rows * n`).
///
/// Panics if the shapes disagree or `n` does not fit in `u32`.
#[allow(clippy::too_many_arguments)]
pub(crate) fn knn_rows(
    x: &[f32],
    n: usize,
    c: usize,
    stride: usize,
    norms: &[f32],
    k: usize,
    first: usize,
    out: &mut [u32],
    products: &mut Vec<f32>,
) {
    assert!(k > 0 && out.len().is_multiple_of(k), "k indices a row");
    assert_eq!(norms.len(), n, "one norm per point");
    assert!(u32::try_from(n).is_ok(), "too many points for u32 indices");
    let rows = out.len() / k;
    assert!(first + rows <= n, "rows inside the cloud");
    if rows == 0 {
        return;
    }
    products.resize(rows * n, 0.0);
    let all = MatRef::new(x, n, c, stride);
    let block = MatRef::new(&x[first * stride..], rows, c, stride);
    matmul(
        Site::Knn,
        MatMut::new(products, rows, n, n),
        block,
        all.t(),
        false,
        Threads::One,
    );
    let mut best: Vec<u64> = Vec::with_capacity(k);
    for (r, neighbours) in out.chunks_exact_mut(k).enumerate() {
        select_row(
            &products[r * n..(r + 1) * n],
            norms,
            first + r,
            &mut best,
            neighbours,
        );
    }
}

/// A candidate as one integer: the distance's bits above (non-negative floats and NaN order
/// as their bit patterns read as unsigned), the index below; comparing two candidates
/// compares distances, then indices.
#[inline(always)]
fn candidate(key: u32, index: usize) -> u64 {
    ((key as u64) << 32) | index as u64
}

/// The distance key of candidate `j` for row `i`: the bits of the squared distance, clamped
/// at 0 (rounding can make it slightly negative, or -0.0).
#[inline(always)]
fn key(norm_i: f32, product: f32, norm_j: f32) -> u32 {
    let d = norm_i - 2.0 * product + norm_j;
    // NaN fails `d > 0` and `d <= 0` alike and keeps its bits: it sorts after every number.
    if d <= 0.0 {
        0
    } else {
        d.to_bits()
    }
}

vectorised! {
    /// Fills `neighbours` (`k` entries) for row `i`: itself, then the others nearest first.
    fn select_row(products: &[f32], norms: &[f32], i: usize, best: &mut Vec<u64>, neighbours: &mut [u32]) {
        let n = norms.len();
        let products = &products[..n];
        let k = neighbours.len();
        let kept = k.min(n);
        // The `kept - 1` best others, sorted, as candidates.
        let want = kept - 1;
        best.clear();
        let norm_i = norms[i];
        let mut j = 0;
        while best.len() < want {
            if j != i {
                best.push(candidate(key(norm_i, products[j], norms[j]), j));
            }
            j += 1;
        }
        best.sort_unstable();
        if want > 0 {
            let mut threshold = (best[want - 1] >> 32) as u32;
            // Every candidate from here on has a larger index than those kept, so it enters
            // exactly when its distance key is below the threshold's. The keys of a block
            // are compared with the threshold at once, into a bit mask of the ones that enter.
            let blocks = products[j..].chunks_exact(LANES).zip(norms[j..].chunks_exact(LANES));
            for (p, nj) in blocks {
                let (p, nj): ([f32; LANES], [f32; LANES]) = (load(p, 0), load(nj, 0));
                let mut keys = [0u32; LANES];
                let mut below = 0u32;
                for t in 0..LANES {
                    keys[t] = key(norm_i, p[t], nj[t]);
                    below |= ((keys[t] < threshold) as u32) << t;
                }
                while below != 0 {
                    let t = below.trailing_zeros() as usize;
                    below &= below - 1;
                    if keys[t] < threshold && j + t != i {
                        insert(best, candidate(keys[t], j + t));
                        threshold = (best[want - 1] >> 32) as u32;
                    }
                }
                j += LANES;
            }
            for j in j..n {
                let key = key(norm_i, products[j], norms[j]);
                if key < threshold && j != i {
                    insert(best, candidate(key, j));
                    threshold = (best[want - 1] >> 32) as u32;
                }
            }
        }
        for (t, slot) in neighbours.iter_mut().enumerate() {
            let r = t % kept;
            *slot = if r == 0 { i as u32 } else { best[r - 1] as u32 };
        }
    }
}

/// Puts `c` into the sorted `best`, dropping the last (worst) entry.
#[inline(always)]
fn insert(best: &mut [u64], c: u64) {
    let mut p = best.len() - 1;
    while p > 0 && best[p - 1] > c {
        best[p] = best[p - 1];
        p -= 1;
    }
    best[p] = c;
}

#[cfg(test)]
mod tests {
    use super::*;
    use crate::graph::feature::feature_knn;
    use crate::rng::Rng;

    fn knn(x: &[f32], n: usize, c: usize, k: usize) -> Vec<u32> {
        let mut norms = vec![0.0; n];
        squared_norms(x, n, c, c, &mut norms);
        let mut out = vec![0; n * k];
        let mut products = Vec::new();
        for (b, rows) in out.chunks_mut(BLOCK_ROWS * k).enumerate() {
            knn_rows(x, n, c, c, &norms, k, b * BLOCK_ROWS, rows, &mut products);
        }
        out
    }

    fn squared(x: &[f32], c: usize, i: usize, j: u32) -> f64 {
        let j = j as usize;
        (0..c)
            .map(|t| (x[i * c + t] as f64 - x[j * c + t] as f64).powi(2))
            .sum()
    }

    #[test]
    fn agrees_with_the_graph_module_on_random_features() {
        let mut rng = Rng::new(3);
        for &(n, c, k) in &[(300, 3, 20), (1024, 64, 20), (130, 17, 16), (40, 5, 1)] {
            let x: Vec<f32> = (0..n * c).map(|_| rng.normal() as f32).collect();
            let got = knn(&x, n, c, k);
            let mut want = vec![0; n * k];
            feature_knn(&x, n, c, k, &mut want);
            for i in 0..n {
                assert_eq!(got[i * k], i as u32, "itself first");
                for t in 0..k {
                    // The products round differently: equal lists, or equal distances.
                    let (dg, dw) = (
                        squared(&x, c, i, got[i * k + t]),
                        squared(&x, c, i, want[i * k + t]),
                    );
                    assert!(
                        (dg - dw).abs() <= 1e-5 * (1.0 + dw),
                        "n {n} row {i} rank {t}"
                    );
                }
            }
            let same = got.iter().zip(&want).filter(|(a, b)| a == b).count();
            assert!(
                same * 1000 >= 999 * got.len(),
                "n {n}: {same} of {}",
                got.len()
            );
        }
    }

    #[test]
    fn exact_ties_duplicates_and_k_at_least_n_as_the_graph_module() {
        // Small integers: exact distances, many ties, which must go by index.
        let mut rng = Rng::new(5);
        let (n, c) = (150, 4);
        let x: Vec<f32> = (0..n * c).map(|_| rng.below(5) as f32 - 2.0).collect();
        for k in [1, 12, n, n + 7] {
            let mut want = vec![0; n * k];
            feature_knn(&x, n, c, k, &mut want);
            assert_eq!(knn(&x, n, c, k), want, "k {k}");
        }
        let same = vec![2.5f32; 10 * 3];
        let mut want = vec![0; 40];
        feature_knn(&same, 10, 3, 4, &mut want);
        assert_eq!(knn(&same, 10, 3, 4), want);
    }

    #[test]
    fn nan_features_do_not_panic_and_sort_last() {
        let x = [0.0f32, 1.0, f32::NAN, 3.0];
        let got = knn(&x, 4, 1, 3);
        assert_eq!(&got[..3], &[0, 1, 3]);
        assert_eq!(got[6], 2, "the NaN point still comes first in its own list");
    }
}
