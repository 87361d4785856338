//! Batch normalisation over every row of every sample, per channel (Ioffe and Szegedy 2015),
//! with PyTorch's conventions: eps 1e-5, running statistics updated with momentum 0.1, the
//! running variance unbiased, the normalising variance biased.

use rayon::prelude::*;

use crate::net::batch::{sum_over_samples, Batch};
use crate::net::params::{Builder, Init, Pass, Running, Slot};

/// Added to the variance before its square root (PyTorch's default).
pub(crate) const EPS: f32 = 1e-5;
/// Weight of the new batch in the running statistics (PyTorch's default).
pub(crate) const MOMENTUM: f32 = 0.1;

#[derive(Clone, Debug)]
pub(crate) struct BatchNorm {
    pub channels: usize,
    pub(crate) gamma: Slot,
    pub(crate) beta: Slot,
    running_mean: Slot,
    running_var: Slot,
}

/// What the backward pass needs: the normalised input and the scale used.
pub(crate) struct BatchNormCache {
    normalized: Batch,
    inv_std: Vec<f32>,
    /// Normalised with the batch's own statistics (training), so the gradient flows
    /// through the mean and variance too.
    batch_stats: bool,
}

/// What batch norm normalises with, per channel: `x_hat = (x - mean) * inv_std`.
#[derive(Clone, Debug)]
pub(crate) struct Normaliser {
    pub mean: Vec<f32>,
    pub inv_std: Vec<f32>,
    /// The batch's own statistics (training), so the gradient flows through them too.
    pub batch_stats: bool,
}

impl BatchNorm {
    /// Starts as the identity: scale 1, shift 0, running mean 0, running variance 1.
    pub fn new(b: &mut Builder, name: &str, channels: usize) -> BatchNorm {
        BatchNorm {
            channels,
            gamma: b.param(format!("{name}.weight"), &[channels], Init::Constant(1.0)),
            beta: b.param(format!("{name}.bias"), &[channels], Init::Constant(0.0)),
            running_mean: b.running(format!("{name}.running_mean"), &[channels], 0.0),
            running_var: b.running(format!("{name}.running_var"), &[channels], 1.0),
        }
    }

    /// `y = gamma * (x - mean) / sqrt(var + eps) + beta` per channel. In training the mean
    /// and variance are the batch's (over all rows of all samples, reduced per sample in f64
    /// and summed in sample order) and the running statistics are updated; otherwise the
    /// running ones are used.
    ///
    /// Panics in training if the batch has a single row in all (no variance to take).
    pub fn forward(&self, pass: &mut Pass<'_>, x: Batch) -> (Batch, BatchNormCache) {
        let c = self.channels;
        assert_eq!(x.cols, c, "batch norm width");
        let Normaliser {
            mean,
            inv_std,
            batch_stats,
        } = self.normaliser(pass, x.samples * x.rows, || batch_moments(&x));
        let (gamma, beta) = (self.gamma.of(pass.params), self.beta.of(pass.params));
        let mut normalized = x;
        let mut y = Batch::zeros(normalized.samples, normalized.rows, c);
        let chunk = y.chunk();
        y.data
            .par_chunks_mut(chunk)
            .zip(normalized.data.par_chunks_mut(chunk))
            .for_each(|(ys, xs)| {
                for (yr, xr) in ys.chunks_exact_mut(c).zip(xs.chunks_exact_mut(c)) {
                    for j in 0..c {
                        xr[j] = (xr[j] - mean[j]) * inv_std[j];
                        yr[j] = gamma[j] * xr[j] + beta[j];
                    }
                }
            });
        let cache = BatchNormCache {
            normalized,
            inv_std,
            batch_stats,
        };
        (y, cache)
    }

    /// The per-channel mean and `1 / sqrt(var + eps)` to normalise with. In training they come
    /// from `moments()`, the batch's mean and biased variance over its `count` rows (the fast
    /// path computes them its own way), and the running statistics are updated; otherwise
    /// they are the running ones and `moments` is not called.
    ///
    /// Panics in training if `count <= 1` (no variance to take).
    pub fn normaliser(
        &self,
        pass: &mut Pass<'_>,
        count: usize,
        moments: impl FnOnce() -> (Vec<f64>, Vec<f64>),
    ) -> Normaliser {
        let (mean, inv_std, batch_stats): (Vec<f64>, Vec<f64>, bool) = match &mut pass.running {
            Running::Update(running) => {
                assert!(count > 1, "batch norm in training needs more than one row");
                let (mean, var) = moments();
                let unbiased = count as f64 / (count - 1) as f64;
                let rm = self.running_mean.of_mut(running);
                for (r, m) in rm.iter_mut().zip(&mean) {
                    *r = (1.0 - MOMENTUM) * *r + MOMENTUM * *m as f32;
                }
                let rv = self.running_var.of_mut(running);
                for (r, v) in rv.iter_mut().zip(&var) {
                    *r = (1.0 - MOMENTUM) * *r + MOMENTUM * (v * unbiased) as f32;
                }
                (
                    mean,
                    var.iter().map(|&v| 1.0 / (v + EPS as f64).sqrt()).collect(),
                    true,
                )
            }
            Running::Use(running) => {
                let mean = self
                    .running_mean
                    .of(running)
                    .iter()
                    .map(|&m| m as f64)
                    .collect();
                let inv_std = self
                    .running_var
                    .of(running)
                    .iter()
                    .map(|&v| 1.0 / (v as f64 + EPS as f64).sqrt())
                    .collect();
                (mean, inv_std, false)
            }
        };
        Normaliser {
            mean: mean.iter().map(|&m| m as f32).collect(),
            inv_std: inv_std.iter().map(|&s| s as f32).collect(),
            batch_stats,
        }
    }

    /// Adds `dL/dgamma = sum(dy * x_hat)` and `dL/dbeta = sum(dy)` into `grads` (when given)
    /// and returns `dL/dx`: with batch statistics
    /// `gamma / sigma * (dy - mean(dy) - x_hat * mean(dy * x_hat))`, otherwise
    /// `gamma / sigma * dy`.
    pub fn backward(
        &self,
        params: &[f32],
        cache: BatchNormCache,
        dy: Batch,
        grads: Option<&mut [f32]>,
    ) -> Batch {
        let c = self.channels;
        let x_hat = &cache.normalized;
        assert_eq!(
            (dy.samples, dy.rows, dy.cols),
            (x_hat.samples, x_hat.rows, c)
        );
        let sums: Vec<f64> = sum_over_samples(dy.samples, 2 * c, |s, out| {
            let (dbeta, dgamma) = out.split_at_mut(c);
            for (dr, xr) in dy
                .sample(s)
                .chunks_exact(c)
                .zip(x_hat.sample(s).chunks_exact(c))
            {
                for j in 0..c {
                    dbeta[j] += dr[j] as f64;
                    dgamma[j] += dr[j] as f64 * xr[j] as f64;
                }
            }
        });
        let (dbeta, dgamma) = sums.split_at(c);
        if let Some(grads) = grads {
            for (g, d) in self.gamma.of_mut(grads).iter_mut().zip(dgamma) {
                *g += *d as f32;
            }
            for (g, d) in self.beta.of_mut(grads).iter_mut().zip(dbeta) {
                *g += *d as f32;
            }
        }
        let gamma = self.gamma.of(params);
        let scale: Vec<f32> = (0..c).map(|j| gamma[j] * cache.inv_std[j]).collect();
        let count = (dy.samples * dy.rows) as f64;
        let (mean_dy, mean_dy_xhat): (Vec<f32>, Vec<f32>) = if cache.batch_stats {
            (0..c)
                .map(|j| ((dbeta[j] / count) as f32, (dgamma[j] / count) as f32))
                .unzip()
        } else {
            (vec![0.0; c], vec![0.0; c])
        };
        let mut dx = dy;
        let chunk = dx.chunk();
        dx.data
            .par_chunks_mut(chunk)
            .zip(x_hat.data.par_chunks(chunk))
            .for_each(|(ds, xs)| {
                for (dr, xr) in ds.chunks_exact_mut(c).zip(xs.chunks_exact(c)) {
                    for j in 0..c {
                        dr[j] = scale[j] * (dr[j] - mean_dy[j] - xr[j] * mean_dy_xhat[j]);
                    }
                }
            });
        dx
    }
}

/// Per-channel mean and biased variance over all rows of all samples, two passes in f64.
fn batch_moments(x: &Batch) -> (Vec<f64>, Vec<f64>) {
    let c = x.cols;
    let count = (x.samples * x.rows) as f64;
    let sums: Vec<f64> = sum_over_samples(x.samples, c, |s, out| {
        for row in x.sample(s).chunks_exact(c) {
            for (o, &v) in out.iter_mut().zip(row) {
                *o += v as f64;
            }
        }
    });
    let mean: Vec<f64> = sums.iter().map(|s| s / count).collect();
    let squares: Vec<f64> = sum_over_samples(x.samples, c, |s, out| {
        for row in x.sample(s).chunks_exact(c) {
            for ((o, &v), m) in out.iter_mut().zip(row).zip(&mean) {
                *o += (v as f64 - m).powi(2);
            }
        }
    });
    let var = squares.iter().map(|s| s / count).collect();
    (mean, var)
}

#[cfg(test)]
mod tests {
    use super::*;
    use crate::net::gradcheck::{check_layer, random_batch, LAYER};
    use crate::rng::Rng;

    #[test]
    fn training_normalises_and_updates_running_statistics_as_pytorch() {
        let mut b = Builder::new(0);
        let norm = BatchNorm::new(&mut b, "bn", 1);
        // One channel, values 1, 2, 3, 6 over two samples of two rows: mean 3, biased
        // variance 3.5, unbiased 14/3. PyTorch's BatchNorm1d (momentum 0.1, worked by hand):
        // running_mean = 0.9 * 0 + 0.1 * 3 = 0.3, running_var = 0.9 * 1 + 0.1 * 14/3.
        let x = Batch::from_vec(vec![1.0, 2.0, 3.0, 6.0], 2, 2, 1);
        let mut running = b.running.values.clone();
        let mut pass = Pass {
            params: &b.params.values,
            running: Running::Update(&mut running),
        };
        let (y, _) = norm.forward(&mut pass, x);
        let sigma = (3.5f32 + EPS).sqrt();
        for (got, v) in y.data.iter().zip([1.0f32, 2.0, 3.0, 6.0]) {
            assert!((got - (v - 3.0) / sigma).abs() < 1e-6);
        }
        assert!((running[0] - 0.3).abs() < 1e-6);
        assert!((running[1] - (0.9 + 0.1 * 14.0 / 3.0)).abs() < 1e-6);
    }

    #[test]
    fn gradients_match_finite_differences_in_both_modes() {
        let mut rng = Rng::new(8);
        let mut b = Builder::new(2);
        let norm = BatchNorm::new(&mut b, "bn", 4);
        // A non-trivial scale and shift, and running statistics away from 0 and 1.
        b.params.values = (0..8).map(|i| 0.5 + 0.3 * i as f32).collect();
        let running: Vec<f32> = vec![0.2, -0.1, 0.4, 0.0, 1.5, 0.7, 2.0, 1.1];
        let x = random_batch(&mut rng, 3, 5, 4, 2.0);
        for train in [true, false] {
            check_layer(
                &mut b.params.values,
                &x,
                LAYER,
                &mut rng,
                |params, x, dy| {
                    let mut scratch = running.clone();
                    let mut pass = Pass {
                        params,
                        running: if train {
                            Running::Update(&mut scratch)
                        } else {
                            Running::Use(&running)
                        },
                    };
                    let (y, cache) = norm.forward(&mut pass, x.clone());
                    let grads = dy.map(|dy| {
                        let mut grads = vec![0.0; params.len()];
                        let dx = norm.backward(params, cache, dy.clone(), Some(&mut grads));
                        (dx, grads)
                    });
                    (y, grads)
                },
            );
        }
    }
}
