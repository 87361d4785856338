//! Matrix products on strided views, by the `gemm` crate (pure Rust; AVX-512 or AVX2 kernels
//! chosen at run time), with an optional tally of the work and time of every product for
//! `partsift bench`.
//!
//! The crate splits a product between threads by blocks of the output only; the sum over
//! the inner dimension runs in the same order whatever the thread count, so results are the
//! same bits on one thread or two.

use std::sync::atomic::{AtomicBool, AtomicU64, Ordering};
use std::time::Instant;

use gemm::Parallelism;

/// A matrix inside a slice: element `(r, c)` is `data[r * row_stride + c * col_stride]`.
#[derive(Clone, Copy, Debug)]
pub(crate) struct MatRef<'a> {
    data: &'a [f32],
    rows: usize,
    cols: usize,
    row_stride: usize,
    col_stride: usize,
}

/// A writable matrix inside a slice, laid out as [`MatRef`].
#[derive(Debug)]
pub(crate) struct MatMut<'a> {
    data: &'a mut [f32],
    rows: usize,
    cols: usize,
    row_stride: usize,
    col_stride: usize,
}

/// Panics unless every element of a `rows x cols` matrix with these strides lies in `len`.
fn check_extent(len: usize, rows: usize, cols: usize, row_stride: usize, col_stride: usize) {
    if rows > 0 && cols > 0 {
        let last = (rows - 1) * row_stride + (cols - 1) * col_stride;
        assert!(
            last < len,
            "a {rows} x {cols} matrix (strides {row_stride}, {col_stride}) needs {} values, has {len}",
            last + 1
        );
    }
}

impl<'a> MatRef<'a> {
    /// `rows x cols`, row-major, rows `row_stride` values apart (at least `cols`).
    ///
    /// Panics if the slice is too short.
    pub fn new(data: &'a [f32], rows: usize, cols: usize, row_stride: usize) -> MatRef<'a> {
        check_extent(data.len(), rows, cols, row_stride, 1);
        MatRef {
            data,
            rows,
            cols,
            row_stride,
            col_stride: 1,
        }
    }

    /// The transpose (no copy).
    pub fn t(self) -> MatRef<'a> {
        MatRef {
            rows: self.cols,
            cols: self.rows,
            row_stride: self.col_stride,
            col_stride: self.row_stride,
            ..self
        }
    }
}

impl<'a> MatMut<'a> {
    /// As [`MatRef::new`].
    pub fn new(data: &'a mut [f32], rows: usize, cols: usize, row_stride: usize) -> MatMut<'a> {
        check_extent(data.len(), rows, cols, row_stride, 1);
        MatMut {
            data,
            rows,
            cols,
            row_stride,
            col_stride: 1,
        }
    }
}

/// Whether a product may use every thread of the current rayon pool (for products over a
/// whole batch) or only the calling one (inside a task that is already one of many).
#[derive(Clone, Copy, Debug, PartialEq, Eq)]
pub(crate) enum Threads {
    One,
    Pool,
}

/// Which products a tally line counts: the fast path's sites, and the benchmark's own.
#[derive(Clone, Copy, Debug, PartialEq, Eq)]
pub(crate) enum Site {
    /// The feature-space distance blocks of the k-NN.
    Knn,
    /// The per-point products of the EdgeConv layers and the embedding layer, forward.
    Forward,
    /// Their weight gradients.
    WeightGrad,
    /// Their input gradients.
    InputGrad,
    /// The benchmark's square products that measure the machine's peak.
    Peak,
}

const SITES: usize = 5;

/// Floating-point operations and thread-nanoseconds spent in products, per site.
struct Tally {
    on: AtomicBool,
    flops: [AtomicU64; SITES],
    thread_ns: [AtomicU64; SITES],
}

static TALLY: Tally = Tally {
    on: AtomicBool::new(false),
    flops: [const { AtomicU64::new(0) }; SITES],
    thread_ns: [const { AtomicU64::new(0) }; SITES],
};

/// Work and time of the products at one site since the tally was last reset.
#[derive(Clone, Copy, Debug, Default, PartialEq)]
pub(crate) struct SiteTally {
    /// `2 m n k` per product.
    pub flops: u64,
    /// Time inside the products times the threads each may use, in ns: a product on the
    /// whole pool counts its wall time once per thread.
    pub thread_ns: u64,
}

impl SiteTally {
    /// GFLOP/s per thread (multiply by the thread count for the machine's rate).
    pub fn gflops_per_thread(&self) -> f64 {
        if self.thread_ns == 0 {
            0.0
        } else {
            self.flops as f64 / self.thread_ns as f64
        }
    }
}

/// Starts (or stops) counting, from zero.
pub(crate) fn start_tally(on: bool) {
    for s in 0..SITES {
        TALLY.flops[s].store(0, Ordering::Relaxed);
        TALLY.thread_ns[s].store(0, Ordering::Relaxed);
    }
    TALLY.on.store(on, Ordering::Relaxed);
}

/// What was counted at `site` since [`start_tally`].
pub(crate) fn tally(site: Site) -> SiteTally {
    SiteTally {
        flops: TALLY.flops[site as usize].load(Ordering::Relaxed),
        thread_ns: TALLY.thread_ns[site as usize].load(Ordering::Relaxed),
    }
}

/// `c = a b`, or `c += a b` when `accumulate`.
///
/// Panics if the shapes disagree.
pub(crate) fn matmul(
    site: Site,
    c: MatMut<'_>,
    a: MatRef<'_>,
    b: MatRef<'_>,
    accumulate: bool,
    threads: Threads,
) {
    assert_eq!(
        (c.rows, c.cols, a.cols),
        (a.rows, b.cols, b.rows),
        "product shapes"
    );
    let (m, n, k) = (c.rows, c.cols, a.cols);
    if m == 0 || n == 0 {
        return;
    }
    if k == 0 {
        if !accumulate {
            for r in 0..m {
                for j in 0..n {
                    c.data[r * c.row_stride + j * c.col_stride] = 0.0;
                }
            }
        }
        return;
    }
    let (parallelism, thread_count) = match threads {
        Threads::One => (Parallelism::None, 1),
        Threads::Pool => {
            let t = rayon::current_num_threads();
            (Parallelism::Rayon(t), t)
        }
    };
    let counting = TALLY.on.load(Ordering::Relaxed);
    let start = counting.then(Instant::now);
    // SAFETY: the constructors checked that every element of the three views lies inside
    // its slice; `c` is borrowed mutably, so it overlaps neither `a` nor `b`. The strides fit
    // in isize because they index into slices.
    unsafe {
        gemm::gemm(
            m,
            n,
            k,
            c.data.as_mut_ptr(),
            c.col_stride as isize,
            c.row_stride as isize,
            accumulate,
            a.data.as_ptr(),
            a.col_stride as isize,
            a.row_stride as isize,
            b.data.as_ptr(),
            b.col_stride as isize,
            b.row_stride as isize,
            1.0,
            1.0,
            false,
            false,
            false,
            parallelism,
        );
    }
    if let Some(start) = start {
        let ns = start.elapsed().as_nanos() as u64 * thread_count as u64;
        let s = site as usize;
        TALLY.flops[s].fetch_add(2 * (m * n * k) as u64, Ordering::Relaxed);
        TALLY.thread_ns[s].fetch_add(ns, Ordering::Relaxed);
    }
}

#[cfg(test)]
mod tests {
    use super::*;
    use crate::rng::Rng;

    /// Reference product in f64 over plain indices.
    fn naive(a: &[f32], b: &[f32], m: usize, n: usize, k: usize) -> Vec<f32> {
        let mut c = vec![0.0; m * n];
        for r in 0..m {
            for j in 0..n {
                c[r * n + j] = (0..k)
                    .map(|t| a[r * k + t] as f64 * b[t * n + j] as f64)
                    .sum::<f64>() as f32;
            }
        }
        c
    }

    #[test]
    fn products_on_strided_and_transposed_views_match_a_naive_one() {
        let mut rng = Rng::new(1);
        for &(m, n, k) in &[(1, 1, 1), (7, 5, 3), (64, 33, 17), (130, 70, 129)] {
            let a: Vec<f32> = (0..m * k).map(|_| rng.normal() as f32).collect();
            let b: Vec<f32> = (0..k * n).map(|_| rng.normal() as f32).collect();
            let want = naive(&a, &b, m, n, k);
            // `a` inside a wider buffer (row stride k + 3), `b` given as its transpose.
            let mut wide = vec![f32::NAN; m * (k + 3)];
            for r in 0..m {
                wide[r * (k + 3)..r * (k + 3) + k].copy_from_slice(&a[r * k..(r + 1) * k]);
            }
            let mut bt = vec![0.0; n * k];
            for t in 0..k {
                for j in 0..n {
                    bt[j * k + t] = b[t * n + j];
                }
            }
            for threads in [Threads::One, Threads::Pool] {
                let mut c = vec![1.0; m * n];
                matmul(
                    Site::Forward,
                    MatMut::new(&mut c, m, n, n),
                    MatRef::new(&wide, m, k, k + 3),
                    MatRef::new(&bt, n, k, k).t(),
                    false,
                    threads,
                );
                for (g, w) in c.iter().zip(&want) {
                    assert!((g - w).abs() <= 1e-5 * (1.0 + w.abs()), "{g} vs {w}");
                }
                // Accumulating adds the product once more.
                matmul(
                    Site::Forward,
                    MatMut::new(&mut c, m, n, n),
                    MatRef::new(&a, m, k, k),
                    MatRef::new(&b, k, n, n),
                    true,
                    threads,
                );
                for (g, w) in c.iter().zip(&want) {
                    assert!(
                        (g - 2.0 * w).abs() <= 2e-5 * (1.0 + w.abs()),
                        "{g} vs 2 x {w}"
                    );
                }
            }
        }
    }

    #[test]
    #[should_panic(expected = "needs")]
    fn a_view_past_its_slice_is_refused() {
        let data = [0.0f32; 10];
        MatRef::new(&data, 3, 4, 4);
    }
}
