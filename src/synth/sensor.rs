//! A simulated single-view tabletop depth sensor.
//!
//! The part rests on a table (the plane z = 0 of the table frame) in a settled pose, turned
//! at random about the up axis. A pinhole camera looks down at it from a random viewpoint; the
//! part's triangles are rasterised into a depth buffer (perspective-correct 1/z) and the table
//! plane is intersected per pixel. The table is kept in a band around the part's silhouette
//! (a finite table patch). Each pixel's depth then gets range-dependent noise, some pixels drop
//! out, a few stray points float in front of the table, and everything is back-projected into
//! the camera frame (x right, y down, z along the optical axis, mm): the table is tilted in the
//! output, as in a real scan.

use super::geom::{add, cross, dot, normalize, perpendicular_pair, scale, sub, Rot3, Vec3};
use super::parts::{Mesh, Part};
use super::SynthError;
use crate::rng::Rng;
use crate::scan::PointCloud;

/// How the simulated sensor sees a part. Ranges `[lo, hi]` are drawn uniformly per scan.
///
/// The field of view follows from the framing: the lens zooms so that the part covers a
/// fraction `part_coverage` of the image's pixels, as an inspector frames a part; so point
/// counts depend on the resolution, not on the part's size.
#[derive(Clone, Debug, PartialEq)]
pub struct SensorSettings {
    /// Image width, pixels.
    pub width_px: u32,
    /// Image height, pixels.
    pub height_px: u32,
    /// The sensor's working range: distance from the camera to the part's centre, mm.
    pub distance_mm: [f64; 2],
    /// Distance as a multiple of the part's bounding radius, clamped to `distance_mm`: an
    /// inspector brings the sensor closer to a small part, so a washer's thickness stands out
    /// of the depth noise as a bracket's legs do.
    pub distance_per_radius: [f64; 2],
    /// Angle between the optical axis and the downward vertical, degrees.
    pub tilt_deg: [f64; 2],
    /// Largest roll of the camera about its optical axis, degrees (drawn in +-).
    pub max_roll_deg: f64,
    /// Fraction of the image's pixels the part covers.
    pub part_coverage: [f64; 2],
    /// Width of the table band kept around the part's silhouette, as a fraction of the
    /// silhouette's width (twice its area over its perimeter: a disc's radius, a strip's width),
    /// so the table's share of the points hardly depends on the part's shape.
    pub table_margin: [f64; 2],
    /// Standard deviation of the depth noise at 1 m range, mm; it grows with the square of the
    /// range (common practice for structured-light and time-of-flight sensors; the quadratic
    /// growth is reported for the Kinect by Khoshelham and Elberink, Sensors 12(2), 2012).
    pub noise_at_1m_mm: f64,
    /// Probability that a pixel returns no depth.
    pub dropout: f64,
    /// Surfaces seen further than this from face-on return no depth, degrees.
    pub grazing_limit_deg: f64,
    /// Stray points per scan, floating between the camera and the table.
    pub stray_points: [u32; 2],
}

impl Default for SensorSettings {
    /// Full resolution (640 x 480): about 30k to 60k points a scan.
    fn default() -> Self {
        SensorSettings {
            width_px: 640,
            height_px: 480,
            distance_mm: [150.0, 600.0],
            distance_per_radius: [8.0, 20.0],
            tilt_deg: [25.0, 60.0],
            max_roll_deg: 15.0,
            part_coverage: [0.05, 0.12],
            table_margin: [0.15, 0.35],
            noise_at_1m_mm: 1.5,
            dropout: 0.03,
            grazing_limit_deg: 80.0,
            stray_points: [4, 16],
        }
    }
}

/// Largest image side accepted, pixels (refused before allocating buffers).
const MAX_SIDE_PX: u32 = 4096;

impl SensorSettings {
    /// The settings of the committed `sample-scans/` bundle: 160 x 120 pixels, the part framed
    /// a little larger and the table band a little narrower than by default, so that every scan
    /// keeps well over 1,024 points on the part while the bundle stays a few MB.
    pub fn sample_bundle() -> Self {
        SensorSettings {
            width_px: 160,
            height_px: 120,
            part_coverage: [0.08, 0.12],
            table_margin: [0.1, 0.25],
            ..SensorSettings::default()
        }
    }

    /// Checks every setting; the error names the first one out of range.
    pub fn check(&self) -> Result<(), SynthError> {
        let bad = |name: &'static str, value: String, expected: &'static str| {
            Err(SynthError::InvalidSetting {
                name,
                value,
                expected,
            })
        };
        let range_ok = |r: [f64; 2], lo: f64, hi: f64| {
            r.iter().all(|v| v.is_finite()) && lo <= r[0] && r[0] <= r[1] && r[1] <= hi
        };
        for (name, side) in [("width_px", self.width_px), ("height_px", self.height_px)] {
            if !(16..=MAX_SIDE_PX).contains(&side) {
                return bad(name, side.to_string(), "16 to 4096 pixels");
            }
        }
        let checks: [(&'static str, [f64; 2], f64, f64, &'static str); 5] = [
            (
                "distance_mm",
                self.distance_mm,
                50.0,
                5000.0,
                "lo <= hi within 50 to 5000 mm",
            ),
            (
                "distance_per_radius",
                self.distance_per_radius,
                2.0,
                1000.0,
                "lo <= hi within 2 to 1000 radii",
            ),
            (
                "tilt_deg",
                self.tilt_deg,
                5.0,
                75.0,
                "lo <= hi within 5 to 75 degrees",
            ),
            (
                "part_coverage",
                self.part_coverage,
                0.005,
                0.4,
                "lo <= hi within 0.005 to 0.4",
            ),
            (
                "table_margin",
                self.table_margin,
                0.02,
                2.0,
                "lo <= hi within 0.02 to 2",
            ),
        ];
        for (name, r, lo, hi, expected) in checks {
            if !range_ok(r, lo, hi) {
                return bad(name, format!("{r:?}"), expected);
            }
        }
        let scalars: [(&'static str, f64, f64, f64, &'static str); 4] = [
            (
                "max_roll_deg",
                self.max_roll_deg,
                0.0,
                180.0,
                "0 to 180 degrees",
            ),
            (
                "noise_at_1m_mm",
                self.noise_at_1m_mm,
                0.0,
                100.0,
                "0 to 100 mm",
            ),
            (
                "dropout",
                self.dropout,
                0.0,
                0.9,
                "a probability from 0 to 0.9",
            ),
            (
                "grazing_limit_deg",
                self.grazing_limit_deg,
                10.0,
                90.0,
                "10 to 90 degrees",
            ),
        ];
        for (name, v, lo, hi, expected) in scalars {
            if !(v.is_finite() && lo <= v && v <= hi) {
                return bad(name, v.to_string(), expected);
            }
        }
        let [lo, hi] = self.stray_points;
        if lo > hi || hi > 10_000 {
            return bad(
                "stray_points",
                format!("{:?}", self.stray_points),
                "lo <= hi <= 10000",
            );
        }
        Ok(())
    }
}

/// What a scan point is, known only to the simulation (for tests and ground truth).
#[derive(Clone, Copy, Debug, PartialEq, Eq, Hash)]
pub enum PointLabel {
    Part,
    Table,
    Stray,
}

/// Pinhole intrinsics of one scan: focal lengths and principal point in pixels. A pixel
/// (u, v) (centre at +0.5) sees the ray ((u - cx) / fx, (v - cy) / fy, 1).
#[derive(Clone, Copy, Debug, PartialEq)]
pub struct Intrinsics {
    pub width_px: u32,
    pub height_px: u32,
    pub fx: f64,
    pub fy: f64,
    pub cx: f64,
    pub cy: f64,
}

impl Intrinsics {
    fn ray(&self, x: usize, y: usize) -> Vec3 {
        [
            (x as f64 + 0.5 - self.cx) / self.fx,
            (y as f64 + 0.5 - self.cy) / self.fy,
            1.0,
        ]
    }
}

/// One simulated scan with its ground truth. All in the camera frame, mm.
#[derive(Clone, Debug)]
pub struct Capture {
    pub cloud: PointCloud,
    /// One label per point of `cloud`.
    pub labels: Vec<PointLabel>,
    /// The part mesh as it lay on the table.
    pub part: Mesh,
    /// Unit normal of the table, pointing up (away from the table, towards the camera side).
    pub table_normal: [f64; 3],
    /// The table is the plane dot(table_normal, p) = table_offset (mm).
    pub table_offset: f64,
    pub intrinsics: Intrinsics,
}

/// Fraction of the image's short side the part's bounding sphere spans in the first, measuring
/// render (small, so that render is cheap, yet many pixels across).
const NOMINAL_SPAN: f64 = 0.3;

/// Turns a part into a scan. `rng` draws the pose, the viewpoint and the noise.
pub(crate) fn capture(part: &Part, settings: &SensorSettings, rng: &mut Rng) -> Capture {
    let world = place_on_table(part, rng);
    let (lo, hi) = mesh_bounds(&world);
    let centre = scale(add(lo, hi), 0.5);
    let radius = world
        .iter()
        .map(|v| super::geom::norm(sub(*v, centre)))
        .fold(0.0, f64::max)
        .max(1e-3);

    // Viewpoint: look at the part's centre (jittered) from above, tilted, at a distance.
    let tilt = rng
        .range(settings.tilt_deg[0], settings.tilt_deg[1])
        .to_radians();
    let azimuth = rng.range(0.0, std::f64::consts::TAU);
    let [near, far] = settings
        .distance_per_radius
        .map(|k| (k * radius).clamp(settings.distance_mm[0], settings.distance_mm[1]));
    let distance = rng.range(near, far);
    let roll = rng
        .range(-settings.max_roll_deg, settings.max_roll_deg)
        .to_radians();
    let jitter = [
        rng.range(-0.1, 0.1) * radius,
        rng.range(-0.1, 0.1) * radius,
        0.0,
    ];
    let target = add(centre, jitter);
    let eye = add(
        target,
        scale(
            [
                tilt.sin() * azimuth.cos(),
                tilt.sin() * azimuth.sin(),
                tilt.cos(),
            ],
            distance,
        ),
    );
    let camera = look_at(eye, target, roll);
    let vertices: Vec<Vec3> = world.iter().map(|v| camera.apply(sub(*v, eye))).collect();
    let table_normal = camera.apply([0.0, 0.0, 1.0]);
    let table_offset = -eye[2];

    // Zoom: a first render at a nominal focal length measures the silhouette, then the focal
    // length scales so the part covers the wanted fraction of the image (area goes with f^2).
    let (w, h) = (settings.width_px as usize, settings.height_px as usize);
    let short_side = w.min(h) as f64;
    let focal_for_span = |span: f64| span * short_side * distance / (2.0 * radius);
    let mut intrinsics = Intrinsics {
        width_px: settings.width_px,
        height_px: settings.height_px,
        fx: focal_for_span(NOMINAL_SPAN),
        fy: focal_for_span(NOMINAL_SPAN),
        cx: w as f64 / 2.0,
        cy: h as f64 / 2.0,
    };
    let triangles = &part.mesh.triangles;
    let mut depth = DepthImage::new(w, h);
    depth.rasterise(&vertices, triangles, &intrinsics);
    let nominal_area = depth.covered() as f64;
    let coverage = rng.range(settings.part_coverage[0], settings.part_coverage[1]);
    if nominal_area > 0.0 {
        let zoom = (coverage * (w * h) as f64 / nominal_area).sqrt();
        intrinsics.fx = (intrinsics.fx * zoom).min(focal_for_span(0.8));
        intrinsics.fy = intrinsics.fx;
        depth.clear();
        depth.rasterise(&vertices, triangles, &intrinsics);
    }

    // Which pixels see the part, and which see the table close enough to the part.
    let part_pixels: Vec<bool> = depth.inv_depth.iter().map(|&d| d > 0.0).collect();
    let margin_px = rng.range(settings.table_margin[0], settings.table_margin[1])
        * silhouette_width(&part_pixels, w, h);
    let near_part = within_distance(&part_pixels, w, h, margin_px);

    let strays = stray_pixels(settings, &intrinsics, rng);
    let mut cloud = PointCloud::default();
    let mut labels = Vec::new();
    let cos_grazing = settings.grazing_limit_deg.to_radians().cos();
    let mut next_stray = strays.iter().peekable();
    for y in 0..h {
        for x in 0..w {
            let pixel = y * w + x;
            let stray_here = next_stray.peek().is_some_and(|s| s.0 == pixel);
            if !near_part[pixel] && !stray_here {
                continue; // neither the part nor the table patch: no reading kept
            }
            let ray = intrinsics.ray(x, y);
            let to_table = dot(table_normal, ray);
            let table_depth = if to_table < 0.0 {
                table_offset / to_table
            } else {
                f64::INFINITY
            };
            let inv = depth.inv_depth[pixel];
            let sees_part = inv > 0.0 && 1.0 / (inv as f64) <= table_depth;
            if let Some(&(_, fraction)) = next_stray.next_if(|s| s.0 == pixel) {
                let surface = if sees_part {
                    1.0 / inv as f64
                } else {
                    table_depth.min(distance)
                };
                cloud
                    .positions
                    .push(scale(ray, fraction * surface).map(|c| c as f32));
                labels.push(PointLabel::Stray);
                continue;
            }
            let (label, z, normal) = if sees_part {
                let t = triangles[depth.triangle[pixel] as usize];
                let [a, b, c] = t.map(|i| vertices[i as usize]);
                (
                    PointLabel::Part,
                    1.0 / inv as f64,
                    normalize(cross(sub(b, a), sub(c, a))),
                )
            } else if near_part[pixel] && table_depth.is_finite() {
                (PointLabel::Table, table_depth, table_normal)
            } else {
                continue;
            };
            if rng.uniform() < settings.dropout || dot(normal, normalize(ray)).abs() < cos_grazing {
                continue;
            }
            let sigma = settings.noise_at_1m_mm * (z / 1000.0).powi(2);
            let noisy = z + sigma * rng.normal();
            cloud.positions.push(scale(ray, noisy).map(|c| c as f32));
            labels.push(label);
        }
    }
    Capture {
        cloud,
        labels,
        part: Mesh {
            vertices: vertices.iter().map(|v| v.map(|c| c as f32)).collect(),
            triangles: triangles.clone(),
        },
        table_normal,
        table_offset,
        intrinsics,
    }
}

/// Stray points as (pixel index, fraction of the depth of the surface that pixel sees), sorted
/// by pixel: anywhere in the image, floating well in front of the part or the table.
fn stray_pixels(
    settings: &SensorSettings,
    intrinsics: &Intrinsics,
    rng: &mut Rng,
) -> Vec<(usize, f64)> {
    let [lo, hi] = settings.stray_points;
    let count = lo as usize + rng.below((hi - lo) as usize + 1);
    let pixels = (intrinsics.width_px * intrinsics.height_px) as usize;
    let mut strays: Vec<(usize, f64)> = (0..count)
        .map(|_| (rng.below(pixels), rng.range(0.3, 0.85)))
        .collect();
    strays.sort_by_key(|s| s.0);
    strays.dedup_by_key(|s| s.0);
    strays
}

/// The world-to-camera rotation of a camera at `eye` looking at `target`: z along the view,
/// y towards the bottom of the image (the world's -Z projected), x to the right; then rolled.
fn look_at(eye: Vec3, target: Vec3, roll: f64) -> Rot3 {
    let forward = normalize(sub(target, eye));
    let down = normalize(sub(
        [0.0, 0.0, -1.0],
        scale(forward, dot([0.0, 0.0, -1.0], forward)),
    ));
    let right = cross(down, forward);
    let (s, c) = roll.sin_cos();
    let x = add(scale(right, c), scale(down, s));
    let y = sub(scale(down, c), scale(right, s));
    Rot3 {
        rows: [x, y, forward],
    }
}

/// The part's vertices in the table frame: settled onto one of its rest directions, turned
/// about the up axis, lowest point on the table (z = 0), centre of mass above the origin.
fn place_on_table(part: &Part, rng: &mut Rng) -> Vec<Vec3> {
    let total: f64 = part.rest_directions.iter().map(|r| r.1).sum();
    let mut pick = rng.uniform() * total;
    let mut down = part.rest_directions[0].0;
    for &(direction, weight) in &part.rest_directions {
        down = direction;
        pick -= weight;
        if pick < 0.0 {
            break;
        }
    }
    let centroid = part.mesh.centroid();
    let vertices: Vec<Vec3> = part
        .mesh
        .vertices
        .iter()
        .map(|v| v.map(f64::from))
        .collect();
    let down = settle(&vertices, centroid, normalize(down));
    let rotation = Rot3::about_z(rng.range(0.0, std::f64::consts::TAU))
        .after(&Rot3::taking(down, [0.0, 0.0, -1.0]));
    let c = rotation.apply(centroid);
    let turned: Vec<Vec3> = vertices.iter().map(|v| rotation.apply(*v)).collect();
    let floor = turned.iter().map(|v| v[2]).fold(f64::INFINITY, f64::min);
    turned
        .iter()
        .map(|v| [v[0] - c[0], v[1] - c[1], v[2] - floor])
        .collect()
}

/// Rolls the part from `down` (a unit direction in the part frame pointing at the table) to
/// the nearest pose where its centre of mass sits locally lowest above its lowest point, by a
/// pattern search over directions (steps of 0.3 rad down to 1e-4 rad).
fn settle(vertices: &[Vec3], centroid: Vec3, mut down: Vec3) -> Vec3 {
    let height = |d: Vec3| {
        vertices
            .iter()
            .map(|v| dot(*v, d))
            .fold(f64::NEG_INFINITY, f64::max)
            - dot(centroid, d)
    };
    let mut best = height(down);
    let mut step = 0.3;
    for _ in 0..400 {
        if step < 1e-4 {
            break;
        }
        let (u, v) = perpendicular_pair(down);
        let improved = (0..8)
            .map(|j| {
                let a = std::f64::consts::TAU * j as f64 / 8.0;
                let d = normalize(add(
                    down,
                    scale(add(scale(u, a.cos()), scale(v, a.sin())), step),
                ));
                (height(d), d)
            })
            .filter(|&(h, _)| h < best - 1e-9)
            .min_by(|a, b| a.0.total_cmp(&b.0));
        match improved {
            Some((h, d)) => {
                best = h;
                down = d;
            }
            None => step *= 0.5,
        }
    }
    down
}

fn mesh_bounds(vertices: &[Vec3]) -> (Vec3, Vec3) {
    vertices.iter().fold(
        ([f64::INFINITY; 3], [f64::NEG_INFINITY; 3]),
        |(lo, hi), v| {
            (
                [lo[0].min(v[0]), lo[1].min(v[1]), lo[2].min(v[2])],
                [hi[0].max(v[0]), hi[1].max(v[1]), hi[2].max(v[2])],
            )
        },
    )
}

/// Per pixel, row-major: the nearest surface's inverse depth (1/z in 1/mm, 0 where nothing was
/// hit) and the index of the triangle seen there.
struct DepthImage {
    width: usize,
    height: usize,
    inv_depth: Vec<f32>,
    triangle: Vec<u32>,
}

/// Triangles with a corner closer to the camera than this are skipped (mm).
const NEAR_CLIP_MM: f64 = 1.0;

impl DepthImage {
    fn new(width: usize, height: usize) -> Self {
        DepthImage {
            width,
            height,
            inv_depth: vec![0.0; width * height],
            triangle: vec![0; width * height],
        }
    }

    fn clear(&mut self) {
        self.inv_depth.fill(0.0);
    }

    fn covered(&self) -> usize {
        self.inv_depth.iter().filter(|&&d| d > 0.0).count()
    }

    /// Z-buffers the front faces of a closed mesh given in the camera frame: each triangle's
    /// bounding box is scanned, pixel centres inside it are tested with edge functions, and
    /// 1/z (affine in screen space) is interpolated and kept where nearer.
    fn rasterise(&mut self, vertices: &[Vec3], triangles: &[[u32; 3]], k: &Intrinsics) {
        let (w, h) = (self.width as f64, self.height as f64);
        for (index, t) in triangles.iter().enumerate() {
            let corners = t.map(|i| vertices[i as usize]);
            if corners.iter().any(|p| p[2] < NEAR_CLIP_MM) {
                continue;
            }
            let screen = corners.map(|p| {
                [
                    k.fx * p[0] / p[2] + k.cx,
                    k.fy * p[1] / p[2] + k.cy,
                    1.0 / p[2],
                ]
            });
            let [a, b, c] = screen;
            let area = (b[0] - a[0]) * (c[1] - a[1]) - (b[1] - a[1]) * (c[0] - a[0]);
            // With y down the image, front faces (normals towards the camera) have negative area.
            if area >= 0.0 {
                continue;
            }
            let min_u = a[0].min(b[0]).min(c[0]);
            let max_u = a[0].max(b[0]).max(c[0]);
            let min_v = a[1].min(b[1]).min(c[1]);
            let max_v = a[1].max(b[1]).max(c[1]);
            if max_u < 0.0 || max_v < 0.0 || min_u > w || min_v > h {
                continue;
            }
            let x0 = (min_u - 0.5).ceil().max(0.0) as usize;
            let x1 = ((max_u - 0.5).floor().min(w - 1.0)).max(-1.0) as isize;
            let y0 = (min_v - 0.5).ceil().max(0.0) as usize;
            let y1 = ((max_v - 0.5).floor().min(h - 1.0)).max(-1.0) as isize;
            // Barycentric weights as affine functions of the pixel centre: w = gu u + gv v + g0.
            let weight = |p: [f64; 3], q: [f64; 3]| {
                let gu = -(q[1] - p[1]) / area;
                let gv = (q[0] - p[0]) / area;
                [gu, gv, -(gu * p[0] + gv * p[1])]
            };
            let (ga, gb) = (weight(b, c), weight(c, a));
            for y in y0..(y1 + 1).max(0) as usize {
                let v = y as f64 + 0.5;
                let row = y * self.width;
                let (ra, rb) = (ga[1] * v + ga[2], gb[1] * v + gb[2]);
                for x in x0..(x1 + 1).max(0) as usize {
                    let u = x as f64 + 0.5;
                    let wa = ga[0] * u + ra;
                    let wb = gb[0] * u + rb;
                    let wc = 1.0 - wa - wb;
                    if wa < 0.0 || wb < 0.0 || wc < 0.0 {
                        continue;
                    }
                    let inv = (wa * a[2] + wb * b[2] + wc * c[2]) as f32;
                    if inv > self.inv_depth[row + x] {
                        self.inv_depth[row + x] = inv;
                        self.triangle[row + x] = index as u32;
                    }
                }
            }
        }
    }
}

/// One sweep of the chamfer 3-4 distance transform over a `w` x `h` grid: top-left to
/// bottom-right taking the neighbours already visited (left and the row above), or back.
fn chamfer_pass(d: &mut [u32], w: usize, h: usize, backward: bool) {
    const VISITED_BEFORE: [(isize, isize, u32); 4] =
        [(-1, 0, 3), (-1, -1, 4), (0, -1, 3), (1, -1, 4)];
    let sign = if backward { -1 } else { 1 };
    for step in 0..w * h {
        let i = if backward { w * h - 1 - step } else { step };
        let (x, y) = ((i % w) as isize, (i / w) as isize);
        for (dx, dy, cost) in VISITED_BEFORE {
            let (nx, ny) = (x + sign * dx, y + sign * dy);
            if nx >= 0 && ny >= 0 && (nx as usize) < w && (ny as usize) < h {
                let through = d[ny as usize * w + nx as usize] + cost;
                if through < d[i] {
                    d[i] = through;
                }
            }
        }
    }
}

/// Twice the area over the perimeter of the marked region, pixels: the radius of a disc, the
/// width of a long strip. Perimeter pixels are marked pixels with an unmarked 4-neighbour.
fn silhouette_width(marked: &[bool], w: usize, h: usize) -> f64 {
    let at = |x: usize, y: usize| marked[y * w + x];
    let (mut area, mut perimeter) = (0usize, 0usize);
    for y in 0..h {
        for x in 0..w {
            if !at(x, y) {
                continue;
            }
            area += 1;
            let inner = x > 0 && y > 0 && x + 1 < w && y + 1 < h;
            if !(inner && at(x - 1, y) && at(x + 1, y) && at(x, y - 1) && at(x, y + 1)) {
                perimeter += 1;
            }
        }
    }
    2.0 * area as f64 / perimeter.max(1) as f64
}

/// Pixels within `radius` pixels of a marked pixel (chamfer 3-4 distance transform, which is
/// within 8 % of the Euclidean distance: Borgefors, 1986). Only the window around the marked
/// pixels is transformed.
fn within_distance(marked: &[bool], w: usize, h: usize, radius: f64) -> Vec<bool> {
    let mut near = vec![false; w * h];
    let (mut x0, mut y0, mut x1, mut y1) = (w, h, 0, 0);
    for (i, _) in marked.iter().enumerate().filter(|m| *m.1) {
        let (x, y) = (i % w, i / w);
        (x0, y0, x1, y1) = (x0.min(x), y0.min(y), x1.max(x), y1.max(y));
    }
    if x0 > x1 {
        return near;
    }
    let reach = radius.max(0.0).ceil() as usize + 1;
    let (x0, y0) = (x0.saturating_sub(reach), y0.saturating_sub(reach));
    let (x1, y1) = ((x1 + reach).min(w - 1), (y1 + reach).min(h - 1));
    let (ww, wh) = (x1 - x0 + 1, y1 - y0 + 1);
    const FAR: u32 = u32::MAX / 2;
    let mut d: Vec<u32> = (0..ww * wh)
        .map(|i| {
            if marked[(y0 + i / ww) * w + x0 + i % ww] {
                0
            } else {
                FAR
            }
        })
        .collect();
    chamfer_pass(&mut d, ww, wh, false);
    chamfer_pass(&mut d, ww, wh, true);
    let limit = 3.0 * radius;
    for (i, &dist) in d.iter().enumerate() {
        near[(y0 + i / ww) * w + x0 + i % ww] = f64::from(dist) <= limit;
    }
    near
}

#[cfg(test)]
mod tests {
    use super::super::{parts, PartType};
    use super::*;

    /// Closest point on triangle abc to p (Ericson, Real-Time Collision Detection, 2005, 5.1.5).
    fn distance_to_triangle(p: Vec3, a: Vec3, b: Vec3, c: Vec3) -> f64 {
        let (ab, ac, ap) = (sub(b, a), sub(c, a), sub(p, a));
        let (d1, d2) = (dot(ab, ap), dot(ac, ap));
        let closest = if d1 <= 0.0 && d2 <= 0.0 {
            a
        } else {
            let bp = sub(p, b);
            let (d3, d4) = (dot(ab, bp), dot(ac, bp));
            let cp = sub(p, c);
            let (d5, d6) = (dot(ab, cp), dot(ac, cp));
            let vc = d1 * d4 - d3 * d2;
            let vb = d5 * d2 - d1 * d6;
            let va = d3 * d6 - d5 * d4;
            if d3 >= 0.0 && d4 <= d3 {
                b
            } else if d6 >= 0.0 && d5 <= d6 {
                c
            } else if vc <= 0.0 && d1 >= 0.0 && d3 <= 0.0 {
                add(a, scale(ab, d1 / (d1 - d3)))
            } else if vb <= 0.0 && d2 >= 0.0 && d6 <= 0.0 {
                add(a, scale(ac, d2 / (d2 - d6)))
            } else if va <= 0.0 && (d4 - d3) >= 0.0 && (d5 - d6) >= 0.0 {
                add(b, scale(sub(c, b), (d4 - d3) / ((d4 - d3) + (d5 - d6))))
            } else {
                let denom = 1.0 / (va + vb + vc);
                add(a, add(scale(ab, vb * denom), scale(ac, vc * denom)))
            }
        };
        super::super::geom::norm(sub(p, closest))
    }

    /// Ray-triangle intersection distance along `dir` from the origin (Moller and Trumbore,
    /// "Fast, minimum storage ray-triangle intersection", 1997), either side facing.
    fn ray_hit(dir: Vec3, a: Vec3, b: Vec3, c: Vec3) -> Option<f64> {
        let (e1, e2) = (sub(b, a), sub(c, a));
        let p = cross(dir, e2);
        let det = dot(e1, p);
        if det.abs() < 1e-12 {
            return None;
        }
        let t_vec = scale(a, -1.0);
        let u = dot(t_vec, p) / det;
        let q = cross(t_vec, e1);
        let v = dot(dir, q) / det;
        let t = dot(e2, q) / det;
        (u >= 0.0 && v >= 0.0 && u + v <= 1.0 && t > 0.0).then_some(t)
    }

    fn vertices_of(mesh: &Mesh) -> Vec<Vec3> {
        mesh.vertices.iter().map(|v| v.map(f64::from)).collect()
    }

    #[test]
    fn z_buffer_agrees_with_brute_force_ray_casting() {
        let mut rng = Rng::new(21);
        let part = parts::build(PartType::SpurGear, &mut rng);
        // Tilt the gear and put it 200 mm in front of the camera.
        let turn = Rot3::taking([0.0, 0.0, 1.0], normalize([0.3, -0.5, -1.0]));
        let vertices: Vec<Vec3> = vertices_of(&part.mesh)
            .iter()
            .map(|v| add(turn.apply(*v), [2.0, -3.0, 200.0]))
            .collect();
        let k = Intrinsics {
            width_px: 96,
            height_px: 72,
            fx: 300.0,
            fy: 300.0,
            cx: 48.0,
            cy: 36.0,
        };
        let mut depth = DepthImage::new(96, 72);
        depth.rasterise(&vertices, &part.mesh.triangles, &k);
        let (mut checked, mut disagree) = (0, 0);
        for y in 0..72 {
            for x in 0..96 {
                let ray = k.ray(x, y);
                let nearest = part
                    .mesh
                    .triangles
                    .iter()
                    .filter_map(|t| {
                        let [a, b, c] = t.map(|i| vertices[i as usize]);
                        ray_hit(ray, a, b, c)
                    })
                    .fold(f64::INFINITY, f64::min);
                let inv = depth.inv_depth[y * 96 + x];
                checked += 1;
                match (nearest.is_finite(), inv > 0.0) {
                    (true, true) => {
                        // The ray has z = 1, so its parameter is the depth.
                        assert!((nearest - 1.0 / inv as f64).abs() < 1e-3 * nearest);
                    }
                    (false, false) => {}
                    _ => disagree += 1, // a pixel centre on a silhouette edge
                }
            }
        }
        assert!(depth.covered() > 1000);
        assert!(
            disagree * 500 < checked,
            "{disagree} of {checked} pixels disagree"
        );
    }

    #[test]
    fn points_lie_on_the_part_or_the_table_within_noise() {
        let settings = SensorSettings::sample_bundle();
        for (n, part_type) in PartType::ALL.into_iter().enumerate() {
            let mut rng = Rng::new(100 + n as u64);
            let part = parts::build(part_type, &mut rng);
            let capture = capture(&part, &settings, &mut rng);
            let vertices = vertices_of(&capture.part);
            let count = |l: PointLabel| capture.labels.iter().filter(|&&x| x == l).count();
            let (on_part, on_table, strays) = (
                count(PointLabel::Part),
                count(PointLabel::Table),
                count(PointLabel::Stray),
            );
            let total = capture.cloud.len();
            assert_eq!(capture.labels.len(), total);
            assert!(
                on_part * 10 > total * 4,
                "{part_type}: {on_part} of {total} on the part"
            );
            assert!(
                on_table * 10 > total,
                "{part_type}: {on_table} of {total} on the table"
            );
            assert!(strays <= settings.stray_points[1] as usize);
            let sigma = |p: Vec3| settings.noise_at_1m_mm * (p[2] / 1000.0).powi(2);
            for (i, (p, label)) in capture
                .cloud
                .positions
                .iter()
                .zip(&capture.labels)
                .enumerate()
            {
                let p = p.map(f64::from);
                // Noise moves a point along its ray (|ray| < 1.05 here) by under 5 sigma.
                let tolerance = 5.0 * 1.05 * sigma(p) + 1e-3;
                match label {
                    PointLabel::Table => {
                        let off = dot(capture.table_normal, p) - capture.table_offset;
                        assert!(off.abs() < tolerance, "{part_type}: table point {off} off");
                    }
                    PointLabel::Part if i % 7 == 0 => {
                        let d = capture
                            .part
                            .triangles
                            .iter()
                            .map(|t| {
                                let [a, b, c] = t.map(|j| vertices[j as usize]);
                                distance_to_triangle(p, a, b, c)
                            })
                            .fold(f64::INFINITY, f64::min);
                        assert!(d < tolerance, "{part_type}: part point {d} mm off");
                    }
                    PointLabel::Stray => {
                        let off = dot(capture.table_normal, p) - capture.table_offset;
                        assert!(
                            off > 5.0,
                            "{part_type}: a stray point {off} mm above the table"
                        );
                    }
                    PointLabel::Part => {}
                }
            }
            // The part rests on the table: nothing of it below the plane.
            let lowest = vertices
                .iter()
                .map(|v| dot(capture.table_normal, *v) - capture.table_offset)
                .fold(f64::INFINITY, f64::min);
            assert!(
                lowest.abs() < 1e-3,
                "{part_type}: lowest point {lowest} mm from the table"
            );
        }
    }

    #[test]
    fn a_tilted_washer_settles_flat() {
        let mut rng = Rng::new(4);
        let part = parts::build(PartType::FlatWasher, &mut rng);
        let vertices = vertices_of(&part.mesh);
        let down = settle(&vertices, part.mesh.centroid(), normalize([0.4, 0.1, -1.0]));
        assert!(dot(down, [0.0, 0.0, -1.0]) > (1e-3f64).cos(), "{down:?}");
    }

    #[test]
    fn distance_transform_matches_euclidean_within_chamfer_error() {
        let (w, h) = (41, 37);
        // A pixel in the middle, and one in a corner (its window is cut by the image border).
        for (cx, cy) in [(20, 18), (0, 36)] {
            let mut marked = vec![false; w * h];
            marked[cy * w + cx] = true;
            let near = within_distance(&marked, w, h, 10.0);
            for y in 0..h {
                for x in 0..w {
                    let r =
                        ((x as f64 - cx as f64).powi(2) + (y as f64 - cy as f64).powi(2)).sqrt();
                    // Chamfer 3-4 overestimates the Euclidean distance by at most 8 % (Borgefors).
                    if r <= 10.0 / 1.08 {
                        assert!(near[y * w + x], "({x}, {y}) at {r}");
                    } else if r > 10.0 {
                        assert!(!near[y * w + x], "({x}, {y}) at {r}");
                    }
                }
            }
        }
        assert!(!within_distance(&vec![false; w * h], w, h, 10.0).contains(&true));
    }

    #[test]
    fn each_bad_setting_is_refused_by_name() {
        type Spoil = fn(&mut SensorSettings);
        let cases: [(&str, Spoil); 13] = [
            ("width_px", |s| s.width_px = 0),
            ("height_px", |s| s.height_px = 100_000),
            ("distance_mm", |s| s.distance_mm = [600.0, 250.0]),
            ("distance_per_radius", |s| {
                s.distance_per_radius = [1.0, 20.0]
            }),
            ("tilt_deg", |s| s.tilt_deg = [0.0, 60.0]),
            ("part_coverage", |s| s.part_coverage = [0.1, f64::NAN]),
            ("table_margin", |s| s.table_margin = [0.0, 0.2]),
            ("max_roll_deg", |s| s.max_roll_deg = -1.0),
            ("noise_at_1m_mm", |s| s.noise_at_1m_mm = f64::INFINITY),
            ("dropout", |s| s.dropout = 1.0),
            ("grazing_limit_deg", |s| s.grazing_limit_deg = 95.0),
            ("stray_points", |s| s.stray_points = [5, 2]),
            ("stray_points", |s| s.stray_points = [0, 1_000_000]),
        ];
        assert!(SensorSettings::default().check().is_ok());
        assert!(SensorSettings::sample_bundle().check().is_ok());
        for (name, spoil) in cases {
            let mut s = SensorSettings::default();
            spoil(&mut s);
            match s.check() {
                Err(SynthError::InvalidSetting { name: got, .. }) => assert_eq!(got, name),
                other => panic!("{name}: {other:?}"),
            }
        }
    }
}
