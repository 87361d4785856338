//! Recipe settings as a user writes them ([`RecipeSettings`]) and the checked [`Recipe`] that
//! the clean-up accepts.

use serde::{Deserialize, Serialize};
use sha2::{Digest, Sha256};

/// Clean-up settings as given (command line, app, model file). Every distance is either
/// set in mm or, by default, derived from the scan's measured point spacing (the median
/// distance from a point to its nearest neighbour), so the same settings work on scans of
/// any density and on scans read in any units. Turn into a [`Recipe`] with [`check`](Self::check).
#[derive(Clone, Debug, PartialEq, Serialize, Deserialize)]
#[serde(default, deny_unknown_fields)]
pub struct RecipeSettings {
    /// Points in the prepared cloud (16 to 65,536).
    pub points: usize,
    /// Keep only points inside this box, `[min, max]` in mm of the input frame.
    pub crop_box_mm: Option<[[f32; 3]; 2]>,
    /// Look for the table plane, remove it and turn the cloud so the table normal is +Z.
    pub table_plane: bool,
    /// Distance from the table plane (mm) within which a point is table. `None`: RANSAC
    /// looks for the plane within `table_distance_spacings` spacings, then the distance is
    /// set to 3 standard deviations of the measured range noise on the table (at least half
    /// a spacing), so a thin part (a washer) is not taken with the table.
    pub table_distance_mm: Option<f32>,
    /// The table distance in point spacings when `table_distance_mm` is `None` (0.5 to 20).
    pub table_distance_spacings: f32,
    /// A plane holding fewer than this fraction of the points is not a table (0.01 to 0.9).
    pub table_min_fraction: f32,
    /// RANSAC candidate planes to try at most (10 to 100,000; stops early once the best
    /// plane is found with 99.9 % confidence).
    pub ransac_iterations: u32,
    /// Neighbours whose mean distance decides whether a point is a stray (2 to 100). PCL's
    /// tutorial uses 50 and Open3D's 20; 8 finds the same far strays at half the cost of 16
    /// (measured on the practice scans).
    pub stray_neighbours: usize,
    /// A point is a stray when its mean neighbour distance exceeds the cloud's mean by
    /// more than this many standard deviations (0.5 to 10).
    pub stray_std_ratio: f32,
    /// Two points belong to the same object when closer than this many point spacings
    /// (1 to 50).
    pub cluster_radius_spacings: f32,
    /// Join to the part any cluster (of at least 1 % of its points) that comes within this
    /// fraction of the part's radius: pieces of one part that a depth step separates, such
    /// as a screw head standing over its shank (0 to 1; 0 joins nothing).
    pub cluster_join_fraction: f32,
    /// Warn when the second-largest object has at least this fraction of the largest
    /// one's points (0.01 to 1).
    pub second_cluster_warn_fraction: f32,
    /// Voxel edge (mm) of the even-density step. `None`: `voxel_size_spacings` spacings, made
    /// coarser on a dense part so that about 4 voxels per prepared point remain.
    pub voxel_size_mm: Option<f32>,
    /// The voxel edge in point spacings when `voxel_size_mm` is `None` (0.5 to 20).
    pub voxel_size_spacings: f32,
    /// Turn the prepared cloud about the up axis so that the long side of the part's
    /// footprint lies along X, its heavier end on +X. A model file without this setting was
    /// taught without the turn, so a missing value reads as `false`.
    #[serde(default)]
    pub face_long_side: bool,
}

impl Default for RecipeSettings {
    fn default() -> Self {
        RecipeSettings {
            points: 1024,
            crop_box_mm: None,
            table_plane: true,
            table_distance_mm: None,
            table_distance_spacings: 1.0,
            table_min_fraction: 0.1,
            ransac_iterations: 1000,
            stray_neighbours: 8,
            stray_std_ratio: 3.0,
            cluster_radius_spacings: 3.0,
            cluster_join_fraction: 0.75,
            second_cluster_warn_fraction: 0.25,
            voxel_size_mm: None,
            voxel_size_spacings: 1.5,
            face_long_side: true,
        }
    }
}

/// A recipe setting with a value that cannot work.
#[derive(Clone, Debug, PartialEq, thiserror::Error)]
#[error("recipe setting `{setting}` is {value}: expected {expected}")]
pub struct RecipeError {
    /// The field name, as in [`RecipeSettings`] and the recipe's JSON.
    pub setting: &'static str,
    pub value: String,
    pub expected: &'static str,
}

/// Smallest and largest distances (mm) a user may set: a thousandth of a mm to 10 m.
const MM_RANGE: (f32, f32) = (1e-3, 1e4);

fn check_range<T: PartialOrd + std::fmt::Display>(
    setting: &'static str,
    value: T,
    lo: T,
    hi: T,
    expected: &'static str,
) -> Result<(), RecipeError> {
    // Written so that NaN fails too.
    if value >= lo && value <= hi {
        Ok(())
    } else {
        Err(RecipeError {
            setting,
            value: value.to_string(),
            expected,
        })
    }
}

fn check_mm(setting: &'static str, value: Option<f32>) -> Result<(), RecipeError> {
    match value {
        Some(v) => check_range(
            setting,
            v,
            MM_RANGE.0,
            MM_RANGE.1,
            "a distance from 0.001 to 10000 mm, or none",
        ),
        None => Ok(()),
    }
}

impl RecipeSettings {
    /// Checks every value and returns the [`Recipe`], or the first setting that cannot work.
    pub fn check(self) -> Result<Recipe, RecipeError> {
        let s = &self;
        check_range("points", s.points, 16, 65_536, "16 to 65536")?;
        if let Some([lo, hi]) = s.crop_box_mm {
            let finite = lo.iter().chain(&hi).all(|v| v.is_finite());
            if !finite || (0..3).any(|a| lo[a] >= hi[a]) {
                return Err(RecipeError {
                    setting: "crop_box_mm",
                    value: format!("{lo:?} to {hi:?}"),
                    expected: "finite [min, max] corners with min < max on every axis",
                });
            }
        }
        check_mm("table_distance_mm", s.table_distance_mm)?;
        check_range(
            "table_distance_spacings",
            s.table_distance_spacings,
            0.5,
            20.0,
            "0.5 to 20",
        )?;
        check_range(
            "table_min_fraction",
            s.table_min_fraction,
            0.01,
            0.9,
            "0.01 to 0.9",
        )?;
        check_range(
            "ransac_iterations",
            s.ransac_iterations,
            10,
            100_000,
            "10 to 100000",
        )?;
        check_range("stray_neighbours", s.stray_neighbours, 2, 100, "2 to 100")?;
        check_range("stray_std_ratio", s.stray_std_ratio, 0.5, 10.0, "0.5 to 10")?;
        check_range(
            "cluster_radius_spacings",
            s.cluster_radius_spacings,
            1.0,
            50.0,
            "1 to 50",
        )?;
        check_range(
            "cluster_join_fraction",
            s.cluster_join_fraction,
            0.0,
            1.0,
            "0 to 1",
        )?;
        check_range(
            "second_cluster_warn_fraction",
            s.second_cluster_warn_fraction,
            0.01,
            1.0,
            "0.01 to 1",
        )?;
        check_mm("voxel_size_mm", s.voxel_size_mm)?;
        check_range(
            "voxel_size_spacings",
            s.voxel_size_spacings,
            0.5,
            20.0,
            "0.5 to 20",
        )?;
        Ok(Recipe { settings: self })
    }
}

/// Checked clean-up settings: every value in range. Made by [`RecipeSettings::check`];
/// deserialising one checks it the same way, so a model file cannot smuggle in a bad value.
#[derive(Clone, Debug, Default, PartialEq, Serialize, Deserialize)]
#[serde(try_from = "RecipeSettings", into = "RecipeSettings")]
pub struct Recipe {
    settings: RecipeSettings,
}

impl TryFrom<RecipeSettings> for Recipe {
    type Error = RecipeError;
    fn try_from(settings: RecipeSettings) -> Result<Self, RecipeError> {
        settings.check()
    }
}

impl From<Recipe> for RecipeSettings {
    fn from(recipe: Recipe) -> Self {
        recipe.settings
    }
}

/// Bump when a step changes what it computes, so cached prepared clouds are remade.
const ALGORITHM_VERSION: &str = "partsift-recipe-4";

impl Recipe {
    pub fn settings(&self) -> &RecipeSettings {
        &self.settings
    }

    /// Points in the prepared cloud.
    pub fn points(&self) -> usize {
        self.settings.points
    }

    /// A cache key: 32 hex digits (SHA-256, truncated) of the algorithm version and the
    /// settings. Equal recipes give equal keys; any change of a setting changes it.
    pub fn fingerprint(&self) -> String {
        let mut hash = Sha256::new();
        hash.update(ALGORITHM_VERSION.as_bytes());
        // Serialising plain numbers, booleans and options cannot fail.
        let json = serde_json::to_vec(&self.settings).unwrap_or_default();
        hash.update(&json);
        hash.finalize()[..16]
            .iter()
            .map(|b| format!("{b:02x}"))
            .collect()
    }
}

#[cfg(test)]
mod tests {
    use super::*;

    fn rejected(change: impl FnOnce(&mut RecipeSettings)) -> &'static str {
        let mut s = RecipeSettings::default();
        change(&mut s);
        match s.check() {
            Err(e) => {
                assert!(e.to_string().contains(e.setting), "{e}");
                e.setting
            }
            Ok(_) => panic!("accepted"),
        }
    }

    #[test]
    fn defaults_are_accepted() {
        let recipe = RecipeSettings::default().check().unwrap();
        assert_eq!(recipe.points(), 1024);
        assert_eq!(recipe, Recipe::default());
    }

    #[test]
    fn a_recipe_written_before_the_facing_step_reads_without_it() {
        let mut old = serde_json::to_value(RecipeSettings::default()).unwrap();
        old.as_object_mut().unwrap().remove("face_long_side");
        let read: RecipeSettings = serde_json::from_value(old).unwrap();
        assert!(!read.face_long_side);
        assert!(RecipeSettings::default().face_long_side);
    }

    #[test]
    fn too_few_or_too_many_points_are_rejected() {
        assert_eq!(rejected(|s| s.points = 0), "points");
        assert_eq!(rejected(|s| s.points = 15), "points");
        assert_eq!(rejected(|s| s.points = 65_537), "points");
    }

    #[test]
    fn inverted_or_non_finite_crop_box_is_rejected() {
        let inverted = [[0.0, 0.0, 5.0], [1.0, 1.0, 4.0]];
        assert_eq!(rejected(|s| s.crop_box_mm = Some(inverted)), "crop_box_mm");
        let flat = [[0.0; 3], [1.0, 0.0, 1.0]];
        assert_eq!(rejected(|s| s.crop_box_mm = Some(flat)), "crop_box_mm");
        let nan = [[0.0; 3], [1.0, f32::NAN, 1.0]];
        assert_eq!(rejected(|s| s.crop_box_mm = Some(nan)), "crop_box_mm");
    }

    #[test]
    fn bad_table_distance_mm_is_rejected() {
        for v in [0.0, -1.0, f32::NAN, f32::INFINITY, 2e4] {
            assert_eq!(
                rejected(|s| s.table_distance_mm = Some(v)),
                "table_distance_mm"
            );
        }
    }

    #[test]
    fn bad_table_distance_spacings_is_rejected() {
        for v in [0.0, 0.4, 21.0, f32::NAN] {
            assert_eq!(
                rejected(|s| s.table_distance_spacings = v),
                "table_distance_spacings"
            );
        }
    }

    #[test]
    fn bad_table_min_fraction_is_rejected() {
        for v in [0.0, 0.005, 0.95, f32::NAN] {
            assert_eq!(rejected(|s| s.table_min_fraction = v), "table_min_fraction");
        }
    }

    #[test]
    fn bad_ransac_iterations_is_rejected() {
        for v in [0, 9, 100_001] {
            assert_eq!(rejected(|s| s.ransac_iterations = v), "ransac_iterations");
        }
    }

    #[test]
    fn bad_stray_neighbours_is_rejected() {
        for v in [0, 1, 101] {
            assert_eq!(rejected(|s| s.stray_neighbours = v), "stray_neighbours");
        }
    }

    #[test]
    fn bad_stray_std_ratio_is_rejected() {
        for v in [0.0, -2.0, 11.0, f32::NAN] {
            assert_eq!(rejected(|s| s.stray_std_ratio = v), "stray_std_ratio");
        }
    }

    #[test]
    fn bad_cluster_radius_spacings_is_rejected() {
        for v in [0.0, 0.9, 51.0, f32::INFINITY] {
            assert_eq!(
                rejected(|s| s.cluster_radius_spacings = v),
                "cluster_radius_spacings"
            );
        }
    }

    #[test]
    fn bad_cluster_join_fraction_is_rejected() {
        for v in [-0.1, 1.1, f32::NAN] {
            assert_eq!(
                rejected(|s| s.cluster_join_fraction = v),
                "cluster_join_fraction"
            );
        }
    }

    #[test]
    fn bad_second_cluster_warn_fraction_is_rejected() {
        for v in [0.0, 1.5, f32::NAN] {
            assert_eq!(
                rejected(|s| s.second_cluster_warn_fraction = v),
                "second_cluster_warn_fraction"
            );
        }
    }

    #[test]
    fn bad_voxel_size_mm_is_rejected() {
        for v in [0.0, -0.5, 0.0001, f32::NAN] {
            assert_eq!(rejected(|s| s.voxel_size_mm = Some(v)), "voxel_size_mm");
        }
    }

    #[test]
    fn bad_voxel_size_spacings_is_rejected() {
        for v in [0.0, 0.4, 25.0, f32::NAN] {
            assert_eq!(
                rejected(|s| s.voxel_size_spacings = v),
                "voxel_size_spacings"
            );
        }
    }

    #[test]
    fn serde_round_trip_checks_values_and_fills_defaults() {
        let recipe = RecipeSettings {
            points: 2048,
            voxel_size_mm: Some(0.8),
            ..Default::default()
        }
        .check()
        .unwrap();
        let json = serde_json::to_string(&recipe).unwrap();
        let back: Recipe = serde_json::from_str(&json).unwrap();
        assert_eq!(back, recipe);

        let partial: Recipe = serde_json::from_str(r#"{"points": 512}"#).unwrap();
        assert_eq!(partial.points(), 512);
        assert_eq!(partial.settings().stray_neighbours, 8);

        let bad = serde_json::from_str::<Recipe>(r#"{"points": 3}"#).unwrap_err();
        assert!(bad.to_string().contains("points"), "{bad}");
        assert!(serde_json::from_str::<Recipe>(r#"{"pionts": 512}"#).is_err());
    }

    #[test]
    fn fingerprint_follows_the_settings() {
        let a = Recipe::default();
        let b = RecipeSettings {
            stray_std_ratio: 2.5,
            ..Default::default()
        }
        .check()
        .unwrap();
        assert_eq!(a.fingerprint(), Recipe::default().fingerprint());
        assert_eq!(a.fingerprint().len(), 32);
        assert!(a.fingerprint().chars().all(|c| c.is_ascii_hexdigit()));
        assert_ne!(a.fingerprint(), b.fingerprint());
    }
}
