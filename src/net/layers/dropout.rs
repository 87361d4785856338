//! Dropout (Srivastava et al. 2014), inverted: kept values are scaled by `1 / (1 - p)` in
//! training so that nothing changes at inference.

use crate::net::batch::Batch;
use crate::rng::Rng;

#[derive(Clone, Copy, Debug)]
pub(crate) struct Dropout {
    /// Probability of dropping a value, in `[0, 1)`.
    pub p: f32,
}

impl Dropout {
    /// A mask of `len` factors, 0 with probability `p` and `1 / (1 - p)` otherwise, drawn
    /// from `rng`. The mask is this layer's cache: forward and backward both multiply by it.
    pub fn draw_mask(&self, len: usize, rng: &mut Rng) -> Vec<f32> {
        let keep = 1.0 / (1.0 - self.p);
        (0..len)
            .map(|_| {
                if rng.uniform() < self.p as f64 {
                    0.0
                } else {
                    keep
                }
            })
            .collect()
    }

    pub fn forward(&self, x: Batch, mask: &[f32]) -> Batch {
        multiply(x, mask)
    }

    pub fn backward(&self, mask: &[f32], dy: Batch) -> Batch {
        multiply(dy, mask)
    }
}

fn multiply(x: Batch, mask: &[f32]) -> Batch {
    assert_eq!(x.data.len(), mask.len(), "dropout mask length");
    let mut y = x;
    for (v, m) in y.data.iter_mut().zip(mask) {
        *v *= m;
    }
    y
}

#[cfg(test)]
mod tests {
    use super::*;
    use crate::net::gradcheck::{check_layer, random_batch, LAYER};

    #[test]
    fn drops_about_p_and_keeps_the_mean() {
        let drop = Dropout { p: 0.5 };
        let mask = drop.draw_mask(100_000, &mut Rng::new(1));
        let dropped = mask.iter().filter(|&&m| m == 0.0).count();
        assert!((49_000..51_000).contains(&dropped), "{dropped}");
        let mean = mask.iter().map(|&m| m as f64).sum::<f64>() / mask.len() as f64;
        assert!((mean - 1.0).abs() < 0.02, "{mean}");
        assert_eq!(mask, drop.draw_mask(100_000, &mut Rng::new(1)), "seeded");
    }

    #[test]
    fn gradients_match_finite_differences() {
        let mut rng = Rng::new(6);
        let drop = Dropout { p: 0.3 };
        let x = random_batch(&mut rng, 1, 4, 6, 1.0);
        let mask = drop.draw_mask(x.data.len(), &mut rng);
        check_layer(&mut [], &x, LAYER, &mut rng, |_, x, dy| {
            let y = drop.forward(x.clone(), &mask);
            (
                y,
                dy.map(|dy| (drop.backward(&mask, dy.clone()), Vec::new())),
            )
        });
    }
}
