//! A parts bin turned into prepared clouds, ready for the network: every scan read and cleaned
//! once (in parallel), through the [`PreparedCache`] so a second run on the same bin starts at
//! once. A scan that cannot be read or prepared is reported and left out.

use std::path::{Path, PathBuf};
use std::sync::Mutex;

use rayon::prelude::*;

use crate::learn::bin::{LabelledScan, PartsBin};
use crate::learn::cache::{CacheKey, PreparedCache};
use crate::learn::progress::{CancelToken, TrainEvent};
use crate::prep::{PartSize, Recipe};
use crate::scan::{self, LoadOptions};

/// Size values per scan the network takes: [`PartSize::log_features`].
pub(crate) const SIZE_FEATURES: usize = 4;

/// Names what a cache entry of this module holds, beside the recipe: bump it when the payload
/// layout or the way scans are read ([`LoadOptions::default`]) changes.
const PAYLOAD_VERSION: &str = "dataset-1";

/// A scan that was left out, and why.
#[derive(Clone, Debug, PartialEq)]
pub struct SkippedScan {
    pub path: PathBuf,
    /// Names the file and, where there is one, the line or byte offset.
    pub error: String,
}

/// The prepared clouds of a parts bin. Scans are in the bin's order (by type, then file name);
/// the clouds lie in one flat buffer, `len() x points_per_scan() x 3`.
#[derive(Clone, Debug)]
pub struct Dataset {
    root: PathBuf,
    part_types: Vec<String>,
    scans: Vec<LabelledScan>,
    points_per_scan: usize,
    /// Prepared points (centred, unit radius, up +Z), `len() x points_per_scan x 3`.
    points: Vec<f32>,
    /// [`PartSize::log_features`] of each scan, `len() x 4`.
    sizes: Vec<f32>,
    skipped: Vec<SkippedScan>,
    recipe_fingerprint: String,
}

/// Why no dataset could be made.
#[derive(Debug, thiserror::Error, PartialEq)]
pub enum DatasetError {
    #[error("the run was stopped while the scans were being prepared")]
    Cancelled,
    #[error("none of the {scans} scans of {} could be prepared (the first: {first})", root.display())]
    NothingPrepared {
        root: PathBuf,
        scans: usize,
        first: String,
    },
}

impl Dataset {
    /// Reads and cleans every scan of `bin` with `recipe`, in parallel on the current rayon
    /// pool, taking what `cache` already holds and storing what it did not (a cache that
    /// cannot be written is passed over: it only saves time).
    ///
    /// `on_event` hears `Preparing { done: 0, total }` first, then one `Preparing` per scan
    /// (in rising `done` order, from whichever thread finished it) with a `ScanSkipped` just
    /// before it for a scan that could not be read or prepared. Such scans are left out and
    /// listed in [`Dataset::skipped`]; a part type whose every scan was left out is dropped, so
    /// [`Dataset::part_types`] may be shorter than the bin's.
    ///
    /// Deterministic: the result does not depend on the thread count or on the cache.
    ///
    /// Errors: `cancel` was set ([`DatasetError::Cancelled`], checked before each scan), or no
    /// scan could be prepared.
    pub fn prepare(
        bin: &PartsBin,
        recipe: &Recipe,
        cache: Option<&PreparedCache>,
        on_event: &(dyn Fn(TrainEvent) + Sync),
        cancel: &CancelToken,
    ) -> Result<Dataset, DatasetError> {
        let total = bin.scans.len();
        let key_text = format!("{PAYLOAD_VERSION} {}", recipe.fingerprint());
        let done = Mutex::new(0usize);
        on_event(TrainEvent::Preparing { done: 0, total });
        let results: Vec<Option<Result<PreparedCloud, String>>> = bin
            .scans
            .par_iter()
            .map(|scan| {
                if cancel.is_cancelled() {
                    return None;
                }
                let result = prepare_cached(&scan.path, recipe, cache, &key_text);
                // One lock per scan (not per point), so listeners see `done` rise in order.
                let mut done = done.lock().unwrap_or_else(|poisoned| poisoned.into_inner());
                *done += 1;
                if let Err(error) = &result {
                    on_event(TrainEvent::ScanSkipped {
                        path: scan.path.clone(),
                        error: error.clone(),
                    });
                }
                on_event(TrainEvent::Preparing { done: *done, total });
                Some(result)
            })
            .collect();
        if cancel.is_cancelled() {
            return Err(DatasetError::Cancelled);
        }
        let points_per_scan = recipe.points();
        let mut prepared = Vec::with_capacity(total);
        let mut skipped = Vec::new();
        for (scan, result) in bin.scans.iter().zip(results) {
            match result {
                Some(Ok(cloud)) => prepared.push((scan, cloud)),
                Some(Err(error)) => skipped.push(SkippedScan {
                    path: scan.path.clone(),
                    error,
                }),
                None => return Err(DatasetError::Cancelled),
            }
        }
        if prepared.is_empty() {
            return Err(DatasetError::NothingPrepared {
                root: bin.root.clone(),
                scans: total,
                first: skipped.first().map(|s| s.error.clone()).unwrap_or_default(),
            });
        }
        // Relabel so that only types with a prepared scan remain, in the bin's order.
        let mut new_label = vec![None; bin.part_types.len()];
        let mut part_types = Vec::new();
        for (scan, _) in &prepared {
            if new_label[scan.label].is_none() {
                new_label[scan.label] = Some(part_types.len());
                part_types.push(bin.part_types[scan.label].clone());
            }
        }
        let mut dataset = Dataset {
            root: bin.root.clone(),
            part_types,
            scans: Vec::with_capacity(prepared.len()),
            points_per_scan,
            points: Vec::with_capacity(prepared.len() * points_per_scan * 3),
            sizes: Vec::with_capacity(prepared.len() * SIZE_FEATURES),
            skipped,
            recipe_fingerprint: recipe.fingerprint(),
        };
        for (scan, cloud) in prepared {
            dataset.scans.push(LabelledScan {
                path: scan.path.clone(),
                label: new_label[scan.label].unwrap_or_default(),
            });
            dataset.points.extend_from_slice(&cloud.points);
            dataset.sizes.extend_from_slice(&cloud.size.log_features());
        }
        Ok(dataset)
    }

    /// The part types that have at least one prepared scan, in the bin's order.
    pub fn part_types(&self) -> &[String] {
        &self.part_types
    }

    /// The prepared scans, each with its label indexing [`Dataset::part_types`].
    pub fn scans(&self) -> &[LabelledScan] {
        &self.scans
    }

    /// The labels of the prepared scans, in order.
    pub fn labels(&self) -> Vec<usize> {
        self.scans.iter().map(|s| s.label).collect()
    }

    pub fn len(&self) -> usize {
        self.scans.len()
    }

    pub fn is_empty(&self) -> bool {
        self.scans.is_empty()
    }

    /// Scans that could not be read or prepared, in the bin's order.
    pub fn skipped(&self) -> &[SkippedScan] {
        &self.skipped
    }

    /// Points per prepared cloud (the recipe's).
    pub fn points_per_scan(&self) -> usize {
        self.points_per_scan
    }

    /// Scan `i`'s prepared cloud, `points_per_scan() x 3` flat. Panics if `i >= len()`.
    pub fn points_of(&self, i: usize) -> &[f32] {
        let n = self.points_per_scan * 3;
        &self.points[i * n..(i + 1) * n]
    }

    /// Scan `i`'s size features (ln of radius and extents in mm). Panics if `i >= len()`.
    pub fn size_of(&self, i: usize) -> &[f32] {
        &self.sizes[i * SIZE_FEATURES..(i + 1) * SIZE_FEATURES]
    }

    /// The clouds and size features of the scans at `indices`, each gathered into one flat
    /// buffer (`indices.len() x points_per_scan() x 3` and `indices.len() x 4`), as the
    /// network takes them. Panics if an index is not below `len()`.
    pub fn gather(&self, indices: &[usize]) -> (Vec<f32>, Vec<f32>) {
        let mut points = Vec::with_capacity(indices.len() * self.points_per_scan * 3);
        let mut sizes = Vec::with_capacity(indices.len() * SIZE_FEATURES);
        for &i in indices {
            points.extend_from_slice(self.points_of(i));
            sizes.extend_from_slice(self.size_of(i));
        }
        (points, sizes)
    }

    /// Every cloud and every size, as [`Dataset::gather`] of all scans would give them.
    pub(crate) fn all(&self) -> (&[f32], &[f32]) {
        (&self.points, &self.sizes)
    }

    /// `path` relative to the bin's folder when inside it, as text (what is not UTF-8 replaced).
    pub(crate) fn relative_path(&self, path: &Path) -> String {
        path.strip_prefix(&self.root)
            .unwrap_or(path)
            .to_string_lossy()
            .into_owned()
    }

    /// The fingerprint of the recipe the clouds were prepared with.
    pub(crate) fn recipe_fingerprint(&self) -> &str {
        &self.recipe_fingerprint
    }
}

/// One scan's prepared cloud as the dataset keeps it.
struct PreparedCloud {
    /// `recipe.points() x 3`, flat.
    points: Vec<f32>,
    size: PartSize,
}

/// The prepared cloud of the scan at `path`: from `cache` when it holds it, else read and
/// cleaned (and stored). Errors name the file.
fn prepare_cached(
    path: &Path,
    recipe: &Recipe,
    cache: Option<&PreparedCache>,
    key_text: &str,
) -> Result<PreparedCloud, String> {
    let key = match cache {
        Some(_) => Some(
            CacheKey::for_file(path, key_text)
                .map_err(|e| format!("{}: cannot read: {e}", path.display()))?,
        ),
        None => None,
    };
    if let (Some(cache), Some(key)) = (cache, &key) {
        if let Some(cloud) = cache.get(key).and_then(|b| decode(&b, recipe.points())) {
            return Ok(cloud);
        }
    }
    let cloud = prepare_file(path, recipe)?;
    if let (Some(cache), Some(key)) = (cache, &key) {
        // A cache that cannot be written only costs time on the next run.
        let _ = cache.put(key, &encode(&cloud));
    }
    Ok(cloud)
}

/// Reads and cleans one scan file. Errors name the file.
fn prepare_file(path: &Path, recipe: &Recipe) -> Result<PreparedCloud, String> {
    let scan = scan::load(path, &LoadOptions::default()).map_err(|e| e.to_string())?;
    let prepared = recipe
        .run(&scan.cloud_mm())
        .map_err(|e| format!("{}: {e}", path.display()))?;
    Ok(PreparedCloud {
        points: prepared.points.iter().flatten().copied().collect(),
        size: prepared.size,
    })
}

/// Payload: points (u32 LE), radius and three extents (f32 LE, mm), then the points (f32 LE).
fn encode(cloud: &PreparedCloud) -> Vec<u8> {
    let points = cloud.points.len() / 3;
    let mut out = Vec::with_capacity(4 + 16 + cloud.points.len() * 4);
    out.extend_from_slice(&(points as u32).to_le_bytes());
    let [a, b, c] = cloud.size.extents_mm;
    for v in [cloud.size.radius_mm, a, b, c].iter().chain(&cloud.points) {
        out.extend_from_slice(&v.to_le_bytes());
    }
    out
}

/// The inverse of [`encode`]; `None` unless the payload holds exactly `points` finite points.
fn decode(bytes: &[u8], points: usize) -> Option<PreparedCloud> {
    let (count, rest) = bytes.split_at_checked(4)?;
    if u32::from_le_bytes(count.try_into().ok()?) as usize != points
        || rest.len() != (4 + points * 3) * 4
    {
        return None;
    }
    let values: Vec<f32> = rest
        .chunks_exact(4)
        .map(|b| f32::from_le_bytes([b[0], b[1], b[2], b[3]]))
        .collect();
    if values.iter().any(|v| !v.is_finite()) {
        return None;
    }
    Some(PreparedCloud {
        size: PartSize {
            radius_mm: values[0],
            extents_mm: [values[1], values[2], values[3]],
        },
        points: values[4..].to_vec(),
    })
}

#[cfg(test)]
mod tests {
    use super::*;
    use crate::learn::bin::scan_bin;
    use crate::prep::RecipeSettings;
    use crate::synth::{write_parts_bin, SensorSettings};

    struct TempDir(PathBuf);
    impl TempDir {
        fn new(tag: &str) -> Self {
            let dir =
                std::env::temp_dir().join(format!("partsift-dataset-{tag}-{}", std::process::id()));
            let _ = std::fs::remove_dir_all(&dir);
            std::fs::create_dir_all(&dir).unwrap();
            TempDir(dir)
        }
    }
    impl Drop for TempDir {
        fn drop(&mut self) {
            let _ = std::fs::remove_dir_all(&self.0);
        }
    }

    fn small_recipe() -> Recipe {
        RecipeSettings {
            points: 64,
            ..RecipeSettings::default()
        }
        .check()
        .unwrap()
    }

    fn tiny_sensor() -> SensorSettings {
        SensorSettings {
            width_px: 96,
            height_px: 72,
            ..SensorSettings::sample_bundle()
        }
    }

    #[test]
    fn payload_round_trips_and_refuses_the_wrong_length() {
        let cloud = PreparedCloud {
            points: (0..12).map(|v| v as f32 * 0.1).collect(),
            size: PartSize {
                radius_mm: 7.5,
                extents_mm: [12.0, 9.0, 4.0],
            },
        };
        let bytes = encode(&cloud);
        let back = decode(&bytes, 4).unwrap();
        assert_eq!((back.points, back.size), (cloud.points.clone(), cloud.size));
        assert!(decode(&bytes, 5).is_none());
        assert!(decode(&bytes[..bytes.len() - 1], 4).is_none());
        assert!(decode(&[], 4).is_none());
        let mut nan = bytes.clone();
        nan[8..12].copy_from_slice(&f32::NAN.to_le_bytes());
        assert!(decode(&nan, 4).is_none());
    }

    #[test]
    fn corrupt_scans_are_skipped_and_reported_and_the_cache_gives_the_same_clouds() {
        let dir = TempDir::new("prepare");
        let root = dir.0.join("bin");
        write_parts_bin(&root, 2, 3, &tiny_sensor()).unwrap();
        let broken = root.join("hex_bolt").join("zz_broken.ply");
        std::fs::write(
            &broken,
            b"ply\nformat ascii 1.0\nelement vertex 5\nproperty float x\nend_header\n1\n",
        )
        .unwrap();
        // A type whose only scan is unreadable disappears from the dataset.
        std::fs::create_dir_all(root.join("mystery")).unwrap();
        std::fs::write(root.join("mystery").join("a.xyz"), b"1 2 oops\n").unwrap();
        let bin = scan_bin(&root).unwrap();
        let recipe = small_recipe();
        let events = Mutex::new(Vec::new());
        let sink = |e: TrainEvent| events.lock().unwrap().push(e);
        let cache = PreparedCache::new(dir.0.join("cache"));
        let first =
            Dataset::prepare(&bin, &recipe, Some(&cache), &sink, &CancelToken::new()).unwrap();
        assert_eq!(first.len(), 18);
        assert_eq!(first.part_types().len(), 9);
        assert!(!first.part_types().iter().any(|t| t == "mystery"));
        let skipped: Vec<&Path> = first.skipped().iter().map(|s| s.path.as_path()).collect();
        assert_eq!(
            skipped,
            [broken.as_path(), &root.join("mystery").join("a.xyz")]
        );
        assert!(first.skipped()[0].error.contains("zz_broken.ply"));
        let events = events.into_inner().unwrap();
        assert_eq!(events[0], TrainEvent::Preparing { done: 0, total: 20 });
        assert_eq!(
            events.last(),
            Some(&TrainEvent::Preparing {
                done: 20,
                total: 20
            })
        );
        let dones: Vec<usize> = events
            .iter()
            .filter_map(|e| match e {
                TrainEvent::Preparing { done, .. } => Some(*done),
                _ => None,
            })
            .collect();
        assert_eq!(dones, (0..=20).collect::<Vec<_>>());
        assert_eq!(
            events
                .iter()
                .filter(|e| matches!(e, TrainEvent::ScanSkipped { .. }))
                .count(),
            2
        );

        // From the cache, and without one: the same clouds.
        let again =
            Dataset::prepare(&bin, &recipe, Some(&cache), &|_| {}, &CancelToken::new()).unwrap();
        let uncached = Dataset::prepare(&bin, &recipe, None, &|_| {}, &CancelToken::new()).unwrap();
        for other in [&again, &uncached] {
            assert_eq!(other.points, first.points);
            assert_eq!(other.sizes, first.sizes);
            assert_eq!(other.scans, first.scans);
        }
        let (points, sizes) = first.gather(&[3, 0]);
        assert_eq!(&points[..64 * 3], first.points_of(3));
        assert_eq!(&sizes[4..], first.size_of(0));
    }

    #[test]
    fn cancel_and_all_failures_are_errors() {
        let dir = TempDir::new("fail");
        let root = dir.0.join("bin");
        std::fs::create_dir_all(root.join("a")).unwrap();
        std::fs::write(root.join("a").join("x.xyz"), b"not a scan\n").unwrap();
        let bin = scan_bin(&root).unwrap();
        let err = Dataset::prepare(&bin, &small_recipe(), None, &|_| {}, &CancelToken::new())
            .unwrap_err();
        assert!(
            matches!(&err, DatasetError::NothingPrepared { scans: 1, first, .. } if first.contains("x.xyz")),
            "{err}"
        );
        let cancel = CancelToken::new();
        cancel.cancel();
        assert_eq!(
            Dataset::prepare(&bin, &small_recipe(), None, &|_| {}, &cancel).unwrap_err(),
            DatasetError::Cancelled
        );
    }
}
