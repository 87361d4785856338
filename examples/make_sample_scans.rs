//! Regenerates the committed practice bundle `sample-scans/` (every part type, 12 scans each,
//! at the bundle's low sensor resolution), then times a few full-resolution scans.
//!
//! Run: `cargo run --release --no-default-features --example make_sample_scans`
//! (optionally followed by another output folder).

use std::path::PathBuf;
use std::process::ExitCode;
use std::time::Instant;

use partsift::synth::{generate_scan, write_parts_bin, PartType, SensorSettings};

/// The bundle's seed and size; change them only together with the committed files.
const BUNDLE_SEED: u64 = 2024;
const BUNDLE_PER_TYPE: usize = 12;

fn main() -> ExitCode {
    let out_dir = std::env::args_os()
        .nth(1)
        .map(PathBuf::from)
        .unwrap_or_else(|| PathBuf::from(env!("CARGO_MANIFEST_DIR")).join("sample-scans"));
    if let Err(e) = remove_old_scans(&out_dir) {
        eprintln!("could not clear old scans in {}: {e}", out_dir.display());
        return ExitCode::FAILURE;
    }
    let settings = SensorSettings::sample_bundle();
    let start = Instant::now();
    let summary = match write_parts_bin(&out_dir, BUNDLE_PER_TYPE, BUNDLE_SEED, &settings) {
        Ok(summary) => summary,
        Err(e) => {
            eprintln!("{e}");
            return ExitCode::FAILURE;
        }
    };
    let elapsed = start.elapsed();
    let bytes: u64 = summary
        .scans
        .iter()
        .filter_map(|s| std::fs::metadata(&s.path).ok())
        .map(|m| m.len())
        .sum();
    let counts: Vec<usize> = summary.scans.iter().map(|s| s.points).collect();
    println!(
        "wrote {} scans to {} in {:.2} s ({:.1} ms a scan on {} threads): {} points \
         ({} to {} a scan), {:.2} MB",
        summary.scans.len(),
        out_dir.display(),
        elapsed.as_secs_f64(),
        elapsed.as_secs_f64() * 1000.0 / summary.scans.len() as f64
            * rayon::current_num_threads() as f64,
        rayon::current_num_threads(),
        summary.total_points(),
        counts.iter().min().unwrap_or(&0),
        counts.iter().max().unwrap_or(&0),
        bytes as f64 / 1e6,
    );

    // Full resolution, one thread: the time a single scan takes and its size.
    let full = SensorSettings::default();
    for part_type in PartType::ALL {
        let start = Instant::now();
        let mut points = Vec::new();
        for seed in 0..4 {
            match generate_scan(part_type, seed, &full) {
                Ok(cloud) => points.push(cloud.len()),
                Err(e) => {
                    eprintln!("{e}");
                    return ExitCode::FAILURE;
                }
            }
        }
        println!(
            "full resolution {:>15}: {:5.1} ms a scan, points {:?}",
            part_type.name(),
            start.elapsed().as_secs_f64() * 1000.0 / 4.0,
            points
        );
    }
    ExitCode::SUCCESS
}

/// Deletes the scan files (`<type>_<nnn>.ply|.xyz`) an earlier run left in the type folders,
/// so a changed format mix leaves no stale files. Nothing else is touched.
fn remove_old_scans(out_dir: &std::path::Path) -> std::io::Result<()> {
    for part_type in PartType::ALL {
        let dir = out_dir.join(part_type.name());
        let Ok(entries) = std::fs::read_dir(&dir) else {
            continue;
        };
        for entry in entries {
            let path = entry?.path();
            let name = path.file_name().and_then(|n| n.to_str()).unwrap_or("");
            let is_scan = name.starts_with(&format!("{}_", part_type.name()))
                && (name.ends_with(".ply") || name.ends_with(".xyz"));
            if is_scan {
                std::fs::remove_file(&path)?;
            }
        }
    }
    Ok(())
}
