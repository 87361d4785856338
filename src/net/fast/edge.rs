//! The element-wise passes of one EdgeConv layer on the fast path, for one tile of points (or
//! one sample). Notation: for point `i` and its `t`-th neighbour `j = nb(i, t)`, the edge's
//! value before batch norm is `y = a_i + b_j` with `a = x (W_a - W_b)^T` and `b = x W_b^T`
//! (`W = [W_a W_b]` is the layer's `C x 2C_in` weight), made by one product per batch in
//! `ab` (`N x 2C` per sample: the row of point `i` is `[a_i b_i]`). The edges themselves are
//! never stored: their statistics, the winning neighbour per output value and every gradient
//! come from `a`, `b` and the neighbour lists.
//!
//! Batch norm and LeakyReLU are monotone per channel, increasing where the batch norm scale
//! `gamma / sigma` is positive and decreasing where it is negative, so the maximum over a
//! point's edges is reached where `b_j` is largest (or smallest); both are tracked, and the
//! sign picks one once the batch's statistics are known. A zero scale makes all edges equal,
//! and the first one wins, as in the plain layer.

use crate::net::fast::simd::vectorised;

/// How the winner of a channel is chosen, from the sign of its batch-norm scale.
pub(crate) const PICK_MAX: u8 = 0;
pub(crate) const PICK_MIN: u8 = 1;
pub(crate) const PICK_FIRST: u8 = 2;

/// The layer's batch norm as the passes use it: `z = gamma (y - mean) inv_std + beta`.
pub(crate) struct Affine<'a> {
    pub mean: &'a [f32],
    pub inv_std: &'a [f32],
    pub gamma: &'a [f32],
    pub beta: &'a [f32],
    pub slope: f32,
}

/// Scratch of one thread: per-channel accumulators (six rows of `C`) and, for the backward
/// pass of one sample, `N x C` sums and `N` counts.
#[derive(Default)]
pub(crate) struct EdgeScratch {
    lanes: Vec<f32>,
    incoming: Vec<f32>,
    degree: Vec<f32>,
}

/// The forward edge pass over the points `first..first + rows` of one sample (`rows =
/// max_slot.len() / c`): for every point and channel, which neighbour slot has the largest and
/// the smallest `b_j` (the first of equals), and, when `stats` is given, adds to it per channel
/// `[sum of M2_i, sum of mean_i, sum of mean_i^2]` (3 C values), where `mean_i` and `M2_i` are
/// the mean and the sum of squared deviations of `y` over the point's `k` edges. The sums of
/// squares are taken about `b_i` (the point's own value) in f32 and the rest in f64: the
/// edges of a point are its neighbours and lie close, so nothing cancels.
///
/// Panics if the slices do not fit the shapes.
#[allow(clippy::too_many_arguments)]
pub(crate) fn scan_edges(
    ab: &[f32],
    neighbours: &[u32],
    c: usize,
    k: usize,
    first: usize,
    max_slot: &mut [u8],
    min_slot: &mut [u8],
    stats: Option<&mut [f64]>,
    scratch: &mut EdgeScratch,
) {
    assert!(k > 0 && k <= 256, "neighbour slots must fit in a byte");
    let rows = max_slot.len() / c.max(1);
    assert_eq!(min_slot.len(), rows * c);
    assert!(neighbours.len() >= (first + rows) * k);
    scratch.lanes.resize(6 * c, 0.0);
    scan_edges_kernel(
        ab,
        &neighbours[first * k..(first + rows) * k],
        c,
        k,
        first,
        max_slot,
        min_slot,
        stats,
        &mut scratch.lanes,
    );
}

vectorised! {
    fn scan_edges_kernel(
        ab: &[f32],
        neighbours: &[u32],
        c: usize,
        k: usize,
        first: usize,
        max_slot: &mut [u8],
        min_slot: &mut [u8],
        stats: Option<&mut [f64]>,
        lanes: &mut [f32],
    ) {
        let (mx, rest) = lanes.split_at_mut(c);
        let (mn, rest) = rest.split_at_mut(c);
        let (mxs, rest) = rest.split_at_mut(c);
        let (mns, rest) = rest.split_at_mut(c);
        let (sd, sq) = rest.split_at_mut(c);
        let sq = &mut sq[..c];
        let mut stats = stats;
        for (r, nb) in neighbours.chunks_exact(k).enumerate() {
            let i = first + r;
            let row_i = &ab[i * 2 * c..(i + 1) * 2 * c];
            let (ai, bi) = row_i.split_at(c);
            let j0 = nb[0] as usize;
            let b0 = &ab[j0 * 2 * c + c..(j0 + 1) * 2 * c];
            for ch in 0..c {
                let v = b0[ch];
                let d = v - bi[ch];
                mx[ch] = v;
                mn[ch] = v;
                mxs[ch] = 0.0;
                mns[ch] = 0.0;
                sd[ch] = d;
                sq[ch] = d * d;
            }
            for (t, &j) in nb.iter().enumerate().skip(1) {
                let j = j as usize;
                let bj = &ab[j * 2 * c + c..(j + 1) * 2 * c];
                let tf = t as f32;
                for ch in 0..c {
                    let v = bj[ch];
                    let d = v - bi[ch];
                    sd[ch] += d;
                    sq[ch] += d * d;
                    let up = v > mx[ch];
                    mx[ch] = if up { v } else { mx[ch] };
                    mxs[ch] = if up { tf } else { mxs[ch] };
                    let down = v < mn[ch];
                    mn[ch] = if down { v } else { mn[ch] };
                    mns[ch] = if down { tf } else { mns[ch] };
                }
            }
            let out = r * c..(r + 1) * c;
            for ((o, &s), (p, &q)) in max_slot[out.clone()]
                .iter_mut()
                .zip(mxs.iter())
                .zip(min_slot[out].iter_mut().zip(mns.iter()))
            {
                *o = s as u8;
                *p = q as u8;
            }
            if let Some(stats) = stats.as_deref_mut() {
                let (m2s, rest) = stats.split_at_mut(c);
                let (means, mean_squares) = rest.split_at_mut(c);
                let kd = k as f64;
                for ch in 0..c {
                    let (s, q) = (sd[ch] as f64, sq[ch] as f64);
                    let mean = ai[ch] as f64 + bi[ch] as f64 + s / kd;
                    m2s[ch] += q - s * s / kd;
                    means[ch] += mean;
                    mean_squares[ch] += mean * mean;
                }
            }
        }
    }
}

/// The per-channel mean and biased variance over all `count` edges of the batch from the sums
/// of [`scan_edges`] over all its points (`points` of them, `k` edges each).
pub(crate) fn edge_moments(
    sums: &[f64],
    c: usize,
    points: usize,
    k: usize,
) -> (Vec<f64>, Vec<f64>) {
    let (m2s, rest) = sums.split_at(c);
    let (means, mean_squares) = rest.split_at(c);
    let p = points as f64;
    let count = p * k as f64;
    let mean: Vec<f64> = means.iter().map(|s| s / p).collect();
    // Sum over edges of (y - mu)^2 = sum_i M2_i + k sum_i (mean_i - mu)^2.
    let var = (0..c)
        .map(|ch| {
            let between = mean_squares[ch] - means[ch] * means[ch] / p;
            ((m2s[ch] + k as f64 * between) / count).max(0.0)
        })
        .collect();
    (mean, var)
}

/// How each channel picks its winner, from the sign of `gamma * inv_std`.
pub(crate) fn picks(gamma: &[f32]) -> Vec<u8> {
    // inv_std > 0 always, so the sign of gamma decides.
    gamma
        .iter()
        .map(|&g| {
            if g > 0.0 {
                PICK_MAX
            } else if g < 0.0 {
                PICK_MIN
            } else {
                PICK_FIRST
            }
        })
        .collect()
}

vectorised! {
    /// The layer's output for the points `first..` of one sample: per point and channel the
    /// winning slot (into `max_slot`, which then holds the winners) and
    /// `LeakyReLU(BN(a_i + b_winner))` into `out` (rows `out_stride` apart, `c` values each).
    pub(crate) fn finish_edges(
        ab: &[f32],
        neighbours: &[u32],
        c: usize,
        k: usize,
        first: usize,
        max_slot: &mut [u8],
        min_slot: &[u8],
        picks: &[u8],
        norm: &Affine<'_>,
        out: &mut [f32],
        out_stride: usize,
    ) {
        let rows = max_slot.len() / c.max(1);
        for r in 0..rows {
            let i = first + r;
            let nb = &neighbours[i * k..(i + 1) * k];
            let ai = &ab[i * 2 * c..i * 2 * c + c];
            let slots = &mut max_slot[r * c..(r + 1) * c];
            let lows = &min_slot[r * c..(r + 1) * c];
            let o = &mut out[r * out_stride..r * out_stride + c];
            for ch in 0..c {
                let w = match picks[ch] {
                    PICK_MAX => slots[ch],
                    PICK_MIN => lows[ch],
                    _ => 0,
                };
                slots[ch] = w;
                let j = nb[w as usize] as usize;
                let y = ai[ch] + ab[j * 2 * c + c + ch];
                let z = norm.gamma[ch] * ((y - norm.mean[ch]) * norm.inv_std[ch]) + norm.beta[ch];
                o[ch] = if z > 0.0 { z } else { norm.slope * z };
            }
        }
    }
}

vectorised! {
    /// Backward, first pass, for the points `first..` of one sample: the gradient at each
    /// winning edge before batch norm, `g = dL/dout * LeakyReLU'(z)`, into the first `c`
    /// values of each row of `dab` (`2c` a row); adds `[sum g, sum g x_hat]` per channel
    /// (2 C values: batch norm's `dbeta` and `dgamma`) into `sums`.
    pub(crate) fn winner_grads(
        ab: &[f32],
        neighbours: &[u32],
        winners: &[u8],
        c: usize,
        k: usize,
        first: usize,
        dout: &[f32],
        dout_stride: usize,
        norm: &Affine<'_>,
        dab: &mut [f32],
        sums: &mut [f64],
    ) {
        let rows = winners.len() / c.max(1);
        let (dbeta, dgamma) = sums.split_at_mut(c);
        for r in 0..rows {
            let i = first + r;
            let nb = &neighbours[i * k..(i + 1) * k];
            let ai = &ab[i * 2 * c..i * 2 * c + c];
            let ws = &winners[r * c..(r + 1) * c];
            let d = &dout[r * dout_stride..r * dout_stride + c];
            let g = &mut dab[r * 2 * c..r * 2 * c + c];
            for ch in 0..c {
                let j = nb[ws[ch] as usize] as usize;
                let y = ai[ch] + ab[j * 2 * c + c + ch];
                let x_hat = (y - norm.mean[ch]) * norm.inv_std[ch];
                let z = norm.gamma[ch] * x_hat + norm.beta[ch];
                let v = if z > 0.0 { d[ch] } else { norm.slope * d[ch] };
                g[ch] = v;
                dbeta[ch] += v as f64;
                dgamma[ch] += v as f64 * x_hat as f64;
            }
        }
    }
}

/// Batch norm's backward terms shared by all edges: `dy_e = scale (dz_e - m1 - x_hat_e m2)`.
pub(crate) struct NormGrad<'a> {
    /// `gamma * inv_std`.
    pub scale: &'a [f32],
    pub inv_std: &'a [f32],
    pub mean: &'a [f32],
    /// `mean(dz)` and `mean(dz x_hat)` over the batch's edges (zero in evaluation mode).
    pub m1: &'a [f32],
    pub m2: &'a [f32],
    /// Whether the batch's own statistics normalised (then the mean terms apply).
    pub batch_stats: bool,
}

/// Backward, second pass, for one whole sample: turns `dab` (first half of each row: `g` from
/// [`winner_grads`]) into `[dL/da_i dL/db_i]`, where
/// `dL/da_i = sum over i's edges of dy` and `dL/db_j = sum over the edges ending at j of dy`.
/// Summed in point order, so the result does not depend on threads.
#[allow(clippy::too_many_arguments)]
pub(crate) fn edge_input_grads(
    ab: &[f32],
    neighbours: &[u32],
    winners: &[u8],
    c: usize,
    k: usize,
    grad: &NormGrad<'_>,
    dab: &mut [f32],
    scratch: &mut EdgeScratch,
) {
    let n = winners.len() / c.max(1);
    scratch.incoming.clear();
    scratch.incoming.resize(n * c, 0.0);
    scratch.degree.clear();
    scratch.degree.resize(n, 0.0);
    scratch.lanes.resize(c, 0.0);
    edge_input_grads_kernel(
        ab,
        neighbours,
        winners,
        c,
        k,
        grad,
        dab,
        &mut scratch.incoming,
        &mut scratch.degree,
        &mut scratch.lanes[..c],
    );
}

vectorised! {
    fn edge_input_grads_kernel(
        ab: &[f32],
        neighbours: &[u32],
        winners: &[u8],
        c: usize,
        k: usize,
        grad: &NormGrad<'_>,
        dab: &mut [f32],
        incoming: &mut [f32],
        degree: &mut [f32],
        gathered: &mut [f32],
    ) {
        let n = winners.len() / c.max(1);
        // dL/db_j starts as the sum of g over the winning edges that end at j.
        for row in dab.chunks_exact_mut(2 * c) {
            row[c..].fill(0.0);
        }
        for i in 0..n {
            let nb = &neighbours[i * k..(i + 1) * k];
            for ch in 0..c {
                let j = nb[winners[i * c + ch] as usize] as usize;
                let g = dab[i * 2 * c + ch];
                dab[j * 2 * c + c + ch] += g;
            }
        }
        let (scale, inv, mean, m1, m2) = (grad.scale, grad.inv_std, grad.mean, grad.m1, grad.m2);
        if !grad.batch_stats {
            for row in dab.chunks_exact_mut(2 * c) {
                let (da, db) = row.split_at_mut(c);
                for ch in 0..c {
                    da[ch] *= scale[ch];
                    db[ch] *= scale[ch];
                }
            }
            return;
        }
        // With batch statistics every edge gets the mean terms: dL/da_i needs the sum of
        // x_hat over i's edges, k (a_i - mu) + sum_j b_j, and dL/db_j the sum over the edges
        // ending at j, sum_i a_i + deg_j (b_j - mu).
        let kd = k as f64;
        for i in 0..n {
            let nb = &neighbours[i * k..(i + 1) * k];
            let ai = &ab[i * 2 * c..i * 2 * c + c];
            gathered.fill(0.0);
            for &j in nb {
                let j = j as usize;
                let bj = &ab[j * 2 * c + c..(j + 1) * 2 * c];
                let into = &mut incoming[j * c..(j + 1) * c];
                for ch in 0..c {
                    gathered[ch] += bj[ch];
                    into[ch] += ai[ch];
                }
                degree[j] += 1.0;
            }
            let da = &mut dab[i * 2 * c..i * 2 * c + c];
            for ch in 0..c {
                let centred = kd * (ai[ch] as f64 - mean[ch] as f64) + gathered[ch] as f64;
                let x_hat_sum = (centred * inv[ch] as f64) as f32;
                da[ch] = scale[ch] * (da[ch] - k as f32 * m1[ch] - m2[ch] * x_hat_sum);
            }
        }
        for j in 0..n {
            let deg = degree[j];
            let bj = &ab[j * 2 * c + c..(j + 1) * 2 * c];
            let into = &incoming[j * c..(j + 1) * c];
            let db = &mut dab[j * 2 * c + c..(j + 1) * 2 * c];
            for ch in 0..c {
                let centred = into[ch] as f64 + deg as f64 * (bj[ch] as f64 - mean[ch] as f64);
                let x_hat_sum = (centred * inv[ch] as f64) as f32;
                db[ch] = scale[ch] * (db[ch] - deg * m1[ch] - m2[ch] * x_hat_sum);
            }
        }
    }
}
