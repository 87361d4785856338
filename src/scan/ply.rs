//! PLY reader, as published in the PLY polygon file format description (Turk, 1994):
//! `ascii 1.0`, `binary_little_endian 1.0` and `binary_big_endian 1.0`, every scalar type in
//! both spellings (char ... double, int8 ... float64), `comment` and `obj_info` lines, and
//! header lines ending in LF, CR LF or CR (the first line sets which).
//!
//! The `vertex` element gives the points (x y z required; nx ny nz and red green blue kept);
//! a `face` element's `vertex_indices` (or `vertex_index`) list gives triangles (polygons as
//! fans). Every other element is skipped: binary records by their size, records with lists by
//! walking their lengths, ascii records one line each.
//!
//! In ascii, each record is one line, as in every example of the format description: values
//! left over at the end of a line are ignored, and so is anything after the last element.

use std::path::Path;

use super::{
    count_that_fits, shown, words, ColourSource, Decoded, Field, PointCloud, PointLayout,
    ScanError, ScanFormat, TextLines, ValueType,
};

#[derive(Clone, Copy, Debug, PartialEq, Eq)]
enum Encoding {
    Ascii,
    BinaryLe,
    BinaryBe,
}

#[derive(Clone, Copy, Debug)]
enum Kind {
    Scalar(ValueType),
    List { count: ValueType, item: ValueType },
}

#[derive(Debug)]
struct Property {
    name: String,
    kind: Kind,
}

#[derive(Debug)]
struct Element {
    name: String,
    count: u64,
    properties: Vec<Property>,
    /// Header line that declared it.
    line: usize,
}

impl Element {
    /// Bytes of one binary record, when it holds no list.
    fn fixed_size(&self) -> Option<usize> {
        self.properties
            .iter()
            .map(|p| match p.kind {
                Kind::Scalar(t) => Some(t.size()),
                Kind::List { .. } => None,
            })
            .sum()
    }

    /// Fewest bytes one binary record can take (every list empty).
    fn min_size(&self) -> usize {
        self.properties
            .iter()
            .map(|p| match p.kind {
                Kind::Scalar(t) | Kind::List { count: t, .. } => t.size(),
            })
            .sum()
    }

    /// Offsets of the properties in a record without lists.
    fn fixed_offsets(&self) -> Vec<usize> {
        let mut at = 0;
        let mut offsets = Vec::with_capacity(self.properties.len());
        for p in &self.properties {
            offsets.push(at);
            at += match p.kind {
                Kind::Scalar(t) | Kind::List { count: t, .. } => t.size(),
            };
        }
        offsets
    }

    fn find(&self, name: &str) -> Option<usize> {
        self.properties.iter().position(|p| p.name == name)
    }
}

struct Header {
    encoding: Encoding,
    elements: Vec<Element>,
    /// Byte offset of the body (just after `end_header` and its line ending).
    body_start: usize,
    /// Line number of the body's first line (ascii).
    body_line: usize,
}

/// Whether the file starts with the PLY magic line `ply` (spaces and tabs around it allowed).
pub(crate) fn has_magic(bytes: &[u8]) -> bool {
    let head = &bytes[..bytes.len().min(64)];
    let end = head
        .iter()
        .position(|&b| b == b'\n' || b == b'\r')
        .unwrap_or(head.len());
    head[..end].trim_ascii() == b"ply"
}

fn scalar_type(name: &[u8]) -> Option<ValueType> {
    Some(match name {
        b"char" | b"int8" => ValueType::I8,
        b"uchar" | b"uint8" => ValueType::U8,
        b"short" | b"int16" => ValueType::I16,
        b"ushort" | b"uint16" => ValueType::U16,
        b"int" | b"int32" => ValueType::I32,
        b"uint" | b"uint32" => ValueType::U32,
        b"float" | b"float32" => ValueType::F32,
        b"double" | b"float64" => ValueType::F64,
        _ => return None,
    })
}

fn find_bytes(haystack: &[u8], needle: &[u8]) -> Option<usize> {
    match needle {
        [one] => haystack.iter().position(|b| b == one),
        _ => haystack.windows(needle.len()).position(|w| w == needle),
    }
}

fn parse_header(path: &Path, bytes: &[u8]) -> Result<Header, ScanError> {
    let fail = |line: usize, what: String| ScanError::at_line(path, line, what);
    // The first line's ending is the header's: a binary body starts right after the
    // `end_header` line, so the ending must be known exactly.
    let first_end = bytes
        .iter()
        .position(|&b| b == b'\n' || b == b'\r')
        .ok_or_else(|| fail(1, "the header has no end_header line".into()))?;
    let (eol, eol_name): (&[u8], &str) = match (bytes[first_end], bytes.get(first_end + 1)) {
        (b'\r', Some(b'\n')) => (b"\r\n", "CR LF"),
        (b'\r', _) => (b"\r", "CR"),
        _ => (b"\n", "LF"),
    };
    let mut pos = first_end + eol.len();
    let mut line_no = 1;
    let mut encoding = None;
    let mut elements: Vec<Element> = Vec::new();
    loop {
        if pos >= bytes.len() {
            return Err(fail(
                line_no,
                "the header ends without an end_header line".into(),
            ));
        }
        line_no += 1;
        let rest = &bytes[pos..];
        let line = match find_bytes(rest, eol) {
            Some(i) => {
                pos += i + eol.len();
                &rest[..i]
            }
            None => {
                pos = bytes.len();
                rest
            }
        };
        if line.iter().any(|&b| b == b'\r' || b == b'\n') {
            return Err(fail(
                line_no,
                format!("mixed line endings in the header (line 1 ends in {eol_name})"),
            ));
        }
        let mut line_words = words(line);
        let Some(keyword) = line_words.next() else {
            continue; // a blank line says nothing
        };
        let args: Vec<&[u8]> = line_words.collect();
        match keyword {
            b"comment" | b"obj_info" => {}
            b"format" => {
                if encoding.is_some() {
                    return Err(fail(line_no, "a second format line".into()));
                }
                let [kind, version] = args[..] else {
                    return Err(fail(
                        line_no,
                        "expected 'format <ascii|binary_little_endian|binary_big_endian> 1.0'"
                            .into(),
                    ));
                };
                encoding = Some(match kind {
                    b"ascii" => Encoding::Ascii,
                    b"binary_little_endian" => Encoding::BinaryLe,
                    b"binary_big_endian" => Encoding::BinaryBe,
                    other => {
                        return Err(fail(
                            line_no,
                            format!(
                                "unknown PLY format '{}' (expected ascii, \
                                 binary_little_endian or binary_big_endian)",
                                shown(other)
                            ),
                        ))
                    }
                });
                if version != b"1.0" {
                    return Err(fail(
                        line_no,
                        format!("PLY version '{}' is not supported (1.0 is)", shown(version)),
                    ));
                }
            }
            b"element" => {
                let [name, count] = args[..] else {
                    return Err(fail(line_no, "expected 'element <name> <count>'".into()));
                };
                let name = String::from_utf8_lossy(name).into_owned();
                if elements.iter().any(|e| e.name == name) {
                    return Err(fail(line_no, format!("element '{name}' is declared twice")));
                }
                let count = parse_count(count)
                    .map_err(|m| fail(line_no, format!("element '{name}': count {m}")))?;
                elements.push(Element {
                    name,
                    count,
                    properties: Vec::new(),
                    line: line_no,
                });
            }
            b"property" => {
                let Some(element) = elements.last_mut() else {
                    return Err(fail(line_no, "a property before any element".into()));
                };
                let property = parse_property(&args).map_err(|m| fail(line_no, m))?;
                if element.find(&property.name).is_some() {
                    return Err(fail(
                        line_no,
                        format!(
                            "element '{}' has property '{}' twice",
                            element.name, property.name
                        ),
                    ));
                }
                element.properties.push(property);
            }
            b"end_header" => {
                if !args.is_empty() {
                    return Err(fail(line_no, "words after end_header".into()));
                }
                let encoding = encoding.ok_or_else(|| fail(line_no, "no format line".into()))?;
                return Ok(Header {
                    encoding,
                    elements,
                    body_start: pos,
                    body_line: line_no + 1,
                });
            }
            other => {
                return Err(fail(
                    line_no,
                    format!("unknown header keyword '{}'", shown(other)),
                ))
            }
        }
    }
}

fn parse_count(word: &[u8]) -> Result<u64, String> {
    if !word.iter().all(u8::is_ascii_digit) {
        return Err(if word.first() == Some(&b'-') {
            format!("'{}' is negative", shown(word))
        } else {
            format!("'{}' is not a whole number", shown(word))
        });
    }
    std::str::from_utf8(word)
        .ok()
        .and_then(|t| t.parse().ok())
        .ok_or_else(|| format!("'{}' is too large", shown(word)))
}

fn parse_property(args: &[&[u8]]) -> Result<Property, String> {
    let known = |t: &[u8]| {
        scalar_type(t).ok_or_else(|| {
            format!(
                "unknown property type '{}' (PLY has char uchar short ushort int uint float \
                 double, also spelt int8 uint8 int16 uint16 int32 uint32 float32 float64)",
                shown(t)
            )
        })
    };
    let (kind, name) = match args {
        [b"list", count, item, name] => {
            let count = known(count)?;
            if !count.is_integer() {
                return Err(format!(
                    "list length type '{}' is not an integer type",
                    count.name()
                ));
            }
            (
                Kind::List {
                    count,
                    item: known(item)?,
                },
                name,
            )
        }
        [b"list", ..] => {
            return Err("expected 'property list <length type> <item type> <name>'".into())
        }
        [ty, name] => (Kind::Scalar(known(ty)?), name),
        _ => return Err("expected 'property <type> <name>'".into()),
    };
    Ok(Property {
        name: String::from_utf8_lossy(name).into_owned(),
        kind,
    })
}

/// What to take from which element.
struct Plan {
    /// The vertex element and how its records make points; `Err` says why there are none.
    /// The body is walked either way, so that its own errors come first.
    vertex: Result<(usize, PointLayout), ScanError>,
    /// Where the faces' vertex indices are, when triangles are wanted.
    faces: Option<FaceList>,
}

#[derive(Clone, Copy)]
struct FaceList {
    element: usize,
    property: usize,
    len_type: ValueType,
    item: ValueType,
}

impl Plan {
    fn vertex_element(&self) -> Option<usize> {
        self.vertex.as_ref().ok().map(|v| v.0)
    }

    fn layout(&self) -> Option<&PointLayout> {
        self.vertex.as_ref().ok().map(|v| &v.1)
    }
}

fn vertex_layout(path: &Path, header: &Header) -> Result<(usize, PointLayout), ScanError> {
    let names: Vec<&str> = header.elements.iter().map(|e| e.name.as_str()).collect();
    let vertex = header
        .elements
        .iter()
        .position(|e| e.name == "vertex")
        .ok_or_else(|| {
            ScanError::new(
                path,
                None,
                format!(
                    "no vertex element, so no x y z (elements: {})",
                    if names.is_empty() {
                        "none".to_string()
                    } else {
                        names.join(", ")
                    }
                ),
            )
        })?;
    let element = &header.elements[vertex];
    let at_vertex = |what: String| ScanError::at_line(path, element.line, what);
    let scalar = |name: &str| -> Result<Option<Field>, ScanError> {
        match element.find(name) {
            None => Ok(None),
            Some(index) => match element.properties[index].kind {
                Kind::Scalar(ty) => Ok(Some(Field { index, ty })),
                Kind::List { .. } => Err(at_vertex(format!(
                    "vertex property '{name}' is a list, not a number"
                ))),
            },
        }
    };
    let triple = |names: [&str; 3]| -> Result<Option<[Field; 3]>, ScanError> {
        match [scalar(names[0])?, scalar(names[1])?, scalar(names[2])?] {
            [Some(a), Some(b), Some(c)] => Ok(Some([a, b, c])),
            _ => Ok(None),
        }
    };
    let xyz = triple(["x", "y", "z"])?.ok_or_else(|| {
        let missing: Vec<&str> = ["x", "y", "z"]
            .into_iter()
            .filter(|n| element.find(n).is_none())
            .collect();
        at_vertex(format!(
            "the vertex element has no {} (x y z are required)",
            missing.join(", ")
        ))
    })?;
    let layout = PointLayout {
        xyz,
        normal: triple(["nx", "ny", "nz"])?,
        colour: triple(["red", "green", "blue"])?.map(ColourSource::Channels),
    };
    Ok((vertex, layout))
}

fn plan(path: &Path, header: &Header, want_triangles: bool) -> Result<Plan, ScanError> {
    let vertex = vertex_layout(path, header);
    let mut faces = None;
    let face = header.elements.iter().position(|e| e.name == "face");
    if let (true, Ok(_), Some(f)) = (want_triangles, &vertex, face) {
        let face = &header.elements[f];
        let list = face
            .find("vertex_indices")
            .or_else(|| face.find("vertex_index"));
        if let Some(p) = list {
            match face.properties[p].kind {
                Kind::List { count, item } if item.is_integer() => {
                    faces = Some(FaceList {
                        element: f,
                        property: p,
                        len_type: count,
                        item,
                    })
                }
                _ => {
                    return Err(ScanError::at_line(
                        path,
                        face.line,
                        format!(
                            "face property '{}' is not a list of integers",
                            face.properties[p].name
                        ),
                    ))
                }
            }
        }
    }
    Ok(Plan { vertex, faces })
}

/// Reads a PLY file; with `want_triangles`, also its faces as triangles.
pub(crate) fn decode(
    path: &Path,
    bytes: &[u8],
    want_triangles: bool,
) -> Result<Decoded, ScanError> {
    let header = parse_header(path, bytes)?;
    let plan = plan(path, &header, want_triangles)?;
    let (points, triangles) = match header.encoding {
        Encoding::Ascii => read_ascii(path, bytes, &header, &plan)?,
        Encoding::BinaryLe => read_binary(path, bytes, &header, &plan, false)?,
        Encoding::BinaryBe => read_binary(path, bytes, &header, &plan, true)?,
    };
    let (vertex, _) = plan.vertex?;
    let vertex = &header.elements[vertex];
    Ok(Decoded {
        format: match header.encoding {
            Encoding::Ascii => ScanFormat::PlyAscii,
            Encoding::BinaryLe => ScanFormat::PlyBinaryLe,
            Encoding::BinaryBe => ScanFormat::PlyBinaryBe,
        },
        points,
        properties: vertex.properties.iter().map(|p| p.name.clone()).collect(),
        faces: header
            .elements
            .iter()
            .find(|e| e.name == "face")
            .map_or(0, |e| e.count as usize),
        triangles,
    })
}

/// Splits a polygon into a fan of triangles as its indices arrive: (first, previous, current).
struct Fan {
    first: u32,
    previous: u32,
    seen: usize,
}

impl Fan {
    fn new() -> Self {
        Fan {
            first: 0,
            previous: 0,
            seen: 0,
        }
    }

    fn push(&mut self, index: u32, triangles: &mut Vec<[u32; 3]>) {
        match self.seen {
            0 => self.first = index,
            1 => {}
            _ => triangles.push([self.first, self.previous, index]),
        }
        self.previous = index;
        self.seen += 1;
    }
}

/// A vertex index checked against the vertex count.
fn vertex_index(index: i64, vertices: u64, face: usize) -> Result<u32, String> {
    if index < 0 || index as u64 >= vertices {
        return Err(format!(
            "face {face} refers to vertex {index}, but the file has {vertices} vertices"
        ));
    }
    Ok(index as u32)
}

fn read_binary(
    path: &Path,
    bytes: &[u8],
    header: &Header,
    plan: &Plan,
    big_endian: bool,
) -> Result<(PointCloud, Vec<[u32; 3]>), ScanError> {
    let fail = |(at, what): (usize, String)| ScanError::at_byte(path, at, what);
    let vertex = plan.vertex_element();
    let vertices = vertex.map_or(0, |v| header.elements[v].count);
    let mut pos = header.body_start;
    let mut points = PointCloud::default();
    let mut triangles = Vec::new();
    for (e, element) in header.elements.iter().enumerate() {
        let count = count_that_fits(
            &format!("element '{}'", element.name),
            element.count,
            element.min_size(),
            bytes.len() - pos,
        )
        .map_err(|m| fail((pos, m)))?;
        let mut offsets = vec![0usize; element.properties.len()];
        if let Some(layout) = plan.layout().filter(|_| vertex == Some(e)) {
            points = layout.new_cloud(count);
            match element.fixed_size() {
                Some(stride) => {
                    let offsets = element.fixed_offsets();
                    let end = pos + count * stride;
                    if stride > 0 {
                        layout.push_records(
                            &mut points,
                            &bytes[pos..end],
                            stride,
                            &offsets,
                            big_endian,
                        );
                    }
                    pos = end;
                }
                None => {
                    for _ in 0..count {
                        let len = walk_record(bytes, pos, element, big_endian, &mut offsets)
                            .map_err(fail)?;
                        let record = &bytes[pos..pos + len];
                        layout.push_binary(&mut points, record, &offsets, big_endian);
                        pos += len;
                    }
                }
            }
        } else if let Some(faces) = plan.faces.filter(|f| f.element == e) {
            let (list, len_type, item) = (faces.property, faces.len_type, faces.item);
            for face in 0..count {
                let len =
                    walk_record(bytes, pos, element, big_endian, &mut offsets).map_err(fail)?;
                let at = pos + offsets[list];
                let n = len_type.read_int(bytes, at, big_endian) as usize;
                let mut fan = Fan::new();
                for k in 0..n {
                    let at = at + len_type.size() + k * item.size();
                    let index = vertex_index(item.read_int(bytes, at, big_endian), vertices, face)
                        .map_err(|m| fail((at, m)))?;
                    fan.push(index, &mut triangles);
                }
                pos += len;
            }
        } else if let Some(size) = element.fixed_size() {
            pos += count * size;
        } else {
            // Records with lists: walk each one's lengths. Every record takes at least one byte
            // (a list length), so this loop ends within the file.
            for _ in 0..count {
                pos += walk_record(bytes, pos, element, big_endian, &mut offsets).map_err(fail)?;
            }
        }
    }
    Ok((points, triangles))
}

/// Walks one binary record starting at byte `at`: writes each property's offset (from `at`)
/// into `offsets` and returns the record's length. Fails with the byte offset and a message
/// when the record runs past the end of the file or a list length is negative.
fn walk_record(
    bytes: &[u8],
    at: usize,
    element: &Element,
    big_endian: bool,
    offsets: &mut [usize],
) -> Result<usize, (usize, String)> {
    let truncated = |here: usize, what: &str| {
        (
            here,
            format!(
                "the file ends inside {what} of element '{}' (it is {} bytes long)",
                element.name,
                bytes.len()
            ),
        )
    };
    let mut len = 0usize;
    for (property, offset) in element.properties.iter().zip(offsets.iter_mut()) {
        *offset = len;
        let here = at + len;
        let left = bytes.len().saturating_sub(here);
        match property.kind {
            Kind::Scalar(t) => {
                if t.size() > left {
                    return Err(truncated(here, &format!("property '{}'", property.name)));
                }
                len += t.size();
            }
            Kind::List { count, item } => {
                if count.size() > left {
                    return Err(truncated(here, &format!("list '{}'", property.name)));
                }
                let n = count.read_int(bytes, here, big_endian);
                if n < 0 {
                    return Err((
                        here,
                        format!(
                            "list '{}' of element '{}' has a negative length {n}",
                            property.name, element.name
                        ),
                    ));
                }
                let items = (n as u128) * (item.size() as u128);
                if items > (left - count.size()) as u128 {
                    return Err(truncated(
                        here,
                        &format!("list '{}' ({n} items)", property.name),
                    ));
                }
                len += count.size() + items as usize;
            }
        }
    }
    Ok(len)
}

fn read_ascii(
    path: &Path,
    bytes: &[u8],
    header: &Header,
    plan: &Plan,
) -> Result<(PointCloud, Vec<[u32; 3]>), ScanError> {
    let vertex = plan.vertex_element();
    let vertices = vertex.map_or(0, |v| header.elements[v].count);
    let mut lines = TextLines::new(bytes, header.body_start, header.body_line);
    let mut points = PointCloud::default();
    let mut triangles = Vec::new();
    let mut values = Vec::new();
    let mut list_items = Vec::new();
    for (e, element) in header.elements.iter().enumerate() {
        if element.properties.is_empty() {
            continue; // such a record holds nothing, not even a line
        }
        // A line holds at least one word per property, each a character and a separator.
        let count = count_that_fits(
            &format!("element '{}'", element.name),
            element.count,
            2 * element.properties.len(),
            bytes.len() - lines.position() + 1,
        )
        .map_err(|m| ScanError::at_line(path, lines.line() + 1, m))?;
        let layout = plan.layout().filter(|_| vertex == Some(e));
        let face_list = plan.faces.filter(|f| f.element == e).map(|f| f.property);
        if let Some(layout) = layout {
            points = layout.new_cloud(count);
        }
        values.resize(element.properties.len(), 0.0);
        for record in 0..count {
            let Some((line_no, line)) = lines.next_nonblank() else {
                return Err(ScanError::at_line(
                    path,
                    lines.line(),
                    format!(
                        "the file ends after {record} of the {count} '{}' lines declared on \
                         line {} (a count that disagrees with the data)",
                        element.name, element.line
                    ),
                ));
            };
            if layout.is_none() && face_list.is_none() {
                continue;
            }
            parse_ascii_record(element, line, &mut values, face_list, &mut list_items)
                .map_err(|m| ScanError::at_line(path, line_no, m))?;
            if let Some(layout) = layout {
                layout.push_values(&mut points, &values);
            } else {
                let mut fan = Fan::new();
                for &index in &list_items {
                    let index = vertex_index(index, vertices, record)
                        .map_err(|m| ScanError::at_line(path, line_no, m))?;
                    fan.push(index, &mut triangles);
                }
            }
        }
    }
    Ok((points, triangles))
}

/// Parses one ascii record: each scalar into `values[property]`, and the items of the list
/// property `keep_list` (if any) into `list_items`. Words after the last property are ignored.
fn parse_ascii_record(
    element: &Element,
    line: &[u8],
    values: &mut [f64],
    keep_list: Option<usize>,
    list_items: &mut Vec<i64>,
) -> Result<(), String> {
    list_items.clear();
    let mut line_words = words(line);
    let mut next = |what: &str, p: &Property| {
        line_words.next().ok_or_else(|| {
            format!(
                "the line ends before {what} '{}' of element '{}'",
                p.name, element.name
            )
        })
    };
    for (i, property) in element.properties.iter().enumerate() {
        let bad = |m: String| format!("{} '{}': {m}", element.name, property.name);
        match property.kind {
            Kind::Scalar(t) => values[i] = t.parse(next("property", property)?).map_err(bad)?,
            Kind::List { count, item } => {
                let n = count.parse(next("list", property)?).map_err(bad)?;
                if n < 0.0 {
                    return Err(bad(format!("negative list length {n}")));
                }
                values[i] = f64::NAN;
                for k in 0..n as usize {
                    let v = item
                        .parse(next("an item of list", property)?)
                        .map_err(|m| bad(format!("item {k}: {m}")))?;
                    if keep_list == Some(i) {
                        list_items.push(v as i64);
                    }
                }
            }
        }
    }
    Ok(())
}

#[cfg(test)]
mod tests {
    use super::*;

    fn decode_bytes(bytes: &[u8]) -> Result<Decoded, ScanError> {
        decode(Path::new("test.ply"), bytes, true)
    }

    fn le_body(header: &str, body: &[u8]) -> Vec<u8> {
        let mut b = header.as_bytes().to_vec();
        b.extend_from_slice(body);
        b
    }

    #[test]
    fn every_scalar_type_reads_in_both_byte_orders() {
        // Values chosen to need every byte of their type; the type names are both spellings
        // listed in the PLY format description (Turk, 1994) and its later int8 ... float64 names.
        let types: [(&str, f64); 16] = [
            ("char", -5.0),
            ("uchar", 250.0),
            ("short", -30_000.0),
            ("ushort", 60_000.0),
            ("int", -2_000_000_000.0),
            ("uint", 4_000_000_000.0),
            ("float", 1.5),
            ("double", -2.25),
            ("int8", 7.0),
            ("uint8", 8.0),
            ("int16", 9.0),
            ("uint16", 10.0),
            ("int32", 11.0),
            ("uint32", 12.0),
            ("float32", 13.5),
            ("float64", 14.5),
        ];
        for big_endian in [false, true] {
            for (name, value) in types {
                let ty = scalar_type(name.as_bytes()).unwrap();
                let mut raw: Vec<u8> = match ty {
                    ValueType::I8 => (value as i8).to_le_bytes().to_vec(),
                    ValueType::U8 => (value as u8).to_le_bytes().to_vec(),
                    ValueType::I16 => (value as i16).to_le_bytes().to_vec(),
                    ValueType::U16 => (value as u16).to_le_bytes().to_vec(),
                    ValueType::I32 => (value as i32).to_le_bytes().to_vec(),
                    ValueType::U32 => (value as u32).to_le_bytes().to_vec(),
                    ValueType::F32 => (value as f32).to_le_bytes().to_vec(),
                    _ => value.to_le_bytes().to_vec(),
                };
                if big_endian {
                    raw.reverse();
                }
                let order = if big_endian { "big" } else { "little" };
                let header = format!(
                    "ply\nformat binary_{order}_endian 1.0\nelement vertex 1\n\
                     property {name} x\nproperty float y\nproperty float z\nend_header\n"
                );
                let mut body = raw;
                for v in [0.0f32, 0.0] {
                    let mut b = v.to_le_bytes();
                    if big_endian {
                        b.reverse();
                    }
                    body.extend_from_slice(&b);
                }
                let d = decode_bytes(&le_body(&header, &body)).unwrap();
                assert_eq!(d.points.positions[0][0], value as f32, "{name} {order}");
            }
        }
    }

    #[test]
    fn list_elements_are_skipped_in_binary() {
        // vertex 2 after an element with two lists (uchar and uint lengths).
        let header = "ply\nformat binary_little_endian 1.0\nelement junk 2\n\
                      property list uchar short a\nproperty float f\nproperty list uint uchar b\n\
                      element vertex 2\nproperty float x\nproperty float y\nproperty float z\n\
                      end_header\n";
        let mut body = Vec::new();
        for n in [3u8, 0] {
            body.push(n);
            body.extend(std::iter::repeat_n(0xAB, 2 * n as usize));
            body.extend_from_slice(&9.0f32.to_le_bytes());
            body.extend_from_slice(&(n as u32 + 1).to_le_bytes());
            body.extend(std::iter::repeat_n(0xCD, n as usize + 1));
        }
        for v in [1.0f32, 2.0, 3.0, 4.0, 5.0, 6.0] {
            body.extend_from_slice(&v.to_le_bytes());
        }
        let d = decode_bytes(&le_body(header, &body)).unwrap();
        assert_eq!(d.points.positions, vec![[1.0, 2.0, 3.0], [4.0, 5.0, 6.0]]);
    }

    #[test]
    fn header_line_endings_cr_lf_crlf_all_read() {
        for eol in ["\n", "\r\n", "\r"] {
            let text = ["ply", "format ascii 1.0", "comment c", "obj_info o"]
                .into_iter()
                .chain(["element vertex 2", "property float x", "property float y"])
                .chain(["property float z", "end_header", "1 2 3", "4 5 6", ""])
                .collect::<Vec<_>>()
                .join(eol);
            let d = decode_bytes(text.as_bytes()).unwrap();
            assert_eq!(d.points.positions, vec![[1.0, 2.0, 3.0], [4.0, 5.0, 6.0]]);
        }
    }

    #[test]
    fn binary_body_after_cr_header_starts_with_a_newline_byte() {
        // A CR header followed by a body whose first byte is 0x0A: the body must start right
        // after "end_header\r", not after the 0x0A.
        let header = "ply\rformat binary_little_endian 1.0\relement vertex 1\r\
                      property uchar x\rproperty uchar y\rproperty uchar z\rend_header\r";
        let d = decode_bytes(&le_body(header, &[10, 20, 30])).unwrap();
        assert_eq!(d.points.positions, vec![[10.0, 20.0, 30.0]]);
    }

    #[test]
    fn normals_and_colours_are_kept_and_scaled() {
        let text = "ply\nformat ascii 1.0\nelement vertex 1\nproperty float x\n\
                    property float y\nproperty float z\nproperty float nx\nproperty float ny\n\
                    property float nz\nproperty ushort red\nproperty float green\n\
                    property uchar blue\nproperty uchar alpha\nend_header\n\
                    1 2 3 0 0 1 65535 0.5 7 9\n";
        let d = decode_bytes(text.as_bytes()).unwrap();
        assert_eq!(d.points.normals, Some(vec![[0.0, 0.0, 1.0]]));
        assert_eq!(d.points.colors, Some(vec![[255, 128, 7]]));
        assert_eq!(
            d.properties,
            ["x", "y", "z", "nx", "ny", "nz", "red", "green", "blue", "alpha"]
        );
    }

    #[test]
    fn polygons_become_fans_and_bad_indices_name_the_face() {
        let text = "ply\nformat ascii 1.0\nelement vertex 4\nproperty float x\n\
                    property float y\nproperty float z\nelement face 2\n\
                    property list uchar int vertex_index\nend_header\n\
                    0 0 0\n1 0 0\n1 1 0\n0 1 0\n4 0 1 2 3\n3 0 2 7\n";
        let err = decode_bytes(text.as_bytes()).err().unwrap();
        assert_eq!(err.location, Some(super::super::Location::Line(15)));
        assert!(err.what.contains("face 1 refers to vertex 7"), "{err}");
        let ok = text.replace("3 0 2 7", "3 0 2 3");
        let d = decode_bytes(ok.as_bytes()).unwrap();
        assert_eq!(d.triangles, vec![[0, 1, 2], [0, 2, 3], [0, 2, 3]]);
        assert_eq!(d.faces, 2);
    }

    #[test]
    fn header_mistakes_name_their_line() {
        let cases = [
            (
                "ply\nformat ascii 1.0\nelement vertex -3\nend_header\n",
                3,
                "negative",
            ),
            ("ply\nformat ascii 2.0\nend_header\n", 2, "version"),
            (
                "ply\nformat ascii 1.0\nproperty float x\nend_header\n",
                3,
                "before any element",
            ),
            (
                "ply\nformat ascii 1.0\nelement v 1\nproperty bool b\nend_header\n",
                4,
                "bool",
            ),
            (
                "ply\nformat ascii 1.0\nelement v 1\nproperty list float int b\n",
                4,
                "integer",
            ),
            (
                "ply\nformat ascii 1.0\rend_header\n",
                2,
                "mixed line endings",
            ),
            (
                "ply\nformat ascii 1.0\nelement v 99999999999999999999999\n",
                3,
                "too large",
            ),
            ("ply\nformat ascii 1.0\n", 2, "end_header"),
            ("ply\nend_header\n", 2, "no format"),
            (
                "ply\nformat ascii 1.0\nelement p 1\nproperty float x\nend_header\n1\n",
                0,
                "no vertex",
            ),
        ];
        for (text, line, needle) in cases {
            let err = decode_bytes(text.as_bytes()).err().unwrap();
            if line > 0 {
                assert_eq!(
                    err.location,
                    Some(super::super::Location::Line(line)),
                    "{err}"
                );
            }
            assert!(err.what.contains(needle), "{text:?}: {err}");
        }
    }

    #[test]
    fn binary_errors_name_the_byte() {
        let header = "ply\nformat binary_little_endian 1.0\nelement face 1\n\
                      property list int uchar l\nelement vertex 1\nproperty float x\n\
                      property float y\nproperty float z\nend_header\n";
        let start = header.len();
        let mut body = (-1i32).to_le_bytes().to_vec();
        body.extend_from_slice(&[0; 12]);
        let err = decode_bytes(&le_body(header, &body)).err().unwrap();
        assert_eq!(
            err.location,
            Some(super::super::Location::Byte(start as u64))
        );
        assert!(err.what.contains("negative length"), "{err}");
        // A list length reaching past the end of the file.
        let mut body = 1000i32.to_le_bytes().to_vec();
        body.extend_from_slice(&[0; 12]);
        let err = decode_bytes(&le_body(header, &body)).err().unwrap();
        assert!(err.what.contains("ends inside list"), "{err}");
    }
}
