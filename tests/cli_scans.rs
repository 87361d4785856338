//! The real binary on real files: `info`, `clean` and `synth`, their output and exit codes
//! (0 all went well, 1 a file failed and the others were still processed, 2 usage).

use std::path::{Path, PathBuf};
use std::process::{Command, Output};

use partsift::scan::{self, LoadOptions};

fn partsift(args: &[&str]) -> Output {
    Command::new(env!("CARGO_BIN_EXE_partsift"))
        .args(args)
        .output()
        .expect("the binary runs")
}

fn sample(part: &str, n: usize) -> PathBuf {
    let dir = Path::new(env!("CARGO_MANIFEST_DIR"))
        .join("sample-scans")
        .join(part);
    let mut files: Vec<PathBuf> = std::fs::read_dir(dir)
        .unwrap()
        .map(|e| e.unwrap().path())
        .collect();
    files.sort();
    files.remove(n)
}

fn temp_dir(name: &str) -> PathBuf {
    let dir = std::env::temp_dir().join(format!("partsift-cli-{name}-{}", std::process::id()));
    let _ = std::fs::remove_dir_all(&dir);
    std::fs::create_dir_all(&dir).unwrap();
    dir
}

#[test]
fn info_json_describes_each_scan_and_reports_a_bad_one_without_stopping() {
    let dir = temp_dir("info");
    let broken = dir.join("broken.ply");
    // A binary header promising 100 vertices, followed by 5 bytes.
    std::fs::write(
        &broken,
        b"ply\nformat binary_little_endian 1.0\nelement vertex 100\nproperty float x\nproperty float y\nproperty float z\nend_header\n\x01\x02\x03\x04\x05",
    )
    .unwrap();
    let good = sample("spur_gear", 0);
    let out = partsift(&[
        "info",
        "--json",
        good.to_str().unwrap(),
        broken.to_str().unwrap(),
    ]);
    assert_eq!(out.status.code(), Some(1), "a file failed");
    let text = String::from_utf8(out.stdout).unwrap();
    let lines: Vec<serde_json::Value> = text
        .lines()
        .map(|l| serde_json::from_str(l).unwrap())
        .collect();
    assert_eq!(lines.len(), 2);
    let stored = scan::load(&good, &LoadOptions::default()).unwrap();
    assert_eq!(lines[0]["points"], stored.stored_points);
    assert_eq!(lines[0]["format"], stored.format.name());
    assert_eq!(lines[0]["units_guess"], "mm");
    assert!(lines[0]["properties"]
        .as_array()
        .unwrap()
        .iter()
        .any(|p| p == "x"));
    assert!(lines[0]["bounds"].is_array());
    let error = lines[1]["error"].as_str().unwrap();
    assert!(
        error.contains("broken.ply") && error.contains("byte"),
        "{error}"
    );
    std::fs::remove_dir_all(dir).unwrap();
}

#[test]
fn clean_writes_the_kept_points_unchanged_or_the_prepared_cloud() {
    let dir = temp_dir("clean");
    let input = sample("hex_bolt", 2);
    let kept_path = dir.join("kept.ply");
    let out = partsift(&[
        "clean",
        input.to_str().unwrap(),
        "-o",
        kept_path.to_str().unwrap(),
    ]);
    assert!(
        out.status.success(),
        "{}",
        String::from_utf8_lossy(&out.stderr)
    );
    assert!(String::from_utf8_lossy(&out.stdout).contains("table plane"));
    let raw = scan::load(&input, &LoadOptions::default()).unwrap();
    let kept = scan::load(&kept_path, &LoadOptions::default()).unwrap();
    assert!(kept.cloud.len() < raw.cloud.len() && kept.cloud.len() > raw.cloud.len() / 3);
    // Same coordinates as the input, so the kept points lie exactly over the raw scan.
    let raw_points: std::collections::HashSet<[u32; 3]> = raw
        .cloud
        .positions
        .iter()
        .map(|p| p.map(f32::to_bits))
        .collect();
    assert!(kept
        .cloud
        .positions
        .iter()
        .all(|p| raw_points.contains(&p.map(f32::to_bits))));

    let prepared_path = dir.join("prepared.ply");
    let out = partsift(&[
        "clean",
        input.to_str().unwrap(),
        "-o",
        prepared_path.to_str().unwrap(),
        "--prepared",
        "--points",
        "256",
        "--ascii",
    ]);
    assert!(
        out.status.success(),
        "{}",
        String::from_utf8_lossy(&out.stderr)
    );
    let prepared = scan::load(
        &prepared_path,
        &LoadOptions {
            units: Some(scan::Units::Mm),
            ..LoadOptions::default()
        },
    )
    .unwrap();
    assert_eq!(prepared.format, scan::ScanFormat::PlyAscii);
    assert_eq!(prepared.cloud.len(), 256);
    std::fs::remove_dir_all(dir).unwrap();
}

#[test]
fn clean_refuses_bad_settings_and_bad_files_with_clear_errors() {
    let dir = temp_dir("clean-bad");
    let input = sample("flat_washer", 0);
    let out_path = dir.join("out.ply");
    let out = partsift(&[
        "clean",
        input.to_str().unwrap(),
        "-o",
        out_path.to_str().unwrap(),
        "--points",
        "3",
    ]);
    assert_eq!(out.status.code(), Some(2));
    assert!(String::from_utf8_lossy(&out.stderr).contains("points"));
    let text = dir.join("words.xyz");
    std::fs::write(&text, "1 2 3\n4 five 6\n").unwrap();
    let out = partsift(&[
        "clean",
        text.to_str().unwrap(),
        "-o",
        out_path.to_str().unwrap(),
    ]);
    assert_eq!(out.status.code(), Some(1));
    let stderr = String::from_utf8_lossy(&out.stderr);
    assert!(
        stderr.contains("words.xyz") && stderr.contains("line 2"),
        "{stderr}"
    );
    assert!(!out_path.exists(), "nothing written for a failed scan");
    std::fs::remove_dir_all(dir).unwrap();
}

#[test]
fn synth_writes_a_parts_bin_and_rejects_a_bad_count() {
    let dir = temp_dir("synth");
    let out = partsift(&[
        "synth",
        dir.to_str().unwrap(),
        "--per-type",
        "1",
        "--seed",
        "3",
        "--resolution",
        "64",
        "48",
    ]);
    assert!(
        out.status.success(),
        "{}",
        String::from_utf8_lossy(&out.stderr)
    );
    let types = std::fs::read_dir(&dir).unwrap().count();
    assert_eq!(types, partsift::synth::PartType::ALL.len());
    let out = partsift(&["synth", dir.to_str().unwrap(), "--per-type", "0"]);
    assert_eq!(out.status.code(), Some(2));
    let out = partsift(&["info"]);
    assert_eq!(
        out.status.code(),
        Some(2),
        "no scans named is a usage error"
    );
    std::fs::remove_dir_all(dir).unwrap();
}
