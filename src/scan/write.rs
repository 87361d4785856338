//! Writing point clouds as PLY (ascii or binary little-endian) and XYZ text.
//!
//! Both writers go through [`write_atomic`], so a failed write never leaves a half-written
//! file behind. Coordinates are written exactly as given (no unit conversion): the caller
//! decides the units. Text output uses the shortest decimal that reads back to the same `f32`.

use std::io::{self, Write};
use std::path::Path;

use super::PointCloud;
use crate::fsutil::write_atomic;

/// How a PLY body is encoded.
#[derive(Clone, Copy, Debug, PartialEq, Eq, Hash)]
pub enum PlyEncoding {
    /// `format ascii 1.0`: one vertex a line, values separated by spaces.
    Ascii,
    /// `format binary_little_endian 1.0`: the vertex properties packed in header order.
    BinaryLe,
}

/// Vertices packed per `write_all` in the binary writer (bounded scratch buffer).
const BINARY_CHUNK_POINTS: usize = 4096;

/// Writes `cloud` as a PLY file: `x y z` (float), then `nx ny nz` (float) when the cloud has
/// normals and `red green blue` (uchar) when it has colours, after a `comment` line naming
/// partsift, as laid out in the PLY polygon file format description (Turk, 1994).
///
/// Bad input: a point with a NaN or infinite value, or normals / colours whose count differs
/// from the point count, give an `InvalidInput` error and no file is written.
pub fn write_ply(path: &Path, cloud: &PointCloud, encoding: PlyEncoding) -> io::Result<()> {
    check_writable(cloud)?;
    write_atomic(path, |out| {
        out.write_all(ply_header(cloud, encoding).as_bytes())?;
        match encoding {
            PlyEncoding::Ascii => write_text_rows(out, cloud),
            PlyEncoding::BinaryLe => write_binary_le_rows(out, cloud),
        }
    })
}

/// Writes `cloud` as XYZ text: one point a line, values separated by spaces. A plain cloud
/// starts with the comment line `# x y z`; a cloud with normals and / or colours starts with
/// a header line naming its columns (`x y z nx ny nz r g b`, colours as integers 0-255).
///
/// Bad input: as for [`write_ply`].
pub fn write_xyz(path: &Path, cloud: &PointCloud) -> io::Result<()> {
    check_writable(cloud)?;
    write_atomic(path, |out| {
        let mut names = String::from("x y z");
        if cloud.normals.is_some() {
            names.push_str(" nx ny nz");
        }
        if cloud.colors.is_some() {
            names.push_str(" r g b");
        }
        if names.len() == "x y z".len() {
            writeln!(out, "# {names}")?;
        } else {
            writeln!(out, "{names}")?;
        }
        write_text_rows(out, cloud)
    })
}

fn invalid(what: String) -> io::Error {
    io::Error::new(io::ErrorKind::InvalidInput, what)
}

fn check_writable(cloud: &PointCloud) -> io::Result<()> {
    let n = cloud.len();
    let counts = [
        ("normals", cloud.normals.as_ref().map(Vec::len)),
        ("colours", cloud.colors.as_ref().map(Vec::len)),
    ];
    for (kind, count) in counts {
        if let Some(count) = count.filter(|&c| c != n) {
            return Err(invalid(format!("cloud has {n} points but {count} {kind}")));
        }
    }
    let vectors = std::iter::once(&cloud.positions).chain(cloud.normals.as_ref());
    for (kind, values) in ["position", "normal"].into_iter().zip(vectors) {
        if let Some(i) = values.iter().position(|v| !v.iter().all(|c| c.is_finite())) {
            return Err(invalid(format!(
                "point {i} has a non-finite {kind} {:?}",
                values[i]
            )));
        }
    }
    Ok(())
}

fn ply_header(cloud: &PointCloud, encoding: PlyEncoding) -> String {
    let format = match encoding {
        PlyEncoding::Ascii => "ascii",
        PlyEncoding::BinaryLe => "binary_little_endian",
    };
    let mut header = format!(
        "ply\nformat {format} 1.0\ncomment written by partsift\nelement vertex {}\n\
         property float x\nproperty float y\nproperty float z\n",
        cloud.len()
    );
    if cloud.normals.is_some() {
        header.push_str("property float nx\nproperty float ny\nproperty float nz\n");
    }
    if cloud.colors.is_some() {
        header.push_str("property uchar red\nproperty uchar green\nproperty uchar blue\n");
    }
    header.push_str("end_header\n");
    header
}

/// One line per point: `x y z [nx ny nz] [r g b]`, shared by ascii PLY and XYZ.
fn write_text_rows(out: &mut dyn Write, cloud: &PointCloud) -> io::Result<()> {
    for (i, p) in cloud.positions.iter().enumerate() {
        write!(out, "{} {} {}", p[0], p[1], p[2])?;
        if let Some(normals) = &cloud.normals {
            let n = normals[i];
            write!(out, " {} {} {}", n[0], n[1], n[2])?;
        }
        if let Some(colors) = &cloud.colors {
            let c = colors[i];
            write!(out, " {} {} {}", c[0], c[1], c[2])?;
        }
        out.write_all(b"\n")?;
    }
    Ok(())
}

fn write_binary_le_rows(out: &mut dyn Write, cloud: &PointCloud) -> io::Result<()> {
    let stride =
        12 + 12 * usize::from(cloud.normals.is_some()) + 3 * usize::from(cloud.colors.is_some());
    let mut chunk = Vec::with_capacity(BINARY_CHUNK_POINTS * stride);
    for start in (0..cloud.len()).step_by(BINARY_CHUNK_POINTS) {
        chunk.clear();
        for i in start..(start + BINARY_CHUNK_POINTS).min(cloud.len()) {
            for c in cloud.positions[i] {
                chunk.extend_from_slice(&c.to_le_bytes());
            }
            if let Some(normals) = &cloud.normals {
                for c in normals[i] {
                    chunk.extend_from_slice(&c.to_le_bytes());
                }
            }
            if let Some(colors) = &cloud.colors {
                chunk.extend_from_slice(&colors[i]);
            }
        }
        out.write_all(&chunk)?;
    }
    Ok(())
}

#[cfg(test)]
mod tests {
    use super::*;
    use std::fs;
    use std::path::PathBuf;

    fn scratch_dir(name: &str) -> PathBuf {
        let dir =
            std::env::temp_dir().join(format!("partsift-write-{name}-{}", std::process::id()));
        fs::create_dir_all(&dir).unwrap();
        dir
    }

    fn two_points_with_normals_and_colours() -> PointCloud {
        PointCloud {
            positions: vec![[1.0, -2.0, 0.5], [0.25, 3.0, -0.125]],
            normals: Some(vec![[0.0, 0.0, 1.0], [1.0, 0.0, 0.0]]),
            colors: Some(vec![[255, 0, 16], [1, 2, 3]]),
        }
    }

    const FULL_HEADER_BODY: &str = "comment written by partsift\nelement vertex 2\n\
        property float x\nproperty float y\nproperty float z\n\
        property float nx\nproperty float ny\nproperty float nz\n\
        property uchar red\nproperty uchar green\nproperty uchar blue\nend_header\n";

    // Expected bytes derived by hand from the PLY format description (Turk, 1994): the magic
    // line `ply`, a `format` line, `comment` lines, `element` then its `property` lines in
    // order, `end_header`; ascii bodies hold one element a line, values separated by spaces.
    #[test]
    fn ascii_ply_bytes_match_the_format_description() {
        let dir = scratch_dir("ascii");
        let path = dir.join("two.ply");
        write_ply(
            &path,
            &two_points_with_normals_and_colours(),
            PlyEncoding::Ascii,
        )
        .unwrap();
        let expected = format!(
            "ply\nformat ascii 1.0\n{FULL_HEADER_BODY}1 -2 0.5 0 0 1 255 0 16\n0.25 3 -0.125 1 0 0 1 2 3\n"
        );
        assert_eq!(fs::read_to_string(&path).unwrap(), expected);
        fs::remove_dir_all(&dir).unwrap();
    }

    // Binary body as in the PLY description: each vertex's properties packed in header order,
    // no separators. The float bytes are IEEE 754 binary32, little-endian, worked out by hand:
    // 1.0 = 0x3F800000, -2.0 = 0xC0000000, 0.5 = 0x3F000000, 0.25 = 0x3E800000,
    // 3.0 = 0x40400000, -0.125 = 0xBE000000, 0.0 = 0x00000000.
    #[test]
    fn binary_le_ply_bytes_match_the_format_description() {
        let dir = scratch_dir("binary");
        let path = dir.join("two.ply");
        write_ply(
            &path,
            &two_points_with_normals_and_colours(),
            PlyEncoding::BinaryLe,
        )
        .unwrap();
        let mut expected =
            format!("ply\nformat binary_little_endian 1.0\n{FULL_HEADER_BODY}").into_bytes();
        #[rustfmt::skip]
        expected.extend_from_slice(&[
            0x00, 0x00, 0x80, 0x3F, 0x00, 0x00, 0x00, 0xC0, 0x00, 0x00, 0x00, 0x3F, // x y z
            0x00, 0x00, 0x00, 0x00, 0x00, 0x00, 0x00, 0x00, 0x00, 0x00, 0x80, 0x3F, // nx ny nz
            255, 0, 16,                                                             // red green blue
            0x00, 0x00, 0x80, 0x3E, 0x00, 0x00, 0x40, 0x40, 0x00, 0x00, 0x00, 0xBE,
            0x00, 0x00, 0x80, 0x3F, 0x00, 0x00, 0x00, 0x00, 0x00, 0x00, 0x00, 0x00,
            1, 2, 3,
        ]);
        assert_eq!(fs::read(&path).unwrap(), expected);
        fs::remove_dir_all(&dir).unwrap();
    }

    #[test]
    fn xyz_bytes_plain_and_with_extra_columns() {
        let dir = scratch_dir("xyz");
        let plain = PointCloud::from_positions(vec![[1.5, 0.0, -7.0], [2.0, 1e-3, 400.25]]);
        let path = dir.join("plain.xyz");
        write_xyz(&path, &plain).unwrap();
        assert_eq!(
            fs::read_to_string(&path).unwrap(),
            "# x y z\n1.5 0 -7\n2 0.001 400.25\n"
        );
        let mut with_colours = plain.clone();
        with_colours.colors = Some(vec![[10, 20, 30], [0, 0, 255]]);
        write_xyz(&path, &with_colours).unwrap();
        assert_eq!(
            fs::read_to_string(&path).unwrap(),
            "x y z r g b\n1.5 0 -7 10 20 30\n2 0.001 400.25 0 0 255\n"
        );
        fs::remove_dir_all(&dir).unwrap();
    }

    #[test]
    fn empty_cloud_writes_a_valid_header_and_no_rows() {
        let dir = scratch_dir("empty");
        let path = dir.join("empty.ply");
        write_ply(&path, &PointCloud::default(), PlyEncoding::BinaryLe).unwrap();
        let text = fs::read_to_string(&path).unwrap();
        assert!(text.starts_with("ply\nformat binary_little_endian 1.0\n"));
        assert!(text.contains("element vertex 0\n"));
        assert!(text.ends_with("end_header\n"));
        fs::remove_dir_all(&dir).unwrap();
    }

    #[test]
    fn non_finite_point_or_mismatched_normals_write_nothing() {
        let dir = scratch_dir("bad");
        let path = dir.join("bad.ply");
        let nan = PointCloud::from_positions(vec![[0.0, 0.0, 0.0], [f32::NAN, 1.0, 2.0]]);
        let err = write_ply(&path, &nan, PlyEncoding::Ascii).unwrap_err();
        assert_eq!(err.kind(), io::ErrorKind::InvalidInput);
        assert!(err.to_string().contains("point 1"), "{err}");
        let mut short_normals = PointCloud::from_positions(vec![[0.0; 3]; 3]);
        short_normals.normals = Some(vec![[0.0, 0.0, 1.0]]);
        let err = write_xyz(&dir.join("bad.xyz"), &short_normals).unwrap_err();
        assert!(err.to_string().contains("3 points but 1 normals"), "{err}");
        assert_eq!(
            fs::read_dir(&dir).unwrap().count(),
            0,
            "a file was left behind"
        );
        fs::remove_dir_all(&dir).unwrap();
    }

    #[test]
    fn many_points_span_several_binary_chunks() {
        let dir = scratch_dir("chunks");
        let path = dir.join("many.ply");
        let n = BINARY_CHUNK_POINTS * 2 + 17;
        let cloud = PointCloud::from_positions((0..n).map(|i| [i as f32, 0.0, 1.0]).collect());
        write_ply(&path, &cloud, PlyEncoding::BinaryLe).unwrap();
        let bytes = fs::read(&path).unwrap();
        let header_len = ply_header(&cloud, PlyEncoding::BinaryLe).len();
        assert_eq!(bytes.len(), header_len + 12 * n);
        let last = &bytes[header_len + 12 * (n - 1)..header_len + 12 * (n - 1) + 4];
        assert_eq!(f32::from_le_bytes(last.try_into().unwrap()), (n - 1) as f32);
        fs::remove_dir_all(&dir).unwrap();
    }
}
