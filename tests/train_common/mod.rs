//! Helpers shared by the training and command-line tests: scratch folders, small generated
//! parts bins, and the real binary.

#![allow(dead_code)] // each test file uses its own share of these

use std::fs;
use std::path::{Path, PathBuf};
use std::process::{Command, Output};

use partsift::synth::{write_parts_bin, PartType, SensorSettings};

/// A fresh folder under the system temp folder, removed when dropped.
pub struct TempDir(pub PathBuf);

impl TempDir {
    pub fn new(tag: &str) -> TempDir {
        let dir = std::env::temp_dir().join(format!("partsift-{tag}-{}", std::process::id()));
        let _ = fs::remove_dir_all(&dir);
        fs::create_dir_all(&dir).unwrap();
        TempDir(dir)
    }

    pub fn join(&self, relative: &str) -> PathBuf {
        self.0.join(relative)
    }
}

impl Drop for TempDir {
    fn drop(&mut self) {
        let _ = fs::remove_dir_all(&self.0);
    }
}

/// A small sensor: scans of a few thousand points, quick to make and to clean, still well
/// over the 512 points of the `quick` preset on the part.
pub fn small_sensor() -> SensorSettings {
    SensorSettings {
        width_px: 128,
        height_px: 96,
        ..SensorSettings::sample_bundle()
    }
}

/// Writes a parts bin of only `types` (`per_type` scans each) at `root`.
pub fn generated_bin(root: &Path, types: &[PartType], per_type: usize, seed: u64) -> PathBuf {
    write_parts_bin(root, per_type, seed, &small_sensor()).unwrap();
    for t in PartType::ALL {
        if !types.contains(&t) {
            fs::remove_dir_all(root.join(t.name())).unwrap();
        }
    }
    root.to_path_buf()
}

/// Three part types that look nothing alike.
pub const DISTINCT: [PartType; 3] = [
    PartType::FlatWasher,
    PartType::HexBolt,
    PartType::AngleBracket,
];

/// Copies `count` scans of each of `types` from the committed `sample-scans/` into `root`.
pub fn sample_scans_bin(root: &Path, types: &[&str], count: usize) -> PathBuf {
    let samples = Path::new(env!("CARGO_MANIFEST_DIR")).join("sample-scans");
    for t in types {
        let mut files: Vec<PathBuf> = fs::read_dir(samples.join(t))
            .unwrap()
            .map(|e| e.unwrap().path())
            .collect();
        files.sort();
        fs::create_dir_all(root.join(t)).unwrap();
        for f in files.iter().take(count) {
            fs::copy(f, root.join(t).join(f.file_name().unwrap())).unwrap();
        }
    }
    root.to_path_buf()
}

/// A PLY whose header promises more points than it holds.
pub const TRUNCATED_PLY: &[u8] =
    b"ply\nformat ascii 1.0\nelement vertex 5\nproperty float x\nproperty float y\nproperty float z\nend_header\n1 2 3\n";

/// Runs the real `partsift` binary with its prepared-cloud cache in `cache`.
pub fn partsift(cache: &Path, args: &[&str]) -> Output {
    Command::new(env!("CARGO_BIN_EXE_partsift"))
        .args(args)
        .env("PARTSIFT_CACHE", cache)
        .output()
        .unwrap()
}

pub fn stdout(out: &Output) -> String {
    String::from_utf8_lossy(&out.stdout).into_owned()
}

pub fn stderr(out: &Output) -> String {
    String::from_utf8_lossy(&out.stderr).into_owned()
}

/// Asserts that the run ended with `code` and did not panic.
pub fn assert_exit(out: &Output, code: i32) {
    assert!(!stderr(out).contains("panicked"), "panic: {}", stderr(out));
    assert_eq!(
        out.status.code(),
        Some(code),
        "stdout:\n{}\nstderr:\n{}",
        stdout(out),
        stderr(out)
    );
}
