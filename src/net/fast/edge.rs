//! The element-wise passes of one EdgeConv layer on the fast path, for one tile of points (or
//! one sample). Notation: for point `i` and its `t`-th neighbour `j = nb(i, t)`, the edge's
//! value before batch norm is `y = a_i + b_j` with `a = x (W_a - W_b)^T` and `b = x W_b^T`
//! (`W = [W_a W_b]` is the layer's `C x 2C_in` weight), made by one product per batch in
//! `ab` (`N x 2C` per sample: the row of point `i` is `[a_i b_i]`). The edges themselves are
//! never stored: their statistics, the winning neighbour per output value and every gradient
//! come from `a`, `b` and the neighbour lists.
//!
//! Batch norm and LeakyReLU are monotone per channel, increasing where the batch norm scale
//! `gamma / sigma` is positive and decreasing where it is negative (`sigma > 0`, so the sign
//! of `gamma` decides, and it is known before the batch's statistics are), so the maximum
//! over a point's edges is where `sign(gamma) b_j` is largest. A zero scale makes all edges
//! equal, and the first one wins, as in the plain layer.
//!
//! The passes work on [`LANES`] channels at a time, kept in registers while a point's
//! neighbours go by, and on the last `C mod LANES` channels one at a time.

use crate::net::fast::simd::{load, store, vectorised, LANES};

/// The layer's batch norm as the passes use it: `z = gamma (y - mean) inv_std + beta`.
pub(crate) struct Affine<'a> {
    pub mean: &'a [f32],
    pub inv_std: &'a [f32],
    pub gamma: &'a [f32],
    pub beta: &'a [f32],
    pub slope: f32,
}

/// Scratch of one thread: per-channel accumulators and, for the backward pass of one sample,
/// `N x C` sums and `N` counts.
#[derive(Default)]
pub(crate) struct EdgeScratch {
    lanes: Vec<f32>,
    incoming: Vec<f32>,
    degree: Vec<f32>,
}

/// Per channel, the sign of its batch norm scale (`1`, `-1` or `0`): which edge wins.
pub(crate) fn signs(gamma: &[f32]) -> Vec<f32> {
    gamma
        .iter()
        .map(|&g| {
            if g > 0.0 {
                1.0
            } else if g < 0.0 {
                -1.0
            } else {
                0.0
            }
        })
        .collect()
}

/// The forward edge pass over the points `first..first + rows` of one sample (`rows =
/// slots.len() / c`): for every point and channel, which neighbour slot wins (the largest
/// `sign b_j`, the first of equals) into `slots`, and the winning edge's value before batch
/// norm, `a_i + b_winner`, into `y` (`c` a row). When `stats` is given, adds to it per channel
/// `[sum of M2_i, sum of mean_i, sum of mean_i^2]` (3 C values), where `mean_i` and `M2_i`
/// are the mean and the sum of squared deviations of `y` over the point's `k` edges. The sums
/// of squares are taken about `b_i` (the point's own value) in f32 and the rest in f64: the
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
    signs: &[f32],
    slots: &mut [u8],
    y: &mut [f32],
    stats: Option<&mut [f64]>,
    scratch: &mut EdgeScratch,
) {
    assert!(k > 0 && k <= 256, "neighbour slots must fit in a byte");
    let rows = slots.len() / c.max(1);
    assert_eq!(y.len(), rows * c);
    assert_eq!(signs.len(), c);
    assert!(neighbours.len() >= (first + rows) * k);
    assert!(ab.len() >= (first + rows) * 2 * c);
    scratch.lanes.resize(2 * c, 0.0);
    scan_edges_kernel(
        ab,
        &neighbours[first * k..(first + rows) * k],
        c,
        k,
        first,
        signs,
        slots,
        y,
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
        signs: &[f32],
        slots: &mut [u8],
        y: &mut [f32],
        stats: Option<&mut [f64]>,
        lanes: &mut [f32],
    ) {
        let (sd, sq) = lanes.split_at_mut(c);
        let mut stats = stats;
        for (r, nb) in neighbours.chunks_exact(k).enumerate() {
            let i = first + r;
            let row_i = &ab[i * 2 * c..(i + 1) * 2 * c];
            let slot_row = &mut slots[r * c..(r + 1) * c];
            let y_row = &mut y[r * c..(r + 1) * c];
            let mut ch = 0;
            while ch + LANES <= c {
                scan_block::<LANES>(ab, nb, c, ch, row_i, signs, slot_row, y_row, sd, sq);
                ch += LANES;
            }
            while ch < c {
                scan_block::<1>(ab, nb, c, ch, row_i, signs, slot_row, y_row, sd, sq);
                ch += 1;
            }
            if let Some(stats) = stats.as_deref_mut() {
                let (m2s, rest) = stats.split_at_mut(c);
                let (means, mean_squares) = rest.split_at_mut(c);
                let (ai, bi) = row_i.split_at(c);
                let kd = k as f64;
                for (((((m2, m), m_sq), &a), &b), (&s, &q)) in m2s
                    .iter_mut()
                    .zip(means.iter_mut())
                    .zip(mean_squares[..c].iter_mut())
                    .zip(ai)
                    .zip(bi)
                    .zip(sd.iter().zip(sq.iter()))
                {
                    let (s, q) = (s as f64, q as f64);
                    let mean = a as f64 + b as f64 + s / kd;
                    *m2 += q - s * s / kd;
                    *m += mean;
                    *m_sq += mean * mean;
                }
            }
        }
    }
}

/// [`scan_edges_kernel`] for the `W` channels from `ch` of one point: the neighbours go by
/// with the running maximum, its slot and the sums in registers.
#[inline(always)]
#[allow(clippy::too_many_arguments)]
fn scan_block<const W: usize>(
    ab: &[f32],
    nb: &[u32],
    c: usize,
    ch: usize,
    row_i: &[f32],
    signs: &[f32],
    slot_row: &mut [u8],
    y_row: &mut [f32],
    sd: &mut [f32],
    sq: &mut [f32],
) {
    let ai: [f32; W] = load(row_i, ch);
    let bi: [f32; W] = load(row_i, c + ch);
    let sign: [f32; W] = load(signs, ch);
    let b0: [f32; W] = load(ab, nb[0] as usize * 2 * c + c + ch);
    let mut best = [0.0f32; W];
    let mut slot = [0.0f32; W];
    let mut sum = [0.0f32; W];
    let mut sum_sq = [0.0f32; W];
    for l in 0..W {
        let d = b0[l] - bi[l];
        best[l] = sign[l] * b0[l];
        sum[l] = d;
        sum_sq[l] = d * d;
    }
    for (t, &j) in nb.iter().enumerate().skip(1) {
        let bj: [f32; W] = load(ab, j as usize * 2 * c + c + ch);
        let tf = t as f32;
        for l in 0..W {
            let v = bj[l];
            let d = v - bi[l];
            sum[l] += d;
            sum_sq[l] += d * d;
            // Written as maxima rather than selects, which the compiler makes masked stores
            // to memory that the next neighbour's load then waits for. The slot so far is
            // below `t`, so its maximum with `t` (where `v` wins) or 0 is the select.
            let signed = sign[l] * v;
            let up = signed > best[l];
            best[l] = best[l].max(signed);
            slot[l] = slot[l].max(if up { tf } else { 0.0 });
        }
    }
    let mut won = [0u8; W];
    let mut value = [0.0f32; W];
    for l in 0..W {
        won[l] = slot[l] as u8;
        // sign * (sign * b) is b exactly for a sign of 1 or -1; a zero sign keeps the first.
        let b = if sign[l] == 0.0 {
            b0[l]
        } else {
            sign[l] * best[l]
        };
        value[l] = ai[l] + b;
    }
    store(slot_row, ch, won);
    store(y_row, ch, value);
    store(sd, ch, sum);
    store(sq, ch, sum_sq);
}

/// The winning edges' values before batch norm, `a_i + b_winner`, for given winning `slots`
/// (`c` a row, the points `first..` of one sample) into `y`: what [`scan_edges`] gives with
/// winners chosen elsewhere (the tests give the plain layers' own).
pub(crate) fn winner_values(
    ab: &[f32],
    neighbours: &[u32],
    c: usize,
    k: usize,
    first: usize,
    slots: &[u8],
    y: &mut [f32],
) {
    for (r, (ws, ys)) in slots.chunks_exact(c).zip(y.chunks_exact_mut(c)).enumerate() {
        let i = first + r;
        let nb = &neighbours[i * k..(i + 1) * k];
        for (ch, (&w, v)) in ws.iter().zip(ys).enumerate() {
            let j = nb[w as usize] as usize;
            *v = ab[i * 2 * c + ch] + ab[j * 2 * c + c + ch];
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

vectorised! {
    /// The layer's output for the rows of `y` (the winning edges' values before batch norm,
    /// `c` a row): `LeakyReLU(BN(y))` into `out` (rows `out_stride` apart, `c` values each).
    pub(crate) fn finish_edges(y: &[f32], c: usize, norm: &Affine<'_>, out: &mut [f32], out_stride: usize) {
        let (mean, inv_std) = (&norm.mean[..c], &norm.inv_std[..c]);
        let (gamma, beta) = (&norm.gamma[..c], &norm.beta[..c]);
        for (r, ys) in y.chunks_exact(c).enumerate() {
            let o = &mut out[r * out_stride..r * out_stride + c];
            for ch in 0..c {
                let z = gamma[ch] * ((ys[ch] - mean[ch]) * inv_std[ch]) + beta[ch];
                o[ch] = if z > 0.0 { z } else { norm.slope * z };
            }
        }
    }
}

vectorised! {
    /// Backward, first pass, over the rows of `y` (as for [`finish_edges`]): the gradient at
    /// each winning edge before batch norm, `g = dL/dout * LeakyReLU'(z)`, into the first `c`
    /// values of each row of `dab` (`2c` a row); adds `[sum g, sum g x_hat]` per channel
    /// (2 C values: batch norm's `dbeta` and `dgamma`) into `sums`.
    pub(crate) fn winner_grads(
        y: &[f32],
        c: usize,
        dout: &[f32],
        dout_stride: usize,
        norm: &Affine<'_>,
        dab: &mut [f32],
        sums: &mut [f64],
    ) {
        let (mean, inv_std) = (&norm.mean[..c], &norm.inv_std[..c]);
        let (gamma, beta) = (&norm.gamma[..c], &norm.beta[..c]);
        let (dbeta, dgamma) = sums.split_at_mut(c);
        let dgamma = &mut dgamma[..c];
        for (r, ys) in y.chunks_exact(c).enumerate() {
            let d = &dout[r * dout_stride..r * dout_stride + c];
            let g = &mut dab[r * 2 * c..r * 2 * c + c];
            for ch in 0..c {
                let x_hat = (ys[ch] - mean[ch]) * inv_std[ch];
                let z = gamma[ch] * x_hat + beta[ch];
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
    assert_eq!(neighbours.len(), n * k);
    assert_eq!(ab.len(), n * 2 * c);
    assert_eq!(dab.len(), n * 2 * c);
    scratch.incoming.clear();
    scratch.incoming.resize(n * c, 0.0);
    scratch.degree.clear();
    scratch.degree.resize(n, 0.0);
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
    ) {
        let n = winners.len() / c.max(1);
        // dL/db_j starts as the sum of g over the winning edges that end at j.
        for row in dab.chunks_exact_mut(2 * c) {
            row[c..].fill(0.0);
        }
        for (i, (nb, ws)) in neighbours.chunks_exact(k).zip(winners.chunks_exact(c)).enumerate() {
            for (ch, &w) in ws.iter().enumerate() {
                let j = nb[w as usize] as usize;
                let g = dab[i * 2 * c + ch];
                dab[j * 2 * c + c + ch] += g;
            }
        }
        let scale = &grad.scale[..c];
        if !grad.batch_stats {
            for row in dab.chunks_exact_mut(2 * c) {
                for (v, &s) in row.iter_mut().zip(scale.iter().chain(scale)) {
                    *v *= s;
                }
            }
            return;
        }
        // With batch statistics every edge gets the mean terms: dL/da_i needs the sum of
        // x_hat over i's edges, k (a_i - mu) + sum_j b_j, and dL/db_j the sum over the edges
        // ending at j, sum_i a_i + deg_j (b_j - mu).
        for (i, nb) in neighbours.chunks_exact(k).enumerate() {
            let mut ch = 0;
            while ch + LANES <= c {
                gather_block::<LANES>(ab, nb, i, c, ch, grad, dab, incoming);
                ch += LANES;
            }
            while ch < c {
                gather_block::<1>(ab, nb, i, c, ch, grad, dab, incoming);
                ch += 1;
            }
            for &j in nb {
                degree[j as usize] += 1.0;
            }
        }
        let (inv, mean, m1, m2) = (&grad.inv_std[..c], &grad.mean[..c], &grad.m1[..c], &grad.m2[..c]);
        for (j, (row, into)) in dab.chunks_exact_mut(2 * c).zip(incoming.chunks_exact(c)).enumerate() {
            let deg = degree[j];
            let (bj, db) = (&ab[j * 2 * c + c..(j + 1) * 2 * c], &mut row[c..]);
            for ch in 0..c {
                let centred = into[ch] as f64 + deg as f64 * (bj[ch] as f64 - mean[ch] as f64);
                let x_hat_sum = (centred * inv[ch] as f64) as f32;
                db[ch] = scale[ch] * (db[ch] - deg * m1[ch] - m2[ch] * x_hat_sum);
            }
        }
        debug_assert_eq!(degree.len(), n);
    }
}

/// [`edge_input_grads_kernel`]'s pass over point `i`'s edges for the `W` channels from `ch`:
/// sums its neighbours' `b` in registers, adds `a_i` into each neighbour's incoming sum, and
/// finishes `dL/da_i`.
#[inline(always)]
#[allow(clippy::too_many_arguments)]
fn gather_block<const W: usize>(
    ab: &[f32],
    nb: &[u32],
    i: usize,
    c: usize,
    ch: usize,
    grad: &NormGrad<'_>,
    dab: &mut [f32],
    incoming: &mut [f32],
) {
    let ai: [f32; W] = load(ab, i * 2 * c + ch);
    let mut gathered = [0.0f32; W];
    for &j in nb {
        let j = j as usize;
        let bj: [f32; W] = load(ab, j * 2 * c + c + ch);
        let mut into: [f32; W] = load(incoming, j * c + ch);
        for l in 0..W {
            gathered[l] += bj[l];
            into[l] += ai[l];
        }
        store(incoming, j * c + ch, into);
    }
    let (scale, inv): ([f32; W], [f32; W]) = (load(grad.scale, ch), load(grad.inv_std, ch));
    let (mean, m1, m2): ([f32; W], [f32; W], [f32; W]) =
        (load(grad.mean, ch), load(grad.m1, ch), load(grad.m2, ch));
    let mut da: [f32; W] = load(dab, i * 2 * c + ch);
    let kd = nb.len() as f64;
    for l in 0..W {
        let centred = kd * (ai[l] as f64 - mean[l] as f64) + gathered[l] as f64;
        let x_hat_sum = (centred * inv[l] as f64) as f32;
        da[l] = scale[l] * (da[l] - nb.len() as f32 * m1[l] - m2[l] * x_hat_sum);
    }
    store(dab, i * 2 * c + ch, da);
}
