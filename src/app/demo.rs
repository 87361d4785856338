//! Practice data for the screenshot run and the tests (test builds only): a simulated
//! one-viewpoint scan of a flanged bushing on a table, and plausible results for every tab.
//! Part names are those of our own machine-shop demo bin.

use std::path::{Path, PathBuf};

use super::inspect::{Cleanup, Judgement, ScanShown, Status, TrueSize, Verdict};
use super::map::{MapData, MapDot};
use super::review::{Case, Evaluation, TypeScores};
use super::view3d::{Cloud3d, PointKind};
use partsift::prep::StepLine;
use partsift::rng::Rng;
use partsift::scan::PointCloud;

pub(crate) const TYPES: [&str; 6] = [
    "bracket", "bushing", "flange", "hex-nut", "spacer", "washer",
];

/// A flanged bushing (bore 7 mm, body 12 mm, flange 22 mm radius, 30 mm tall) seen from one
/// sensor position above and in front, on a table, with stray points and a small second
/// object beside it: `n` points, mm, with what a clean-up would do with each.
pub(crate) fn bushing_scan(n: usize, seed: u64) -> (Vec<[f32; 3]>, Vec<PointKind>) {
    let mut rng = Rng::new(seed);
    let sensor = [0.0f64, -220.0, 260.0];
    let mut positions = Vec::with_capacity(n);
    let mut kinds = Vec::with_capacity(n);
    let noise = 0.15;
    while positions.len() < n {
        let roll = rng.uniform();
        let (p, normal, kind) = if roll < 0.55 {
            // The part: pick a surface by area-ish weights.
            let a = rng.range(0.0, std::f64::consts::TAU);
            let (s, c) = a.sin_cos();
            match rng.below(5) {
                0 | 1 => {
                    let z = rng.range(4.0, 30.0);
                    ([12.0 * c, 12.0 * s, z], [c, s, 0.0], PointKind::Part)
                }
                2 => {
                    let r = rng.range(12.0, 22.0);
                    ([r * c, r * s, 4.0], [0.0, 0.0, 1.0], PointKind::Part)
                }
                3 => {
                    let z = rng.range(0.0, 4.0);
                    ([22.0 * c, 22.0 * s, z], [c, s, 0.0], PointKind::Part)
                }
                _ => {
                    let r = rng.range(7.0, 12.0);
                    ([r * c, r * s, 30.0], [0.0, 0.0, 1.0], PointKind::Part)
                }
            }
        } else if roll < 0.92 {
            let (x, y) = (rng.range(-90.0, 90.0), rng.range(-70.0, 90.0));
            if x * x + y * y < 22.0 * 22.0 {
                continue;
            }
            ([x, y, 0.0], [0.0, 0.0, 1.0], PointKind::Table)
        } else if roll < 0.97 {
            // A small nut lying beside the part.
            let a = rng.range(0.0, std::f64::consts::TAU);
            let r = rng.range(0.0, 8.0);
            (
                [55.0 + r * a.cos(), 35.0 + r * a.sin(), 5.0],
                [0.0, 0.0, 1.0],
                PointKind::OtherCluster,
            )
        } else {
            (
                [
                    rng.range(-90.0, 90.0),
                    rng.range(-70.0, 90.0),
                    rng.range(1.0, 60.0),
                ],
                [0.0, 0.0, 0.0],
                PointKind::Stray,
            )
        };
        let to_sensor = [sensor[0] - p[0], sensor[1] - p[1], sensor[2] - p[2]];
        let facing = normal[0] * to_sensor[0] + normal[1] * to_sensor[1] + normal[2] * to_sensor[2];
        if kind != PointKind::Stray && facing <= 0.0 {
            continue;
        }
        let q = [
            (p[0] + noise * rng.normal()) as f32,
            (p[1] + noise * rng.normal()) as f32,
            (p[2] + noise * rng.normal()) as f32,
        ];
        positions.push(q);
        kinds.push(kind);
    }
    (positions, kinds)
}

/// The practice scan as shown in Inspect, with a `review` verdict.
pub(crate) fn inspect_result(n: usize) -> (ScanShown, Cleanup, Judgement) {
    let (positions, kinds) = bushing_scan(n, 11);
    let part: Vec<[f32; 3]> = positions
        .iter()
        .zip(&kinds)
        .filter(|(_, k)| **k == PointKind::Part)
        .map(|(p, _)| *p)
        .step_by(40)
        .collect();
    // Pretend the flange rim and the top of the bore drove the verdict.
    let influence = part
        .iter()
        .map(|p| {
            let r = (p[0] * p[0] + p[1] * p[1]).sqrt();
            let rim = (-(r - 22.0).powi(2) / 8.0).exp();
            let top = (-(p[2] - 30.0).powi(2) / 10.0).exp() * 0.8;
            rim.max(top)
        })
        .collect();
    let part_count = kinds.iter().filter(|k| **k == PointKind::Part).count();
    let shown = ScanShown {
        cloud: Cloud3d::new(PointCloud::from_positions(positions.clone())),
        facts: vec![
            "ply-binary-le".into(),
            format!("{n} points"),
            "units mm (guessed from the extent)".into(),
        ],
    };
    let judgement = Judgement {
        verdict: Verdict {
            part_type: "bushing".into(),
            confidence: 0.58,
            status: Status::Review,
        },
        scores: vec![
            ("bushing".into(), 0.58),
            ("flange".into(), 0.31),
            ("spacer".into(), 0.07),
            ("washer".into(), 0.03),
            ("hex-nut".into(), 0.01),
        ],
        prepared: Some(Cloud3d::new(PointCloud::from_positions(part)).with_influence(influence)),
    };
    let cleanup = Cleanup {
        size: TrueSize {
            extents_mm: [44.1, 43.8, 30.2],
            radius_mm: 27.4,
        },
        report: {
            let count = |kind| kinds.iter().filter(|k| **k == kind).count();
            let line = |step, points, note: &str| StepLine {
                step,
                points,
                note: note.to_owned(),
            };
            vec![
                line("input points", n, "spacing 0.210 mm"),
                line("non-finite", 0, ""),
                line("table plane", count(PointKind::Table), "within 0.63 mm"),
                line("strays", count(PointKind::Stray), ""),
                line("other objects", count(PointKind::OtherCluster), "1 cluster"),
                line("kept", part_count, "2048 evenly spaced"),
            ]
        },
        warnings: Vec::new(),
        levelled: Some(Cloud3d::new(PointCloud::from_positions(positions)).with_kinds(kinds)),
    };
    (shown, cleanup, judgement)
}

/// A plausible check of a model on the demo bin.
pub(crate) fn evaluation(root: &Path) -> Evaluation {
    let n = TYPES.len();
    #[rustfmt::skip]
    let confusion: Vec<u32> = vec![
        18, 0, 0, 0, 1, 0,
        0, 16, 3, 0, 1, 0,
        0, 2, 17, 0, 0, 0,
        0, 0, 0, 20, 0, 0,
        1, 1, 0, 0, 15, 2,
        0, 0, 0, 0, 1, 19,
    ];
    let mut cases = Vec::new();
    for t in 0..n {
        for p in 0..n {
            for k in 0..confusion[t * n + p] {
                cases.push(Case {
                    path: root.join(TYPES[t]).join(format!(
                        "{}-{:03}.ply",
                        TYPES[t],
                        k as usize + 10 * p
                    )),
                    truth: t,
                    predicted: p,
                    confidence: if t == p {
                        0.97 - 0.01 * k as f32
                    } else {
                        0.62 - 0.07 * k as f32
                    },
                });
            }
        }
    }
    let per_type = (0..n)
        .map(|t| {
            let tp = confusion[t * n + t] as f32;
            let row: u32 = (0..n).map(|p| confusion[t * n + p]).sum();
            let col: u32 = (0..n).map(|r| confusion[r * n + t]).sum();
            let (precision, recall) = (tp / col as f32, tp / row as f32);
            TypeScores {
                precision,
                recall,
                f1: 2.0 * precision * recall / (precision + recall),
            }
        })
        .collect();
    Evaluation {
        scans_from: "Holdout scans of the last run (114 scans)".into(),
        part_types: TYPES.iter().map(|s| s.to_string()).collect(),
        confusion,
        per_type,
        cases,
        typical: TYPES
            .iter()
            .map(|t| Some(root.join(t).join(format!("{t}-000.ply"))))
            .collect(),
    }
}

/// Clusters of dots per type, a few sitting in another type's cluster.
pub(crate) fn map(root: &Path) -> MapData {
    let mut rng = Rng::new(5);
    let centres = [
        [-3.0, 2.0],
        [1.5, 1.0],
        [2.5, 2.2],
        [-1.0, -3.0],
        [3.0, -1.5],
        [-3.5, -1.0],
    ];
    let mut dots = Vec::new();
    for (t, c) in centres.iter().enumerate() {
        for k in 0..40 {
            let (centre, suspicious) = if k == 0 && t % 2 == 0 {
                (centres[(t + 1) % centres.len()], true)
            } else {
                (*c, false)
            };
            dots.push(MapDot {
                path: root.join(TYPES[t]).join(format!("{}-{k:03}.ply", TYPES[t])),
                label: t,
                xy: [
                    (centre[0] + 0.55 * rng.normal()) as f32,
                    (centre[1] + 0.55 * rng.normal()) as f32,
                ],
                suspicious,
            });
        }
    }
    MapData {
        part_types: TYPES.iter().map(|s| s.to_string()).collect(),
        dots,
    }
}

/// The demo bin's scan list.
pub(crate) fn survey(root: &Path) -> super::teach::BinSurvey {
    use super::teach::{BinSurvey, TypeEntry};
    let counts = [24, 22, 21, 25, 9, 23];
    BinSurvey {
        root: root.to_path_buf(),
        types: TYPES
            .iter()
            .zip(counts)
            .map(|(t, c)| TypeEntry {
                name: t.to_string(),
                scans: (0..c)
                    .map(|k| root.join(t).join(format!("{t}-{k:03}.ply")))
                    .collect::<Vec<PathBuf>>(),
                warnings: if c < 10 {
                    vec![format!("only {c} scans: at least 10 are advised")]
                } else {
                    vec![]
                },
            })
            .collect(),
        unreadable: vec![(
            root.join("washer/washer-007.ply"),
            "byte 18211: the file ends inside vertex 1190 of 2400".into(),
        )],
        warnings: vec![
            "spacer has under half the scans of hex-nut: the model may favour the larger types"
                .into(),
        ],
    }
}
