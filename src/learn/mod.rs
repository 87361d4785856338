//! Training on a parts bin: scans on disk, split, augmentation, the train loop, metrics.
