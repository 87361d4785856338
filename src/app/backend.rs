//! Every library call the app makes, in one place, each turning library types into the plain
//! data the tabs show. All of these run on a worker thread, never on the UI thread.
//!
//! Wiring status: the scan readers, the clean-up recipe, the network and the train loop are
//! being written beside the app. Until they land, the calls that need them answer
//! [`AppError::NotInThisBuild`], which the tabs show as a readable message. Wiring one in means
//! replacing that body with the library call; the signatures (and so the tabs) stay as they are.

use std::path::{Path, PathBuf};

use super::inspect::{InspectEvent, Verdict};
use super::map::MapData;
use super::review::Evaluation;
use super::teach::{BinSurvey, Taught, TeachEvent, TeachSettings};
use super::view3d::Cloud3d;
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
pub(crate) fn survey_bin(_bin: &Path) -> Result<BinSurvey, AppError> {
    Err(AppError::NotInThisBuild {
        what: "reading a parts bin",
    })
}

/// Shows one scan, then its verdict: sends [`InspectEvent::Shown`] as soon as the points are
/// read (mm), [`InspectEvent::CleanedUp`] after the recipe, then (with a model)
/// [`InspectEvent::Judged`]; stops at the first error, which it sends in that event.
pub(crate) fn inspect_scan(
    _path: &Path,
    _model: Option<&LoadedModel>,
    report: &Reporter<InspectEvent>,
) {
    report.send(InspectEvent::Shown(Err(AppError::NotInThisBuild {
        what: "reading scans",
    })));
}

/// One scan's points in mm, for Review's side-by-side views.
pub(crate) fn load_cloud(_path: &Path) -> Result<Cloud3d, AppError> {
    Err(AppError::NotInThisBuild {
        what: "reading scans",
    })
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
