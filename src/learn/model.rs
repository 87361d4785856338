//! A trained model: the network, its part types, the checked clean-up recipe it was trained
//! with, its calibration and its training summary; saved as one model file and opened again
//! with every part checked.

use std::path::{Path, PathBuf};

use crate::learn::calibrate::Calibration;
use crate::learn::train::TrainingSummary;
use crate::net::file::{self, ModelFileError, ModelMeta, FORMAT_VERSION};
use crate::net::{Arch, Network, Preset};
use crate::prep::Recipe;

/// A network ready to classify, with everything needed to treat a new scan exactly as its
/// training scans were treated. Made by training ([`crate::learn::train`]) or by
/// [`TrainedModel::open`]; its parts always agree (one class per part type, the recipe's
/// points are the network's).
#[derive(Clone, Debug)]
pub struct TrainedModel {
    network: Network,
    part_types: Vec<String>,
    recipe: Recipe,
    calibration: Calibration,
    summary: Option<TrainingSummary>,
}

/// A model file that could not be opened or saved. Every variant names the file.
#[derive(Debug, thiserror::Error)]
pub enum ModelError {
    /// The container, tensors or metadata (see [`ModelFileError`]).
    #[error(transparent)]
    File(#[from] ModelFileError),
    /// The parts are readable but do not make a usable model (a bad or unknown recipe
    /// setting, a recipe that does not fit the network), or the metadata cannot be written.
    #[error("model file {}: {message}", path.display())]
    Unusable { path: PathBuf, message: String },
}

impl TrainedModel {
    /// Joins the parts of a model. Internal: the parts are made to agree by the trainer.
    pub(crate) fn new(
        network: Network,
        part_types: Vec<String>,
        recipe: Recipe,
        calibration: Calibration,
        summary: Option<TrainingSummary>,
    ) -> TrainedModel {
        debug_assert_eq!(network.config().classes, part_types.len());
        debug_assert_eq!(network.points(), recipe.points());
        TrainedModel {
            network,
            part_types,
            recipe,
            calibration,
            summary,
        }
    }

    /// Opens the model file at `path`, checking the container, every tensor, the metadata, the
    /// calibration and the recipe. A training summary that cannot be read (a file from another
    /// version of partsift) is left out rather than refused: it is not needed to classify.
    ///
    /// Errors: unreadable, truncated, corrupt, foreign or newer file, a tensor that does not
    /// fit, bad part types or calibration ([`ModelError::File`]); a recipe with a bad or
    /// unknown setting, or whose points differ from the network's ([`ModelError::Unusable`]).
    pub fn open(path: &Path) -> Result<TrainedModel, ModelError> {
        let unusable = |message: String| ModelError::Unusable {
            path: path.to_path_buf(),
            message,
        };
        let (network, meta) = file::load(path)?;
        let recipe: Recipe = serde_json::from_value(meta.recipe)
            .map_err(|e| unusable(format!("its clean-up recipe is unusable: {e}")))?;
        if recipe.points() != network.points() {
            return Err(unusable(format!(
                "its recipe prepares {} points but its network takes {}",
                recipe.points(),
                network.points()
            )));
        }
        // The model file keeps the calibration as plain numbers, checked by `file::load` with
        // the same rules; here, and only here, they become the checked type.
        let calibration = Calibration::new(
            meta.calibration.temperature,
            meta.calibration.review_threshold,
        )
        .map_err(|e| unusable(format!("its calibration is unusable: {e}")))?;
        Ok(TrainedModel {
            network,
            part_types: meta.part_types,
            recipe,
            calibration,
            summary: serde_json::from_value(meta.training).ok(),
        })
    }

    /// Writes the model file at `path` atomically (a temporary file, then a rename): on any
    /// error the file at `path` is as it was. The same model gives the same bytes.
    ///
    /// Errors: the file cannot be written (the error names it).
    pub fn save(&self, path: &Path) -> Result<(), ModelError> {
        let to_json = |value: Result<serde_json::Value, serde_json::Error>| {
            value.map_err(|e| ModelError::Unusable {
                path: path.to_path_buf(),
                message: format!("cannot write its metadata: {e}"),
            })
        };
        let meta = ModelMeta {
            format_version: FORMAT_VERSION,
            arch: self.arch(),
            preset: self.preset(),
            size_aware: self.size_aware(),
            part_types: self.part_types.clone(),
            recipe: to_json(serde_json::to_value(&self.recipe))?,
            calibration: file::Calibration {
                temperature: self.calibration.temperature(),
                review_threshold: self.calibration.review_threshold(),
            },
            training: to_json(serde_json::to_value(&self.summary))?,
        };
        file::save(path, &self.network, &meta)?;
        Ok(())
    }

    pub fn network(&self) -> &Network {
        &self.network
    }

    /// The network's classes, in order.
    pub fn part_types(&self) -> &[String] {
        &self.part_types
    }

    /// The clean-up recipe every scan goes through before the network sees it.
    pub fn recipe(&self) -> &Recipe {
        &self.recipe
    }

    pub fn calibration(&self) -> &Calibration {
        &self.calibration
    }

    /// How the model was trained; `None` for a model file whose summary could not be read.
    pub fn summary(&self) -> Option<&TrainingSummary> {
        self.summary.as_ref()
    }

    pub fn arch(&self) -> Arch {
        self.network.config().arch
    }

    pub fn preset(&self) -> Preset {
        self.network.config().preset
    }

    /// Whether the network takes the part's true size (mm) beside its shape.
    pub fn size_aware(&self) -> bool {
        self.network.config().size_aware
    }
}
