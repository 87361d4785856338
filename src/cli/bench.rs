//! `partsift bench`: the network's speed and memory on this machine (see `partsift::bench`).
//!
//! Training runs in a fresh child process of this same program (`--stage train`), so that its
//! peak memory is that of training alone: the network, one batch of prepared clouds, the
//! optimiser and a training step's caches. Answering and the matrix-product peak run in
//! the parent afterwards.

use std::process::Command;

use clap::{Args, ValueEnum};
use serde_json::{json, Value};

use partsift::bench::{
    load_average, measure_answering, measure_peak, measure_training, BenchSettings,
};
use partsift::net::Preset;

use super::Outcome;

/// Matrix size of the peak measurement (as the PyTorch reference's `peak`).
const PEAK_SIZE: usize = 2048;
const PEAK_RUNS: usize = 20;

#[derive(Args, Clone)]
pub(crate) struct BenchArgs {
    /// Network size: `quick` or `full`.
    #[arg(long, default_value = "quick", value_parser = clap::value_parser!(Preset))]
    preset: Preset,
    /// Samples per training step and per inference call.
    #[arg(long, default_value_t = 32)]
    batch: usize,
    /// Threads (default: every core).
    #[arg(long)]
    threads: Option<usize>,
    /// Timed training steps (default: 20 for quick, 8 for full).
    #[arg(long)]
    steps: Option<usize>,
    /// Timed batch-1 forward passes for the one-scan latency.
    #[arg(long, default_value_t = 50)]
    latency_runs: usize,
    /// Measure the plain layers (the test oracle) instead of the fast path.
    #[arg(long)]
    plain_layers: bool,
    /// One JSON object on the last line of standard output.
    #[arg(long)]
    json: bool,
    /// Run one part only and print its figures as JSON (how the parent runs training in a
    /// fresh process; `answer` alone is for profiling).
    #[arg(long, value_enum, hide = true)]
    stage: Option<Stage>,
}

#[derive(Clone, Copy, Debug, PartialEq, Eq, ValueEnum)]
enum Stage {
    Train,
    Answer,
}

impl BenchArgs {
    fn settings(&self) -> BenchSettings {
        let mut s = BenchSettings::new(self.preset, self.batch);
        if let Some(steps) = self.steps {
            s.train_steps = steps.max(1);
        }
        s.latency_runs = self.latency_runs.max(1);
        s.plain_layers = self.plain_layers;
        s
    }
}

pub(crate) fn bench(args: BenchArgs) -> Outcome {
    if args.batch < 2 {
        return Outcome::Usage(format!(
            "--batch must be at least 2 (batch norm needs two samples), got {}",
            args.batch
        ));
    }
    let threads = args.threads.unwrap_or_else(|| {
        std::thread::available_parallelism().map_or(1, std::num::NonZeroUsize::get)
    });
    if threads == 0 {
        return Outcome::Usage("--threads must be at least 1".into());
    }
    let pool = match rayon::ThreadPoolBuilder::new().num_threads(threads).build() {
        Ok(pool) => pool,
        Err(e) => return Outcome::Usage(format!("cannot start {threads} threads: {e}")),
    };
    pool.install(|| match args.stage {
        Some(Stage::Train) => match measure_training(&args.settings()) {
            Ok(figures) => {
                println!("{}", json!(figures));
                Outcome::Ok
            }
            Err(e) => failed(&e.to_string()),
        },
        Some(Stage::Answer) => match measure_answering(&args.settings()) {
            Ok(figures) => {
                println!("{}", json!(figures));
                Outcome::Ok
            }
            Err(e) => failed(&e.to_string()),
        },
        None => whole(&args, threads),
    })
}

fn failed(message: &str) -> Outcome {
    eprintln!("partsift bench: {message}");
    Outcome::SomeFailed
}

/// Training in a child process, then answering and the peak here.
fn whole(args: &BenchArgs, threads: usize) -> Outcome {
    let load_start = load_average();
    if !args.json {
        println!(
            "partsift bench: preset {}, batch {}, {threads} thread(s){}; training in a fresh process...",
            args.preset,
            args.batch,
            if args.plain_layers { ", plain layers" } else { "" }
        );
    }
    let train = match train_in_child(args, threads) {
        Ok(v) => v,
        Err(e) => return failed(&e),
    };
    let settings = args.settings();
    let answer = match measure_answering(&settings) {
        Ok(a) => a,
        Err(e) => return failed(&e.to_string()),
    };
    let peak = measure_peak(PEAK_SIZE, PEAK_RUNS);
    let load_end = load_average();
    let date = std::time::SystemTime::now()
        .duration_since(std::time::UNIX_EPOCH)
        .map_or(0, |d| d.as_secs());
    let report = json!({
        "preset": args.preset.name(),
        "batch": args.batch,
        "threads": threads,
        "plain_layers": args.plain_layers,
        "train_samples_per_s": train["train_samples_per_s"],
        "infer_samples_per_s": answer.infer_samples_per_s,
        "latency_ms": answer.latency_ms,
        "peak_rss_mb": train["peak_rss_mb"],
        "gemm_gflops": peak.gemm_gflops_best,
        "achieved_gflops": train["achieved_gflops"],
        "train": train,
        "answer": answer,
        "peak": peak,
        "load_average_start": load_start,
        "load_average_end": load_end,
        "unix_time": date,
    });
    if args.json {
        println!("{report}");
    } else {
        print_summary(&report);
    }
    Outcome::Ok
}

/// Runs `partsift bench --stage train` with the same settings and reads its JSON line.
fn train_in_child(args: &BenchArgs, threads: usize) -> Result<Value, String> {
    let exe = std::env::current_exe().map_err(|e| format!("cannot find this program: {e}"))?;
    let mut cmd = Command::new(exe);
    cmd.args(["bench", "--stage", "train", "--preset", args.preset.name()])
        .args(["--batch", &args.batch.to_string()])
        .args(["--threads", &threads.to_string()]);
    if let Some(steps) = args.steps {
        cmd.args(["--steps", &steps.to_string()]);
    }
    if args.plain_layers {
        cmd.arg("--plain-layers");
    }
    let out = cmd
        .output()
        .map_err(|e| format!("cannot run the training child: {e}"))?;
    let stdout = String::from_utf8_lossy(&out.stdout);
    if !out.status.success() {
        return Err(format!(
            "the training child failed ({}): {}",
            out.status,
            String::from_utf8_lossy(&out.stderr).trim()
        ));
    }
    let last = stdout.lines().last().unwrap_or_default();
    serde_json::from_str(last).map_err(|e| format!("the training child's output ({last:?}): {e}"))
}

fn print_summary(r: &Value) {
    let f = |v: &Value| v.as_f64().unwrap_or(f64::NAN);
    let a = &r["answer"];
    println!(
        "training:   {:.1} samples/s (median step {:.0} ms), peak memory {:.0} MB (fresh process)",
        f(&r["train_samples_per_s"]),
        f(&r["train"]["train_step_ms_median"]),
        f(&r["peak_rss_mb"]),
    );
    println!("inference:  {:.1} samples/s", f(&r["infer_samples_per_s"]));
    println!(
        "one scan:   network {:.2} ms (median; p90 {:.2}); load + clean-up + network of a {}-point scan {:.1} ms (load {:.1}, clean-up {:.1}, network {:.1})",
        f(&r["latency_ms"]),
        f(&a["latency_ms_p90"]),
        a["scan_points"],
        f(&a["scan_total_ms"]),
        f(&a["scan_load_ms"]),
        f(&a["scan_clean_ms"]),
        f(&a["scan_forward_ms"]),
    );
    println!(
        "products:   {:.0} GFLOP/s in training's dense products; machine peak {:.0} GFLOP/s (gemm crate, {} threads), ndarray on one thread {:.0}",
        f(&r["achieved_gflops"]),
        f(&r["gemm_gflops"]),
        r["threads"],
        f(&r["peak"]["ndarray_gflops_one_thread"]),
    );
    if let Some(sites) = r["train"]["products"].as_array() {
        for s in sites {
            println!(
                "            {:<18} {:>7.2} GFLOP a step at {:>5.0} GFLOP/s",
                s["site"].as_str().unwrap_or("?"),
                f(&s["gflop_per_step"]),
                f(&s["gflops"])
            );
        }
    }
    println!(
        "load average {} at the start, {} at the end",
        r["load_average_start"], r["load_average_end"]
    );
}
