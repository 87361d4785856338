//! partsift: sorts scanned parts by type.
//!
//! The data flows through the modules in this order:
//! [`scan`] (files to point clouds, mm) -> [`prep`] (the clean-up recipe) ->
//! [`graph`] (k nearest neighbours) -> [`net`] (the edge-convolution network) ->
//! [`learn`] (parts bin, training, metrics) -> [`verdict`] (type, confidence, sure / review).
//! [`synth`] makes practice scans of our own machine-shop parts bin.
//! Nothing here knows about a screen: the desktop app and the command line live in the binary.

pub mod bench;
pub mod fsutil;
pub mod graph;
pub mod learn;
pub mod net;
pub mod prep;
pub mod rng;
pub mod scan;
pub mod synth;
pub mod verdict;
