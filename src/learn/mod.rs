//! Training on a parts bin: scans on disk, split, augmentation, the train loop, metrics.

mod augment;
mod bin;
mod cache;
mod calibrate;
mod metrics;
mod split;

pub use augment::Augmentation;
pub use bin::{
    scan_bin, BinError, BinWarning, LabelledScan, MoveRecord, PartsBin, SkipReason,
    IMBALANCE_RATIO, MIN_SCANS_PER_TYPE, SET_ASIDE_FOLDER,
};
pub use cache::{CacheKey, PreparedCache, CACHE_ENV, CACHE_FORMAT_VERSION};
pub use calibrate::{
    fit_temperature, review_threshold, Calibration, CalibrationError, HoldoutScores,
    DEFAULT_TARGET_PRECISION,
};
pub use metrics::{
    ConfusionMatrix, Evaluation, LabelOutOfRange, Metrics, Misclassified, ScanOutcome, TypeScores,
};
pub use split::{holdout_split, HoldoutShareError, Split, DEFAULT_HOLDOUT};
