//! Graph convolution (Kipf and Welling 2017, "Semi-Supervised Classification with Graph
//! Convolutional Networks", eq. 2): `H' = act(P H W)` with `P = D^-1/2 (A + I) D^-1/2`, here
//! on a static k-nearest-neighbour graph of the points in space. We put batch norm between
//! the propagation and the activation, as in the other networks here.

use rayon::prelude::*;

use crate::net::batch::Batch;
use crate::net::layers::activation::{LeakyRelu, LeakyReluCache};
use crate::net::layers::batch_norm::{BatchNorm, BatchNormCache};
use crate::net::layers::linear::Linear;
use crate::net::params::{Builder, Pass};

/// `P = D^-1/2 (A + I) D^-1/2` of one cloud as a sparse matrix (compressed rows).
#[derive(Clone, Debug, PartialEq)]
pub(crate) struct Propagation {
    offsets: Vec<u32>,
    columns: Vec<u32>,
    weights: Vec<f32>,
}

impl Propagation {
    /// From each point's `k` nearest neighbours (`n * k` indices): `A_ij = 1` when `j` is
    /// among the neighbours of `i` or `i` among those of `j` (symmetrised, `i != j`); `D` is
    /// the degree of `A + I`. `P` is then symmetric.
    pub fn from_neighbours(neighbours: &[u32], n: usize, k: usize) -> Propagation {
        assert_eq!(neighbours.len(), n * k, "neighbour indices");
        let mut pairs: Vec<(u32, u32)> = Vec::with_capacity(n * (2 * k + 1));
        for (i, row) in neighbours.chunks_exact(k.max(1)).enumerate().take(n) {
            let i = i as u32;
            pairs.push((i, i));
            for &j in row.iter().filter(|&&j| j != i) {
                pairs.push((i, j));
                pairs.push((j, i));
            }
        }
        pairs.sort_unstable();
        pairs.dedup();
        let mut offsets = vec![0u32; n + 1];
        for &(i, _) in &pairs {
            offsets[i as usize + 1] += 1;
        }
        for i in 0..n {
            offsets[i + 1] += offsets[i];
        }
        let degree: Vec<f32> = (0..n)
            .map(|i| (offsets[i + 1] - offsets[i]) as f32)
            .collect();
        let weights = pairs
            .iter()
            .map(|&(i, j)| 1.0 / (degree[i as usize] * degree[j as usize]).sqrt())
            .collect();
        let columns = pairs.into_iter().map(|(_, j)| j).collect();
        Propagation {
            offsets,
            columns,
            weights,
        }
    }

    /// `y = P x` for one cloud (`n x c`, row-major).
    fn apply(&self, x: &[f32], c: usize, y: &mut [f32]) {
        for (i, out) in y.chunks_exact_mut(c).enumerate() {
            out.fill(0.0);
            let (start, end) = (self.offsets[i] as usize, self.offsets[i + 1] as usize);
            for (&j, &w) in self.columns[start..end]
                .iter()
                .zip(&self.weights[start..end])
            {
                let j = j as usize;
                for (o, v) in out.iter_mut().zip(&x[j * c..(j + 1) * c]) {
                    *o += w * v;
                }
            }
        }
    }
}

/// `P x` for every sample with its own graph, in parallel over samples. As `P` is symmetric
/// this is also the backward pass: `dL/dx = P^T dL/dy = P dL/dy`.
pub(crate) fn propagate(graphs: &[Propagation], x: &Batch) -> Batch {
    assert_eq!(graphs.len(), x.samples, "one graph per sample");
    let mut y = Batch::zeros(x.samples, x.rows, x.cols);
    let chunk = y.chunk();
    y.data
        .par_chunks_mut(chunk)
        .zip(x.data.par_chunks(x.chunk()))
        .zip(graphs)
        .for_each(|((ys, xs), graph)| graph.apply(xs, x.cols, ys));
    y
}

/// Linear (no bias: batch norm follows), propagation, batch norm, LeakyReLU.
#[derive(Clone, Debug)]
pub(crate) struct GraphConv {
    linear: Linear,
    norm: BatchNorm,
    act: LeakyRelu,
}

pub(crate) struct GraphConvCache {
    input: Batch,
    norm: BatchNormCache,
    act: LeakyReluCache,
}

impl GraphConv {
    pub fn new(
        b: &mut Builder,
        name: &str,
        inputs: usize,
        outputs: usize,
        act: LeakyRelu,
    ) -> GraphConv {
        GraphConv {
            linear: Linear::new(b, &format!("{name}.linear"), inputs, outputs, false),
            norm: BatchNorm::new(b, &format!("{name}.norm"), outputs),
            act,
        }
    }

    pub fn outputs(&self) -> usize {
        self.linear.outputs
    }

    pub fn forward(
        &self,
        pass: &mut Pass<'_>,
        graphs: &[Propagation],
        x: Batch,
    ) -> (Batch, GraphConvCache) {
        let h = self.linear.forward(pass.params, &x);
        let z = propagate(graphs, &h);
        let (n, norm) = self.norm.forward(pass, z);
        let (a, act) = self.act.forward(n);
        (
            a,
            GraphConvCache {
                input: x,
                norm,
                act,
            },
        )
    }

    pub fn backward(
        &self,
        params: &[f32],
        graphs: &[Propagation],
        cache: GraphConvCache,
        dy: Batch,
        mut grads: Option<&mut [f32]>,
        input_grad: bool,
    ) -> Option<Batch> {
        let dn = self.act.backward(cache.act, dy);
        let dz = self
            .norm
            .backward(params, cache.norm, dn, grads.as_deref_mut());
        let dh = propagate(graphs, &dz);
        self.linear
            .backward(params, &cache.input, &dh, grads, input_grad)
    }
}

#[cfg(test)]
mod tests {
    use super::*;
    use crate::net::gradcheck::{check_layer, random_batch, LAYER};
    use crate::net::params::Running;
    use crate::rng::Rng;

    #[test]
    fn propagation_of_a_path_by_hand() {
        // Three points, each with itself and one neighbour: 0 -> 1, 1 -> 0, 2 -> 1.
        // A + I = [[1,1,0],[1,1,1],[0,1,1]], degrees 2, 3, 2 (Kipf and Welling's
        // renormalisation, worked by hand): P_01 = 1/sqrt(6), P_00 = 1/2, P_11 = 1/3.
        let p = Propagation::from_neighbours(&[0, 1, 1, 0, 2, 1], 3, 2);
        assert_eq!(p.offsets, vec![0, 2, 5, 7]);
        assert_eq!(p.columns, vec![0, 1, 0, 1, 2, 1, 2]);
        let want = [
            0.5,
            1.0 / 6f32.sqrt(),
            1.0 / 6f32.sqrt(),
            1.0 / 3.0,
            1.0 / 6f32.sqrt(),
        ];
        for (got, want) in p.weights.iter().zip(want) {
            assert!((got - want).abs() < 1e-7);
        }
        let mut y = vec![0.0; 3];
        p.apply(&[1.0, 0.0, 0.0], 1, &mut y);
        assert!(
            (y[0] - 0.5).abs() < 1e-7 && (y[1] - 1.0 / 6f32.sqrt()).abs() < 1e-7 && y[2] == 0.0
        );
    }

    #[test]
    fn gradients_match_finite_differences() {
        let mut rng = Rng::new(31);
        let mut b = Builder::new(6);
        let layer = GraphConv::new(&mut b, "gcn", 3, 5, LeakyRelu { slope: 0.2 });
        let running = b.running.values.clone();
        let x = random_batch(&mut rng, 2, 9, 3, 1.0);
        let graphs: Vec<Propagation> = (0..2)
            .map(|s| {
                let n = super::super::edge_conv::nearest_neighbours(
                    &Batch::from_vec(x.sample(s).to_vec(), 1, 9, 3),
                    3,
                );
                Propagation::from_neighbours(&n, 9, 3)
            })
            .collect();
        check_layer(
            &mut b.params.values,
            &x,
            LAYER,
            &mut rng,
            |params, x, dy| {
                let mut scratch = running.clone();
                let mut pass = Pass {
                    params,
                    running: Running::Update(&mut scratch),
                };
                let (y, cache) = layer.forward(&mut pass, &graphs, x.clone());
                let grads = dy.map(|dy| {
                    let mut grads = vec![0.0; params.len()];
                    let dx =
                        layer.backward(params, &graphs, cache, dy.clone(), Some(&mut grads), true);
                    (dx.expect("asked for"), grads)
                });
                (y, grads)
            },
        );
    }
}
