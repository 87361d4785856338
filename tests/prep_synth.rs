//! The clean-up recipe with its default settings on the generator's practice scans: once
//! cleaned, a scan holds the part alone (no table, no strays), whatever the part type, the
//! sensor resolution or the units the scan is read in. The generator knows which point is
//! which (its ground-truth labels), so the check needs no judgement.

use partsift::prep::{Fate, PlaneReport, RecipeSettings};
use partsift::scan::PointCloud;
use partsift::synth::{capture_scan, PartType, PointLabel, SensorSettings};

/// `None` when the cleaned scan holds the part alone, else what went wrong.
fn check(part: PartType, seed: u64, settings: &SensorSettings, scale: f32) -> Option<String> {
    let capture = capture_scan(part, seed, settings).expect("valid settings");
    // `scale` reads the same scan as if written in other units, then converted to mm.
    let positions = capture.cloud.positions.iter().map(|p| p.map(|c| c * scale));
    let cloud = PointCloud::from_positions(positions.collect());
    let recipe = RecipeSettings::default().check().expect("default recipe");
    let prepared = recipe.run(&cloud).expect("points to clean");
    let kept_not_part = prepared
        .kept
        .iter()
        .filter(|&&i| capture.labels[i as usize] != PointLabel::Part)
        .count();
    let part_points = capture
        .labels
        .iter()
        .filter(|&&l| l == PointLabel::Part)
        .count();
    let part_kept = prepared
        .fate
        .iter()
        .zip(&capture.labels)
        .filter(|(f, l)| **f == Fate::Part && **l == PointLabel::Part)
        .count();
    let what = format!(
        "{part} seed {seed} at {}x{} px, scale {scale}",
        settings.width_px, settings.height_px
    );
    let kept = prepared.kept.len();
    if let PlaneReport::NotFound { reason } = &prepared.report.plane {
        Some(format!("{what}: no table found ({reason})"))
    } else if !matches!(prepared.report.plane, PlaneReport::Found { .. }) {
        Some(format!("{what}: the table step was off"))
    } else if kept_not_part * 200 > kept {
        Some(format!(
            "{what}: {kept_not_part} of {kept} kept points are table or strays"
        ))
    } else if part_kept * 10 < part_points * 7 {
        // Washers are only a few noise widths thick, so a thin slice of them goes with the table.
        Some(format!(
            "{what}: kept {part_kept} of {part_points} part points"
        ))
    } else {
        None
    }
}

#[test]
fn cleaned_practice_scans_hold_the_part_alone() {
    let bundle = SensorSettings::sample_bundle();
    let full = SensorSettings::default();
    let mut failures = Vec::new();
    for part in PartType::ALL {
        for seed in 0..20 {
            failures.extend(check(part, seed, &bundle, 1.0));
        }
        for seed in 100..104 {
            failures.extend(check(part, seed, &full, 1.0));
        }
    }
    println!("{} failures\n{}", failures.len(), failures.join("\n"));
    // Measured: none of the 216 fail since the generator brings the sensor closer to small
    // parts (distance 8 to 20 part radii). At a fixed 250 to 600 mm, 4 thin washers failed:
    // 1.0 to 1.6 mm thick under 0.24 to 0.54 mm of range noise, so the band that keeps the
    // table's noise off the part also took a quarter of the washer, or read as a cut through it.
    assert!(failures.is_empty(), "{} failures", failures.len());
}

#[test]
fn clean_up_does_not_depend_on_the_units_read() {
    // The same scan read as metres (then converted) or as thousandths: every distance the
    // recipe uses comes from the measured point spacing.
    let bundle = SensorSettings::sample_bundle();
    for part in [PartType::SpurGear, PartType::HexBolt, PartType::FlatWasher] {
        for scale in [0.001, 1000.0] {
            assert_eq!(check(part, 5, &bundle, scale), None);
        }
    }
}
