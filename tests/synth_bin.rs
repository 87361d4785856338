//! End-to-end checks of the practice-scan generator: real files on disk, read back with an
//! independent PLY reader (ply-rs 0.1).

use std::collections::BTreeMap;
use std::fs;
use std::path::{Path, PathBuf};

use partsift::scan::write::{write_ply, PlyEncoding};
use partsift::scan::{PointCloud, ScanFormat, Units};
use partsift::synth::{
    capture_scan, part_mesh, write_parts_bin, PartType, PointLabel, SensorSettings, SynthError,
};
use ply_rs::ply::{DefaultElement, Property};

fn scratch_dir(name: &str) -> PathBuf {
    let dir = std::env::temp_dir().join(format!("partsift-synth-{name}-{}", std::process::id()));
    let _ = fs::remove_dir_all(&dir);
    fs::create_dir_all(&dir).unwrap();
    dir
}

/// Every file in the sub-folders of `dir`, by path relative to `dir`.
fn all_files(dir: &Path) -> BTreeMap<PathBuf, Vec<u8>> {
    let mut files = BTreeMap::new();
    for sub in fs::read_dir(dir).unwrap() {
        let sub = sub.unwrap().path();
        if !sub.is_dir() {
            continue;
        }
        for file in fs::read_dir(&sub).unwrap() {
            let file = file.unwrap().path();
            let relative = file.strip_prefix(dir).unwrap().to_path_buf();
            files.insert(relative, fs::read(&file).unwrap());
        }
    }
    files
}

fn in_pool<T: Send>(threads: usize, job: impl FnOnce() -> T + Send) -> T {
    rayon::ThreadPoolBuilder::new()
        .num_threads(threads)
        .build()
        .unwrap()
        .install(job)
}

/// The x y z of every vertex, read by ply-rs.
fn read_with_ply_rs(path: &Path) -> Vec<[f32; 3]> {
    let parser = ply_rs::parser::Parser::<DefaultElement>::new();
    let ply = parser.read_ply(&mut fs::File::open(path).unwrap()).unwrap();
    let float = |p: &Property| match p {
        Property::Float(v) => *v,
        other => panic!("{}: not a float: {other:?}", path.display()),
    };
    ply.payload["vertex"]
        .iter()
        .map(|v| [float(&v["x"]), float(&v["y"]), float(&v["z"])])
        .collect()
}

fn read_xyz(path: &Path) -> Vec<[f32; 3]> {
    let text = fs::read_to_string(path).unwrap();
    let mut lines = text.lines();
    assert_eq!(lines.next(), Some("# x y z"), "{}", path.display());
    lines
        .map(|l| {
            let v: Vec<f32> = l.split(' ').map(|c| c.parse().unwrap()).collect();
            [v[0], v[1], v[2]]
        })
        .collect()
}

#[test]
fn same_seed_same_bytes_whatever_the_thread_count() {
    let settings = SensorSettings::sample_bundle();
    let (one, two, other) = (scratch_dir("one"), scratch_dir("two"), scratch_dir("other"));
    in_pool(1, || write_parts_bin(&one, 2, 7, &settings)).unwrap();
    in_pool(2, || write_parts_bin(&two, 2, 7, &settings)).unwrap();
    write_parts_bin(&other, 2, 8, &settings).unwrap();
    let (a, b, c) = (all_files(&one), all_files(&two), all_files(&other));
    assert_eq!(a.len(), 2 * PartType::ALL.len());
    assert!(a == b, "one thread and two threads wrote different files");
    let differing = a
        .iter()
        .filter(|(path, bytes)| c.get(*path) != Some(bytes))
        .count();
    assert_eq!(differing, a.len(), "another seed should change every scan");
    for dir in [one, two, other] {
        fs::remove_dir_all(dir).unwrap();
    }
}

#[test]
fn parts_bin_has_every_type_a_format_mix_and_files_that_read_back() {
    let dir = scratch_dir("bin");
    let summary = write_parts_bin(&dir, 5, 11, &SensorSettings::sample_bundle()).unwrap();
    assert_eq!(summary.scans.len(), 5 * PartType::ALL.len());
    for part_type in PartType::ALL {
        let folder = dir.join(part_type.name());
        let names: Vec<String> = fs::read_dir(&folder)
            .unwrap()
            .map(|e| e.unwrap().file_name().to_string_lossy().into_owned())
            .collect();
        assert_eq!(names.len(), 5, "{}", folder.display());
        for i in 0..5 {
            let stem = format!("{}_{i:03}.", part_type.name());
            assert!(names.iter().any(|n| n.starts_with(&stem)), "{stem} missing");
        }
    }
    let count = |f: ScanFormat| summary.scans.iter().filter(|s| s.format == f).count();
    assert!(count(ScanFormat::PlyBinaryLe) > count(ScanFormat::PlyAscii));
    assert!(count(ScanFormat::PlyAscii) > 0 && count(ScanFormat::Xyz) > 0);
    assert!(summary.scans.iter().any(|s| s.units == Units::M));
    assert!(
        summary
            .scans
            .iter()
            .filter(|s| s.units == Units::Mm)
            .count()
            > 30
    );

    for scan in &summary.scans {
        let points = match scan.format {
            ScanFormat::Xyz => read_xyz(&scan.path),
            _ => read_with_ply_rs(&scan.path),
        };
        assert_eq!(points.len(), scan.points, "{}", scan.path.display());
        assert!(points.len() > 1000, "{}", scan.path.display());
        // Camera frame: the part sits 150 to 600 mm in front of the camera (the sensor's
        // working range in the generator's defaults).
        let mut depths: Vec<f32> = points.iter().map(|p| p[2]).collect();
        depths.sort_by(f32::total_cmp);
        let median_mm = depths[depths.len() / 2] * scan.units.to_mm();
        assert!(
            (100.0..650.0).contains(&median_mm),
            "{}: median depth {median_mm} mm",
            scan.path.display()
        );
    }
    fs::remove_dir_all(dir).unwrap();
}

#[test]
fn every_scan_shows_the_part_and_the_table_and_few_strays() {
    let settings = SensorSettings::sample_bundle();
    for part_type in PartType::ALL {
        for seed in 0..6 {
            let capture = capture_scan(part_type, seed, &settings).unwrap();
            let count = |l: PointLabel| capture.labels.iter().filter(|&&x| x == l).count();
            let total = capture.cloud.len();
            let what = format!("{part_type} seed {seed}");
            assert!(
                count(PointLabel::Part) * 10 > total * 4,
                "{what}: part not visible"
            );
            assert!(
                count(PointLabel::Table) * 10 > total,
                "{what}: table missing"
            );
            assert!(count(PointLabel::Stray) <= 16, "{what}: too many strays");
            // The table is tilted in the camera frame (the tilt is 25 to 60 degrees).
            let tilt = capture.table_normal[2].abs().acos().to_degrees();
            assert!((20.0..70.0).contains(&tilt), "{what}: tilt {tilt}");
        }
    }
}

/// Largest distance between two points, mm (brute force).
fn diameter(points: &[[f32; 3]]) -> f32 {
    let mut best = 0.0f32;
    for (i, p) in points.iter().enumerate() {
        for q in &points[i + 1..] {
            let d = (p[0] - q[0]).powi(2) + (p[1] - q[1]).powi(2) + (p[2] - q[2]).powi(2);
            best = best.max(d);
        }
    }
    best.sqrt()
}

#[test]
fn m8_and_m12_nuts_separate_by_size_in_mesh_and_scan() {
    let settings = SensorSettings::sample_bundle();
    let visible = |part_type: PartType, seed: u64| {
        let capture = capture_scan(part_type, seed, &settings).unwrap();
        let on_part: Vec<[f32; 3]> = capture
            .cloud
            .positions
            .iter()
            .zip(&capture.labels)
            .filter(|(_, &l)| l == PointLabel::Part)
            .map(|(p, _)| *p)
            .collect();
        diameter(&on_part)
    };
    let mesh_size = |part_type: PartType, seed: u64| diameter(&part_mesh(part_type, seed).vertices);
    let seeds = 0..15u64;
    let m8_scan = seeds
        .clone()
        .map(|s| visible(PartType::HexNutM8, s))
        .fold(0.0, f32::max);
    let m12_scan = seeds
        .clone()
        .map(|s| visible(PartType::HexNutM12, 100 + s))
        .fold(f32::MAX, f32::min);
    let m8_mesh = seeds
        .clone()
        .map(|s| mesh_size(PartType::HexNutM8, s))
        .fold(0.0, f32::max);
    let m12_mesh = seeds
        .map(|s| mesh_size(PartType::HexNutM12, s))
        .fold(f32::MAX, f32::min);
    assert!(
        m8_mesh < m12_mesh,
        "meshes: M8 up to {m8_mesh} mm, M12 from {m12_mesh} mm"
    );
    assert!(
        m8_scan < m12_scan,
        "scans: M8 up to {m8_scan} mm, M12 from {m12_scan} mm"
    );
}

#[test]
fn bad_requests_give_clear_errors() {
    let dir = scratch_dir("bad");
    let settings = SensorSettings::sample_bundle();
    match write_parts_bin(&dir, 0, 1, &settings) {
        Err(SynthError::InvalidSetting {
            name: "per_type", ..
        }) => {}
        other => panic!("{other:?}"),
    }
    let err = write_parts_bin(&dir, 200_000, 1, &settings).unwrap_err();
    assert!(err.to_string().contains("per_type"), "{err}");
    let mut odd = settings.clone();
    odd.dropout = 2.0;
    let err = write_parts_bin(&dir, 1, 1, &odd).unwrap_err();
    assert!(err.to_string().contains("dropout"), "{err}");
    assert_eq!(
        fs::read_dir(&dir).unwrap().count(),
        0,
        "wrote something anyway"
    );
    // An output folder that is a file.
    let file = dir.join("not-a-folder");
    fs::write(&file, b"x").unwrap();
    let err = write_parts_bin(&file, 1, 1, &settings).unwrap_err();
    assert!(matches!(err, SynthError::Write { .. }), "{err:?}");
    assert!(err.to_string().contains("not-a-folder"), "{err}");
    let err = "hex_nut_m10".parse::<PartType>().unwrap_err();
    assert!(err.to_string().contains("hex_nut_m10") && err.to_string().contains("spur_gear"));
    assert_eq!(
        "pipe_elbow".parse::<PartType>().unwrap(),
        PartType::PipeElbow
    );
    fs::remove_dir_all(dir).unwrap();
}

// The writer's output read by ply-rs, an independent reader of the same format description.
#[test]
fn written_ply_with_normals_and_colours_reads_back_with_ply_rs() {
    let dir = scratch_dir("roundtrip");
    let cloud = PointCloud {
        positions: vec![[1.5, -2.25, 300.125], [0.1, 0.2, 0.3], [-1e-3, 4e4, 7.0]],
        normals: Some(vec![[0.0, 0.0, 1.0], [0.6, 0.8, 0.0], [1.0, 0.0, 0.0]]),
        colors: Some(vec![[255, 128, 0], [1, 2, 3], [9, 8, 7]]),
    };
    for encoding in [PlyEncoding::Ascii, PlyEncoding::BinaryLe] {
        let path = dir.join(format!("{encoding:?}.ply"));
        write_ply(&path, &cloud, encoding).unwrap();
        let parser = ply_rs::parser::Parser::<DefaultElement>::new();
        let ply = parser
            .read_ply(&mut fs::File::open(&path).unwrap())
            .unwrap();
        assert!(ply.header.comments.iter().any(|c| c.contains("partsift")));
        let vertices = &ply.payload["vertex"];
        assert_eq!(vertices.len(), 3);
        for (i, v) in vertices.iter().enumerate() {
            let get = |name: &str| match &v[name] {
                Property::Float(x) => *x,
                Property::UChar(c) => f32::from(*c),
                other => panic!("{other:?}"),
            };
            let normal = cloud.normals.as_ref().unwrap()[i];
            let colour = cloud.colors.as_ref().unwrap()[i].map(f32::from);
            assert_eq!([get("x"), get("y"), get("z")], cloud.positions[i]);
            assert_eq!([get("nx"), get("ny"), get("nz")], normal);
            assert_eq!([get("red"), get("green"), get("blue")], colour);
        }
    }
    fs::remove_dir_all(dir).unwrap();
}

#[test]
fn committed_sample_bundle_has_every_type_and_stays_small() {
    let bundle = Path::new(env!("CARGO_MANIFEST_DIR")).join("sample-scans");
    let files = all_files(&bundle);
    let total: usize = files.values().map(Vec::len).sum();
    assert!(total < 5_000_000, "the bundle grew to {total} bytes");
    for part_type in PartType::ALL {
        let scans: Vec<&PathBuf> = files
            .keys()
            .filter(|p| p.starts_with(part_type.name()))
            .collect();
        assert_eq!(scans.len(), 12, "{part_type}");
        for relative in scans {
            let path = bundle.join(relative);
            let points = if path.extension().is_some_and(|e| e == "xyz") {
                read_xyz(&path)
            } else {
                read_with_ply_rs(&path)
            };
            assert!(points.len() > 1000, "{}", path.display());
        }
    }
}
