//! EdgeConv (Wang et al. 2019, "Dynamic Graph CNN for Learning on Point Clouds", eq. 8):
//! for every point `i` and each of its `k` nearest neighbours `j` in the layer's input
//! feature space, the edge feature `h(x_i, x_j - x_i)` is a shared linear layer on
//! `[x_i, x_j - x_i]` followed by batch norm (over all edges of the batch) and LeakyReLU(0.2);
//! the point's output is the maximum over its `k` edges. The graph is rebuilt from the
//! input features at every layer (for the first layer those are the xyz coordinates), and,
//! as in the paper, no gradient flows through the choice of neighbours.
//!
//! This is the straightforward form: the `N * k` edge features of each sample are made
//! and multiplied as they stand.

use rayon::prelude::*;

use crate::graph::feature::{feature_knn_serial, KnnScratch};
use crate::net::batch::{add_into, Batch};
use crate::net::layers::activation::{LeakyRelu, LeakyReluCache};
use crate::net::layers::batch_norm::{BatchNorm, BatchNormCache};
use crate::net::layers::gather::Gather;
use crate::net::layers::linear::Linear;
use crate::net::layers::pool::{MaxPool, MaxPoolCache};
use crate::net::params::{Builder, Pass};

/// LeakyReLU's slope in DGCNN.
pub(crate) const DGCNN_SLOPE: f32 = 0.2;

#[derive(Clone, Debug)]
pub(crate) struct EdgeConv {
    pub k: usize,
    pub(crate) linear: Linear,
    pub(crate) norm: BatchNorm,
    pub(crate) act: LeakyRelu,
}

pub(crate) struct EdgeConvCache {
    input: Batch,
    /// `N * k` neighbour indices per sample, nearest first.
    pub neighbours: Vec<u32>,
    norm: BatchNormCache,
    act: LeakyReluCache,
    pub(crate) pool: MaxPoolCache,
}

impl EdgeConv {
    pub fn new(b: &mut Builder, name: &str, inputs: usize, outputs: usize, k: usize) -> EdgeConv {
        EdgeConv {
            k,
            linear: Linear::new(b, &format!("{name}.linear"), 2 * inputs, outputs, false),
            norm: BatchNorm::new(b, &format!("{name}.norm"), outputs),
            act: LeakyRelu { slope: DGCNN_SLOPE },
        }
    }

    pub fn outputs(&self) -> usize {
        self.linear.outputs
    }

    /// `x`: `N x C` per sample; returns `N x C'` per sample.
    pub fn forward(&self, pass: &mut Pass<'_>, x: Batch) -> (Batch, EdgeConvCache) {
        let neighbours = nearest_neighbours(&x, self.k);
        let edges = self.edge_features(&x, &neighbours);
        let y = self.linear.forward(pass.params, &edges);
        drop(edges);
        let (z, norm) = self.norm.forward(pass, y);
        let (a, act) = self.act.forward(z);
        let (out, pool) = MaxPool { group: self.k }.forward(&a);
        let cache = EdgeConvCache {
            input: x,
            neighbours,
            norm,
            act,
            pool,
        };
        (out, cache)
    }

    /// The edge features are made again from the cached input rather than kept.
    pub fn backward(
        &self,
        params: &[f32],
        cache: EdgeConvCache,
        dy: &Batch,
        mut grads: Option<&mut [f32]>,
        input_grad: bool,
    ) -> Option<Batch> {
        let da = MaxPool { group: self.k }.backward(&cache.pool, dy);
        let dz = self.act.backward(cache.act, da);
        let dlin = self
            .norm
            .backward(params, cache.norm, dz, grads.as_deref_mut());
        let edges = self.edge_features(&cache.input, &cache.neighbours);
        let dedges = self
            .linear
            .backward(params, &edges, &dlin, grads, input_grad)?;
        Some(self.edge_features_backward(&dedges, &cache.neighbours, cache.input.rows))
    }

    /// Row `i * k + j` is `[x_i, x_j - x_i]` for the `j`-th neighbour of `i`.
    fn edge_features(&self, x: &Batch, neighbours: &[u32]) -> Batch {
        let (c, k) = (x.cols, self.k);
        let gathered = Gather { k }.forward(x, neighbours);
        let mut edges = Batch::zeros(x.samples, x.rows * k, 2 * c);
        let chunk = edges.chunk();
        edges
            .data
            .par_chunks_mut(chunk)
            .zip(gathered.data.par_chunks(gathered.chunk()))
            .zip(x.data.par_chunks(x.chunk()))
            .for_each(|((es, gs), xs)| {
                for (e, (row, g)) in es
                    .chunks_exact_mut(2 * c)
                    .zip(gs.chunks_exact(c))
                    .enumerate()
                {
                    let xi = &xs[(e / k) * c..(e / k + 1) * c];
                    let (centre, offset) = row.split_at_mut(c);
                    centre.copy_from_slice(xi);
                    for t in 0..c {
                        offset[t] = g[t] - xi[t];
                    }
                }
            });
        edges
    }

    /// `dL/dx` from `dL/d[x_i, x_j - x_i]`: the first half goes to `x_i`, the second to `x_j`
    /// and, negated, to `x_i`.
    fn edge_features_backward(&self, dedges: &Batch, neighbours: &[u32], rows: usize) -> Batch {
        let (c, k) = (dedges.cols / 2, self.k);
        let mut dgathered = Batch::zeros(dedges.samples, rows * k, c);
        let mut dx = Batch::zeros(dedges.samples, rows, c);
        let (gchunk, xchunk) = (dgathered.chunk(), dx.chunk());
        dgathered
            .data
            .par_chunks_mut(gchunk)
            .zip(dx.data.par_chunks_mut(xchunk))
            .zip(dedges.data.par_chunks(dedges.chunk()))
            .for_each(|((gs, xs), es)| {
                for (e, (row, g)) in es
                    .chunks_exact(2 * c)
                    .zip(gs.chunks_exact_mut(c))
                    .enumerate()
                {
                    let (dcentre, doffset) = row.split_at(c);
                    let xi = &mut xs[(e / k) * c..(e / k + 1) * c];
                    for t in 0..c {
                        xi[t] += dcentre[t] - doffset[t];
                    }
                    g.copy_from_slice(doffset);
                }
            });
        let dneighbours = Gather { k }.backward(neighbours, &dgathered, rows);
        add_into(&mut dx.data, &dneighbours.data);
        dx
    }
}

/// The `k` nearest neighbours of every point in its sample's feature space (`N * k` indices
/// per sample, the point itself first), in parallel over samples.
pub(crate) fn nearest_neighbours(x: &Batch, k: usize) -> Vec<u32> {
    let per_sample = x.rows * k;
    let mut out = vec![0u32; x.samples * per_sample];
    out.par_chunks_mut(per_sample.max(1))
        .zip(x.data.par_chunks(x.chunk()))
        .for_each_init(KnnScratch::default, |scratch, (o, xs)| {
            feature_knn_serial(xs, x.rows, x.cols, k, o, scratch);
        });
    out
}

#[cfg(test)]
mod tests {
    use super::*;
    use crate::net::gradcheck::{check_layer, random_batch, Tolerance, LAYER};
    use crate::net::params::Running;
    use crate::rng::Rng;

    #[test]
    fn edge_features_by_hand() {
        let mut b = Builder::new(0);
        let layer = EdgeConv::new(&mut b, "edge", 1, 2, 2);
        // Points 0, 1, 3 on a line: neighbours (self first) 0 -> [0, 1], 1 -> [1, 0], 2 -> [2, 1].
        let x = Batch::from_vec(vec![0.0, 1.0, 3.0], 1, 3, 1);
        let neighbours = nearest_neighbours(&x, 2);
        assert_eq!(neighbours, vec![0, 1, 1, 0, 2, 1]);
        let edges = layer.edge_features(&x, &neighbours);
        assert_eq!(
            edges.data,
            vec![0.0, 0.0, 0.0, 1.0, 1.0, 0.0, 1.0, -1.0, 3.0, 0.0, 3.0, -2.0]
        );
    }

    #[test]
    fn gradients_match_finite_differences() {
        let mut rng = Rng::new(21);
        let mut b = Builder::new(5);
        let layer = EdgeConv::new(&mut b, "edge", 3, 4, 4);
        let running = b.running.values.clone();
        let x = random_batch(&mut rng, 3, 10, 3, 1.0);
        // Moving a point moves its neighbour sets: a smaller step than other layers' so that
        // fewer values see a neighbour change within the window (noise: 120 outputs, about
        // 4e-4 at this step, below the 1e-3 allowed).
        let tol = Tolerance {
            step: 2e-3,
            ..LAYER
        };
        check_layer(&mut b.params.values, &x, tol, &mut rng, |params, x, dy| {
            let mut scratch = running.clone();
            let mut pass = Pass {
                params,
                running: Running::Update(&mut scratch),
            };
            let (y, cache) = layer.forward(&mut pass, x.clone());
            let grads = dy.map(|dy| {
                let mut grads = vec![0.0; params.len()];
                let dx = layer.backward(params, cache, dy, Some(&mut grads), true);
                (dx.expect("asked for"), grads)
            });
            (y, grads)
        });
    }
}
