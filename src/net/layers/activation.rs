//! LeakyReLU, `max(x, 0) + slope * min(x, 0)` element-wise (DGCNN uses slope 0.2).

use rayon::prelude::*;

use crate::net::batch::Batch;

/// Values per parallel task of the element-wise passes (large enough to amortise a task).
const ELEMENTS_PER_TASK: usize = 1 << 14;

#[derive(Clone, Copy, Debug)]
pub(crate) struct LeakyRelu {
    pub slope: f32,
}

/// Which inputs were positive: all the backward pass needs, at a byte per value.
pub(crate) struct LeakyReluCache {
    positive: Vec<bool>,
}

impl LeakyRelu {
    /// In place. The gradient at exactly 0 is `slope`, as in PyTorch.
    pub fn forward(&self, x: Batch) -> (Batch, LeakyReluCache) {
        let mut y = x;
        let mut positive = vec![false; y.data.len()];
        y.data
            .par_chunks_mut(ELEMENTS_PER_TASK)
            .zip(positive.par_chunks_mut(ELEMENTS_PER_TASK))
            .for_each(|(ys, ps)| {
                // Branch-free (a select, not a jump): the signs are random, so a branch would
                // be mispredicted half the time (measured 3x slower).
                for (v, p) in ys.iter_mut().zip(ps) {
                    *p = *v > 0.0;
                    *v *= if *p { 1.0 } else { self.slope };
                }
            });
        (y, LeakyReluCache { positive })
    }

    /// `dL/dx = dL/dy` where the input was positive, `slope * dL/dy` elsewhere; in place.
    pub fn backward(&self, cache: LeakyReluCache, dy: Batch) -> Batch {
        assert_eq!(dy.data.len(), cache.positive.len(), "leaky relu shape");
        let mut dx = dy;
        dx.data
            .par_chunks_mut(ELEMENTS_PER_TASK)
            .zip(cache.positive.par_chunks(ELEMENTS_PER_TASK))
            .for_each(|(ds, ps)| {
                for (d, &p) in ds.iter_mut().zip(ps) {
                    *d *= if p { 1.0 } else { self.slope };
                }
            });
        dx
    }
}

#[cfg(test)]
mod tests {
    use super::*;
    use crate::net::gradcheck::{check_layer, LAYER};
    use crate::rng::Rng;

    #[test]
    fn forward_by_hand() {
        let act = LeakyRelu { slope: 0.2 };
        let (y, _) = act.forward(Batch::from_vec(vec![-2.0, 0.0, 3.0], 1, 1, 3));
        assert_eq!(y.data, vec![-0.4, 0.0, 3.0]);
    }

    #[test]
    fn gradients_match_finite_differences() {
        let mut rng = Rng::new(4);
        // Inputs at least 0.05 from the kink at 0, further than the step 1e-2.
        let data = (0..2 * 9 * 3)
            .map(|_| {
                let v = rng.range(0.05, 2.0) as f32;
                if rng.below(2) == 0 {
                    v
                } else {
                    -v
                }
            })
            .collect();
        let x = Batch::from_vec(data, 2, 9, 3);
        let act = LeakyRelu { slope: 0.2 };
        check_layer(&mut [], &x, LAYER, &mut rng, |_, x, dy| {
            let (y, cache) = act.forward(x.clone());
            let grads = dy.map(|dy| (act.backward(cache, dy.clone()), Vec::new()));
            (y, grads)
        });
    }
}
