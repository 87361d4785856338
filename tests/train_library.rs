//! The train loop, the model file and classification through the library, on small generated
//! parts bins: reproducible bytes, cancel keeps the best model, early stop, events in order,
//! a saved model gives the same verdicts, saliency, evaluation of a bin with an unknown type.

mod train_common;

use std::fs;
use std::path::Path;
use std::sync::Mutex;

use partsift::learn::{
    evaluate_on, scan_bin, train, train_on, values_on_input, CancelToken, Dataset, ModelError,
    PreparedCache, RunEnd, TrainError, TrainEvent, TrainPlan, TrainSettings, TrainedModel,
};
use partsift::net::{Arch, NetConfig, Network, Preset};
use partsift::prep::Fate;
use partsift::scan::{self, LoadOptions};
use partsift::synth::PartType;
use train_common::{generated_bin, TempDir, DISTINCT};

fn plan(epochs: usize, seed: u64) -> TrainPlan {
    TrainSettings {
        epochs,
        seed,
        batch_size: 4,
        ..TrainSettings::default()
    }
    .check()
    .unwrap()
}

fn in_pool<T: Send>(threads: usize, job: impl FnOnce() -> T + Send) -> T {
    rayon::ThreadPoolBuilder::new()
        .num_threads(threads)
        .build()
        .unwrap()
        .install(job)
}

fn tiny_dataset(dir: &TempDir, per_type: usize) -> Dataset {
    let root = generated_bin(&dir.join("bin"), &DISTINCT, per_type, 11);
    let bin = scan_bin(&root).unwrap();
    let cache = PreparedCache::new(dir.join("cache"));
    Dataset::prepare(
        &bin,
        plan(1, 1).recipe(),
        Some(&cache),
        &|_| {},
        &CancelToken::new(),
    )
    .unwrap()
}

#[test]
fn same_seed_data_and_threads_give_the_same_model_file_byte_for_byte() {
    let dir = TempDir::new("train-bytes");
    let dataset = tiny_dataset(&dir, 4);
    let save = |seed: u64, name: &str| {
        let run = in_pool(2, || {
            train_on(&dataset, &plan(2, seed), &|_| {}, &CancelToken::new()).unwrap()
        });
        let path = dir.join(name);
        run.model.save(&path).unwrap();
        fs::read(path).unwrap()
    };
    let first = save(5, "a.safetensors");
    assert_eq!(first, save(5, "b.safetensors"), "same seed, other bytes");
    assert_ne!(first, save(6, "c.safetensors"), "another seed, same bytes");
}

#[test]
fn events_come_in_order_and_cancel_keeps_the_best_model_so_far() {
    let dir = TempDir::new("train-cancel");
    let root = generated_bin(&dir.join("bin"), &DISTINCT, 4, 11);
    let bin = scan_bin(&root).unwrap();
    let cache = PreparedCache::new(dir.join("cache"));
    let cancel = CancelToken::new();
    let events = Mutex::new(Vec::new());
    // Stop as soon as the second epoch is done: the third never finishes.
    let listen = |e: TrainEvent| {
        if matches!(e, TrainEvent::EpochDone { epoch: 2, .. }) {
            cancel.cancel();
        }
        events.lock().unwrap().push(e);
    };
    let run = train(&bin, &plan(10, 2), Some(&cache), &listen, &cancel).unwrap();
    let summary = run.model.summary().unwrap();
    assert_eq!(summary.ended, RunEnd::Cancelled);
    assert_eq!(summary.epochs_run, 2);
    assert!((1..=2).contains(&summary.best_epoch));
    assert_eq!(
        summary.train_scans.iter().sum::<usize>() + summary.holdout_scans.iter().sum::<usize>(),
        12
    );
    assert_eq!(
        run.holdout.len(),
        summary.holdout_scans.iter().sum::<usize>()
    );

    let events = events.into_inner().unwrap();
    let kinds: Vec<&str> = events
        .iter()
        .map(|e| match e {
            TrainEvent::Preparing { .. } => "preparing",
            TrainEvent::ScanSkipped { .. } => "skipped",
            TrainEvent::EpochDone { .. } => "epoch",
            TrainEvent::EarlyStop { .. } => "early",
            TrainEvent::Cancelled => "cancelled",
            TrainEvent::Finished { .. } => "finished",
        })
        .collect();
    let preparing = 1 + 12;
    assert!(
        kinds[..preparing].iter().all(|k| *k == "preparing"),
        "{kinds:?}"
    );
    assert_eq!(
        kinds[preparing..],
        ["epoch", "epoch", "cancelled", "finished"]
    );
    match events[preparing + 1] {
        TrainEvent::EpochDone {
            epoch,
            epochs,
            eta_seconds,
            ..
        } => assert_eq!((epoch, epochs, eta_seconds > 0.0), (2, 10, true)),
        ref other => panic!("{other:?}"),
    }

    // Cancelled before any epoch: nothing to keep.
    let dataset = Dataset::prepare(
        &bin,
        plan(1, 1).recipe(),
        Some(&cache),
        &|_| {},
        &CancelToken::new(),
    )
    .unwrap();
    let stopped = CancelToken::new();
    stopped.cancel();
    assert_eq!(
        train_on(&dataset, &plan(3, 1), &|_| {}, &stopped).unwrap_err(),
        TrainError::CancelledBeforeFirstEpoch
    );
}

#[test]
fn early_stop_follows_the_patience() {
    let dir = TempDir::new("train-patience");
    let dataset = tiny_dataset(&dir, 4);
    let plan = TrainSettings {
        epochs: 8,
        patience: 1,
        batch_size: 4,
        ..TrainSettings::default()
    }
    .check()
    .unwrap();
    let run = train_on(&dataset, &plan, &|_| {}, &CancelToken::new()).unwrap();
    let s = run.model.summary().unwrap();
    // Either every epoch was a new best, or the run stopped one epoch after the last best.
    match s.ended {
        RunEnd::Completed => assert_eq!((s.epochs_run, s.best_epoch), (8, 8)),
        RunEnd::EarlyStop => assert_eq!(s.epochs_run, s.best_epoch + 1),
        other => panic!("{other:?}"),
    }
    assert_eq!(s.history.len(), s.epochs_run);
    let best = &s.history[s.best_epoch - 1];
    assert_eq!(best.holdout_accuracy, s.holdout_accuracy);
    assert!(s
        .history
        .iter()
        .all(|e| e.holdout_accuracy <= best.holdout_accuracy));
}

#[test]
fn a_saved_model_opens_with_everything_and_gives_the_same_verdicts() {
    let dir = TempDir::new("train-roundtrip");
    let dataset = tiny_dataset(&dir, 4);
    let run = train_on(&dataset, &plan(2, 3), &|_| {}, &CancelToken::new()).unwrap();
    let path = dir.join("model.safetensors");
    run.model.save(&path).unwrap();
    let opened = TrainedModel::open(&path).unwrap();
    // A save that cannot be made names the path and leaves the old file as it was.
    let nowhere = dir.join("no-such-folder").join("model.safetensors");
    let err = run.model.save(&nowhere).unwrap_err();
    assert!(err.to_string().contains("no-such-folder"), "{err}");
    let before = fs::read(&path).unwrap();
    fs::create_dir_all(dir.join("in-the-way")).unwrap();
    assert!(run.model.save(&dir.join("in-the-way")).is_err());
    assert_eq!(fs::read(&path).unwrap(), before);
    assert_eq!(opened.part_types(), run.model.part_types());
    assert_eq!(opened.recipe(), run.model.recipe());
    assert_eq!(opened.calibration(), run.model.calibration());
    assert_eq!(opened.summary(), run.model.summary());
    assert_eq!(
        (opened.arch(), opened.preset(), opened.size_aware()),
        (Arch::EdgeConv, Preset::Quick, true)
    );

    let scan_path = &dataset.scans()[0].path;
    let cloud = scan::load(scan_path, &LoadOptions::default())
        .unwrap()
        .cloud_mm();
    let a = run.model.inspect(&cloud).unwrap();
    let b = opened.inspect(&cloud).unwrap();
    assert_eq!(a.verdict, b.verdict);
    assert_eq!(
        opened.classify_file(scan_path).outcome,
        partsift::verdict::ClassifyOutcome::Verdict(b.verdict.clone())
    );

    // Saliency: one value per prepared point in [0, 1], the top one 1; spread onto the
    // input cloud, points the recipe removed get 0.
    let saliency = opened.saliency(&b, b.class);
    assert_eq!(saliency.len(), b.prepared.points.len());
    assert!(saliency.iter().all(|s| (0.0..=1.0).contains(s)));
    assert!(saliency.contains(&1.0));
    let on_input = values_on_input(&b.prepared, &cloud, &saliency);
    assert_eq!(on_input.len(), cloud.len());
    for (value, fate) in on_input.iter().zip(&b.prepared.fate) {
        if *fate != Fate::Part {
            assert_eq!(*value, 0.0);
        }
    }
    assert!(on_input.iter().any(|&v| v > 0.0));

    // The embedding of every scan, for the map.
    let features = opened.embed(&dataset).unwrap();
    assert_eq!(
        features.len(),
        dataset.len() * opened.network().embedding_width()
    );
}

#[test]
fn model_files_that_cannot_be_used_give_errors_naming_them() {
    let dir = TempDir::new("train-badmodel");
    let missing = dir.join("missing.safetensors");
    let err = TrainedModel::open(&missing).unwrap_err();
    assert!(err.to_string().contains("missing.safetensors"), "{err}");

    // A model file whose recipe holds a value the recipe check refuses.
    let net = Network::new(
        NetConfig {
            arch: Arch::PointNet,
            preset: Preset::Quick,
            classes: 2,
            size_aware: false,
        },
        1,
    );
    let mut recipe = serde_json::to_value(plan(1, 1).recipe()).unwrap();
    let meta = |recipe: serde_json::Value| partsift::net::ModelMeta {
        format_version: 1,
        arch: Arch::PointNet,
        preset: Preset::Quick,
        size_aware: false,
        part_types: vec!["a".into(), "b".into()],
        recipe,
        calibration: partsift::net::Calibration {
            temperature: 1.0,
            review_threshold: 0.9,
        },
        training: serde_json::Value::Null,
    };
    recipe["stray_neighbours"] = 1.into();
    let bad_recipe = dir.join("bad-recipe.safetensors");
    partsift::net::save(&bad_recipe, &net, &meta(recipe.clone())).unwrap();
    let err = TrainedModel::open(&bad_recipe).unwrap_err();
    assert!(matches!(err, ModelError::Unusable { .. }), "{err:?}");
    assert!(
        err.to_string().contains("bad-recipe.safetensors")
            && err.to_string().contains("stray_neighbours"),
        "{err}"
    );

    // A recipe preparing another number of points than the network takes.
    recipe["stray_neighbours"] = 16.into();
    recipe["points"] = 1024.into();
    let other_points = dir.join("points.safetensors");
    partsift::net::save(&other_points, &net, &meta(recipe)).unwrap();
    let err = TrainedModel::open(&other_points).unwrap_err();
    assert!(
        err.to_string().contains("1024") && err.to_string().contains("512"),
        "{err}"
    );

    // Not a model file at all, and a cut-short one.
    let junk = dir.join("junk.safetensors");
    fs::write(&junk, b"these are not the tensors you are looking for").unwrap();
    assert!(TrainedModel::open(&junk)
        .unwrap_err()
        .to_string()
        .contains("junk.safetensors"));
    let bytes = fs::read(&other_points).unwrap();
    let cut = dir.join("cut.safetensors");
    fs::write(&cut, &bytes[..bytes.len() / 2]).unwrap();
    assert!(matches!(TrainedModel::open(&cut), Err(ModelError::File(_))));
}

#[test]
fn evaluation_counts_types_the_model_does_not_know_as_wrong() {
    let dir = TempDir::new("train-unknown");
    let dataset = tiny_dataset(&dir, 4);
    let run = train_on(&dataset, &plan(1, 4), &|_| {}, &CancelToken::new()).unwrap();
    // A bin with one known type and one the model never saw.
    let other = generated_bin(
        &dir.join("other"),
        &[PartType::FlatWasher, PartType::SpurGear],
        2,
        12,
    );
    let other = Dataset::prepare(
        &scan_bin(&other).unwrap(),
        run.model.recipe(),
        None,
        &|_| {},
        &CancelToken::new(),
    )
    .unwrap();
    let result = evaluate_on(&run.model, &other).unwrap();
    assert_eq!(result.unknown_types, ["spur_gear"]);
    let types = &result.evaluation.metrics.part_types;
    assert_eq!(types.len(), 4);
    assert_eq!(types[3], "spur_gear");
    assert_eq!(result.outcomes.len(), 4);
    for o in &result.outcomes {
        if o.truth == 3 {
            assert_ne!(o.predicted, 3);
        }
    }
    assert_eq!(result.evaluation.metrics.per_type[3].recall, 0.0);
    // A dataset prepared with another recipe is refused, not misread.
    let other_recipe = TrainSettings {
        preset: Preset::Full,
        ..TrainSettings::default()
    }
    .check()
    .unwrap();
    let full = Dataset::prepare(
        &scan_bin(&dir.join("other")).unwrap(),
        other_recipe.recipe(),
        None,
        &|_| {},
        &CancelToken::new(),
    )
    .unwrap();
    assert!(evaluate_on(&run.model, &full).is_err());
    assert!(run.model.embed(&full).is_err());
}

#[test]
fn too_few_scans_is_an_error_not_a_panic() {
    let dir = TempDir::new("train-few");
    let root = generated_bin(&dir.join("bin"), &[PartType::HexBolt], 1, 1);
    let bin = scan_bin(Path::new(&root)).unwrap();
    let err = train(&bin, &plan(1, 1), None, &|_| {}, &CancelToken::new()).unwrap_err();
    assert!(
        matches!(
            err,
            TrainError::TooFewScans {
                train: 1,
                holdout: 0
            }
        ),
        "{err}"
    );
}

/// `Network::refresh_running_statistics` (the one addition to the network for training): the
/// running statistics become the size-weighted mean of the batches' statistics, and no
/// parameter changes.
#[test]
fn refreshed_statistics_are_the_size_weighted_mean_of_the_batches() {
    use safetensors::SafeTensors;
    let dir = TempDir::new("train-refresh");
    let config = NetConfig {
        arch: Arch::PointNet,
        preset: Preset::Quick,
        classes: 2,
        size_aware: true,
    };
    let mut rng = partsift::rng::Rng::new(9);
    let mut clouds = |samples: usize| -> (Vec<f32>, Vec<f32>) {
        let points = (0..samples * 512 * 3)
            .map(|_| rng.range(-1.0, 1.0) as f32)
            .collect();
        let sizes = (0..samples * 4)
            .map(|_| rng.range(1.0, 4.0) as f32)
            .collect();
        (points, sizes)
    };
    let (a, b) = (clouds(2), clouds(3));
    let tensors_after = |batches: &[(&[f32], &[f32])], name: &str| {
        let mut net = Network::new(config.clone(), 4);
        net.refresh_running_statistics(batches);
        let meta = partsift::net::ModelMeta {
            format_version: 1,
            arch: config.arch,
            preset: config.preset,
            size_aware: true,
            part_types: vec!["a".into(), "b".into()],
            recipe: serde_json::Value::Null,
            calibration: partsift::net::Calibration {
                temperature: 1.0,
                review_threshold: 1.0,
            },
            training: serde_json::Value::Null,
        };
        let path = dir.join(name);
        partsift::net::save(&path, &net, &meta).unwrap();
        let bytes = fs::read(&path).unwrap();
        let file = SafeTensors::deserialize(&bytes).unwrap();
        let mut tensors: Vec<(String, Vec<f32>)> = file
            .tensors()
            .into_iter()
            .map(|(name, view)| {
                let values = view
                    .data()
                    .chunks_exact(4)
                    .map(|c| f32::from_le_bytes([c[0], c[1], c[2], c[3]]))
                    .collect();
                (name, values)
            })
            .collect();
        tensors.sort_by(|x, y| x.0.cmp(&y.0));
        tensors
    };
    let untouched = tensors_after(&[], "none.safetensors");
    let only_a = tensors_after(&[(&a.0, &a.1)], "a.safetensors");
    let only_b = tensors_after(&[(&b.0, &b.1)], "b.safetensors");
    let both = tensors_after(&[(&a.0, &a.1), (&b.0, &b.1)], "ab.safetensors");
    let mut running = 0;
    for (((none, ra), rb), rab) in untouched.iter().zip(&only_a).zip(&only_b).zip(&both) {
        if none.0.contains("running_") {
            running += 1;
            assert_ne!(ra.1, none.1, "{} did not move", none.0);
            for ((x, y), z) in ra.1.iter().zip(&rb.1).zip(&rab.1) {
                let mean = (2.0 * x + 3.0 * y) / 5.0;
                assert!(
                    (z - mean).abs() <= 1e-5 * (1.0 + mean.abs()),
                    "{}: {z} vs {mean}",
                    none.0
                );
            }
        } else {
            assert_eq!(ra.1, none.1, "parameter {} changed", none.0);
            assert_eq!(rab.1, none.1, "parameter {} changed", none.0);
        }
    }
    assert!(running > 0);
}
