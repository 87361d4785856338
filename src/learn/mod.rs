//! Training on a parts bin: scans on disk, split, augmentation, the train loop, metrics.
//!
//! Offers, for the command line and the app:
//! - the parts bin: [`scan_bin`] reads `BIN/<part type>/*.ply|*.xyz|*.pcd` into a [`PartsBin`]
//!   (with [`BinWarning`]s about thin or imbalanced types); [`PartsBin::move_scan`] and
//!   [`PartsBin::set_aside`] fix a label on disk and return a [`MoveRecord`] that can be undone;
//! - progress: [`TrainEvent`]s that a run sends, [`CancelToken`] to stop it, [`EtaEstimator`];
//! - results: [`Metrics`] and [`Evaluation`] (the `evaluate --json` shape, and the Review tab's
//!   confusion matrix), [`Calibration`] (temperature and review threshold, kept in the model file);
//! - teaching: [`TrainSettings`] checked into a [`TrainPlan`], then [`train`] (a parts bin) or
//!   [`train_on`] (a [`Dataset`] already prepared) gives a [`TrainRun`]: the [`TrainedModel`]
//!   (best on holdout, calibrated), its holdout outcomes and the scans skipped;
//! - the model: [`TrainedModel::save`] and [`TrainedModel::open`] (one model file),
//!   [`TrainedModel::inspect`] (one cloud: the prepared scan and its verdict; [`TrainedModel::judge`]
//!   on a cloud already cleaned) with
//!   [`TrainedModel::saliency`] and [`values_on_input`] (which points drove it),
//!   [`TrainedModel::classify_file`] and [`TrainedModel::classify_files`] (rows of
//!   `partsift classify`; [`find_scan_files`] walks folders, [`copy_sorted`] copies scans into
//!   per-type folders), [`evaluate`] / [`evaluate_on`]
//!   (an [`EvaluationRun`]: every scan's outcome and the [`Evaluation`]) and
//!   [`TrainedModel::embed`] (features of every scan) and [`feature_map`] (those features on
//!   two axes, with the likely mislabelled scans marked);
//! - [`Dataset`]: a bin's scans read and cleaned once, in parallel, through the cache.
//!
//! and the parts of the train loop: [`holdout_split`] (stratified, seeded), [`Augmentation`] of a
//! prepared cloud, [`PreparedCache`] (prepared clouds on disk, keyed by file content and recipe),
//! [`Calibration::fit`] on the holdout scores. They are public so that benchmarks and the
//! end-to-end tests can drive them on their own.

mod augment;
mod bin;
mod cache;
mod calibrate;
mod classify;
mod dataset;
mod evaluate;
mod map;
mod metrics;
mod model;
mod progress;
mod split;
mod train;
pub(crate) mod views;

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
pub use classify::{
    copy_sorted, find_scan_files, values_on_input, CopyError, InspectError, Inspection,
    REVIEW_FOLDER,
};
pub use dataset::{Dataset, DatasetError, SkippedScan};
pub use evaluate::{evaluate, evaluate_on, EvaluateError, EvaluationRun};
pub use map::{feature_map, MapPoint, MAP_NEIGHBOURS};
pub use metrics::{
    ConfusionMatrix, Evaluation, LabelOutOfRange, Metrics, Misclassified, ScanOutcome, TypeScores,
};
pub use model::{ModelError, TrainedModel};
pub use progress::{CancelToken, EtaEstimator, TrainEvent};
pub use split::{holdout_split, HoldoutShareError, Split, DEFAULT_HOLDOUT};
pub use train::{
    train, train_on, EpochRecord, RunEnd, TrainError, TrainPlan, TrainRun, TrainSettings,
    TrainSettingsError, TrainingSummary,
};
