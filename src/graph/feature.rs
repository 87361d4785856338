//! k nearest neighbours in feature space: blocked distance matrix and partial selection.
