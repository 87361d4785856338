//! Clean-up of a raw 100k-point tabletop scan (simulated depth camera, tests/prep_scene),
//! on one core and on all cores: the median of several runs of `Recipe::run`, and of its
//! heaviest pieces alone. `cargo bench --no-default-features --bench prep_clean`.
//!
//! Measured on the 2-core development machine while other builds ran on it (load average
//! 6 to 8), so these are upper bounds: `Recipe::run`, one thread, 37 to 100 ms for the
//! 97k-point scan with a small part and 120 to 180 ms for the 86k-point scan with a
//! 14k-point part. Two threads gained nothing measurable there (98 vs 100 ms, 183 vs
//! 177 ms): only the stray filter runs in parallel; the rest stays sequential.

#[path = "../tests/prep_scene/mod.rs"]
mod prep_scene;

use std::hint::black_box;
use std::time::Instant;

use partsift::graph::spatial::{knn_graph, SpatialIndex};
use partsift::prep::{farthest_point_sample, ransac_plane, voxel_centroids, Recipe};
use partsift::scan::PointCloud;
use prep_scene::{Scene, Shape, Truth};

const RUNS: usize = 11;

fn median_ms(mut run: impl FnMut()) -> f64 {
    run(); // warm up
    let mut times: Vec<f64> = (0..RUNS)
        .map(|_| {
            let t = Instant::now();
            run();
            t.elapsed().as_secs_f64() * 1e3
        })
        .collect();
    times.sort_by(f64::total_cmp);
    times[RUNS / 2]
}

fn measure(threads: usize, cloud: &PointCloud) {
    let pool = rayon::ThreadPoolBuilder::new()
        .num_threads(threads)
        .build()
        .expect("thread pool");
    pool.install(|| {
        let recipe = Recipe::default();
        let p = &cloud.positions;
        let total = median_ms(|| {
            black_box(recipe.run(cloud).expect("clean-up"));
        });
        println!(
            "{threads} thread(s): Recipe::run on {} points: median {total:.1} ms",
            p.len()
        );
        let build = median_ms(|| {
            black_box(SpatialIndex::new(p));
        });
        let index = SpatialIndex::new(p);
        let knn = median_ms(|| {
            for &q in p.iter().step_by(10) {
                black_box(index.knn(q, 17));
            }
        });
        let ransac = median_ms(|| {
            black_box(ransac_plane(p, 1.0, 1000, 1));
        });
        let voxels = median_ms(|| {
            black_box(voxel_centroids(p, 1.5));
        });
        let part = voxel_centroids(&p[..20_000], 1.0);
        let fps = median_ms(|| {
            black_box(farthest_point_sample(&part, 1024, 0));
        });
        let graph = median_ms(|| {
            black_box(knn_graph(&part[..part.len().min(2048)], 20));
        });
        println!("    k-d tree build, {} points: {build:.1} ms", p.len());
        println!("    17-nearest of {} points: {knn:.1} ms", p.len() / 10);
        println!("    RANSAC plane, 1000 candidates + refit: {ransac:.1} ms");
        println!("    voxel centroids of {} points: {voxels:.1} ms", p.len());
        println!(
            "    farthest point sampling {} -> 1024: {fps:.1} ms",
            part.len()
        );
        println!(
            "    knn_graph of {} points, k = 20: {graph:.1} ms",
            part.len().min(2048)
        );
    });
}

fn main() {
    let cores = std::thread::available_parallelism().map_or(1, |n| n.get());
    // A small part on a large table (few part points), then a large part filling a third of
    // the view (tens of thousands of part points: the heavy case for steps 3 to 5).
    let scenes = [
        ("small part", Scene::default()),
        (
            "large part",
            Scene {
                part: Shape::Box {
                    at: [0.0, 0.0],
                    size: [150.0, 110.0, 50.0],
                    yaw_deg: 20.0,
                },
                table_radius: 250.0,
                ..Scene::default()
            },
        ),
    ];
    for (name, scene) in scenes {
        let scan = scene.scan();
        let part = scan.truth.iter().filter(|&&t| t == Truth::Part).count();
        println!(
            "== {name}: {} points, {part} on the part",
            scan.points.len()
        );
        let cloud = PointCloud::from_positions(scan.points);
        measure(1, &cloud);
        if cores > 1 {
            measure(cores, &cloud);
        }
    }
}
