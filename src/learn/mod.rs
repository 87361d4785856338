//! Training on a parts bin: scans on disk, split, augmentation, the train loop, metrics.
//!
//! Offers, for the command line and the app:
//! - the parts bin: [`scan_bin`] reads `BIN/<part type>/*.ply|*.xyz|*.pcd` into a [`PartsBin`]
//!   (with [`BinWarning`]s about thin or imbalanced types); [`PartsBin::move_scan`] and
//!   [`PartsBin::set_aside`] fix a label on disk and return a [`MoveRecord`] that can be undone;
//! - progress: [`TrainEvent`]s that a run sends, [`CancelToken`] to stop it, [`EtaEstimator`];
//! - results: [`Metrics`] and [`Evaluation`] (the `evaluate --json` shape, and the Review tab's
//!   confusion matrix), [`Calibration`] (temperature and review threshold, kept in the model file).
//!
//! and the parts of the train loop: [`holdout_split`] (stratified, seeded), [`Augmentation`] of a
//! prepared cloud, [`PreparedCache`] (prepared clouds on disk, keyed by file content and recipe),
//! [`Calibration::fit`] on the holdout scores. They are public so that benchmarks and the
//! end-to-end tests can drive them on their own.

mod augment;
mod bin;
mod cache;
mod calibrate;
mod metrics;
mod progress;
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
pub use progress::{CancelToken, EtaEstimator, TrainEvent};
pub use split::{holdout_split, HoldoutShareError, Split, DEFAULT_HOLDOUT};
