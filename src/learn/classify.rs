//! Classifying scans with a trained model: one cloud (the app's Inspect tab, with the points
//! that drove the verdict), one file, or many files and folders (the Sort tab and
//! `partsift classify`), where a bad file becomes a row with its error and the rest go on.

use std::collections::HashSet;
use std::fs;
use std::path::{Path, PathBuf};

use rayon::prelude::*;

use crate::graph::spatial::SpatialIndex;
use crate::learn::bin::{is_plain_visible_name, move_into};
use crate::learn::dataset::SkippedScan;
use crate::learn::model::TrainedModel;
use crate::learn::progress::CancelToken;
use crate::learn::views::mirror_averaged_scores;
use crate::prep::{Fate, PrepError, Prepared};
use crate::scan::{self, LoadOptions, PointCloud};
use crate::verdict::{ClassifyOutcome, ClassifyRow, Status, Verdict, VerdictError};

/// The folder of [`copy_sorted`]'s output that takes the scans whose verdict is `review`.
pub const REVIEW_FOLDER: &str = "_to-review";

/// File extensions taken as scans when walking a folder (any case). A file named on its own
/// is read whatever its extension.
const SCAN_EXTENSIONS: [&str; 3] = ["ply", "xyz", "pcd"];

/// The exponent `alpha` of Zheng et al. 2019's point saliency score `r^(1 + alpha) dS/dr`;
/// they use 1 (recalled from memory).
const SALIENCY_ALPHA: i32 = 1;

/// The percentile of the positive saliency scores that maps to 1 (our choice, no source: the
/// picture's contrast).
const SALIENCY_FULL_SCALE_QUANTILE: usize = 95;

/// One scan as the model saw it, and what it made of it.
#[derive(Clone, Debug)]
pub struct Inspection {
    /// The cleaned scan: the network's input points, the part's true size (mm), the fate of
    /// every input point and the clean-up report.
    pub prepared: Prepared,
    pub verdict: Verdict,
    /// The index of the verdict's part type in [`TrainedModel::part_types`].
    pub class: usize,
}

/// Why one cloud got no verdict.
#[derive(Debug, thiserror::Error, PartialEq)]
pub enum InspectError {
    #[error(transparent)]
    Prep(#[from] PrepError),
    #[error(transparent)]
    Verdict(#[from] VerdictError),
    #[error("the clean-up gave {got} points, the network takes {expected}")]
    PointCount { got: usize, expected: usize },
}

impl TrainedModel {
    /// Cleans `cloud_mm` (positions in mm, any frame) with the model's recipe, runs the
    /// network in evaluation mode on the prepared cloud and its mirror image (see
    /// `learn/views.rs`) and makes the calibrated verdict. Deterministic.
    ///
    /// Errors: the clean-up finds no usable point, or the network's scores are not finite.
    pub fn inspect(&self, cloud_mm: &PointCloud) -> Result<Inspection, InspectError> {
        self.judge(self.recipe().run(cloud_mm)?)
    }

    /// The calibrated verdict on a scan already cleaned with [`TrainedModel::recipe`] (so a
    /// caller can show the clean-up before the verdict). Deterministic.
    ///
    /// Errors: `prepared` does not have the network's number of points (another recipe), or
    /// the network's scores are not finite.
    pub fn judge(&self, prepared: Prepared) -> Result<Inspection, InspectError> {
        let (points, size) = self.network_input(&prepared)?;
        let logits = mirror_averaged_scores(self.network(), &points, &size);
        let verdict = Verdict::from_logits(&logits, self.part_types(), self.calibration())?;
        let class = self
            .part_types()
            .iter()
            .position(|t| *t == verdict.part_type)
            .unwrap_or_default();
        Ok(Inspection {
            prepared,
            verdict,
            class,
        })
    }

    /// Which prepared points drove the score of part type `class`: one value per point of
    /// `inspection.prepared.points`, in [0, 1] (1 for the strongest twentieth). The score of Zheng et
    /// al. 2019 ("PointCloud Saliency Maps"): `r^2 dS/dr`, the gain in the class score `S`
    /// from moving a point out from the centre, times its distance `r` from the centre
    /// squared; points that argue against the class get 0. One backward pass through the
    /// network on the cloud as prepared (not its mirror image); no gradient flows through the
    /// choice of neighbours.
    ///
    /// Panics if `class` is not below the number of part types.
    pub fn saliency(&self, inspection: &Inspection, class: usize) -> Vec<f32> {
        let Ok((points, size)) = self.network_input(&inspection.prepared) else {
            return vec![0.0; inspection.prepared.points.len()];
        };
        let gradient = self.network().input_saliency(&points, &size, class);
        let mut scores: Vec<f32> = points
            .chunks_exact(3)
            .zip(gradient.chunks_exact(3))
            .map(|(p, g)| {
                let r = (p[0] * p[0] + p[1] * p[1] + p[2] * p[2]).sqrt();
                // dS/dr = g . p / r, so r^(1 + alpha) dS/dr = r^alpha (g . p).
                let score = r.powi(SALIENCY_ALPHA) * (g[0] * p[0] + g[1] * p[1] + g[2] * p[2]);
                score.max(0.0)
            })
            .collect();
        // Scaled so the top twentieth of the points that argue for the class read 1: scaled
        // by the single largest, a few outliers would leave every other point near 0.
        let mut positive: Vec<f32> = scores.iter().copied().filter(|&s| s > 0.0).collect();
        let top = if positive.is_empty() {
            0.0
        } else {
            let at = (positive.len() * SALIENCY_FULL_SCALE_QUANTILE) / 100;
            let at = at.min(positive.len() - 1);
            *positive.select_nth_unstable_by(at, f32::total_cmp).1
        };
        if top > 0.0 && top.is_finite() {
            for s in &mut scores {
                *s = (*s / top).min(1.0);
            }
        } else {
            scores.fill(0.0);
        }
        scores
    }

    /// Reads the scan file at `path` (its units guessed from the extent) and classifies it.
    /// Never fails: an unreadable file, or one the clean-up cannot use, gives a row with the
    /// error (naming the file and, where there is one, the line or byte offset).
    pub fn classify_file(&self, path: &Path) -> ClassifyRow {
        let outcome = match scan::load(path, &LoadOptions::default()) {
            Err(e) => ClassifyOutcome::Failed(e.to_string()),
            Ok(scan) => match self.inspect(&scan.cloud_mm()) {
                Ok(inspection) => ClassifyOutcome::Verdict(inspection.verdict),
                Err(e) => ClassifyOutcome::Failed(format!("{}: {e}", path.display())),
            },
        };
        ClassifyRow {
            path: path.to_path_buf(),
            outcome,
        }
    }

    /// Classifies the scan files at `paths`, in parallel on the current rayon pool (one file
    /// per task), and returns one row per file in the order given. `on_done(done, total)` is
    /// called after each file, from whichever thread finished it. When `cancel` is set, the
    /// files not yet started are left out of the result.
    pub fn classify_files(
        &self,
        paths: &[PathBuf],
        on_done: &(dyn Fn(usize, usize) + Sync),
        cancel: &CancelToken,
    ) -> Vec<ClassifyRow> {
        let done = std::sync::atomic::AtomicUsize::new(0);
        paths
            .par_iter()
            .filter_map(|path| {
                if cancel.is_cancelled() {
                    return None;
                }
                let row = self.classify_file(path);
                let n = done.fetch_add(1, std::sync::atomic::Ordering::Relaxed) + 1;
                on_done(n, paths.len());
                Some(row)
            })
            .collect()
    }

    /// The prepared cloud as the network takes it: `N x 3` flat points and 4 size features.
    pub(crate) fn network_input(
        &self,
        prepared: &Prepared,
    ) -> Result<(Vec<f32>, [f32; 4]), InspectError> {
        let expected = self.network().points();
        if prepared.points.len() != expected {
            return Err(InspectError::PointCount {
                got: prepared.points.len(),
                expected,
            });
        }
        let points = prepared.points.iter().flatten().copied().collect();
        Ok((points, prepared.size.log_features()))
    }
}

/// Spreads per-point values of the prepared cloud (e.g. [`TrainedModel::saliency`]) onto the
/// input cloud the inspection was made from: each point the recipe kept gets the value of
/// its nearest prepared point, every removed point 0. One value per point of `cloud_mm`.
///
/// Panics if `values` does not have one value per prepared point or `cloud_mm` is not the
/// cloud `prepared` was made from (its length differs from `prepared.fate`).
pub fn values_on_input(prepared: &Prepared, cloud_mm: &PointCloud, values: &[f32]) -> Vec<f32> {
    assert_eq!(
        values.len(),
        prepared.points.len(),
        "one value per prepared point"
    );
    assert_eq!(
        cloud_mm.len(),
        prepared.fate.len(),
        "not the cloud of this inspection"
    );
    let index = SpatialIndex::new(&prepared.points);
    cloud_mm
        .positions
        .par_iter()
        .zip(&prepared.fate)
        .map(|(&p, &fate)| {
            if fate != Fate::Part {
                return 0.0;
            }
            index
                .knn(prepared.frame.apply(p), 1)
                .first()
                .map_or(0.0, |n| values[n.index as usize])
        })
        .collect()
}

/// A scan [`copy_sorted`] could not copy.
#[derive(Debug, thiserror::Error, PartialEq)]
#[error("cannot copy {} into {}: {message}", from.display(), folder.display())]
pub struct CopyError {
    pub from: PathBuf,
    pub folder: PathBuf,
    pub message: String,
}

/// Copies (never moves) the scan of every row with a verdict into `out_dir/<type>/`, or, when
/// the verdict is `review`, into `out_dir/_to-review/<type>/` ([`REVIEW_FOLDER`]), creating
/// the folders. Never overwrites: a name already taken becomes `name-2.ext`, `name-3.ext`, ...
/// Each copy is written under a hidden temporary name first and then given its name, so no
/// half-copied scan ever shows. Rows without a verdict are passed over.
///
/// Returns, per row with a verdict and in order, where its copy went or why it could not be
/// made (the source unreadable, a folder not writable, or a part type that is not a plain
/// folder name, as a damaged model file might carry).
pub fn copy_sorted(rows: &[ClassifyRow], out_dir: &Path) -> Vec<Result<PathBuf, CopyError>> {
    rows.iter()
        .filter_map(|row| match &row.outcome {
            ClassifyOutcome::Verdict(v) => Some((row.path.as_path(), v)),
            ClassifyOutcome::Failed(_) => None,
        })
        .map(|(path, verdict)| {
            let folder = match verdict.status {
                Status::Sure => out_dir.join(&verdict.part_type),
                Status::Review => out_dir.join(REVIEW_FOLDER).join(&verdict.part_type),
            };
            let fail = |message: String| CopyError {
                from: path.to_path_buf(),
                folder: folder.clone(),
                message,
            };
            if !is_plain_visible_name(&verdict.part_type) {
                return Err(fail(format!(
                    "part type '{}' cannot name a folder",
                    verdict.part_type
                )));
            }
            copy_into(path, &folder).map_err(fail)
        })
        .collect()
}

/// Copies `file` into `folder` under its own name or the first free `stem-N.ext`: first into
/// a hidden staging folder inside `folder`, then moved to its name without overwriting.
fn copy_into(file: &Path, folder: &Path) -> Result<PathBuf, String> {
    static NEXT: std::sync::atomic::AtomicU64 = std::sync::atomic::AtomicU64::new(0);
    let n = NEXT.fetch_add(1, std::sync::atomic::Ordering::Relaxed);
    let name = file
        .file_name()
        .ok_or_else(|| format!("{} names no file", file.display()))?;
    let staging = folder.join(format!(".partsift-copy-{}-{n}", std::process::id()));
    fs::create_dir_all(&staging).map_err(|e| e.to_string())?;
    let staged = staging.join(name);
    let copied = fs::copy(file, &staged)
        .and_then(|_| fs::File::open(&staged)?.sync_all())
        .map_err(|e| format!("{}: {e}", file.display()))
        .and_then(|()| move_into(&staged, folder).map_err(|e| e.to_string()));
    let _ = fs::remove_file(&staged);
    let _ = fs::remove_dir(&staging);
    copied.map(|record| record.to)
}

/// The scan files named by `inputs`: a file is taken as it is (whatever its extension, even
/// if missing: reading it will report that); a folder is searched recursively for `.ply`,
/// `.xyz` and `.pcd` files, sorted by path, skipping hidden files and folders and not
/// following links to folders (so a link loop cannot trap the search). A file found twice
/// is listed once, where first found. Folders that cannot be listed are returned beside,
/// with the error.
pub fn find_scan_files(inputs: &[PathBuf]) -> (Vec<PathBuf>, Vec<SkippedScan>) {
    let mut found = Vec::new();
    let mut unreadable = Vec::new();
    for input in inputs {
        if input.is_dir() {
            walk(input, &mut found, &mut unreadable);
        } else {
            found.push(input.clone());
        }
    }
    let mut seen = HashSet::new();
    found.retain(|p| seen.insert(p.clone()));
    (found, unreadable)
}

fn walk(dir: &Path, found: &mut Vec<PathBuf>, unreadable: &mut Vec<SkippedScan>) {
    let entries = match fs::read_dir(dir) {
        Ok(entries) => entries,
        Err(e) => {
            unreadable.push(SkippedScan {
                path: dir.to_path_buf(),
                error: format!("{}: cannot list the folder: {e}", dir.display()),
            });
            return;
        }
    };
    let mut here: Vec<(PathBuf, bool)> = Vec::new();
    for entry in entries {
        let Ok(entry) = entry else { continue };
        let path = entry.path();
        if path
            .file_name()
            .is_some_and(|n| n.as_encoded_bytes().starts_with(b"."))
        {
            continue;
        }
        // `file_type` does not follow links: a link to a folder is not walked into.
        let is_dir = entry.file_type().is_ok_and(|t| t.is_dir());
        if is_dir || (path.is_file() && has_scan_extension(&path)) {
            here.push((path, is_dir));
        }
    }
    here.sort();
    for (path, is_dir) in here {
        if is_dir {
            walk(&path, found, unreadable);
        } else {
            found.push(path);
        }
    }
}

fn has_scan_extension(path: &Path) -> bool {
    path.extension()
        .and_then(|e| e.to_str())
        .is_some_and(|e| SCAN_EXTENSIONS.iter().any(|s| e.eq_ignore_ascii_case(s)))
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn folders_are_searched_recursively_in_order_and_hidden_things_skipped() {
        let dir = std::env::temp_dir().join(format!("partsift-find-{}", std::process::id()));
        let _ = fs::remove_dir_all(&dir);
        for f in [
            "b/z.ply",
            "b/deep/er/a.XYZ",
            "a.pcd",
            "notes.txt",
            ".hidden/x.ply",
            "b/.y.ply",
        ] {
            let p = dir.join(f);
            fs::create_dir_all(p.parent().unwrap()).unwrap();
            fs::write(&p, b"").unwrap();
        }
        let named = dir.join("notes.txt");
        let (found, unreadable) =
            find_scan_files(&[dir.clone(), named.clone(), dir.join("b/z.ply")]);
        assert_eq!(
            found,
            [
                dir.join("a.pcd"),
                dir.join("b/deep/er/a.XYZ"),
                dir.join("b/z.ply"),
                named
            ]
        );
        assert!(unreadable.is_empty());
        let missing = dir.join("missing.ply");
        assert_eq!(find_scan_files(std::slice::from_ref(&missing)).0, [missing]);
        fs::remove_dir_all(&dir).unwrap();
    }
}
