//! The EdgeConv trunk (EdgeConv layers, their outputs side by side, the embedding layer, max
//! and mean pooling) on the fast path, forward and backward, for a whole batch.
//!
//! Work runs in two shapes: products over all `B * N` rows of the batch at once, split
//! between threads by the `gemm` crate; and passes over tiles of [`TILE_ROWS`] points of one
//! sample, in parallel over all tiles of the batch (so one cloud keeps both cores busy too).
//! Batch norm couples the samples: each layer's statistics are summed per tile, the tiles
//! reduced in order (the same bits for any thread count), and only then is the layer's output
//! made. What the backward pass keeps per layer: the neighbour lists, `[a b]` (`N x 2C`), and
//! the winning neighbour slot of each output value (a byte); never an edge tensor.

use std::cell::RefCell;

use rayon::prelude::*;

use crate::net::batch::Batch;
use crate::net::fast::edge::{
    edge_input_grads, edge_moments, finish_edges, scan_edges, signs, winner_grads, winner_values,
    Affine, EdgeScratch, NormGrad,
};
use crate::net::fast::embed::{
    column_moments, embed_input_grads, embed_norm_sums, pool_tile, PoolGrad,
};
use crate::net::fast::gemm::{matmul, MatMut, MatRef, Site, Threads};
use crate::net::fast::knn::{knn_rows, norms_and_columns, KnnScratch, BLOCK_ROWS};
use crate::net::fast::spare::Spare;
use crate::net::layers::batch_norm::{BatchNorm, Normaliser};
use crate::net::layers::dense::Dense;
use crate::net::layers::edge_conv::EdgeConv;
use crate::net::params::{Pass, Running};

/// Points per tile of the element-wise passes: the k-NN's distance block, so that one tile's
/// distances stay in the second-level cache. 1024-point clouds make 16 tiles, enough to
/// share a single cloud between cores.
pub(crate) const TILE_ROWS: usize = BLOCK_ROWS;

/// Rows `first..first + rows` of sample `sample`.
#[derive(Clone, Copy, Debug)]
struct Tile {
    sample: usize,
    first: usize,
    rows: usize,
}

/// The tiles of a batch, sample by sample, each inside one sample.
fn tiles(samples: usize, n: usize) -> Vec<Tile> {
    (0..samples)
        .flat_map(|sample| {
            (0..n).step_by(TILE_ROWS).map(move |first| Tile {
                sample,
                first,
                rows: TILE_ROWS.min(n - first),
            })
        })
        .collect()
}

/// `data` (`row_len` values for each row of each sample) cut into one chunk per tile.
fn tile_chunks<'a, T>(mut data: &'a mut [T], row_len: usize, tiles: &[Tile]) -> Vec<&'a mut [T]> {
    let mut out = Vec::with_capacity(tiles.len());
    for t in tiles {
        let (head, tail) = std::mem::take(&mut data).split_at_mut(t.rows * row_len);
        out.push(head);
        data = tail;
    }
    out
}

/// Read-only [`tile_chunks`].
fn tile_slices<'a, T>(mut data: &'a [T], row_len: usize, tiles: &[Tile]) -> Vec<&'a [T]> {
    let mut out = Vec::with_capacity(tiles.len());
    for t in tiles {
        let (head, tail) = data.split_at(t.rows * row_len);
        out.push(head);
        data = tail;
    }
    out
}

/// Sums per-tile partials (`len` values per tile, back to back) in tile order.
fn sum_tiles(partials: &[f64], len: usize) -> Vec<f64> {
    let mut total = vec![0.0; len];
    for part in partials.chunks_exact(len.max(1)) {
        for (t, p) in total.iter_mut().zip(part) {
            *t += p;
        }
    }
    total
}

/// Per-thread scratch of the tile passes, kept across steps.
#[derive(Default)]
struct Scratch {
    knn: KnnScratch,
    edge: EdgeScratch,
}

thread_local! {
    static SCRATCH: RefCell<Scratch> = RefCell::new(Scratch::default());
}

/// Runs `f` with this thread's scratch (a fresh one if it is already in use further up the
/// stack, which only happens if rayon runs another task inside one of ours).
fn with_scratch<R>(f: impl FnOnce(&mut Scratch) -> R) -> R {
    SCRATCH.with(|cell| match cell.try_borrow_mut() {
        Ok(mut s) => f(&mut s),
        Err(_) => f(&mut Scratch::default()),
    })
}

/// What one EdgeConv layer keeps for the backward pass.
struct EdgeLayerCache {
    /// `[W_a - W_b; W_b]`, `2C x C_in`.
    weights: Vec<f32>,
    /// `k` per point, the point itself first.
    neighbours: Spare<u32>,
    /// `[a b]` per point, `2C`.
    ab: Spare<f32>,
    /// Per point and channel, the neighbour slot that won the maximum.
    winners: Spare<u8>,
    /// Per point and channel, the winning edge's value before batch norm.
    y: Spare<f32>,
    norm: Normaliser,
}

struct EmbedCache {
    /// The linear part's output (`B * N x E`), batch norm's input.
    y: Spare<f32>,
    /// Per sample and channel, the point that won the max pooling.
    winners: Vec<u32>,
    norm: Normaliser,
}

/// What the backward pass of [`forward`] needs.
pub(crate) struct FastTrunkCache {
    samples: usize,
    n: usize,
    points: Vec<f32>,
    /// Every EdgeConv layer's output side by side, `B * N x W` (the embedding's input).
    joined: Spare<f32>,
    layers: Vec<EdgeLayerCache>,
    embed: EmbedCache,
}

impl FastTrunkCache {
    /// The discrete choices this forward pass made (tests compare them with the plain layers').
    #[cfg(test)]
    pub(crate) fn choices(&self) -> Choices {
        Choices {
            neighbours: self.layers.iter().map(|l| l.neighbours.to_vec()).collect(),
            edge_winners: self
                .layers
                .iter()
                .map(|l| l.winners.iter().map(|&w| w as u32).collect())
                .collect(),
            pool_winners: self.embed.winners.clone(),
        }
    }
}

/// Column offsets of the layers' outputs in the joined rows, and the joined width.
fn offsets(layers: &[EdgeConv]) -> (Vec<usize>, usize) {
    let mut at = 0;
    let offsets = layers
        .iter()
        .map(|l| {
            let o = at;
            at += l.outputs();
            o
        })
        .collect();
    (offsets, at)
}

/// The batch norm's affine map with this pass's parameters.
fn affine<'a>(
    norm: &BatchNorm,
    params: &'a [f32],
    normaliser: &'a Normaliser,
    slope: f32,
) -> Affine<'a> {
    Affine {
        mean: &normaliser.mean,
        inv_std: &normaliser.inv_std,
        gamma: norm.gamma.of(params),
        beta: norm.beta.of(params),
        slope,
    }
}

/// Neighbour lists and winners given instead of found: the plain layers' own, in the tests,
/// so that both paths route every gradient alike even where two candidates tie to within f32
/// rounding (which each path may then order its own way).
#[cfg_attr(not(test), allow(dead_code))]
pub(crate) struct Choices {
    /// Per layer, `B * N * k` neighbour indices.
    pub neighbours: Vec<Vec<u32>>,
    /// Per layer, `B * N * C` winning neighbour slots.
    pub edge_winners: Vec<Vec<u32>>,
    /// `B * E` points that won the max pooling.
    pub pool_winners: Vec<u32>,
}

/// `points`: `N x 3` per sample. Returns the pooled features (`B` samples of one row of `2E`:
/// max then mean) and the cache, as the plain trunk does.
///
/// Panics if a layer's `k` exceeds 256 or a linear layer has a bias (neither happens in the
/// networks built here).
pub(crate) fn forward(
    layers: &[EdgeConv],
    embed: &Dense,
    pass: &mut Pass<'_>,
    points: Batch,
) -> (Batch, FastTrunkCache) {
    forward_with(layers, embed, pass, points, None)
}

/// [`forward`], with the discrete choices `given` instead of found when there are some.
pub(crate) fn forward_with(
    layers: &[EdgeConv],
    embed: &Dense,
    pass: &mut Pass<'_>,
    points: Batch,
    given: Option<&Choices>,
) -> (Batch, FastTrunkCache) {
    let (samples, n) = (points.samples, points.rows);
    assert_eq!(points.cols, 3, "points are x y z");
    let (offsets, width) = offsets(layers);
    let tiles = tiles(samples, n);
    let mut joined = Spare::reused(samples * n * width);
    let mut caches = Vec::with_capacity(layers.len());
    for (l, layer) in layers.iter().enumerate() {
        let (input, stride, c_in): (&[f32], usize, usize) = if l == 0 {
            (&points.data, 3, 3)
        } else {
            (&joined[offsets[l - 1]..], width, layers[l - 1].outputs())
        };
        let given_layer = given.map(|g| (&g.neighbours[l][..], &g.edge_winners[l][..]));
        let mut cache = edge_scan(
            layer,
            pass,
            input,
            stride,
            c_in,
            samples,
            n,
            &tiles,
            given_layer.map(|g| g.0),
        );
        if let Some((_, winners)) = given_layer {
            use_winners(&mut cache, winners, layer, n, &tiles);
        }
        let out = &mut joined[offsets[l]..];
        edge_finish(layer, pass.params, &cache, out, width, &tiles);
        caches.push(cache);
    }
    let (pooled, mut embed_cache) = embed_forward(embed, pass, &joined, width, samples, n, &tiles);
    if let Some(g) = given {
        embed_cache.winners.copy_from_slice(&g.pool_winners);
    }
    let cache = FastTrunkCache {
        samples,
        n,
        points: points.data,
        joined,
        layers: caches,
        embed: embed_cache,
    };
    (pooled, cache)
}

/// An EdgeConv layer up to its batch statistics: neighbours, `[a b]`, the winning edge per
/// point and channel and its value before batch norm.
#[allow(clippy::too_many_arguments)]
fn edge_scan(
    layer: &EdgeConv,
    pass: &mut Pass<'_>,
    input: &[f32],
    stride: usize,
    c_in: usize,
    samples: usize,
    n: usize,
    tiles: &[Tile],
    given_neighbours: Option<&[u32]>,
) -> EdgeLayerCache {
    let (k, c) = (layer.k, layer.outputs());
    assert!(
        layer.linear.bias.is_none(),
        "EdgeConv's linear layer has no bias"
    );
    assert_eq!(layer.linear.inputs, 2 * c_in, "EdgeConv input width");
    let rows = samples * n;

    let neighbours = match given_neighbours {
        Some(given) => {
            let mut copy = Spare::reused(given.len());
            copy.copy_from_slice(given);
            copy
        }
        None => find_neighbours(input, stride, c_in, samples, n, k, tiles),
    };

    // [W_a - W_b; W_b] from W = [W_a W_b] (C x 2 C_in).
    let w = layer.linear.weight.of(pass.params);
    let mut weights = vec![0.0f32; 2 * c * c_in];
    for ch in 0..c {
        let row = &w[ch * 2 * c_in..(ch + 1) * 2 * c_in];
        let (wa, wb) = row.split_at(c_in);
        for t in 0..c_in {
            weights[ch * c_in + t] = wa[t] - wb[t];
            weights[(c + ch) * c_in + t] = wb[t];
        }
    }
    let mut ab = Spare::reused(rows * 2 * c);
    matmul(
        Site::Forward,
        MatMut::new(&mut ab, rows, 2 * c, 2 * c),
        MatRef::new(input, rows, c_in, stride),
        MatRef::new(&weights, 2 * c, c_in, c_in).t(),
        false,
        Threads::Pool,
    );

    let training = matches!(pass.running, Running::Update(_));
    let signs = signs(layer.norm.gamma.of(pass.params));
    let mut winners = Spare::reused(rows * c);
    let mut y = Spare::reused(rows * c);
    let mut partials = vec![0.0f64; if training { tiles.len() * 3 * c } else { 0 }];
    let mut stats: Vec<Option<&mut [f64]>> = if training {
        partials.chunks_exact_mut(3 * c).map(Some).collect()
    } else {
        tiles.iter().map(|_| None).collect()
    };
    tile_chunks(&mut winners, c, tiles)
        .into_par_iter()
        .zip(tile_chunks(&mut y, c, tiles))
        .zip(stats.par_iter_mut())
        .zip(tiles)
        .for_each(|(((ws, ys), st), t)| {
            let ab_s = &ab[t.sample * n * 2 * c..(t.sample + 1) * n * 2 * c];
            let nb_s = &neighbours[t.sample * n * k..(t.sample + 1) * n * k];
            with_scratch(|s| {
                scan_edges(
                    ab_s,
                    nb_s,
                    c,
                    k,
                    t.first,
                    &signs,
                    ws,
                    ys,
                    st.as_deref_mut(),
                    &mut s.edge,
                )
            });
        });
    drop(stats);
    let norm = layer.norm.normaliser(pass, rows * k, || {
        edge_moments(&sum_tiles(&partials, 3 * c), c, rows, k)
    });
    EdgeLayerCache {
        weights,
        neighbours,
        ab,
        winners,
        y,
        norm,
    }
}

/// Puts `given` winning slots (`B * N * C`) into the cache, and their edges' values.
fn use_winners(
    cache: &mut EdgeLayerCache,
    given: &[u32],
    layer: &EdgeConv,
    n: usize,
    tiles: &[Tile],
) {
    let (k, c) = (layer.k, layer.outputs());
    for (w, &g) in cache.winners.iter_mut().zip(given) {
        *w = g as u8;
    }
    let EdgeLayerCache {
        ref neighbours,
        ref ab,
        ref winners,
        ref mut y,
        ..
    } = *cache;
    for ((ys, ws), t) in tile_chunks(y, c, tiles)
        .into_iter()
        .zip(tile_slices(winners, c, tiles))
        .zip(tiles)
    {
        let ab_s = &ab[t.sample * n * 2 * c..(t.sample + 1) * n * 2 * c];
        let nb_s = &neighbours[t.sample * n * k..(t.sample + 1) * n * k];
        winner_values(ab_s, nb_s, c, k, t.first, ws, ys);
    }
}

/// The `k` nearest neighbours of every point in its sample's feature space.
fn find_neighbours(
    input: &[f32],
    stride: usize,
    c_in: usize,
    samples: usize,
    n: usize,
    k: usize,
    tiles: &[Tile],
) -> Spare<u32> {
    let mut norms = Spare::reused(samples * n);
    let mut columns = Spare::reused(samples * n * c_in);
    norms
        .par_chunks_mut(n.max(1))
        .zip(columns.par_chunks_mut((n * c_in).max(1)))
        .enumerate()
        .for_each(|(s, (nr, cols))| {
            norms_and_columns(&input[s * n * stride..], n, c_in, stride, nr, cols)
        });
    let mut neighbours = Spare::reused(samples * n * k);
    tile_chunks(&mut neighbours, k, tiles)
        .into_par_iter()
        .zip(tiles)
        .for_each(|(out, t)| {
            let x = &input[t.sample * n * stride..];
            let nr = &norms[t.sample * n..(t.sample + 1) * n];
            let cols = &columns[t.sample * n * c_in..(t.sample + 1) * n * c_in];
            with_scratch(|s| knn_rows(x, cols, n, c_in, stride, nr, k, t.first, out, &mut s.knn));
        });
    neighbours
}

/// The layer's output into `out` (`width` values a row, starting at the layer's column).
fn edge_finish(
    layer: &EdgeConv,
    params: &[f32],
    cache: &EdgeLayerCache,
    out: &mut [f32],
    width: usize,
    tiles: &[Tile],
) {
    let c = layer.outputs();
    let norm = affine(&layer.norm, params, &cache.norm, layer.act.slope);
    tile_slices(&cache.y, c, tiles)
        .into_par_iter()
        .zip(row_chunks(out, width, tiles))
        .for_each(|(ys, o)| finish_edges(ys, c, &norm, o, width));
}

/// [`tile_chunks`] of a strided view that starts inside its first row (a column block of the
/// joined rows): the last tile gets what is left, which is shorter than whole rows.
fn row_chunks<'a>(data: &'a mut [f32], width: usize, tiles: &[Tile]) -> Vec<&'a mut [f32]> {
    let mut rest = data;
    let mut out = Vec::with_capacity(tiles.len());
    for (i, t) in tiles.iter().enumerate() {
        let take = if i + 1 == tiles.len() {
            rest.len()
        } else {
            t.rows * width
        };
        let (head, tail) = std::mem::take(&mut rest).split_at_mut(take);
        out.push(head);
        rest = tail;
    }
    out
}

/// The embedding layer and the pooling: returns the pooled features (`B` samples of one row
/// `[max, mean]`) and the cache.
fn embed_forward(
    embed: &Dense,
    pass: &mut Pass<'_>,
    joined: &[f32],
    width: usize,
    samples: usize,
    n: usize,
    tiles: &[Tile],
) -> (Batch, EmbedCache) {
    let e = embed.outputs();
    assert!(
        embed.linear.bias.is_none(),
        "the embedding layer has no bias"
    );
    assert_eq!(embed.linear.inputs, width, "embedding input width");
    let rows = samples * n;
    let mut y = Spare::reused(rows * e);
    matmul(
        Site::Forward,
        MatMut::new(&mut y, rows, e, e),
        MatRef::new(joined, rows, width, width),
        MatRef::new(embed.linear.weight.of(pass.params), e, width, width).t(),
        false,
        Threads::Pool,
    );
    let normaliser = embed.norm.normaliser(pass, rows, || {
        let mut partials = vec![0.0f64; tiles.len() * 2 * e];
        partials
            .par_chunks_exact_mut(2 * e)
            .zip(tile_slices(&y, e, tiles))
            .for_each(|(sums, ys)| column_moments(ys, e, sums));
        let sums = sum_tiles(&partials, 2 * e);
        let count = rows as f64;
        let mean: Vec<f64> = sums[..e].iter().map(|s| s / count).collect();
        let var = sums[e..]
            .iter()
            .zip(&mean)
            .map(|(s2, m)| (s2 / count - m * m).max(0.0))
            .collect();
        (mean, var)
    });
    let norm = affine(&embed.norm, pass.params, &normaliser, embed.act.slope);
    let mut max = vec![0.0f32; tiles.len() * e];
    let mut arg = vec![0u32; tiles.len() * e];
    let mut sum = vec![0.0f32; tiles.len() * e];
    max.par_chunks_exact_mut(e)
        .zip(arg.par_chunks_exact_mut(e))
        .zip(sum.par_chunks_exact_mut(e))
        .zip(tile_slices(&y, e, tiles))
        .zip(tiles)
        .for_each(|((((mx, ar), sm), ys), t)| pool_tile(ys, e, t.first, &norm, mx, ar, sm));
    // Each sample's tiles in order: the first of equal maxima wins, as in the plain pooling.
    let mut pooled = vec![0.0f32; samples * 2 * e];
    let mut winners = vec![0u32; samples * e];
    let per_sample = n.div_ceil(TILE_ROWS).max(1);
    let scale = 1.0 / n as f32;
    for (s, (out, win)) in pooled
        .chunks_exact_mut(2 * e)
        .zip(winners.chunks_exact_mut(e))
        .enumerate()
    {
        let (pmax, pmean) = out.split_at_mut(e);
        for t in s * per_sample..(s + 1) * per_sample {
            let (mx, ar, sm) = (
                &max[t * e..(t + 1) * e],
                &arg[t * e..(t + 1) * e],
                &sum[t * e..(t + 1) * e],
            );
            for ch in 0..e {
                if t == s * per_sample || mx[ch] > pmax[ch] {
                    pmax[ch] = mx[ch];
                    win[ch] = ar[ch];
                }
                pmean[ch] += sm[ch];
            }
        }
        pmean.iter_mut().for_each(|v| *v *= scale);
    }
    let cache = EmbedCache {
        y,
        winners,
        norm: normaliser,
    };
    (Batch::from_vec(pooled, samples, 1, 2 * e), cache)
}

/// Adds batch norm's `dgamma` and `dbeta` (summed in f64) into `grads`.
fn add_norm_grads(norm: &BatchNorm, grads: &mut [f32], dbeta: &[f64], dgamma: &[f64]) {
    for (g, d) in norm.gamma.of_mut(grads).iter_mut().zip(dgamma) {
        *g += *d as f32;
    }
    for (g, d) in norm.beta.of_mut(grads).iter_mut().zip(dbeta) {
        *g += *d as f32;
    }
}

/// `mean(dz)` and `mean(dz x_hat)` over `count` values from their sums, or zeros without
/// batch statistics.
fn mean_terms(
    normaliser: &Normaliser,
    dbeta: &[f64],
    dgamma: &[f64],
    count: usize,
) -> (Vec<f32>, Vec<f32>) {
    if normaliser.batch_stats {
        let count = count as f64;
        dbeta
            .iter()
            .zip(dgamma)
            .map(|(b, g)| ((b / count) as f32, (g / count) as f32))
            .unzip()
    } else {
        (vec![0.0; dbeta.len()], vec![0.0; dbeta.len()])
    }
}

/// The backward pass of [`forward`]: `dpooled` has one row of `2E` per sample. Adds every
/// parameter gradient into `grads` (when given); returns `dL/dpoints` when `input_grad`.
pub(crate) fn backward(
    layers: &[EdgeConv],
    embed: &Dense,
    params: &[f32],
    cache: FastTrunkCache,
    dpooled: &Batch,
    mut grads: Option<&mut [f32]>,
    input_grad: bool,
) -> Option<Batch> {
    let FastTrunkCache {
        samples,
        n,
        points,
        joined,
        layers: mut caches,
        embed: embed_cache,
    } = cache;
    let (offsets, width) = offsets(layers);
    let tiles = tiles(samples, n);
    let rows = samples * n;
    let mut djoined = embed_backward(
        embed,
        params,
        embed_cache,
        &joined,
        width,
        dpooled,
        grads.as_deref_mut(),
        samples,
        n,
        &tiles,
    );
    for (l, layer) in layers.iter().enumerate().rev() {
        let layer_cache = caches.pop().expect("one cache per layer");
        let (c, k) = (layer.outputs(), layer.k);
        let c_in = if l == 0 { 3 } else { layers[l - 1].outputs() };
        let norm = affine(&layer.norm, params, &layer_cache.norm, layer.act.slope);
        let EdgeLayerCache {
            weights,
            neighbours,
            ab,
            winners,
            y,
            norm: normaliser,
        } = &layer_cache;

        let mut dab = Spare::reused(rows * 2 * c);
        let mut partials = vec![0.0f64; tiles.len() * 2 * c];
        let dout = &djoined[offsets[l]..];
        tile_chunks(&mut dab, 2 * c, &tiles)
            .into_par_iter()
            .zip(partials.par_chunks_exact_mut(2 * c))
            .zip(tile_slices(y, c, &tiles))
            .zip(&tiles)
            .for_each(|(((d, sums), ys), t)| {
                let start = (t.sample * n + t.first) * width;
                winner_grads(ys, c, &dout[start..], width, &norm, d, sums);
            });
        let sums = sum_tiles(&partials, 2 * c);
        let (dbeta, dgamma) = sums.split_at(c);
        if let Some(g) = grads.as_deref_mut() {
            add_norm_grads(&layer.norm, g, dbeta, dgamma);
        }
        let (m1, m2) = mean_terms(normaliser, dbeta, dgamma, rows * k);
        let scale: Vec<f32> = norm
            .gamma
            .iter()
            .zip(&normaliser.inv_std)
            .map(|(g, s)| g * s)
            .collect();
        let grad = NormGrad {
            scale: &scale,
            inv_std: &normaliser.inv_std,
            mean: &normaliser.mean,
            m1: &m1,
            m2: &m2,
            batch_stats: normaliser.batch_stats,
        };
        dab.par_chunks_exact_mut((n * 2 * c).max(1))
            .zip(ab.par_chunks_exact((n * 2 * c).max(1)))
            .zip(neighbours.par_chunks_exact((n * k).max(1)))
            .zip(winners.par_chunks_exact((n * c).max(1)))
            .for_each(|(((d, ab_s), nb_s), ws)| {
                with_scratch(|s| edge_input_grads(ab_s, nb_s, ws, c, k, &grad, d, &mut s.edge));
            });

        let (input, stride): (&[f32], usize) = if l == 0 {
            (&points, 3)
        } else {
            (&joined[offsets[l - 1]..], width)
        };
        if let Some(g) = grads.as_deref_mut() {
            // d[W_a - W_b; W_b] = [da db]^T x, then dW_a = dWd and dW_b = dWb - dWd.
            let mut dweights = vec![0.0f32; 2 * c * c_in];
            matmul(
                Site::WeightGrad,
                MatMut::new(&mut dweights, 2 * c, c_in, c_in),
                MatRef::new(&dab, rows, 2 * c, 2 * c).t(),
                MatRef::new(input, rows, c_in, stride),
                false,
                Threads::Pool,
            );
            let dw = layer.linear.weight.of_mut(g);
            for ch in 0..c {
                let (dd, db) = (
                    &dweights[ch * c_in..(ch + 1) * c_in],
                    &dweights[(c + ch) * c_in..(c + ch + 1) * c_in],
                );
                let row = &mut dw[ch * 2 * c_in..(ch + 1) * 2 * c_in];
                for t in 0..c_in {
                    row[t] += dd[t];
                    row[c_in + t] += db[t] - dd[t];
                }
            }
        }
        let into: Option<(&mut [f32], usize)> = if l > 0 {
            Some((&mut djoined[offsets[l - 1]..], width))
        } else {
            None
        };
        let wmat = MatRef::new(weights, 2 * c, c_in, c_in);
        let dabm = MatRef::new(&dab, rows, 2 * c, 2 * c);
        match into {
            Some((d, stride)) => matmul(
                Site::InputGrad,
                MatMut::new(d, rows, c_in, stride),
                dabm,
                wmat,
                true,
                Threads::Pool,
            ),
            None if input_grad => {
                let mut dpoints = vec![0.0f32; rows * 3];
                matmul(
                    Site::InputGrad,
                    MatMut::new(&mut dpoints, rows, 3, 3),
                    dabm,
                    wmat,
                    false,
                    Threads::Pool,
                );
                return Some(Batch::from_vec(dpoints, samples, n, 3));
            }
            None => return None,
        }
    }
    None
}

/// The embedding layer's backward pass: adds its gradients into `grads` (when given) and
/// returns `dL/djoined` (`B * N x W`).
#[allow(clippy::too_many_arguments)]
fn embed_backward(
    embed: &Dense,
    params: &[f32],
    cache: EmbedCache,
    joined: &[f32],
    width: usize,
    dpooled: &Batch,
    grads: Option<&mut [f32]>,
    samples: usize,
    n: usize,
    tiles: &[Tile],
) -> Spare<f32> {
    let e = embed.outputs();
    assert_eq!(
        (dpooled.samples, dpooled.rows, dpooled.cols),
        (samples, 1, 2 * e),
        "pooled gradient shape"
    );
    let EmbedCache {
        mut y,
        winners,
        norm: normaliser,
    } = cache;
    let rows = samples * n;
    let norm = affine(&embed.norm, params, &normaliser, embed.act.slope);
    let scale_mean = 1.0 / n as f32;
    let dmean: Vec<f32> = dpooled
        .data
        .chunks_exact(2 * e)
        .flat_map(|d| d[e..].iter().map(|v| v * scale_mean))
        .collect();
    let pool_grad = |s: usize| PoolGrad {
        winners: &winners[s * e..(s + 1) * e],
        dmax: &dpooled.data[s * 2 * e..s * 2 * e + e],
        dmean: &dmean[s * e..(s + 1) * e],
    };
    let mut partials = vec![0.0f64; tiles.len() * 2 * e];
    partials
        .par_chunks_exact_mut(2 * e)
        .zip(tile_slices(&y, e, tiles))
        .zip(tiles)
        .for_each(|((sums, ys), t)| {
            embed_norm_sums(ys, e, t.first, &norm, &pool_grad(t.sample), sums)
        });
    let sums = sum_tiles(&partials, 2 * e);
    let (dbeta, dgamma) = sums.split_at(e);
    let (m1, m2) = mean_terms(&normaliser, dbeta, dgamma, rows);
    let scale: Vec<f32> = norm
        .gamma
        .iter()
        .zip(&normaliser.inv_std)
        .map(|(g, s)| g * s)
        .collect();
    let grad = NormGrad {
        scale: &scale,
        inv_std: &normaliser.inv_std,
        mean: &normaliser.mean,
        m1: &m1,
        m2: &m2,
        batch_stats: normaliser.batch_stats,
    };
    tile_chunks(&mut y, e, tiles)
        .into_par_iter()
        .zip(tiles)
        .for_each(|(ys, t)| embed_input_grads(ys, e, t.first, &norm, &pool_grad(t.sample), &grad));
    let dy = MatRef::new(&y, rows, e, e);
    if let Some(g) = grads {
        add_norm_grads(&embed.norm, g, dbeta, dgamma);
        matmul(
            Site::WeightGrad,
            MatMut::new(embed.linear.weight.of_mut(g), e, width, width),
            dy.t(),
            MatRef::new(joined, rows, width, width),
            true,
            Threads::Pool,
        );
    }
    let mut djoined = Spare::reused(rows * width);
    matmul(
        Site::InputGrad,
        MatMut::new(&mut djoined, rows, width, width),
        dy,
        MatRef::new(embed.linear.weight.of(params), e, width, width),
        false,
        Threads::Pool,
    );
    djoined
}
