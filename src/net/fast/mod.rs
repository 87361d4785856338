//! The fast path of the EdgeConv network: the same function as the plain layers in
//! [`crate::net::layers`] and [`crate::net::trunk`] (which stay, as the test oracle and for
//! the other architectures), computed without ever making the `B x N x k` edge features.
//!
//! - The first linear layer of an EdgeConv is linear in `[x_i, x_j - x_i]`:
//!   `W [x_i; x_j - x_i] = (W_a - W_b) x_i + W_b x_j`, so one product per point (`N x 2C`)
//!   replaces one per edge (`N k x 2 C_in`), and the edges are sums of two rows.
//! - Batch norm's statistics over the edges come from one pass over each point's neighbours;
//!   the maximum over neighbours is where `b_j` is largest (or smallest, for a negative batch
//!   norm scale), and only that neighbour's slot is kept for the backward pass.
//! - Products on the `gemm` crate over whole batches; the element-wise passes compiled for
//!   AVX-512 / AVX2 and picked at run time; tiles of points in parallel over the batch.
//! - The large buffers are kept between passes ([`spare`]) instead of fresh pages each time.
//!
//! Offers [`Kernels`] (which path a [`Network`](crate::net::Network) takes) and
//! [`trunk::forward`] / [`trunk::backward`]; [`gemm`] also serves `partsift bench`.
//! The fast path matches the plain one to about 1e-6 relative (tested to 1e-4); it may order
//! two neighbours or two maxima the other way only where they tie within f32 rounding.

pub(crate) mod edge;
pub(crate) mod embed;
pub(crate) mod gemm;
pub(crate) mod knn;
pub(crate) mod simd;
pub(crate) mod spare;
pub(crate) mod trunk;

#[cfg(test)]
mod tests;

/// Which implementation a network runs on.
#[derive(Clone, Copy, Debug, PartialEq, Eq)]
pub(crate) enum Kernels {
    /// The fast path for EdgeConv; the other architectures run on the plain layers.
    Fast,
    /// The plain layers everywhere (the oracle).
    Plain,
}

/// Most neighbours the fast path takes: a neighbour slot is kept in a byte.
pub(crate) const MAX_K: usize = 256;
