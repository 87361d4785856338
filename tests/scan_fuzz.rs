//! Random and mutated bytes thrown at every reader through `scan::load_bytes`: whatever comes
//! in, the answer is a scan or a `ScanError`, never a panic, and it comes quickly (a hang
//! guard of 2 s per input, far above the microseconds each takes). Case counts keep this
//! file at a few seconds in release.

use std::path::Path;
use std::time::{Duration, Instant};

use partsift::scan::{load_bytes, LoadOptions};
use proptest::prelude::*;

const XYZ: &str = "property float x\nproperty float y\nproperty float z\n";

/// Valid files of every format, as starting points for mutation.
fn seeds() -> Vec<(&'static str, Vec<u8>)> {
    let ascii = format!(
        "ply\r\nformat ascii 1.0\r\ncomment c\r\nelement vertex 4\r\n{}property uchar red\r\n\
         property uchar green\r\nproperty uchar blue\r\nelement face 2\r\n\
         property list uchar int vertex_indices\r\nelement edge 1\r\nproperty list uchar short e\r\n\
         end_header\r\n0 0 0 1 2 3\r\n1 0 0 4 5 6\r\n1 1 0 7 8 9\r\n0 1 0 1 1 1\r\n\
         4 0 1 2 3\r\n3 0 1 2\r\n2 7 8\r\n",
        XYZ.replace('\n', "\r\n")
    );
    let binary = |big_endian: bool| {
        let order = if big_endian { "big" } else { "little" };
        let mut b = format!(
            "ply\nformat binary_{order}_endian 1.0\nelement edge 2\n\
             property list ushort uchar e\nproperty double w\nelement vertex 4\n{XYZ}\
             property float nx\nproperty float ny\nproperty float nz\nelement face 2\n\
             property list uchar uint vertex_index\nproperty uchar flag\nend_header\n"
        )
        .into_bytes();
        let word = |v: [u8; 4]| {
            if big_endian {
                [v[3], v[2], v[1], v[0]]
            } else {
                v
            }
        };
        for n in [2u16, 0] {
            let len = if big_endian {
                n.to_be_bytes()
            } else {
                n.to_le_bytes()
            };
            b.extend_from_slice(&len);
            b.extend(std::iter::repeat_n(5u8, n as usize));
            b.extend_from_slice(&[0; 8]);
        }
        for v in [
            0.0f32, 0.0, 0.0, 0.0, 0.0, 1.0, 1.0, 0.0, 0.0, 0.0, 0.0, 1.0,
        ] {
            b.extend_from_slice(&word(v.to_le_bytes()));
        }
        for v in [
            1.0f32, 1.0, 0.0, 0.0, 0.0, 1.0, 0.0, 1.0, 0.0, 0.0, 0.0, 1.0,
        ] {
            b.extend_from_slice(&word(v.to_le_bytes()));
        }
        for face in [[0u32, 1, 2, 3].as_slice(), &[0, 2, 3]] {
            b.push(face.len() as u8);
            for i in face {
                b.extend_from_slice(&word(i.to_le_bytes()));
            }
            b.push(1);
        }
        b
    };
    let xyz = b"# comment\nx,y,z,nx,ny,nz,r,g,b\n1,2,3,0,0,1,10,20,30\n4;5;6;0;1;0;1;2;3\n7 8 9 1 0 0 9 9 9\n";
    let pcd_header = "# .PCD v0.7\nVERSION 0.7\nFIELDS x y z rgb\nSIZE 4 4 4 4\nTYPE F F F U\n\
                      COUNT 1 1 1 1\nWIDTH 2\nHEIGHT 1\nVIEWPOINT 0 0 0 1 0 0 0\nPOINTS 2\n";
    let pcd_ascii = format!("{pcd_header}DATA ascii\n1 2 3 255\n4 5 6 65280\n");
    let records: Vec<u8> = [1.0f32, 2.0, 3.0, 4.0, 5.0, 6.0]
        .chunks(3)
        .flat_map(|p| {
            p.iter()
                .flat_map(|v| v.to_le_bytes())
                .chain(255u32.to_le_bytes())
                .collect::<Vec<u8>>()
        })
        .collect();
    let mut pcd_binary = format!("{pcd_header}DATA binary\n").into_bytes();
    pcd_binary.extend_from_slice(&records);
    // binary_compressed: the same points field by field, as LZF literal runs, then a
    // back-reference repeating the last 4 bytes (control 0b010_00000: length 2 + 2, distance 4).
    let soa: Vec<u8> = [1.0f32, 4.0, 2.0, 5.0, 3.0, 6.0]
        .iter()
        .flat_map(|v| v.to_le_bytes())
        .chain(255u32.to_le_bytes())
        .collect();
    let mut lzf = vec![soa.len() as u8 - 1];
    lzf.extend_from_slice(&soa);
    lzf.extend_from_slice(&[0b010_00000, 3]);
    let mut pcd_compressed = format!("{pcd_header}DATA binary_compressed\n").into_bytes();
    pcd_compressed.extend_from_slice(&(lzf.len() as u32).to_le_bytes());
    pcd_compressed.extend_from_slice(&32u32.to_le_bytes());
    pcd_compressed.extend_from_slice(&lzf);
    vec![
        ("a.ply", ascii.into_bytes()),
        ("le.ply", binary(false)),
        ("be.ply", binary(true)),
        ("a.xyz", xyz.to_vec()),
        ("a.pcd", pcd_ascii.into_bytes()),
        ("b.pcd", pcd_binary),
        ("c.pcd", pcd_compressed),
    ]
}

fn options() -> LoadOptions {
    LoadOptions {
        surface_points: 200,
        ..LoadOptions::default()
    }
}

/// Loads and checks that the answer is sane and quick.
fn check(name: &str, bytes: &[u8]) {
    let start = Instant::now();
    let result = load_bytes(Path::new(name), bytes, &options());
    assert!(
        start.elapsed() < Duration::from_secs(2),
        "{name}: took {:?}",
        start.elapsed()
    );
    match result {
        Ok(scan) => {
            assert!(!scan.cloud.is_empty());
            assert!(scan.cloud.positions.iter().flatten().all(|c| c.is_finite()));
            if let Some(n) = &scan.cloud.normals {
                assert_eq!(n.len(), scan.cloud.len());
            }
            if let Some(c) = &scan.cloud.colors {
                assert_eq!(c.len(), scan.cloud.len());
            }
        }
        Err(e) => assert!(!e.what.is_empty()),
    }
}

#[test]
fn every_seed_loads() {
    for (name, bytes) in seeds() {
        let scan =
            load_bytes(Path::new(name), &bytes, &options()).unwrap_or_else(|e| panic!("{e}"));
        assert!(scan.stored_points >= 2, "{name}");
        if name.ends_with(".ply") {
            // The edge element's lists before the vertices were skipped right.
            let square = [
                [0.0, 0.0, 0.0],
                [1.0, 0.0, 0.0],
                [1.0, 1.0, 0.0],
                [0.0, 1.0, 0.0],
            ];
            let vertices = LoadOptions {
                surface_points: 0,
                ..options()
            };
            let scan = load_bytes(Path::new(name), &bytes, &vertices).unwrap();
            assert_eq!(scan.cloud.positions, square, "{name}");
        }
    }
}

/// One edit of a file: overwrite, insert or delete a byte, insert a long run of digits (to
/// blow up a count), or cut the file short.
#[derive(Clone, Debug)]
enum Edit {
    Set(usize, u8),
    Insert(usize, u8),
    Delete(usize),
    Digits(usize),
    Cut(usize),
}

fn edit() -> impl Strategy<Value = Edit> {
    prop_oneof![
        (any::<usize>(), any::<u8>()).prop_map(|(at, b)| Edit::Set(at, b)),
        (any::<usize>(), any::<u8>()).prop_map(|(at, b)| Edit::Insert(at, b)),
        any::<usize>().prop_map(Edit::Delete),
        any::<usize>().prop_map(Edit::Digits),
        any::<usize>().prop_map(Edit::Cut),
    ]
}

fn apply(bytes: &mut Vec<u8>, edit: &Edit) {
    let at = |i: usize, len: usize| if len == 0 { 0 } else { i % len };
    match *edit {
        Edit::Set(i, b) if !bytes.is_empty() => {
            let i = at(i, bytes.len());
            bytes[i] = b;
        }
        Edit::Insert(i, b) => bytes.insert(at(i, bytes.len() + 1), b),
        Edit::Delete(i) if !bytes.is_empty() => {
            bytes.remove(at(i, bytes.len()));
        }
        Edit::Digits(i) => {
            let i = at(i, bytes.len() + 1);
            bytes.splice(i..i, b"99999999999".iter().copied());
        }
        Edit::Cut(i) => bytes.truncate(at(i, bytes.len() + 1)),
        _ => {}
    }
}

proptest! {
    #![proptest_config(ProptestConfig::with_cases(20_000))]

    #[test]
    fn mutated_files_never_panic(seed in 0usize..7, edits in prop::collection::vec(edit(), 1..6)) {
        let (name, mut bytes) = seeds().swap_remove(seed);
        for e in &edits {
            apply(&mut bytes, e);
        }
        check(name, &bytes);
    }

    #[test]
    fn random_bytes_never_panic(
        prefix in 0usize..5,
        tail in prop::collection::vec(any::<u8>(), 0..600),
    ) {
        // A prefix that gets random bytes past the format detection into each parser.
        let (name, start): (&str, &[u8]) = [
            ("r.ply", b"".as_slice()),
            ("r.ply", b"ply\n"),
            ("r.ply", b"ply\nformat binary_little_endian 1.0\nelement vertex 3\nproperty float x\nproperty float y\nproperty float z\nend_header\n"),
            ("r.pcd", b"VERSION 0.7\nFIELDS x y z\nSIZE 4 4 4\nTYPE F F F\nWIDTH 2\nPOINTS 2\nDATA binary_compressed\n"),
            ("r.xyz", b""),
        ][prefix];
        let mut bytes = start.to_vec();
        bytes.extend_from_slice(&tail);
        check(name, &bytes);
    }
}
