//! The network's public surface on the real `quick` preset, as the training loop uses it:
//! shapes, the size-aware switch, an optimiser step, and reproducibility. (The gradients
//! themselves are checked by finite differences and against PyTorch in the unit tests.)

use partsift::net::{cosine_lr, Arch, NetConfig, Network, Optimizer, OptimizerKind, Preset};
use partsift::rng::Rng;

fn config(arch: Arch, size_aware: bool) -> NetConfig {
    NetConfig {
        arch,
        preset: Preset::Quick,
        classes: 4,
        size_aware,
    }
}

/// Two unit-radius clouds: a flat disc and a rod.
fn two_clouds(rng: &mut Rng) -> Vec<f32> {
    let n = Preset::Quick.points();
    let mut points = Vec::with_capacity(2 * n * 3);
    for axes in [[1.0, 1.0, 0.05], [0.1, 0.1, 1.0]] {
        for _ in 0..n {
            for a in axes {
                points.push((rng.range(-1.0, 1.0) * a) as f32);
            }
        }
    }
    points
}

#[test]
fn a_training_step_through_the_public_surface() {
    let mut rng = Rng::new(1);
    let points = two_clouds(&mut rng);
    let size = [3.2, 3.9, 3.9, 1.0, 2.5, 1.8, 1.8, 3.2];
    let n = Preset::Quick.points();
    for arch in Arch::ALL {
        let mut net = Network::new(config(arch, true), 5);
        assert_eq!(net.points(), n);
        let mut opt = Optimizer::new(OptimizerKind::Sgd, &net);
        let before = net.infer(&points, &size);
        assert_eq!(before.len(), 2 * 4);
        let out = net.train_batch(&points, &size, &[1, 3], 0.2, &mut rng);
        assert!(
            out.loss.is_finite() && out.loss > 0.0,
            "{arch}: loss {}",
            out.loss
        );
        assert_eq!(out.logits.len(), 2 * 4);
        opt.step(&mut net, cosine_lr(0.1, 0.001, 0, 10));
        assert_ne!(
            net.infer(&points, &size),
            before,
            "{arch}: the step changed the network"
        );
        let embedding = net.embed(&points, &size);
        assert_eq!(embedding.len(), 2 * net.embedding_width());
        let saliency = net.input_saliency(&points[..n * 3], &size[..4], 3);
        assert_eq!(saliency.len(), n * 3);
        assert!(saliency.iter().all(|v| v.is_finite()) && saliency.iter().any(|&v| v != 0.0));
    }
}

#[test]
fn size_values_matter_only_to_a_size_aware_network() {
    let mut rng = Rng::new(2);
    let points = two_clouds(&mut rng);
    let small = [1.0f32, 1.5, 1.5, 0.2, 1.0, 0.5, 0.5, 1.0];
    let large: Vec<f32> = small.iter().map(|v| v + 2.3).collect(); // ten times the size
    let blind = Network::new(config(Arch::EdgeConv, false), 3);
    assert_eq!(blind.infer(&points, &small), blind.infer(&points, &large));
    let aware = Network::new(config(Arch::EdgeConv, true), 3);
    assert_ne!(aware.infer(&points, &small), aware.infer(&points, &large));
    assert_eq!(aware.embedding_width(), blind.embedding_width() + 32);
}

#[test]
fn same_seed_same_training_step() {
    let step = || {
        let mut rng = Rng::new(8);
        let points = two_clouds(&mut rng);
        let size = [3.0f32; 8];
        let mut net = Network::new(config(Arch::Gcn, true), 21);
        let mut opt = Optimizer::new(OptimizerKind::Adam, &net);
        let out = net.train_batch(&points, &size, &[0, 2], 0.2, &mut rng);
        opt.step(&mut net, 0.001);
        (out, net.infer(&points, &size))
    };
    assert_eq!(step(), step());
}
