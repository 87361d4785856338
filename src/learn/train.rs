//! The train loop: settings checked once ([`TrainSettings::check`] gives a [`TrainPlan`]), a
//! stratified holdout split, augmented batches, the best model on holdout kept, early stop,
//! calibration on the holdout scores of the kept model, progress as [`TrainEvent`]s and a
//! [`CancelToken`] that stops the run and keeps the best model so far.

use std::time::Instant;

use serde::{Deserialize, Serialize};

use crate::learn::augment::Augmentation;
use crate::learn::bin::PartsBin;
use crate::learn::cache::PreparedCache;
use crate::learn::calibrate::{Calibration, HoldoutScores, DEFAULT_TARGET_PRECISION};
use crate::learn::dataset::{Dataset, DatasetError, SkippedScan, SIZE_FEATURES};
use crate::learn::metrics::ScanOutcome;
use crate::learn::model::TrainedModel;
use crate::learn::progress::{CancelToken, EtaEstimator, TrainEvent};
use crate::learn::split::{holdout_split, HoldoutShareError, DEFAULT_HOLDOUT};
use crate::learn::views::mirror_averaged_scores;
use crate::net::{
    cosine_lr, smoothed_cross_entropy, Arch, NetConfig, Network, Optimizer, OptimizerKind, Preset,
};
use crate::prep::{Recipe, RecipeError, RecipeSettings};
use crate::rng::Rng;
use crate::verdict::softmax;

/// How to train, as a user (command line, app) sets it. Turn it into a [`TrainPlan`] with
/// [`TrainSettings::check`]; the trainer only takes the checked plan.
#[derive(Clone, Debug, PartialEq)]
pub struct TrainSettings {
    pub arch: Arch,
    pub preset: Preset,
    /// The part's true size (mm) joins the network's features, so types of the same shape
    /// and different size (an M8 and an M12 nut) can be told apart.
    pub size_aware: bool,
    pub optimizer: OptimizerKind,
    /// Most epochs (1 to 10,000); the learning rate follows a cosine from the optimiser's
    /// start to its end over them.
    pub epochs: usize,
    /// Scans per batch (2 to 1,024; batch norm needs two). An epoch's batches are made as
    /// even as possible, so none has fewer than two scans.
    pub batch_size: usize,
    /// Stop when this many epochs in a row (1 or more) gave no better model on holdout.
    pub patience: usize,
    /// Label smoothing of the loss, in [0, 1) (DGCNN's code uses 0.2).
    pub label_smoothing: f32,
    /// Share of each type's scans held out, in (0, 1).
    pub holdout: f64,
    /// Seeds the split, the weights, the batches, the augmentation and dropout.
    pub seed: u64,
    /// Applied to the training scans only, drawn anew each epoch.
    pub augmentation: Augmentation,
    /// Precision the review threshold aims for among `sure` holdout verdicts, in (0, 1].
    pub target_precision: f64,
    /// The clean-up recipe. Its `points` is replaced by the preset's, the network's input size.
    pub recipe: RecipeSettings,
}

impl Default for TrainSettings {
    fn default() -> Self {
        TrainSettings {
            arch: Arch::EdgeConv,
            preset: Preset::Quick,
            size_aware: true,
            optimizer: OptimizerKind::Adam,
            epochs: 40,
            batch_size: 16,
            patience: 10,
            label_smoothing: 0.2,
            holdout: DEFAULT_HOLDOUT,
            seed: 1,
            augmentation: Augmentation::default(),
            target_precision: DEFAULT_TARGET_PRECISION,
            recipe: RecipeSettings::default(),
        }
    }
}

/// A train setting with a value that cannot work.
#[derive(Clone, Debug, PartialEq, thiserror::Error)]
pub enum TrainSettingsError {
    #[error("train setting `{setting}` is {value}: expected {expected}")]
    OutOfRange {
        /// The field name, as in [`TrainSettings`] (`augmentation.max_turn` for a field of
        /// the augmentation).
        setting: &'static str,
        value: String,
        expected: &'static str,
    },
    #[error(transparent)]
    Recipe(#[from] RecipeError),
}

fn check_range<T: PartialOrd + std::fmt::Display>(
    setting: &'static str,
    value: T,
    inside: impl FnOnce(&T) -> bool,
    expected: &'static str,
) -> Result<(), TrainSettingsError> {
    if inside(&value) {
        Ok(())
    } else {
        Err(TrainSettingsError::OutOfRange {
            setting,
            value: value.to_string(),
            expected,
        })
    }
}

impl TrainSettings {
    /// Checks every value and returns the plan, or the first setting that cannot work.
    pub fn check(self) -> Result<TrainPlan, TrainSettingsError> {
        let s = &self;
        check_range(
            "epochs",
            s.epochs,
            |v| (1..=10_000).contains(v),
            "1 to 10000",
        )?;
        check_range(
            "batch_size",
            s.batch_size,
            |v| (2..=1024).contains(v),
            "2 to 1024",
        )?;
        check_range("patience", s.patience, |&v| v >= 1, "1 or more")?;
        check_range(
            "label_smoothing",
            s.label_smoothing,
            |v| (0.0..1.0).contains(v),
            "0 or more and below 1",
        )?;
        check_range(
            "holdout",
            s.holdout,
            |&v| v > 0.0 && v < 1.0,
            "above 0 and below 1",
        )?;
        check_range(
            "target_precision",
            s.target_precision,
            |&v| v > 0.0 && v <= 1.0,
            "above 0 and at most 1",
        )?;
        let a = &s.augmentation;
        let pi = std::f32::consts::PI;
        check_range(
            "augmentation.max_turn",
            a.max_turn,
            |v| (0.0..=pi).contains(v),
            "0 to pi radians",
        )?;
        check_range(
            "augmentation.scale_jitter",
            a.scale_jitter,
            |v| (0.0..0.5).contains(v),
            "0 or more and below 0.5",
        )?;
        for (setting, value) in [
            ("augmentation.max_shift", a.max_shift),
            ("augmentation.jitter_sigma", a.jitter_sigma),
            ("augmentation.jitter_clip", a.jitter_clip),
        ] {
            check_range(setting, value, |v| (0.0..=0.5).contains(v), "0 to 0.5")?;
        }
        check_range(
            "augmentation.max_dropout",
            a.max_dropout,
            |v| (0.0..1.0).contains(v),
            "0 or more and below 1",
        )?;
        let recipe = RecipeSettings {
            points: s.preset.points(),
            ..s.recipe.clone()
        }
        .check()?;
        Ok(TrainPlan {
            settings: self,
            recipe,
        })
    }
}

/// Checked train settings: every value in range, and the recipe checked with the preset's
/// points. Made by [`TrainSettings::check`].
#[derive(Clone, Debug, PartialEq)]
pub struct TrainPlan {
    settings: TrainSettings,
    recipe: Recipe,
}

impl TrainPlan {
    pub fn settings(&self) -> &TrainSettings {
        &self.settings
    }

    /// The recipe every scan is cleaned with (points = the preset's).
    pub fn recipe(&self) -> &Recipe {
        &self.recipe
    }
}

/// Why a run ended.
#[derive(Clone, Copy, Debug, PartialEq, Eq, Serialize, Deserialize)]
#[serde(rename_all = "kebab-case")]
pub enum RunEnd {
    /// Every epoch ran.
    Completed,
    /// Holdout stopped improving for `patience` epochs.
    EarlyStop,
    /// The user stopped it.
    Cancelled,
    /// The loss stopped being a finite number (a learning rate too high for the data).
    Diverged,
}

/// One epoch's numbers. Accuracies are shares in [0, 1]; losses are mean cross-entropies
/// (the train loss with label smoothing, on augmented scans in training mode; the holdout
/// loss without, in evaluation mode).
#[derive(Clone, Debug, PartialEq, Serialize, Deserialize)]
pub struct EpochRecord {
    /// 1-based.
    pub epoch: usize,
    pub train_loss: f32,
    pub train_accuracy: f32,
    pub holdout_loss: f32,
    pub holdout_accuracy: f32,
}

/// How a model was trained: kept in the model file. No paths outside the bin and no times,
/// so the same run gives the same file on any machine.
#[derive(Clone, Debug, PartialEq, Serialize, Deserialize)]
pub struct TrainingSummary {
    pub optimizer: OptimizerKind,
    pub epochs: usize,
    pub batch_size: usize,
    pub patience: usize,
    pub label_smoothing: f32,
    pub holdout_share: f64,
    pub seed: u64,
    pub ended: RunEnd,
    pub epochs_run: usize,
    /// The epoch (1-based) whose model was kept.
    pub best_epoch: usize,
    pub holdout_accuracy: f32,
    /// Training and holdout scans of each part type, in the model's order.
    pub train_scans: Vec<usize>,
    pub holdout_scans: Vec<usize>,
    /// Scans left out because they could not be read or prepared, relative to the bin.
    pub skipped_scans: Vec<String>,
    pub history: Vec<EpochRecord>,
}

/// What a training run gives back.
#[derive(Clone, Debug)]
pub struct TrainRun {
    /// The best model on holdout, calibrated on the holdout split.
    pub model: TrainedModel,
    /// The kept model's verdicts on the holdout scans (calibrated confidence): the honest
    /// confusion matrix, with [`crate::learn::Evaluation::new`] and the model's part types.
    pub holdout: Vec<ScanOutcome>,
    /// Scans left out because they could not be read or prepared.
    pub skipped: Vec<SkippedScan>,
}

#[derive(Debug, thiserror::Error, PartialEq)]
pub enum TrainError {
    #[error(transparent)]
    Dataset(#[from] DatasetError),
    #[error("the run was stopped before its first epoch ended: no model to keep")]
    CancelledBeforeFirstEpoch,
    #[error(
        "too few scans to train: {train} to train on and {holdout} to hold out (a part type \
         needs at least 2 scans to give one to each side)"
    )]
    TooFewScans { train: usize, holdout: usize },
    #[error(
        "the training loss stopped being a finite number in epoch 1: try another optimiser or seed"
    )]
    DivergedInFirstEpoch,
    #[error("the scans were prepared with another recipe than the plan's")]
    RecipeMismatch,
    #[error(transparent)]
    Holdout(#[from] HoldoutShareError),
}

/// Prepares the scans of `bin` (see [`Dataset::prepare`]) and trains on them with
/// [`train_on`]. `on_event` hears every step of both, in order; see [`TrainEvent`].
pub fn train(
    bin: &PartsBin,
    plan: &TrainPlan,
    cache: Option<&PreparedCache>,
    on_event: &(dyn Fn(TrainEvent) + Sync),
    cancel: &CancelToken,
) -> Result<TrainRun, TrainError> {
    let dataset = Dataset::prepare(bin, plan.recipe(), cache, on_event, cancel)?;
    train_on(&dataset, plan, on_event, cancel)
}

/// Epochs of the learning-rate schedule of the network: the work of one training run.
struct Trainer<'a> {
    dataset: &'a Dataset,
    settings: &'a TrainSettings,
    train: Vec<usize>,
    holdout_labels: Vec<usize>,
    holdout_points: Vec<f32>,
    holdout_sizes: Vec<f32>,
}

/// The model of the best epoch so far.
struct Best {
    network: Network,
    record: EpochRecord,
    holdout_logits: Vec<f32>,
}

/// Trains on a prepared dataset (which must have been prepared with `plan.recipe()`).
///
/// Each type's scans are split into train and holdout ([`holdout_split`], seeded by the
/// plan); each epoch shuffles the training scans, augments them afresh and takes one
/// optimiser step per batch at the epoch's learning rate (cosine annealing per epoch, as
/// DGCNN's code does), re-estimates the batch-norm statistics on clean training scans, then
/// scores the holdout scans in evaluation mode. The best epoch is
/// the one with the highest holdout accuracy, ties going to the lower holdout loss; the run
/// stops early after `patience` epochs without a better one. The kept model is calibrated on
/// its holdout scores ([`Calibration::fit`]).
///
/// `on_event` hears one `EpochDone` per epoch, then `EarlyStop` or `Cancelled` when the run
/// ended before its last epoch, and `Finished` last. `cancel` is checked before every batch;
/// a part-done epoch is dropped and the best model of the finished epochs kept.
///
/// Deterministic: the same dataset, plan and rayon thread count give the same model, bit for
/// bit.
///
/// Errors: fewer than 2 scans to train on or none to hold out; cancelled or diverged before
/// the first epoch ended; a dataset prepared with another recipe.
pub fn train_on(
    dataset: &Dataset,
    plan: &TrainPlan,
    on_event: &(dyn Fn(TrainEvent) + Sync),
    cancel: &CancelToken,
) -> Result<TrainRun, TrainError> {
    let started = Instant::now();
    let s = plan.settings();
    if dataset.recipe_fingerprint() != plan.recipe().fingerprint() {
        return Err(TrainError::RecipeMismatch);
    }
    let labels = dataset.labels();
    let split = holdout_split(&labels, s.holdout, s.seed)?;
    if split.train.len() < 2 || split.holdout.is_empty() {
        return Err(TrainError::TooFewScans {
            train: split.train.len(),
            holdout: split.holdout.len(),
        });
    }
    let (holdout_points, holdout_sizes) = dataset.gather(&split.holdout);
    let trainer = Trainer {
        dataset,
        settings: s,
        holdout_labels: split.holdout.iter().map(|&i| labels[i]).collect(),
        train: split.train.clone(),
        holdout_points,
        holdout_sizes,
    };
    let classes = dataset.part_types().len();
    let mut rng = Rng::new(s.seed);
    let config = NetConfig {
        arch: s.arch,
        preset: s.preset,
        classes,
        size_aware: s.size_aware,
    };
    let mut network = Network::new(config, rng.next_u64());
    let mut optimizer = Optimizer::new(s.optimizer, &network);
    let mut eta = EtaEstimator::new(s.epochs);
    let mut best: Option<Best> = None;
    let mut history = Vec::new();
    let mut ended = RunEnd::Completed;

    for epoch in 0..s.epochs {
        let epoch_started = Instant::now();
        let lr = cosine_lr(s.optimizer.base_lr(), s.optimizer.min_lr(), epoch, s.epochs);
        let mut epoch_rng = rng.fork(epoch as u64);
        let Some((train_loss, train_accuracy)) =
            trainer.run_epoch(&mut network, &mut optimizer, lr, &mut epoch_rng, cancel)
        else {
            ended = RunEnd::Cancelled;
            on_event(TrainEvent::Cancelled);
            break;
        };
        trainer.refresh_statistics(&mut network, &mut epoch_rng);
        let logits =
            mirror_averaged_scores(&network, &trainer.holdout_points, &trainer.holdout_sizes);
        if !train_loss.is_finite() || logits.iter().any(|z| !z.is_finite()) {
            ended = RunEnd::Diverged;
            break;
        }
        let record = EpochRecord {
            epoch: epoch + 1,
            train_loss,
            train_accuracy,
            holdout_loss: smoothed_cross_entropy(&logits, &trainer.holdout_labels, classes, 0.0),
            holdout_accuracy: accuracy(&logits, &trainer.holdout_labels, classes),
        };
        let is_best = best.as_ref().is_none_or(|b| {
            (record.holdout_accuracy, -record.holdout_loss)
                > (b.record.holdout_accuracy, -b.record.holdout_loss)
        });
        let seconds = epoch_started.elapsed().as_secs_f64();
        on_event(TrainEvent::EpochDone {
            epoch: epoch + 1,
            epochs: s.epochs,
            train_loss,
            train_accuracy,
            holdout_accuracy: record.holdout_accuracy,
            seconds: seconds as f32,
            eta_seconds: eta.step_done(seconds) as f32,
            best: is_best,
        });
        history.push(record.clone());
        if is_best {
            best = Some(Best {
                network: network.clone(),
                record,
                holdout_logits: logits,
            });
        }
        let best_epoch = best.as_ref().map_or(0, |b| b.record.epoch);
        if epoch + 1 < s.epochs && epoch + 1 - best_epoch >= s.patience {
            ended = RunEnd::EarlyStop;
            on_event(TrainEvent::EarlyStop { epoch: epoch + 1 });
            break;
        }
    }

    let Some(best) = best else {
        return Err(match ended {
            RunEnd::Diverged => TrainError::DivergedInFirstEpoch,
            _ => TrainError::CancelledBeforeFirstEpoch,
        });
    };
    let holdout_scores = HoldoutScores::new(&best.holdout_logits, &trainer.holdout_labels, classes);
    // Cannot fail: the shapes are the network's, the logits were checked finite and the
    // target precision by `check`; the uncalibrated default sends everything to review.
    let calibration = holdout_scores
        .and_then(|h| Calibration::fit(&h, s.target_precision))
        .unwrap_or_default();
    let holdout = holdout_outcomes(
        dataset,
        &split.holdout,
        &best.holdout_logits,
        classes,
        &calibration,
    );
    let count = |indices: &[usize]| {
        let mut counts = vec![0; classes];
        for &i in indices {
            counts[labels[i]] += 1;
        }
        counts
    };
    let summary = TrainingSummary {
        optimizer: s.optimizer,
        epochs: s.epochs,
        batch_size: s.batch_size,
        patience: s.patience,
        label_smoothing: s.label_smoothing,
        holdout_share: s.holdout,
        seed: s.seed,
        ended,
        epochs_run: history.len(),
        best_epoch: best.record.epoch,
        holdout_accuracy: best.record.holdout_accuracy,
        train_scans: count(&split.train),
        holdout_scans: count(&split.holdout),
        skipped_scans: dataset
            .skipped()
            .iter()
            .map(|skipped| dataset.relative_path(&skipped.path))
            .collect(),
        history,
    };
    on_event(TrainEvent::Finished {
        epochs_run: summary.epochs_run,
        best_epoch: summary.best_epoch,
        holdout_accuracy: summary.holdout_accuracy,
        seconds: started.elapsed().as_secs_f32(),
    });
    Ok(TrainRun {
        model: TrainedModel::new(
            best.network,
            dataset.part_types().to_vec(),
            plan.recipe().clone(),
            calibration,
            Some(summary),
        ),
        holdout,
        skipped: dataset.skipped().to_vec(),
    })
}

impl Trainer<'_> {
    /// One pass over the training scans; returns the mean train loss and accuracy, or `None`
    /// when `cancel` was set before a batch.
    fn run_epoch(
        &self,
        network: &mut Network,
        optimizer: &mut Optimizer,
        lr: f32,
        rng: &mut Rng,
        cancel: &CancelToken,
    ) -> Option<(f32, f32)> {
        let s = self.settings;
        let classes = network.config().classes;
        let mut order = self.train.clone();
        rng.shuffle(&mut order);
        let (mut points, mut sizes) = (Vec::new(), Vec::new());
        let mut labels = Vec::with_capacity(s.batch_size);
        let (mut loss_sum, mut correct) = (0.0f64, 0usize);
        for batch in even_batches(&order, s.batch_size) {
            if cancel.is_cancelled() {
                return None;
            }
            points.clear();
            sizes.clear();
            labels.clear();
            for &i in batch {
                let start = points.len();
                points.extend_from_slice(self.dataset.points_of(i));
                let mut size = [0.0f32; 4];
                size.copy_from_slice(self.dataset.size_of(i));
                s.augmentation.apply(&mut points[start..], &mut size, rng);
                sizes.extend_from_slice(&size);
                labels.push(self.dataset.scans()[i].label);
            }
            let out = network.train_batch(&points, &sizes, &labels, s.label_smoothing, rng);
            optimizer.step(network, lr);
            loss_sum += out.loss as f64 * batch.len() as f64;
            correct += hits(&out.logits, &labels, classes);
        }
        let n = order.len() as f64;
        Some(((loss_sum / n) as f32, (correct as f64 / n) as f32))
    }
}

/// Training scans whose clean clouds re-estimate the batch-norm statistics after each epoch:
/// enough for stable averages, few enough to cost a fraction of an epoch (a forward pass of
/// 128 scans; our choice, not measured against other counts).
const REFRESH_SCANS: usize = 128;

impl Trainer<'_> {
    /// Re-estimates the batch-norm statistics on up to [`REFRESH_SCANS`] training scans
    /// (drawn from `rng`), clean and without dropout, in batches as in training; see
    /// [`Network::refresh_running_statistics`] for why.
    fn refresh_statistics(&self, network: &mut Network, rng: &mut Rng) {
        let mut chosen = self.train.clone();
        rng.shuffle(&mut chosen);
        chosen.truncate(REFRESH_SCANS);
        let (points, sizes) = self.dataset.gather(&chosen);
        let per_scan = self.dataset.points_per_scan() * 3;
        let mut batches = Vec::new();
        let mut start = 0;
        for batch in even_batches(&chosen, self.settings.batch_size) {
            let end = start + batch.len();
            batches.push((
                &points[start * per_scan..end * per_scan],
                &sizes[start * SIZE_FEATURES..end * SIZE_FEATURES],
            ));
            start = end;
        }
        network.refresh_running_statistics(&batches);
    }
}

/// `items` cut into `ceil(len / batch_size)` consecutive batches whose sizes differ by at most
/// one, so that with at least two items and `batch_size >= 2` no batch has fewer than two.
fn even_batches(items: &[usize], batch_size: usize) -> impl Iterator<Item = &[usize]> {
    let count = items.len().div_ceil(batch_size.max(1));
    let (base, extra) = (
        items.len().checked_div(count).unwrap_or(0),
        items.len().checked_rem(count).unwrap_or(0),
    );
    let mut start = 0;
    (0..count).map(move |b| {
        let len = base + usize::from(b < extra);
        let batch = &items[start..start + len];
        start += len;
        batch
    })
}

/// Index of the largest score in each row (the first of equals).
fn argmax_rows(logits: &[f32], classes: usize) -> impl Iterator<Item = usize> + '_ {
    logits
        .chunks_exact(classes)
        .map(|row| (0..row.len()).fold(0, |top, c| if row[c] > row[top] { c } else { top }))
}

fn hits(logits: &[f32], labels: &[usize], classes: usize) -> usize {
    argmax_rows(logits, classes)
        .zip(labels)
        .filter(|(p, &l)| *p == l)
        .count()
}

fn accuracy(logits: &[f32], labels: &[usize], classes: usize) -> f32 {
    if labels.is_empty() {
        0.0
    } else {
        hits(logits, labels, classes) as f32 / labels.len() as f32
    }
}

/// The verdicts behind the holdout logits, calibrated.
fn holdout_outcomes(
    dataset: &Dataset,
    holdout: &[usize],
    logits: &[f32],
    classes: usize,
    calibration: &Calibration,
) -> Vec<ScanOutcome> {
    let mut probabilities = vec![0.0; classes];
    holdout
        .iter()
        .zip(logits.chunks_exact(classes))
        .map(|(&i, row)| {
            // The logits were checked finite, so softmax cannot fail.
            let predicted =
                softmax(row, calibration.temperature(), &mut probabilities).unwrap_or(0);
            ScanOutcome {
                path: dataset.scans()[i].path.clone(),
                truth: dataset.scans()[i].label,
                predicted,
                confidence: probabilities[predicted],
            }
        })
        .collect()
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn even_batches_cover_everything_with_no_tiny_batch() {
        let items: Vec<usize> = (0..33).collect();
        let sizes: Vec<usize> = even_batches(&items, 16).map(<[usize]>::len).collect();
        assert_eq!(sizes, [11, 11, 11]);
        let sizes: Vec<usize> = even_batches(&items[..17], 16).map(<[usize]>::len).collect();
        assert_eq!(sizes, [9, 8]);
        let joined: Vec<usize> = even_batches(&items, 5).flatten().copied().collect();
        assert_eq!(joined, items);
        assert_eq!(even_batches(&items[..2], 16).count(), 1);
        assert_eq!(even_batches(&[], 16).count(), 0);
    }

    #[test]
    fn accuracy_counts_the_top_score() {
        let logits = [0.1, 0.9, 2.0, -1.0, 0.5, 0.5];
        assert_eq!(hits(&logits, &[1, 0, 0], 2), 3);
        assert_eq!(accuracy(&logits, &[0, 0, 1], 2), 1.0 / 3.0);
        assert_eq!(accuracy(&[], &[], 2), 0.0);
    }

    /// Each rejected value, one at a time.
    #[test]
    fn every_bad_setting_is_refused_by_name() {
        let refused = |change: fn(&mut TrainSettings)| -> String {
            let mut s = TrainSettings::default();
            change(&mut s);
            match s.check() {
                Err(TrainSettingsError::OutOfRange { setting, .. }) => setting.to_owned(),
                Err(TrainSettingsError::Recipe(e)) => format!("recipe.{}", e.setting),
                Ok(_) => "accepted".to_owned(),
            }
        };
        type Change = fn(&mut TrainSettings);
        let cases: [(Change, &str); 20] = [
            (|s| s.epochs = 0, "epochs"),
            (|s| s.epochs = 10_001, "epochs"),
            (|s| s.batch_size = 1, "batch_size"),
            (|s| s.batch_size = 1025, "batch_size"),
            (|s| s.patience = 0, "patience"),
            (|s| s.label_smoothing = 1.0, "label_smoothing"),
            (|s| s.label_smoothing = -0.1, "label_smoothing"),
            (|s| s.label_smoothing = f32::NAN, "label_smoothing"),
            (|s| s.holdout = 0.0, "holdout"),
            (|s| s.holdout = 1.0, "holdout"),
            (|s| s.target_precision = 0.0, "target_precision"),
            (|s| s.target_precision = 1.01, "target_precision"),
            (|s| s.augmentation.max_turn = 4.0, "augmentation.max_turn"),
            (
                |s| s.augmentation.scale_jitter = 0.5,
                "augmentation.scale_jitter",
            ),
            (
                |s| s.augmentation.max_shift = -0.01,
                "augmentation.max_shift",
            ),
            (
                |s| s.augmentation.jitter_sigma = f32::INFINITY,
                "augmentation.jitter_sigma",
            ),
            (
                |s| s.augmentation.jitter_clip = 0.6,
                "augmentation.jitter_clip",
            ),
            (
                |s| s.augmentation.max_dropout = 1.0,
                "augmentation.max_dropout",
            ),
            (|s| s.recipe.stray_neighbours = 1, "recipe.stray_neighbours"),
            (
                |s| s.recipe.ransac_iterations = 0,
                "recipe.ransac_iterations",
            ),
        ];
        for (change, setting) in cases {
            assert_eq!(refused(change), setting);
        }
        // The edges that are allowed.
        let accepted: [Change; 6] = [
            |s| s.epochs = 1,
            |s| s.batch_size = 2,
            |s| s.label_smoothing = 0.0,
            |s| s.target_precision = 1.0,
            |s| s.augmentation = Augmentation::NONE,
            // The preset's points replace the recipe's, whatever they were.
            |s| s.recipe.points = 0,
        ];
        for change in accepted {
            assert_eq!(refused(change), "accepted");
        }
        let plan = TrainSettings {
            preset: Preset::Full,
            ..TrainSettings::default()
        }
        .check()
        .unwrap();
        assert_eq!(plan.recipe().points(), 1024);
    }
}
