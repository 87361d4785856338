//! The fast path against the plain layers (the oracle): the same network, weights, inputs and
//! dropout masks on both, then a training step's logits, loss, every parameter gradient and
//! updated running statistics, and in evaluation mode the scores and the input gradient, each
//! to 1e-4 relative (to the value and to the tensor's scale, as the PyTorch fixture test).
//!
//! The two paths round differently (the fast one never forms an edge feature), so where two
//! neighbour candidates, or two edges competing for a maximum, tie to within f32 rounding,
//! each may pick its own; one such pick sends a gradient to another point, far more than
//! rounding. A full-size batch makes millions of such choices and a few of them tie that
//! closely. So the preset-sized comparisons give the fast path the plain layers' choices
//! (neighbour lists, winning edges, winning points of the pooling) and check that the
//! arithmetic then agrees; the tiny networks compare the paths end to end, each choosing on its
//! own, and the share of choices that differ is counted at every size.

use super::trunk::{backward, forward_with, Choices};
use super::Kernels;
use crate::net::batch::Batch;
use crate::net::gradcheck::random_batch;
use crate::net::head::DropoutMasks;
use crate::net::loss::{cross_entropy_backward, cross_entropy_forward};
use crate::net::model::tests::{assert_close, clouds, tiny};
use crate::net::model::{Arch, Dims, NetConfig, Network, Preset, TrunkPass};
use crate::net::optim::{Optimizer, OptimizerKind};
use crate::net::params::{Pass, Running};
use crate::net::trunk::Trunk;
use crate::rng::Rng;

const REL: f32 = 1e-4;
const CLASSES: usize = 5;

fn network(dims: Dims, seed: u64) -> Network {
    let config = NetConfig {
        arch: Arch::EdgeConv,
        preset: Preset::Quick,
        classes: CLASSES,
        size_aware: true,
    };
    Network::with_dims(config, dims, seed)
}

/// Batch norm scales of every sign, zero included, and shifts away from 0: the fast path picks
/// the largest or the smallest edge by the sign of the scale.
fn mixed_norms(net: &mut Network, rng: &mut Rng) {
    for entry in net.params.entries.clone() {
        let values = entry.slot.of_mut(&mut net.params.values);
        if entry.name.ends_with("norm.weight") {
            for (i, v) in values.iter_mut().enumerate() {
                *v = match i % 5 {
                    0 => 0.0,
                    1 | 2 => -rng.range(0.3, 1.5) as f32,
                    _ => rng.range(0.3, 1.5) as f32,
                };
            }
        } else if entry.name.ends_with("norm.bias") {
            values
                .iter_mut()
                .for_each(|v| *v = rng.range(-0.5, 0.5) as f32);
        }
    }
}

/// Makes the trunk's activations the identity (LeakyReLU slope 1). A LeakyReLU's gradient
/// jumps at 0, and among the millions of values of a preset-sized batch a few lie within
/// rounding of 0, where each path may take its own side: a jump as large as a flipped choice.
/// The preset-sized tests check the arithmetic without these kinks; the tiny ones keep them.
fn straighten(net: &mut Network) {
    let Trunk::EdgeConv { layers, embed } = &mut net.model.trunk else {
        panic!("an EdgeConv network");
    };
    for layer in layers {
        layer.act.slope = 1.0;
    }
    embed.act.slope = 1.0;
}

/// One batch of inputs.
struct Inputs {
    points: Batch,
    size: Batch,
    labels: Vec<usize>,
    masks: DropoutMasks,
}

fn inputs(net: &Network, samples: usize, rng: &mut Rng) -> Inputs {
    Inputs {
        points: clouds(rng, samples, net.points()),
        size: random_batch(rng, 1, samples, 4, 1.0),
        labels: (0..samples).map(|s| s % CLASSES).collect(),
        masks: net.model.head.draw_masks(samples, rng),
    }
}

/// What one pass gives: in training a step's logits, loss, gradients and running statistics;
/// in evaluation the logits and the gradient of every sample's score of class 1 with
/// respect to its points.
struct Outcome {
    logits: Vec<f32>,
    loss: f32,
    grads: Vec<f32>,
    running: Vec<f32>,
    dpoints: Option<Vec<f32>>,
}

/// `dL/dlogits` and the loss: the smoothed cross-entropy in training, else the sum of the
/// class-1 scores.
fn loss_gradient(logits: &Batch, inputs: &Inputs, train: bool) -> (Batch, f32) {
    let samples = inputs.labels.len();
    if train {
        let (loss, cache) = cross_entropy_forward(&logits.data, &inputs.labels, CLASSES, 0.2);
        let d = cross_entropy_backward(cache, &inputs.labels);
        (Batch::from_vec(d, 1, samples, CLASSES), loss)
    } else {
        let mut d = Batch::zeros(1, samples, CLASSES);
        d.data.chunks_exact_mut(CLASSES).for_each(|r| r[1] = 1.0);
        (d, 0.0)
    }
}

/// The plain layers through `Model::forward` / `backward`, and the choices they made.
fn plain_run(net: &Network, inputs: &Inputs, train: bool) -> (Outcome, Choices) {
    let mut running = net.running.values.clone();
    let mut grads = vec![0.0; net.params.values.len()];
    let mut pass = Pass {
        params: &net.params.values,
        running: if train {
            Running::Update(&mut running)
        } else {
            Running::Use(&net.running.values)
        },
    };
    let masks = train.then(|| inputs.masks.clone());
    let (logits, cache) = net
        .model
        .forward(&mut pass, inputs.points.clone(), &inputs.size, masks);
    let (neighbours, edge_winners, pool_winners) = match &cache.trunk {
        TrunkPass::Plain(c) => c.edgeconv_choices(),
        TrunkPass::Fast(_) => panic!("the plain network ran the fast path"),
    };
    let (dlogits, loss) = loss_gradient(&logits, inputs, train);
    let dpoints = net.model.backward(
        &net.params.values,
        cache,
        &dlogits,
        train.then_some(&mut grads[..]),
        !train,
    );
    let outcome = Outcome {
        logits: logits.data,
        loss,
        grads,
        running,
        dpoints: dpoints.map(|d| d.data),
    };
    let choices = Choices {
        neighbours,
        edge_winners,
        pool_winners,
    };
    (outcome, choices)
}

/// The fast trunk (with `given` choices, or its own) and the shared head; returns the choices
/// it used.
fn fast_run(
    net: &Network,
    inputs: &Inputs,
    train: bool,
    given: Option<&Choices>,
) -> (Outcome, Choices) {
    let Trunk::EdgeConv { layers, embed } = &net.model.trunk else {
        panic!("an EdgeConv network");
    };
    let params = &net.params.values;
    let mut running = net.running.values.clone();
    let mut grads = vec![0.0; params.len()];
    let mut pass = Pass {
        params,
        running: if train {
            Running::Update(&mut running)
        } else {
            Running::Use(&net.running.values)
        },
    };
    let samples = inputs.labels.len();
    let (pooled, trunk) = forward_with(layers, embed, &mut pass, inputs.points.clone(), given);
    let choices = trunk.choices();
    let masks = train.then(|| inputs.masks.clone());
    let (logits, head) =
        net.model
            .head
            .forward(&mut pass, pooled.into_single_sample(), &inputs.size, masks);
    let (dlogits, loss) = loss_gradient(&logits, inputs, train);
    let mut g = train.then_some(&mut grads[..]);
    let dpooled = net
        .model
        .head
        .backward(params, head, &dlogits, g.as_deref_mut());
    let dpoints = backward(
        layers,
        embed,
        params,
        trunk,
        &dpooled.into_samples(samples),
        g,
        !train,
    );
    let outcome = Outcome {
        logits: logits.data,
        loss,
        grads,
        running,
        dpoints: dpoints.map(|d| d.data),
    };
    (outcome, choices)
}

/// Whether the trunk's activations are the identity ([`straighten`]).
fn straight(net: &Network) -> bool {
    match &net.model.trunk {
        Trunk::EdgeConv { layers, embed } => {
            embed.act.slope == 1.0 && layers.iter().all(|l| l.act.slope == 1.0)
        }
        _ => false,
    }
}

/// Gradients that are 0 in exact arithmetic, which both sides round to about 1e-8, so that
/// their difference says nothing: a bias just before batch norm; and, when the trunk's
/// activations are the identity, the trunk's batch norm shifts, whose shift the next batch
/// norm takes off again (EdgeConv sees `x_j - x_i`, its `x_i` part only moves the mean).
fn exactly_zero(net: &Network, name: &str) -> bool {
    name == "head.fc2.linear.bias"
        || (straight(net)
            && name.ends_with("norm.bias")
            && (name.starts_with("edge") || name.starts_with("embed")))
}

/// The largest `|fast - plain|` over the plain tensor's largest magnitude.
fn scaled_error(fast: &[f32], plain: &[f32]) -> f32 {
    let scale = plain.iter().fold(0.0f32, |m, v| m.max(v.abs())).max(1e-30);
    fast.iter()
        .zip(plain)
        .fold(0.0f32, |m, (f, p)| m.max((f - p).abs()))
        / scale
}

fn assert_same(net: &Network, label: &str, fast: &Outcome, plain: &Outcome) {
    let errors: Vec<String> = net
        .params
        .entries
        .iter()
        .map(|e| {
            let err = scaled_error(e.slot.of(&fast.grads), e.slot.of(&plain.grads));
            format!("{} {err:.1e}", e.name)
        })
        .collect();
    if label == "train" {
        println!("{label}: gradient error / scale: {}", errors.join(", "));
    }
    assert_close(&format!("{label} logits"), &fast.logits, &plain.logits, REL);
    assert_close(&format!("{label} loss"), &[fast.loss], &[plain.loss], REL);
    for entry in &net.params.entries {
        let (f, p) = (entry.slot.of(&fast.grads), entry.slot.of(&plain.grads));
        if exactly_zero(net, &entry.name) {
            let largest = f.iter().chain(p).fold(0.0f32, |m, v| m.max(v.abs()));
            assert!(largest < 1e-5, "{}: {largest} where 0 is exact", entry.name);
        } else {
            assert_close(&format!("{label} grad {}", entry.name), f, p, REL);
        }
    }
    for entry in &net.running.entries {
        assert_close(
            &format!("{label} {}", entry.name),
            entry.slot.of(&fast.running),
            entry.slot.of(&plain.running),
            REL,
        );
    }
    match (&fast.dpoints, &plain.dpoints) {
        (Some(f), Some(p)) => assert_close(&format!("{label} dL/dpoints"), f, p, REL),
        (None, None) => {}
        _ => panic!("{label}: one path gave an input gradient, the other not"),
    }
}

/// Shares of the choices that differ: points whose neighbour set differs, output values
/// won by another point, pooled values won by another point.
fn differing(a: &Choices, b: &Choices, k: usize) -> [f64; 3] {
    let (mut sets, mut points, mut wins, mut values) = (0, 0, 0, 0);
    for l in 0..a.neighbours.len() {
        let (na, nb) = (&a.neighbours[l], &b.neighbours[l]);
        for (x, y) in na.chunks_exact(k).zip(nb.chunks_exact(k)) {
            let (mut x, mut y) = (x.to_vec(), y.to_vec());
            x.sort_unstable();
            y.sort_unstable();
            sets += usize::from(x != y);
            points += 1;
        }
        let c = a.edge_winners[l].len() / (na.len() / k);
        for (v, (&wa, &wb)) in a.edge_winners[l].iter().zip(&b.edge_winners[l]).enumerate() {
            let i = v / c;
            wins += usize::from(na[i * k + wa as usize] != nb[i * k + wb as usize]);
            values += 1;
        }
    }
    let pooled = a
        .pool_winners
        .iter()
        .zip(&b.pool_winners)
        .filter(|(x, y)| x != y)
        .count();
    [
        sets as f64 / points.max(1) as f64,
        wins as f64 / values.max(1) as f64,
        pooled as f64 / a.pool_winners.len().max(1) as f64,
    ]
}

/// Compares both paths in training and in evaluation mode, on at least three samples: with
/// two, the head's batch norm maps each channel to about -1 and +1 whatever its input, and
/// every gradient upstream of it is a cancellation residue that rounding dominates (the
/// preset-sized tests take eight, for the same reason). With `own_choices` the fast path
/// chooses for itself (and must then agree end to end), otherwise it takes the plain layers'.
fn compare(net: &mut Network, samples: usize, seed: u64, own_choices: bool) {
    let mut rng = Rng::new(seed);
    assert_eq!(net.model.kernels, Kernels::Fast, "the default path");
    let data = inputs(net, samples, &mut rng);
    let mut plain_net = net.clone();
    plain_net.model.kernels = Kernels::Plain;
    for train in [true, false] {
        let label = if train { "train" } else { "eval" };
        let (plain, choices) = plain_run(&plain_net, &data, train);
        let (fast, own) = fast_run(net, &data, train, (!own_choices).then_some(&choices));
        let own = if own_choices {
            own
        } else {
            fast_run(net, &data, train, None).1
        };
        let [nb, edge, pool] = differing(&own, &choices, net.model.dims.k);
        println!(
            "{label}: choices that differ: neighbour sets {nb:.1e}, edge winners {edge:.1e}, pooling {pool:.1e}"
        );
        assert_same(net, label, &fast, &plain);
        if train {
            // Evaluation mode with running statistics away from their start.
            net.running.values = plain.running.clone();
            plain_net.running.values = plain.running;
        }
    }
}

#[test]
fn tiny_network_matches_the_plain_layers_end_to_end() {
    compare(&mut network(tiny(Arch::EdgeConv), 1), 4, 1, true);
    let mut net = network(tiny(Arch::EdgeConv), 2);
    mixed_norms(&mut net, &mut Rng::new(2));
    compare(&mut net, 3, 2, true);
}

#[test]
fn negative_and_zero_batch_norm_scales_match_the_plain_layers() {
    // Points not a multiple of the tile, more than one tile per cloud; k = 1 and k = 7.
    for (k, seed) in [(1, 3), (7, 4)] {
        let dims = Dims {
            points: 150,
            k,
            ..tiny(Arch::EdgeConv)
        };
        let mut net = network(dims, seed);
        mixed_norms(&mut net, &mut Rng::new(seed));
        compare(&mut net, 3, seed, false);
        straighten(&mut net);
        compare(&mut net, 3, seed, false);
    }
}

#[test]
fn quick_preset_matches_the_plain_layers() {
    let mut net = network(Dims::of(Arch::EdgeConv, Preset::Quick), 4);
    mixed_norms(&mut net, &mut Rng::new(4));
    straighten(&mut net);
    compare(&mut net, 8, 4, false);
}

#[test]
fn full_preset_matches_the_plain_layers() {
    let mut net = network(Dims::of(Arch::EdgeConv, Preset::Full), 5);
    straighten(&mut net);
    compare(&mut net, 8, 5, false);
}

/// The public calls (`train_batch`, `infer`, `embed`, `input_saliency`) take the fast path
/// for EdgeConv and give what the plain layers give.
#[test]
fn network_calls_take_the_fast_path_and_agree() {
    let mut rng = Rng::new(6);
    let mut fast = network(tiny(Arch::EdgeConv), 6);
    let mut plain = fast.clone();
    plain.model.kernels = Kernels::Plain;
    let data = inputs(&fast, 4, &mut rng);
    let (p, s) = (&data.points.data, &data.size.data);
    let f_out = fast.train_batch(p, s, &data.labels, 0.2, &mut Rng::new(1));
    let p_out = plain.train_batch(p, s, &data.labels, 0.2, &mut Rng::new(1));
    assert_close("logits", &f_out.logits, &p_out.logits, REL);
    assert_close("infer", &fast.infer(p, s), &plain.infer(p, s), REL);
    assert_close("embed", &fast.embed(p, s), &plain.embed(p, s), REL);
    let one = data.points.sample(0);
    assert_close(
        "saliency",
        &fast.input_saliency(one, &s[..4], 2),
        &plain.input_saliency(one, &s[..4], 2),
        REL,
    );
}

/// Clouds of three shapes (a flat disc, a long rod, a ball), the label being the shape.
fn shapes(rng: &mut Rng, samples: usize, n: usize) -> (Vec<f32>, Vec<usize>) {
    let mut points = Vec::with_capacity(samples * n * 3);
    let mut labels = Vec::with_capacity(samples);
    for _ in 0..samples {
        let label = rng.below(3);
        let axes: [f64; 3] = match label {
            0 => [1.0, 1.0, 0.1],
            1 => [0.15, 0.15, 1.0],
            _ => [0.7, 0.7, 0.7],
        };
        for _ in 0..n {
            for a in axes {
                points.push((rng.range(-1.0, 1.0) * a) as f32);
            }
        }
        labels.push(label);
    }
    (points, labels)
}

/// Training on both paths from the same start with the same batches and dropout: the same
/// losses step for step at first (about 1e-6 apart). Later the two drift apart as any two f32
/// computations of a network in training do (a choice that ties within rounding goes the other
/// way, and the updates amplify the difference), but they learn alike: the same held-out
/// accuracy within a few clouds.
#[test]
fn training_follows_the_same_loss_curve() {
    let mut rng = Rng::new(8);
    let mut fast = network(tiny(Arch::EdgeConv), 6);
    let mut plain = fast.clone();
    plain.model.kernels = Kernels::Plain;
    let mut opt_fast = Optimizer::new(OptimizerKind::Adam, &fast);
    let mut opt_plain = Optimizer::new(OptimizerKind::Adam, &plain);
    let mut gaps = Vec::new();
    let steps = 300;
    let size = vec![0.0f32; 8 * 4];
    for step in 0..steps {
        let (points, labels) = shapes(&mut rng, 8, 32);
        let (mut r1, mut r2) = (Rng::new(step as u64), Rng::new(step as u64));
        let f = fast.train_batch(&points, &size, &labels, 0.2, &mut r1);
        let p = plain.train_batch(&points, &size, &labels, 0.2, &mut r2);
        opt_fast.step(&mut fast, 1e-3);
        opt_plain.step(&mut plain, 1e-3);
        gaps.push((f.loss - p.loss).abs() / p.loss.abs().max(1e-3));
    }
    let (points, labels) = shapes(&mut rng, 200, 32);
    let size = vec![0.0f32; 200 * 4];
    let right = |net: &Network| {
        let logits = net.infer(&points, &size);
        let hits = labels
            .iter()
            .enumerate()
            .filter(|&(s, &l)| {
                let row = &logits[s * CLASSES..(s + 1) * CLASSES];
                (0..CLASSES).max_by(|&a, &b| row[a].total_cmp(&row[b])) == Some(l)
            })
            .count();
        hits
    };
    let (fast_right, plain_right) = (right(&fast), right(&plain));
    let worst = |from: usize, to: usize| gaps[from..to].iter().fold(0.0f32, |m, &g| m.max(g));
    println!(
        "largest relative loss gap: steps 0-49 {:.1e}, 50-99 {:.1e}, 100-199 {:.1e}, 200-299 {:.1e}; \
         held-out: fast {fast_right} / 200, plain {plain_right} / 200",
        worst(0, 50),
        worst(50, 100),
        worst(100, 200),
        worst(200, 300)
    );
    assert!(worst(0, 50) < 1e-4, "the first 50 steps part");
    assert!(
        plain_right >= 180,
        "the plain network learned ({plain_right} / 200)"
    );
    assert!(fast_right.abs_diff(plain_right) <= 6, "learning differs");
}

#[test]
fn fast_path_is_the_same_bits_on_one_thread_or_two() {
    let run = |threads: usize| {
        let pool = rayon::ThreadPoolBuilder::new()
            .num_threads(threads)
            .build()
            .expect("pool");
        pool.install(|| {
            let mut rng = Rng::new(9);
            let mut net = network(Dims::of(Arch::EdgeConv, Preset::Quick), 1);
            let points = clouds(&mut rng, 3, 512);
            let size = random_batch(&mut rng, 1, 3, 4, 1.0);
            let out = net.train_batch(&points.data, &size.data, &[0, 1, 2], 0.2, &mut rng);
            (out, net.grads.clone(), net.infer(&points.data, &size.data))
        })
    };
    assert_eq!(run(1), run(2));
}
