//! The activations of a batch in one flat buffer, and the few helpers every layer shares:
//! per-sample matrix products and reductions summed in sample order (so that results do not
//! depend on how rayon splits the work).

use ndarray::linalg::general_mat_mul;
use ndarray::{ArrayView2, ArrayViewMut2};
use rayon::prelude::*;

/// `samples` blocks of `rows x cols` values, row-major, one after the other.
/// Rows are points, edges (point-major: edge `j` of point `i` is row `i * k + j`) or, in the
/// classifier head, the samples themselves (then `samples == 1`).
#[derive(Clone, Debug, PartialEq)]
pub(crate) struct Batch {
    pub data: Vec<f32>,
    pub samples: usize,
    pub rows: usize,
    pub cols: usize,
}

impl Batch {
    pub fn zeros(samples: usize, rows: usize, cols: usize) -> Batch {
        Batch::from_vec(vec![0.0; samples * rows * cols], samples, rows, cols)
    }

    /// Panics if `data.len() != samples * rows * cols`.
    pub fn from_vec(data: Vec<f32>, samples: usize, rows: usize, cols: usize) -> Batch {
        assert_eq!(data.len(), samples * rows * cols, "batch shape");
        Batch {
            data,
            samples,
            rows,
            cols,
        }
    }

    /// Values of one sample.
    pub fn sample_len(&self) -> usize {
        self.rows * self.cols
    }

    pub fn sample(&self, s: usize) -> &[f32] {
        &self.data[s * self.sample_len()..(s + 1) * self.sample_len()]
    }

    /// One chunk per sample, for `par_chunks(..)` and friends (never 0, so empty batches work).
    pub fn chunk(&self) -> usize {
        self.sample_len().max(1)
    }

    /// The same values seen as one sample whose rows are all rows of all samples: how the
    /// pooled features of a batch enter the classifier head.
    pub fn into_single_sample(self) -> Batch {
        let rows = self.samples * self.rows;
        Batch::from_vec(self.data, 1, rows, self.cols)
    }

    /// The inverse of [`Batch::into_single_sample`]: `samples` samples of one row each.
    pub fn into_samples(self, samples: usize) -> Batch {
        let cols = self.cols;
        assert_eq!(self.samples * self.rows, samples, "one row per sample");
        Batch::from_vec(self.data, samples, 1, cols)
    }
}

/// Joins batches with the same samples and rows side by side (along columns).
pub(crate) fn concat_cols(parts: &[&Batch]) -> Batch {
    let (samples, rows) = (parts[0].samples, parts[0].rows);
    assert!(parts.iter().all(|p| p.samples == samples && p.rows == rows));
    let cols = parts.iter().map(|p| p.cols).sum();
    let mut out = Vec::with_capacity(samples * rows * cols);
    for r in 0..samples * rows {
        for p in parts {
            out.extend_from_slice(&p.data[r * p.cols..(r + 1) * p.cols]);
        }
    }
    Batch::from_vec(out, samples, rows, cols)
}

/// The inverse of [`concat_cols`]: the column blocks of the given widths.
pub(crate) fn split_cols(joined: &Batch, widths: &[usize]) -> Vec<Batch> {
    assert_eq!(widths.iter().sum::<usize>(), joined.cols);
    let all_rows = joined.samples * joined.rows;
    let mut start = 0;
    widths
        .iter()
        .map(|&w| {
            let mut data = Vec::with_capacity(all_rows * w);
            for row in joined.data.chunks_exact(joined.cols.max(1)).take(all_rows) {
                data.extend_from_slice(&row[start..start + w]);
            }
            start += w;
            Batch::from_vec(data, joined.samples, joined.rows, w)
        })
        .collect()
}

/// Element-wise `into += other`.
pub(crate) fn add_into(into: &mut [f32], other: &[f32]) {
    assert_eq!(into.len(), other.len());
    for (a, b) in into.iter_mut().zip(other) {
        *a += b;
    }
}

/// A `rows x cols` matrix view of a flat slice. Panics if the length is not `rows * cols`.
pub(crate) fn matrix(data: &[f32], rows: usize, cols: usize) -> ArrayView2<'_, f32> {
    ArrayView2::from_shape((rows, cols), data).expect("matrix shape")
}

pub(crate) fn matrix_mut(data: &mut [f32], rows: usize, cols: usize) -> ArrayViewMut2<'_, f32> {
    ArrayViewMut2::from_shape((rows, cols), data).expect("matrix shape")
}

/// `c = alpha * a b + beta * c`, all as matrix views (ndarray's matrix product).
pub(crate) fn gemm(
    alpha: f32,
    a: &ArrayView2<'_, f32>,
    b: &ArrayView2<'_, f32>,
    beta: f32,
    c: &mut ArrayViewMut2<'_, f32>,
) {
    general_mat_mul(alpha, a, b, beta, c);
}

/// Runs `partial(s, out)` for every sample `s` in parallel, each filling its own zeroed
/// buffer of `len` values, and returns their sum taken in sample order: a reduction over
/// the batch whose result does not depend on the thread count or on scheduling.
pub(crate) fn sum_over_samples<T, F>(samples: usize, len: usize, partial: F) -> Vec<T>
where
    T: Copy + Default + Send + Sync + std::ops::AddAssign,
    F: Fn(usize, &mut [T]) + Sync,
{
    let mut partials = vec![T::default(); samples * len];
    partials
        .par_chunks_mut(len.max(1))
        .take(samples)
        .enumerate()
        .for_each(|(s, out)| partial(s, out));
    let mut total = vec![T::default(); len];
    for part in partials.chunks_exact(len.max(1)).take(samples) {
        for (t, &p) in total.iter_mut().zip(part) {
            *t += p;
        }
    }
    total
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn concat_then_split_gives_the_parts_back() {
        let a = Batch::from_vec((0..12).map(|v| v as f32).collect(), 2, 3, 2);
        let b = Batch::from_vec((0..6).map(|v| -(v as f32)).collect(), 2, 3, 1);
        let joined = concat_cols(&[&a, &b]);
        assert_eq!(joined.cols, 3);
        assert_eq!(&joined.data[..6], &[0.0, 1.0, -0.0, 2.0, 3.0, -1.0]);
        let parts = split_cols(&joined, &[2, 1]);
        assert_eq!(parts[0], a);
        assert_eq!(parts[1], b);
    }

    #[test]
    fn sums_over_samples_in_order() {
        let total: Vec<f64> = sum_over_samples(5, 2, |s, out| {
            out[0] = s as f64;
            out[1] = 1.0;
        });
        assert_eq!(total, vec![10.0, 5.0]);
    }
}
