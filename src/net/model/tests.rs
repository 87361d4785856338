//! Whole networks: gradients of every tensor by finite differences, eval-mode saliency,
//! determinism, and a toy problem that training must learn.

use super::*;
use crate::net::fast::Kernels;
use crate::net::gradcheck::{check_gradient, random_batch, Tolerance};
use crate::net::layers::edge_conv::nearest_neighbours;
use crate::net::optim::{Optimizer, OptimizerKind};

/// Tiny widths, 32 points, 4 neighbours: small enough to difference every tensor.
pub(crate) fn tiny(arch: Arch) -> Dims {
    Dims {
        points: 32,
        k: 4,
        trunk: match arch {
            Arch::PointNet => vec![4, 4, 4, 6],
            _ => vec![4, 4, 6, 8],
        },
        embed: 12,
        head: [10, 8],
        size: 4,
        dropout: 0.5,
    }
}

pub(crate) fn tiny_network(arch: Arch, size_aware: bool, seed: u64) -> Network {
    let config = NetConfig {
        arch,
        preset: Preset::Quick,
        classes: 3,
        size_aware,
    };
    Network::with_dims(config, tiny(arch), seed)
}

/// Clouds with some structure (points on noisy ellipsoids of clearly different shapes and
/// places) rather than pure noise, so that the neighbour graphs look like those of real parts.
/// Clouds alike would leave the head's batch norm, over a handful of samples, dividing by a
/// tiny spread: a loss so steep and curved that no finite difference could follow it.
pub(crate) fn clouds(rng: &mut Rng, samples: usize, n: usize) -> Batch {
    let mut data = Vec::with_capacity(samples * n * 3);
    for _ in 0..samples {
        let axes = [
            rng.range(0.2, 1.2),
            rng.range(0.2, 1.2),
            rng.range(0.2, 1.2),
        ];
        let centre = [0.3 * rng.normal(), 0.3 * rng.normal(), 0.3 * rng.normal()];
        for _ in 0..n {
            let v = [rng.normal(), rng.normal(), rng.normal()];
            let r = (v[0] * v[0] + v[1] * v[1] + v[2] * v[2]).sqrt().max(1e-9);
            for t in 0..3 {
                data.push((centre[t] + v[t] / r * axes[t] + 0.05 * rng.normal()) as f32);
            }
        }
    }
    Batch::from_vec(data, samples, n, 3)
}

/// Whole networks pass a dozen layers of f32 rounding: the loss (order 1) carries noise of
/// a few 1e-8, which the step 1e-3 turns into about 5e-5 in a difference (seen when scanning
/// steps from 1e-2 down to 1e-4: the differences settle at 1e-3 and scatter by that much
/// below). A small step also makes kinks inside the window rarer. Allow 2e-4 + 2e-2 relative.
const NETWORK: Tolerance = Tolerance {
    step: 1e-3,
    abs: 2e-4,
    rel: 2e-2,
    max_checked: 12,
};

/// The training-mode loss with `params` in place of the network's (fixed dropout masks).
fn train_loss(
    net: &Network,
    params: &[f32],
    points: &Batch,
    size: &Batch,
    labels: &[usize],
    masks: &DropoutMasks,
) -> f64 {
    let mut running = net.running.values.clone();
    let mut pass = Pass {
        params,
        running: Running::Update(&mut running),
    };
    let (logits, _) = net
        .model
        .forward(&mut pass, points.clone(), size, Some(masks.clone()));
    smoothed_cross_entropy_f64(&logits.data, labels, net.model.head.classes(), 0.2)
}

/// The smoothed cross-entropy in f64 from f32 logits: the f32 loss itself is quantised at
/// 1.2e-7 (its last bit), which a difference with step 1e-3 would turn into 6e-5 of noise.
fn smoothed_cross_entropy_f64(
    logits: &[f32],
    labels: &[usize],
    classes: usize,
    smoothing: f64,
) -> f64 {
    let mut total = 0.0;
    for (row, &label) in logits.chunks_exact(classes).zip(labels) {
        let max = row.iter().fold(f64::NEG_INFINITY, |m, &v| m.max(v as f64));
        let log_sum = row
            .iter()
            .map(|&v| (v as f64 - max).exp())
            .sum::<f64>()
            .ln();
        for (c, &v) in row.iter().enumerate() {
            let target =
                smoothing / classes as f64 + if c == label { 1.0 - smoothing } else { 0.0 };
            total -= target * (v as f64 - max - log_sum);
        }
    }
    total / labels.len() as f64
}

fn check_whole_network(arch: Arch) {
    let mut rng = Rng::new(40 + arch as u64);
    let mut net = tiny_network(arch, true, 7);
    let points = clouds(&mut rng, 3, 32);
    let size = random_batch(&mut rng, 1, 3, 4, 1.0);
    let labels = [0, 2, 1];
    let masks = net.model.head.draw_masks(3, &mut rng);
    net.train_step(points.clone(), &size, &labels, 0.2, masks.clone());
    let grads = net.grads.clone();
    assert!(grads.iter().any(|&g| g != 0.0));
    let (mut checked, mut skipped) = (0, 0);
    for entry in net.params.entries.clone() {
        let mut params = net.params.values.clone();
        let slot = entry.slot;
        let analytic = slot.of(&grads).to_vec();
        let mut values = slot.of(&params).to_vec();
        let (c, s) = check_gradient(
            &entry.name,
            &mut values,
            &analytic,
            NETWORK,
            &mut rng,
            |v| {
                slot.of_mut(&mut params).copy_from_slice(v);
                train_loss(&net, &params, &points, &size, &labels, &masks)
            },
        );
        checked += c;
        skipped += s;
    }
    // Kinks are many in a tiny network (every LeakyReLU input near 0, every near-tie of a
    // maximum); EdgeConv also rebuilds its graphs from the features, so any parameter
    // upstream of a layer can swap a neighbour within the step (a jump): it skips more
    // (its first layers' parameters mostly; the layer check and the PyTorch fixture cover them).
    let share = if arch == Arch::EdgeConv { 3 } else { 5 };
    assert!(
        skipped * share <= checked && checked - skipped >= 150,
        "{arch}: {skipped} of {checked} skipped"
    );

    // The input gradient in evaluation mode, through saliency: d logit / d points.
    // Running statistics away from their start, as after some training.
    for (i, v) in net.running.values.iter_mut().enumerate() {
        *v = if i % 2 == 0 { 0.1 } else { 1.3 };
    }
    let one = Batch::from_vec(points.sample(1).to_vec(), 1, 32, 3);
    let size_one = Batch::from_vec(size.data[4..8].to_vec(), 1, 1, 4);
    let class = 2;
    let saliency = net.input_saliency(&one.data, &size_one.data, class);
    let mut values = one.data.clone();
    let every = Tolerance {
        max_checked: usize::MAX,
        ..NETWORK
    };
    let (c, s) = check_gradient("points", &mut values, &saliency, every, &mut rng, |p| {
        net.infer(p, &size_one.data)[class] as f64
    });
    // Moving a point moves the graphs of every EdgeConv layer: about half the coordinates
    // of a 32-point cloud see a neighbour change within the step.
    let share = if arch == Arch::EdgeConv { 2 } else { 5 };
    assert!(
        s * share <= c && c - s >= 40,
        "{arch} saliency: {s} of {c} skipped"
    );
}

#[test]
fn edgeconv_gradients_match_finite_differences() {
    check_whole_network(Arch::EdgeConv);
}

#[test]
fn pointnet_gradients_match_finite_differences() {
    check_whole_network(Arch::PointNet);
}

#[test]
fn gcn_gradients_match_finite_differences() {
    check_whole_network(Arch::Gcn);
}

#[test]
fn same_seed_same_network_and_same_step_on_any_thread_count() {
    let run = |threads: usize| {
        let pool = rayon::ThreadPoolBuilder::new()
            .num_threads(threads)
            .build()
            .expect("pool");
        pool.install(|| {
            let mut rng = Rng::new(3);
            let mut net = tiny_network(Arch::EdgeConv, true, 11);
            let points = clouds(&mut rng, 4, 32);
            let size = random_batch(&mut rng, 1, 4, 4, 1.0);
            let out = net.train_batch(&points.data, &size.data, &[0, 1, 2, 1], 0.2, &mut rng);
            (out, net.grads.clone(), net.running.values.clone())
        })
    };
    let one = run(1);
    assert_eq!(one, run(1), "same seed, same thread count");
    assert_eq!(one, run(2), "reductions do not depend on the thread count");
}

#[test]
fn infer_in_chunks_and_embed_agree_with_one_pass() {
    let mut rng = Rng::new(5);
    let net = tiny_network(Arch::Gcn, true, 2);
    let samples = INFER_CHUNK + 3;
    let points = clouds(&mut rng, samples, 32);
    let size = random_batch(&mut rng, 1, samples, 4, 1.0);
    let logits = net.infer(&points.data, &size.data);
    assert_eq!(logits.len(), samples * 3);
    // Evaluation mode treats every sample alone.
    let last = samples - 1;
    let alone = net.infer(points.sample(last), &size.data[last * 4..]);
    for (a, b) in alone.iter().zip(&logits[last * 3..]) {
        assert!((a - b).abs() <= 1e-5 * (1.0 + b.abs()), "{a} vs {b}");
    }
    let embedding = net.embed(&points.data, &size.data);
    assert_eq!(embedding.len(), samples * net.embedding_width());
    assert_eq!(net.embedding_width(), 2 * 12 + 4);
}

#[test]
fn names_and_presets() {
    for arch in Arch::ALL {
        assert_eq!(arch.name().parse::<Arch>(), Ok(arch));
        assert_eq!(
            serde_json::to_string(&arch).expect("json"),
            format!("\"{arch}\"")
        );
    }
    assert_eq!("FULL".parse::<Preset>(), Ok(Preset::Full));
    let err = "huge".parse::<Preset>().expect_err("not a preset");
    assert_eq!(
        err.to_string(),
        "unknown preset 'huge' (choose one of: quick, full)"
    );
    assert_eq!((Preset::Full.points(), Preset::Full.k()), (1024, 20));
    assert_eq!((Preset::Quick.points(), Preset::Quick.k()), (512, 16));
    // The paper's classifier (Wang et al. 2019, fig. 3): 4 EdgeConv layers 64, 64, 128, 256,
    // embedding 1024 pooled by max and mean, head 512, 256.
    let full = Network::new(
        NetConfig {
            arch: Arch::EdgeConv,
            preset: Preset::Full,
            classes: 40,
            size_aware: false,
        },
        0,
    );
    assert_eq!(full.embedding_width(), 2048);
    // Parameters counted by hand: EdgeConv 6*64 + 128*64 + 128*128 + 256*256, embedding
    // 512*1024, head 2048*512 + 512*256 + 256 + 256*40 + 40, batch norms 2 * (64 + 64 + 128
    // + 256 + 1024 + 512 + 256).
    let want = 6 * 64
        + 128 * 64
        + 128 * 128
        + 256 * 256
        + 512 * 1024
        + 2048 * 512
        + 512 * 256
        + 256
        + 256 * 40
        + 40
        + 2 * (64 + 64 + 128 + 256 + 1024 + 512 + 256);
    assert_eq!(full.parameter_count(), want);
}

/// Two classes told apart by the shape alone (a flat disc or a long rod): a few steps of
/// training must bring the loss well down and the network must then sort held-out clouds.
/// Not the only check of training (the gradients are checked above).
#[test]
fn training_learns_a_toy_problem() {
    let mut rng = Rng::new(17);
    let mut net = tiny_network(Arch::EdgeConv, false, 4);
    let mut opt = Optimizer::new(OptimizerKind::Adam, &net);
    let make = |rng: &mut Rng, samples: usize| {
        let mut points = Vec::new();
        let mut labels = Vec::new();
        for s in 0..samples {
            let label = s % 2;
            let axes: [f64; 3] = if label == 0 {
                [1.0, 1.0, 0.1]
            } else {
                [0.15, 0.15, 1.0]
            };
            for _ in 0..32 {
                for a in axes {
                    points.push((rng.range(-1.0, 1.0) * a) as f32);
                }
            }
            labels.push(label);
        }
        (points, vec![0.0f32; samples * 4], labels)
    };
    let mut first = None;
    let mut last = 0.0;
    for step in 0..40 {
        let (points, size, labels) = make(&mut rng, 8);
        let out = net.train_batch(&points, &size, &labels, 0.0, &mut rng);
        opt.step(&mut net, 0.01);
        first.get_or_insert(out.loss);
        if step >= 35 {
            last += out.loss / 5.0;
        }
    }
    let first = first.expect("trained");
    assert!(last < 0.5 * first, "loss {first} -> {last}");
    let (points, size, labels) = make(&mut rng, 20);
    let logits = net.infer(&points, &size);
    let right = labels
        .iter()
        .enumerate()
        .filter(|&(s, &l)| {
            let row = &logits[s * 3..s * 3 + 3];
            let best = (0..3)
                .max_by(|&a, &b| row[a].total_cmp(&row[b]))
                .expect("classes");
            best == l
        })
        .count();
    assert!(right >= 18, "{right} of 20 held-out clouds sorted right");
}

/// Reads the PyTorch fixture made by `tests/reference/make_edgeconv_fixture.py`.
pub(crate) fn reference_fixture() -> serde_json::Value {
    let path = concat!(
        env!("CARGO_MANIFEST_DIR"),
        "/tests/reference/edgeconv_fixture.json"
    );
    let text = std::fs::read_to_string(path).expect("the committed fixture");
    serde_json::from_str(&text).expect("fixture JSON")
}

pub(crate) fn floats(v: &serde_json::Value) -> Vec<f32> {
    v.as_array()
        .expect("an array")
        .iter()
        .map(|x| x.as_f64().expect("a number") as f32)
        .collect()
}

/// `|got - want| <= rel * (|want| + max |want|) + 1e-7` element-wise: relative to the element
/// and to the tensor's scale, since small elements of a sum carry the rounding of its large
/// ones; the floor is for values that are 0 in exact arithmetic (the gradient of a bias just
/// before batch norm), which both sides round to about 1e-8.
pub(crate) fn assert_close(label: &str, got: &[f32], want: &[f32], rel: f32) {
    assert_eq!(got.len(), want.len(), "{label}: length");
    let scale = want.iter().fold(0.0f32, |m, v| m.max(v.abs()));
    for (i, (g, w)) in got.iter().zip(want).enumerate() {
        assert!(
            (g - w).abs() <= rel * (w.abs() + scale) + 1e-7,
            "{label}[{i}]: {g} vs PyTorch {w} (scale {scale})"
        );
    }
}

/// One small EdgeConv network (size-aware head) against PyTorch autograd on the same weights,
/// input and dropout masks (torch 2.15.0; see the script): evaluation-mode logits and input
/// saliency, then a training step's logits, loss, every parameter gradient and the updated
/// running statistics. The two sides sum in different orders in f32, so they agree to about
/// 1e-6 relative; we hold them to 1e-4.
#[test]
fn matches_pytorch_autograd_on_the_reference_fixture() {
    let fx = reference_fixture();
    let dims = &fx["dims"];
    let tiny = tiny(Arch::EdgeConv);
    assert_eq!(dims["points"].as_u64(), Some(tiny.points as u64));
    assert_eq!(dims["k"].as_u64(), Some(tiny.k as u64));
    assert_eq!(
        floats(&dims["trunk"]),
        tiny.trunk.iter().map(|&w| w as f32).collect::<Vec<_>>()
    );
    assert_eq!(dims["embed"].as_u64(), Some(tiny.embed as u64));
    assert_eq!(
        floats(&dims["head"]),
        tiny.head.iter().map(|&w| w as f32).collect::<Vec<_>>()
    );
    assert_eq!(dims["size"].as_u64(), Some(tiny.size as u64));

    let mut net = tiny_network(Arch::EdgeConv, true, 0);
    for (store, key) in [(&mut net.params, "params"), (&mut net.running, "running")] {
        let given = fx[key].as_object().expect("tensors");
        assert_eq!(
            given.len(),
            store.entries.len(),
            "{key}: same tensors on both sides"
        );
        for entry in &store.entries {
            let values = floats(&given[&entry.name]);
            entry
                .slot
                .of_mut(&mut store.values)
                .copy_from_slice(&values);
        }
    }
    let points = floats(&fx["points"]);
    let size = floats(&fx["size"]);
    let labels: Vec<usize> = fx["labels"]
        .as_array()
        .expect("labels")
        .iter()
        .map(|l| l.as_u64().expect("label") as usize)
        .collect();
    let n = tiny.points;

    // The first layer's graph, in xyz space, must be PyTorch's exactly.
    let first = nearest_neighbours(&Batch::from_vec(points.clone(), 3, n, 3), tiny.k);
    let want: Vec<u32> = floats(&fx["neighbours"][0])
        .iter()
        .map(|&i| i as u32)
        .collect();
    assert_eq!(first, want, "first-layer neighbours");

    // Both paths: the fast one (the default) and the plain layers (the test oracle).
    for kernels in [Kernels::Fast, Kernels::Plain] {
        let mut net = net.clone();
        net.model.kernels = kernels;
        let eval = &fx["eval"];
        assert_close(
            "eval logits",
            &net.infer(&points, &size),
            &floats(&eval["logits"]),
            1e-4,
        );
        let s = eval["saliency_sample"].as_u64().expect("sample") as usize;
        let class = eval["saliency_class"].as_u64().expect("class") as usize;
        let saliency = net.input_saliency(
            &points[s * n * 3..(s + 1) * n * 3],
            &size[s * 4..(s + 1) * 4],
            class,
        );
        assert_close("saliency", &saliency, &floats(&eval["saliency"]), 1e-4);

        let masks = [floats(&fx["masks"][0]), floats(&fx["masks"][1])];
        let train = &fx["train"];
        let out = net.train_step(
            Batch::from_vec(points.clone(), 3, n, 3),
            &Batch::from_vec(size.clone(), 1, 3, 4),
            &labels,
            fx["smoothing"].as_f64().expect("smoothing") as f32,
            masks,
        );
        assert_close("train logits", &out.logits, &floats(&train["logits"]), 1e-4);
        assert_close(
            "loss",
            &[out.loss],
            &[train["loss"].as_f64().expect("loss") as f32],
            1e-5,
        );
        for entry in &net.params.entries {
            let want = floats(&train["grads"][&entry.name]);
            assert_close(
                &format!("grad {}", entry.name),
                entry.slot.of(&net.grads),
                &want,
                1e-4,
            );
        }
        for entry in &net.running.entries {
            let want = floats(&train["running_after"][&entry.name]);
            assert_close(&entry.name, entry.slot.of(&net.running.values), &want, 1e-5);
        }
    }
}
