//! k nearest neighbours of every point: in space (kiddo k-d tree) and in feature space of any
//! width (blocked distance matrix).

pub mod feature;
pub mod spatial;
