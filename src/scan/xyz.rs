//! XYZ text reader: one point a line, values separated by spaces, tabs, commas or semicolons
//! (runs of them count as one); blank lines and lines starting with `#` or `//` are skipped.
//!
//! The first other line may name the columns (any word that is not a number makes it a header
//! line): `x y z` are required, `nx ny nz` and `r g b` / `red green blue` are kept, case
//! ignored, other columns are listed but not read. Without a header the first three columns
//! are x y z and the rest are listed as `column4`, `column5`, ... and not read. A first line
//! holding one whole number alone is a point count (the .pts layout) and is skipped.
//! Colours are 0..255 unless every colour value in the file is within 0..1 (then fractions).

use std::path::Path;

use super::{
    scale_to_u8, shown, Decoded, Field, PointLayout, ScanError, ScanFormat, TextLines, ValueType,
};

fn fields(line: &[u8]) -> impl Iterator<Item = &[u8]> {
    line.split(|&b| matches!(b, b' ' | b'\t' | b',' | b';'))
        .filter(|f| !f.is_empty())
}

fn number(field: &[u8]) -> Option<f64> {
    std::str::from_utf8(field).ok()?.parse().ok()
}

/// Which column holds what.
struct Columns {
    layout: PointLayout,
    colour: Option<[usize; 3]>,
    /// Values a row needs: one past the last column read.
    needed: usize,
    names: Vec<String>,
}

impl Columns {
    fn new(xyz: [usize; 3], normal: Option<[usize; 3]>, colour: Option<[usize; 3]>) -> Self {
        let field = |index| Field {
            index,
            ty: ValueType::F64,
        };
        let needed = xyz
            .iter()
            .chain(normal.iter().flatten())
            .chain(colour.iter().flatten())
            .max()
            .map_or(0, |m| m + 1);
        Columns {
            layout: PointLayout {
                xyz: xyz.map(field),
                normal: normal.map(|n| n.map(field)),
                colour: None,
            },
            colour,
            needed,
            names: Vec::new(),
        }
    }

    fn without_header(count: usize) -> Self {
        let mut columns = Columns::new([0, 1, 2], None, None);
        columns.names = ["x", "y", "z"].map(String::from).to_vec();
        columns
            .names
            .extend((4..=count).map(|c| format!("column{c}")));
        columns
    }

    fn from_header(names: Vec<String>) -> Result<Self, String> {
        let lower: Vec<String> = names.iter().map(|n| n.to_ascii_lowercase()).collect();
        let find = |options: &[&str]| lower.iter().position(|n| options.contains(&n.as_str()));
        let triple = |a: &[&str], b: &[&str], c: &[&str]| Some([find(a)?, find(b)?, find(c)?]);
        let xyz = triple(&["x"], &["y"], &["z"]).ok_or_else(|| {
            format!(
                "the header line names no x, y and z columns (it names: {})",
                names.join(", ")
            )
        })?;
        let normal = triple(&["nx"], &["ny"], &["nz"]);
        let colour = triple(&["r", "red"], &["g", "green"], &["b", "blue"]);
        let mut columns = Columns::new(xyz, normal, colour);
        columns.names = names;
        Ok(columns)
    }
}

pub(crate) fn decode(path: &Path, bytes: &[u8]) -> Result<Decoded, ScanError> {
    let mut columns: Option<Columns> = None;
    let mut points = None;
    let mut raw_colours: Vec<[f32; 3]> = Vec::new();
    let mut values: Vec<f64> = Vec::new();
    let mut first_line = true;
    for (line_no, line) in TextLines::new(bytes, 0, 1) {
        let line = line.trim_ascii();
        if line.is_empty() || line.starts_with(b"#") || line.starts_with(b"//") {
            continue;
        }
        let fail = |what: String| ScanError::at_line(path, line_no, what);
        if std::mem::take(&mut first_line) {
            let words: Vec<&[u8]> = fields(line).collect();
            let is_name = |w: &&[u8]| {
                number(w).is_none()
                    && w.iter()
                        .find(|b| **b != b'"')
                        .is_some_and(|b| b.is_ascii_alphabetic() || *b == b'_')
            };
            if words.iter().all(is_name) {
                let names = words
                    .iter()
                    .map(|w| String::from_utf8_lossy(w).trim_matches('"').to_string())
                    .collect();
                columns = Some(Columns::from_header(names).map_err(fail)?);
                continue;
            }
            if let [count] = words[..] {
                if count.iter().all(u8::is_ascii_digit) {
                    continue; // a .pts point count
                }
            }
        }
        values.clear();
        for (c, field) in fields(line).enumerate() {
            values.push(number(field).ok_or_else(|| {
                fail(format!(
                    "column {}: '{}' is not a number",
                    c + 1,
                    shown(field)
                ))
            })?);
        }
        let columns = columns.get_or_insert_with(|| Columns::without_header(values.len()));
        if values.len() < columns.needed.max(3) {
            return Err(fail(format!(
                "{} values on the line, {} needed ({})",
                values.len(),
                columns.needed.max(3),
                columns.names[..columns.needed.min(columns.names.len())].join(" ")
            )));
        }
        let points = points.get_or_insert_with(|| columns.layout.new_cloud(0));
        columns.layout.push_values(points, &values);
        if let Some(c) = columns.colour {
            raw_colours.push(c.map(|i| values[i] as f32));
        }
    }
    let columns = columns.unwrap_or_else(|| Columns::without_header(3));
    let mut points = points.unwrap_or_else(|| columns.layout.new_cloud(0));
    if columns.colour.is_some() {
        let largest = raw_colours.iter().flatten().fold(0.0f32, |m, &v| m.max(v));
        let full = if largest > 1.0 { 255.0 } else { 1.0 };
        points.colors = Some(
            raw_colours
                .iter()
                .map(|c| c.map(|v| scale_to_u8(v as f64, full)))
                .collect(),
        );
    }
    Ok(Decoded {
        format: ScanFormat::Xyz,
        points,
        properties: columns.names,
        faces: 0,
        triangles: Vec::new(),
    })
}

#[cfg(test)]
mod tests {
    use super::*;

    fn read(text: &str) -> Result<Decoded, ScanError> {
        decode(Path::new("t.xyz"), text.as_bytes())
    }

    #[test]
    fn separators_comments_and_header_names() {
        let d = read(
            "# made by hand\n// another comment\nX;Y;Z;Intensity;Red;Green;Blue\n\
             1;2;3;9;255;0;128\r\n4,5,6,9,0,255,0\n\n7\t8 9 9 0 0 0\n",
        )
        .unwrap();
        assert_eq!(
            d.points.positions,
            vec![[1.0, 2.0, 3.0], [4.0, 5.0, 6.0], [7.0, 8.0, 9.0]]
        );
        assert_eq!(
            d.points.colors,
            Some(vec![[255, 0, 128], [0, 255, 0], [0, 0, 0]])
        );
        assert_eq!(d.properties[3], "Intensity");
    }

    #[test]
    fn columns_can_come_in_any_order_and_colours_as_fractions() {
        let d = read("nz ny nx b g r z y x\n0 0 1 1 0.5 0 3 2 1\n").unwrap();
        assert_eq!(d.points.positions, vec![[1.0, 2.0, 3.0]]);
        assert_eq!(d.points.normals, Some(vec![[1.0, 0.0, 0.0]]));
        assert_eq!(d.points.colors, Some(vec![[0, 128, 255]]));
    }

    #[test]
    fn headerless_extra_columns_are_listed_not_read() {
        let d = read("3\n1 2 3 7 7 7\n4 5 6 7 7 7\n7 8 9 7 7 7\n").unwrap();
        assert_eq!(d.points.len(), 3);
        assert_eq!(d.points.normals, None);
        assert_eq!(
            d.properties,
            ["x", "y", "z", "column4", "column5", "column6"]
        );
    }

    #[test]
    fn bad_text_names_line_and_column() {
        let err = read("1 2 3\n4 five 6\n").err().unwrap();
        assert_eq!(err.location, Some(super::super::Location::Line(2)));
        assert!(err.what.contains("column 2: 'five'"), "{err}");
        let err = read("1 2 3\n4 5\n").err().unwrap();
        assert!(err.what.contains("2 values"), "{err}");
        let err = read("a b c\n1 2 3\n").err().unwrap();
        assert!(err.what.contains("no x, y and z"), "{err}");
        assert!(read("x y z\n1 2 3\nnan 1 1\n").is_ok());
    }
}
