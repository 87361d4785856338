//! Finite-difference gradient checks for the layers and whole networks (tests only).
//!
//! The scalar checked is `L = sum(y * R)` for a fixed random `R`, accumulated in f64 from the
//! f32 outputs, so `dL/dy = R`. Each checked value `v` is moved by `+-h` and `+-2h`. The
//! central difference `(L(v+h) - L(v-h)) / 2h` is compared with the analytic gradient. The
//! second-order one-sided differences `(-3 L(v) + 4 L(v+h) - L(v+2h)) / 2h` and its mirror
//! tell whether a kink (LeakyReLU at 0, a change of the maximum or of a neighbour) lies in
//! `[v - 2h, v + 2h]`: the side without a kink equals the true derivative to `O(h^2)`, so
//! unless all three estimates agree within half the tolerance the value is skipped (and
//! counted); when they agree, the central difference is held to the tolerance. Only kinks on both sides
//! that happen to shift both one-sided estimates alike could slip through; the tests
//! keep the skipped share low so that most values are checked.
//!
//! Tolerance (`|central - analytic| <= abs + rel * |analytic|`): an f32 output carries a
//! rounding error of about 6e-8 of its size, so `L` over `n` outputs of order one carries about
//! `6e-8 * sqrt(n)` absolute noise, which a difference with step `h` divides by `h`; the
//! truncation error of the central difference is `h^2 / 6 * L'''`. For the layers (n up to a
//! few thousand, h = 1e-2) both stay below 1e-4 of a gradient of order one, and we allow
//! 1e-3 + 1e-2 relative. Whole networks get their own tolerance where they are checked.

use crate::net::batch::Batch;
use crate::rng::Rng;

/// How far to step and how close the differences must come.
#[derive(Clone, Copy, Debug)]
pub(crate) struct Tolerance {
    pub step: f32,
    pub abs: f64,
    pub rel: f64,
    /// Values checked per tensor at most (a random subset beyond that).
    pub max_checked: usize,
}

pub(crate) const LAYER: Tolerance = Tolerance {
    step: 1e-2,
    abs: 1e-3,
    rel: 1e-2,
    max_checked: 60,
};

pub(crate) fn random_batch(
    rng: &mut Rng,
    samples: usize,
    rows: usize,
    cols: usize,
    scale: f64,
) -> Batch {
    let data = (0..samples * rows * cols)
        .map(|_| (rng.normal() * scale) as f32)
        .collect();
    Batch::from_vec(data, samples, rows, cols)
}

/// `sum(y * weights)` in f64.
pub(crate) fn weighted_sum(y: &[f32], weights: &[f32]) -> f64 {
    assert_eq!(y.len(), weights.len());
    y.iter()
        .zip(weights)
        .map(|(&a, &b)| a as f64 * b as f64)
        .sum()
}

/// Checks `analytic` (the gradient of `loss` at `values`) by finite differences on up to
/// `tol.max_checked` of the values. Returns how many were checked and how many skipped
/// across a kink.
pub(crate) fn check_gradient(
    label: &str,
    values: &mut [f32],
    analytic: &[f32],
    tol: Tolerance,
    rng: &mut Rng,
    mut loss: impl FnMut(&[f32]) -> f64,
) -> (usize, usize) {
    assert_eq!(values.len(), analytic.len(), "{label}: gradient length");
    let indices: Vec<usize> = if values.len() <= tol.max_checked {
        (0..values.len()).collect()
    } else {
        (0..tol.max_checked)
            .map(|_| rng.below(values.len()))
            .collect()
    };
    let l0 = loss(values);
    let h = tol.step as f64;
    let mut skipped = 0;
    for &i in &indices {
        let v0 = values[i];
        let mut at = |steps: f32| {
            values[i] = v0 + steps * tol.step;
            let l = loss(values);
            values[i] = v0;
            l
        };
        let (l1, l2, m1, m2) = (at(1.0), at(2.0), at(-1.0), at(-2.0));
        let right = (-3.0 * l0 + 4.0 * l1 - l2) / (2.0 * h);
        let left = (3.0 * l0 - 4.0 * m1 + m2) / (2.0 * h);
        let central = (l1 - m1) / (2.0 * h);
        let want = analytic[i] as f64;
        let allowed = tol.abs + tol.rel * want.abs();
        let spread = (central - left)
            .abs()
            .max((central - right).abs())
            .max((left - right).abs());
        if spread > 0.5 * allowed {
            skipped += 1;
            continue;
        }
        assert!(
            (central - want).abs() <= allowed,
            "{label}[{i}]: finite difference {central:.6e}, backward {want:.6e} \
             (one-sided {left:.6e} / {right:.6e})"
        );
    }
    (indices.len(), skipped)
}

/// Checks a layer's input and parameter gradients at `x` with tolerance `tol`.
/// `layer(params, x, dy)` returns the output and, when `dy = dL/dy` is given,
/// `(dL/dx, dL/dparams)` over the whole parameter store.
/// At most one value in ten may be skipped for a kink.
pub(crate) fn check_layer(
    params: &mut [f32],
    x: &Batch,
    tol: Tolerance,
    rng: &mut Rng,
    layer: impl Fn(&[f32], &Batch, Option<&Batch>) -> (Batch, Option<(Batch, Vec<f32>)>),
) {
    let (y, _) = layer(params, x, None);
    let weights = random_batch(rng, y.samples, y.rows, y.cols, 1.0);
    let (_, grads) = layer(params, x, Some(&weights));
    let (dx, dparams) = grads.expect("backward ran");
    let p0 = params.to_vec();
    let mut xs = x.data.clone();
    let (checked, skipped) = check_gradient("input", &mut xs, &dx.data, tol, rng, |xd| {
        let moved = Batch::from_vec(xd.to_vec(), x.samples, x.rows, x.cols);
        weighted_sum(&layer(&p0, &moved, None).0.data, &weights.data)
    });
    assert!(
        skipped * 10 <= checked,
        "input: {skipped} of {checked} skipped"
    );
    let (checked, skipped) = check_gradient("parameters", params, &dparams, tol, rng, |p| {
        weighted_sum(&layer(p, x, None).0.data, &weights.data)
    });
    assert!(
        skipped * 10 <= checked,
        "parameters: {skipped} of {checked} skipped"
    );
}
