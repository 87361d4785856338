//! k nearest neighbours in feature space for the fast path: the same answer as
//! [`crate::graph::feature::feature_knn`] (the point itself first, then by squared distance
//! `|a|^2 - 2 a.b + |b|^2`, clamped at 0, equal distances by index; with `k >= n` the list
//! repeats), made faster in two ways. The distances of a block of rows come from one product
//! on the `gemm` crate. And each row finds its `k - 1` best others without sorting or
//! inserting into all `n`: the best candidate of each run of [`LANES`] (found in vector
//! registers) are `n / 16` distinct candidates, so the `(k - 1)`-th best of them bounds the
//! `(k - 1)`-th best of all; only the runs whose best is within the bound are looked at, and
//! they hold few more candidates than wanted (about 30 for `k` 20 and `n` 1024).
//!
//! Differences from `feature_knn`: NaN distances sort after every number (there a NaN of
//! either sign could come anywhere), and the products' rounding differs, so distances equal to
//! within about 1e-7 of the squared norms may be ordered the other way.

use crate::net::fast::gemm::{matmul, MatMut, MatRef, Site, Threads};
use crate::net::fast::simd::{load, vectorised, LANES};

/// Rows of the distance matrix per product. 64 rows of 1024 f32 distances are 256 KiB: the
/// block stays in the second-level cache while its rows are scanned.
pub(crate) const BLOCK_ROWS: usize = 64;

/// Of the `n` rows of a `n x c` matrix with row stride `stride`: the squared norm of each
/// into `norms`, and the transpose (`c x n`) into `columns`. The distance products take the
/// cloud's features as the transpose: the `gemm` crate then reads them as they lie instead of
/// gathering them with strides into its panels, once for every block of rows.
pub(crate) fn norms_and_columns(
    x: &[f32],
    n: usize,
    c: usize,
    stride: usize,
    norms: &mut [f32],
    columns: &mut [f32],
) {
    assert_eq!(norms.len(), n, "one norm per row");
    assert_eq!(columns.len(), n * c, "the transpose");
    for (i, o) in norms.iter_mut().enumerate() {
        *o = x[i * stride..i * stride + c].iter().map(|v| v * v).sum();
    }
    // Runs of rows at a time, so that each column is written in runs rather than one value.
    for first in (0..n).step_by(LANES) {
        let rows = LANES.min(n - first);
        for (t, column) in columns.chunks_exact_mut(n).enumerate() {
            for (r, v) in column[first..first + rows].iter_mut().enumerate() {
                *v = x[(first + r) * stride + t];
            }
        }
    }
}

/// Neighbours of rows `first..first + out.len() / k` of one cloud's features `x` (`n` rows
/// of `c` values, `stride` apart), with their squared `norms` and their transpose `columns`
/// (from [`norms_and_columns`]); `out` gets `k` indices a row.
/// `scratch` is grown as needed and may be reused.
///
/// Panics if the shapes disagree or `n` does not fit in `u32`.
#[allow(clippy::too_many_arguments)]
pub(crate) fn knn_rows(
    x: &[f32],
    columns: &[f32],
    n: usize,
    c: usize,
    stride: usize,
    norms: &[f32],
    k: usize,
    first: usize,
    out: &mut [u32],
    scratch: &mut KnnScratch,
) {
    assert!(k > 0 && out.len().is_multiple_of(k), "k indices a row");
    assert_eq!(norms.len(), n, "one norm per point");
    assert!(u32::try_from(n).is_ok(), "too many points for u32 indices");
    let rows = out.len() / k;
    assert!(first + rows <= n, "rows inside the cloud");
    if rows == 0 {
        return;
    }
    let KnnScratch {
        products,
        candidates,
        minima,
        found,
    } = scratch;
    products.resize(rows * n, 0.0);
    candidates.resize(n, 0);
    let all = MatRef::new(columns, c, n, n);
    let block = MatRef::new(&x[first * stride..], rows, c, stride);
    matmul(
        Site::Knn,
        MatMut::new(products, rows, n, n),
        block,
        all,
        false,
        Threads::One,
    );
    for (r, neighbours) in out.chunks_exact_mut(k).enumerate() {
        let i = first + r;
        fill_candidates(&products[r * n..(r + 1) * n], norms, i, candidates, minima);
        select_best(candidates, minima, found, k.min(n) - 1);
        for (t, slot) in neighbours.iter_mut().enumerate() {
            let r = t % (found.len() + 1);
            *slot = if r == 0 {
                i as u32
            } else {
                found[r - 1] as u32
            };
        }
    }
}

/// Reusable buffers of [`knn_rows`].
#[derive(Default)]
pub(crate) struct KnnScratch {
    /// A block of rows of the distance products.
    products: Vec<f32>,
    /// One row's candidates.
    candidates: Vec<u64>,
    /// The best candidate of each run of [`LANES`].
    minima: Vec<u64>,
    /// The best ones, at the end sorted (and first the minima, to find the bound).
    found: Vec<u64>,
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
    /// Every point's candidate for row `i` into `candidates` (`i` itself as `u64::MAX`, never
    /// chosen while there are others), and the best of each run of [`LANES`] into `minima`.
    fn fill_candidates(products: &[f32], norms: &[f32], i: usize, candidates: &mut [u64], minima: &mut Vec<u64>) {
        let n = norms.len();
        let (products, candidates) = (&products[..n], &mut candidates[..n]);
        let norm_i = norms[i];
        minima.clear();
        let runs = candidates
            .chunks_mut(LANES)
            .zip(products.chunks(LANES).zip(norms.chunks(LANES)));
        for ((run, (p, nj)), at) in runs.zip((0..n).step_by(LANES)) {
            if run.len() == LANES {
                let (p, nj): ([f32; LANES], [f32; LANES]) = (load(p, 0), load(nj, 0));
                let mut c = [0u64; LANES];
                for t in 0..LANES {
                    c[t] = candidate(key(norm_i, p[t], nj[t]), at + t);
                }
                run.copy_from_slice(&c);
            } else {
                for (t, c) in run.iter_mut().enumerate() {
                    *c = candidate(key(norm_i, p[t], nj[t]), at + t);
                }
            }
        }
        candidates[i] = u64::MAX;
        minima.extend(candidates.chunks(LANES).map(|run| run.iter().fold(u64::MAX, |m, &c| m.min(c))));
    }
}

vectorised! {
    /// The `want` best of `candidates` (all distinct) into `found`, sorted; `minima` holds the
    /// best of each run of [`LANES`].
    fn select_best(candidates: &[u64], minima: &[u64], found: &mut Vec<u64>, want: usize) {
        found.clear();
        if want == 0 {
            return;
        }
        if minima.len() >= 2 * want {
            // The want-th best of `want` or more distinct candidates bounds the want-th best
            // of all.
            found.extend_from_slice(minima);
            let bound = *found.select_nth_unstable(want - 1).1;
            found.clear();
            for (r, &least) in minima.iter().enumerate() {
                if least > bound {
                    continue;
                }
                let at = r * LANES;
                if at + LANES <= candidates.len() {
                    let run: [u64; LANES] = load(candidates, at);
                    let mut within = 0u32;
                    for (t, &c) in run.iter().enumerate() {
                        within |= ((c <= bound) as u32) << t;
                    }
                    while within != 0 {
                        found.push(run[within.trailing_zeros() as usize]);
                        within &= within - 1;
                    }
                } else {
                    found.extend(candidates[at..].iter().filter(|&&c| c <= bound));
                }
            }
        } else {
            found.extend_from_slice(candidates);
        }
        // Few more than wanted on the bound's path: sorting them all beats selecting first.
        found.sort_unstable();
        found.truncate(want);
    }
}

#[cfg(test)]
mod tests {
    use super::*;
    use crate::graph::feature::feature_knn;
    use crate::rng::Rng;

    fn knn(x: &[f32], n: usize, c: usize, k: usize) -> Vec<u32> {
        let (mut norms, mut columns) = (vec![0.0; n], vec![0.0; n * c]);
        norms_and_columns(x, n, c, c, &mut norms, &mut columns);
        let mut out = vec![0; n * k];
        let mut scratch = KnnScratch::default();
        for (b, rows) in out.chunks_mut(BLOCK_ROWS * k).enumerate() {
            knn_rows(
                x,
                &columns,
                n,
                c,
                c,
                &norms,
                k,
                b * BLOCK_ROWS,
                rows,
                &mut scratch,
            );
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
