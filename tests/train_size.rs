//! The size-aware head: two part types that differ only in size are told apart with the
//! size inputs, and cannot be without them.
//!
//! The generator's M8 and M12 nuts are not such a pair: they follow ISO 4032, whose
//! proportions differ with the size (height over width across flats about 0.52 for M8, 0.60
//! for M12), so shape alone tells them apart in part. Here the pair is made exact: every
//! scan of an M12 nut once as it is and once with every coordinate halved. Halving is exact
//! in floating point and every distance the clean-up uses is derived from the measured point
//! spacing, so both copies give the same prepared cloud and differ only in their size
//! features (by ln 2).

mod train_common;

use std::path::{Path, PathBuf};

use partsift::learn::{evaluate_on, scan_bin, train_on, CancelToken, Dataset, TrainSettings};
use partsift::net::Arch;
use partsift::scan::write::{write_ply, PlyEncoding};
use partsift::scan::{self, LoadOptions, PointCloud};
use partsift::synth::{write_parts_bin, PartType};
use train_common::{small_sensor, TempDir};

/// A bin of `big/` (M12 nut scans, in mm) and `small/` (the same scans at half size).
fn size_only_bin(root: &Path, per_type: usize, seed: u64) -> PathBuf {
    let generated = root.join("generated");
    write_parts_bin(&generated, per_type, seed, &small_sensor()).unwrap();
    let nuts = generated.join(PartType::HexNutM12.name());
    let mut scans: Vec<PathBuf> = std::fs::read_dir(&nuts)
        .unwrap()
        .map(|e| e.unwrap().path())
        .collect();
    scans.sort();
    let bin = root.join("bin");
    for (folder, scale) in [("big", 1.0f32), ("small", 0.5)] {
        std::fs::create_dir_all(bin.join(folder)).unwrap();
        for (i, path) in scans.iter().enumerate() {
            let mm = scan::load(path, &LoadOptions::default())
                .unwrap()
                .cloud_mm();
            let scaled = PointCloud::from_positions(
                mm.positions.iter().map(|p| p.map(|c| c * scale)).collect(),
            );
            let out = bin.join(folder).join(format!("nut_{i:02}.ply"));
            write_ply(&out, &scaled, PlyEncoding::BinaryLe).unwrap();
        }
    }
    std::fs::remove_dir_all(&generated).unwrap();
    bin
}

#[test]
fn size_inputs_tell_apart_types_that_differ_only_in_size() {
    let dir = TempDir::new("train-size");
    let train_bin = size_only_bin(&dir.join("train"), 16, 41);
    let test_bin = size_only_bin(&dir.join("test"), 8, 42);
    let accuracy = |size_aware: bool| -> f64 {
        let plan = TrainSettings {
            // PointNet keeps the test short; the size branch is the same in every architecture.
            arch: Arch::PointNet,
            size_aware,
            epochs: 10,
            batch_size: 8,
            seed: 5,
            ..TrainSettings::default()
        }
        .check()
        .unwrap();
        let prepare = |root: &Path| {
            Dataset::prepare(
                &scan_bin(root).unwrap(),
                plan.recipe(),
                None,
                &|_| {},
                &CancelToken::new(),
            )
            .unwrap()
        };
        let (train, test) = (prepare(&train_bin), prepare(&test_bin));
        let run = train_on(&train, &plan, &|_| {}, &CancelToken::new()).unwrap();
        let result = evaluate_on(&run.model, &test).unwrap();
        println!(
            "size_aware {size_aware}: test accuracy {}",
            result.evaluation.metrics.accuracy
        );
        result.evaluation.metrics.accuracy
    };
    let with_size = accuracy(true);
    let without = accuracy(false);
    // 16 test scans, 8 pairs of one cloud at two sizes. Without the size inputs both copies of
    // a pair look the same to the network, so it gets one of each pair right: 0.5 exactly.
    assert!(with_size >= 0.875, "with size inputs: {with_size}");
    assert!(without <= 0.5625, "without size inputs: {without}");
}
