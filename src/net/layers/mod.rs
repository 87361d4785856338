//! The layers, each a struct whose `forward` returns its output and a cache, and whose
//! `backward`, right under it, takes that cache and the output's gradient, adds the
//! parameter gradients into a gradient store (when given one) and returns the input's
//! gradient (when asked). All work on [`Batch`](crate::net::batch::Batch)es in parallel
//! over samples.

pub(crate) mod activation;
pub(crate) mod batch_norm;
pub(crate) mod dense;
pub(crate) mod dropout;
pub(crate) mod edge_conv;
pub(crate) mod gather;
pub(crate) mod graph_conv;
pub(crate) mod linear;
pub(crate) mod pool;
