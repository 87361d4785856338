//! Every file of the shared PLY corpus (files written by other software; see
//! ../shared/data/README.md and ply-corpus/MANIFEST.tsv) and every ModelNet10 scan
//! (Wu et al., CVPR 2015; binary PLY, 1,024 points each) through `scan::load`.
//!
//! Expectations come from the manifest: a file whose body parses to its end (`body_check` ok)
//! in a known format is valid and must load with the vertex count and vertex properties the
//! manifest lists; any other is broken and must give a clear error. A valid file without a
//! vertex element holding x y z must say that x y z are missing, and one with no vertex must
//! say "no points": partsift needs points, even where the file is a well-formed PLY.
//! The manifest also records what the `plyfile` 1.1 Python reader made of each file; where
//! partsift decides differently, `DECISIONS` below says why, from the PLY format description
//! (Turk, 1994).

use std::path::{Path, PathBuf};
use std::sync::mpsc;
use std::time::Duration;

use partsift::scan::{load, LoadOptions, Scan, ScanError};
use rayon::prelude::*;

fn data_dir() -> PathBuf {
    Path::new(concat!(env!("CARGO_MANIFEST_DIR"), "/../shared/data")).to_path_buf()
}

/// Files where partsift decides differently from the manifest's reading or from plyfile 1.1:
/// the outcome partsift gives (`None`: loads; `Some(words)`: refused with those words) and why.
const DECISIONS: &[(&str, Option<&str>, &str)] = &[
    (
        "gh-trimesh/models/fuze_ascii.ply",
        None,
        "plyfile: 'expected end-of-line'. Each face line holds 10 colour values where the \
         header declares 4. The format description puts one element per line in ascii, so the \
         line is the record and values left over at its end are ignored: the 502 vertices and \
         1,000 faces are read as declared (a reader that runs on across lines, as the \
         manifest's check does, would misread every other face).",
    ),
    (
        "gh-plyodine/test_data/ply_little_list_sizes_negative_int16.ply",
        Some("negative length"),
        "plyfile reads it. A list length counts items; the format description has no meaning \
         for a negative one, so partsift refuses it (with its byte offset).",
    ),
    (
        "gh-plyodine/test_data/ply_little_list_sizes_negative_int32.ply",
        Some("negative length"),
        "as ply_little_list_sizes_negative_int16.ply",
    ),
    (
        "gh-plyodine/test_data/ply_little_list_sizes_negative_int8.ply",
        Some("negative length"),
        "as ply_little_list_sizes_negative_int16.ply",
    ),
    (
        "gh-plyodine/test_data/ply_big_list_sizes_negative_int16.ply",
        Some("negative length"),
        "as ply_little_list_sizes_negative_int16.ply",
    ),
    (
        "gh-plyodine/test_data/ply_big_list_sizes_negative_int8.ply",
        Some("negative length"),
        "as ply_little_list_sizes_negative_int16.ply",
    ),
    (
        "gh-plyodine/test_data/ply_big_list_sizes_negative_int32.ply",
        Some("negative length"),
        "plyfile refuses it too; its body was mangled (UTF-8 replacement bytes) and starts with \
         a negative length.",
    ),
    (
        "gh-plyodine/test_data/header_element_name_repeated.ply",
        Some("declared twice"),
        "refused, as by plyfile (the manifest's check reads it): elements are known by name in \
         the format description, so two 'vertex' elements are ambiguous.",
    ),
    (
        "gh-plyodine/test_data/header_element_too_many.ply",
        Some("expected 'element <name> <count>'"),
        "refused, as by plyfile: 'element vertex 8 8' has a word too many.",
    ),
    (
        "gh-plyodine/test_data/header_end_too_many.ply",
        Some("words after end_header"),
        "refused, as by plyfile: the end_header line is the keyword alone.",
    ),
    (
        "gh-plyodine/test_data/ply_ascii_unused_tokens.ply",
        Some("ends after 1 of the 2"),
        "refused, as by plyfile: '1 2' on one line is one record with a value left over (one \
         element per line), so the second record is missing.",
    ),
    (
        "crate-ply-rs/empty_ok_ascii.ply",
        Some("no points"),
        "plyfile refuses obj_info after an element; the format description allows comment \
         and obj_info lines anywhere in the header, so partsift reads it and finds no vertex.",
    ),
];

#[derive(Debug)]
struct Row {
    path: String,
    kind: String,
    format: String,
    elements_text: String,
    elements: Vec<(String, u64, Vec<String>)>,
    body_check: String,
    plyfile: String,
}

fn read_manifest(dir: &Path) -> Vec<Row> {
    let text = std::fs::read_to_string(dir.join("MANIFEST.tsv")).unwrap();
    let mut lines = text.lines();
    let columns: Vec<&str> = lines.next().unwrap().split('\t').collect();
    let col = |name: &str| columns.iter().position(|c| *c == name).unwrap();
    let (src, file, kind, format) = (col("source_dir"), col("file"), col("kind"), col("format"));
    let (elements, body, plyfile) = (col("elements"), col("body_check"), col("plyfile_1.1"));
    lines
        .filter(|l| !l.trim().is_empty())
        .map(|l| {
            let f: Vec<&str> = l.split('\t').collect();
            Row {
                path: format!("{}/{}", f[src], f[file]),
                kind: f[kind].to_string(),
                format: f[format].to_string(),
                elements_text: f[elements].to_string(),
                elements: parse_elements(f[elements]),
                body_check: f[body].to_string(),
                plyfile: f[plyfile].to_string(),
            }
        })
        .collect()
}

/// `vertex[8]: float x, float y; face[6]: list<uchar,int> vertex_index` to names, counts and
/// property names.
fn parse_elements(text: &str) -> Vec<(String, u64, Vec<String>)> {
    text.split("; ")
        .filter(|e| e.contains("]:"))
        .map(|e| {
            let (head, props) = e.split_once(':').unwrap();
            let (name, count) = head.trim().split_once('[').unwrap();
            let count = count.trim_end_matches(']').parse().unwrap();
            let props = props
                .split(", ")
                .filter_map(|p| p.split_whitespace().last().map(String::from))
                .collect();
            (name.to_string(), count, props)
        })
        .collect()
}

/// `load` on another thread, given at most 10 s (a hang fails the test instead of stalling it).
fn load_bounded(path: &Path) -> Result<Scan, ScanError> {
    let (send, receive) = mpsc::channel();
    let owned = path.to_path_buf();
    std::thread::spawn(move || {
        let _ = send.send(load(&owned, &LoadOptions::default()));
    });
    match receive.recv_timeout(Duration::from_secs(10)) {
        Ok(result) => result,
        Err(mpsc::RecvTimeoutError::Timeout) => panic!("{}: load took over 10 s", path.display()),
        Err(mpsc::RecvTimeoutError::Disconnected) => panic!("{}: load panicked", path.display()),
    }
}

enum Expect {
    Points {
        count: u64,
        properties: Vec<String>,
        faces: Option<u64>,
    },
    NoPoints,
    NoXyz,
    Broken,
    Refused(&'static str),
}

fn expectation(row: &Row) -> Expect {
    if row.kind == "xyz-text" {
        // The elements column of an XYZ file reads "N lines; columns {...}".
        let count = row
            .elements_text
            .split_whitespace()
            .next()
            .unwrap()
            .parse()
            .unwrap();
        return Expect::Points {
            count,
            properties: Vec::new(),
            faces: None,
        };
    }
    let known =
        ["ascii", "binary_little_endian", "binary_big_endian"].contains(&row.format.as_str());
    if !(known && row.body_check.starts_with("ok")) {
        return Expect::Broken;
    }
    let faces = row.elements.iter().find(|e| e.0 == "face").map(|e| e.1);
    match row.elements.iter().find(|e| e.0 == "vertex") {
        Some((_, count, props)) if ["x", "y", "z"].iter().all(|n| props.iter().any(|p| p == n)) => {
            if *count == 0 {
                Expect::NoPoints
            } else {
                Expect::Points {
                    count: *count,
                    properties: props.clone(),
                    faces,
                }
            }
        }
        _ => Expect::NoXyz,
    }
}

#[test]
fn every_corpus_file_loads_or_fails_clearly() {
    let dir = data_dir().join("ply-corpus");
    if !dir.join("MANIFEST.tsv").exists() {
        eprintln!("skipped: {} is absent", dir.display());
        return;
    }
    let rows = read_manifest(&dir);
    assert!(rows.len() > 150, "manifest has {} rows", rows.len());
    let mut failures = Vec::new();
    let (mut loaded, mut refused) = (0, 0);
    for row in &rows {
        let path = dir.join(&row.path);
        let result = load_bounded(&path);
        let decision = DECISIONS.iter().find(|d| d.0 == row.path);
        let expected = match decision {
            Some((_, Some(words), _)) => Expect::Refused(words),
            _ => expectation(row),
        };
        let verdict = match (expected, &result) {
            (
                Expect::Points {
                    count,
                    properties,
                    faces,
                },
                Ok(scan),
            ) => {
                let mut wrong = Vec::new();
                if scan.stored_points as u64 != count {
                    wrong.push(format!("{} points, manifest {count}", scan.stored_points));
                }
                if !properties.is_empty() && scan.properties != properties {
                    wrong.push(format!(
                        "properties {:?}, manifest {properties:?}",
                        scan.properties
                    ));
                }
                if faces.is_some_and(|f| f != scan.faces as u64) {
                    wrong.push(format!("{} faces, manifest {faces:?}", scan.faces));
                }
                if scan.cloud.is_empty() {
                    wrong.push("empty cloud".into());
                }
                wrong.join("; ")
            }
            (Expect::Points { .. }, Err(e)) => format!("valid file refused: {e}"),
            (Expect::NoPoints, Err(e)) if e.what.contains("no points") => String::new(),
            (Expect::NoXyz, Err(e)) if e.what.contains("x y z") => String::new(),
            (Expect::Broken, Err(_)) => String::new(),
            (Expect::Refused(words), Err(e)) if e.what.contains(words) => String::new(),
            (_, Err(e)) => format!("unexpected error: {e}"),
            (_, Ok(scan)) => format!("loaded {} points, expected an error", scan.stored_points),
        };
        if let Err(e) = &result {
            // Every error names the file.
            assert!(
                e.to_string().starts_with(&path.display().to_string()),
                "{e}"
            );
            refused += 1;
            println!("refused  {}: {}", row.path, e.what);
        } else {
            loaded += 1;
        }
        let plyfile_ok = row.plyfile == "OK";
        if let Some((_, _, why)) = decision {
            println!("  decided: {why}");
        } else if row.kind == "ply" && plyfile_ok != result.is_ok() {
            // Not a different reading: plyfile reads PLYs without points, a scan needs points.
            println!("  plyfile reads it; partsift needs a vertex element with x y z and points");
        }
        if !verdict.is_empty() {
            failures.push(format!("{}: {verdict}", row.path));
        }
    }
    println!("{loaded} loaded, {refused} refused, of {}", rows.len());
    assert!(failures.is_empty(), "\n{}", failures.join("\n"));
}

#[test]
fn every_modelnet10_scan_reads_with_1024_points() {
    let dir = data_dir().join("modelnet10");
    if !dir.exists() {
        eprintln!("skipped: {} is absent", dir.display());
        return;
    }
    let mut files = Vec::new();
    for split in ["train", "test"] {
        for class in std::fs::read_dir(dir.join(split)).unwrap() {
            for file in std::fs::read_dir(class.unwrap().path()).unwrap() {
                let path = file.unwrap().path();
                if path.extension().is_some_and(|e| e == "ply") {
                    files.push(path);
                }
            }
        }
    }
    // The README's counts: 3,991 train and 908 test scans.
    assert_eq!(files.len(), 3_991 + 908);
    let wrong: Vec<String> = files
        .par_iter()
        .filter_map(|path| match load(path, &LoadOptions::default()) {
            Ok(scan) if scan.stored_points == 1024 && scan.cloud.len() == 1024 => None,
            Ok(scan) => Some(format!("{}: {} points", path.display(), scan.stored_points)),
            Err(e) => Some(e.to_string()),
        })
        .collect();
    assert!(wrong.is_empty(), "{}", wrong.join("\n"));
}

fn load_vertices(path: &Path) -> Option<Scan> {
    if !path.exists() {
        eprintln!("skipped: {} is absent", path.display());
        return None;
    }
    let options = LoadOptions {
        surface_points: 0,
        ..LoadOptions::default()
    };
    Some(load(path, &options).unwrap())
}

#[test]
fn happly_shape_reads_the_same_in_ascii_little_and_big_endian() {
    // hapPLY wrote one shape three ways (faces before vertices in two of them, doubles).
    let dir = data_dir().join("ply-corpus/gh-happly");
    let names = [
        "platonic_shelf_ascii.ply",
        "platonic_shelf.ply",
        "platonic_shelf_big_endian.ply",
    ];
    let Some(scans) = names
        .map(|n| load_vertices(&dir.join(n)))
        .into_iter()
        .collect::<Option<Vec<_>>>()
    else {
        return;
    };
    for scan in &scans[1..] {
        assert_eq!(scan.faces, 50);
        for (a, b) in scan.cloud.positions.iter().zip(&scans[0].cloud.positions) {
            for k in 0..3 {
                // The ascii file prints fewer digits than a double holds.
                assert!(
                    (a[k] - b[k]).abs() <= 1e-5 * b[k].abs().max(1.0),
                    "{a:?} {b:?}"
                );
            }
        }
    }
}

#[test]
fn utm_xyz_exports_keep_float32_values_and_colours() {
    // First line of both files (trimesh's test models, Agisoft and CloudCompare exports):
    // 665187.522077 5648349.895035 241.767693 117 73 49 [255.0]. Far from 0, f32 keeps about
    // 7 digits: the value must be the f32 nearest to the text (0.5 apart at 5.6e6).
    let dir = data_dir().join("ply-corpus/gh-trimesh/models");
    // Row counts from the manifest.
    for (name, rows) in [
        ("points_agisoft.xyz", 100),
        ("points_cloudcompare.xyz", 101),
    ] {
        let Some(scan) = load_vertices(&dir.join(name)) else {
            return;
        };
        assert_eq!(scan.cloud.len(), rows);
        assert_eq!(
            scan.cloud.positions[0],
            [
                665187.522077f64 as f32,
                5648349.895035f64 as f32,
                241.767693f64 as f32
            ]
        );
        // Headerless: the colour columns are listed, not read.
        assert_eq!(scan.cloud.colors, None);
    }
}
