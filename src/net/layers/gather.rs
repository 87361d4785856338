//! Gathers neighbour features: row `i * k + j` of the output is the input row of the `j`-th
//! neighbour of point `i`.

use rayon::prelude::*;

use crate::net::batch::Batch;

#[derive(Clone, Copy, Debug)]
pub(crate) struct Gather {
    pub k: usize,
}

impl Gather {
    /// `indices` holds `x.rows * k` row indices per sample (into that sample), samples one
    /// after the other. The indices are the cache.
    ///
    /// Panics if an index is out of range.
    pub fn forward(&self, x: &Batch, indices: &[u32]) -> Batch {
        let (c, k) = (x.cols, self.k);
        let per_sample = x.rows * k;
        assert_eq!(indices.len(), x.samples * per_sample, "neighbour indices");
        let mut y = Batch::zeros(x.samples, per_sample, c);
        let chunk = y.chunk();
        y.data
            .par_chunks_mut(chunk)
            .zip(x.data.par_chunks(x.chunk()))
            .zip(indices.par_chunks(per_sample.max(1)))
            .for_each(|((ys, xs), idx)| {
                for (row, &j) in ys.chunks_exact_mut(c).zip(idx) {
                    let j = j as usize;
                    row.copy_from_slice(&xs[j * c..(j + 1) * c]);
                }
            });
        y
    }

    /// Adds each output row's gradient into the input row it came from (within each sample
    /// in row order, so the sums are deterministic). `rows` is the input's rows per sample.
    pub fn backward(&self, indices: &[u32], dy: &Batch, rows: usize) -> Batch {
        let c = dy.cols;
        let per_sample = rows * self.k;
        assert_eq!(dy.rows, per_sample, "gather gradient rows");
        let mut dx = Batch::zeros(dy.samples, rows, c);
        let chunk = dx.chunk();
        dx.data
            .par_chunks_mut(chunk)
            .zip(dy.data.par_chunks(dy.chunk()))
            .zip(indices.par_chunks(per_sample.max(1)))
            .for_each(|((dxs, dys), idx)| {
                for (row, &j) in dys.chunks_exact(c).zip(idx) {
                    let j = j as usize;
                    for (o, v) in dxs[j * c..(j + 1) * c].iter_mut().zip(row) {
                        *o += v;
                    }
                }
            });
        dx
    }
}

#[cfg(test)]
mod tests {
    use super::*;
    use crate::net::gradcheck::{check_layer, random_batch, LAYER};
    use crate::rng::Rng;

    #[test]
    fn gathers_rows_by_hand() {
        let x = Batch::from_vec(vec![1.0, 2.0, 3.0], 1, 3, 1);
        let y = Gather { k: 2 }.forward(&x, &[2, 2, 0, 1, 1, 1]);
        assert_eq!(y.data, vec![3.0, 3.0, 1.0, 2.0, 2.0, 2.0]);
    }

    #[test]
    fn gradients_match_finite_differences() {
        let mut rng = Rng::new(2);
        let (samples, rows, k) = (2, 6, 3);
        let gather = Gather { k };
        // Repeated indices included: their gradients must add up.
        let indices: Vec<u32> = (0..samples * rows * k)
            .map(|_| rng.below(rows) as u32)
            .collect();
        let x = random_batch(&mut rng, samples, rows, 4, 1.0);
        check_layer(&mut [], &x, LAYER, &mut rng, |_, x, dy| {
            let y = gather.forward(x, &indices);
            (
                y,
                dy.map(|dy| (gather.backward(&indices, dy, rows), Vec::new())),
            )
        });
    }
}
