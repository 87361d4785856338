//! k nearest neighbours: in space and in feature space.
