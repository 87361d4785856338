//! The part of each network that turns a cloud into one global feature vector: per-point
//! layers (EdgeConv, a shared MLP, or graph convolution), then pooling over all points.

use crate::net::batch::{add_into, concat_cols, split_cols, Batch};
use crate::net::layers::activation::LeakyRelu;
use crate::net::layers::dense::{Dense, DenseCache};
use crate::net::layers::edge_conv::{nearest_neighbours, EdgeConv, EdgeConvCache, DGCNN_SLOPE};
use crate::net::layers::graph_conv::{GraphConv, GraphConvCache, Propagation};
use crate::net::layers::pool::{MaxPool, MaxPoolCache, MeanPool};
use crate::net::model::{Arch, Dims};
use crate::net::params::{Builder, Pass};

/// One activation for every layer of every network, so that the three compare on the
/// neighbourhood operator alone (Qi et al. and Kipf and Welling used plain ReLU).
const ACTIVATION: LeakyRelu = LeakyRelu { slope: DGCNN_SLOPE };

#[derive(Clone, Debug)]
pub(crate) enum Trunk {
    /// DGCNN: EdgeConv layers, their outputs side by side, a shared linear layer to the
    /// embedding width, global max and mean pooling side by side.
    EdgeConv { layers: Vec<EdgeConv>, embed: Dense },
    /// PointNet without its input and feature transform nets (the clouds are already
    /// centred, scaled and turned up by the clean-up recipe): a shared per-point MLP whose
    /// last layer has the embedding width, global max pooling.
    PointNet { layers: Vec<Dense> },
    /// Graph convolution on the k-NN graph of the points in space, built once per cloud;
    /// then as EdgeConv.
    Gcn {
        k: usize,
        layers: Vec<GraphConv>,
        embed: Dense,
    },
}

pub(crate) struct TrunkCache {
    layers: LayerCaches,
    /// The embedding layer's (absent for PointNet, whose last layer is in `layers`).
    embed: Option<DenseCache>,
    pool: PoolCache,
}

enum LayerCaches {
    EdgeConv(Vec<EdgeConvCache>),
    PointNet(Vec<DenseCache>),
    Gcn(Vec<Propagation>, Vec<GraphConvCache>),
}

struct PoolCache {
    max: MaxPoolCache,
    /// Mean pooling joined max pooling (its half of the pooled features comes second).
    with_mean: bool,
    points: usize,
}

impl Trunk {
    pub fn new(b: &mut Builder, arch: Arch, dims: &Dims) -> Trunk {
        let mut inputs = 3;
        let concat: usize = dims.trunk.iter().sum();
        match arch {
            Arch::EdgeConv => {
                let layers = dims
                    .trunk
                    .iter()
                    .enumerate()
                    .map(|(i, &w)| {
                        let layer = EdgeConv::new(b, &format!("edge{i}"), inputs, w, dims.k);
                        inputs = w;
                        layer
                    })
                    .collect();
                let embed = Dense::new(b, "embed", concat, dims.embed, false, ACTIVATION);
                Trunk::EdgeConv { layers, embed }
            }
            Arch::PointNet => {
                let layers = dims
                    .trunk
                    .iter()
                    .chain(std::iter::once(&dims.embed))
                    .enumerate()
                    .map(|(i, &w)| {
                        let layer = Dense::new(b, &format!("mlp{i}"), inputs, w, false, ACTIVATION);
                        inputs = w;
                        layer
                    })
                    .collect();
                Trunk::PointNet { layers }
            }
            Arch::Gcn => {
                let layers = dims
                    .trunk
                    .iter()
                    .enumerate()
                    .map(|(i, &w)| {
                        let layer = GraphConv::new(b, &format!("gcn{i}"), inputs, w, ACTIVATION);
                        inputs = w;
                        layer
                    })
                    .collect();
                let embed = Dense::new(b, "embed", concat, dims.embed, false, ACTIVATION);
                Trunk::Gcn {
                    k: dims.k,
                    layers,
                    embed,
                }
            }
        }
    }

    /// Width of the pooled feature vector.
    pub fn pooled_width(&self) -> usize {
        match self {
            Trunk::EdgeConv { embed, .. } | Trunk::Gcn { embed, .. } => 2 * embed.outputs(),
            Trunk::PointNet { layers } => layers.last().map_or(3, Dense::outputs),
        }
    }

    /// `points`: `N x 3` per sample. Returns the pooled features, one row per sample.
    pub fn forward(&self, pass: &mut Pass<'_>, points: Batch) -> (Batch, TrunkCache) {
        let n = points.rows;
        let (features, layers, embed) = match self {
            Trunk::EdgeConv { layers, embed } => {
                let (outputs, caches) =
                    forward_stacked(points, layers.len(), |i, x| layers[i].forward(pass, x));
                let joined = concat_cols(&outputs.iter().collect::<Vec<_>>());
                let (e, embed_cache) = embed.forward(pass, joined);
                (e, LayerCaches::EdgeConv(caches), Some(embed_cache))
            }
            Trunk::PointNet { layers } => {
                let mut x = points;
                let mut caches = Vec::with_capacity(layers.len());
                for layer in layers {
                    let (y, cache) = layer.forward(pass, x);
                    caches.push(cache);
                    x = y;
                }
                (x, LayerCaches::PointNet(caches), None)
            }
            Trunk::Gcn { k, layers, embed } => {
                let neighbours = nearest_neighbours(&points, *k);
                let graphs: Vec<Propagation> = neighbours
                    .chunks_exact((n * k).max(1))
                    .take(points.samples)
                    .map(|nb| Propagation::from_neighbours(nb, n, *k))
                    .collect();
                let (outputs, caches) = forward_stacked(points, layers.len(), |i, x| {
                    layers[i].forward(pass, &graphs, x)
                });
                let joined = concat_cols(&outputs.iter().collect::<Vec<_>>());
                let (e, embed_cache) = embed.forward(pass, joined);
                (e, LayerCaches::Gcn(graphs, caches), Some(embed_cache))
            }
        };
        let with_mean = !matches!(self, Trunk::PointNet { .. });
        let (max, max_cache) = MaxPool { group: n }.forward(&features);
        let pooled = if with_mean {
            concat_cols(&[&max, &MeanPool { group: n }.forward(&features)])
        } else {
            max
        };
        let cache = TrunkCache {
            layers,
            embed,
            pool: PoolCache {
                max: max_cache,
                with_mean,
                points: n,
            },
        };
        (pooled, cache)
    }

    /// `dpooled`: one row per sample. Returns `dL/dpoints` when `input_grad`.
    pub fn backward(
        &self,
        params: &[f32],
        cache: TrunkCache,
        dpooled: &Batch,
        mut grads: Option<&mut [f32]>,
        input_grad: bool,
    ) -> Option<Batch> {
        let n = cache.pool.points;
        let dfeatures = if cache.pool.with_mean {
            let half = dpooled.cols / 2;
            let parts = split_cols(dpooled, &[half, half]);
            let mut d = MaxPool { group: n }.backward(&cache.pool.max, &parts[0]);
            add_into(&mut d.data, &MeanPool { group: n }.backward(&parts[1]).data);
            d
        } else {
            MaxPool { group: n }.backward(&cache.pool.max, dpooled)
        };
        match (self, cache.layers) {
            (Trunk::EdgeConv { layers, embed }, LayerCaches::EdgeConv(caches)) => {
                let embed_cache = cache.embed.expect("EdgeConv has an embedding layer");
                let djoined =
                    embed.backward(params, embed_cache, dfeatures, grads.as_deref_mut(), true)?;
                let widths: Vec<usize> = layers.iter().map(EdgeConv::outputs).collect();
                backward_stacked(caches, split_cols(&djoined, &widths), |i, c, d| {
                    layers[i].backward(params, c, &d, grads.as_deref_mut(), input_grad || i > 0)
                })
            }
            (Trunk::PointNet { layers }, LayerCaches::PointNet(caches)) => {
                let mut d = dfeatures;
                for (i, (layer, layer_cache)) in layers.iter().zip(caches).enumerate().rev() {
                    d = layer.backward(
                        params,
                        layer_cache,
                        d,
                        grads.as_deref_mut(),
                        input_grad || i > 0,
                    )?;
                }
                Some(d)
            }
            (Trunk::Gcn { layers, embed, .. }, LayerCaches::Gcn(graphs, caches)) => {
                let embed_cache = cache.embed.expect("GCN has an embedding layer");
                let djoined =
                    embed.backward(params, embed_cache, dfeatures, grads.as_deref_mut(), true)?;
                let widths: Vec<usize> = layers.iter().map(GraphConv::outputs).collect();
                backward_stacked(caches, split_cols(&djoined, &widths), |i, c, d| {
                    layers[i].backward(
                        params,
                        &graphs,
                        c,
                        d,
                        grads.as_deref_mut(),
                        input_grad || i > 0,
                    )
                })
            }
            _ => unreachable!("a trunk's cache comes from its own forward pass"),
        }
    }
}

impl TrunkCache {
    /// An EdgeConv trunk's discrete choices: per layer the neighbour lists and the winning
    /// neighbour slot of every output value, then the point that won every pooled maximum.
    /// The fast path's tests give them to it, so that both route every gradient alike.
    #[cfg(test)]
    pub(crate) fn edgeconv_choices(&self) -> (Vec<Vec<u32>>, Vec<Vec<u32>>, Vec<u32>) {
        match &self.layers {
            LayerCaches::EdgeConv(caches) => (
                caches.iter().map(|c| c.neighbours.clone()).collect(),
                caches.iter().map(|c| c.pool.winners.clone()).collect(),
                self.pool.max.winners.clone(),
            ),
            _ => panic!("not an EdgeConv trunk"),
        }
    }
}

/// Runs layers one after the other, keeping every layer's output (for the concatenation
/// after the last) and cache. `step(i, x)` is layer `i`'s forward pass.
fn forward_stacked<C>(
    input: Batch,
    count: usize,
    mut step: impl FnMut(usize, Batch) -> (Batch, C),
) -> (Vec<Batch>, Vec<C>) {
    let mut outputs: Vec<Batch> = Vec::with_capacity(count);
    let mut caches = Vec::with_capacity(count);
    let mut x = input;
    for i in 0..count {
        let (y, cache) = step(i, x);
        caches.push(cache);
        outputs.push(y.clone());
        x = y;
    }
    (outputs, caches)
}

/// The backward pass of [`forward_stacked`]: layer `i`'s output gradient is its share of
/// the concatenation's gradient plus what layer `i + 1` sends back to its input.
/// `step(i, cache, dy)` is layer `i`'s backward pass; returns the first layer's input gradient.
fn backward_stacked<C>(
    caches: Vec<C>,
    mut doutputs: Vec<Batch>,
    mut step: impl FnMut(usize, C, Batch) -> Option<Batch>,
) -> Option<Batch> {
    let mut dnext: Option<Batch> = None;
    for (i, cache) in caches.into_iter().enumerate().rev() {
        let mut d = doutputs.pop().expect("one output gradient per layer");
        if let Some(next) = dnext.take() {
            add_into(&mut d.data, &next.data);
        }
        dnext = step(i, cache, d);
    }
    dnext
}
