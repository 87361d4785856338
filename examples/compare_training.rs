//! Trains one model on a parts bin with settings the command line does not offer (optimiser,
//! size inputs on or off, batch size, patience) and scores it on a separate test bin: how the
//! choices behind the defaults were compared.
//!
//! ```text
//! cargo run --release --no-default-features --example compare_training -- \
//!     TRAIN_BIN TEST_BIN [--optimizer sgd|adam] [--no-size] [--preset quick|full]
//!     [--arch edgeconv|pointnet|gcn] [--epochs N] [--batch N] [--patience N] [--seed S]
//!     [--no-augment] [--max-turn-deg D] [--max-dropout F] [--no-facing]
//! ```
//! Prints one line per epoch on standard error and one JSON object on standard output.

use std::path::PathBuf;
use std::str::FromStr;
use std::time::Instant;

use partsift::learn::{
    evaluate, scan_bin, train, Augmentation, CancelToken, PreparedCache, TrainEvent, TrainSettings,
};

fn main() -> Result<(), Box<dyn std::error::Error>> {
    let mut args = std::env::args().skip(1);
    let train_bin = PathBuf::from(args.next().ok_or("give the training bin")?);
    let test_bin = PathBuf::from(args.next().ok_or("give the test bin")?);
    let mut settings = TrainSettings::default();
    while let Some(flag) = args.next() {
        let mut value = || args.next().ok_or(format!("{flag} needs a value"));
        match flag.as_str() {
            "--optimizer" => settings.optimizer = FromStr::from_str(&value()?)?,
            "--no-size" => settings.size_aware = false,
            "--no-augment" => settings.augmentation = Augmentation::NONE,
            "--max-turn-deg" => {
                settings.augmentation.max_turn = value()?.parse::<f32>()?.to_radians()
            }
            "--max-dropout" => settings.augmentation.max_dropout = value()?.parse()?,
            "--no-facing" => settings.recipe.face_long_side = false,
            "--preset" => settings.preset = FromStr::from_str(&value()?)?,
            "--arch" => settings.arch = FromStr::from_str(&value()?)?,
            "--epochs" => settings.epochs = value()?.parse()?,
            "--batch" => settings.batch_size = value()?.parse()?,
            "--patience" => settings.patience = value()?.parse()?,
            "--seed" => settings.seed = value()?.parse()?,
            other => return Err(format!("unknown option {other}").into()),
        }
    }
    let described = format!(
        "{} {} {} size_aware={} batch={} augment={} max_turn_deg={:.0} max_dropout={} facing={}",
        settings.arch,
        settings.preset,
        settings.optimizer.name(),
        settings.size_aware,
        settings.batch_size,
        settings.augmentation != Augmentation::NONE,
        settings.augmentation.max_turn.to_degrees(),
        settings.augmentation.max_dropout,
        settings.recipe.face_long_side,
    );
    let plan = settings.check()?;
    let cache = PreparedCache::at_default_location();
    let started = Instant::now();
    let show = |e: TrainEvent| {
        if let TrainEvent::EpochDone {
            epoch,
            train_loss,
            train_accuracy,
            holdout_accuracy,
            seconds,
            ..
        } = e
        {
            eprintln!(
                "epoch {epoch:>3}  loss {train_loss:.3}  train {train_accuracy:.3}  \
                 holdout {holdout_accuracy:.3}  {seconds:.1} s"
            );
        }
    };
    let prepare_started = Instant::now();
    let bin = scan_bin(&train_bin)?;
    let run = train(&bin, &plan, cache.as_ref(), &show, &CancelToken::new())?;
    let train_seconds = started.elapsed().as_secs_f64();
    let summary = run.model.summary().ok_or("no summary")?;
    let test = evaluate(
        &run.model,
        &scan_bin(&test_bin)?,
        cache.as_ref(),
        &|_| {},
        &CancelToken::new(),
    )?;
    let line = serde_json::json!({
        "settings": described,
        "epochs_run": summary.epochs_run,
        "best_epoch": summary.best_epoch,
        "holdout_accuracy": summary.holdout_accuracy,
        "test_accuracy": test.evaluation.metrics.accuracy,
        "test_balanced_accuracy": test.evaluation.metrics.balanced_accuracy,
        "part_types": test.evaluation.metrics.part_types,
        "test_confusion": test.evaluation.metrics.confusion,
        "skipped_scans": run.skipped.len() + test.skipped.len(),
        "temperature": run.model.calibration().temperature(),
        "review_threshold": run.model.calibration().review_threshold(),
        "seconds_with_preparation": train_seconds,
        "seconds_per_epoch": summary_seconds_per_epoch(&run, prepare_started),
    });
    println!("{line}");
    Ok(())
}

/// Mean epoch time, from the wall time of the run less nothing: the epochs' own times are
/// only in the events, so this is the run's time divided by its epochs (an upper bound).
fn summary_seconds_per_epoch(run: &partsift::learn::TrainRun, since: Instant) -> f64 {
    let epochs = run.model.summary().map_or(1, |s| s.epochs_run.max(1));
    since.elapsed().as_secs_f64() / epochs as f64
}
