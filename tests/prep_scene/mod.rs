//! Test scenes for the clean-up recipe: a tabletop depth camera of our own, looking down at
//! a box or cylinder on a table, with range noise, dropout, far strays and maybe a second
//! object. Points come out in the camera frame (x right, y down, z forward, mm), so the table
//! is tilted, as in a raw sensor scan. Every point carries the truth of what it hit.
#![allow(dead_code)] // each test file uses a different part of it

use partsift::rng::Rng;

#[derive(Clone, Copy, Debug, PartialEq, Eq)]
pub enum Truth {
    Table,
    Part,
    Other,
    Stray,
}

/// A solid standing on the table (z = 0 in the world frame, mm).
#[derive(Clone, Copy, Debug)]
pub enum Shape {
    /// Centre of the footprint, size (x, y, height), turn about the vertical (degrees).
    Box {
        at: [f64; 2],
        size: [f64; 3],
        yaw_deg: f64,
    },
    Cylinder {
        at: [f64; 2],
        radius: f64,
        height: f64,
    },
}

#[derive(Clone, Debug)]
pub struct Scene {
    pub part: Shape,
    pub other: Option<Shape>,
    /// Camera distance to the table point it looks at (mm) and its elevation (degrees
    /// above the table) and azimuth.
    pub distance: f64,
    pub elevation_deg: f64,
    pub azimuth_deg: f64,
    pub pixels: [usize; 2],
    /// Horizontal field of view (degrees).
    pub fov_deg: f64,
    /// Range noise standard deviation (mm) at 1 m; it grows with range squared, as for
    /// structured-light and stereo sensors (common practice, no source).
    pub noise_at_1m: f64,
    pub dropout: f64,
    pub strays: usize,
    /// Radius of the table top (mm) around the world origin; beyond it the ray is lost.
    pub table_radius: f64,
    pub seed: u64,
}

impl Default for Scene {
    fn default() -> Self {
        Scene {
            part: Shape::Box {
                at: [0.0, 0.0],
                size: [60.0, 40.0, 25.0],
                yaw_deg: 20.0,
            },
            other: None,
            distance: 400.0,
            elevation_deg: 60.0,
            azimuth_deg: 30.0,
            pixels: [320, 320],
            fov_deg: 50.0,
            noise_at_1m: 2.0,
            dropout: 0.05,
            strays: 25,
            table_radius: 600.0,
            seed: 1,
        }
    }
}

pub struct Scan {
    pub points: Vec<[f32; 3]>,
    pub truth: Vec<Truth>,
    /// The table's up direction in the camera frame.
    pub up_in_camera: [f64; 3],
    /// The table plane in the camera frame: `up · p + offset = 0`.
    pub table_offset: f64,
}

fn dot(a: [f64; 3], b: [f64; 3]) -> f64 {
    a[0] * b[0] + a[1] * b[1] + a[2] * b[2]
}

fn cross(a: [f64; 3], b: [f64; 3]) -> [f64; 3] {
    [
        a[1] * b[2] - a[2] * b[1],
        a[2] * b[0] - a[0] * b[2],
        a[0] * b[1] - a[1] * b[0],
    ]
}

fn unit(a: [f64; 3]) -> [f64; 3] {
    let n = dot(a, a).sqrt();
    a.map(|c| c / n)
}

/// Nearest hit distance along the ray `o + t d` (t > 0) with a shape, if any.
fn hit(shape: &Shape, o: [f64; 3], d: [f64; 3]) -> Option<f64> {
    match *shape {
        Shape::Box { at, size, yaw_deg } => {
            // Into the box frame: centre at the origin, axes along the box.
            let (s, c) = (-yaw_deg).to_radians().sin_cos();
            let turn = |v: [f64; 3]| [c * v[0] - s * v[1], s * v[0] + c * v[1], v[2]];
            let lo = turn([o[0] - at[0], o[1] - at[1], o[2] - size[2] / 2.0]);
            let ld = turn(d);
            let half = [size[0] / 2.0, size[1] / 2.0, size[2] / 2.0];
            let (mut t0, mut t1) = (f64::NEG_INFINITY, f64::INFINITY);
            for a in 0..3 {
                if ld[a].abs() < 1e-12 {
                    if lo[a].abs() > half[a] {
                        return None;
                    }
                    continue;
                }
                let (ta, tb) = ((-half[a] - lo[a]) / ld[a], (half[a] - lo[a]) / ld[a]);
                t0 = t0.max(ta.min(tb));
                t1 = t1.min(ta.max(tb));
            }
            (t0 <= t1 && t0 > 0.0).then_some(t0)
        }
        Shape::Cylinder { at, radius, height } => {
            let (ox, oy) = (o[0] - at[0], o[1] - at[1]);
            let mut best: Option<f64> = None;
            let a = d[0] * d[0] + d[1] * d[1];
            let b = 2.0 * (ox * d[0] + oy * d[1]);
            let cc = ox * ox + oy * oy - radius * radius;
            let disc = b * b - 4.0 * a * cc;
            if a > 1e-12 && disc >= 0.0 {
                let t = (-b - disc.sqrt()) / (2.0 * a);
                let z = o[2] + t * d[2];
                if t > 0.0 && (0.0..=height).contains(&z) {
                    best = Some(t);
                }
            }
            if d[2].abs() > 1e-12 {
                let t = (height - o[2]) / d[2];
                let (x, y) = (ox + t * d[0], oy + t * d[1]);
                if t > 0.0 && x * x + y * y <= radius * radius && best.is_none_or(|b| t < b) {
                    best = Some(t);
                }
            }
            best
        }
    }
}

impl Scene {
    pub fn scan(&self) -> Scan {
        let mut rng = Rng::new(self.seed);
        let (el, az) = (
            self.elevation_deg.to_radians(),
            self.azimuth_deg.to_radians(),
        );
        let eye = [
            self.distance * el.cos() * az.cos(),
            self.distance * el.cos() * az.sin(),
            self.distance * el.sin(),
        ];
        // Camera axes in the world: x right, y down, z forward (looking at the origin).
        let forward = unit(eye.map(|c| -c));
        let right = unit(cross(forward, [0.0, 0.0, 1.0]));
        let down = cross(forward, right);
        let [w, h] = self.pixels;
        let focal = (w as f64 / 2.0) / (self.fov_deg.to_radians() / 2.0).tan();
        let mut points = Vec::with_capacity(w * h);
        let mut truth = Vec::with_capacity(w * h);
        for v in 0..h {
            for u in 0..w {
                if rng.uniform() < self.dropout {
                    continue;
                }
                let cam = unit([
                    (u as f64 + 0.5 - w as f64 / 2.0) / focal,
                    (v as f64 + 0.5 - h as f64 / 2.0) / focal,
                    1.0,
                ]);
                let d =
                    [0, 1, 2].map(|a| right[a] * cam[0] + down[a] * cam[1] + forward[a] * cam[2]);
                let mut nearest: Option<(f64, Truth)> = None;
                if d[2] < 0.0 {
                    let t = -eye[2] / d[2];
                    let (x, y) = (eye[0] + t * d[0], eye[1] + t * d[1]);
                    if x * x + y * y <= self.table_radius * self.table_radius {
                        nearest = Some((t, Truth::Table));
                    }
                }
                for (shape, label) in [(Some(self.part), Truth::Part), (self.other, Truth::Other)] {
                    if let Some(t) = shape.and_then(|s| hit(&s, eye, d)) {
                        if nearest.is_none_or(|(n, _)| t < n) {
                            nearest = Some((t, label));
                        }
                    }
                }
                let Some((t, label)) = nearest else { continue };
                let sigma = self.noise_at_1m * (t / 1000.0).powi(2);
                let range = t + sigma * rng.normal();
                points.push(cam.map(|c| (c * range) as f32));
                truth.push(label);
            }
        }
        for _ in 0..self.strays {
            let cam = unit([rng.range(-0.4, 0.4), rng.range(-0.4, 0.4), 1.0]);
            let range = rng.range(50.0, 1500.0);
            points.push(cam.map(|c| (c * range) as f32));
            truth.push(Truth::Stray);
        }
        let up_in_camera = [
            dot(right, [0.0, 0.0, 1.0]),
            dot(down, [0.0, 0.0, 1.0]),
            dot(forward, [0.0, 0.0, 1.0]),
        ];
        // The world origin (on the table) is at `-eye` in camera axes.
        let origin_cam = [
            dot(right, eye.map(|c| -c)),
            dot(down, eye.map(|c| -c)),
            dot(forward, eye.map(|c| -c)),
        ];
        Scan {
            points,
            truth,
            up_in_camera,
            table_offset: -dot(up_in_camera, origin_cam),
        }
    }
}
