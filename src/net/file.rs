//! The model file: one `.safetensors` file holding every parameter and batch-norm running
//! statistic of a network as a named little-endian f32 tensor (PyTorch's names: `weight`,
//! `bias`, `running_mean`, `running_var`), plus one metadata entry, `partsift`, whose value is
//! the JSON of [`ModelMeta`]: format version, architecture, preset, size-aware head, part
//! types, recipe, calibration, training summary.
//!
//! Saving is atomic (temporary file, then rename) and deterministic: the same network and
//! metadata give the same bytes (tensors sorted by name, struct fields in a fixed order, JSON
//! maps with sorted keys). Loading checks everything and answers a damaged, foreign or newer
//! file with a [`ModelFileError`] naming the file, never a panic.

use std::borrow::Cow;
use std::collections::HashMap;
use std::path::{Path, PathBuf};

use safetensors::tensor::{Dtype, SafeTensorError, SafeTensors, View};
use serde::{Deserialize, Serialize};

use crate::fsutil::write_atomic;
use crate::net::model::{Arch, NetConfig, Network, Preset};

/// The format this version writes, and the newest it reads.
pub const FORMAT_VERSION: u32 = 1;

/// The safetensors metadata key that holds our JSON (a file without it is not ours).
pub const META_KEY: &str = "partsift";

/// Temperature scaling and the review threshold, both fitted on the holdout split.
#[derive(Clone, Debug, PartialEq, Serialize, Deserialize)]
pub struct Calibration {
    /// Logits are divided by it before softmax; finite and positive (1 = uncalibrated).
    pub temperature: f32,
    /// Calibrated confidences below it are sent to review; in `[0, 1]`.
    pub review_threshold: f32,
}

/// Everything in a model file besides the tensors.
#[derive(Clone, Debug, PartialEq, Serialize, Deserialize)]
pub struct ModelMeta {
    /// [`save`] always writes [`FORMAT_VERSION`].
    pub format_version: u32,
    pub arch: Arch,
    pub preset: Preset,
    pub size_aware: bool,
    /// Class `i` of the network is `part_types[i]`; distinct, non-empty names.
    pub part_types: Vec<String>,
    /// The clean-up recipe, opaque here (the learn module fills it).
    pub recipe: serde_json::Value,
    pub calibration: Calibration,
    /// The training summary, opaque here (the learn module fills it).
    pub training: serde_json::Value,
}

/// A model file that could not be written or read, and why.
#[derive(Debug, thiserror::Error)]
#[error("model file {}: {problem}", path.display())]
pub struct ModelFileError {
    pub path: PathBuf,
    pub problem: ModelFileProblem,
}

#[derive(Debug, thiserror::Error)]
pub enum ModelFileProblem {
    #[error("{0}")]
    Io(std::io::Error),
    #[error("it is cut short or has bytes appended: its {bytes} bytes do not match its header")]
    Truncated { bytes: usize },
    #[error("it is not a safetensors file or is damaged ({0})")]
    Corrupt(String),
    #[error("it is a safetensors file but not a partsift model file (no '{META_KEY}' metadata)")]
    Foreign,
    #[error("its metadata is unreadable: {0}")]
    BadMetadata(String),
    #[error("it was written by a newer partsift (format version {found}; this one reads up to {supported})")]
    NewerVersion { found: u32, supported: u32 },
    #[error("tensor '{name}' is missing")]
    MissingTensor { name: String },
    #[error("tensor '{name}' is {dtype} {found:?}, expected F32 {expected:?}")]
    WrongShape {
        name: String,
        dtype: String,
        found: Vec<usize>,
        expected: Vec<usize>,
    },
    #[error("tensor '{name}' is not part of this network")]
    UnexpectedTensor { name: String },
    #[error("tensor '{name}' holds a value that is not a finite number")]
    NonFinite { name: String },
    #[error("it lists {part_types} part types but its network scores {classes} classes")]
    PartTypes { part_types: usize, classes: usize },
    #[error("bad part type list: {0}")]
    BadPartTypes(String),
    #[error("bad calibration: {0}")]
    BadCalibration(String),
    #[error("the metadata does not describe this network: {0}")]
    MetaMismatch(String),
}

/// Writes `net` and `meta` (stamped with [`FORMAT_VERSION`]) to `path` atomically: on any
/// error the file at `path` is left as it was.
///
/// Errors: `meta` disagrees with the network (architecture, preset, size-aware head, number of
/// part types), the metadata is invalid (as [`load`] would find), or the file cannot be written.
pub fn save(path: &Path, net: &Network, meta: &ModelMeta) -> Result<(), ModelFileError> {
    let fail = |problem| ModelFileError {
        path: path.to_path_buf(),
        problem,
    };
    let config = net.config();
    let mismatch = if meta.arch != config.arch || meta.preset != config.preset {
        Some(format!(
            "metadata says {} {}, network is {} {}",
            meta.arch, meta.preset, config.arch, config.preset
        ))
    } else if meta.size_aware != config.size_aware {
        Some(format!(
            "size_aware {} vs network {}",
            meta.size_aware, config.size_aware
        ))
    } else if meta.part_types.len() != config.classes {
        Some(format!(
            "{} part types for {} classes",
            meta.part_types.len(),
            config.classes
        ))
    } else {
        None
    };
    if let Some(why) = mismatch {
        return Err(fail(ModelFileProblem::MetaMismatch(why)));
    }
    check_meta(meta).map_err(fail)?;
    let meta = ModelMeta {
        format_version: FORMAT_VERSION,
        ..meta.clone()
    };
    let json = serde_json::to_string(&meta)
        .map_err(|e| fail(ModelFileProblem::BadMetadata(e.to_string())))?;
    let mut tensors: Vec<(String, F32Tensor<'_>)> = net
        .tensors()
        .map(|(entry, values)| {
            let tensor = F32Tensor {
                shape: entry.shape.clone(),
                values,
            };
            (entry.name.clone(), tensor)
        })
        .collect();
    tensors.sort_by(|a, b| a.0.cmp(&b.0));
    let header = HashMap::from([(META_KEY.to_owned(), json)]);
    let bytes = safetensors::serialize(tensors, Some(header))
        .map_err(|e| fail(ModelFileProblem::Corrupt(e.to_string())))?;
    write_atomic(path, |out| out.write_all(&bytes)).map_err(|e| fail(ModelFileProblem::Io(e)))
}

/// Reads a model file written by [`save`] and rebuilds its network, checking the container,
/// the metadata (version, part types, calibration), and that every tensor the network needs
/// is there with its shape and finite values, and no other.
pub fn load(path: &Path) -> Result<(Network, ModelMeta), ModelFileError> {
    let fail = |problem| ModelFileError {
        path: path.to_path_buf(),
        problem,
    };
    let bytes = std::fs::read(path).map_err(|e| fail(ModelFileProblem::Io(e)))?;
    let file =
        SafeTensors::deserialize(&bytes).map_err(|e| fail(container_problem(e, bytes.len())))?;
    let (_, header) =
        SafeTensors::read_metadata(&bytes).map_err(|e| fail(container_problem(e, bytes.len())))?;
    let text = header
        .metadata()
        .as_ref()
        .and_then(|m| m.get(META_KEY))
        .ok_or_else(|| fail(ModelFileProblem::Foreign))?;
    let meta = parse_meta(text).map_err(fail)?;
    let classes = meta.part_types.len();
    if let Ok(out) = file.tensor(CLASS_SCORES) {
        if out.shape().len() == 2 && out.shape()[0] != classes {
            return Err(fail(ModelFileProblem::PartTypes {
                part_types: classes,
                classes: out.shape()[0],
            }));
        }
    }
    let config = NetConfig {
        arch: meta.arch,
        preset: meta.preset,
        classes,
        size_aware: meta.size_aware,
    };
    let mut net = Network::new(config, 0);
    let mut expected = Vec::new();
    for store in [&mut net.params, &mut net.running] {
        for entry in &store.entries {
            let tensor = file.tensor(&entry.name).map_err(|_| {
                fail(ModelFileProblem::MissingTensor {
                    name: entry.name.clone(),
                })
            })?;
            if tensor.dtype() != Dtype::F32 || tensor.shape() != entry.shape.as_slice() {
                return Err(fail(ModelFileProblem::WrongShape {
                    name: entry.name.clone(),
                    dtype: format!("{:?}", tensor.dtype()),
                    found: tensor.shape().to_vec(),
                    expected: entry.shape.clone(),
                }));
            }
            let values = entry.slot.of_mut(&mut store.values);
            for (v, b) in values.iter_mut().zip(tensor.data().chunks_exact(4)) {
                *v = f32::from_le_bytes([b[0], b[1], b[2], b[3]]);
            }
            if values.iter().any(|v| !v.is_finite()) {
                return Err(fail(ModelFileProblem::NonFinite {
                    name: entry.name.clone(),
                }));
            }
            expected.push(entry.name.as_str());
        }
    }
    if let Some(name) = file.names().into_iter().find(|n| !expected.contains(n)) {
        return Err(fail(ModelFileProblem::UnexpectedTensor {
            name: name.to_owned(),
        }));
    }
    Ok((net, meta))
}

/// The output layer's weight: its rows are the classes.
const CLASS_SCORES: &str = "head.out.weight";

/// Version first, so that a newer file is reported as newer even if its fields changed.
fn parse_meta(text: &str) -> Result<ModelMeta, ModelFileProblem> {
    let value: serde_json::Value =
        serde_json::from_str(text).map_err(|e| ModelFileProblem::BadMetadata(e.to_string()))?;
    let version = value
        .get("format_version")
        .and_then(serde_json::Value::as_u64)
        .ok_or_else(|| ModelFileProblem::BadMetadata("no format_version".into()))?;
    if version > FORMAT_VERSION as u64 {
        return Err(ModelFileProblem::NewerVersion {
            found: u32::try_from(version).unwrap_or(u32::MAX),
            supported: FORMAT_VERSION,
        });
    }
    let meta: ModelMeta =
        serde_json::from_value(value).map_err(|e| ModelFileProblem::BadMetadata(e.to_string()))?;
    check_meta(&meta)?;
    Ok(meta)
}

fn check_meta(meta: &ModelMeta) -> Result<(), ModelFileProblem> {
    let types = &meta.part_types;
    if types.is_empty() {
        return Err(ModelFileProblem::BadPartTypes("no part types".into()));
    }
    if let Some(blank) = types.iter().position(|t| t.trim().is_empty()) {
        return Err(ModelFileProblem::BadPartTypes(format!(
            "part type {blank} has no name"
        )));
    }
    for (i, t) in types.iter().enumerate() {
        if types[..i].contains(t) {
            return Err(ModelFileProblem::BadPartTypes(format!(
                "'{t}' is listed twice"
            )));
        }
    }
    let Calibration {
        temperature,
        review_threshold,
    } = meta.calibration;
    if !(temperature.is_finite() && temperature > 0.0) {
        return Err(ModelFileProblem::BadCalibration(format!(
            "temperature {temperature}"
        )));
    }
    if !(0.0..=1.0).contains(&review_threshold) {
        return Err(ModelFileProblem::BadCalibration(format!(
            "review threshold {review_threshold}"
        )));
    }
    Ok(())
}

/// Sorts safetensors' complaints into ours.
fn container_problem(e: SafeTensorError, bytes: usize) -> ModelFileProblem {
    match e {
        SafeTensorError::HeaderTooSmall
        | SafeTensorError::InvalidHeaderLength
        | SafeTensorError::MetadataIncompleteBuffer => ModelFileProblem::Truncated { bytes },
        other => ModelFileProblem::Corrupt(other.to_string()),
    }
}

/// A tensor of the network as safetensors wants to see it.
struct F32Tensor<'a> {
    shape: Vec<usize>,
    values: &'a [f32],
}

impl View for F32Tensor<'_> {
    fn dtype(&self) -> Dtype {
        Dtype::F32
    }

    fn shape(&self) -> &[usize] {
        &self.shape
    }

    fn data(&self) -> Cow<'_, [u8]> {
        Cow::Owned(self.values.iter().flat_map(|v| v.to_le_bytes()).collect())
    }

    fn data_len(&self) -> usize {
        self.values.len() * 4
    }
}
