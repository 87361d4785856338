//! What training tells its listeners (the command line's progress bar, the app's Teach tab), and
//! how they ask it to stop.

use std::path::PathBuf;
use std::sync::atomic::{AtomicBool, Ordering};
use std::sync::Arc;

/// One step of a training run. A run sends, in order: `Preparing` (repeatedly) with any
/// `ScanSkipped` among them, one `EpochDone` per epoch, then `EarlyStop` or `Cancelled` if the
/// run ended before its last epoch, and `Finished` last whenever a model was kept.
#[derive(Clone, Debug, PartialEq)]
pub enum TrainEvent {
    /// `done` of `total` scans are prepared (cleaned, or found in the cache).
    Preparing { done: usize, total: usize },
    /// A scan could not be read or prepared and is left out; `error` names the file and place.
    ScanSkipped { path: PathBuf, error: String },
    /// Epoch `epoch` (1-based) of at most `epochs` is done. Accuracies are shares in [0, 1];
    /// `seconds` is this epoch's wall time, `eta_seconds` the estimated time left if every
    /// epoch runs; `best` is true when this epoch's model is the best on holdout so far (and
    /// so is the one kept).
    EpochDone {
        epoch: usize,
        epochs: usize,
        train_loss: f32,
        train_accuracy: f32,
        holdout_accuracy: f32,
        seconds: f32,
        eta_seconds: f32,
        best: bool,
    },
    /// Holdout accuracy stopped improving; training ended after epoch `epoch`.
    EarlyStop { epoch: usize },
    /// The user asked to stop; the best model so far is kept.
    Cancelled,
    /// The run is over. `best_epoch` is the epoch whose model was kept and `holdout_accuracy`
    /// its accuracy; `seconds` is the whole run's wall time.
    Finished {
        epochs_run: usize,
        best_epoch: usize,
        holdout_accuracy: f32,
        seconds: f32,
    },
}

/// A flag to ask a running job to stop: clones share it, so the app (Stop) or a Ctrl-C handler
/// sets it and the training thread checks it between batches.
#[derive(Clone, Debug, Default)]
pub struct CancelToken(Arc<AtomicBool>);

impl CancelToken {
    pub fn new() -> Self {
        CancelToken::default()
    }

    pub fn cancel(&self) {
        // Relaxed: the flag publishes no other data, and a check one batch late is fine.
        self.0.store(true, Ordering::Relaxed);
    }

    pub fn is_cancelled(&self) -> bool {
        self.0.load(Ordering::Relaxed)
    }
}

/// Estimates the time left from the time the steps so far took, weighting recent steps more
/// (an exponential moving average), so a slow first epoch (caches warming up) fades out.
#[derive(Clone, Debug)]
pub struct EtaEstimator {
    total_steps: usize,
    done_steps: usize,
    seconds_per_step: Option<f64>,
}

/// Weight of the newest step in the average (our choice, no source).
const NEWEST_WEIGHT: f64 = 0.3;

impl EtaEstimator {
    pub fn new(total_steps: usize) -> Self {
        EtaEstimator {
            total_steps,
            done_steps: 0,
            seconds_per_step: None,
        }
    }

    /// Records one finished step that took `seconds` (negative or non-finite values count as
    /// 0) and returns the estimated seconds left for the remaining steps (0 once all are done).
    pub fn step_done(&mut self, seconds: f64) -> f64 {
        let seconds = if seconds.is_finite() {
            seconds.max(0.0)
        } else {
            0.0
        };
        let average = match self.seconds_per_step {
            None => seconds,
            Some(a) => a + NEWEST_WEIGHT * (seconds - a),
        };
        self.seconds_per_step = Some(average);
        self.done_steps += 1;
        self.total_steps.saturating_sub(self.done_steps) as f64 * average
    }
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn steady_steps_give_exact_eta() {
        let mut eta = EtaEstimator::new(10);
        assert_eq!(eta.step_done(2.0), 18.0);
        assert_eq!(eta.step_done(2.0), 16.0);
        for _ in 0..8 {
            eta.step_done(2.0);
        }
        assert_eq!(eta.step_done(2.0), 0.0, "past the end");
    }

    #[test]
    fn a_slow_first_step_fades_out() {
        let mut eta = EtaEstimator::new(100);
        eta.step_done(30.0);
        let mut left = 0.0;
        for _ in 0..40 {
            left = eta.step_done(1.0);
        }
        // 59 steps left at about 1 s each (the first step's excess has shrunk by 0.7^40).
        assert!((left - 59.0).abs() < 0.01, "{left}");
        assert!(eta.step_done(f64::NAN).is_finite());
    }

    #[test]
    fn cancel_is_seen_by_every_clone() {
        let token = CancelToken::new();
        let worker = token.clone();
        assert!(!worker.is_cancelled());
        std::thread::spawn(move || token.cancel()).join().unwrap();
        assert!(worker.is_cancelled());
    }
}
