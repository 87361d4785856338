//! The networks: architectures, presets, and [`Network`], which trains on a batch, answers,
//! embeds and explains.

use serde::{Deserialize, Serialize};

use crate::net::batch::Batch;
use crate::net::fast::trunk::FastTrunkCache;
use crate::net::fast::{self, Kernels};
use crate::net::head::{DropoutMasks, Head, SIZE_VALUES};
use crate::net::layers::batch_norm::MOMENTUM as BATCH_NORM_MOMENTUM;
use crate::net::loss::{cross_entropy_backward, cross_entropy_forward};
use crate::net::params::{Builder, Pass, Running, Store, TensorEntry};
use crate::net::trunk::{Trunk, TrunkCache};
use crate::rng::Rng;

/// Which network: `edgeconv` (Wang et al. 2019, the default), `pointnet` (Qi et al. 2017)
/// or `gcn` (Kipf and Welling 2017), for comparison on the same data.
#[derive(Clone, Copy, Debug, PartialEq, Eq, Hash, Serialize, Deserialize)]
#[serde(rename_all = "lowercase")]
pub enum Arch {
    /// DGCNN's classifier: EdgeConv layers on graphs rebuilt in feature space.
    EdgeConv,
    /// A shared per-point MLP and max pooling, no graph. Without PointNet's input and
    /// feature transform nets: the clean-up recipe already centres, scales and turns the
    /// clouds up, and augmentation turns them about that axis.
    PointNet,
    /// Graph convolution on a static k-NN graph of the points in space.
    Gcn,
}

/// How big: `quick` trains in minutes on a laptop, `full` is the paper's classifier.
#[derive(Clone, Copy, Debug, PartialEq, Eq, Hash, Serialize, Deserialize)]
#[serde(rename_all = "lowercase")]
pub enum Preset {
    Quick,
    Full,
}

/// A name that is none of the choices (for `--arch` and `--preset`).
#[derive(Clone, Debug, PartialEq, Eq, thiserror::Error)]
#[error("unknown {what} '{given}' (choose one of: {})", choices.join(", "))]
pub struct UnknownChoice {
    pub what: &'static str,
    pub given: String,
    pub choices: &'static [&'static str],
}

impl Arch {
    pub const ALL: [Arch; 3] = [Arch::EdgeConv, Arch::PointNet, Arch::Gcn];
    pub const NAMES: [&'static str; 3] = ["edgeconv", "pointnet", "gcn"];

    /// The name on the command line and in the model file.
    pub fn name(self) -> &'static str {
        Self::NAMES[self as usize]
    }
}

impl Preset {
    pub const ALL: [Preset; 2] = [Preset::Quick, Preset::Full];
    pub const NAMES: [&'static str; 2] = ["quick", "full"];

    pub fn name(self) -> &'static str {
        Self::NAMES[self as usize]
    }

    /// Points per prepared cloud the network takes: 512 (quick) or 1024 (full, the paper's).
    pub fn points(self) -> usize {
        match self {
            Preset::Quick => 512,
            Preset::Full => 1024,
        }
    }

    /// Neighbours per point in the graphs: 16 (quick) or 20 (full, the paper's).
    pub fn k(self) -> usize {
        match self {
            Preset::Quick => 16,
            Preset::Full => 20,
        }
    }
}

named_choice!(Arch, "architecture");
named_choice!(Preset, "preset");

/// What network to build.
#[derive(Clone, Debug, PartialEq, Eq, Serialize, Deserialize)]
pub struct NetConfig {
    pub arch: Arch,
    pub preset: Preset,
    /// Number of part types, at least 1.
    pub classes: usize,
    /// Whether the part's size (the four `size` values of each sample, through a small
    /// linear + batch norm + LeakyReLU layer) joins the pooled features before the fully
    /// connected layers. Off, the network sees only the unit-radius cloud and cannot tell
    /// two parts of the same shape and different size apart.
    pub size_aware: bool,
}

/// Widths and sizes of a network. The presets fill it; tests use tiny ones.
#[derive(Clone, Debug, PartialEq)]
pub(crate) struct Dims {
    pub points: usize,
    pub k: usize,
    /// Per-point layers before the embedding (EdgeConv / GCN: their outputs are joined).
    pub trunk: Vec<usize>,
    /// Width of the last per-point layer, pooled over the points.
    pub embed: usize,
    /// The two fully connected layers of the head.
    pub head: [usize; 2],
    /// Output width of the size branch.
    pub size: usize,
    pub dropout: f32,
}

impl Dims {
    /// `full`: the paper's widths (DGCNN: EdgeConv 64, 64, 128, 256, embedding 1024, head
    /// 512, 256, dropout 0.5; PointNet: MLP 64, 64, 64, 128, 1024); `quick`: half of each.
    /// The size branch is 64 wide (32 for quick): small beside the pooled features, but
    /// enough for four inputs.
    pub fn of(arch: Arch, preset: Preset) -> Dims {
        let divisor = match preset {
            Preset::Quick => 2,
            Preset::Full => 1,
        };
        let trunk: &[usize] = match arch {
            Arch::EdgeConv | Arch::Gcn => &[64, 64, 128, 256],
            Arch::PointNet => &[64, 64, 64, 128],
        };
        Dims {
            points: preset.points(),
            k: preset.k(),
            trunk: trunk.iter().map(|w| w / divisor).collect(),
            embed: 1024 / divisor,
            head: [512 / divisor, 256 / divisor],
            size: 64 / divisor,
            dropout: 0.5,
        }
    }
}

/// What one training step returns.
#[derive(Clone, Debug, PartialEq)]
pub struct BatchOutput {
    /// Mean smoothed cross-entropy over the batch.
    pub loss: f32,
    /// `B x classes`, row-major, in training mode (batch statistics, dropout).
    pub logits: Vec<f32>,
}

/// The layers of a network, apart from the stores their tensors live in.
#[derive(Clone, Debug)]
pub(crate) struct Model {
    pub dims: Dims,
    pub trunk: Trunk,
    pub head: Head,
    /// The fast path (EdgeConv) or the plain layers; [`Network::new`] picks the fast one.
    pub kernels: Kernels,
}

pub(crate) struct ModelCache {
    pub trunk: TrunkPass,
    pub head: crate::net::head::HeadCache,
}

/// The trunk's cache from whichever path ran.
pub(crate) enum TrunkPass {
    Plain(TrunkCache),
    Fast(FastTrunkCache),
}

impl Model {
    /// The pooled features, one row per sample, on the path `kernels` picks.
    pub fn trunk_forward(&self, pass: &mut Pass<'_>, points: Batch) -> (Batch, TrunkPass) {
        match (&self.trunk, self.kernels) {
            (Trunk::EdgeConv { layers, embed }, Kernels::Fast)
                if layers.iter().all(|l| l.k <= fast::MAX_K) =>
            {
                let (pooled, cache) = fast::trunk::forward(layers, embed, pass, points);
                (pooled, TrunkPass::Fast(cache))
            }
            _ => {
                let (pooled, cache) = self.trunk.forward(pass, points);
                (pooled, TrunkPass::Plain(cache))
            }
        }
    }

    /// Class scores (`samples == 1`, one row per sample of `points`).
    pub fn forward(
        &self,
        pass: &mut Pass<'_>,
        points: Batch,
        size: &Batch,
        masks: Option<DropoutMasks>,
    ) -> (Batch, ModelCache) {
        let (pooled, trunk) = self.trunk_forward(pass, points);
        let (logits, head) = self
            .head
            .forward(pass, pooled.into_single_sample(), size, masks);
        (logits, ModelCache { trunk, head })
    }

    /// Adds every parameter gradient into `grads` (when given); returns `dL/dpoints` when
    /// `input_grad`.
    pub fn backward(
        &self,
        params: &[f32],
        cache: ModelCache,
        dlogits: &Batch,
        mut grads: Option<&mut [f32]>,
        input_grad: bool,
    ) -> Option<Batch> {
        let samples = dlogits.rows;
        let dpooled = self
            .head
            .backward(params, cache.head, dlogits, grads.as_deref_mut());
        let dpooled = dpooled.into_samples(samples);
        match (cache.trunk, &self.trunk) {
            (TrunkPass::Plain(c), trunk) => trunk.backward(params, c, &dpooled, grads, input_grad),
            (TrunkPass::Fast(c), Trunk::EdgeConv { layers, embed }) => {
                fast::trunk::backward(layers, embed, params, c, &dpooled, grads, input_grad)
            }
            (TrunkPass::Fast(_), _) => unreachable!("the fast path serves EdgeConv only"),
        }
    }
}

/// A network with its parameters, their gradients and its batch-norm running statistics.
///
/// Inputs: `points` is `B x N x 3` flat row-major (the prepared clouds: centred, unit radius,
/// `N = preset.points()`); `size` is `B x 4`, for each sample the natural log of the cloud's
/// true radius and of its three extents in mm (ignored unless `size_aware`). Work runs in
/// parallel over the samples of a batch on the global rayon pool; results are bit-identical
/// for the same inputs, seed and thread count (every reduction over the batch is made per
/// sample and summed in sample order).
#[derive(Clone, Debug)]
pub struct Network {
    config: NetConfig,
    pub(crate) model: Model,
    pub(crate) params: Store,
    pub(crate) grads: Vec<f32>,
    pub(crate) running: Store,
}

/// Samples per forward pass in [`Network::infer`] and [`Network::embed`]: bounds the memory
/// of a long list of clouds, and is still enough to keep both cores busy.
const INFER_CHUNK: usize = 8;

impl Network {
    /// A fresh network, its weights drawn from `seed` (PyTorch's default ranges).
    ///
    /// Panics if `config.classes == 0`.
    pub fn new(config: NetConfig, seed: u64) -> Network {
        let dims = Dims::of(config.arch, config.preset);
        Network::with_dims(config, dims, seed)
    }

    pub(crate) fn with_dims(config: NetConfig, dims: Dims, seed: u64) -> Network {
        assert!(config.classes > 0, "a network needs at least one class");
        let mut b = Builder::new(seed);
        let trunk = Trunk::new(&mut b, config.arch, &dims);
        let head = Head::new(
            &mut b,
            &dims,
            trunk.pooled_width(),
            config.classes,
            config.size_aware,
        );
        let Builder {
            params, running, ..
        } = b;
        Network {
            config,
            model: Model {
                dims,
                trunk,
                head,
                kernels: Kernels::Fast,
            },
            grads: vec![0.0; params.values.len()],
            params,
            running,
        }
    }

    pub fn config(&self) -> &NetConfig {
        &self.config
    }

    /// Points per cloud this network takes.
    pub fn points(&self) -> usize {
        self.model.dims.points
    }

    /// Number of trainable values.
    pub fn parameter_count(&self) -> usize {
        self.params.values.len()
    }

    /// Width of [`Network::embed`]'s rows.
    pub fn embedding_width(&self) -> usize {
        self.model.head.feature_width()
    }

    /// One training step's forward and backward pass on a batch of `B = labels.len()`
    /// samples: batch norm with batch statistics (running statistics updated), dropout drawn
    /// from `rng`, smoothed cross-entropy (`label_smoothing` in `[0, 1)`, the paper's code
    /// uses 0.2). Gradients are added to the network's gradient buffers, which
    /// [`Optimizer::step`](crate::net::optim::Optimizer::step) applies and clears.
    ///
    /// Panics if `B < 2` (batch norm needs two samples), the lengths disagree with `B`, or a
    /// label is not below `classes`.
    pub fn train_batch(
        &mut self,
        points: &[f32],
        size: &[f32],
        labels: &[usize],
        label_smoothing: f32,
        rng: &mut Rng,
    ) -> BatchOutput {
        assert!(
            labels.len() >= 2,
            "training needs at least two samples per batch"
        );
        let (points, size) = self.inputs(points, size);
        assert_eq!(points.samples, labels.len(), "one label per sample");
        let masks = self.model.head.draw_masks(labels.len(), rng);
        self.train_step(points, &size, labels, label_smoothing, masks)
    }

    pub(crate) fn train_step(
        &mut self,
        points: Batch,
        size: &Batch,
        labels: &[usize],
        label_smoothing: f32,
        masks: DropoutMasks,
    ) -> BatchOutput {
        let Network {
            model,
            params,
            grads,
            running,
            ..
        } = self;
        let mut pass = Pass {
            params: &params.values,
            running: Running::Update(&mut running.values),
        };
        let (logits, cache) = model.forward(&mut pass, points, size, Some(masks));
        let classes = model.head.classes();
        let (loss, loss_cache) =
            cross_entropy_forward(&logits.data, labels, classes, label_smoothing);
        let dlogits = Batch::from_vec(
            cross_entropy_backward(loss_cache, labels),
            1,
            labels.len(),
            classes,
        );
        model.backward(&params.values, cache, &dlogits, Some(grads), false);
        BatchOutput {
            loss,
            logits: logits.data,
        }
    }

    /// Sets every batch-norm running statistic to its mean over `batches` (each a `points`,
    /// `size` pair of `B >= 2` samples, shaped as for [`Network::train_batch`]), weighted by
    /// the batches' sizes: forward passes in training mode without dropout and without
    /// gradients, as PyTorch's cumulative average (`momentum=None`) gives. Nothing else
    /// changes, and an empty list changes nothing.
    ///
    /// Run over clean training scans after an epoch, this gives evaluation mode statistics
    /// without the extra variance dropout adds in training, the "variance shift" of Li et al.
    /// 2019 ("Understanding the Disharmony between Dropout and Batch Normalization"), which
    /// early in training sends every scan to one class.
    ///
    /// Panics as [`Network::train_batch`] (`B >= 2`, shapes).
    pub fn refresh_running_statistics(&mut self, batches: &[(&[f32], &[f32])]) {
        let mut sum = vec![0.0f64; self.running.values.len()];
        let mut samples = 0usize;
        for &(points, size) in batches {
            let (points, size) = self.inputs(points, size);
            assert!(points.samples >= 2, "batch norm needs two samples");
            let count = points.samples;
            let Network {
                model,
                params,
                running,
                ..
            } = self;
            // From zero, one update leaves exactly momentum x this batch's statistics.
            running.values.fill(0.0);
            let mut pass = Pass {
                params: &params.values,
                running: Running::Update(&mut running.values),
            };
            model.forward(&mut pass, points, &size, None);
            for (s, &r) in sum.iter_mut().zip(&running.values) {
                *s += count as f64 * r as f64 / BATCH_NORM_MOMENTUM as f64;
            }
            samples += count;
        }
        if samples > 0 {
            for (r, s) in self.running.values.iter_mut().zip(&sum) {
                *r = (s / samples as f64) as f32;
            }
        }
    }

    /// Class scores (`B x classes`, before softmax) in evaluation mode: running statistics,
    /// no dropout. `B` comes from the lengths.
    ///
    /// Panics if `points` is not a whole number `B >= 1` of `N x 3` clouds or `size` is not `B x 4`.
    pub fn infer(&self, points: &[f32], size: &[f32]) -> Vec<f32> {
        self.in_chunks(points, size, |pass, points, size| {
            self.model.forward(pass, points, size, None).0.data
        })
    }

    /// The features the classifier's fully connected layers see (pooled global features,
    /// then the size branch's output when size-aware): `B x embedding_width()`, evaluation
    /// mode. For a 2D map of scans.
    ///
    /// Panics as [`Network::infer`].
    pub fn embed(&self, points: &[f32], size: &[f32]) -> Vec<f32> {
        self.in_chunks(points, size, |pass, points, size| {
            let (pooled, _) = self.model.trunk_forward(pass, points);
            self.model
                .head
                .features(pass, pooled.into_single_sample(), size)
                .0
                .data
        })
    }

    /// The gradient of the score of `class` with respect to the input points of one cloud
    /// (`N x 3`), in evaluation mode: the saliency of each point (Zheng et al. 2019, "PointCloud
    /// Saliency Maps", use it to rank points). No gradient flows through the choice of
    /// neighbours.
    ///
    /// Panics if `points` is not one `N x 3` cloud, `size` not 4 values or `class` not below
    /// `classes`.
    pub fn input_saliency(&self, points: &[f32], size: &[f32], class: usize) -> Vec<f32> {
        let (points, size) = self.inputs(points, size);
        assert_eq!(points.samples, 1, "saliency takes one cloud");
        let classes = self.model.head.classes();
        assert!(class < classes, "class {class} not below {classes}");
        let mut pass = Pass {
            params: &self.params.values,
            running: Running::Use(&self.running.values),
        };
        let (_, cache) = self.model.forward(&mut pass, points, &size, None);
        let mut dlogits = Batch::zeros(1, 1, classes);
        dlogits.data[class] = 1.0;
        self.model
            .backward(&self.params.values, cache, &dlogits, None, true)
            .expect("asked for the input gradient")
            .data
    }

    /// Checks the shapes and wraps the inputs: points as `B` samples of `N x 3`, size as one
    /// sample of `B x 4` rows.
    fn inputs(&self, points: &[f32], size: &[f32]) -> (Batch, Batch) {
        let (samples, n) = (self.batch_size(points, size), self.model.dims.points);
        (
            Batch::from_vec(points.to_vec(), samples, n, 3),
            Batch::from_vec(size.to_vec(), 1, samples, SIZE_VALUES),
        )
    }

    /// `B`, checked against both lengths.
    fn batch_size(&self, points: &[f32], size: &[f32]) -> usize {
        let n = self.model.dims.points;
        assert!(
            !points.is_empty() && points.len().is_multiple_of(n * 3),
            "points must be B x {n} x 3 (got {} values)",
            points.len()
        );
        let samples = points.len() / (n * 3);
        assert_eq!(
            size.len(),
            samples * SIZE_VALUES,
            "size must be B x {SIZE_VALUES}"
        );
        samples
    }

    /// Runs `run` in evaluation mode on chunks of at most [`INFER_CHUNK`] samples and joins
    /// the results.
    fn in_chunks(
        &self,
        points: &[f32],
        size: &[f32],
        run: impl Fn(&mut Pass<'_>, Batch, &Batch) -> Vec<f32>,
    ) -> Vec<f32> {
        self.batch_size(points, size);
        let per_sample = self.model.dims.points * 3;
        let mut out = Vec::new();
        for (p, s) in points
            .chunks(INFER_CHUNK * per_sample)
            .zip(size.chunks(INFER_CHUNK * SIZE_VALUES))
        {
            let (p, s) = self.inputs(p, s);
            let mut pass = Pass {
                params: &self.params.values,
                running: Running::Use(&self.running.values),
            };
            out.extend(run(&mut pass, p, &s));
        }
        out
    }

    /// Every trainable tensor, then every running statistic, with its values.
    pub(crate) fn tensors(&self) -> impl Iterator<Item = (&TensorEntry, &[f32])> {
        let params = self
            .params
            .entries
            .iter()
            .map(|e| (e, e.slot.of(&self.params.values)));
        let running = self
            .running
            .entries
            .iter()
            .map(|e| (e, e.slot.of(&self.running.values)));
        params.chain(running)
    }
}

#[cfg(test)]
pub(crate) mod tests;
