//! Cross-entropy with label smoothing (Szegedy et al. 2016), as PyTorch's
//! `cross_entropy(label_smoothing = e)`: the target is `1 - e` on the true class plus `e / K`
//! spread over all `K` classes; the loss is the mean over the batch.

/// Per-sample softmax probabilities: the cache of the loss's backward pass.
pub(crate) struct CrossEntropyCache {
    probabilities: Vec<f32>,
    classes: usize,
    smoothing: f32,
}

/// The mean smoothed cross-entropy of `logits` (`B x classes`, row-major) against `labels`
/// (`B` class indices), summed in f64. `smoothing` is in `[0, 1)`; 0 is plain cross-entropy.
///
/// Panics if the shapes disagree or a label is not below `classes`.
pub fn smoothed_cross_entropy(
    logits: &[f32],
    labels: &[usize],
    classes: usize,
    smoothing: f32,
) -> f32 {
    cross_entropy_forward(logits, labels, classes, smoothing).0
}

pub(crate) fn cross_entropy_forward(
    logits: &[f32],
    labels: &[usize],
    classes: usize,
    smoothing: f32,
) -> (f32, CrossEntropyCache) {
    assert_eq!(
        logits.len(),
        labels.len() * classes,
        "logits must be B x classes"
    );
    let mut probabilities = vec![0.0f32; logits.len()];
    let mut total = 0.0f64;
    for ((row, p), &label) in logits
        .chunks_exact(classes)
        .zip(probabilities.chunks_exact_mut(classes))
        .zip(labels)
    {
        assert!(label < classes, "label {label} not below {classes} classes");
        let max = row.iter().fold(f32::NEG_INFINITY, |m, &v| m.max(v));
        let sum: f64 = row.iter().map(|&v| ((v - max) as f64).exp()).sum();
        let log_sum = sum.ln();
        let mut loss = 0.0f64;
        for (c, (&v, p)) in row.iter().zip(p.iter_mut()).enumerate() {
            let log_p = (v - max) as f64 - log_sum;
            *p = log_p.exp() as f32;
            loss -= target(c == label, classes, smoothing) * log_p;
        }
        total += loss;
    }
    let loss = (total / labels.len().max(1) as f64) as f32;
    let cache = CrossEntropyCache {
        probabilities,
        classes,
        smoothing,
    };
    (loss, cache)
}

/// `dL/dlogits = (softmax - target) / B`.
pub(crate) fn cross_entropy_backward(cache: CrossEntropyCache, labels: &[usize]) -> Vec<f32> {
    let CrossEntropyCache {
        mut probabilities,
        classes,
        smoothing,
    } = cache;
    let scale = 1.0 / labels.len().max(1) as f64;
    for (p, &label) in probabilities.chunks_exact_mut(classes).zip(labels) {
        for (c, v) in p.iter_mut().enumerate() {
            *v = ((*v as f64 - target(c == label, classes, smoothing)) * scale) as f32;
        }
    }
    probabilities
}

fn target(is_label: bool, classes: usize, smoothing: f32) -> f64 {
    let spread = smoothing as f64 / classes as f64;
    if is_label {
        1.0 - smoothing as f64 + spread
    } else {
        spread
    }
}

#[cfg(test)]
mod tests {
    use super::*;
    use crate::net::gradcheck::{check_gradient, LAYER};
    use crate::rng::Rng;

    #[test]
    fn matches_values_worked_by_hand() {
        // Two classes, logits [0, ln 3]: softmax [1/4, 3/4]. Label 1, smoothing 0.2:
        // target [0.1, 0.9], loss = -(0.1 ln 1/4 + 0.9 ln 3/4) = 0.1 ln 4 + 0.9 ln 4/3.
        let logits = [0.0, 3f32.ln()];
        let want = 0.1 * 4f64.ln() + 0.9 * (4.0f64 / 3.0).ln();
        let got = smoothed_cross_entropy(&logits, &[1], 2, 0.2);
        assert!((got as f64 - want).abs() < 1e-6, "{got} vs {want}");
        // Without smoothing it is -ln 3/4.
        let plain = smoothed_cross_entropy(&logits, &[1], 2, 0.0);
        assert!((plain as f64 + 0.75f64.ln()).abs() < 1e-6);
        // Large logits do not overflow.
        assert!(smoothed_cross_entropy(&[1000.0, -1000.0], &[0], 2, 0.0).abs() < 1e-6);
    }

    #[test]
    fn gradient_matches_finite_differences() {
        let mut rng = Rng::new(13);
        let labels = [2, 0, 1, 2];
        let mut logits: Vec<f32> = (0..12).map(|_| (rng.normal() * 2.0) as f32).collect();
        let (_, cache) = cross_entropy_forward(&logits, &labels, 3, 0.2);
        let grad = cross_entropy_backward(cache, &labels);
        let loss = |l: &[f32]| cross_entropy_forward(l, &labels, 3, 0.2).0 as f64;
        let (checked, skipped) =
            check_gradient("logits", &mut logits, &grad, LAYER, &mut rng, loss);
        assert_eq!((checked, skipped), (12, 0));
    }
}
