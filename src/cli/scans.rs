//! `info`, `clean` and `synth`: scan files in, descriptions and cleaned files out.

use std::path::Path;

use serde_json::json;

use partsift::prep::{Recipe, RecipeSettings};
use partsift::scan::write::{write_ply, PlyEncoding};
use partsift::scan::{self, LoadOptions, PointCloud, Scan, Units};
use partsift::synth::{self, SensorSettings};

use super::Outcome;

/// `partsift info`: one block (or one JSON line) per scan; a bad file is reported and the
/// rest go on.
pub(crate) fn info(paths: &[std::path::PathBuf], json: bool, units: Option<Units>) -> Outcome {
    let recipe = match RecipeSettings::default().check() {
        Ok(recipe) => recipe,
        Err(e) => return Outcome::Usage(e.to_string()),
    };
    let options = LoadOptions {
        units,
        ..LoadOptions::default()
    };
    let mut failed = false;
    for path in paths {
        let loaded = scan::load(path, &options);
        let cleanup = loaded.as_ref().ok().map(|s| recipe.run(&s.cloud_mm()));
        match (&loaded, json) {
            (Ok(scan), true) => {
                let mut line = scan_json(scan);
                if let Some(Ok(prepared)) = &cleanup {
                    line["cleanup"] = json!(prepared.report.counts);
                }
                println!("{line}");
            }
            (Ok(scan), false) => {
                print_scan(scan);
                match &cleanup {
                    Some(Ok(prepared)) => println!("clean-up would do:\n{}", prepared.report),
                    Some(Err(e)) => println!("clean-up would fail: {e}"),
                    None => {}
                }
            }
            (Err(e), true) => {
                failed = true;
                println!(
                    "{}",
                    json!({ "path": path.to_string_lossy(), "error": e.to_string() })
                );
            }
            (Err(e), false) => {
                failed = true;
                eprintln!("error: {e}");
            }
        }
    }
    if failed {
        Outcome::SomeFailed
    } else {
        Outcome::Ok
    }
}

fn scan_json(scan: &Scan) -> serde_json::Value {
    json!({
        "path": scan.path.to_string_lossy(),
        "format": scan.format.name(),
        "points": scan.stored_points,
        "faces": scan.faces,
        "properties": scan.properties,
        "bounds": scan.bounds,
        "units_guess": scan.units_guess,
        "units": scan.units,
        "dropped_non_finite": scan.dropped_non_finite,
    })
}

fn print_scan(scan: &Scan) {
    println!("{}", scan.path.display());
    println!("  format      {}", scan.format.name());
    println!(
        "  points      {} stored, {} read",
        scan.stored_points,
        scan.cloud.len()
    );
    if scan.faces > 0 {
        println!(
            "  faces       {} (points sampled on the surface)",
            scan.faces
        );
    }
    if scan.dropped_non_finite > 0 {
        println!(
            "  dropped     {} points with NaN or infinite coordinates",
            scan.dropped_non_finite
        );
    }
    println!("  properties  {}", scan.properties.join(" "));
    if let Some([lo, hi]) = scan.bounds {
        println!(
            "  bounds      [{:.4}, {:.4}, {:.4}] .. [{:.4}, {:.4}, {:.4}] ({})",
            lo[0], lo[1], lo[2], hi[0], hi[1], hi[2], scan.units
        );
    }
    let guessed = if scan.units == scan.units_guess {
        " (guessed from the extent)"
    } else {
        ""
    };
    println!("  units       {}{guessed}", scan.units);
}

/// `partsift clean`: the kept points in the input's own coordinates, or the prepared cloud.
pub(crate) fn clean(
    path: &Path,
    output: &Path,
    prepared_out: bool,
    ascii: bool,
    units: Option<Units>,
    settings: RecipeSettings,
) -> Outcome {
    let recipe: Recipe = match settings.check() {
        Ok(recipe) => recipe,
        Err(e) => return Outcome::Usage(e.to_string()),
    };
    let scan = match scan::load(
        path,
        &LoadOptions {
            units,
            ..LoadOptions::default()
        },
    ) {
        Ok(scan) => scan,
        Err(e) => {
            eprintln!("error: {e}");
            return Outcome::SomeFailed;
        }
    };
    let prepared = match recipe.run(&scan.cloud_mm()) {
        Ok(prepared) => prepared,
        Err(e) => {
            eprintln!("error: {}: {e}", path.display());
            return Outcome::SomeFailed;
        }
    };
    let cloud = if prepared_out {
        let radius = prepared.size.radius_mm;
        PointCloud::from_positions(
            prepared
                .points
                .iter()
                .map(|p| p.map(|c| c * radius))
                .collect(),
        )
    } else {
        scan.cloud.select(&prepared.kept)
    };
    let encoding = if ascii {
        PlyEncoding::Ascii
    } else {
        PlyEncoding::BinaryLe
    };
    if let Err(e) = write_ply(output, &cloud, encoding) {
        eprintln!("error: could not write {}: {e}", output.display());
        return Outcome::SomeFailed;
    }
    println!(
        "{} ({} units {})",
        path.display(),
        scan.format.name(),
        scan.units
    );
    print!("{}", prepared.report);
    println!("wrote {} points to {}", cloud.len(), output.display());
    Outcome::Ok
}

/// `partsift synth`: a parts bin of practice scans.
pub(crate) fn synth(
    out_dir: &Path,
    per_type: usize,
    seed: u64,
    [width, height]: [u32; 2],
) -> Outcome {
    let settings = SensorSettings {
        width_px: width,
        height_px: height,
        ..SensorSettings::default()
    };
    match synth::write_parts_bin(out_dir, per_type, seed, &settings) {
        Ok(summary) => {
            println!(
                "wrote {} scans ({} points) of {} part types to {}",
                summary.scans.len(),
                summary.total_points(),
                synth::PartType::ALL.len(),
                out_dir.display()
            );
            Outcome::Ok
        }
        Err(e @ synth::SynthError::Write { .. }) => {
            eprintln!("error: {e}");
            Outcome::SomeFailed
        }
        Err(e) => Outcome::Usage(e.to_string()),
    }
}
