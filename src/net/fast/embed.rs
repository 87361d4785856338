//! The element-wise passes of the embedding layer on the fast path (a shared linear layer
//! over the joined EdgeConv outputs, batch norm, LeakyReLU, then max and mean pooling over the
//! points of each cloud), for one tile of rows. The linear part is one product per batch; the
//! rest is fused here so that the activations are never stored: the backward pass makes them
//! again from the layer's input to batch norm.

use crate::net::fast::edge::{Affine, NormGrad};
use crate::net::fast::simd::vectorised;

vectorised! {
    /// Adds `[sum y, sum y^2]` per channel (2 `e` values, f64) over the rows of `y` (`e` a row).
    pub(crate) fn column_moments(y: &[f32], e: usize, sums: &mut [f64]) {
        let (s1, s2) = sums.split_at_mut(e);
        let s2 = &mut s2[..e];
        for row in y.chunks_exact(e) {
            for ch in 0..e {
                let v = row[ch] as f64;
                s1[ch] += v;
                s2[ch] += v * v;
            }
        }
    }
}

/// The layer's batch norm and LeakyReLU of `y` at channel `ch` (slices cut to the width, so
/// that the loops over channels have no bounds checks).
#[inline(always)]
fn activation(y: f32, ch: usize, norm: &Affine<'_>) -> (f32, f32, f32) {
    let x_hat = (y - norm.mean[ch]) * norm.inv_std[ch];
    let z = norm.gamma[ch] * x_hat + norm.beta[ch];
    (if z > 0.0 { z } else { norm.slope * z }, z, x_hat)
}

/// `norm` with every slice cut to `e` values.
fn cut<'a>(norm: &Affine<'a>, e: usize) -> Affine<'a> {
    Affine {
        mean: &norm.mean[..e],
        inv_std: &norm.inv_std[..e],
        gamma: &norm.gamma[..e],
        beta: &norm.beta[..e],
        slope: norm.slope,
    }
}

vectorised! {
    /// Pooling over the rows of one tile (`y`: the layer's values before batch norm, `e` a
    /// row, the first being row `first` of its cloud): per channel the largest activation and
    /// its row (the first of equals) into `max` and `arg`, and the sum of activations into `sum`.
    pub(crate) fn pool_tile(
        y: &[f32],
        e: usize,
        first: usize,
        norm: &Affine<'_>,
        max: &mut [f32],
        arg: &mut [u32],
        sum: &mut [f32],
    ) {
        let norm = cut(norm, e);
        let (max, arg, sum) = (&mut max[..e], &mut arg[..e], &mut sum[..e]);
        let mut rows = y.chunks_exact(e);
        let Some(row) = rows.next() else { return };
        for ch in 0..e {
            let a = activation(row[ch], ch, &norm).0;
            max[ch] = a;
            arg[ch] = first as u32;
            sum[ch] = a;
        }
        for (r, row) in rows.enumerate() {
            let at = (first + 1 + r) as u32;
            for ch in 0..e {
                let a = activation(row[ch], ch, &norm).0;
                let up = a > max[ch];
                max[ch] = if up { a } else { max[ch] };
                arg[ch] = if up { at } else { arg[ch] };
                sum[ch] += a;
            }
        }
    }
}

/// The gradients the pooling sends to one row: `dmax` to the winning row, `dmean / N` to all.
pub(crate) struct PoolGrad<'a> {
    pub winners: &'a [u32],
    pub dmax: &'a [f32],
    /// `dL/dmean / N`.
    pub dmean: &'a [f32],
}

/// `pool` with every slice cut to `e` values.
fn cut_pool<'a>(pool: &PoolGrad<'a>, e: usize) -> PoolGrad<'a> {
    PoolGrad {
        winners: &pool.winners[..e],
        dmax: &pool.dmax[..e],
        dmean: &pool.dmean[..e],
    }
}

/// `dL/dz` at row `at`, channel `ch`, and the row's `x_hat`.
#[inline(always)]
fn dz_at(y: f32, at: u32, ch: usize, norm: &Affine<'_>, pool: &PoolGrad<'_>) -> (f32, f32) {
    let (_, z, x_hat) = activation(y, ch, norm);
    let dact = if pool.winners[ch] == at {
        pool.dmax[ch] + pool.dmean[ch]
    } else {
        pool.dmean[ch]
    };
    let dz = if z > 0.0 { dact } else { norm.slope * dact };
    (dz, x_hat)
}

vectorised! {
    /// Backward, first pass, over one tile: adds `[sum dz, sum dz x_hat]` per channel (batch
    /// norm's `dbeta` and `dgamma`) into `sums`.
    pub(crate) fn embed_norm_sums(
        y: &[f32],
        e: usize,
        first: usize,
        norm: &Affine<'_>,
        pool: &PoolGrad<'_>,
        sums: &mut [f64],
    ) {
        let (norm, pool) = (cut(norm, e), cut_pool(pool, e));
        let (dbeta, dgamma) = sums.split_at_mut(e);
        let dgamma = &mut dgamma[..e];
        for (r, row) in y.chunks_exact(e).enumerate() {
            let at = (first + r) as u32;
            for ch in 0..e {
                let (dz, x_hat) = dz_at(row[ch], at, ch, &norm, &pool);
                dbeta[ch] += dz as f64;
                dgamma[ch] += dz as f64 * x_hat as f64;
            }
        }
    }
}

vectorised! {
    /// Backward, second pass, over one tile: replaces `y` by `dL/dy = scale (dz - m1 - x_hat m2)`.
    pub(crate) fn embed_input_grads(
        y: &mut [f32],
        e: usize,
        first: usize,
        norm: &Affine<'_>,
        pool: &PoolGrad<'_>,
        grad: &NormGrad<'_>,
    ) {
        let (norm, pool) = (cut(norm, e), cut_pool(pool, e));
        let (scale, m1, m2) = (&grad.scale[..e], &grad.m1[..e], &grad.m2[..e]);
        for (r, row) in y.chunks_exact_mut(e).enumerate() {
            let at = (first + r) as u32;
            for ch in 0..e {
                let (dz, x_hat) = dz_at(row[ch], at, ch, &norm, &pool);
                row[ch] = scale[ch] * (dz - m1[ch] - x_hat * m2[ch]);
            }
        }
    }
}
