//! PCD reader: the Point Cloud Library's open point cloud format, v0.7 ("The PCD (Point Cloud
//! Data) file format", pointclouds.org documentation): `DATA ascii`, `binary` and
//! `binary_compressed` (LZF), fields x y z, optional normal_x normal_y normal_z, and a packed
//! `rgb` or `rgba` field, with SIZE TYPE COUNT WIDTH HEIGHT POINTS. Other fields are listed
//! and skipped (`_` padding fields are not listed). Binary data is little-endian, as PCL
//! writes it. VIEWPOINT is ignored: the points stay in the frame they are stored in.

use std::path::Path;

use super::{
    count_that_fits, shown, words, ColourSource, Decoded, Field, PointLayout, ScanError,
    ScanFormat, TextLines, ValueType, MAX_FILE_BYTES,
};

/// Whether the file starts like a PCD file: a `# .PCD` comment, or VERSION or FIELDS as the
/// first keyword.
pub(crate) fn has_header(bytes: &[u8]) -> bool {
    let head = &bytes[..bytes.len().min(4096)];
    for (_, line) in TextLines::new(head, 0, 1) {
        let line = line.trim_ascii();
        if line.starts_with(b"# .PCD") {
            return true;
        }
        if line.is_empty() || line.starts_with(b"#") {
            continue;
        }
        return matches!(words(line).next(), Some(b"VERSION" | b"FIELDS"));
    }
    false
}

#[derive(Clone, Copy, PartialEq, Eq)]
enum Data {
    Ascii,
    Binary,
    Compressed,
}

struct PcdField {
    name: String,
    ty: ValueType,
    count: usize,
}

struct Header {
    fields: Vec<PcdField>,
    points: usize,
    data: Data,
    body_start: usize,
    body_line: usize,
}

fn parse_header(path: &Path, bytes: &[u8]) -> Result<Header, ScanError> {
    let mut names: Option<(usize, Vec<String>)> = None;
    let mut sizes: Option<(usize, Vec<usize>)> = None;
    let mut types: Option<(usize, Vec<u8>)> = None;
    let mut counts: Option<(usize, Vec<usize>)> = None;
    let (mut width, mut height, mut points) = (None, None, None);
    let mut lines = TextLines::new(bytes, 0, 1);
    while let Some((line_no, line)) = lines.next() {
        let fail = |what: String| ScanError::at_line(path, line_no, what);
        let line = line.trim_ascii();
        if line.is_empty() || line.starts_with(b"#") {
            continue;
        }
        let mut line_words = words(line);
        let keyword = line_words.next().unwrap_or_default();
        let args: Vec<&[u8]> = line_words.collect();
        let numbers = |what: &str| -> Result<Vec<usize>, ScanError> {
            args.iter()
                .map(|a| {
                    std::str::from_utf8(a)
                        .ok()
                        .and_then(|t| t.parse().ok())
                        .ok_or_else(|| {
                            fail(format!("{what}: '{}' is not a whole number", shown(a)))
                        })
                })
                .collect()
        };
        let one = |what: &str| -> Result<usize, ScanError> {
            match numbers(what)?[..] {
                [n] => Ok(n),
                _ => Err(fail(format!("{what} takes one number"))),
            }
        };
        match keyword {
            b"VERSION" => {
                if !matches!(args[..], [b"0.7" | b".7"]) {
                    return Err(fail("this PCD version is not supported (0.7 is)".into()));
                }
            }
            b"FIELDS" => {
                let list = args.iter().map(|a| String::from_utf8_lossy(a).into_owned());
                names = Some((line_no, list.collect()));
            }
            b"SIZE" => sizes = Some((line_no, numbers("SIZE")?)),
            b"TYPE" => {
                let letters = args.iter().map(|a| match a {
                    [c @ (b'I' | b'U' | b'F')] => Ok(*c),
                    _ => Err(fail(format!("TYPE '{}' is not I, U or F", shown(a)))),
                });
                types = Some((line_no, letters.collect::<Result<_, _>>()?));
            }
            b"COUNT" => counts = Some((line_no, numbers("COUNT")?)),
            b"WIDTH" => width = Some(one("WIDTH")?),
            b"HEIGHT" => height = Some(one("HEIGHT")?),
            b"POINTS" => points = Some((line_no, one("POINTS")?)),
            b"VIEWPOINT" => {}
            b"DATA" => {
                let data = match args[..] {
                    [b"ascii"] => Data::Ascii,
                    [b"binary"] => Data::Binary,
                    [b"binary_compressed"] => Data::Compressed,
                    _ => {
                        return Err(fail(
                            "expected 'DATA ascii', 'DATA binary' or 'DATA binary_compressed'"
                                .into(),
                        ))
                    }
                };
                let (names_line, names) = names.ok_or_else(|| fail("no FIELDS line".into()))?;
                let n = names.len();
                let per_field = |what: &str, found: Option<(usize, Vec<usize>)>| {
                    let (at, v) = found.ok_or_else(|| fail(format!("no {what} line")))?;
                    if v.len() != n {
                        return Err(ScanError::at_line(
                            path,
                            at,
                            format!(
                                "{} {what} values for {n} FIELDS (line {names_line})",
                                v.len()
                            ),
                        ));
                    }
                    Ok(v)
                };
                let sizes = per_field("SIZE", sizes)?;
                let types = per_field(
                    "TYPE",
                    types.map(|(at, t)| (at, t.into_iter().map(usize::from).collect())),
                )?;
                let counts = match counts {
                    None => vec![1; n],
                    found => per_field("COUNT", found)?,
                };
                let mut fields = Vec::with_capacity(n);
                for (((name, size), letter), count) in
                    names.into_iter().zip(sizes).zip(types).zip(counts)
                {
                    let ty = match (letter as u8, size) {
                        (b'I', 1) => ValueType::I8,
                        (b'I', 2) => ValueType::I16,
                        (b'I', 4) => ValueType::I32,
                        (b'I', 8) => ValueType::I64,
                        (b'U', 1) => ValueType::U8,
                        (b'U', 2) => ValueType::U16,
                        (b'U', 4) => ValueType::U32,
                        (b'U', 8) => ValueType::U64,
                        (b'F', 4) => ValueType::F32,
                        (b'F', 8) => ValueType::F64,
                        (t, s) => {
                            return Err(fail(format!(
                                "field '{name}': TYPE {} with SIZE {s} is not a PCD type",
                                t as char
                            )))
                        }
                    };
                    fields.push(PcdField { name, ty, count });
                }
                let (points_line, points) = match points {
                    Some(p) => p,
                    None => (line_no, width.unwrap_or(0) * height.unwrap_or(1)),
                };
                if let Some(w) = width {
                    let h = height.unwrap_or(1);
                    if (w as u128) * (h as u128) != points as u128 {
                        return Err(ScanError::at_line(
                            path,
                            points_line,
                            format!("POINTS {points} is not WIDTH {w} x HEIGHT {h}"),
                        ));
                    }
                }
                return Ok(Header {
                    fields,
                    points,
                    data,
                    body_start: lines.position(),
                    body_line: line_no + 1,
                });
            }
            other => {
                return Err(fail(format!(
                    "unknown PCD header keyword '{}'",
                    shown(other)
                )))
            }
        }
    }
    Err(ScanError::at_line(
        path,
        lines.line(),
        "the PCD header ends without a DATA line",
    ))
}

/// Which fields make a point, with `index` the field's number.
fn layout(path: &Path, fields: &[PcdField]) -> Result<PointLayout, ScanError> {
    let find = |name: &str| -> Result<Option<Field>, ScanError> {
        let Some(index) = fields.iter().position(|f| f.name == name) else {
            return Ok(None);
        };
        if fields[index].count == 0 {
            return Err(ScanError::new(
                path,
                None,
                format!("field '{name}' has COUNT 0"),
            ));
        }
        Ok(Some(Field {
            index,
            ty: fields[index].ty,
        }))
    };
    let triple = |names: [&str; 3]| -> Result<Option<[Field; 3]>, ScanError> {
        match [find(names[0])?, find(names[1])?, find(names[2])?] {
            [Some(a), Some(b), Some(c)] => Ok(Some([a, b, c])),
            _ => Ok(None),
        }
    };
    let xyz = triple(["x", "y", "z"])?.ok_or_else(|| {
        ScanError::new(
            path,
            None,
            "the FIELDS line has no x, y and z (x y z are required)",
        )
    })?;
    let colour = match find("rgb")?.or(find("rgba")?) {
        Some(f) if f.ty.size() == 4 => Some(ColourSource::Packed(f)),
        Some(_) => {
            return Err(ScanError::new(
                path,
                None,
                "the rgb / rgba field must be 4 bytes (packed 0x00RRGGBB)",
            ))
        }
        None => None,
    };
    Ok(PointLayout {
        xyz,
        normal: triple(["normal_x", "normal_y", "normal_z"])?,
        colour,
    })
}

pub(crate) fn decode(path: &Path, bytes: &[u8]) -> Result<Decoded, ScanError> {
    let header = parse_header(path, bytes)?;
    let layout = layout(path, &header.fields)?;
    let record: usize = header.fields.iter().map(|f| f.ty.size() * f.count).sum();
    let mut offsets = Vec::with_capacity(header.fields.len());
    let mut at = 0;
    for f in &header.fields {
        offsets.push(at);
        at += f.ty.size() * f.count;
    }
    let start = header.body_start;
    let left = bytes.len() - start;
    let at_body = |m: String| ScanError::at_byte(path, start, m);
    let (format, points) = match header.data {
        Data::Binary => {
            let n =
                count_that_fits("POINTS", header.points as u64, record, left).map_err(at_body)?;
            let mut points = layout.new_cloud(n);
            if record > 0 {
                let region = &bytes[start..start + n * record];
                layout.push_records(&mut points, region, record, &offsets, false);
            }
            (ScanFormat::PcdBinary, points)
        }
        Data::Compressed => {
            let aos = decompress_to_records(bytes, start, &header, record)
                .map_err(|(at, m)| ScanError::at_byte(path, at, m))?;
            let mut points = layout.new_cloud(header.points);
            if record > 0 {
                layout.push_records(&mut points, &aos, record, &offsets, false);
            }
            (ScanFormat::PcdBinaryCompressed, points)
        }
        Data::Ascii => (
            ScanFormat::PcdAscii,
            read_ascii(path, bytes, &header, &layout)?,
        ),
    };
    Ok(Decoded {
        format,
        points,
        properties: header
            .fields
            .iter()
            .filter(|f| f.name != "_")
            .map(|f| f.name.clone())
            .collect(),
        faces: 0,
        triangles: Vec::new(),
    })
}

fn read_ascii(
    path: &Path,
    bytes: &[u8],
    header: &Header,
    layout: &PointLayout,
) -> Result<super::PointCloud, ScanError> {
    let values_per_line: usize = header.fields.iter().map(|f| f.count).sum();
    let mut lines = TextLines::new(bytes, header.body_start, header.body_line);
    let n = count_that_fits(
        "POINTS",
        header.points as u64,
        2 * values_per_line.max(1),
        bytes.len() - header.body_start + 1,
    )
    .map_err(|m| ScanError::at_line(path, header.body_line, m))?;
    let mut points = layout.new_cloud(n);
    // The first value of each field, by field number.
    let mut values = vec![0.0; header.fields.len()];
    for p in 0..n {
        let Some((line_no, line)) = lines.next_nonblank() else {
            return Err(ScanError::at_line(
                path,
                lines.line(),
                format!("the file ends after {p} of the {n} POINTS (a count that disagrees with the data)"),
            ));
        };
        let mut line_words = words(line);
        for (i, field) in header.fields.iter().enumerate() {
            for k in 0..field.count {
                let word = line_words.next().ok_or_else(|| {
                    ScanError::at_line(
                        path,
                        line_no,
                        format!("the line ends before field '{}'", field.name),
                    )
                })?;
                let v = field.ty.parse(word).map_err(|m| {
                    ScanError::at_line(path, line_no, format!("field '{}': {m}", field.name))
                })?;
                if k == 0 {
                    values[i] = v;
                }
            }
        }
        layout.push_values(&mut points, &values);
    }
    Ok(points)
}

/// The body of a `binary_compressed` file, decompressed and turned from one block per field
/// (PCL's layout) into one record per point. Errors carry a byte offset in the file.
fn decompress_to_records(
    bytes: &[u8],
    start: usize,
    header: &Header,
    record: usize,
) -> Result<Vec<u8>, (usize, String)> {
    let word = |at: usize| -> Result<usize, (usize, String)> {
        let b = bytes
            .get(at..at + 4)
            .ok_or((at, "the compressed block's sizes are cut off".to_string()))?;
        Ok(u32::from_le_bytes([b[0], b[1], b[2], b[3]]) as usize)
    };
    let (compressed, uncompressed) = (word(start)?, word(start + 4)?);
    let data_start = start + 8;
    let input = bytes
        .get(data_start..data_start + compressed)
        .ok_or_else(|| {
            (
                start,
                format!(
                    "the compressed block is {compressed} bytes, but only {} bytes follow",
                    bytes.len().saturating_sub(data_start)
                ),
            )
        })?;
    let expected = (header.points as u128) * (record as u128);
    if expected != uncompressed as u128 {
        return Err((
            start,
            format!(
                "the compressed block unpacks to {uncompressed} bytes, but POINTS {} x {record} \
                 bytes a point is {expected}",
                header.points
            ),
        ));
    }
    // LZF turns at most 3 bytes into 264, so more than 88 times the input cannot be real.
    if uncompressed as u64 > (compressed as u64) * 88 || uncompressed as u64 > MAX_FILE_BYTES {
        return Err((
            start,
            format!("{uncompressed} bytes cannot come from {compressed} compressed bytes"),
        ));
    }
    let soa = lzf_decompress(input, uncompressed).map_err(|(at, m)| (data_start + at, m))?;
    let mut aos = vec![0u8; uncompressed];
    let mut block = 0;
    let mut offset_in_record = 0;
    for field in &header.fields {
        let width = field.ty.size() * field.count;
        if width > 0 {
            let column = &soa[block..block + width * header.points];
            for (p, value) in column.chunks_exact(width).enumerate() {
                let at = p * record + offset_in_record;
                aos[at..at + width].copy_from_slice(value);
            }
        }
        block += width * header.points;
        offset_in_record += width;
    }
    Ok(aos)
}

/// LZF decompression, the liblzf format (Marc Lehmann; lzf_d.c) that PCL's binary_compressed
/// uses: a control byte below 32 starts a run of that many plus one literal bytes; any other
/// holds a length in its top 3 bits (7: add the next byte) and, with the next byte, a
/// distance: copy length + 2 bytes starting distance + 1 bytes back in the output (the copy
/// may overlap itself). Output must be exactly `expected` bytes. Errors carry an input offset.
fn lzf_decompress(input: &[u8], expected: usize) -> Result<Vec<u8>, (usize, String)> {
    let mut out = Vec::with_capacity(expected);
    let mut ip = 0;
    let cut = |at: usize| (at, "the compressed data is cut off".to_string());
    let too_long = |at: usize| {
        (
            at,
            format!("the compressed data unpacks to more than {expected} bytes"),
        )
    };
    while ip < input.len() {
        let control = input[ip] as usize;
        ip += 1;
        if control < 32 {
            let n = control + 1;
            let run = input.get(ip..ip + n).ok_or_else(|| cut(ip))?;
            if out.len() + n > expected {
                return Err(too_long(ip));
            }
            out.extend_from_slice(run);
            ip += n;
        } else {
            let mut len = control >> 5;
            if len == 7 {
                len += *input.get(ip).ok_or_else(|| cut(ip))? as usize;
                ip += 1;
            }
            let low = *input.get(ip).ok_or_else(|| cut(ip))? as usize;
            ip += 1;
            let distance = ((control & 0x1f) << 8) + low + 1;
            if distance > out.len() {
                return Err((
                    ip - 1,
                    "a back-reference points before the start of the data".into(),
                ));
            }
            let len = len + 2;
            if out.len() + len > expected {
                return Err(too_long(ip));
            }
            let from = out.len() - distance;
            for k in 0..len {
                let b = out[from + k];
                out.push(b);
            }
        }
    }
    if out.len() != expected {
        return Err((
            input.len(),
            format!(
                "the compressed data unpacks to {} bytes, not {expected}",
                out.len()
            ),
        ));
    }
    Ok(out)
}

#[cfg(test)]
mod tests {
    use super::*;

    fn read(bytes: &[u8]) -> Result<Decoded, ScanError> {
        decode(Path::new("t.pcd"), bytes)
    }

    const HEADER: &str = "# .PCD v0.7 - Point Cloud Data file format\nVERSION 0.7\n\
                          FIELDS x y z rgb _\nSIZE 4 4 4 4 1\nTYPE F F F F U\nCOUNT 1 1 1 1 1\n\
                          WIDTH 2\nHEIGHT 1\nVIEWPOINT 0 0 0 1 0 0 0\nPOINTS 2\n";

    /// Two points (1,2,3) red and (4,5,6) blue; rgb is a float whose bits hold 0x00RRGGBB
    /// (PCL's PointXYZRGB convention).
    fn fields() -> [(f32, f32, f32, u32); 2] {
        [(1.0, 2.0, 3.0, 0x00FF_0000), (4.0, 5.0, 6.0, 0x0000_00FF)]
    }

    #[test]
    fn ascii_binary_and_compressed_agree() {
        let mut ascii = format!("{HEADER}DATA ascii\n");
        let mut binary = format!("{HEADER}DATA binary\n").into_bytes();
        let mut soa = Vec::new();
        for (x, y, z, rgb) in fields() {
            let packed = f32::from_bits(rgb);
            ascii += &format!("{x} {y} {z} {packed:e} 0\n");
            for v in [x, y, z, packed] {
                binary.extend_from_slice(&v.to_le_bytes());
            }
            binary.push(0);
        }
        for column in 0..5 {
            for p in fields() {
                let v = [p.0, p.1, p.2, f32::from_bits(p.3)];
                match v.get(column) {
                    Some(v) => soa.extend_from_slice(&v.to_le_bytes()),
                    None => soa.push(0),
                }
            }
        }
        // One literal run per 32 bytes: valid LZF that the decompressor must undo.
        let mut lzf = Vec::new();
        for chunk in soa.chunks(32) {
            lzf.push(chunk.len() as u8 - 1);
            lzf.extend_from_slice(chunk);
        }
        let mut compressed = format!("{HEADER}DATA binary_compressed\n").into_bytes();
        compressed.extend_from_slice(&(lzf.len() as u32).to_le_bytes());
        compressed.extend_from_slice(&(soa.len() as u32).to_le_bytes());
        compressed.extend_from_slice(&lzf);
        for bytes in [ascii.into_bytes(), binary, compressed] {
            let d = read(&bytes).unwrap();
            assert_eq!(d.points.positions, vec![[1.0, 2.0, 3.0], [4.0, 5.0, 6.0]]);
            assert_eq!(d.points.colors, Some(vec![[255, 0, 0], [0, 0, 255]]));
            assert_eq!(d.properties, ["x", "y", "z", "rgb"]);
        }
    }

    #[test]
    fn lzf_back_references_overlap() {
        // Hand-encoded per the liblzf format: literal "ab" (control 1), then a back-reference
        // of length 3 + 2 = 5 (top bits 011) at distance 0 + 1 + 1 = 2: "ababa".
        let out = lzf_decompress(&[1, b'a', b'b', 0b011_00000, 1], 7).unwrap();
        assert_eq!(out, b"abababa");
        assert!(
            lzf_decompress(&[0b011_00000, 1], 5).is_err(),
            "reference before start"
        );
        assert!(lzf_decompress(&[5, b'a'], 6).is_err(), "cut off");
        assert!(
            lzf_decompress(&[1, b'a', b'b'], 1).is_err(),
            "longer than declared"
        );
    }

    #[test]
    fn header_mistakes_are_named() {
        let cases = [
            ("VERSION 0.7\nFIELDS x y\nSIZE 4 4\nTYPE F F\nWIDTH 1\nPOINTS 1\nDATA ascii\n1 2\n", "no x, y and z"),
            ("VERSION 0.7\nFIELDS x y z\nSIZE 4 4\nTYPE F F F\nWIDTH 1\nPOINTS 1\nDATA ascii\n", "2 SIZE values"),
            ("VERSION 0.7\nFIELDS x y z\nSIZE 4 4 4\nTYPE F F F\nWIDTH 2\nPOINTS 1\nDATA ascii\n", "WIDTH"),
            ("VERSION 0.7\nFIELDS x y z\nSIZE 4 4 4\nTYPE F F F\nWIDTH 2\nPOINTS 2\nDATA ascii\n1.000000 2.000000 3.000000\n", "ends after 1"),
            ("VERSION 0.7\nFIELDS x y z\nSIZE 4 4 3\nTYPE F F F\nWIDTH 1\nPOINTS 1\nDATA ascii\n", "SIZE 3"),
            ("VERSION 0.7\nFIELDS x y z\nSIZE 4 4 4\nTYPE F F F\nWIDTH 1\nPOINTS 1\n", "DATA"),
            ("VERSION 0.7\nFIELDS x y z\nSIZE 4 4 4\nTYPE F F F\nWIDTH 99999\nPOINTS 99999\nDATA binary\n", "POINTS"),
        ];
        for (text, needle) in cases {
            let err = read(text.as_bytes()).err().unwrap();
            assert!(err.what.contains(needle), "{text:?}: {err}");
        }
    }
}
