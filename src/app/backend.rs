//! Every library call the app makes, in one place, each turning library types into the plain
//! data the tabs show. All of these run on a worker thread, never on the UI thread.
//!
//! Wiring status: reading a parts bin, reading a scan and its clean-up go through the library.
//! Teaching, model files and verdicts still answer [`AppError::NotInThisBuild`] (shown as a
//! readable message) until the train loop is wired in here; the tabs stay as they are.

use std::path::{Path, PathBuf};

use partsift::learn;
use partsift::prep::{Fate, RecipeSettings};
use partsift::scan::{self, PointCloud};

use super::inspect::{Cleanup, InspectEvent, ScanShown, TrueSize, Verdict};
use super::map::MapData;
use super::review::Evaluation;
use super::teach::{BinSurvey, Taught, TeachEvent, TeachSettings, TypeEntry};
use super::view3d::{Cloud3d, PointKind};
use super::worker::{JobEvent, Reporter};
use super::AppError;

/// A model ready to use: what the tabs show of it. The network itself joins this struct when
/// the network module lands.
#[derive(Debug)]
pub(crate) struct LoadedModel {
    /// Shown in the status bar: the file name, or "taught <time>" for an unsaved model.
    pub(crate) name: String,
    pub(crate) part_types: Vec<String>,
    /// Preset, architecture, epochs, holdout accuracy: one line each.
    pub(crate) summary: Vec<String>,
}

/// Names of the training presets, in the order offered (from the network module).
pub(crate) const PRESETS: &[&str] = &[];
/// Names of the network architectures, in the order offered (from the network module).
pub(crate) const ARCHITECTURES: &[&str] = &[];

/// File name endings of the scan formats the readers take.
const SCAN_EXTENSIONS: [&str; 3] = ["ply", "xyz", "pcd"];

/// True when `path` ends in a scan file extension (any case).
pub(crate) fn is_scan_file(path: &Path) -> bool {
    path.extension()
        .and_then(|e| e.to_str())
        .is_some_and(|e| SCAN_EXTENSIONS.iter().any(|s| e.eq_ignore_ascii_case(s)))
}

/// The scan files directly inside `folder`, sorted by name. Fails only if the folder cannot
/// be listed; entries that cannot be read are skipped.
pub(crate) fn scan_files(folder: &Path) -> Result<Vec<PathBuf>, AppError> {
    let entries = std::fs::read_dir(folder).map_err(|e| AppError::io(folder, e))?;
    let mut files: Vec<PathBuf> = entries
        .filter_map(|e| e.ok().map(|e| e.path()))
        .filter(|p| p.is_file() && is_scan_file(p))
        .collect();
    files.sort();
    Ok(files)
}

/// The parts bin at `bin`: its types with their scans, warnings (too few scans, imbalance)
/// and the files that could not be read, each with its error.
pub(crate) fn survey_bin(bin: &Path) -> Result<BinSurvey, AppError> {
    let parts_bin = learn::scan_bin(bin).map_err(|e| AppError::Bin(e.to_string()))?;
    let counts = parts_bin.counts();
    let mut types: Vec<TypeEntry> = parts_bin
        .part_types
        .iter()
        .zip(&counts)
        .map(|(name, &count)| TypeEntry {
            name: name.clone(),
            scans: Vec::with_capacity(count),
            warnings: Vec::new(),
        })
        .collect();
    for scan in &parts_bin.scans {
        types[scan.label].scans.push(scan.path.clone());
    }
    let mut warnings = Vec::new();
    for warning in parts_bin.warnings() {
        match &warning {
            learn::BinWarning::FewScans { part_type, .. } => {
                if let Some(entry) = types.iter_mut().find(|t| &t.name == part_type) {
                    entry.warnings.push(warning.to_string());
                }
            }
            _ => warnings.push(warning.to_string()),
        }
    }
    Ok(BinSurvey {
        root: parts_bin.root.clone(),
        types,
        unreadable: Vec::new(),
        warnings,
    })
}

/// Reads a scan, in mm.
fn read_scan(path: &Path) -> Result<scan::Scan, AppError> {
    Ok(scan::load(path, &scan::LoadOptions::default())?)
}

fn point_kind(fate: Fate) -> PointKind {
    match fate {
        Fate::Part => PointKind::Part,
        Fate::NonFinite => PointKind::NonFinite,
        Fate::Cropped => PointKind::Cropped,
        Fate::Table => PointKind::Table,
        Fate::Stray => PointKind::Stray,
        Fate::OtherCluster => PointKind::OtherCluster,
    }
}

/// Shows one scan, then its verdict: sends [`InspectEvent::Shown`] as soon as the points are
/// read (mm), [`InspectEvent::CleanedUp`] after the recipe, then (with a model)
/// [`InspectEvent::Judged`]; stops at the first error, which it sends in that event.
pub(crate) fn inspect_scan(
    path: &Path,
    _model: Option<&LoadedModel>,
    report: &Reporter<InspectEvent>,
) {
    let scan = match read_scan(path) {
        Ok(scan) => scan,
        Err(e) => {
            report.send(InspectEvent::Shown(Err(e)));
            return;
        }
    };
    let cloud_mm = scan.cloud_mm();
    let guessed = if scan.units == scan.units_guess {
        " (guessed from the extent)"
    } else {
        ""
    };
    let facts = vec![
        scan.format.name().to_string(),
        format!("{} points", scan.cloud.len()),
        format!("units {}{guessed}", scan.units),
    ];
    report.send(InspectEvent::Shown(Ok(ScanShown {
        cloud: Cloud3d::new(cloud_mm.clone()),
        facts,
    })));
    let cleanup = RecipeSettings::default()
        .check()
        .map_err(|e| AppError::Recipe(e.to_string()))
        .and_then(|recipe| {
            recipe
                .run(&cloud_mm)
                .map_err(|e| AppError::Recipe(format!("{}: {e}", path.display())))
        })
        .map(|prepared| {
            // The whole scan in the recipe's frame, in mm: table at the bottom, part up.
            let frame = prepared.frame;
            let radius = prepared.size.radius_mm;
            let levelled = cloud_mm
                .positions
                .iter()
                .map(|&p| frame.apply(p).map(|c| c * radius))
                .collect();
            let kinds = prepared.fate.iter().map(|&f| point_kind(f)).collect();
            Cleanup {
                size: TrueSize {
                    extents_mm: prepared.size.extents_mm,
                    radius_mm: radius,
                },
                report: prepared
                    .report
                    .to_string()
                    .lines()
                    .map(str::to_string)
                    .collect(),
                levelled: Some(
                    Cloud3d::new(PointCloud::from_positions(levelled)).with_kinds(kinds),
                ),
            }
        });
    report.send(InspectEvent::CleanedUp(cleanup));
}

/// One scan's points in mm, for Review's side-by-side views.
pub(crate) fn load_cloud(path: &Path) -> Result<Cloud3d, AppError> {
    Ok(Cloud3d::new(read_scan(path)?.cloud_mm()))
}

/// Teaches a model on the parts bin at `bin`, sending [`TeachEvent`]s as it goes. Stops early
/// when `report` is cancelled and then returns the best model so far.
pub(crate) fn teach(
    _bin: &Path,
    _settings: &TeachSettings,
    _report: &Reporter<TeachEvent>,
) -> Result<Taught, AppError> {
    Err(AppError::NotInThisBuild { what: "teaching" })
}

/// Reads a model file.
pub(crate) fn open_model(_path: &Path) -> Result<LoadedModel, AppError> {
    Err(AppError::NotInThisBuild {
        what: "reading model files",
    })
}

/// Writes `model` to `path` atomically (a crash never leaves half a file).
pub(crate) fn save_model(_model: &LoadedModel, _path: &Path) -> Result<(), AppError> {
    Err(AppError::NotInThisBuild {
        what: "writing model files",
    })
}

/// How `model` does on every scan of the parts bin at `bin`.
pub(crate) fn evaluate(
    _bin: &Path,
    _model: &LoadedModel,
    _report: &Reporter<JobEvent<Evaluation>>,
) -> Result<Evaluation, AppError> {
    Err(AppError::NotInThisBuild {
        what: "checking a model",
    })
}

/// The verdict on one scan file.
pub(crate) fn classify(_path: &Path, _model: &LoadedModel) -> Result<Verdict, AppError> {
    Err(AppError::NotInThisBuild {
        what: "sorting scans",
    })
}

/// Every scan of the parts bin placed in 2D by the model's pooled features (PCA), with the
/// ones whose nearest neighbours carry another label marked.
pub(crate) fn map_bin(
    _bin: &Path,
    _model: &LoadedModel,
    _report: &Reporter<JobEvent<MapData>>,
) -> Result<MapData, AppError> {
    Err(AppError::NotInThisBuild {
        what: "the map of learned features",
    })
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn scan_files_lists_only_scans_sorted() {
        let dir =
            std::env::temp_dir().join(format!("partsift-app-scan-files-{}", std::process::id()));
        std::fs::create_dir_all(dir.join("sub.ply")).unwrap();
        for name in ["b.PLY", "a.xyz", "notes.txt", "c.pcd"] {
            std::fs::write(dir.join(name), b"").unwrap();
        }
        let names: Vec<String> = scan_files(&dir)
            .unwrap()
            .iter()
            .map(|p| p.file_name().unwrap().to_string_lossy().into_owned())
            .collect();
        assert_eq!(names, ["a.xyz", "b.PLY", "c.pcd"]);
        std::fs::remove_dir_all(&dir).unwrap();
    }

    #[test]
    fn scan_files_of_a_missing_folder_names_it() {
        let err = scan_files(Path::new("/no/such/folder")).unwrap_err();
        assert!(err.to_string().starts_with("/no/such/folder: "), "{err}");
    }
}
