//! The networks: layers with hand-written forward and backward passes on flat f32 buffers
//! (matrix products by ndarray), three architectures in two presets, the loss, the
//! optimisers and the model file.
//!
//! Offers [`Network`] (built from a [`NetConfig`]: [`Arch`], [`Preset`], classes, size-aware
//! head) with `train_batch`, `infer`, `embed` and `input_saliency`; [`Optimizer`] (SGD with
//! momentum or Adam, [`cosine_lr`]); [`smoothed_cross_entropy`]; and the model file:
//! [`save`], [`load`], [`ModelMeta`].

/// `Display` and case-insensitive `FromStr` for an enum of named choices with `ALL`,
/// `NAMES` and `name()`.
macro_rules! named_choice {
    ($t:ty, $what:literal) => {
        impl std::fmt::Display for $t {
            fn fmt(&self, f: &mut std::fmt::Formatter<'_>) -> std::fmt::Result {
                f.write_str(self.name())
            }
        }

        impl std::str::FromStr for $t {
            type Err = crate::net::model::UnknownChoice;

            fn from_str(s: &str) -> Result<Self, Self::Err> {
                Self::ALL
                    .into_iter()
                    .find(|c| c.name().eq_ignore_ascii_case(s.trim()))
                    .ok_or_else(|| crate::net::model::UnknownChoice {
                        what: $what,
                        given: s.to_owned(),
                        choices: &Self::NAMES,
                    })
            }
        }
    };
}

pub(crate) mod batch;
pub(crate) mod fast;
pub mod file;
#[cfg(test)]
pub(crate) mod gradcheck;
pub(crate) mod head;
pub(crate) mod layers;
pub mod loss;
pub mod model;
pub mod optim;
pub(crate) mod params;
pub(crate) mod trunk;

pub use file::{load, save, Calibration, ModelFileError, ModelMeta};
pub use loss::smoothed_cross_entropy;
pub use model::{Arch, BatchOutput, NetConfig, Network, Preset, UnknownChoice};
pub use optim::{cosine_lr, Optimizer, OptimizerKind};
