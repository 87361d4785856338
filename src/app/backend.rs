//! Every library call the app makes, in one place, each turning library types into the plain
//! data the tabs show. All of these run on a worker thread, never on the UI thread, and all
//! of them are the calls the command line makes: reading a parts bin and its scans, the
//! clean-up, teaching, model files, verdicts with the points that drove them, checking a
//! model on a bin, and the map of learned features.

use std::path::{Path, PathBuf};

use rayon::prelude::*;

use partsift::learn::{
    self, CancelToken, PreparedCache, ScanOutcome, TrainEvent, TrainSettings, TrainedModel,
};
use partsift::net::{Arch, Preset};
use partsift::prep::{Fate, Frame, Prepared, RecipeSettings};
use partsift::scan::{self, PointCloud};
use partsift::verdict::{self, ClassifyOutcome};

use super::inspect::{Cleanup, InspectEvent, Judgement, ScanShown, Status, TrueSize, Verdict};
use super::map::{MapData, MapDot};
use super::review::{Case, Evaluation, TypeScores};
use super::teach::{BinSurvey, EpochStats, Taught, TeachEvent, TeachSettings, TypeEntry};
use super::view3d::{Cloud3d, PointKind};
use super::worker::{JobEvent, Reporter};
use super::AppError;

/// A model ready to use: the trained network with its recipe and calibration, and what the
/// tabs show of it.
#[derive(Clone, Debug)]
pub(crate) struct LoadedModel {
    /// Shown in the status bar: the file name, or "taught on <bin>" for an unsaved model.
    pub(crate) name: String,
    /// Architecture, preset, epochs, holdout accuracy, review threshold: one line each.
    pub(crate) summary: Vec<String>,
    pub(crate) trained: TrainedModel,
}

impl LoadedModel {
    pub(crate) fn new(name: String, trained: TrainedModel) -> Self {
        LoadedModel {
            name,
            summary: summary_lines(&trained),
            trained,
        }
    }

    pub(crate) fn part_types(&self) -> &[String] {
        self.trained.part_types()
    }
}

/// What the Teach tab and the status bar say about a model.
fn summary_lines(model: &TrainedModel) -> Vec<String> {
    let network = model.network();
    let mut lines = vec![format!(
        "{} network, {} preset ({} points), {}",
        model.arch(),
        model.preset(),
        network.points(),
        if model.size_aware() {
            "sees the true size"
        } else {
            "shape only"
        }
    )];
    if let Some(s) = model.summary() {
        let taught: usize = s.train_scans.iter().sum();
        let held: usize = s.holdout_scans.iter().sum();
        lines.push(format!(
            "{} of {} epochs run ({}), kept epoch {}",
            s.epochs_run,
            s.epochs,
            match s.ended {
                learn::RunEnd::Completed => "all",
                learn::RunEnd::EarlyStop => "stopped improving",
                learn::RunEnd::Cancelled => "stopped by hand",
                learn::RunEnd::Diverged => "loss diverged",
            },
            s.best_epoch
        ));
        lines.push(format!(
            "holdout accuracy {:.1} % on {held} scans not taught on ({taught} taught)",
            100.0 * s.holdout_accuracy
        ));
        if !s.skipped_scans.is_empty() {
            lines.push(format!(
                "{} scans left out (unreadable): {}",
                s.skipped_scans.len(),
                s.skipped_scans.join(", ")
            ));
        }
    }
    let calibration = model.calibration();
    lines.push(format!(
        "verdicts below {:.0} % confidence go to review",
        100.0 * calibration.review_threshold()
    ));
    lines
}

/// Names of the training presets, in the order offered.
pub(crate) const PRESETS: &[&str] = &Preset::NAMES;
/// Names of the network architectures, in the order offered.
pub(crate) const ARCHITECTURES: &[&str] = &Arch::NAMES;

/// Share of a teaching run's progress bar given to cleaning up the scans (fast when cached).
const PREPARE_SHARE: f32 = 0.1;

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
/// and the files that could not be read, each with its error (every scan is read, in
/// parallel, to find those).
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
    let unreadable = parts_bin
        .scans
        .par_iter()
        .filter_map(|s| {
            read_scan(&s.path)
                .err()
                .map(|e| (s.path.clone(), e.to_string()))
        })
        .collect();
    Ok(BinSurvey {
        root: parts_bin.root.clone(),
        types,
        unreadable,
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

/// A point of the input cloud (mm) in the recipe's frame, still in mm: table at the bottom,
/// part up, centred on the part.
fn levelled(frame: &Frame, radius_mm: f32, p: [f32; 3]) -> [f32; 3] {
    frame.apply(p).map(|c| c * radius_mm)
}

/// What the tab shows of a clean-up: the part's true size, the report, and the whole scan
/// levelled with each point's fate.
fn cleanup_view(cloud_mm: &PointCloud, prepared: &Prepared) -> Cleanup {
    let radius = prepared.size.radius_mm;
    let positions = cloud_mm
        .positions
        .iter()
        .map(|&p| levelled(&prepared.frame, radius, p))
        .collect();
    let kinds = prepared.fate.iter().map(|&f| point_kind(f)).collect();
    Cleanup {
        size: TrueSize {
            extents_mm: prepared.size.extents_mm,
            radius_mm: radius,
        },
        report: prepared.report.steps(),
        warnings: prepared
            .report
            .warnings
            .iter()
            .map(|w| w.to_string())
            .collect(),
        levelled: Some(Cloud3d::new(PointCloud::from_positions(positions)).with_kinds(kinds)),
    }
}

fn app_verdict(v: &verdict::Verdict) -> Verdict {
    Verdict {
        part_type: v.part_type.clone(),
        confidence: v.confidence,
        status: match v.status {
            verdict::Status::Sure => Status::Sure,
            verdict::Status::Review => Status::Review,
        },
    }
}

/// The verdict with every type's score, highest first, and the part's points coloured by how
/// much each drove the verdict (the network's saliency on its input points, spread onto the
/// scan's part points so the picture keeps the scan's density).
fn judgement(
    model: &TrainedModel,
    inspection: &learn::Inspection,
    cloud_mm: &PointCloud,
) -> Judgement {
    let mut scores = inspection.verdict.scores.clone();
    scores.sort_by(|a, b| b.1.total_cmp(&a.1));
    let saliency = model.saliency(inspection, inspection.class);
    let on_input = learn::values_on_input(&inspection.prepared, cloud_mm, &saliency);
    let prepared = &inspection.prepared;
    let (points, influence): (Vec<[f32; 3]>, Vec<f32>) = cloud_mm
        .positions
        .iter()
        .zip(&prepared.fate)
        .zip(on_input)
        .filter(|((_, &fate), _)| fate == Fate::Part)
        .map(|((&p, _), value)| (levelled(&prepared.frame, prepared.size.radius_mm, p), value))
        .unzip();
    Judgement {
        verdict: app_verdict(&inspection.verdict),
        scores,
        prepared: Some(Cloud3d::new(PointCloud::from_positions(points)).with_influence(influence)),
    }
}

/// Shows one scan, then its verdict: sends [`InspectEvent::Shown`] as soon as the points are
/// read (mm), [`InspectEvent::CleanedUp`] after the recipe (the model's, or the default one
/// without a model), then (with a model) [`InspectEvent::Judged`]; stops at the first error,
/// which it sends in that event.
pub(crate) fn inspect_scan(
    path: &Path,
    model: Option<&LoadedModel>,
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
    let prepared = match model {
        Some(m) => m.trained.recipe().run(&cloud_mm).map_err(|e| e.to_string()),
        None => RecipeSettings::default()
            .check()
            .map_err(|e| e.to_string())
            .and_then(|recipe| recipe.run(&cloud_mm).map_err(|e| e.to_string())),
    };
    let prepared = match prepared {
        Ok(p) => p,
        Err(e) => {
            let e = AppError::Recipe(format!("{}: {e}", path.display()));
            report.send(InspectEvent::CleanedUp(Err(e)));
            return;
        }
    };
    report.send(InspectEvent::CleanedUp(Ok(cleanup_view(
        &cloud_mm, &prepared,
    ))));
    let Some(model) = model.filter(|_| !report.is_cancelled()) else {
        return;
    };
    let judged = model
        .trained
        .judge(prepared)
        .map(|inspection| judgement(&model.trained, &inspection, &cloud_mm))
        .map_err(|e| AppError::Verdict(format!("{}: {e}", path.display())));
    report.send(InspectEvent::Judged(judged));
}

/// One scan for Review's side-by-side views: levelled by the default clean-up with each
/// point's fate (so both scans stand on their table, framed on the part), or as read (mm)
/// when the clean-up finds nothing to keep.
pub(crate) fn load_cloud(path: &Path) -> Result<Cloud3d, AppError> {
    let cloud_mm = read_scan(path)?.cloud_mm();
    let cleaned = RecipeSettings::default()
        .check()
        .ok()
        .and_then(|recipe| recipe.run(&cloud_mm).ok())
        .and_then(|prepared| cleanup_view(&cloud_mm, &prepared).levelled);
    Ok(cleaned.unwrap_or_else(|| Cloud3d::new(cloud_mm)))
}

/// A folder's name for messages: its last component, or the whole path.
fn folder_name(path: &Path) -> String {
    path.file_name()
        .map(|n| n.to_string_lossy().into_owned())
        .unwrap_or_else(|| path.display().to_string())
}

/// Teaches a model on the parts bin at `bin`, sending [`TeachEvent`]s as it goes (cleaning
/// up, then one per epoch). Stops early when `report` is cancelled and then returns the best
/// model so far. Cleaned scans are cached, so a second run starts at once.
pub(crate) fn teach(
    bin: &Path,
    settings: &TeachSettings,
    report: &Reporter<TeachEvent>,
) -> Result<Taught, AppError> {
    let choice = |e: partsift::net::UnknownChoice| AppError::Settings(e.to_string());
    let plan = TrainSettings {
        arch: settings.architecture.parse().map_err(choice)?,
        preset: settings.preset.parse().map_err(choice)?,
        epochs: settings.epochs as usize,
        seed: settings.seed,
        ..TrainSettings::default()
    }
    .check()
    .map_err(|e| AppError::Settings(e.to_string()))?;
    let parts_bin = learn::scan_bin(bin).map_err(|e| AppError::Bin(e.to_string()))?;
    let cache = PreparedCache::at_default_location();
    let on_event = |event: TrainEvent| match event {
        TrainEvent::Preparing { done, total } => {
            report.send(TeachEvent::Progress {
                fraction: PREPARE_SHARE * done as f32 / total.max(1) as f32,
                doing: format!("cleaning up scans, {done} of {total}"),
            });
        }
        TrainEvent::EpochDone {
            epoch,
            epochs,
            train_loss,
            train_accuracy,
            holdout_accuracy,
            ..
        } => {
            report.send(TeachEvent::Epoch(EpochStats {
                epoch: epoch as u32,
                loss: train_loss,
                train_accuracy,
                holdout_accuracy,
            }));
            report.send(TeachEvent::Progress {
                fraction: PREPARE_SHARE
                    + (1.0 - PREPARE_SHARE) * epoch as f32 / epochs.max(1) as f32,
                doing: format!("epoch {epoch} of {epochs}"),
            });
        }
        TrainEvent::EarlyStop { epoch } => {
            report.send(TeachEvent::Progress {
                fraction: 1.0,
                doing: format!("holdout accuracy stopped improving; ended after epoch {epoch}"),
            });
        }
        TrainEvent::Cancelled => {
            report.send(TeachEvent::Progress {
                fraction: 1.0,
                doing: "stopped; keeping the best model so far".to_owned(),
            });
        }
        TrainEvent::ScanSkipped { .. } | TrainEvent::Finished { .. } => {}
    };
    let run = learn::train(
        &parts_bin,
        &plan,
        cache.as_ref(),
        &on_event,
        report.cancel_token(),
    )
    .map_err(|e| AppError::Learn(e.to_string()))?;
    let stopped = run
        .model
        .summary()
        .is_some_and(|s| s.ended == learn::RunEnd::Cancelled);
    let held = run.holdout.len();
    let evaluation = review_data(
        format!("the {held} holdout scans of this run (not taught on)"),
        &run.holdout,
        run.model.part_types(),
    )?;
    let name = format!("taught on {} (not saved)", folder_name(bin));
    Ok(Taught {
        model: Box::new(LoadedModel::new(name, run.model)),
        evaluation: Some(evaluation),
        stopped,
    })
}

/// Reads a model file.
pub(crate) fn open_model(path: &Path) -> Result<LoadedModel, AppError> {
    let trained = TrainedModel::open(path).map_err(|e| AppError::Model(e.to_string()))?;
    Ok(LoadedModel::new(folder_name(path), trained))
}

/// Writes `model` to `path` atomically (a crash never leaves half a file).
pub(crate) fn save_model(model: &LoadedModel, path: &Path) -> Result<(), AppError> {
    model
        .trained
        .save(path)
        .map_err(|e| AppError::Model(e.to_string()))
}

/// The Review tab's data from scored scans whose labels index `part_types`.
fn review_data(
    scans_from: String,
    outcomes: &[ScanOutcome],
    part_types: &[String],
) -> Result<Evaluation, AppError> {
    let scored =
        learn::Evaluation::new(outcomes, part_types).map_err(|e| AppError::Learn(e.to_string()))?;
    let metrics = &scored.metrics;
    let n = part_types.len();
    let confusion = (0..n * n)
        .map(|i| metrics.confusion.get(i / n, i % n) as u32)
        .collect();
    let per_type = metrics
        .per_type
        .iter()
        .map(|t| {
            // No scans of a type: its scores are undefined, shown as such.
            let defined = |x: f64| if t.support == 0 { f32::NAN } else { x as f32 };
            TypeScores {
                precision: defined(t.precision),
                recall: defined(t.recall),
                f1: defined(t.f1),
            }
        })
        .collect();
    let cases: Vec<Case> = outcomes
        .iter()
        .map(|o| Case {
            path: o.path.clone(),
            truth: o.truth,
            predicted: o.predicted,
            confidence: o.confidence,
        })
        .collect();
    // A type's typical scan: its most confidently recognised one.
    let typical = (0..n)
        .map(|t| {
            cases
                .iter()
                .filter(|c| c.truth == t && c.predicted == t)
                .max_by(|a, b| a.confidence.total_cmp(&b.confidence))
                .map(|c| c.path.clone())
        })
        .collect();
    Ok(Evaluation {
        scans_from,
        part_types: part_types.to_vec(),
        confusion,
        per_type,
        cases,
        typical,
    })
}

/// Sends each `Preparing` event as the share `done / total` of `share` of the job.
fn preparing_fraction<T>(
    report: &Reporter<JobEvent<T>>,
    share: f32,
) -> impl Fn(TrainEvent) + Sync + '_
where
    JobEvent<T>: Send,
{
    move |event| {
        if let TrainEvent::Preparing { done, total } = event {
            report.send(JobEvent::Fraction(
                share * done as f32 / total.max(1) as f32,
            ));
        }
    }
}

/// How `model` does on every scan of the parts bin at `bin`.
pub(crate) fn evaluate(
    bin: &Path,
    model: &LoadedModel,
    report: &Reporter<JobEvent<Evaluation>>,
) -> Result<Evaluation, AppError> {
    let parts_bin = learn::scan_bin(bin).map_err(|e| AppError::Bin(e.to_string()))?;
    let cache = PreparedCache::at_default_location();
    let run = learn::evaluate(
        &model.trained,
        &parts_bin,
        cache.as_ref(),
        &preparing_fraction(report, 0.95),
        report.cancel_token(),
    )
    .map_err(|e| AppError::Learn(e.to_string()))?;
    let count = run.outcomes.len();
    review_data(
        format!(
            "all {count} scans of the parts bin {} (including those taught on)",
            folder_name(bin)
        ),
        &run.outcomes,
        &run.evaluation.metrics.part_types,
    )
}

/// The verdicts on scan files, in the order given, classified in parallel. A file that cannot
/// be read or cleaned up gets its error. Files not started when the job is cancelled are left
/// out.
pub(crate) fn classify(
    paths: &[PathBuf],
    model: &LoadedModel,
    cancel: &CancelToken,
) -> Vec<Result<Verdict, AppError>> {
    model
        .trained
        .classify_files(paths, &|_, _| {}, cancel)
        .into_iter()
        .map(|row| match row.outcome {
            ClassifyOutcome::Verdict(v) => Ok(app_verdict(&v)),
            ClassifyOutcome::Failed(message) => Err(AppError::Verdict(message)),
        })
        .collect()
}

/// Every scan of the parts bin placed in 2D by the model's pooled features (PCA), with the
/// ones whose nearest neighbours carry another label marked.
pub(crate) fn map_bin(
    bin: &Path,
    model: &LoadedModel,
    report: &Reporter<JobEvent<MapData>>,
) -> Result<MapData, AppError> {
    let parts_bin = learn::scan_bin(bin).map_err(|e| AppError::Bin(e.to_string()))?;
    let cache = PreparedCache::at_default_location();
    let dataset = learn::Dataset::prepare(
        &parts_bin,
        model.trained.recipe(),
        cache.as_ref(),
        &preparing_fraction(report, 0.8),
        report.cancel_token(),
    )
    .map_err(|e| AppError::Learn(e.to_string()))?;
    let features = model
        .trained
        .embed(&dataset)
        .map_err(|e| AppError::Learn(e.to_string()))?;
    let labels = dataset.labels();
    let width = model.trained.network().embedding_width();
    let points = learn::feature_map(&features, width, &labels);
    let dots = dataset
        .scans()
        .iter()
        .zip(points)
        .map(|(scan, point)| MapDot {
            path: scan.path.clone(),
            label: scan.label,
            xy: point.xy,
            suspicious: point.suspicious,
        })
        .collect();
    Ok(MapData {
        part_types: dataset.part_types().to_vec(),
        dots,
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
