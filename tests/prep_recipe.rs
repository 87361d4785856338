//! The whole clean-up recipe on simulated tabletop depth-camera scans (tests/prep_scene):
//! the part must come out alone, with its true size, whatever the scale of the scan.

mod prep_scene;

use partsift::prep::{Fate, PlaneReport, Prepared, Recipe, RecipeSettings, Warning};
use partsift::scan::PointCloud;
use prep_scene::{Scan, Scene, Shape, Truth};

fn run(scan: &Scan) -> Prepared {
    Recipe::default()
        .run(&PointCloud::from_positions(scan.points.clone()))
        .unwrap()
}

/// How many points of the given truth ended with the given fate.
fn count(scan: &Scan, out: &Prepared, truth: Truth, fate: Fate) -> usize {
    scan.truth
        .iter()
        .zip(&out.fate)
        .filter(|&(&t, &f)| t == truth && f == fate)
        .count()
}

fn total(scan: &Scan, truth: Truth) -> usize {
    scan.truth.iter().filter(|&&t| t == truth).count()
}

/// The part alone: nearly all of it kept (a slice at its foot goes with the table and a few
/// edge points with the strays), nothing else kept.
fn assert_part_alone(scan: &Scan, out: &Prepared) {
    let part = total(scan, Truth::Part);
    let kept_part = count(scan, out, Truth::Part, Fate::Part);
    assert!(
        kept_part as f64 >= 0.9 * part as f64,
        "kept {kept_part} of {part} part points\n{}",
        out.report
    );
    let kept_table = count(scan, out, Truth::Table, Fate::Part);
    assert!(
        kept_table as f64 <= 0.002 * kept_part as f64,
        "{kept_table} table points kept\n{}",
        out.report
    );
    assert_eq!(
        count(scan, out, Truth::Stray, Fate::Part),
        0,
        "{}",
        out.report
    );
    assert_eq!(
        count(scan, out, Truth::Other, Fate::Part),
        0,
        "{}",
        out.report
    );
    assert_eq!(
        out.kept.len(),
        out.fate.iter().filter(|&&f| f == Fate::Part).count()
    );
    assert!(
        out.kept.windows(2).all(|w| w[0] < w[1]),
        "kept not in input order"
    );
}

fn assert_found_up(scan: &Scan, out: &Prepared) {
    let PlaneReport::Found {
        normal, offset_mm, ..
    } = out.report.plane
    else {
        panic!("no table\n{}", out.report)
    };
    let cos = (0..3)
        .map(|a| normal[a] as f64 * scan.up_in_camera[a])
        .sum::<f64>();
    assert!(
        cos.min(1.0).acos().to_degrees() < 0.5,
        "normal {normal:?} vs {:?}",
        scan.up_in_camera
    );
    assert!(
        (offset_mm as f64 - scan.table_offset).abs() < 1.0,
        "{offset_mm} vs {}",
        scan.table_offset
    );
}

fn assert_unit_and_centred(out: &Prepared, n: usize) {
    assert_eq!(out.points.len(), n);
    let max = out
        .points
        .iter()
        .map(|p| (p[0] * p[0] + p[1] * p[1] + p[2] * p[2]).sqrt())
        .fold(0f32, f32::max);
    assert!((max - 1.0).abs() < 1e-5, "max radius {max}");
    let mean: Vec<f32> = (0..3)
        .map(|a| out.points.iter().map(|p| p[a]).sum::<f32>() / n as f32)
        .collect();
    assert!(mean.iter().all(|m| m.abs() < 1e-4), "centroid {mean:?}");
}

#[test]
fn box_on_a_tilted_noisy_table_comes_out_alone_with_its_size() {
    let scan = Scene::default().scan();
    assert!(scan.points.len() > 90_000);
    let out = run(&scan);
    assert_part_alone(&scan, &out);
    assert_found_up(&scan, &out);
    assert_unit_and_centred(&out, 1024);
    assert!(out.report.counts.strays > 0);
    // A 60 x 40 x 25 mm box seen from above at an angle: its footprint is all there, its
    // height loses the slice taken with the table (a few mm).
    let [a, b, h] = out.size.extents_mm;
    assert!(
        (a - 60.0).abs() < 2.0 && (b - 40.0).abs() < 2.0,
        "{:?}",
        out.size
    );
    assert!((20.0..25.5).contains(&h), "{:?}", out.size);
    // Up is +Z: the top face is level, so many points share the highest z.
    let top = out.points.iter().map(|p| p[2]).fold(f32::MIN, f32::max);
    let on_top = out.points.iter().filter(|p| p[2] > top - 0.03).count();
    assert!(on_top > 300, "{on_top} points on the top face");
    // The report lines up with the fates.
    let c = out.report.counts;
    assert_eq!(c.input, scan.points.len());
    assert_eq!(
        c.non_finite + c.cropped + c.table + c.strays + c.other_clusters + c.kept,
        c.input
    );
    assert!(out.report.warnings.is_empty(), "{}", out.report);
    let text = out.report.to_string();
    assert!(
        text.contains("table plane") && text.contains("strays"),
        "{text}"
    );
    println!("{text}");
}

#[test]
fn cylinder_seen_steeply_from_another_side() {
    let scan = Scene {
        part: Shape::Cylinder {
            at: [10.0, -5.0],
            radius: 15.0,
            height: 40.0,
        },
        elevation_deg: 75.0,
        azimuth_deg: -120.0,
        distance: 350.0,
        seed: 2,
        ..Default::default()
    }
    .scan();
    let out = run(&scan);
    assert_part_alone(&scan, &out);
    assert_found_up(&scan, &out);
    let [a, b, _] = out.size.extents_mm;
    // Only the near half of the side is seen, but the top cap gives the full 30 mm circle.
    assert!(
        (a - 30.0).abs() < 2.0 && (b - 30.0).abs() < 2.5,
        "{:?}",
        out.size
    );
}

#[test]
fn a_small_second_object_is_dropped_and_a_large_one_is_warned_about() {
    let small = Scan::from(Scene {
        other: Some(Shape::Box {
            at: [80.0, 60.0],
            size: [12.0, 12.0, 8.0],
            yaw_deg: 0.0,
        }),
        seed: 3,
        ..Default::default()
    });
    let out = run(&small);
    assert_part_alone(&small, &out);
    assert!(
        count(&small, &out, Truth::Other, Fate::OtherCluster) as f64
            >= 0.8 * total(&small, Truth::Other) as f64
    );
    assert!(!out
        .report
        .warnings
        .iter()
        .any(|w| matches!(w, Warning::SecondObject { .. })));

    let large = Scan::from(Scene {
        other: Some(Shape::Cylinder {
            at: [-90.0, 50.0],
            radius: 20.0,
            height: 30.0,
        }),
        seed: 4,
        ..Default::default()
    });
    let out = run(&large);
    assert_part_alone(&large, &out);
    assert!(
        out.report
            .warnings
            .iter()
            .any(|w| matches!(w, Warning::SecondObject { .. })),
        "{}",
        out.report
    );
}

impl From<Scene> for Scan {
    fn from(scene: Scene) -> Scan {
        scene.scan()
    }
}

#[test]
fn same_fates_at_any_scale_so_no_distance_is_fixed_in_mm() {
    // A scan in metres read as mm would be 1000 times too small; a scan of a tiny part is
    // that much denser. Every distance comes from the spacing, so the fates do not change.
    let scan = Scene {
        seed: 5,
        ..Default::default()
    }
    .scan();
    let base = run(&scan);
    for scale in [0.01f32, 0.1, 10.0, 1000.0] {
        let scaled: Vec<[f32; 3]> = scan.points.iter().map(|p| p.map(|c| c * scale)).collect();
        let out = Recipe::default()
            .run(&PointCloud::from_positions(scaled))
            .unwrap();
        let same = base
            .fate
            .iter()
            .zip(&out.fate)
            .filter(|(a, b)| a == b)
            .count();
        assert!(
            same as f64 >= 0.999 * scan.points.len() as f64,
            "scale {scale}: {same} of {}",
            scan.points.len()
        );
        let ratio = out.size.radius_mm / base.size.radius_mm;
        assert!(
            (ratio / scale - 1.0).abs() < 0.01,
            "scale {scale}: radius ratio {ratio}"
        );
    }
}

#[test]
fn same_scan_same_result() {
    let scan = Scene {
        seed: 6,
        ..Default::default()
    }
    .scan();
    assert_eq!(run(&scan), run(&scan));
}

#[test]
fn a_part_without_a_table_is_prepared_as_it_is_and_says_so() {
    let scan = Scene {
        strays: 0,
        seed: 7,
        ..Default::default()
    }
    .scan();
    let part: Vec<[f32; 3]> = scan
        .points
        .iter()
        .zip(&scan.truth)
        .filter(|(_, &t)| t == Truth::Part)
        .map(|(&p, _)| p)
        .collect();
    let out = Recipe::default()
        .run(&PointCloud::from_positions(part.clone()))
        .unwrap();
    assert!(
        matches!(out.report.plane, PlaneReport::NotFound { .. }),
        "{}",
        out.report
    );
    assert!(out
        .report
        .warnings
        .iter()
        .any(|w| matches!(w, Warning::NoTable { .. })));
    assert!(
        out.kept.len() as f64 > 0.97 * part.len() as f64,
        "{}",
        out.report
    );
    // No table, so no levelling: at most the turn about Z that faces the long side to +X.
    assert_eq!(out.frame.rotation[2], [0.0, 0.0, 1.0]);
    assert_eq!(
        [out.frame.rotation[0][2], out.frame.rotation[1][2]],
        [0.0, 0.0]
    );
}

#[test]
fn frame_maps_input_points_onto_the_prepared_cloud() {
    let scan = Scene {
        seed: 8,
        ..Default::default()
    }
    .scan();
    let out = run(&scan);
    // Every prepared point is a voxel centroid of kept points; each must lie near some kept
    // input point mapped through the frame (within a voxel, in prepared units).
    let mapped: Vec<[f32; 3]> = out
        .kept
        .iter()
        .map(|&i| out.frame.apply(scan.points[i as usize]))
        .collect();
    let tol = out.report.voxel_mm * out.frame.scale * 1.8;
    for p in out.points.iter().step_by(37) {
        let near = mapped
            .iter()
            .map(|q| ((p[0] - q[0]).powi(2) + (p[1] - q[1]).powi(2) + (p[2] - q[2]).powi(2)).sqrt())
            .fold(f32::INFINITY, f32::min);
        assert!(near < tol, "{near} > {tol}");
    }
}

#[test]
fn crop_box_and_settings_change_the_outcome() {
    let scan = Scene {
        seed: 9,
        ..Default::default()
    }
    .scan();
    let recipe = RecipeSettings {
        points: 256,
        crop_box_mm: Some([[-1000.0, -1000.0, 0.0], [1000.0, 1000.0, 420.0]]),
        table_plane: false,
        ..Default::default()
    }
    .check()
    .unwrap();
    let out = recipe
        .run(&PointCloud::from_positions(scan.points.clone()))
        .unwrap();
    assert_eq!(out.points.len(), 256);
    assert_eq!(out.report.plane, PlaneReport::Off);
    for (p, f) in scan.points.iter().zip(&out.fate) {
        assert_eq!(*f == Fate::Cropped, p[2] > 420.0);
    }
}

#[test]
fn a_thin_washer_is_not_taken_for_table() {
    // 16 mm across, 1.6 mm thick (an M8 flat washer's size class, ISO 7089, recalled from
    // memory): above 3 sigma of the range noise (0.3 mm here), so it must stay.
    let scan = Scene {
        part: Shape::Cylinder {
            at: [0.0, 0.0],
            radius: 8.0,
            height: 1.6,
        },
        seed: 10,
        ..Default::default()
    }
    .scan();
    let out = run(&scan);
    assert_found_up(&scan, &out);
    let part = total(&scan, Truth::Part);
    let kept = count(&scan, &out, Truth::Part, Fate::Part);
    assert!(
        kept as f64 > 0.8 * part as f64,
        "kept {kept} of {part}\n{}",
        out.report
    );
    let [a, b, _] = out.size.extents_mm;
    assert!(
        (a - 16.0).abs() < 2.0 && (b - 16.0).abs() < 2.0,
        "{:?}",
        out.size
    );
}

#[test]
fn prepared_report_and_size_round_trip_through_json() {
    let scan = Scene {
        seed: 11,
        ..Default::default()
    }
    .scan();
    let out = run(&scan);
    let json = serde_json::to_string(&out).unwrap();
    let back: Prepared = serde_json::from_str(&json).unwrap();
    assert_eq!(back, out);
    let report = serde_json::to_value(&out.report).unwrap();
    assert_eq!(report["plane"]["status"], "found");
    assert_eq!(report["counts"]["input"], scan.points.len());
    let fate = serde_json::to_value(out.fate[0]).unwrap();
    assert!(fate.is_string(), "{fate}");
    let f = out.size.log_features();
    assert!((f[0] - out.size.radius_mm.ln()).abs() < 1e-6);
}
