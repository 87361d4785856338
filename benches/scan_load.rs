//! How fast `scan::load` reads a 1-million-point binary little-endian PLY, against a plain
//! `std::fs::read` of the same file (the floor: the file is in the page cache after it is
//! written, so this is memory-read speed, the best a disk can give) and against the ply-rs
//! crate's reader. Prints medians (and the fastest) of several runs, in MB/s and points/s.
//!
//! Run: `cargo bench --no-default-features --bench scan_load`

use std::hint::black_box;
use std::path::{Path, PathBuf};
use std::time::{Duration, Instant};

use partsift::rng::Rng;
use partsift::scan::{load, load_bytes, LoadOptions};

const POINTS: usize = 1_000_000;

fn write_ply(dir: &Path, name: &str, with_normals: bool) -> PathBuf {
    let mut header = format!(
        "ply\nformat binary_little_endian 1.0\ncomment partsift benchmark\n\
         element vertex {POINTS}\nproperty float x\nproperty float y\nproperty float z\n"
    );
    if with_normals {
        header += "property float nx\nproperty float ny\nproperty float nz\n";
    }
    header += "end_header\n";
    let mut bytes = header.into_bytes();
    let mut rng = Rng::new(1);
    let values = if with_normals { 6 } else { 3 };
    bytes.reserve(POINTS * values * 4);
    for _ in 0..POINTS * values {
        bytes.extend_from_slice(&(rng.range(-100.0, 100.0) as f32).to_le_bytes());
    }
    let path = dir.join(name);
    std::fs::write(&path, bytes).unwrap();
    path
}

/// Median and fastest of `runs` timings (the fastest shows the cost without other load on
/// the machine).
fn timed(runs: usize, mut f: impl FnMut()) -> (Duration, Duration) {
    let mut times: Vec<Duration> = (0..runs)
        .map(|_| {
            let start = Instant::now();
            f();
            start.elapsed()
        })
        .collect();
    times.sort();
    (times[runs / 2], times[0])
}

fn report(what: &str, bytes: u64, (median, best): (Duration, Duration)) {
    let secs = median.as_secs_f64();
    println!(
        "  {what:<34} {:>8.1} ms {:>9.0} MB/s {:>7.1} M points/s   (fastest {:.1} ms, {:.0} MB/s)",
        secs * 1e3,
        bytes as f64 / secs / 1e6,
        POINTS as f64 / secs / 1e6,
        best.as_secs_f64() * 1e3,
        bytes as f64 / best.as_secs_f64() / 1e6,
    );
}

fn main() {
    let dir = std::env::temp_dir().join(format!("partsift-bench-{}", std::process::id()));
    std::fs::create_dir_all(&dir).unwrap();
    let options = LoadOptions::default();
    for (name, normals) in [("xyz.ply", false), ("xyz_normals.ply", true)] {
        let path = write_ply(&dir, name, normals);
        let size = std::fs::metadata(&path).unwrap().len();
        println!(
            "{POINTS} points, x y z{} float, {:.1} MB:",
            if normals { " nx ny nz" } else { "" },
            size as f64 / 1e6
        );
        let runs = 15;
        let read = timed(runs, || {
            black_box(std::fs::read(&path).unwrap());
        });
        report("std::fs::read", size, read);
        let loaded = timed(runs, || {
            black_box(load(&path, &options).unwrap());
        });
        report("partsift scan::load", size, loaded);
        let bytes = std::fs::read(&path).unwrap();
        let parsed = timed(runs, || {
            black_box(load_bytes(&path, &bytes, &options).unwrap());
        });
        report("partsift scan::load_bytes (parse)", size, parsed);
        let reference = timed(3, || {
            let mut file = std::io::BufReader::new(std::fs::File::open(&path).unwrap());
            let parser = ply_rs::parser::Parser::<ply_rs::ply::DefaultElement>::new();
            black_box(parser.read_ply(&mut file).unwrap());
        });
        report("ply-rs 0.1.3 read_ply", size, reference);
        println!(
            "  medians: load / fs::read {:.1}x the time; ply-rs / load {:.0}x",
            loaded.0.as_secs_f64() / read.0.as_secs_f64(),
            reference.0.as_secs_f64() / loaded.0.as_secs_f64()
        );
    }
    std::fs::remove_dir_all(&dir).unwrap();
}
