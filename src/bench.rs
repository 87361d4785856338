//! Measurements of the network's speed and memory, for `partsift bench` and `cargo bench`:
//! training and inference throughput, one-scan latency (the network alone, and loading,
//! clean-up and network for a raw generated scan), the matrix products' rate against the
//! machine's matrix-product peak measured in the same run, and the process's peak memory.
//!
//! Offers [`BenchSettings`], [`measure_training`], [`measure_answering`], [`measure_peak`],
//! [`peak_rss_mb`] and [`load_average`]. Every figure is a median of repeated runs after
//! warm-up runs; the caller picks the rayon pool (threads) they run on. Speed is measured in
//! benchmarks, never asserted in tests.

use std::path::PathBuf;
use std::time::Instant;

use serde::Serialize;

use crate::learn::views::mirror_averaged_scores;
use crate::net::fast::gemm::{self, MatMut, MatRef, Site, Threads};
use crate::net::fast::simd;
use crate::net::{Arch, NetConfig, Network, Optimizer, OptimizerKind, Preset};
use crate::prep::{PrepError, RecipeError, RecipeSettings};
use crate::scan::write::{write_ply, PlyEncoding};
use crate::scan::{load, LoadOptions, ScanError};
use crate::synth::{generate_scan, PartType, SensorSettings, SynthError};

/// What to measure, and how often.
#[derive(Clone, Debug)]
pub struct BenchSettings {
    pub preset: Preset,
    /// Samples per training step and per inference call, at least 2.
    pub batch: usize,
    /// Part types of the network (40 as in the PyTorch reference's benchmark).
    pub classes: usize,
    /// Untimed runs before each timed series.
    pub warmup: usize,
    pub train_steps: usize,
    pub infer_runs: usize,
    /// Batch-1 forward passes for the network's one-scan latency.
    pub latency_runs: usize,
    /// Load + clean-up + forward runs of one raw scan.
    pub scan_runs: usize,
    /// Run the plain layers (the test oracle) instead of the fast path, for comparison.
    pub plain_layers: bool,
    pub seed: u64,
}

impl BenchSettings {
    /// Settings for `preset` at `batch` with the default counts (a few minutes for `full`).
    pub fn new(preset: Preset, batch: usize) -> BenchSettings {
        BenchSettings {
            preset,
            batch,
            classes: 40,
            warmup: 2,
            train_steps: match preset {
                Preset::Quick => 20,
                Preset::Full => 8,
            },
            infer_runs: 10,
            latency_runs: 50,
            scan_runs: 15,
            plain_layers: false,
            seed: 1,
        }
    }
}

/// Why a measurement could not run.
#[derive(Debug, thiserror::Error)]
pub enum BenchError {
    #[error("batch must be at least 2 (batch norm needs two samples), got {0}")]
    Batch(usize),
    #[error("could not generate a practice scan: {0}")]
    Synth(#[from] SynthError),
    #[error("the clean-up recipe for the preset: {0}")]
    Recipe(#[from] RecipeError),
    #[error("could not clean up a practice scan: {0}")]
    Prep(#[from] PrepError),
    #[error("could not read back the practice scan: {0}")]
    Scan(#[from] ScanError),
    #[error("could not write the practice scan {}: {source}", path.display())]
    Write {
        path: PathBuf,
        #[source]
        source: std::io::Error,
    },
}

/// Work and rate of the matrix products at one place of the network.
#[derive(Clone, Debug, Serialize)]
pub struct ProductFigures {
    pub site: &'static str,
    /// Floating-point operations per training step (`2 m n k` a product), GFLOP.
    pub gflop_per_step: f64,
    /// Their rate on all threads, GFLOP/s (time inside the products times threads).
    pub gflops: f64,
}

/// Training throughput, as a training command would run it: forward, backward, SGD step.
#[derive(Clone, Debug, Serialize)]
pub struct TrainFigures {
    pub train_samples_per_s: f64,
    pub train_step_ms_median: f64,
    pub train_step_ms: Vec<f64>,
    /// The rate of all dense products (the k-NN distances included) over the time spent in
    /// them, GFLOP/s on all threads.
    pub achieved_gflops: f64,
    /// The same, per kind of product.
    pub products: Vec<ProductFigures>,
    /// Share of a training step spent inside dense products.
    pub product_time_share: f64,
    /// Peak resident memory of this process so far (VmHWM), MB; `None` where /proc is absent.
    pub peak_rss_mb: Option<f64>,
}

/// Answering: batched inference, and one scan at a time.
#[derive(Clone, Debug, Serialize)]
pub struct AnswerFigures {
    pub infer_samples_per_s: f64,
    /// The network's forward pass on one prepared cloud (median), ms.
    pub latency_ms: f64,
    pub latency_ms_p90: f64,
    pub latency_ms_min: f64,
    /// A raw generated scan of about this many points, as a PLY file:
    pub scan_points: usize,
    /// reading the file (median), ms,
    pub scan_load_ms: f64,
    /// the clean-up recipe,
    pub scan_clean_ms: f64,
    /// the network,
    pub scan_forward_ms: f64,
    /// and all three together (median of the sums), ms.
    pub scan_total_ms: f64,
}

/// The machine's matrix-product peak: a square f32 product on all threads of the pool.
#[derive(Clone, Debug, Serialize)]
pub struct PeakFigures {
    pub size: usize,
    /// With the `gemm` crate (the fast path's), best and median of the runs, GFLOP/s.
    pub gemm_gflops_best: f64,
    pub gemm_gflops_median: f64,
    /// With ndarray's default backend (matrixmultiply; the plain layers'), on one thread:
    /// ndarray does not split a product between threads.
    pub ndarray_gflops_one_thread: f64,
    /// The vector units the fast path's own passes run on.
    pub vector_level: String,
}

fn median(values: &[f64]) -> f64 {
    let mut v = values.to_vec();
    v.sort_by(f64::total_cmp);
    v[v.len() / 2]
}

fn quantile(values: &[f64], q: f64) -> f64 {
    let mut v = values.to_vec();
    v.sort_by(f64::total_cmp);
    v[((v.len() - 1) as f64 * q).round() as usize]
}

/// Times `run` `runs` times after `warmup` untimed runs; milliseconds.
fn time_runs(warmup: usize, runs: usize, mut run: impl FnMut()) -> Vec<f64> {
    for _ in 0..warmup {
        run();
    }
    (0..runs.max(1))
        .map(|_| {
            let t = Instant::now();
            run();
            t.elapsed().as_secs_f64() * 1e3
        })
        .collect()
}

fn network(settings: &BenchSettings) -> Network {
    let mut net = Network::new(
        NetConfig {
            arch: Arch::EdgeConv,
            preset: settings.preset,
            classes: settings.classes,
            size_aware: true,
        },
        settings.seed,
    );
    if settings.plain_layers {
        net.model.kernels = crate::net::fast::Kernels::Plain;
    }
    net
}

/// Sensor settings of the practice scans: full resolution, about 30k to 60k points.
fn sensor() -> SensorSettings {
    SensorSettings::default()
}

fn recipe_settings(preset: Preset) -> RecipeSettings {
    RecipeSettings {
        points: preset.points(),
        ..RecipeSettings::default()
    }
}

/// `count` prepared clouds (`N x 3` each, flat) and their size values (4 each), from
/// generated scans of the part types in turn.
fn prepared_batch(
    settings: &BenchSettings,
    count: usize,
) -> Result<(Vec<f32>, Vec<f32>), BenchError> {
    let recipe = recipe_settings(settings.preset).check()?;
    // Eight distinct scans are enough: the cost of a step does not depend on what is in it.
    let distinct = count.min(8);
    let mut clouds = Vec::with_capacity(distinct);
    for i in 0..distinct {
        let part = PartType::ALL[i % PartType::ALL.len()];
        let scan = generate_scan(part, settings.seed + i as u64, &sensor())?;
        clouds.push(recipe.run(&scan)?);
    }
    let mut points = Vec::with_capacity(count * settings.preset.points() * 3);
    let mut size = Vec::with_capacity(count * 4);
    for s in 0..count {
        let p = &clouds[s % distinct];
        points.extend(p.points.iter().flatten());
        size.extend(p.size.log_features());
    }
    Ok((points, size))
}

/// Training throughput at `settings.batch` on the current rayon pool: `warmup` steps, then
/// `train_steps` timed ones (forward, backward and SGD step, the paper's optimiser).
///
/// Errors: a batch below 2, or practice data that could not be made.
pub fn measure_training(settings: &BenchSettings) -> Result<TrainFigures, BenchError> {
    if settings.batch < 2 {
        return Err(BenchError::Batch(settings.batch));
    }
    let (points, size) = prepared_batch(settings, settings.batch)?;
    let labels: Vec<usize> = (0..settings.batch).map(|s| s % settings.classes).collect();
    let mut net = network(settings);
    let mut opt = Optimizer::new(OptimizerKind::Sgd, &net);
    let mut rng = crate::rng::Rng::new(settings.seed);
    let mut step = || {
        net.train_batch(&points, &size, &labels, 0.2, &mut rng);
        opt.step(&mut net, OptimizerKind::Sgd.base_lr());
    };
    for _ in 0..settings.warmup {
        step();
    }
    gemm::start_tally(true);
    let times = time_runs(0, settings.train_steps, &mut step);
    let total_ms: f64 = times.iter().sum();
    let threads = rayon::current_num_threads() as f64;
    let sites = [
        (Site::Knn, "knn distances"),
        (Site::Forward, "forward"),
        (Site::WeightGrad, "weight gradients"),
        (Site::InputGrad, "input gradients"),
    ];
    let steps = times.len() as f64;
    let (mut flops, mut thread_ns) = (0u64, 0u64);
    let products = sites
        .iter()
        .map(|&(site, name)| {
            let t = gemm::tally(site);
            flops += t.flops;
            thread_ns += t.thread_ns;
            ProductFigures {
                site: name,
                gflop_per_step: t.flops as f64 / steps / 1e9,
                gflops: t.gflops_per_thread() * threads,
            }
        })
        .collect();
    gemm::start_tally(false);
    let step_ms = median(&times);
    Ok(TrainFigures {
        train_samples_per_s: settings.batch as f64 / step_ms * 1e3,
        train_step_ms_median: step_ms,
        train_step_ms: times,
        achieved_gflops: if thread_ns == 0 {
            0.0
        } else {
            flops as f64 / thread_ns as f64 * threads
        },
        products,
        product_time_share: thread_ns as f64 / threads / (total_ms * 1e6),
        peak_rss_mb: peak_rss_mb(),
    })
}

/// Inference throughput at `settings.batch`, the network's one-scan latency, and the whole
/// verdict path for one raw generated scan written to a temporary PLY file (removed after).
///
/// Errors: practice data that could not be made, written or read back.
pub fn measure_answering(settings: &BenchSettings) -> Result<AnswerFigures, BenchError> {
    let (points, size) = prepared_batch(settings, settings.batch.max(1))?;
    let net = network(settings);
    let n3 = net.points() * 3;
    let infer = time_runs(settings.warmup, settings.infer_runs, || {
        std::hint::black_box(net.infer(&points, &size));
    });
    let latency = time_runs(settings.warmup.max(3), settings.latency_runs, || {
        std::hint::black_box(net.infer(&points[..n3], &size[..4]));
    });

    let scan = generate_scan(PartType::SpurGear, settings.seed, &sensor())?;
    let path = std::env::temp_dir().join(format!("partsift-bench-{}.ply", std::process::id()));
    write_ply(&path, &scan, PlyEncoding::BinaryLe).map_err(|source| BenchError::Write {
        path: path.clone(),
        source,
    })?;
    let recipe = recipe_settings(settings.preset).check()?;
    let mut parts = [Vec::new(), Vec::new(), Vec::new()];
    let mut failure = None;
    let runs = settings.warmup + settings.scan_runs.max(1);
    for run in 0..runs {
        let t0 = Instant::now();
        let loaded = match load(&path, &LoadOptions::default()) {
            Ok(s) => s,
            Err(e) => {
                failure = Some(BenchError::from(e));
                break;
            }
        };
        let t1 = Instant::now();
        let prepared = match recipe.run(&loaded.cloud_mm()) {
            Ok(p) => p,
            Err(e) => {
                failure = Some(BenchError::from(e));
                break;
            }
        };
        let t2 = Instant::now();
        let flat: Vec<f32> = prepared.points.iter().flatten().copied().collect();
        std::hint::black_box(mirror_averaged_scores(
            &net,
            &flat,
            &prepared.size.log_features(),
        ));
        let t3 = Instant::now();
        if run >= settings.warmup {
            for (part, (a, b)) in parts.iter_mut().zip([(t0, t1), (t1, t2), (t2, t3)]) {
                part.push((b - a).as_secs_f64() * 1e3);
            }
        }
    }
    // Best effort: a leftover temporary file is harmless.
    let _ = std::fs::remove_file(&path);
    if let Some(e) = failure {
        return Err(e);
    }
    let totals: Vec<f64> = (0..parts[0].len())
        .map(|i| parts.iter().map(|p| p[i]).sum())
        .collect();
    Ok(AnswerFigures {
        infer_samples_per_s: settings.batch.max(1) as f64 / median(&infer) * 1e3,
        latency_ms: median(&latency),
        latency_ms_p90: quantile(&latency, 0.9),
        latency_ms_min: quantile(&latency, 0.0),
        scan_points: scan.len(),
        scan_load_ms: median(&parts[0]),
        scan_clean_ms: median(&parts[1]),
        scan_forward_ms: median(&parts[2]),
        scan_total_ms: median(&totals),
    })
}

/// The matrix-product peak on the current rayon pool: `size x size` by `size x size`, f32,
/// 3 warm-up runs and `runs` timed ones, with the `gemm` crate on all threads and with
/// ndarray's default backend on one.
pub fn measure_peak(size: usize, runs: usize) -> PeakFigures {
    let a: Vec<f32> = (0..size * size)
        .map(|i| ((i % 17) as f32 - 8.0) * 0.1)
        .collect();
    let b: Vec<f32> = (0..size * size)
        .map(|i| ((i % 13) as f32 - 6.0) * 0.1)
        .collect();
    let mut c = vec![0.0f32; size * size];
    let flop = 2.0 * (size as f64).powi(3);
    let gemm_ms = time_runs(3, runs, || {
        gemm::matmul(
            Site::Peak,
            MatMut::new(&mut c, size, size, size),
            MatRef::new(&a, size, size, size),
            MatRef::new(&b, size, size, size),
            false,
            Threads::Pool,
        );
    });
    let av = ndarray::ArrayView2::from_shape((size, size), &a[..]).expect("square");
    let bv = ndarray::ArrayView2::from_shape((size, size), &b[..]).expect("square");
    let mut cv = ndarray::Array2::<f32>::zeros((size, size));
    let ndarray_ms = time_runs(1, runs.div_ceil(4).max(2), || {
        ndarray::linalg::general_mat_mul(1.0, &av, &bv, 0.0, &mut cv);
    });
    let rate = |ms: f64| flop / ms / 1e6;
    PeakFigures {
        size,
        gemm_gflops_best: rate(quantile(&gemm_ms, 0.0)),
        gemm_gflops_median: rate(median(&gemm_ms)),
        ndarray_gflops_one_thread: rate(quantile(&ndarray_ms, 0.0)),
        vector_level: format!("{:?}", simd::level()),
    }
}

/// Peak resident memory of this process (VmHWM in /proc/self/status), MB (10^6 bytes);
/// `None` where it cannot be read (not Linux).
pub fn peak_rss_mb() -> Option<f64> {
    let status = std::fs::read_to_string("/proc/self/status").ok()?;
    let line = status.lines().find(|l| l.starts_with("VmHWM:"))?;
    let kib: f64 = line.split_whitespace().nth(1)?.parse().ok()?;
    Some(kib * 1024.0 / 1e6)
}

/// The 1, 5 and 15 minute load averages (/proc/loadavg); `None` where it cannot be read.
pub fn load_average() -> Option<[f64; 3]> {
    let text = std::fs::read_to_string("/proc/loadavg").ok()?;
    let mut v = text.split_whitespace().map(|f| f.parse::<f64>().ok());
    Some([v.next()??, v.next()??, v.next()??])
}
