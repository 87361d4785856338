//! Optimisers on the network's flat parameter store, with PyTorch's update rules:
//! SGD with momentum (DGCNN's: learning rate 0.1, momentum 0.9, weight decay 1e-4, cosine
//! annealing down to 0.001) and Adam (learning rate 0.001, weight decay 1e-4 added to the
//! gradient as in `torch.optim.Adam`, not decoupled as in AdamW). Weight decay applies to
//! every parameter, batch-norm scales and shifts included, as in DGCNN's training code.

use serde::{Deserialize, Serialize};

use crate::net::model::Network;

/// Which optimiser.
#[derive(Clone, Copy, Debug, PartialEq, Eq, Hash, Serialize, Deserialize)]
#[serde(rename_all = "lowercase")]
pub enum OptimizerKind {
    Sgd,
    Adam,
}

impl OptimizerKind {
    pub const ALL: [OptimizerKind; 2] = [OptimizerKind::Sgd, OptimizerKind::Adam];
    const NAMES: [&'static str; 2] = ["sgd", "adam"];

    pub fn name(self) -> &'static str {
        Self::NAMES[self as usize]
    }

    /// Starting learning rate: 0.1 (SGD, DGCNN's) or 0.001 (Adam).
    pub fn base_lr(self) -> f32 {
        match self {
            OptimizerKind::Sgd => 0.1,
            OptimizerKind::Adam => 0.001,
        }
    }

    /// Where cosine annealing ends: 0.001 (SGD, DGCNN's), a hundredth of the start (Adam).
    pub fn min_lr(self) -> f32 {
        match self {
            OptimizerKind::Sgd => 0.001,
            OptimizerKind::Adam => 1e-5,
        }
    }
}
named_choice!(OptimizerKind, "optimiser");

pub const WEIGHT_DECAY: f32 = 1e-4;
pub const SGD_MOMENTUM: f32 = 0.9;
/// Adam's `beta1`, `beta2` and `eps`: PyTorch's defaults.
pub const ADAM_BETAS: (f32, f32) = (0.9, 0.999);
pub const ADAM_EPS: f32 = 1e-8;

/// The optimiser's state for one network (one value, or two for Adam, per parameter).
#[derive(Clone, Debug)]
pub struct Optimizer {
    kind: OptimizerKind,
    /// SGD: the momentum buffer; Adam: the first moment.
    first: Vec<f32>,
    /// Adam: the second moment.
    second: Vec<f32>,
    steps: u32,
}

impl Optimizer {
    pub fn new(kind: OptimizerKind, net: &Network) -> Optimizer {
        let n = net.parameter_count();
        Optimizer {
            kind,
            first: vec![0.0; n],
            second: if kind == OptimizerKind::Adam {
                vec![0.0; n]
            } else {
                Vec::new()
            },
            steps: 0,
        }
    }

    pub fn kind(&self) -> OptimizerKind {
        self.kind
    }

    /// Applies the gradients accumulated in `net` with learning rate `lr`, then sets them
    /// to zero.
    ///
    /// Panics if `net` is not the network (or one of its shape) this optimiser was made for.
    pub fn step(&mut self, net: &mut Network, lr: f32) {
        self.update(&mut net.params.values, &net.grads, lr);
        net.grads.fill(0.0);
    }

    /// One update of `params` with `grads`.
    fn update(&mut self, params: &mut [f32], grads: &[f32], lr: f32) {
        assert_eq!(
            params.len(),
            self.first.len(),
            "optimiser made for another network"
        );
        assert_eq!(grads.len(), params.len(), "one gradient per parameter");
        self.steps += 1;
        match self.kind {
            OptimizerKind::Sgd => {
                let first_step = self.steps == 1;
                for ((p, g), buf) in params.iter_mut().zip(grads.iter()).zip(&mut self.first) {
                    let d = g + WEIGHT_DECAY * *p;
                    *buf = if first_step {
                        d
                    } else {
                        SGD_MOMENTUM * *buf + d
                    };
                    *p -= lr * *buf;
                }
            }
            OptimizerKind::Adam => {
                let (b1, b2) = ADAM_BETAS;
                let t = self.steps as i32;
                let correction1 = 1.0 - (b1 as f64).powi(t);
                let correction2_sqrt = (1.0 - (b2 as f64).powi(t)).sqrt();
                let step_size = (lr as f64 / correction1) as f32;
                for (((p, g), m), v) in params
                    .iter_mut()
                    .zip(grads.iter())
                    .zip(&mut self.first)
                    .zip(&mut self.second)
                {
                    let d = g + WEIGHT_DECAY * *p;
                    *m = b1 * *m + (1.0 - b1) * d;
                    *v = b2 * *v + (1.0 - b2) * d * d;
                    let denom = (v.sqrt() as f64 / correction2_sqrt) as f32 + ADAM_EPS;
                    *p -= step_size * *m / denom;
                }
            }
        }
    }
}

/// Cosine annealing (Loshchilov and Hutter 2017, as PyTorch's `CosineAnnealingLR` with
/// `T_max = epochs`): `min + (base - min) * (1 + cos(pi * epoch / epochs)) / 2`, so epoch 0
/// gets `base` and epoch `epochs` gets `min`. `epochs == 0` gives `base`; epochs past the
/// end stay at `min`.
pub fn cosine_lr(base: f32, min: f32, epoch: usize, epochs: usize) -> f32 {
    if epochs == 0 {
        return base;
    }
    let t = epoch.min(epochs) as f64 / epochs as f64;
    (min as f64 + (base - min) as f64 * (1.0 + (std::f64::consts::PI * t).cos()) / 2.0) as f32
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn cosine_schedule_ends_and_middle() {
        assert_eq!(cosine_lr(0.1, 0.001, 0, 10), 0.1);
        assert!((cosine_lr(0.1, 0.001, 5, 10) - 0.0505).abs() < 1e-7);
        assert!((cosine_lr(0.1, 0.001, 10, 10) - 0.001).abs() < 1e-9);
        assert!((cosine_lr(0.1, 0.001, 12, 10) - 0.001).abs() < 1e-9);
        assert_eq!(cosine_lr(0.1, 0.001, 3, 0), 0.1);
    }

    /// Three steps against `torch.optim.SGD(momentum 0.9, weight_decay 1e-4)` and
    /// `torch.optim.Adam(weight_decay 1e-4)` from the reference fixture (torch 2.15.0).
    #[test]
    fn steps_match_torch_optim() {
        use crate::net::model::tests::{assert_close, floats, reference_fixture};
        let fx = &reference_fixture()["optim"];
        let start = floats(&fx["start"]);
        for kind in OptimizerKind::ALL {
            let mut opt = Optimizer {
                kind,
                first: vec![0.0; start.len()],
                second: vec![0.0; start.len()],
                steps: 0,
            };
            let mut params = start.clone();
            for (i, lr) in floats(&fx["lrs"]).into_iter().enumerate() {
                opt.update(&mut params, &floats(&fx["grads"][i]), lr);
                assert_close(
                    &format!("{kind} step {i}"),
                    &params,
                    &floats(&fx[kind.name()][i]),
                    1e-6,
                );
            }
        }
    }

    #[test]
    fn names_parse_both_ways() {
        for kind in OptimizerKind::ALL {
            assert_eq!(kind.name().parse::<OptimizerKind>(), Ok(kind));
        }
        assert!("rmsprop".parse::<OptimizerKind>().is_err());
    }
}
