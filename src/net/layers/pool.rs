//! Max and mean over consecutive groups of rows within each sample: over the `k` edges of
//! every point (`group = k`, EdgeConv) or over all points of a cloud (`group = N`, the global
//! pooling that makes the network blind to the order of the points).

use rayon::prelude::*;

use crate::net::batch::Batch;

/// Output row `g` of a sample is the per-channel maximum of input rows
/// `g * group..(g + 1) * group`.
#[derive(Clone, Copy, Debug)]
pub(crate) struct MaxPool {
    pub group: usize,
}

/// Which row of its group won, per output value.
pub(crate) struct MaxPoolCache {
    pub(crate) winners: Vec<u32>,
}

impl MaxPool {
    /// The first of equal maxima wins; NaN never wins over a number that came before it.
    pub fn forward(&self, x: &Batch) -> (Batch, MaxPoolCache) {
        let (c, group) = (x.cols, self.group);
        assert!(
            group > 0 && x.rows.is_multiple_of(group),
            "rows must be whole groups"
        );
        let groups = x.rows / group;
        let mut y = Batch::zeros(x.samples, groups, c);
        let mut winners = vec![0u32; y.data.len()];
        let chunk = y.chunk();
        y.data
            .par_chunks_mut(chunk)
            .zip(winners.par_chunks_mut(chunk))
            .zip(x.data.par_chunks(x.chunk()))
            .for_each(|((ys, ws), xs)| {
                for (g, (yr, wr)) in ys
                    .chunks_exact_mut(c)
                    .zip(ws.chunks_exact_mut(c))
                    .enumerate()
                {
                    let rows = &xs[g * group * c..(g + 1) * group * c];
                    yr.copy_from_slice(&rows[..c]);
                    wr.fill(0);
                    for (r, row) in rows.chunks_exact(c).enumerate().skip(1) {
                        for ((best, winner), &v) in yr.iter_mut().zip(wr.iter_mut()).zip(row) {
                            let better = v > *best;
                            *best = if better { v } else { *best };
                            *winner = if better { r as u32 } else { *winner };
                        }
                    }
                }
            });
        (y, MaxPoolCache { winners })
    }

    /// Routes each output gradient to the row that won.
    pub fn backward(&self, cache: &MaxPoolCache, dy: &Batch) -> Batch {
        let (c, group) = (dy.cols, self.group);
        assert_eq!(cache.winners.len(), dy.data.len(), "max pool shape");
        let mut dx = Batch::zeros(dy.samples, dy.rows * group, c);
        let chunk = dx.chunk();
        dx.data
            .par_chunks_mut(chunk)
            .zip(dy.data.par_chunks(dy.chunk()))
            .zip(cache.winners.par_chunks(dy.chunk()))
            .for_each(|((dxs, dys), ws)| {
                for (g, (dr, wr)) in dys.chunks_exact(c).zip(ws.chunks_exact(c)).enumerate() {
                    for j in 0..c {
                        dxs[(g * group + wr[j] as usize) * c + j] = dr[j];
                    }
                }
            });
        dx
    }
}

/// Output row `g` of a sample is the per-channel mean of input rows
/// `g * group..(g + 1) * group`. Needs no cache.
#[derive(Clone, Copy, Debug)]
pub(crate) struct MeanPool {
    pub group: usize,
}

impl MeanPool {
    pub fn forward(&self, x: &Batch) -> Batch {
        let (c, group) = (x.cols, self.group);
        assert!(
            group > 0 && x.rows.is_multiple_of(group),
            "rows must be whole groups"
        );
        let mut y = Batch::zeros(x.samples, x.rows / group, c);
        let chunk = y.chunk();
        let scale = 1.0 / group as f32;
        y.data
            .par_chunks_mut(chunk)
            .zip(x.data.par_chunks(x.chunk()))
            .for_each(|(ys, xs)| {
                for (g, yr) in ys.chunks_exact_mut(c).enumerate() {
                    for row in xs[g * group * c..(g + 1) * group * c].chunks_exact(c) {
                        for (o, v) in yr.iter_mut().zip(row) {
                            *o += v;
                        }
                    }
                    yr.iter_mut().for_each(|o| *o *= scale);
                }
            });
        y
    }

    /// Spreads each output gradient evenly over its group.
    pub fn backward(&self, dy: &Batch) -> Batch {
        let (c, group) = (dy.cols, self.group);
        let mut dx = Batch::zeros(dy.samples, dy.rows * group, c);
        let scale = 1.0 / group as f32;
        for (g, dr) in dy.data.chunks_exact(c.max(1)).enumerate() {
            for row in dx.data[g * group * c..(g + 1) * group * c].chunks_exact_mut(c) {
                for (o, v) in row.iter_mut().zip(dr) {
                    *o = v * scale;
                }
            }
        }
        dx
    }
}

#[cfg(test)]
mod tests {
    use super::*;
    use crate::net::gradcheck::{check_layer, LAYER};
    use crate::rng::Rng;

    /// Distinct values at least 0.05 apart (further than two steps of 1e-2), shuffled, so
    /// no finite difference changes which row wins.
    fn spread_batch(rng: &mut Rng, samples: usize, rows: usize, cols: usize) -> Batch {
        let mut data: Vec<f32> = (0..samples * rows * cols)
            .map(|i| 0.05 * i as f32 - 1.0)
            .collect();
        rng.shuffle(&mut data);
        Batch::from_vec(data, samples, rows, cols)
    }

    #[test]
    fn pools_by_hand() {
        // One sample, 4 rows, 2 channels, groups of 2.
        let x = Batch::from_vec(vec![1.0, 5.0, 3.0, -1.0, 0.0, 0.0, -2.0, 4.0], 1, 4, 2);
        let (max, cache) = MaxPool { group: 2 }.forward(&x);
        assert_eq!(max.data, vec![3.0, 5.0, 0.0, 4.0]);
        assert_eq!(cache.winners, vec![1, 0, 0, 1]);
        assert_eq!(
            MeanPool { group: 2 }.forward(&x).data,
            vec![2.0, 2.0, -1.0, 2.0]
        );
    }

    #[test]
    fn gradients_match_finite_differences() {
        let mut rng = Rng::new(12);
        for group in [1, 3, 12] {
            let x = spread_batch(&mut rng, 2, 12, 3);
            let pool = MaxPool { group };
            check_layer(&mut [], &x, LAYER, &mut rng, |_, x, dy| {
                let (y, cache) = pool.forward(x);
                (y, dy.map(|dy| (pool.backward(&cache, dy), Vec::new())))
            });
            let pool = MeanPool { group };
            check_layer(&mut [], &x, LAYER, &mut rng, |_, x, dy| {
                (
                    pool.forward(x),
                    dy.map(|dy| (pool.backward(dy), Vec::new())),
                )
            });
        }
    }
}
