//! Linear, batch norm, LeakyReLU: the unit every network here is built from (a shared
//! per-point MLP layer, the embedding layer, a layer of the classifier head).

use crate::net::batch::Batch;
use crate::net::layers::activation::{LeakyRelu, LeakyReluCache};
use crate::net::layers::batch_norm::{BatchNorm, BatchNormCache};
use crate::net::layers::linear::Linear;
use crate::net::params::{Builder, Pass};

#[derive(Clone, Debug)]
pub(crate) struct Dense {
    pub linear: Linear,
    pub(crate) norm: BatchNorm,
    pub(crate) act: LeakyRelu,
}

pub(crate) struct DenseCache {
    input: Batch,
    norm: BatchNormCache,
    act: LeakyReluCache,
}

impl Dense {
    /// The linear part has no bias unless asked: the batch norm's shift that follows makes
    /// one redundant (DGCNN's layers have none, its second head layer does).
    pub fn new(
        b: &mut Builder,
        name: &str,
        inputs: usize,
        outputs: usize,
        bias: bool,
        act: LeakyRelu,
    ) -> Dense {
        Dense {
            linear: Linear::new(b, &format!("{name}.linear"), inputs, outputs, bias),
            norm: BatchNorm::new(b, &format!("{name}.norm"), outputs),
            act,
        }
    }

    pub fn outputs(&self) -> usize {
        self.linear.outputs
    }

    pub fn forward(&self, pass: &mut Pass<'_>, x: Batch) -> (Batch, DenseCache) {
        let y = self.linear.forward(pass.params, &x);
        let (z, norm) = self.norm.forward(pass, y);
        let (a, act) = self.act.forward(z);
        (
            a,
            DenseCache {
                input: x,
                norm,
                act,
            },
        )
    }

    pub fn backward(
        &self,
        params: &[f32],
        cache: DenseCache,
        dy: Batch,
        mut grads: Option<&mut [f32]>,
        input_grad: bool,
    ) -> Option<Batch> {
        let dz = self.act.backward(cache.act, dy);
        let dlin = self
            .norm
            .backward(params, cache.norm, dz, grads.as_deref_mut());
        self.linear
            .backward(params, &cache.input, &dlin, grads, input_grad)
    }
}
