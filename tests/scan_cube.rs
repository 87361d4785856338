//! The cube from the PLY polygon file format description (Greg Turk, 1994): 8 vertices, 6
//! quadrilateral faces, its two comments, as published in ascii and re-encoded here by hand
//! as binary little- and big-endian. All three must give the same points.

use std::path::PathBuf;

use partsift::scan::{load, LoadOptions, Scan, ScanFormat};

/// The example file as published, without the description's `{ ... }` annotations.
const CUBE_ASCII: &str = "ply
format ascii 1.0
comment made by Greg Turk
comment this file is a cube
element vertex 8
property float x
property float y
property float z
element face 6
property list uchar int vertex_index
end_header
0 0 0
0 0 1
0 1 1
0 1 0
1 0 0
1 0 1
1 1 1
1 1 0
4 0 1 2 3
4 7 6 5 4
4 0 4 5 1
4 1 5 6 2
4 2 6 7 3
4 3 7 4 0
";

const CORNERS: [[f32; 3]; 8] = [
    [0.0, 0.0, 0.0],
    [0.0, 0.0, 1.0],
    [0.0, 1.0, 1.0],
    [0.0, 1.0, 0.0],
    [1.0, 0.0, 0.0],
    [1.0, 0.0, 1.0],
    [1.0, 1.0, 1.0],
    [1.0, 1.0, 0.0],
];

const FACES: [[i32; 4]; 6] = [
    [0, 1, 2, 3],
    [7, 6, 5, 4],
    [0, 4, 5, 1],
    [1, 5, 6, 2],
    [2, 6, 7, 3],
    [3, 7, 4, 0],
];

/// The same cube in binary: the header with the format line changed, then each vertex as
/// three 4-byte floats and each face as a uchar count and four 4-byte ints.
fn cube_binary(big_endian: bool) -> Vec<u8> {
    let order = if big_endian { "big" } else { "little" };
    let mut bytes = CUBE_ASCII[..CUBE_ASCII.find("0 0 0\n").unwrap()]
        .replace(
            "format ascii 1.0",
            &format!("format binary_{order}_endian 1.0"),
        )
        .into_bytes();
    let word = |b: [u8; 4]| {
        if big_endian {
            [b[3], b[2], b[1], b[0]]
        } else {
            b
        }
    };
    for corner in CORNERS {
        for v in corner {
            bytes.extend_from_slice(&word(v.to_le_bytes()));
        }
    }
    for face in FACES {
        bytes.push(4);
        for i in face {
            bytes.extend_from_slice(&word(i.to_le_bytes()));
        }
    }
    bytes
}

fn write_all_three() -> Vec<PathBuf> {
    let dir = std::env::temp_dir().join(format!("partsift-cube-{}", std::process::id()));
    std::fs::create_dir_all(&dir).unwrap();
    let files = [
        ("cube_ascii.ply", CUBE_ASCII.as_bytes().to_vec()),
        ("cube_le.ply", cube_binary(false)),
        ("cube_be.ply", cube_binary(true)),
    ];
    files
        .into_iter()
        .map(|(name, bytes)| {
            let path = dir.join(name);
            std::fs::write(&path, bytes).unwrap();
            path
        })
        .collect()
}

fn load_all(options: &LoadOptions) -> Vec<Scan> {
    write_all_three()
        .iter()
        .map(|p| load(p, options).unwrap())
        .collect()
}

#[test]
fn cube_vertices_are_the_same_in_all_three_encodings() {
    let options = LoadOptions {
        surface_points: 0,
        ..LoadOptions::default()
    };
    let scans = load_all(&options);
    let formats: Vec<ScanFormat> = scans.iter().map(|s| s.format).collect();
    assert_eq!(
        formats,
        [
            ScanFormat::PlyAscii,
            ScanFormat::PlyBinaryLe,
            ScanFormat::PlyBinaryBe
        ]
    );
    for scan in &scans {
        assert_eq!(scan.cloud.positions, CORNERS);
        assert_eq!(scan.stored_points, 8);
        assert_eq!(scan.faces, 6);
        assert_eq!(scan.properties, ["x", "y", "z"]);
        assert_eq!(scan.bounds, Some([[0.0; 3], [1.0; 3]]));
        assert_eq!(scan.dropped_non_finite, 0);
    }
}

#[test]
fn cube_surface_samples_are_on_the_faces_evenly_and_identical() {
    let options = LoadOptions {
        surface_points: 6_000,
        seed: 7,
        ..LoadOptions::default()
    };
    let scans = load_all(&options);
    assert_eq!(scans[0].cloud, scans[1].cloud);
    assert_eq!(scans[0].cloud, scans[2].cloud);
    let cloud = &scans[0].cloud;
    assert_eq!(cloud.len(), 6_000);
    let normals = cloud.normals.as_ref().unwrap();
    let mut per_side = [0usize; 6];
    for (p, n) in cloud.positions.iter().zip(normals) {
        assert!(
            p.iter().all(|&c| (-1e-6..=1.0 + 1e-6).contains(&c)),
            "{p:?}"
        );
        // On the surface of the unit cube: some coordinate is 0 or 1, and the normal is that
        // axis, pointing out (the description's faces are wound counter-clockwise seen from
        // outside).
        let axis = (0..3).find(|&a| n[a].abs() > 0.999).unwrap();
        let side = if p[axis] < 0.5 { 0.0 } else { 1.0 };
        assert!((p[axis] - side).abs() < 1e-6, "{p:?} {n:?}");
        assert_eq!(n[axis].signum(), if side == 0.0 { -1.0 } else { 1.0 });
        per_side[axis * 2 + side as usize] += 1;
    }
    // Equal areas, so equal shares: binomial n = 6,000, p = 1/6, sd 29; allow 5 sd.
    assert!(
        per_side.iter().all(|&c| (855..=1145).contains(&c)),
        "{per_side:?}"
    );
    let other_seed = LoadOptions { seed: 8, ..options };
    let again = load(&write_all_three()[1], &other_seed).unwrap();
    assert_ne!(again.cloud, *cloud, "the seed must matter");
}
