//! k nearest neighbours and radius queries in 3D space, on a kiddo k-d tree.
