//! Regression tests for bad input, each named after the failure it pins: every one must be a
//! `ScanError` naming the file and the line or byte, never a panic, a hang or a huge allocation.

use std::alloc::{GlobalAlloc, Layout, System};
use std::path::{Path, PathBuf};
use std::sync::atomic::{AtomicUsize, Ordering};

use partsift::scan::{load, LoadOptions, Location, ScanError, MAX_FILE_BYTES};

/// Records the largest single allocation, to show that absurd counts are refused before
/// anything is allocated for them.
struct LargestAllocation;

static LARGEST: AtomicUsize = AtomicUsize::new(0);

unsafe impl GlobalAlloc for LargestAllocation {
    unsafe fn alloc(&self, layout: Layout) -> *mut u8 {
        LARGEST.fetch_max(layout.size(), Ordering::Relaxed);
        unsafe { System.alloc(layout) }
    }
    unsafe fn dealloc(&self, ptr: *mut u8, layout: Layout) {
        unsafe { System.dealloc(ptr, layout) }
    }
}

#[global_allocator]
static ALLOCATOR: LargestAllocation = LargestAllocation;

fn dir() -> PathBuf {
    let dir = std::env::temp_dir().join(format!("partsift-scan-errors-{}", std::process::id()));
    std::fs::create_dir_all(&dir).unwrap();
    dir
}

fn write(name: &str, bytes: &[u8]) -> PathBuf {
    let path = dir().join(name);
    std::fs::write(&path, bytes).unwrap();
    path
}

fn load_err(name: &str, bytes: &[u8]) -> ScanError {
    let path = write(name, bytes);
    let err = load(&path, &LoadOptions::default()).err().unwrap();
    assert_eq!(err.path, path);
    assert!(err.to_string().starts_with(&path.display().to_string()));
    err
}

const XYZ_HEADER: &str = "property float x\nproperty float y\nproperty float z\n";

fn binary_header(vertices: u64, faces: u64) -> String {
    format!(
        "ply\nformat binary_little_endian 1.0\nelement vertex {vertices}\n{XYZ_HEADER}\
         element face {faces}\nproperty list uchar int vertex_indices\nend_header\n"
    )
}

fn floats(values: &[f32]) -> Vec<u8> {
    values.iter().flat_map(|v| v.to_le_bytes()).collect()
}

/// Three vertices and `faces` triangles (0 1 2), little-endian.
fn triangle_file(faces: u64) -> (Vec<u8>, usize) {
    let header = binary_header(3, faces);
    let mut bytes = header.clone().into_bytes();
    bytes.extend(floats(&[0.0, 0.0, 0.0, 1.0, 0.0, 0.0, 0.0, 1.0, 0.0]));
    let triangle: Vec<u8> = std::iter::once(3u8)
        .chain([0i32, 1, 2].iter().flat_map(|i| i.to_le_bytes()))
        .collect();
    for _ in 0..faces {
        bytes.extend_from_slice(&triangle);
    }
    (bytes, header.len())
}

#[test]
fn truncated_binary_ply_reports_offset() {
    let (bytes, body) = triangle_file(3);
    // Cut inside the vertex data: refused at the start of the vertex records.
    let err = load_err("cut_vertices.ply", &bytes[..body + 20]);
    assert_eq!(err.location, Some(Location::Byte(body as u64)), "{err}");
    assert!(err.what.contains("element 'vertex'"), "{err}");
    // Cut inside the third face's list: refused at that list.
    let third_face = body + 36 + 2 * 13;
    let err = load_err("cut_faces.ply", &bytes[..third_face + 6]);
    assert_eq!(
        err.location,
        Some(Location::Byte(third_face as u64)),
        "{err}"
    );
    assert!(
        err.what.contains("ends inside list 'vertex_indices'"),
        "{err}"
    );
}

#[test]
fn vertex_count_above_the_ascii_data_names_the_last_line() {
    let text = format!(
        "ply\nformat ascii 1.0\nelement vertex 4\n{XYZ_HEADER}end_header\n\
         1.000 2.000 3.000\n4.000 5.000 6.000\n"
    );
    let err = load_err("short.ply", text.as_bytes());
    // Lines 8 and 9 hold the two vertices: the error is at the last line read.
    assert_eq!(err.location, Some(Location::Line(9)), "{err}");
    assert!(
        err.what.contains("ends after 2 of the 4 'vertex' lines"),
        "{err}"
    );
}

#[test]
fn nan_rows_are_dropped_and_counted() {
    let path = write(
        "holes.xyz",
        b"1 2 3\nnan nan nan\n4 5 6\n7 inf 9\n-inf 0 0\n",
    );
    let scan = load(&path, &LoadOptions::default()).unwrap();
    assert_eq!((scan.stored_points, scan.dropped_non_finite), (5, 3));
    assert_eq!(scan.cloud.positions, vec![[1.0, 2.0, 3.0], [4.0, 5.0, 6.0]]);
    let text = format!(
        "ply\nformat ascii 1.0\nelement vertex 2\n{XYZ_HEADER}end_header\nnan 0 0\n1 1 1\n"
    );
    let scan = load(
        &write("holes.ply", text.as_bytes()),
        &LoadOptions::default(),
    )
    .unwrap();
    assert_eq!((scan.stored_points, scan.dropped_non_finite), (2, 1));
}

#[test]
fn all_nan_cloud_says_no_points() {
    let err = load_err("all_nan.xyz", b"nan 1 1\n1 nan 1\n");
    assert!(err.what.contains("no points: all 2 stored points"), "{err}");
}

#[test]
fn absurd_vertex_count_is_refused_before_allocating() {
    for (name, header) in [
        ("absurd.ply", binary_header(4_000_000_000, 0)),
        (
            "absurd_ascii.ply",
            format!("ply\nformat ascii 1.0\nelement vertex 4000000000\n{XYZ_HEADER}end_header\n"),
        ),
        ("absurd_faces.ply", binary_header(3, u64::MAX)),
    ] {
        let mut bytes = header.into_bytes();
        bytes.extend(floats(&[0.0; 9]));
        LARGEST.store(0, Ordering::Relaxed);
        let err = load_err(name, &bytes);
        assert!(err.what.contains("declared"), "{err}");
        // 4e9 points would take 48 GB; nothing near even 1 MB may be asked for.
        assert!(LARGEST.load(Ordering::Relaxed) < 1 << 20);
    }
    let pcd = b"VERSION 0.7\nFIELDS x y z\nSIZE 4 4 4\nTYPE F F F\nWIDTH 4000000000\n\
                POINTS 4000000000\nDATA binary\n";
    let err = load_err("absurd.pcd", pcd);
    assert!(err.what.contains("POINTS"), "{err}");
}

#[test]
fn non_numeric_text_reports_the_line() {
    let err = load_err("words.xyz", b"1 2 3\n4 5 6\n7 eight 9\n");
    assert_eq!(err.location, Some(Location::Line(3)));
    assert!(err.what.contains("'eight' is not a number"), "{err}");
    let text =
        format!("ply\nformat ascii 1.0\nelement vertex 2\n{XYZ_HEADER}end_header\n1 2 3\n1 2 x3\n");
    let err = load_err("words.ply", text.as_bytes());
    assert_eq!(err.location, Some(Location::Line(9)));
    assert!(
        err.what.contains("vertex 'z': 'x3' is not a number"),
        "{err}"
    );
    let pcd = b"VERSION 0.7\nFIELDS x y z\nSIZE 4 4 4\nTYPE F F F\nWIDTH 1\nPOINTS 1\n\
                DATA ascii\n1 2 three\n";
    let err = load_err("words.pcd", pcd);
    assert_eq!(err.location, Some(Location::Line(8)));
}

#[test]
fn missing_xyz_is_named() {
    let text = "ply\nformat ascii 1.0\nelement vertex 1\nproperty float x\nproperty float y\n\
                end_header\n1 2\n";
    let err = load_err("flat.ply", text.as_bytes());
    assert_eq!(err.location, Some(Location::Line(3)));
    assert!(err.what.contains("has no z (x y z are required)"), "{err}");
    let err = load_err("columns.csv", b"a,b,c\n1,2,3\n");
    assert!(err.what.contains("no x, y and z"), "{err}");
}

#[test]
fn face_index_out_of_range_names_the_face() {
    let (mut bytes, body) = triangle_file(2);
    let second_face_last_index = body + 36 + 13 + 1 + 8;
    bytes[second_face_last_index..second_face_last_index + 4].copy_from_slice(&3i32.to_le_bytes());
    let err = load_err("bad_face.ply", &bytes);
    assert_eq!(
        err.location,
        Some(Location::Byte(second_face_last_index as u64))
    );
    assert!(
        err.what
            .contains("face 1 refers to vertex 3, but the file has 3 vertices"),
        "{err}"
    );
}

#[test]
fn negative_list_length_reports_offset() {
    let (mut bytes, body) = triangle_file(1);
    let header = binary_header(3, 1).replace("list uchar int", "list int int");
    bytes.splice(..body, header.bytes());
    let body = header.len();
    bytes.splice(body + 36..body + 37, (-2i32).to_le_bytes());
    let err = load_err("negative.ply", &bytes);
    assert_eq!(err.location, Some(Location::Byte(body as u64 + 36)));
    assert!(err.what.contains("negative length -2"), "{err}");
}

#[test]
fn unreadable_paths_are_errors() {
    let missing = dir().join("not_there.ply");
    let err = load(&missing, &LoadOptions::default()).err().unwrap();
    assert!(err.what.contains("cannot read"), "{err}");
    let err = load(&dir(), &LoadOptions::default()).err().unwrap();
    assert!(err.what.contains("folder"), "{err}");
    let err = load_err("empty.ply", b"");
    assert!(err.what.contains("empty"), "{err}");
    let err = load_err("notes.obj", b"v 1 2 3\n");
    assert!(err.what.contains("unknown scan format"), "{err}");
}

#[test]
fn file_over_the_size_limit_is_refused_unread() {
    // A sparse file: 2 GiB + 1 byte long without taking the disk space.
    let path = dir().join("huge.ply");
    let file = std::fs::File::create(&path).unwrap();
    file.set_len(MAX_FILE_BYTES + 1).unwrap();
    LARGEST.store(0, Ordering::Relaxed);
    let err = load(&path, &LoadOptions::default()).err().unwrap();
    assert!(err.what.contains("at most 2 GiB"), "{err}");
    assert!(LARGEST.load(Ordering::Relaxed) < 1 << 20);
    std::fs::remove_file(&path).unwrap();
}

#[test]
fn compressed_pcd_that_lies_about_its_size_is_refused() {
    let header = b"VERSION 0.7\nFIELDS x y z\nSIZE 4 4 4\nTYPE F F F\nWIDTH 1\nPOINTS 1\n\
                   DATA binary_compressed\n";
    // Claims 12 bytes unpacked from 2 compressed bytes (LZF cannot do more than 88x), and then
    // a literal run longer than the data.
    for (compressed, unpacked, data) in [(2u32, 12u32, vec![0u8, 0]), (3, 12, vec![11, 0, 0])] {
        let mut bytes = header.to_vec();
        bytes.extend_from_slice(&compressed.to_le_bytes());
        bytes.extend_from_slice(&unpacked.to_le_bytes());
        bytes.extend_from_slice(&data);
        let err = load_err("lies.pcd", &bytes);
        assert!(matches!(err.location, Some(Location::Byte(_))), "{err}");
    }
}

#[test]
fn errors_read_as_file_place_and_reason() {
    let path = Path::new("scans/part.xyz");
    let err = ScanError::new(path, Some(Location::Line(3)), "'x' is not a number");
    assert_eq!(
        err.to_string(),
        "scans/part.xyz, line 3: 'x' is not a number"
    );
}
