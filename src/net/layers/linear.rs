//! A linear layer applied to every row: shared per point (a 1x1 convolution), per edge, or,
//! in the classifier head, fully connected over the samples.

use rayon::prelude::*;

use crate::net::batch::{gemm, matrix, matrix_mut, sum_over_samples, Batch};
use crate::net::params::{Builder, Init, Slot};

/// `y = x W^T + b` for every row `x` (`W` is `outputs x inputs`, as PyTorch stores it).
#[derive(Clone, Debug)]
pub(crate) struct Linear {
    pub inputs: usize,
    pub outputs: usize,
    pub(crate) weight: Slot,
    pub(crate) bias: Option<Slot>,
}

impl Linear {
    /// PyTorch's default start: weight and bias uniform in `+-1/sqrt(inputs)`.
    pub fn new(b: &mut Builder, name: &str, inputs: usize, outputs: usize, bias: bool) -> Linear {
        let bound = 1.0 / (inputs.max(1) as f32).sqrt();
        let weight = b.param(
            format!("{name}.weight"),
            &[outputs, inputs],
            Init::Uniform(bound),
        );
        let bias = bias.then(|| b.param(format!("{name}.bias"), &[outputs], Init::Uniform(bound)));
        Linear {
            inputs,
            outputs,
            weight,
            bias,
        }
    }

    /// One product per sample, in parallel over samples. The cache of a linear layer is its
    /// input, which the caller keeps (or rebuilds) for [`Linear::backward`].
    pub fn forward(&self, params: &[f32], x: &Batch) -> Batch {
        assert_eq!(x.cols, self.inputs, "linear layer input width");
        let mut y = Batch::zeros(x.samples, x.rows, self.outputs);
        let w = matrix(self.weight.of(params), self.outputs, self.inputs);
        let chunk = y.chunk();
        y.data
            .par_chunks_mut(chunk)
            .zip(x.data.par_chunks(x.chunk()))
            .for_each(|(ys, xs)| {
                let mut yv = matrix_mut(ys, x.rows, self.outputs);
                gemm(1.0, &matrix(xs, x.rows, self.inputs), &w.t(), 0.0, &mut yv);
                if let Some(bias) = self.bias {
                    let bias = bias.of(params);
                    for row in ys.chunks_exact_mut(self.outputs) {
                        for (v, b) in row.iter_mut().zip(bias) {
                            *v += b;
                        }
                    }
                }
            });
        y
    }

    /// Given the forward input `x` and `dy = dL/dy`: adds `dL/dW = dy^T x` and `dL/db` into
    /// `grads` (when given; summed per sample, then in sample order) and returns
    /// `dL/dx = dy W` when `input_grad`.
    pub fn backward(
        &self,
        params: &[f32],
        x: &Batch,
        dy: &Batch,
        grads: Option<&mut [f32]>,
        input_grad: bool,
    ) -> Option<Batch> {
        assert_eq!(
            (dy.samples, dy.rows, dy.cols),
            (x.samples, x.rows, self.outputs)
        );
        if let Some(grads) = grads {
            let weights = self.outputs * self.inputs;
            let total = sum_over_samples(x.samples, weights + self.outputs, |s, out| {
                let (dw, db) = out.split_at_mut(weights);
                let dys = matrix(dy.sample(s), x.rows, self.outputs);
                let mut dwv = matrix_mut(dw, self.outputs, self.inputs);
                gemm(
                    1.0,
                    &dys.t(),
                    &matrix(x.sample(s), x.rows, self.inputs),
                    0.0,
                    &mut dwv,
                );
                for row in dy.sample(s).chunks_exact(self.outputs) {
                    for (d, v) in db.iter_mut().zip(row) {
                        *d += v;
                    }
                }
            });
            let (dw, db) = total.split_at(weights);
            for (g, d) in self.weight.of_mut(grads).iter_mut().zip(dw) {
                *g += d;
            }
            if let Some(bias) = self.bias {
                for (g, d) in bias.of_mut(grads).iter_mut().zip(db) {
                    *g += d;
                }
            }
        }
        input_grad.then(|| {
            let w = matrix(self.weight.of(params), self.outputs, self.inputs);
            let mut dx = Batch::zeros(x.samples, x.rows, self.inputs);
            let chunk = dx.chunk();
            dx.data
                .par_chunks_mut(chunk)
                .zip(dy.data.par_chunks(dy.chunk()))
                .for_each(|(dxs, dys)| {
                    let mut dxv = matrix_mut(dxs, x.rows, self.inputs);
                    gemm(1.0, &matrix(dys, x.rows, self.outputs), &w, 0.0, &mut dxv);
                });
            dx
        })
    }
}

#[cfg(test)]
mod tests {
    use super::*;
    use crate::net::gradcheck::{check_layer, random_batch, LAYER};
    use crate::net::params::Builder;
    use crate::rng::Rng;

    #[test]
    fn forward_is_x_times_w_transposed_plus_bias() {
        let mut b = Builder::new(0);
        let layer = Linear::new(&mut b, "fc", 2, 3, true);
        // W = [[1, 2], [3, 4], [5, 6]], b = [0.5, -1, 0]: worked by hand below.
        b.params.values = vec![1.0, 2.0, 3.0, 4.0, 5.0, 6.0, 0.5, -1.0, 0.0];
        let x = Batch::from_vec(vec![1.0, -1.0, 2.0, 0.5], 2, 1, 2);
        let y = layer.forward(&b.params.values, &x);
        // [1, -1] -> [1-2+0.5, 3-4-1, 5-6] ; [2, 0.5] -> [2+1+0.5, 6+2-1, 10+3]
        assert_eq!(y.data, vec![-0.5, -2.0, -1.0, 3.5, 7.0, 13.0]);
    }

    #[test]
    fn gradients_match_finite_differences() {
        let mut rng = Rng::new(3);
        for bias in [false, true] {
            let mut b = Builder::new(1);
            let layer = Linear::new(&mut b, "fc", 5, 4, bias);
            let x = random_batch(&mut rng, 3, 7, 5, 1.0);
            check_layer(
                &mut b.params.values,
                &x,
                LAYER,
                &mut rng,
                |params, x, dy| {
                    let y = layer.forward(params, x);
                    let grads = dy.map(|dy| {
                        let mut grads = vec![0.0; params.len()];
                        let dx = layer.backward(params, x, dy, Some(&mut grads), true);
                        (dx.expect("asked for"), grads)
                    });
                    (y, grads)
                },
            );
        }
    }
}
