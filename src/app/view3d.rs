//! The 3D point view: an orbit [`Camera`], a [`Cloud3d`] (positions in mm, optionally what the
//! recipe did with each point and how much each point drove the verdict), and a [`PointView`]
//! that paints the cloud as one `egui::Mesh` (a small screen-space square per point, sorted
//! far to near) and turns mouse input into camera moves.
//!
//! Mouse: drag = orbit; right- or middle-drag, or shift-drag = pan; wheel = zoom toward the
//! pointer; double-click = reset the view. Two views can share one camera: pass the same
//! `&mut Camera` to both.
//!
//! The mesh is rebuilt only when the camera, the view size, the point size or the colouring
//! changes; otherwise the previous frame's mesh is painted again (an `Arc`, no copy on our side).

use eframe::egui;
use std::sync::atomic::{AtomicU64, Ordering};
use std::sync::{Arc, OnceLock};

use super::palette::oklch;
use egui::epaint::{Mesh, Vertex, WHITE_UV};
use egui::{Color32, Pos2, Rect, Response, Sense, Shape, Ui, Vec2};
use partsift::scan::PointCloud;

/// Vertical field of view of the perspective camera.
const FOV_Y: f32 = 40.0 * std::f32::consts::PI / 180.0;
/// The view a reset starts from: a three-quarter view from above (Z is up).
const HOME_YAW: f32 = -55.0 * std::f32::consts::PI / 180.0;
const HOME_PITCH: f32 = 25.0 * std::f32::consts::PI / 180.0;
/// Pitch stops short of straight up / down so "up" on screen stays defined.
const MAX_PITCH: f32 = 89.0 * std::f32::consts::PI / 180.0;
/// Radians of orbit per point of mouse drag.
const ORBIT_PER_POINT: f32 = 0.008;
/// Zoom factor per point of wheel scroll (exponential, so in and out are symmetric).
const ZOOM_PER_POINT: f32 = 0.0015;
/// Far-to-near ordering uses a counting sort on depth quantised to this many steps: O(n), and
/// finer than any visible overlap of points a few pixels wide.
const DEPTH_BUCKETS: usize = 4096;
/// While the camera moves, at most about this many points are drawn (every k-th point), so
/// orbiting a large scan stays fluid; the full cloud is drawn once the camera rests. egui
/// copies every vertex each frame (about 20 ms for 200k points on a busy 2-core machine), so
/// the mesh size is what limits the frame rate.
const POINTS_WHILE_MOVING: usize = 50_000;
/// How much darker the farthest point is than the nearest: a cheap depth cue.
const DEPTH_SHADE: f32 = 0.45;

// ---------------------------------------------------------------------------------------------
// Small vector maths on [f32; 3].

fn sub(a: [f32; 3], b: [f32; 3]) -> [f32; 3] {
    [a[0] - b[0], a[1] - b[1], a[2] - b[2]]
}
fn add(a: [f32; 3], b: [f32; 3]) -> [f32; 3] {
    [a[0] + b[0], a[1] + b[1], a[2] + b[2]]
}
fn scale(a: [f32; 3], s: f32) -> [f32; 3] {
    [a[0] * s, a[1] * s, a[2] * s]
}
fn dot(a: [f32; 3], b: [f32; 3]) -> f32 {
    a[0] * b[0] + a[1] * b[1] + a[2] * b[2]
}
fn cross(a: [f32; 3], b: [f32; 3]) -> [f32; 3] {
    [
        a[1] * b[2] - a[2] * b[1],
        a[2] * b[0] - a[0] * b[2],
        a[0] * b[1] - a[1] * b[0],
    ]
}
fn length(a: [f32; 3]) -> f32 {
    dot(a, a).sqrt()
}

// ---------------------------------------------------------------------------------------------
// Camera.

/// An orbit camera around a target point, Z up. Units are those of the cloud (mm).
/// A camera that is not framed yet frames the first cloud it is drawn with.
#[derive(Clone, Copy, Debug, PartialEq)]
pub(crate) struct Camera {
    target: [f32; 3],
    /// Eye to target, mm.
    distance: f32,
    /// Angle about +Z of the eye as seen from the target, radians.
    yaw: f32,
    /// Elevation of the eye above the target's horizontal plane, radians.
    pitch: f32,
    /// Radius of the framed bounds: sets the zoom limits.
    scene_radius: f32,
    fit: Fit,
}

/// Whether the camera still has to frame what it is drawn with.
#[derive(Clone, Copy, Debug, PartialEq)]
enum Fit {
    Done,
    /// Frame the next cloud, keeping the direction the user chose.
    KeepDirection,
    /// Frame the next cloud from the home direction.
    Home,
}

impl Default for Camera {
    fn default() -> Self {
        Camera {
            target: [0.0; 3],
            distance: 1.0,
            yaw: HOME_YAW,
            pitch: HOME_PITCH,
            scene_radius: 1.0,
            fit: Fit::Home,
        }
    }
}

impl Camera {
    /// Forgets the framing: the next draw frames its cloud from the home direction.
    pub(crate) fn reset(&mut self) {
        self.fit = Fit::Home;
    }

    /// The next draw frames its cloud, looking from where the camera looks now.
    fn refit(&mut self) {
        if self.fit == Fit::Done {
            self.fit = Fit::KeepDirection;
        }
    }

    /// Frames `bounds` as [`Camera::frame`] does, keeping the direction unless a reset asked
    /// for the home direction.
    fn fit_to(&mut self, bounds: [[f32; 3]; 2], aspect: f32) {
        let (yaw, pitch) = (self.yaw, self.pitch);
        let keep = self.fit == Fit::KeepDirection;
        self.frame(bounds, aspect);
        if keep {
            (self.yaw, self.pitch) = (yaw, pitch);
        }
    }

    /// Looks at the centre of `bounds` (mm, `[min, max]`) from the home direction, just far
    /// enough that the bounding sphere fits a view of width / height `aspect`.
    pub(crate) fn frame(&mut self, bounds: [[f32; 3]; 2], aspect: f32) {
        let [lo, hi] = bounds;
        let radius = (0.5 * length(sub(hi, lo))).max(1e-3);
        let half_fov_y = 0.5 * FOV_Y;
        let half_fov_x = (half_fov_y.tan() * aspect.max(1e-3)).atan();
        let half_fov = half_fov_y.min(half_fov_x);
        *self = Camera {
            target: scale(add(lo, hi), 0.5),
            distance: radius / half_fov.sin(),
            yaw: HOME_YAW,
            pitch: HOME_PITCH,
            scene_radius: radius,
            fit: Fit::Done,
        };
    }

    /// Where the eye is, mm.
    pub(crate) fn eye(&self) -> [f32; 3] {
        let (sy, cy) = self.yaw.sin_cos();
        let (sp, cp) = self.pitch.sin_cos();
        add(self.target, scale([cp * cy, cp * sy, sp], self.distance))
    }

    /// The projection for a view occupying `rect` (screen points).
    pub(crate) fn projector(&self, rect: Rect) -> Projector {
        let eye = self.eye();
        let forward = scale(sub(self.target, eye), 1.0 / self.distance);
        // |forward x Z| = cos(pitch) > 0 because pitch is kept within +-89 degrees.
        let right = cross(forward, [0.0, 0.0, 1.0]);
        let right = scale(right, 1.0 / length(right));
        let up = cross(right, forward);
        Projector {
            eye,
            right,
            up,
            forward,
            focal: 0.5 * rect.height() / (0.5 * FOV_Y).tan(),
            centre: rect.center(),
            near: self.distance * 1e-3,
        }
    }

    /// Turns the eye about the target by a drag of `delta` screen points; the distance stays.
    pub(crate) fn orbit(&mut self, delta: Vec2) {
        self.yaw -= delta.x * ORBIT_PER_POINT;
        self.pitch = (self.pitch + delta.y * ORBIT_PER_POINT).clamp(-MAX_PITCH, MAX_PITCH);
    }

    /// Slides the target so the scene follows a drag of `delta` screen points in a view of `rect`.
    pub(crate) fn pan(&mut self, delta: Vec2, rect: Rect) {
        let p = self.projector(rect);
        let mm_per_point = self.distance / p.focal;
        let shift = add(
            scale(p.right, -delta.x * mm_per_point),
            scale(p.up, delta.y * mm_per_point),
        );
        self.target = add(self.target, shift);
    }

    /// Moves toward (`factor` < 1) or away from (> 1) the scene. With `toward`, the point of the
    /// target's depth plane under that screen position stays under it.
    pub(crate) fn zoom(&mut self, factor: f32, toward: Option<Pos2>, rect: Rect) {
        let min = self.scene_radius * 0.02;
        let max = self.scene_radius * 50.0;
        let new_distance = (self.distance * factor).clamp(min, max);
        let factor = new_distance / self.distance;
        if let Some(pixel) = toward {
            let anchor = self.projector(rect).point_at_depth(pixel, self.distance);
            // Scaling the eye and target about the anchor keeps the anchor on the same ray.
            self.target = add(anchor, scale(sub(self.target, anchor), factor));
        }
        self.distance = new_distance;
    }
}

/// One frame's projection: camera axes and the pinhole in screen points.
#[derive(Clone, Copy, Debug)]
pub(crate) struct Projector {
    eye: [f32; 3],
    right: [f32; 3],
    up: [f32; 3],
    forward: [f32; 3],
    /// Focal length in screen points.
    focal: f32,
    centre: Pos2,
    /// Points closer than this (mm, along the view direction) are not drawn.
    near: f32,
}

impl Projector {
    /// Screen position and depth (mm along the view direction) of `p`, or `None` when it is
    /// behind the near plane or not finite.
    pub(crate) fn project(&self, p: [f32; 3]) -> Option<(Pos2, f32)> {
        let d = sub(p, self.eye);
        let depth = dot(d, self.forward);
        // Written so that a NaN depth is refused too.
        if depth.is_nan() || depth <= self.near {
            return None;
        }
        let s = self.focal / depth;
        let pos = Pos2::new(
            self.centre.x + dot(d, self.right) * s,
            self.centre.y - dot(d, self.up) * s,
        );
        pos.x.is_finite().then_some((pos, depth))
    }

    /// The point at `depth` (mm along the view direction) that projects to `pixel`.
    fn point_at_depth(&self, pixel: Pos2, depth: f32) -> [f32; 3] {
        let a = (pixel.x - self.centre.x) / self.focal;
        let b = -(pixel.y - self.centre.y) / self.focal;
        let ray = add(self.forward, add(scale(self.right, a), scale(self.up, b)));
        add(self.eye, scale(ray, depth))
    }
}

// ---------------------------------------------------------------------------------------------
// What is drawn.

/// What the clean-up recipe did with a point of the raw scan.
#[derive(Clone, Copy, Debug, PartialEq, Eq, Hash)]
pub(crate) enum PointKind {
    /// Kept: the part.
    Part,
    /// Had a NaN or infinite coordinate (never drawn: it has no place).
    NonFinite,
    /// Outside the crop box.
    Cropped,
    /// On the table plane.
    Table,
    /// An isolated stray point.
    Stray,
    /// In a cluster other than the part's.
    OtherCluster,
}

impl PointKind {
    pub(crate) const ALL: [PointKind; 6] = [
        PointKind::Part,
        PointKind::Table,
        PointKind::Stray,
        PointKind::OtherCluster,
        PointKind::Cropped,
        PointKind::NonFinite,
    ];

    pub(crate) fn name(self) -> &'static str {
        match self {
            PointKind::Part => "part (kept)",
            PointKind::NonFinite => "not a number",
            PointKind::Cropped => "outside the crop",
            PointKind::Table => "table",
            PointKind::Stray => "stray points",
            PointKind::OtherCluster => "other clusters",
        }
    }

    /// Our own palette: the part in a strong warm tone, each kind of removed point in a
    /// muted hue of its own, shown faded.
    fn colour(self) -> Color32 {
        match self {
            PointKind::Part => oklch(0.80, 0.13, 75.0, 1.0),
            PointKind::Table => oklch(0.62, 0.05, 240.0, 0.35),
            PointKind::Stray => oklch(0.66, 0.16, 350.0, 0.45),
            PointKind::OtherCluster => oklch(0.68, 0.11, 150.0, 0.40),
            PointKind::Cropped | PointKind::NonFinite => oklch(0.55, 0.0, 0.0, 0.30),
        }
    }
}

/// A point cloud ready to draw: positions in mm, and optionally per point what the recipe
/// did with it ([`PointKind`]) and how much it drove the verdict (0..1). Immutable once
/// built, so views can cache by its id.
#[derive(Clone, Debug)]
pub(crate) struct Cloud3d {
    id: u64,
    points: PointCloud,
    kinds: Option<Vec<PointKind>>,
    influence: Option<Vec<f32>>,
    bounds: Option<[[f32; 3]; 2]>,
}

fn next_cloud_id() -> u64 {
    static NEXT: AtomicU64 = AtomicU64::new(1);
    NEXT.fetch_add(1, Ordering::Relaxed)
}

impl Cloud3d {
    /// A cloud of `points` (positions in mm). Non-finite points are kept but never drawn.
    pub(crate) fn new(points: PointCloud) -> Self {
        Cloud3d {
            id: next_cloud_id(),
            bounds: points.bounds(),
            points,
            kinds: None,
            influence: None,
        }
    }

    /// The same cloud moved so the centre of its bounds is the origin: for showing two
    /// scans side by side with one camera.
    pub(crate) fn centred(mut self) -> Self {
        if let Some([lo, hi]) = self.bounds {
            let c = scale(add(lo, hi), 0.5);
            for p in &mut self.points.positions {
                *p = sub(*p, c);
            }
            self.bounds = Some([sub(lo, c), sub(hi, c)]);
            self.id = next_cloud_id();
        }
        self
    }

    /// Adds what the recipe did with each point; ignored unless there is one per point.
    /// The view then frames, and colours by height, the part alone: a far stray point
    /// would otherwise shrink the part to a few pixels.
    pub(crate) fn with_kinds(mut self, kinds: Vec<PointKind>) -> Self {
        if kinds.len() == self.points.positions.len() {
            let part: Vec<[f32; 3]> = self
                .points
                .positions
                .iter()
                .zip(&kinds)
                .filter(|(_, k)| **k == PointKind::Part)
                .map(|(p, _)| *p)
                .collect();
            if let Some(bounds) = PointCloud::from_positions(part).bounds() {
                self.bounds = Some(bounds);
            }
            self.kinds = Some(kinds);
            self.id = next_cloud_id();
        }
        self
    }

    /// Adds each point's influence on the verdict, 0..1 (clamped; NaN shows as "no value");
    /// ignored unless there is one per point.
    pub(crate) fn with_influence(mut self, influence: Vec<f32>) -> Self {
        if influence.len() == self.points.positions.len() {
            self.influence = Some(influence);
            self.id = next_cloud_id();
        }
        self
    }

    pub(crate) fn len(&self) -> usize {
        self.points.positions.len()
    }

    /// Bounds of the finite points `[min, max]`, mm; `None` when there are none.
    pub(crate) fn bounds(&self) -> Option<[[f32; 3]; 2]> {
        self.bounds
    }

    /// True when this cloud carries what `colour` needs.
    pub(crate) fn has(&self, colour: ColourBy) -> bool {
        match colour {
            ColourBy::Height => true,
            ColourBy::Removed => self.kinds.is_some(),
            ColourBy::Influence => self.influence.is_some(),
        }
    }
}

/// How points are coloured.
#[derive(Clone, Copy, Debug, PartialEq, Eq, serde::Serialize, serde::Deserialize)]
pub(crate) enum ColourBy {
    /// By Z (height above the table once the recipe has levelled the scan).
    Height,
    /// By what the recipe did with each point: the part bright, removed points faded.
    Removed,
    /// By how much each point drove the verdict.
    Influence,
}

impl ColourBy {
    pub(crate) const ALL: [ColourBy; 3] =
        [ColourBy::Height, ColourBy::Removed, ColourBy::Influence];

    pub(crate) fn name(self) -> &'static str {
        match self {
            ColourBy::Height => "height",
            ColourBy::Removed => "what clean-up removed",
            ColourBy::Influence => "what drove the verdict",
        }
    }
}

/// The user's choices for every 3D view (remembered between runs).
#[derive(Clone, Debug, PartialEq, serde::Serialize, serde::Deserialize)]
#[serde(default)]
pub(crate) struct ViewSettings {
    /// Side of each point's square, screen points.
    pub(crate) point_size: f32,
    pub(crate) colour: ColourBy,
    /// With [`ColourBy::Removed`]: draw only the part.
    pub(crate) hide_removed: bool,
}

impl Default for ViewSettings {
    fn default() -> Self {
        ViewSettings {
            point_size: 2.5,
            colour: ColourBy::Height,
            hide_removed: false,
        }
    }
}

impl ViewSettings {
    /// The colour choice (those not in `available` greyed out), the hide-removed toggle and
    /// the point size slider, in one row.
    pub(crate) fn toolbar(&mut self, ui: &mut Ui, available: &[ColourBy]) {
        ui.horizontal(|ui| {
            let label = ui.label("Colour by");
            egui::ComboBox::from_id_salt("colour by")
                .selected_text(self.colour.name())
                .show_ui(ui, |ui| {
                    for c in ColourBy::ALL {
                        ui.add_enabled_ui(available.contains(&c), |ui| {
                            ui.selectable_value(&mut self.colour, c, c.name())
                                .on_disabled_hover_text("Not known for this scan yet.");
                        });
                    }
                })
                .response
                .labelled_by(label.id);
            if self.colour == ColourBy::Removed {
                ui.checkbox(&mut self.hide_removed, "Hide removed points");
            }
            ui.separator();
            ui.add(egui::Slider::new(&mut self.point_size, 1.0..=8.0).text("Point size"));
        });
    }
}

// ---------------------------------------------------------------------------------------------
// Colour ramps of our own, built in OKLCH so lightness rises evenly along them.

/// A ramp of 256 colours between two OKLCH ends, lightness, chroma and hue each linear.
fn ramp(from: [f32; 3], to: [f32; 3]) -> Vec<Color32> {
    (0..256)
        .map(|i| {
            let t = i as f32 / 255.0;
            let mix = |k: usize| from[k] + (to[k] - from[k]) * t;
            oklch(mix(0), mix(1), mix(2), 1.0)
        })
        .collect()
}

/// Height: deep plum through blue and teal to a pale straw yellow.
fn height_ramp() -> &'static [Color32] {
    static RAMP: OnceLock<Vec<Color32>> = OnceLock::new();
    RAMP.get_or_init(|| ramp([0.36, 0.10, 320.0], [0.93, 0.11, 100.0]))
}

/// Influence: a dim cool grey for points that did not matter, to a bright hot orange.
fn influence_ramp() -> &'static [Color32] {
    static RAMP: OnceLock<Vec<Color32>> = OnceLock::new();
    RAMP.get_or_init(|| ramp([0.40, 0.02, 250.0], [0.78, 0.16, 50.0]))
}

fn ramp_at(ramp: &[Color32], t: f32) -> Color32 {
    let i = (t.clamp(0.0, 1.0) * (ramp.len() - 1) as f32).round() as usize;
    ramp[i]
}

/// One colour per point of `cloud` for `colour`; fully transparent = not drawn.
fn point_colours(cloud: &Cloud3d, colour: ColourBy, hide_removed: bool, out: &mut Vec<Color32>) {
    out.clear();
    match (colour, &cloud.kinds, &cloud.influence) {
        (ColourBy::Removed, Some(kinds), _) => out.extend(kinds.iter().map(|&k| {
            if hide_removed && k != PointKind::Part {
                Color32::TRANSPARENT
            } else {
                k.colour()
            }
        })),
        (ColourBy::Influence, _, Some(values)) => {
            let ramp = influence_ramp();
            let none = oklch(0.5, 0.0, 0.0, 0.5);
            out.extend(
                values
                    .iter()
                    .map(|&v| if v.is_nan() { none } else { ramp_at(ramp, v) }),
            )
        }
        _ => {
            let ramp = height_ramp();
            let (lo, hi) = cloud.bounds.map_or((0.0, 1.0), |[lo, hi]| (lo[2], hi[2]));
            let inv = 1.0 / (hi - lo).max(1e-6);
            out.extend(
                cloud
                    .points
                    .positions
                    .iter()
                    .map(|p| ramp_at(ramp, (p[2] - lo) * inv)),
            );
        }
    }
}

// ---------------------------------------------------------------------------------------------
// The mesh.

/// Reusable buffers for building the point mesh (allocated once, grown as needed).
#[derive(Default)]
struct Scratch {
    /// Per point: screen x, screen y, depth; depth NaN = not drawn.
    projected: Vec<[f32; 3]>,
    /// Per point: its depth bucket (0 = farthest), or `u16::MAX` when not drawn.
    bucket_of: Vec<u16>,
    /// The drawn points far to near, with their colour: written in scattered order, read in
    /// sequence (scattered writes cost less than scattered reads).
    sorted: Vec<Placed>,
    bucket_starts: Vec<u32>,
}

/// One point on screen: position, depth and colour.
#[derive(Clone, Copy, Default)]
struct Placed {
    x: f32,
    y: f32,
    depth: f32,
    colour: Color32,
}

/// Points per thread below which splitting the work costs more than it saves.
const MIN_POINTS_PER_THREAD: usize = 16_384;

/// Runs `f` on matching pieces of `out` and `input` (`out` holds `per_item` entries per item
/// of `input`) on a few scoped threads, and returns each piece's result in order. `f` gets
/// the index of its piece's first item. Scoped threads, not rayon's pool: the UI must not
/// queue behind a training run that keeps the pool busy.
fn split_run<A: Send, B: Sync, R: Send>(
    out: &mut [A],
    input: &[B],
    per_item: usize,
    f: impl Fn(&mut [A], &[B], usize) -> R + Sync,
) -> Vec<R> {
    let threads = std::thread::available_parallelism().map_or(1, |n| n.get().min(4));
    let chunk = input.len().div_ceil(threads).max(MIN_POINTS_PER_THREAD);
    if input.len() <= chunk {
        return vec![f(out, input, 0)];
    }
    let f = &f;
    std::thread::scope(|s| {
        let pieces: Vec<_> = out
            .chunks_mut(chunk * per_item)
            .zip(input.chunks(chunk))
            .enumerate()
            .map(|(k, (o, i))| s.spawn(move || f(o, i, k * chunk)))
            .collect();
        pieces
            .into_iter()
            .map(|p| p.join().unwrap_or_else(|e| std::panic::resume_unwind(e)))
            .collect()
    })
}

/// Builds into `mesh` one square of side `point_size` per visible point, far to near, darker
/// with depth, taking every `stride`-th point. Points that are transparent, behind the camera
/// or off `clip` are skipped.
#[expect(
    clippy::too_many_arguments,
    reason = "one call site; a struct would only rename them"
)]
fn build_mesh(
    projector: &Projector,
    positions: &[[f32; 3]],
    colours: &[Color32],
    stride: usize,
    point_size: f32,
    clip: Rect,
    scratch: &mut Scratch,
    mesh: &mut Mesh,
) {
    let stride = stride.max(1);
    let half = 0.5 * point_size;
    let clip = clip.expand(half);
    let Scratch {
        projected,
        bucket_of,
        sorted,
        bucket_starts,
    } = scratch;
    let n = positions.len().min(colours.len());

    // 1. Project (in parallel), noting the depth range of what is drawn.
    projected.resize(n, [0.0; 3]);
    let ranges = split_run(projected, &positions[..n], 1, |out, points, first| {
        let (mut near, mut far) = (f32::INFINITY, f32::NEG_INFINITY);
        for (k, (o, &p)) in out.iter_mut().zip(points).enumerate() {
            let i = first + k;
            let drawn = i % stride == 0 && colours[i].a() != 0;
            *o = match drawn.then(|| projector.project(p)).flatten() {
                Some((s, depth)) if clip.contains(s) => {
                    near = near.min(depth);
                    far = far.max(depth);
                    [s.x, s.y, depth]
                }
                _ => [0.0, 0.0, f32::NAN],
            };
        }
        (near, far)
    });
    let (near, far) = ranges
        .into_iter()
        .fold((f32::INFINITY, f32::NEG_INFINITY), |a, b| {
            (a.0.min(b.0), a.1.max(b.1))
        });
    if near > far {
        mesh.vertices.clear();
        mesh.indices.clear();
        return;
    }

    // 2. Counting sort far to near on quantised depth: O(n).
    let span = (far - near).max(1e-6);
    let to_bucket = (DEPTH_BUCKETS - 1) as f32 / span;
    bucket_starts.clear();
    bucket_starts.resize(DEPTH_BUCKETS + 1, 0);
    bucket_of.clear();
    bucket_of.extend(projected.iter().map(|p| {
        if p[2].is_nan() {
            u16::MAX
        } else {
            let b = ((far - p[2]) * to_bucket) as u16;
            bucket_starts[b as usize + 1] += 1;
            b
        }
    }));
    for b in 1..=DEPTH_BUCKETS {
        bucket_starts[b] += bucket_starts[b - 1];
    }
    let visible = bucket_starts[DEPTH_BUCKETS] as usize;
    sorted.resize(visible, Placed::default());
    for ((&b, p), &colour) in bucket_of.iter().zip(projected.iter()).zip(colours) {
        if b != u16::MAX {
            let slot = &mut bucket_starts[b as usize];
            sorted[*slot as usize] = Placed {
                x: p[0],
                y: p[1],
                depth: p[2],
                colour,
            };
            *slot += 1;
        }
    }

    // 3. Four corners per point (in parallel), written in place.
    let blank = Vertex {
        pos: Pos2::ZERO,
        uv: WHITE_UV,
        color: Color32::TRANSPARENT,
    };
    mesh.vertices.resize(4 * visible, blank);
    split_run(&mut mesh.vertices, sorted, 4, |quads, points, _| {
        for (quad, p) in quads.chunks_exact_mut(4).zip(points) {
            let Placed {
                x,
                y,
                depth,
                colour: c,
            } = *p;
            let shade = 1.0 - DEPTH_SHADE * (depth - near) / span;
            let colour = Color32::from_rgba_premultiplied(
                (c.r() as f32 * shade) as u8,
                (c.g() as f32 * shade) as u8,
                (c.b() as f32 * shade) as u8,
                c.a(),
            );
            let corners = [(-half, -half), (half, -half), (half, half), (-half, half)];
            for (v, (dx, dy)) in quad.iter_mut().zip(corners) {
                *v = Vertex {
                    pos: Pos2::new(x + dx, y + dy),
                    uv: WHITE_UV,
                    color: colour,
                };
            }
        }
    });

    // 4. The triangles only depend on how many quads there are: keep what is already there.
    let quads_before = mesh.indices.len() / 6;
    mesh.indices.truncate(6 * visible);
    for q in quads_before..visible {
        let base = 4 * q as u32;
        mesh.indices
            .extend_from_slice(&[base, base + 1, base + 2, base, base + 2, base + 3]);
    }
}

/// What the cached mesh was built from; equal key = paint the cached mesh again.
#[derive(Clone, Copy, PartialEq)]
struct MeshKey {
    cloud: u64,
    camera: Camera,
    rect: Rect,
    point_size: f32,
    colour: ColourBy,
    hide_removed: bool,
    stride: usize,
}

/// One on-screen 3D view: its cached mesh and buffers. The camera and settings are passed in,
/// so several views can share them.
#[derive(Default)]
pub(crate) struct PointView {
    last_cloud: Option<u64>,
    mesh: Arc<Mesh>,
    key: Option<MeshKey>,
    colours: Vec<Color32>,
    colours_key: Option<(u64, ColourBy, bool)>,
    scratch: Scratch,
}

impl PointView {
    /// Paints `cloud` filling the available space and handles the mouse. Without a cloud,
    /// shows `empty_text`. Double-click resets `camera`.
    pub(crate) fn ui(
        &mut self,
        ui: &mut Ui,
        camera: &mut Camera,
        settings: &ViewSettings,
        cloud: Option<&Cloud3d>,
        empty_text: &str,
    ) -> Response {
        let size = ui.available_size().max(Vec2::splat(64.0));
        let (rect, response) = ui.allocate_exact_size(size, Sense::click_and_drag());
        let response = response.accessible_name("3D view");
        let painter = ui.painter_at(rect);
        painter.rect_filled(rect, 4.0, background());

        let Some((cloud, bounds)) = cloud.and_then(|c| c.bounds().map(|b| (c, b))) else {
            painter.text(
                rect.center(),
                egui::Align2::CENTER_CENTER,
                empty_text,
                egui::FontId::proportional(15.0),
                Color32::from_gray(170),
            );
            return response;
        };

        // A different cloud in this view (another scan, or the network's points instead of
        // the whole scan) is framed anew.
        if self.last_cloud != Some(cloud.id) {
            camera.refit();
            self.last_cloud = Some(cloud.id);
        }
        self.handle_input(ui, &response, camera, rect);
        if camera.fit != Fit::Done {
            camera.fit_to(bounds, rect.aspect_ratio());
        }

        let colour = if cloud.has(settings.colour) {
            settings.colour
        } else {
            ColourBy::Height
        };
        self.paint(cloud, camera, settings, colour, rect, &painter);
        paint_legend(&painter, rect, cloud, colour);
        response
    }

    fn handle_input(&self, ui: &Ui, response: &Response, camera: &mut Camera, rect: Rect) {
        if response.double_clicked() {
            camera.reset();
            return;
        }
        let shift = ui.input(|i| i.modifiers.shift);
        let delta = response.drag_delta();
        if response.dragged_by(egui::PointerButton::Primary) && !shift {
            camera.orbit(delta);
        } else if response.dragged() {
            camera.pan(delta, rect);
        }
        if response.hovered() {
            let (scroll, pinch) = ui.input_mut(|i| {
                let scroll = i.smooth_scroll_delta.y;
                // Taken here so a scroll area around the view does not scroll as well.
                i.smooth_scroll_delta = Vec2::ZERO;
                (scroll, i.zoom_delta())
            });
            let factor = (-scroll * ZOOM_PER_POINT).exp() / pinch;
            if factor != 1.0 {
                camera.zoom(factor, response.hover_pos(), rect);
            }
        }
    }

    fn paint(
        &mut self,
        cloud: &Cloud3d,
        camera: &Camera,
        settings: &ViewSettings,
        colour: ColourBy,
        rect: Rect,
        painter: &egui::Painter,
    ) {
        let colours_key = (cloud.id, colour, settings.hide_removed);
        if self.colours_key != Some(colours_key) {
            point_colours(cloud, colour, settings.hide_removed, &mut self.colours);
            self.colours_key = Some(colours_key);
            self.key = None;
        }
        // Moving = the camera changed since the last mesh of this cloud.
        let moving = self
            .key
            .is_some_and(|k| k.cloud == cloud.id && k.camera != *camera);
        let stride = if moving {
            cloud.len().div_ceil(POINTS_WHILE_MOVING).max(1)
        } else {
            1
        };
        if stride > 1 {
            // One more frame once the pointer rests, to draw every point.
            painter.ctx().request_repaint();
        }
        let key = MeshKey {
            cloud: cloud.id,
            camera: *camera,
            rect,
            point_size: settings.point_size,
            colour,
            hide_removed: settings.hide_removed,
            stride,
        };
        if self.key != Some(key) {
            // Reuse last frame's buffers when egui has let go of them (the usual case).
            if Arc::get_mut(&mut self.mesh).is_none() {
                self.mesh = Arc::new(Mesh::default());
            }
            if let Some(mesh) = Arc::get_mut(&mut self.mesh) {
                build_mesh(
                    &camera.projector(rect),
                    &cloud.points.positions,
                    &self.colours,
                    stride,
                    settings.point_size,
                    rect,
                    &mut self.scratch,
                    mesh,
                );
            }
            self.key = Some(key);
        }
        if !self.mesh.is_empty() {
            painter.add(Shape::Mesh(Arc::clone(&self.mesh)));
        }
    }
}

/// The view's own dark backdrop, the same in light and dark themes so the ramps read alike.
fn background() -> Color32 {
    Color32::from_rgb(24, 26, 31)
}

/// A small key in the top-left corner of the view.
fn paint_legend(painter: &egui::Painter, rect: Rect, cloud: &Cloud3d, colour: ColourBy) {
    let font = egui::FontId::proportional(12.0);
    let text = Color32::from_gray(200);
    let mut at = rect.left_top() + Vec2::new(10.0, 10.0);
    let bar = |at: Pos2, ramp: &[Color32]| {
        let (w, h) = (120.0, 8.0);
        let mut mesh = Mesh::default();
        for (i, c) in ramp.iter().step_by(8).enumerate() {
            let x = at.x + i as f32 * w / 32.0;
            mesh.add_colored_rect(
                Rect::from_min_size(Pos2::new(x, at.y), Vec2::new(w / 32.0 + 0.5, h)),
                *c,
            );
        }
        painter.add(Shape::mesh(mesh));
    };
    match (colour, &cloud.kinds) {
        (ColourBy::Removed, Some(kinds)) => {
            for kind in PointKind::ALL {
                let count = kinds.iter().filter(|&&k| k == kind).count();
                if count == 0 {
                    continue;
                }
                painter.rect_filled(
                    Rect::from_min_size(at + Vec2::new(0.0, 2.0), Vec2::splat(9.0)),
                    1.0,
                    kind.colour().to_opaque(),
                );
                painter.text(
                    at + Vec2::new(14.0, 0.0),
                    egui::Align2::LEFT_TOP,
                    format!("{}: {count}", kind.name()),
                    font.clone(),
                    text,
                );
                at.y += 15.0;
            }
        }
        (ColourBy::Influence, _) => {
            painter.text(
                at,
                egui::Align2::LEFT_TOP,
                "influence on the verdict",
                font.clone(),
                text,
            );
            at.y += 16.0;
            bar(at, influence_ramp());
            painter.text(
                at + Vec2::new(0.0, 10.0),
                egui::Align2::LEFT_TOP,
                "low",
                font.clone(),
                text,
            );
            painter.text(
                at + Vec2::new(120.0, 10.0),
                egui::Align2::RIGHT_TOP,
                "high",
                font,
                text,
            );
        }
        _ => {
            let (lo, hi) = cloud.bounds.map_or((0.0, 0.0), |[lo, hi]| (lo[2], hi[2]));
            painter.text(at, egui::Align2::LEFT_TOP, "height (Z)", font.clone(), text);
            at.y += 16.0;
            bar(at, height_ramp());
            painter.text(
                at + Vec2::new(0.0, 10.0),
                egui::Align2::LEFT_TOP,
                format!("{lo:.1} mm"),
                font.clone(),
                text,
            );
            painter.text(
                at + Vec2::new(120.0, 10.0),
                egui::Align2::RIGHT_TOP,
                format!("{hi:.1} mm"),
                font,
                text,
            );
        }
    }
    painter.text(
        rect.right_bottom() - Vec2::new(8.0, 6.0),
        egui::Align2::RIGHT_BOTTOM,
        format!("{} points", cloud.len()),
        egui::FontId::proportional(11.0),
        Color32::from_gray(150),
    );
}

#[cfg(test)]
pub(crate) mod tests {
    use super::*;
    use partsift::rng::Rng;

    fn view_rect() -> Rect {
        Rect::from_min_size(Pos2::new(100.0, 50.0), Vec2::new(800.0, 600.0))
    }

    fn framed_camera() -> Camera {
        let mut camera = Camera::default();
        camera.frame([[-10.0, -20.0, 0.0], [30.0, 20.0, 15.0]], 800.0 / 600.0);
        camera
    }

    /// A practice cloud for tests and timing: a ring of points standing on a table plane,
    /// plus strays, `n` points in all, mm.
    pub(crate) fn practice_cloud(n: usize, seed: u64) -> Cloud3d {
        let mut rng = Rng::new(seed);
        let mut positions = Vec::with_capacity(n);
        let mut kinds = Vec::with_capacity(n);
        for i in 0..n {
            let (p, k) = match i % 10 {
                0..=5 => {
                    let a = rng.range(0.0, std::f64::consts::TAU);
                    let r = rng.range(18.0, 25.0);
                    let z = rng.range(0.0, 30.0);
                    ([r * a.cos(), r * a.sin(), z], PointKind::Part)
                }
                6..=8 => (
                    [
                        rng.range(-60.0, 60.0),
                        rng.range(-60.0, 60.0),
                        rng.normal() * 0.3,
                    ],
                    PointKind::Table,
                ),
                _ => (
                    [
                        rng.range(-60.0, 60.0),
                        rng.range(-60.0, 60.0),
                        rng.range(0.0, 50.0),
                    ],
                    PointKind::Stray,
                ),
            };
            positions.push([p[0] as f32, p[1] as f32, p[2] as f32]);
            kinds.push(k);
        }
        let influence = positions
            .iter()
            .map(|p| (p[2] / 30.0).clamp(0.0, 1.0))
            .collect();
        Cloud3d::new(PointCloud::from_positions(positions))
            .with_kinds(kinds)
            .with_influence(influence)
    }

    #[test]
    fn target_projects_to_the_view_centre() {
        let camera = framed_camera();
        let p = camera.projector(view_rect());
        let (s, depth) = p.project([10.0, 0.0, 7.5]).unwrap();
        assert!((s - view_rect().center()).length() < 1e-3);
        assert!((depth - camera.distance).abs() < 1e-3 * camera.distance);
    }

    #[test]
    fn offset_along_camera_right_projects_by_focal_over_depth() {
        // Pinhole model: x_screen = f * x_camera / z_camera.
        let camera = framed_camera();
        let rect = view_rect();
        let p = camera.projector(rect);
        let offset = 5.0;
        let q = add(camera.target, scale(p.right, offset));
        let (s, _) = p.project(q).unwrap();
        let expected = rect.center().x + p.focal * offset / camera.distance;
        assert!((s.x - expected).abs() < 1e-2, "{} vs {expected}", s.x);
        assert!((s.y - rect.center().y).abs() < 1e-2);
        // Up on the camera is up on screen (smaller y).
        let (s, _) = p.project(add(camera.target, scale(p.up, offset))).unwrap();
        assert!(s.y < rect.center().y);
    }

    #[test]
    fn points_behind_the_eye_are_not_projected() {
        let camera = framed_camera();
        let p = camera.projector(view_rect());
        let behind = add(camera.eye(), scale(sub(camera.eye(), camera.target), 1.0));
        assert!(p.project(behind).is_none());
        assert!(p.project([f32::NAN, 0.0, 0.0]).is_none());
    }

    #[test]
    fn orbit_keeps_the_distance_to_the_target() {
        let mut camera = framed_camera();
        let before = length(sub(camera.eye(), camera.target));
        for d in [
            Vec2::new(40.0, 0.0),
            Vec2::new(-13.0, 25.0),
            Vec2::new(0.0, -500.0),
        ] {
            camera.orbit(d);
            let after = length(sub(camera.eye(), camera.target));
            assert!((after - before).abs() < 1e-3 * before);
        }
        assert!(camera.pitch.abs() <= MAX_PITCH, "pitch is clamped");
    }

    #[test]
    fn a_new_cloud_is_framed_from_the_direction_the_user_chose() {
        let mut camera = framed_camera();
        camera.orbit(Vec2::new(120.0, -40.0));
        let (yaw, pitch) = (camera.yaw, camera.pitch);
        camera.refit();
        camera.fit_to([[0.0; 3], [2.0, 2.0, 2.0]], 1.0);
        assert_eq!((camera.yaw, camera.pitch), (yaw, pitch));
        assert_eq!(camera.target, [1.0, 1.0, 1.0]);
        camera.reset();
        camera.fit_to([[0.0; 3], [2.0, 2.0, 2.0]], 1.0);
        assert_eq!((camera.yaw, camera.pitch), (HOME_YAW, HOME_PITCH));
    }

    #[test]
    fn reset_frames_every_corner_of_the_bounds_inside_the_view() {
        let bounds = [[-10.0, -20.0, 0.0], [30.0, 20.0, 15.0]];
        for rect in [
            view_rect(),
            Rect::from_min_size(Pos2::ZERO, Vec2::new(300.0, 900.0)),
        ] {
            let mut camera = Camera::default();
            camera.frame(bounds, rect.aspect_ratio());
            let p = camera.projector(rect);
            for corner in 0..8 {
                let c = [
                    bounds[corner & 1][0],
                    bounds[(corner >> 1) & 1][1],
                    bounds[(corner >> 2) & 1][2],
                ];
                let (s, _) = p.project(c).unwrap();
                assert!(rect.contains(s), "corner {c:?} at {s:?} outside {rect:?}");
            }
        }
    }

    #[test]
    fn zoom_toward_the_pointer_keeps_the_point_under_it() {
        let mut camera = framed_camera();
        let rect = view_rect();
        let pixel = Pos2::new(700.0, 200.0);
        let anchor = camera
            .projector(rect)
            .point_at_depth(pixel, camera.distance);
        camera.zoom(0.5, Some(pixel), rect);
        let (s, _) = camera.projector(rect).project(anchor).unwrap();
        assert!((s - pixel).length() < 1e-2, "{s:?}");
    }

    #[test]
    fn pan_moves_the_scene_with_the_drag() {
        let mut camera = framed_camera();
        let rect = view_rect();
        let point = camera.target;
        camera.pan(Vec2::new(30.0, -12.0), rect);
        let (s, _) = camera.projector(rect).project(point).unwrap();
        assert!((s - (rect.center() + Vec2::new(30.0, -12.0))).length() < 1e-2);
    }

    #[test]
    fn ramps_get_lighter_along_their_length() {
        // Relative luminance per ITU-R BT.709 / sRGB (IEC 61966-2-1) must rise monotonically.
        let luminance = |c: Color32| {
            let lin = |v: u8| {
                let v = v as f32 / 255.0;
                if v <= 0.04045 {
                    v / 12.92
                } else {
                    ((v + 0.055) / 1.055).powf(2.4)
                }
            };
            0.2126 * lin(c.r()) + 0.7152 * lin(c.g()) + 0.0722 * lin(c.b())
        };
        for ramp in [height_ramp(), influence_ramp()] {
            for w in ramp.windows(8).step_by(8) {
                assert!(luminance(w[7]) >= luminance(w[0]) - 1e-3);
            }
            assert!(luminance(ramp[255]) > 3.0 * luminance(ramp[0]));
        }
    }

    #[test]
    fn hidden_removed_points_are_not_in_the_mesh() {
        let cloud = practice_cloud(1000, 3);
        let mut colours = Vec::new();
        point_colours(&cloud, ColourBy::Removed, true, &mut colours);
        let camera = {
            let mut c = Camera::default();
            c.frame(cloud.bounds().unwrap(), view_rect().aspect_ratio());
            c
        };
        let mut mesh = Mesh::default();
        build_mesh(
            &camera.projector(view_rect()),
            &cloud.points.positions,
            &colours,
            1,
            3.0,
            view_rect(),
            &mut Scratch::default(),
            &mut mesh,
        );
        assert_eq!(mesh.vertices.len(), 4 * 600, "only the 600 part points");
        assert!(mesh.is_valid());
    }

    #[test]
    fn mesh_is_painted_far_to_near() {
        let cloud = Cloud3d::new(PointCloud::from_positions(vec![
            [0.0, 0.0, 0.0],
            [0.0, 0.0, 10.0],
            [5.0, 5.0, 5.0],
        ]));
        let mut camera = Camera::default();
        camera.frame(cloud.bounds().unwrap(), 1.0);
        let p = camera.projector(view_rect());
        let mut colours = Vec::new();
        point_colours(&cloud, ColourBy::Height, false, &mut colours);
        let mut mesh = Mesh::default();
        build_mesh(
            &p,
            &cloud.points.positions,
            &colours,
            1,
            2.0,
            view_rect(),
            &mut Scratch::default(),
            &mut mesh,
        );
        let depths: Vec<f32> = mesh
            .vertices
            .chunks(4)
            .map(|quad| {
                let centre = quad[0].pos + (quad[2].pos - quad[0].pos) * 0.5;
                cloud
                    .points
                    .positions
                    .iter()
                    .filter_map(|&q| p.project(q))
                    .find(|(s, _)| (*s - centre).length() < 1e-3)
                    .unwrap()
                    .1
            })
            .collect();
        assert_eq!(depths.len(), 3);
        assert!(depths.windows(2).all(|w| w[0] >= w[1]), "{depths:?}");
    }

    #[test]
    fn a_cloud_with_kinds_is_framed_on_its_part() {
        let points = vec![[0.0, 0.0, 0.0], [10.0, 5.0, 4.0], [900.0, 0.0, 300.0]];
        let kinds = vec![PointKind::Part, PointKind::Part, PointKind::Stray];
        let cloud = Cloud3d::new(PointCloud::from_positions(points)).with_kinds(kinds);
        assert_eq!(cloud.bounds(), Some([[0.0, 0.0, 0.0], [10.0, 5.0, 4.0]]));
        assert_eq!(cloud.len(), 3, "the stray is still drawn");
    }

    #[test]
    fn a_moving_camera_draws_a_sample_then_every_point_at_rest() {
        // Without kinds the view frames every point, so each frame at rest draws them all.
        let cloud = Cloud3d::new(practice_cloud(200_000, 5).points);
        let ctx = egui::Context::default();
        let settings = ViewSettings::default();
        let mut camera = Camera::default();
        let mut view = PointView::default();
        let mut frame = |camera: &mut Camera| {
            let input = egui::RawInput {
                screen_rect: Some(Rect::from_min_size(Pos2::ZERO, Vec2::new(2000.0, 1400.0))),
                ..Default::default()
            };
            let _ = ctx.run_ui(input, |ui| {
                view.ui(ui, camera, &settings, Some(&cloud), "");
            });
            view.mesh.vertices.len() / 4
        };
        let full = frame(&mut camera);
        assert!(full > 150_000, "{full}");
        camera.orbit(Vec2::new(10.0, 0.0));
        let moving = frame(&mut camera);
        assert!(
            moving <= POINTS_WHILE_MOVING && moving > POINTS_WHILE_MOVING / 2,
            "{moving}"
        );
        assert_eq!(frame(&mut camera), full, "at rest again: every point");
    }

    /// Times the mesh build for 200k points (printed, not asserted: speed is measured, never
    /// asserted in tests). Run with `--nocapture` to see it.
    #[test]
    fn mesh_for_200k_points() {
        let cloud = Cloud3d::new(practice_cloud(200_000, 7).points);
        let rect = view_rect();
        let mut camera = Camera::default();
        camera.frame(cloud.bounds().unwrap(), rect.aspect_ratio());
        let mut colours = Vec::new();
        let t = std::time::Instant::now();
        point_colours(&cloud, ColourBy::Height, false, &mut colours);
        let colour_time = t.elapsed();
        let mut scratch = Scratch::default();
        let mut mesh = Mesh::default();
        // Min and median over many camera moves: the machine may be busy with other work.
        let mut times: Vec<std::time::Duration> = (0..30)
            .map(|_| {
                camera.orbit(Vec2::new(3.0, 1.0));
                let t = std::time::Instant::now();
                build_mesh(
                    &camera.projector(rect),
                    &cloud.points.positions,
                    &colours,
                    1,
                    2.5,
                    rect,
                    &mut scratch,
                    &mut mesh,
                );
                t.elapsed()
            })
            .collect();
        times.sort();
        println!(
            "200k points: colours {colour_time:?} once; mesh per camera move min {:?}, median {:?}; {} vertices",
            times[0],
            times[times.len() / 2],
            mesh.vertices.len()
        );
        assert_eq!(mesh.vertices.len(), 4 * 200_000);
    }
}
