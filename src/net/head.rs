//! The classifier head shared by all networks (DGCNN's): the pooled features, optionally
//! joined by the part's size, then fully connected 512 and 256 (each with batch norm,
//! LeakyReLU(0.2) and dropout 0.5), then one linear layer to the class scores.
//!
//! Size-aware head: the caller's four size values per sample (the log of the prepared
//! cloud's true radius and extents, mm) go through their own small linear + batch norm +
//! LeakyReLU layer, whose output joins the pooled features. The cloud itself is scaled to
//! unit radius by the clean-up recipe, so without this branch two parts of the same shape and
//! different size look the same to the network. Batch norm puts the log sizes (a few units
//! around 3 to 6) on the scale of the other features whatever the shop's part sizes are.

use crate::net::batch::{concat_cols, split_cols, Batch};
use crate::net::layers::activation::LeakyRelu;
use crate::net::layers::dense::{Dense, DenseCache};
use crate::net::layers::dropout::Dropout;
use crate::net::layers::edge_conv::DGCNN_SLOPE;
use crate::net::layers::linear::Linear;
use crate::net::model::Dims;
use crate::net::params::{Builder, Pass};
use crate::rng::Rng;

/// Values per sample the caller gives about the part's size.
pub(crate) const SIZE_VALUES: usize = 4;

const ACTIVATION: LeakyRelu = LeakyRelu { slope: DGCNN_SLOPE };

#[derive(Clone, Debug)]
pub(crate) struct Head {
    size: Option<Dense>,
    pooled: usize,
    fc1: Dense,
    fc2: Dense,
    dropout: Dropout,
    out: Linear,
}

/// The two dropout masks of one training step (after the first and second layer).
pub(crate) type DropoutMasks = [Vec<f32>; 2];

pub(crate) struct HeadCache {
    size: Option<DenseCache>,
    fc1: DenseCache,
    fc2: DenseCache,
    masks: Option<DropoutMasks>,
    /// Input of the output layer.
    last: Batch,
}

impl Head {
    pub fn new(
        b: &mut Builder,
        dims: &Dims,
        pooled: usize,
        classes: usize,
        size_aware: bool,
    ) -> Head {
        let size = size_aware
            .then(|| Dense::new(b, "head.size", SIZE_VALUES, dims.size, false, ACTIVATION));
        let features = pooled + size.as_ref().map_or(0, Dense::outputs);
        let [w1, w2] = dims.head;
        Head {
            size,
            pooled,
            fc1: Dense::new(b, "head.fc1", features, w1, false, ACTIVATION),
            fc2: Dense::new(b, "head.fc2", w1, w2, true, ACTIVATION),
            dropout: Dropout { p: dims.dropout },
            out: Linear::new(b, "head.out", w2, classes, true),
        }
    }

    /// Width of the features the fully connected layers see (pooled, then size).
    pub fn feature_width(&self) -> usize {
        self.fc1.linear.inputs
    }

    pub fn classes(&self) -> usize {
        self.out.outputs
    }

    pub fn draw_masks(&self, samples: usize, rng: &mut Rng) -> DropoutMasks {
        [
            self.dropout.draw_mask(samples * self.fc1.outputs(), rng),
            self.dropout.draw_mask(samples * self.fc2.outputs(), rng),
        ]
    }

    /// `pooled` and `size`: one row per sample, as one sample (`samples == 1`). Returns the
    /// features the fully connected layers see.
    pub fn features(
        &self,
        pass: &mut Pass<'_>,
        pooled: Batch,
        size: &Batch,
    ) -> (Batch, Option<DenseCache>) {
        match &self.size {
            Some(branch) => {
                let (s, cache) = branch.forward(pass, size.clone());
                (concat_cols(&[&pooled, &s]), Some(cache))
            }
            None => (pooled, None),
        }
    }

    /// Class scores, one row per sample. Dropout applies when `masks` are given (training).
    pub fn forward(
        &self,
        pass: &mut Pass<'_>,
        pooled: Batch,
        size: &Batch,
        masks: Option<DropoutMasks>,
    ) -> (Batch, HeadCache) {
        let (features, size_cache) = self.features(pass, pooled, size);
        let (mut h1, fc1) = self.fc1.forward(pass, features);
        if let Some(m) = &masks {
            h1 = self.dropout.forward(h1, &m[0]);
        }
        let (mut h2, fc2) = self.fc2.forward(pass, h1);
        if let Some(m) = &masks {
            h2 = self.dropout.forward(h2, &m[1]);
        }
        let logits = self.out.forward(pass.params, &h2);
        let cache = HeadCache {
            size: size_cache,
            fc1,
            fc2,
            masks,
            last: h2,
        };
        (logits, cache)
    }

    /// Returns `dL/dpooled` (the size values get no gradient).
    pub fn backward(
        &self,
        params: &[f32],
        cache: HeadCache,
        dlogits: &Batch,
        mut grads: Option<&mut [f32]>,
    ) -> Batch {
        let mut d = self
            .out
            .backward(params, &cache.last, dlogits, grads.as_deref_mut(), true)
            .expect("asked for the input gradient");
        if let Some(m) = &cache.masks {
            d = self.dropout.backward(&m[1], d);
        }
        let mut d = self
            .fc2
            .backward(params, cache.fc2, d, grads.as_deref_mut(), true)
            .expect("asked for the input gradient");
        if let Some(m) = &cache.masks {
            d = self.dropout.backward(&m[0], d);
        }
        let dfeatures = self
            .fc1
            .backward(params, cache.fc1, d, grads.as_deref_mut(), true)
            .expect("asked for the input gradient");
        match (&self.size, cache.size) {
            (Some(branch), Some(size_cache)) => {
                let parts = split_cols(&dfeatures, &[self.pooled, branch.outputs()]);
                branch.backward(params, size_cache, parts[1].clone(), grads, false);
                parts.into_iter().next().expect("two parts")
            }
            _ => dfeatures,
        }
    }
}
