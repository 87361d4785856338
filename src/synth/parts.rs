//! Parametric part meshes of a machine shop's mixed-parts bin, in millimetres.
//!
//! Every part is one closed triangle mesh with outward normals, built by [`grid_solid`]: a
//! grid of cross-sections of torus topology (a loop of columns, each a closed profile), with
//! profile points on an axis merged into one vertex (the cap of a solid part). Turned parts
//! are lathe profiles whose radius may depend on the angle (hexagons, gear teeth, keyways);
//! the elbow sweeps a ring profile along a bent path; the bracket extrudes an L outline.
//! Dimensions sampled per part vary inside each type (sizes, lengths, chamfers, tooth counts).
//! Standard dimensions below are recalled from memory of the named standards, not copied from them.

use std::f64::consts::{FRAC_PI_2, PI, TAU};

use super::geom::{add, cross, dot, normalize, scale, sub, Vec3};
use super::PartType;
use crate::rng::Rng;

/// A closed triangle mesh: vertices in mm, triangles as indices into `vertices`, counter-
/// clockwise seen from outside.
#[derive(Clone, Debug, Default, PartialEq)]
pub struct Mesh {
    pub vertices: Vec<[f32; 3]>,
    pub triangles: Vec<[u32; 3]>,
}

impl Mesh {
    fn corners(&self, t: &[u32; 3]) -> [Vec3; 3] {
        t.map(|i| self.vertices[i as usize].map(f64::from))
    }

    /// Enclosed volume in mm³ by the divergence theorem (sum of signed tetrahedra from the
    /// origin); positive when the normals point outward.
    pub fn signed_volume(&self) -> f64 {
        self.triangles
            .iter()
            .map(|t| {
                let [a, b, c] = self.corners(t);
                dot(a, cross(b, c)) / 6.0
            })
            .sum()
    }

    /// Surface area in mm².
    pub fn area(&self) -> f64 {
        self.triangles
            .iter()
            .map(|t| {
                let [a, b, c] = self.corners(t);
                0.5 * super::geom::norm(cross(sub(b, a), sub(c, a)))
            })
            .sum()
    }

    /// Centre of mass of the enclosed solid (uniform density), mm. Falls back to the vertex
    /// mean for a mesh that encloses no volume.
    pub(crate) fn centroid(&self) -> Vec3 {
        let mut weighted = [0.0; 3];
        let mut volume = 0.0;
        for t in &self.triangles {
            let [a, b, c] = self.corners(t);
            let v = dot(a, cross(b, c)) / 6.0;
            volume += v;
            weighted = add(weighted, scale(add(add(a, b), c), v / 4.0));
        }
        if volume.abs() > 1e-12 {
            scale(weighted, 1.0 / volume)
        } else {
            let sum = self
                .vertices
                .iter()
                .fold([0.0; 3], |s, v| add(s, v.map(f64::from)));
            scale(sum, 1.0 / self.vertices.len().max(1) as f64)
        }
    }
}

/// One part as built: its mesh (part frame, mm) and the directions (part frame, unit) that may
/// point down onto the table when it lies there, with their weights. The sensor lets the part
/// settle from one of them.
pub(crate) struct Part {
    pub mesh: Mesh,
    pub rest_directions: Vec<(Vec3, f64)>,
}

/// Builds a random instance of `part_type` (dimensions drawn from `rng`), in mm.
pub(crate) fn build(part_type: PartType, rng: &mut Rng) -> Part {
    match part_type {
        PartType::HexNutM8 => NutDims::sample(&NUT_M8, rng).part(),
        PartType::HexNutM12 => NutDims::sample(&NUT_M12, rng).part(),
        PartType::FlatWasher => WasherDims::sample(rng).part(),
        PartType::HexBolt => FastenerDims::sample_hex_bolt(rng).part(rng),
        PartType::SocketScrew => FastenerDims::sample_socket_screw(rng).part(rng),
        PartType::AngleBracket => BracketDims::sample(rng).part(),
        PartType::SpurGear => GearDims::sample(rng).part(),
        PartType::PipeElbow => ElbowDims::sample(rng).part(),
        PartType::FlangedBushing => BushingDims::sample(rng).part(rng),
    }
}

const DOWN_Z: Vec3 = [0.0, 0.0, -1.0];
const UP_Z: Vec3 = [0.0, 0.0, 1.0];

/// A random direction perpendicular to the Z axis (a turned part lying on its side).
fn sideways(rng: &mut Rng) -> Vec3 {
    let a = rng.range(0.0, TAU);
    [a.cos(), a.sin(), 0.0]
}

// ---------------------------------------------------------------------------------------------
// Mesh construction

/// Closed surface of torus topology: `columns` cross-sections in a loop, each a closed loop of
/// `on_axis.len()` profile points; `position(i, k)` is point `k` of column `i`. A profile point
/// flagged in `on_axis` is the same for every column and becomes one vertex (a pole).
///
/// Outward normals when the map from (column, profile) to space is orientation preserving:
/// for a lathe, profiles counter-clockwise in the (radius, height) half-plane and columns
/// counter-clockwise about +Z.
fn grid_solid(columns: usize, on_axis: &[bool], position: impl Fn(usize, usize) -> Vec3) -> Mesh {
    let rows = on_axis.len();
    let mut vertices = Vec::new();
    let mut first_index = Vec::with_capacity(rows);
    for (k, &pole) in on_axis.iter().enumerate() {
        first_index.push(vertices.len() as u32);
        let count = if pole { 1 } else { columns };
        vertices.extend((0..count).map(|i| position(i, k).map(|c| c as f32)));
    }
    let index =
        |i: usize, k: usize| first_index[k] + if on_axis[k] { 0 } else { (i % columns) as u32 };
    let mut triangles = Vec::with_capacity(2 * columns * rows);
    for i in 0..columns {
        for k in 0..rows {
            let k1 = (k + 1) % rows;
            let (a, b, c, d) = (index(i, k), index(i + 1, k), index(i + 1, k1), index(i, k1));
            for t in [[a, b, c], [a, c, d]] {
                if t[0] != t[1] && t[1] != t[2] && t[2] != t[0] {
                    triangles.push(t);
                }
            }
        }
    }
    Mesh {
        vertices,
        triangles,
    }
}

/// One column of a lathe: its angle about +Z (radians) and its closed `[radius, height]`
/// profile (mm), counter-clockwise. Radius 0 marks a point on the axis.
struct Section {
    angle: f64,
    profile: Vec<[f64; 2]>,
}

/// A turned part: the sections, in increasing angle over one turn, all with the same number
/// of profile points.
fn lathe(sections: &[Section]) -> Mesh {
    let on_axis: Vec<bool> = sections[0].profile.iter().map(|p| p[0] == 0.0).collect();
    grid_solid(sections.len(), &on_axis, |i, k| {
        let s = &sections[i];
        let [r, z] = s.profile[k];
        [r * s.angle.cos(), r * s.angle.sin(), z]
    })
}

/// A part turned from one profile the same all round, with [`ROUND_STEPS`] columns.
fn round_lathe(profile: &[[f64; 2]]) -> Mesh {
    let sections: Vec<Section> = turn_angles(ROUND_STEPS)
        .map(|angle| Section {
            angle,
            profile: profile.to_vec(),
        })
        .collect();
    lathe(&sections)
}

/// `n` equal steps of a full turn starting at 0.
fn turn_angles(n: usize) -> impl Iterator<Item = f64> {
    (0..n).map(move |i| TAU * i as f64 / n as f64)
}

/// Columns per side of a hexagon (corners included as columns, so flats are exact).
const HEX_STEPS_PER_SIDE: usize = 8;
/// Columns of a round turned part.
const ROUND_STEPS: usize = 64;

/// Distance from the centre to a hexagon's outline at `angle`, for width across flats
/// `across_flats`, with corners at multiples of 60 degrees.
fn hex_radius(across_flats: f64, angle: f64) -> f64 {
    let sector = TAU / 6.0;
    let from_flat_centre = angle.rem_euclid(sector) - sector / 2.0;
    across_flats / 2.0 / from_flat_centre.cos()
}

// ---------------------------------------------------------------------------------------------
// Hex nuts (ISO 4032 style)

/// A metric nut size: thread and the ranges its dimensions are drawn from.
pub(crate) struct NutSize {
    thread_d: f64,
    pitch: f64,
    across_flats: [f64; 2],
    height: [f64; 2],
}

// ISO 4032 (style 1 hex nuts), recalled from memory: M8 width across flats s = 13 mm
// (min 12.73), height m = 6.8 mm (min 6.44); M12 s = 18 mm (min 17.73), m = 10.8 mm (min 10.37).
// Coarse pitches (ISO 261): M8 1.25 mm, M12 1.75 mm.
pub(crate) const NUT_M8: NutSize = NutSize {
    thread_d: 8.0,
    pitch: 1.25,
    across_flats: [12.73, 13.0],
    height: [6.44, 6.8],
};
pub(crate) const NUT_M12: NutSize = NutSize {
    thread_d: 12.0,
    pitch: 1.75,
    across_flats: [17.73, 18.0],
    height: [10.37, 10.8],
};

pub(crate) struct NutDims {
    across_flats: f64,
    height: f64,
    bore_d: f64,
    /// Radial width of the 45 degree countersink at each end of the bore.
    countersink: f64,
    /// Radius of the circle where the corner chamfer cone meets each face.
    bearing_radius: f64,
    /// Corner chamfer angle from the face plane.
    chamfer: f64,
}

impl NutDims {
    pub(crate) fn sample(size: &NutSize, rng: &mut Rng) -> NutDims {
        let s = rng.range(size.across_flats[0], size.across_flats[1]);
        // Minor diameter of the internal thread D1 = D - 1.0825 P (ISO 724 basic profile,
        // recalled from memory), opened a little as thread tolerances allow.
        let bore_d = (size.thread_d - 1.0825 * size.pitch) * rng.range(1.0, 1.03);
        // Countersink diameter between D and 1.08 D (ISO 4032 d_a, recalled from memory).
        let countersink_d = size.thread_d * rng.range(1.0, 1.08);
        NutDims {
            across_flats: s,
            height: rng.range(size.height[0], size.height[1]),
            bore_d,
            countersink: (countersink_d - bore_d) / 2.0,
            // Bearing face diameter d_w about 0.9 s (ISO 4032: M8 11.63 mm min, recalled).
            bearing_radius: s * rng.range(0.45, 0.475),
            chamfer: rng.range(15.0, 30.0f64).to_radians(),
        }
    }

    fn mesh(&self) -> Mesh {
        let (m, rb, cs, rw) = (
            self.height,
            self.bore_d / 2.0,
            self.countersink,
            self.bearing_radius,
        );
        let sections: Vec<Section> = turn_angles(6 * HEX_STEPS_PER_SIDE)
            .map(|angle| {
                let h = hex_radius(self.across_flats, angle);
                let face_r = h.min(rw);
                let zc = (h - rw).max(0.0) * self.chamfer.tan();
                Section {
                    angle,
                    profile: vec![
                        [rb, cs],
                        [rb + cs, 0.0],
                        [face_r, 0.0],
                        [h, zc],
                        [h, m - zc],
                        [face_r, m],
                        [rb + cs, m],
                        [rb, m - cs],
                    ],
                }
            })
            .collect();
        lathe(&sections)
    }

    fn part(&self) -> Part {
        // Flat on either face, or on its side resting on a flat (the middle of side 0).
        let on_flat = [(TAU / 12.0).cos(), (TAU / 12.0).sin(), 0.0];
        Part {
            mesh: self.mesh(),
            rest_directions: vec![(DOWN_Z, 0.45), (UP_Z, 0.45), (on_flat, 0.1)],
        }
    }
}

// ---------------------------------------------------------------------------------------------
// Flat washers (ISO 7089 style)

struct WasherDims {
    inner_d: f64,
    outer_d: f64,
    thickness: f64,
    /// 45 degree chamfer on the outer top edge (0 for none).
    chamfer: f64,
}

impl WasherDims {
    fn sample(rng: &mut Rng) -> WasherDims {
        // ISO 7089 (normal series) d1 / d2 / h for M5, M6, M8, M10, M12, M16, recalled from memory.
        const SIZES: [[f64; 3]; 6] = [
            [5.3, 10.0, 1.0],
            [6.4, 12.0, 1.6],
            [8.4, 16.0, 1.6],
            [10.5, 20.0, 2.0],
            [13.0, 24.0, 2.5],
            [17.0, 30.0, 3.0],
        ];
        let [d1, d2, h] = SIZES[rng.below(SIZES.len())];
        let thickness = h * rng.range(0.9, 1.1);
        let chamfer = if rng.uniform() < 0.5 {
            thickness * rng.range(0.1, 0.3)
        } else {
            0.0
        };
        WasherDims {
            inner_d: d1 * rng.range(0.99, 1.02),
            outer_d: d2 * rng.range(0.97, 1.0),
            thickness,
            chamfer,
        }
    }

    fn mesh(&self) -> Mesh {
        let (ri, ro, t, c) = (
            self.inner_d / 2.0,
            self.outer_d / 2.0,
            self.thickness,
            self.chamfer,
        );
        let profile = vec![[ri, 0.0], [ro, 0.0], [ro, t - c], [ro - c, t], [ri, t]];
        round_lathe(&profile)
    }

    fn part(&self) -> Part {
        Part {
            mesh: self.mesh(),
            rest_directions: vec![(DOWN_Z, 0.5), (UP_Z, 0.5)],
        }
    }
}

// ---------------------------------------------------------------------------------------------
// Hex bolts (ISO 4017 style) and socket head cap screws (ISO 4762 style)

/// The head of a screw-like part.
enum Head {
    /// Hex head: width across flats, height, top chamfer start radius, chamfer angle.
    Hex {
        across_flats: f64,
        height: f64,
        bearing_radius: f64,
        chamfer: f64,
    },
    /// Round head with a hex socket: diameter, height, edge chamfer, socket across flats and depth.
    Socket {
        diameter: f64,
        height: f64,
        edge: f64,
        socket_across_flats: f64,
        socket_depth: f64,
    },
}

/// A screw-like part along +Z: shank from z = -length to 0 (tip chamfered), head above 0.
struct FastenerDims {
    shank_d: f64,
    length: f64,
    tip_chamfer: f64,
    head: Head,
}

impl FastenerDims {
    fn sample_hex_bolt(rng: &mut Rng) -> FastenerDims {
        // ISO 4017 d / s / k for M6, M8, M10, M12, recalled from memory.
        const SIZES: [[f64; 3]; 4] = [
            [6.0, 10.0, 4.0],
            [8.0, 13.0, 5.3],
            [10.0, 16.0, 6.4],
            [12.0, 18.0, 7.5],
        ];
        let [d, s, k] = SIZES[rng.below(SIZES.len())];
        FastenerDims {
            shank_d: d * rng.range(0.97, 1.0),
            length: d * rng.range(2.5, 7.0),
            tip_chamfer: d * rng.range(0.08, 0.15),
            head: Head::Hex {
                across_flats: s * rng.range(0.98, 1.0),
                height: k * rng.range(0.95, 1.05),
                bearing_radius: s * rng.range(0.45, 0.475),
                chamfer: rng.range(15.0, 30.0f64).to_radians(),
            },
        }
    }

    fn sample_socket_screw(rng: &mut Rng) -> FastenerDims {
        // ISO 4762 d / d_k / k / s / t for M4, M5, M6, M8, M10, recalled from memory.
        const SIZES: [[f64; 5]; 5] = [
            [4.0, 7.0, 4.0, 3.0, 2.0],
            [5.0, 8.5, 5.0, 4.0, 2.5],
            [6.0, 10.0, 6.0, 5.0, 3.0],
            [8.0, 13.0, 8.0, 6.0, 4.0],
            [10.0, 16.0, 10.0, 8.0, 5.0],
        ];
        let [d, dk, k, s, t] = SIZES[rng.below(SIZES.len())];
        FastenerDims {
            shank_d: d * rng.range(0.97, 1.0),
            length: d * rng.range(2.0, 6.0),
            tip_chamfer: d * rng.range(0.08, 0.15),
            head: Head::Socket {
                diameter: dk * rng.range(0.98, 1.0),
                height: k * rng.range(0.97, 1.0),
                edge: dk * rng.range(0.04, 0.1),
                socket_across_flats: s * rng.range(1.0, 1.02),
                socket_depth: t * rng.range(1.0, 1.2),
            },
        }
    }

    fn mesh(&self) -> Mesh {
        let (r, l, c) = (self.shank_d / 2.0, self.length, self.tip_chamfer);
        let sections: Vec<Section> = turn_angles(6 * HEX_STEPS_PER_SIDE)
            .map(|angle| {
                let mut profile = vec![[0.0, -l], [r - c, -l], [r, c - l], [r, 0.0]];
                match self.head {
                    Head::Hex {
                        across_flats,
                        height,
                        bearing_radius,
                        chamfer,
                    } => {
                        let h = hex_radius(across_flats, angle);
                        let zc = (h - bearing_radius).max(0.0) * chamfer.tan();
                        profile.extend([
                            [h, 0.0],
                            [h, height - zc],
                            [h.min(bearing_radius), height],
                            [0.0, height],
                        ]);
                    }
                    Head::Socket {
                        diameter,
                        height,
                        edge,
                        socket_across_flats,
                        socket_depth,
                    } => {
                        let rk = diameter / 2.0;
                        let hs = hex_radius(socket_across_flats, angle);
                        // Drill point of 118 degrees below the socket: depth 0.6 x its radius.
                        let point = 0.6 * socket_across_flats / 2.0;
                        profile.extend([
                            [rk, 0.0],
                            [rk, height - edge],
                            [rk - edge, height],
                            [hs, height],
                            [hs, height - socket_depth],
                            [0.0, height - socket_depth - point],
                        ]);
                    }
                }
                Section { angle, profile }
            })
            .collect();
        lathe(&sections)
    }

    /// Mostly lying on its side (it settles onto a head flat, tilted), else standing on its head.
    fn part(&self, rng: &mut Rng) -> Part {
        Part {
            mesh: self.mesh(),
            rest_directions: vec![(sideways(rng), 0.8), (UP_Z, 0.2)],
        }
    }
}

// ---------------------------------------------------------------------------------------------
// Angle brackets

/// An L profile in the XY plane (leg A along +X, leg B along +Y, outer corner at the origin),
/// extruded along +Z.
struct BracketDims {
    leg_a: f64,
    leg_b: f64,
    thickness: f64,
    width: f64,
    inner_fillet: f64,
    outer_radius: f64,
}

/// Chords per rounded corner of the bracket outline.
const ARC_STEPS: usize = 8;

impl BracketDims {
    fn sample(rng: &mut Rng) -> BracketDims {
        let leg_a = rng.range(20.0, 60.0);
        let leg_b = if rng.uniform() < 0.5 {
            leg_a
        } else {
            rng.range(20.0, 60.0)
        };
        let thickness = rng.range(2.0, 5.0);
        BracketDims {
            leg_a,
            leg_b,
            thickness,
            width: rng.range(12.0, 40.0),
            inner_fillet: thickness * rng.range(0.0, 1.5),
            outer_radius: thickness * rng.range(0.0, 0.5),
        }
    }

    /// The L outline, counter-clockwise.
    fn outline(&self) -> Vec<[f64; 2]> {
        let (a, b, t) = (self.leg_a, self.leg_b, self.thickness);
        let (rf, ro) = (self.inner_fillet, self.outer_radius);
        let arc = |centre: [f64; 2], radius: f64, from: f64, to: f64| {
            (0..=ARC_STEPS).map(move |j| {
                let angle = from + (to - from) * j as f64 / ARC_STEPS as f64;
                [
                    centre[0] + radius * angle.cos(),
                    centre[1] + radius * angle.sin(),
                ]
            })
        };
        let mut outline = vec![[a, 0.0], [a, t]];
        outline.extend(arc([t + rf, t + rf], rf, -FRAC_PI_2, -PI));
        outline.extend([[t, b], [0.0, b]]);
        outline.extend(arc([ro, ro], ro, PI, 1.5 * PI));
        outline.dedup_by(|p, q| (p[0] - q[0]).abs() < 1e-9 && (p[1] - q[1]).abs() < 1e-9);
        outline
    }

    fn mesh(&self) -> Mesh {
        let outline = self.outline();
        // The outline is star-shaped about any point of the corner square, so the end caps are
        // fans from its centre.
        let centre = [self.thickness / 2.0, self.thickness / 2.0];
        let w = self.width;
        grid_solid(outline.len(), &[true, false, false, true], |i, k| {
            let p = outline[i % outline.len()];
            match k {
                0 => [centre[0], centre[1], 0.0],
                1 => [p[0], p[1], 0.0],
                2 => [p[0], p[1], w],
                _ => [centre[0], centre[1], w],
            }
        })
    }

    fn part(&self) -> Part {
        Part {
            mesh: self.mesh(),
            rest_directions: vec![
                ([0.0, -1.0, 0.0], 0.3),           // on the outer face of leg A
                ([-1.0, 0.0, 0.0], 0.3),           // on the outer face of leg B
                (normalize([1.0, 1.0, 0.0]), 0.2), // standing on both leg ends
                (DOWN_Z, 0.1),
                (UP_Z, 0.1),
            ],
        }
    }
}

// ---------------------------------------------------------------------------------------------
// Spur gears (involute teeth, 20 degree pressure angle)

struct GearDims {
    module: f64,
    teeth: usize,
    face_width: f64,
    bore_d: f64,
    bore_chamfer: f64,
    /// Hub on the top face: diameter and length.
    hub: Option<[f64; 2]>,
    /// Keyway in the bore, towards +X: width and depth beyond the bore.
    keyway: Option<[f64; 2]>,
}

/// Reference pressure angle of the ISO 53 basic rack (20 degrees).
const PRESSURE_ANGLE: f64 = 20.0 * PI / 180.0;
/// Involute flank samples per flank.
const FLANK_STEPS: usize = 5;

/// The involute function inv(a) = tan a - a.
fn involute(a: f64) -> f64 {
    a.tan() - a
}

impl GearDims {
    fn sample(rng: &mut Rng) -> GearDims {
        const MODULES: [f64; 5] = [1.0, 1.25, 1.5, 2.0, 2.5];
        let module = MODULES[rng.below(MODULES.len())];
        // Tip diameter m (z + 2) kept at 90 mm or less.
        let max_teeth = ((90.0 / module) as usize - 2).min(40);
        let teeth = 14 + rng.below(max_teeth - 14 + 1);
        let root_d = module * (teeth as f64 - 2.5);
        let bore_d = root_d * rng.range(0.2, 0.4);
        let hub = (rng.uniform() < 0.5).then(|| {
            let d = (bore_d * rng.range(1.5, 2.0)).min(root_d - 2.0 * module);
            [d, module * rng.range(3.0, 8.0)]
        });
        let keyway = (rng.uniform() < 0.5).then(|| {
            [
                bore_d * rng.range(0.22, 0.3),
                bore_d * rng.range(0.08, 0.12) + 0.5,
            ]
        });
        GearDims {
            module,
            teeth,
            face_width: module * rng.range(5.0, 10.0),
            bore_d,
            bore_chamfer: bore_d * rng.range(0.02, 0.05),
            hub,
            keyway,
        }
    }

    fn pitch_radius(&self) -> f64 {
        self.module * self.teeth as f64 / 2.0
    }

    /// Tip radius: addendum 1.0 m above the pitch circle (ISO 53 basic rack, recalled from memory).
    fn tip_radius(&self) -> f64 {
        self.pitch_radius() + self.module
    }

    /// Root radius: dedendum 1.25 m below the pitch circle (ISO 53 basic rack, recalled from memory).
    fn root_radius(&self) -> f64 {
        self.pitch_radius() - 1.25 * self.module
    }

    fn base_radius(&self) -> f64 {
        self.pitch_radius() * PRESSURE_ANGLE.cos()
    }

    /// Half the angle a tooth spans at radius `r` (r at least the base radius): the tooth is
    /// half the circular pitch thick at the pitch circle, and its flanks are involutes of the
    /// base circle.
    fn tooth_half_angle(&self, r: f64) -> f64 {
        let a = (self.base_radius() / r).clamp(-1.0, 1.0).acos();
        PI / (2.0 * self.teeth as f64) + involute(PRESSURE_ANGLE) - involute(a)
    }

    /// Lowest radius of the involute flank (below it the flank runs radially to the root).
    fn flank_start(&self) -> f64 {
        self.base_radius().max(self.root_radius())
    }

    /// Radius of the tooth outline at `angle` (a tooth is centred at angle 0).
    fn outline_radius(&self, angle: f64) -> f64 {
        let pitch_angle = TAU / self.teeth as f64;
        let local = (angle + pitch_angle / 2.0).rem_euclid(pitch_angle) - pitch_angle / 2.0;
        let phi = local.abs();
        let (ra, r0) = (self.tip_radius(), self.flank_start());
        if phi <= self.tooth_half_angle(ra) {
            return ra;
        }
        if phi >= self.tooth_half_angle(r0) {
            return self.root_radius();
        }
        // The half angle falls as r grows: bisect for the flank radius.
        let (mut lo, mut hi) = (r0, ra);
        for _ in 0..50 {
            let mid = 0.5 * (lo + hi);
            if self.tooth_half_angle(mid) > phi {
                lo = mid;
            } else {
                hi = mid;
            }
        }
        0.5 * (lo + hi)
    }

    /// Radius of the bore (with its keyway) at `angle`.
    fn bore_radius(&self, angle: f64) -> f64 {
        let rb = self.bore_d / 2.0;
        let Some([width, depth]) = self.keyway else {
            return rb;
        };
        let (s, c) = angle.sin_cos();
        if c <= 0.0 {
            return rb;
        }
        // Exit of the ray from the key slot {|y| <= w/2, 0 <= x <= rb + depth}.
        let to_bottom = (rb + depth) / c;
        let to_side = if s.abs() > 1e-12 {
            (width / 2.0) / s.abs()
        } else {
            f64::INFINITY
        };
        rb.max(to_bottom.min(to_side))
    }

    /// Column angles with their outer radius: the tooth outline sampled so that tips, flanks
    /// and roots are exact, plus the keyway's corners; increasing over one turn from -pitch/2.
    fn columns(&self) -> Vec<(f64, f64)> {
        let z = self.teeth;
        let half_pitch = PI / z as f64;
        let (ra, rf, r0) = (self.tip_radius(), self.root_radius(), self.flank_start());
        let root_edge = self.tooth_half_angle(r0);
        let mut columns = Vec::new();
        for tooth in 0..z {
            let centre = TAU * tooth as f64 / z as f64;
            let mut push = |local: f64, r: f64| columns.push((centre + local, r));
            push(-half_pitch, rf);
            push(-(half_pitch + root_edge) / 2.0, rf);
            let flank: Vec<f64> = (0..=FLANK_STEPS)
                .map(|j| r0 + (ra - r0) * j as f64 / FLANK_STEPS as f64)
                .collect();
            if r0 > rf {
                push(-root_edge, rf);
            }
            for &r in &flank {
                push(-self.tooth_half_angle(r), r);
            }
            push(0.0, ra);
            for &r in flank.iter().rev() {
                push(self.tooth_half_angle(r), r);
            }
            if r0 > rf {
                push(root_edge, rf);
            }
            push((half_pitch + root_edge) / 2.0, rf);
        }
        if let Some([width, depth]) = self.keyway {
            let rb = self.bore_d / 2.0;
            let wall = (width / 2.0 / rb).asin();
            let corner = (width / 2.0).atan2(rb + depth);
            for angle in [-wall, -corner, corner, wall] {
                let angle = (angle + half_pitch).rem_euclid(TAU) - half_pitch;
                columns.push((angle, self.outline_radius(angle)));
            }
            columns.sort_by(|a, b| a.0.total_cmp(&b.0));
        }
        columns
    }

    fn mesh(&self) -> Mesh {
        let (b, c) = (self.face_width, self.bore_chamfer);
        let sections: Vec<Section> = self
            .columns()
            .into_iter()
            .map(|(angle, r_out)| {
                let ri = self.bore_radius(angle);
                let mut profile = vec![[ri, c], [ri + c, 0.0], [r_out, 0.0], [r_out, b]];
                let top = match self.hub {
                    Some([hub_d, hub_length]) => {
                        profile.extend([[hub_d / 2.0, b], [hub_d / 2.0, b + hub_length]]);
                        b + hub_length
                    }
                    None => b,
                };
                profile.extend([[ri + c, top], [ri, top - c]]);
                Section { angle, profile }
            })
            .collect();
        lathe(&sections)
    }

    fn part(&self) -> Part {
        Part {
            mesh: self.mesh(),
            rest_directions: vec![(DOWN_Z, 0.5), (UP_Z, 0.5)],
        }
    }
}

// ---------------------------------------------------------------------------------------------
// Pipe elbows

/// A bent tube: straight stubs of length `straight` either side of an arc of radius
/// `bend_radius` through `bend_angle` (radians), in the XY plane; optional socket ends.
struct ElbowDims {
    outer_d: f64,
    wall: f64,
    bend_radius: f64,
    bend_angle: f64,
    straight: f64,
    /// Socket ends: extra radius of bore and outside, and socket depth.
    socket: Option<[f64; 2]>,
}

/// Columns around the tube and arc samples per radian of bend.
const TUBE_STEPS: usize = 32;
const BEND_STEPS_PER_RADIAN: f64 = 15.0;

impl ElbowDims {
    fn sample(rng: &mut Rng) -> ElbowDims {
        let outer_d = rng.range(12.0, 42.0);
        let wall = outer_d * rng.range(0.06, 0.14);
        let socket = (rng.uniform() < 0.4)
            .then(|| [wall * rng.range(0.8, 1.0), outer_d * rng.range(0.5, 0.8)]);
        let min_straight = socket.map_or(0.0, |[extra, depth]| depth + extra + 1.0);
        ElbowDims {
            outer_d,
            wall,
            bend_radius: outer_d * rng.range(1.0, 1.5),
            bend_angle: if rng.uniform() < 0.8 {
                FRAC_PI_2
            } else {
                PI / 4.0
            },
            straight: min_straight + outer_d * rng.range(0.0, 0.5),
            socket,
        }
    }

    fn path_length(&self) -> f64 {
        2.0 * self.straight + self.bend_radius * self.bend_angle
    }

    /// Centre line point and its unit radial direction in the bend plane at arc length `s`.
    /// The path runs up +Y at x = bend radius, bends about the origin, then runs straight on.
    fn path(&self, s: f64) -> (Vec3, Vec3) {
        let (a, rb, alpha) = (self.straight, self.bend_radius, self.bend_angle);
        let phi = ((s - a) / rb).clamp(0.0, alpha);
        let radial = [phi.cos(), phi.sin(), 0.0];
        let tangent = [-phi.sin(), phi.cos(), 0.0];
        let along = if s < a {
            s - a
        } else {
            (s - a - rb * alpha).max(0.0)
        };
        (add(scale(radial, rb), scale(tangent, along)), radial)
    }

    /// Closed (tube radius, arc length) profile, counter-clockwise.
    fn profile(&self) -> Vec<[f64; 2]> {
        let (ro, ri, total) = (
            self.outer_d / 2.0,
            self.outer_d / 2.0 - self.wall,
            self.path_length(),
        );
        let bend_steps = ((self.bend_angle * BEND_STEPS_PER_RADIAN).ceil() as usize).max(2);
        let bend: Vec<f64> = (0..=bend_steps)
            .map(|j| {
                self.straight + self.bend_radius * self.bend_angle * j as f64 / bend_steps as f64
            })
            .collect();
        let mut outer = Vec::new();
        let mut inner = Vec::new();
        match self.socket {
            None => {
                outer.push([ro, 0.0]);
                outer.extend(bend.iter().map(|&s| [ro, s]));
                outer.push([ro, total]);
                inner.push([ri, 0.0]);
                inner.extend(bend.iter().map(|&s| [ri, s]));
                inner.push([ri, total]);
            }
            Some([extra, depth]) => {
                let (ros, ris) = (ro + extra, ri + extra);
                // Outside: socket, 45 degree shoulder, body, shoulder, socket.
                outer.extend([[ros, 0.0], [ros, depth], [ro, depth + extra]]);
                outer.extend(bend.iter().map(|&s| [ro, s]));
                outer.extend([
                    [ro, total - depth - extra],
                    [ros, total - depth],
                    [ros, total],
                ]);
                // Bore: socket, flat socket bottom, body bore, socket bottom, socket.
                inner.extend([[ris, 0.0], [ris, depth], [ri, depth]]);
                inner.extend(bend.iter().map(|&s| [ri, s]));
                inner.extend([[ri, total - depth], [ris, total - depth], [ris, total]]);
            }
        }
        for side in [&mut outer, &mut inner] {
            side.dedup_by(|p, q| (p[1] - q[1]).abs() < 1e-9 && (p[0] - q[0]).abs() < 1e-9);
        }
        // Counter-clockwise: out along the start face, up the outside, back down the bore.
        let mut profile = outer;
        profile.extend(inner.into_iter().rev());
        profile
    }

    fn mesh(&self) -> Mesh {
        let profile = self.profile();
        let binormal = [0.0, 0.0, -1.0]; // radial x binormal = tangent: a right-handed frame
        grid_solid(TUBE_STEPS, &vec![false; profile.len()], |i, k| {
            let [rho, s] = profile[k];
            let (centre, radial) = self.path(s);
            let phi = TAU * i as f64 / TUBE_STEPS as f64;
            let offset = add(
                scale(radial, rho * phi.cos()),
                scale(binormal, rho * phi.sin()),
            );
            add(centre, offset)
        })
    }

    fn part(&self) -> Part {
        let (_, end_radial) = self.path(self.path_length());
        let end_tangent = cross(end_radial, [0.0, 0.0, -1.0]);
        Part {
            mesh: self.mesh(),
            rest_directions: vec![
                (DOWN_Z, 0.35),
                (UP_Z, 0.35),
                ([0.0, -1.0, 0.0], 0.15), // standing on the start face
                (end_tangent, 0.15),      // standing on the end face
            ],
        }
    }
}

// ---------------------------------------------------------------------------------------------
// Flanged bushings

/// A sleeve with a flange at the bottom (z = 0), bore through.
struct BushingDims {
    bore_d: f64,
    sleeve_d: f64,
    flange_d: f64,
    flange_thickness: f64,
    length: f64,
    /// 45 degree chamfer on the bore ends and the sleeve end (0 for none).
    chamfer: f64,
}

impl BushingDims {
    fn sample(rng: &mut Rng) -> BushingDims {
        let bore_d = rng.range(6.0, 25.0);
        let wall = rng.range(1.0, 3.0);
        let flange_thickness = rng.range(1.5, 4.0);
        BushingDims {
            bore_d,
            sleeve_d: bore_d + 2.0 * wall,
            flange_d: bore_d + 2.0 * wall + rng.range(5.0, 12.0),
            flange_thickness,
            length: flange_thickness + bore_d * rng.range(0.6, 1.8) + 2.0,
            chamfer: wall * rng.range(0.1, 0.3),
        }
    }

    fn mesh(&self) -> Mesh {
        let (r1, r2, r3) = (self.bore_d / 2.0, self.sleeve_d / 2.0, self.flange_d / 2.0);
        let (b2, b1, c) = (self.flange_thickness, self.length, self.chamfer);
        let profile = vec![
            [r1, c],
            [r1 + c, 0.0],
            [r3, 0.0],
            [r3, b2],
            [r2, b2],
            [r2, b1 - c],
            [r2 - c, b1],
            [r1 + c, b1],
            [r1, b1 - c],
        ];
        round_lathe(&profile)
    }

    fn part(&self, rng: &mut Rng) -> Part {
        Part {
            mesh: self.mesh(),
            rest_directions: vec![(DOWN_Z, 0.4), (UP_Z, 0.3), (sideways(rng), 0.3)],
        }
    }
}

#[cfg(test)]
mod tests {
    use super::*;
    use std::collections::HashMap;

    /// Every directed edge used once and its reverse once: each edge is shared by two faces
    /// that agree on orientation, so the mesh is closed and consistently oriented.
    fn assert_closed_and_outward(mesh: &Mesh, what: &str) {
        let mut directed: HashMap<(u32, u32), usize> = HashMap::new();
        for t in &mesh.triangles {
            for e in 0..3 {
                *directed.entry((t[e], t[(e + 1) % 3])).or_default() += 1;
            }
        }
        for (&(a, b), &count) in &directed {
            assert_eq!(count, 1, "{what}: edge {a}-{b} used twice in one direction");
            assert!(
                directed.contains_key(&(b, a)),
                "{what}: edge {a}-{b} has one face"
            );
        }
        assert!(mesh.signed_volume() > 0.0, "{what}: normals point inward");
    }

    /// Area of a regular n-gon of circumradius 1: (n / 2) sin(2 pi / n) (elementary geometry).
    fn ngon_area(n: usize) -> f64 {
        n as f64 / 2.0 * (TAU / n as f64).sin()
    }

    #[test]
    fn every_part_type_is_closed_with_outward_normals_over_many_seeds() {
        let mut rng = Rng::new(11);
        for part_type in PartType::ALL {
            for _ in 0..25 {
                let part = build(part_type, &mut rng);
                assert_closed_and_outward(&part.mesh, part_type.name());
                assert!(part.mesh.vertices.iter().flatten().all(|c| c.is_finite()));
                assert!(part.mesh.triangles.len() < 20_000, "{}", part_type.name());
            }
        }
    }

    // Washer: a regular 64-gon ring, so volume = ngon(64) (R^2 - r^2) t and area = two ring faces
    // plus the sides, perimeter 2 n R sin(pi / n) (elementary geometry); and the 64-gon volume is
    // within 0.2 % of the round washer's pi (R^2 - r^2) t.
    #[test]
    fn washer_volume_and_area_match_closed_formulas() {
        let w = WasherDims {
            inner_d: 8.4,
            outer_d: 16.0,
            thickness: 1.6,
            chamfer: 0.0,
        };
        let mesh = w.mesh();
        assert_closed_and_outward(&mesh, "washer");
        let (r, big_r, t, n) = (4.2, 8.0, 1.6, ROUND_STEPS);
        let volume = ngon_area(n) * (big_r * big_r - r * r) * t;
        assert!((mesh.signed_volume() - volume).abs() < 1e-4 * volume);
        let round = PI * (big_r * big_r - r * r) * t;
        assert!((mesh.signed_volume() - round).abs() < 2e-3 * round);
        let side = |radius: f64| 2.0 * n as f64 * radius * (PI / n as f64).sin() * t;
        let area = 2.0 * ngon_area(n) * (big_r * big_r - r * r) + side(big_r) + side(r);
        assert!((mesh.area() - area).abs() < 1e-4 * area);
    }

    // Nut without chamfers: a hexagonal prism (area (sqrt 3 / 2) s^2) less a 48-gon bore.
    #[test]
    fn plain_nut_volume_matches_hexagonal_prism_less_bore() {
        let (s, m, d) = (13.0, 6.8, 6.65);
        let nut = NutDims {
            across_flats: s,
            height: m,
            bore_d: d,
            countersink: 0.0,
            bearing_radius: s, // beyond the corners: no chamfer
            chamfer: 0.5,
        };
        let expected = m * (3f64.sqrt() / 2.0 * s * s - ngon_area(48) * (d / 2.0).powi(2));
        let v = nut.mesh().signed_volume();
        assert!((v - expected).abs() < 1e-4 * expected, "{v} vs {expected}");
    }

    #[test]
    fn nut_sizes_never_overlap_and_keep_iso_4032_dimensions() {
        let mut rng = Rng::new(5);
        let extent = |size: &NutSize, rng: &mut Rng| {
            let dims = NutDims::sample(size, rng);
            let [lo, hi] = bounds(&dims.mesh());
            (hi[0] - lo[0]).max(hi[1] - lo[1])
        };
        let m8_max = (0..200)
            .map(|_| extent(&NUT_M8, &mut rng))
            .fold(0.0, f64::max);
        let m12_min = (0..200)
            .map(|_| extent(&NUT_M12, &mut rng))
            .fold(f64::MAX, f64::min);
        // Corner to corner e = 2 s / sqrt 3: M8 at most 15.01 mm, M12 at least 20.47 mm.
        assert!(m8_max <= 2.0 * 13.0 / 3f64.sqrt() + 1e-3, "{m8_max}");
        assert!(m12_min >= 2.0 * 17.73 / 3f64.sqrt() * 0.999, "{m12_min}");
    }

    fn bounds(mesh: &Mesh) -> [Vec3; 2] {
        let mut lo = [f64::MAX; 3];
        let mut hi = [f64::MIN; 3];
        for v in &mesh.vertices {
            for a in 0..3 {
                lo[a] = lo[a].min(v[a] as f64);
                hi[a] = hi[a].max(v[a] as f64);
            }
        }
        [lo, hi]
    }

    // Flanged bushing without chamfers: two stacked 64-gon rings.
    #[test]
    fn plain_bushing_volume_matches_two_rings() {
        let b = BushingDims {
            bore_d: 10.0,
            sleeve_d: 14.0,
            flange_d: 22.0,
            flange_thickness: 3.0,
            length: 15.0,
            chamfer: 0.0,
        };
        let (r1, r2, r3) = (5.0f64, 7.0f64, 11.0f64);
        let expected =
            ngon_area(ROUND_STEPS) * ((r3 * r3 - r1 * r1) * 3.0 + (r2 * r2 - r1 * r1) * 12.0);
        let v = b.mesh().signed_volume();
        assert!((v - expected).abs() < 1e-4 * expected, "{v} vs {expected}");
    }

    // L section area t (a + b - t); an inner fillet of radius r adds r^2 (1 - pi / 4), a rounded
    // outer corner removes as much (elementary geometry). Chords make the arcs a little short.
    #[test]
    fn bracket_volume_matches_l_section_times_width() {
        let mut bracket = BracketDims {
            leg_a: 40.0,
            leg_b: 30.0,
            thickness: 4.0,
            width: 20.0,
            inner_fillet: 0.0,
            outer_radius: 0.0,
        };
        let plain = 4.0 * (40.0 + 30.0 - 4.0) * 20.0;
        assert!((bracket.mesh().signed_volume() - plain).abs() < 1e-4 * plain);
        bracket.inner_fillet = 5.0;
        bracket.outer_radius = 2.0;
        let mesh = bracket.mesh();
        assert_closed_and_outward(&mesh, "bracket");
        let rounded = plain + (25.0 - 4.0) * (1.0 - PI / 4.0) * 20.0;
        assert!((mesh.signed_volume() - rounded).abs() < 2e-3 * rounded);
    }

    // Pappus's centroid theorem: a swept ring's volume is its area times the path length of its
    // centroid; here pi (R^2 - r^2) (2 a + R_b alpha), times the 32-gon factor.
    #[test]
    fn elbow_volume_follows_pappus() {
        let elbow = ElbowDims {
            outer_d: 20.0,
            wall: 2.0,
            bend_radius: 25.0,
            bend_angle: FRAC_PI_2,
            straight: 8.0,
            socket: None,
        };
        let mesh = elbow.mesh();
        assert_closed_and_outward(&mesh, "elbow");
        let ring = ngon_area(TUBE_STEPS) * (100.0 - 64.0);
        let expected = ring * (16.0 + 25.0 * FRAC_PI_2);
        let v = mesh.signed_volume();
        assert!((v - expected).abs() < 3e-3 * expected, "{v} vs {expected}");
    }

    // ISO 53 basic rack (recalled from memory): tip diameter m (z + 2), root diameter
    // m (z - 2.5), tooth thickness at the pitch circle half the circular pitch (pi m / 2).
    #[test]
    fn gear_teeth_follow_the_basic_rack() {
        let gear = GearDims {
            module: 2.0,
            teeth: 20,
            face_width: 10.0,
            bore_d: 8.0,
            bore_chamfer: 0.3,
            hub: Some([14.0, 6.0]),
            keyway: Some([2.0, 1.2]),
        };
        let [lo, hi] = bounds(&gear.mesh());
        assert!((hi[0].max(-lo[0]) - 22.0).abs() < 1e-4, "tip radius");
        assert!((hi[2] - lo[2] - 16.0).abs() < 1e-4, "face width plus hub");
        assert!((gear.root_radius() - 17.5).abs() < 1e-12);
        let rp = gear.pitch_radius();
        let half = PI / (2.0 * 20.0); // half the tooth thickness (pi m / 4) over rp
        assert!((gear.tooth_half_angle(rp) - half).abs() < 1e-12);
        assert!(gear.outline_radius(half - 1e-4) > rp);
        assert!(gear.outline_radius(half + 1e-4) < rp);
        // 20 tips: local maxima of the outline around one turn.
        let radii: Vec<f64> = (0..2000)
            .map(|i| gear.outline_radius(TAU * i as f64 / 2000.0))
            .collect();
        let tips = (0..radii.len())
            .filter(|&i| radii[i] == gear.tip_radius() && radii[(i + 1999) % 2000] < radii[i])
            .count();
        assert_eq!(tips, 20);
        // The keyway: bore radius 4 + 1.2 straight ahead, 4 behind.
        assert!((gear.bore_radius(0.0) - 5.2).abs() < 1e-12);
        assert!((gear.bore_radius(PI) - 4.0).abs() < 1e-12);
    }

    #[test]
    fn fastener_lengths_and_heads() {
        let mut rng = Rng::new(3);
        for sample in [
            FastenerDims::sample_hex_bolt,
            FastenerDims::sample_socket_screw,
        ] {
            for _ in 0..20 {
                let f = sample(&mut rng);
                let head_height = match f.head {
                    Head::Hex { height, .. } | Head::Socket { height, .. } => height,
                };
                let [lo, hi] = bounds(&f.mesh());
                assert!((hi[2] - lo[2] - (f.length + head_height)).abs() < 1e-4);
            }
        }
    }
}
