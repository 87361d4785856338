//! The Inspect tab: one scan in 3D and its verdict. The scan shows as soon as its points are
//! read; clean-up and the verdict follow from the same background job.

use eframe::egui;
use std::path::{Path, PathBuf};
use std::sync::Arc;

use egui_plot::{Bar, BarChart, Plot};

use super::backend::{self, LoadedModel};
use super::view3d::{Camera, Cloud3d, ColourBy, PointView};
use super::worker::{poll_slot, Worker};
use super::{palette, Action, AppError, Keys, Shared, CAUTION};
use partsift::prep::StepLine;

/// Whether a verdict can stand on its own.
#[derive(Clone, Copy, Debug, PartialEq, Eq)]
pub(crate) enum Status {
    Sure,
    /// Not sure enough: a person must look.
    Review,
}

impl Status {
    pub(crate) fn name(self) -> &'static str {
        match self {
            Status::Sure => "sure",
            Status::Review => "review",
        }
    }
}

/// The predicted part type, its calibrated confidence (0..1) and its status.
#[derive(Clone, Debug, PartialEq)]
pub(crate) struct Verdict {
    pub(crate) part_type: String,
    pub(crate) confidence: f32,
    pub(crate) status: Status,
}

/// The part's true size, from the cleaned-up points before they were scaled to unit radius.
#[derive(Clone, Copy, Debug, PartialEq)]
pub(crate) struct TrueSize {
    /// Extents along X, Y, Z of the levelled part (Z up from the table), mm.
    pub(crate) extents_mm: [f32; 3],
    /// Largest distance of a part point from its centre, mm.
    pub(crate) radius_mm: f32,
}

/// A scan as read, before clean-up.
pub(crate) struct ScanShown {
    /// Every point of the file, mm.
    pub(crate) cloud: Cloud3d,
    /// What was in the file: format, points, units (and whether they were guessed).
    pub(crate) facts: Vec<String>,
}

/// What the clean-up recipe made of a scan.
pub(crate) struct Cleanup {
    pub(crate) size: TrueSize,
    /// The clean-up report: what each step removed and why.
    pub(crate) report: Vec<StepLine>,
    /// What the user should know (no table found, maybe two parts in one scan, ...).
    pub(crate) warnings: Vec<String>,
    /// The whole scan turned into the recipe's frame (table at Z = 0, part up), with what
    /// clean-up did with each point. Replaces the cloud as read when present.
    pub(crate) levelled: Option<Cloud3d>,
}

/// What the network made of the cleaned-up scan.
pub(crate) struct Judgement {
    pub(crate) verdict: Verdict,
    /// Every type with its calibrated score, highest first (the tab shows the first few).
    pub(crate) scores: Vec<(String, f32)>,
    /// The network's input points in the recipe's frame (mm), with each point's influence on
    /// the verdict.
    pub(crate) prepared: Option<Cloud3d>,
}

/// What the background job sends, in this order; it stops early at an error, and after
/// [`InspectEvent::CleanedUp`] when there is no model.
pub(crate) enum InspectEvent {
    Shown(Result<ScanShown, AppError>),
    CleanedUp(Result<Cleanup, AppError>),
    Judged(Result<Judgement, AppError>),
}

#[derive(Default)]
pub(crate) struct InspectTab {
    current: Option<PathBuf>,
    shown: Option<ScanShown>,
    cleanup: Option<Cleanup>,
    judgement: Option<Judgement>,
    error: Option<String>,
    worker: Option<Worker<InspectEvent>>,
    camera: Camera,
    view: PointView,
}

impl InspectTab {
    /// Shows the scan at `path` and asks for its verdict, on a worker.
    pub(crate) fn open(
        &mut self,
        ctx: &egui::Context,
        path: PathBuf,
        model: Option<&Arc<LoadedModel>>,
    ) {
        let model = model.cloned();
        let job_path = path.clone();
        self.start(ctx, path, move |r| {
            backend::inspect_scan(&job_path, model.as_deref(), r)
        });
    }

    /// Starts `job` for the scan at `path` in place of whatever ran before (it is cancelled).
    pub(crate) fn start(
        &mut self,
        ctx: &egui::Context,
        path: PathBuf,
        job: impl FnOnce(&super::worker::Reporter<InspectEvent>) + Send + 'static,
    ) {
        self.shown = None;
        self.cleanup = None;
        self.judgement = None;
        self.camera.reset();
        self.error = None;
        match Worker::spawn(ctx, "inspect", job) {
            Ok(w) => self.worker = Some(w),
            Err(e) => self.error = Some(AppError::io(&path, e).to_string()),
        }
        self.current = Some(path);
    }

    /// Asks for a scan file with the system's file dialog, then opens it.
    pub(crate) fn open_dialog(&mut self, ctx: &egui::Context, model: Option<&Arc<LoadedModel>>) {
        let mut dialog = rfd::FileDialog::new().add_filter("Scans", &["ply", "xyz", "pcd"]);
        if let Some(dir) = self.current.as_deref().and_then(Path::parent) {
            dialog = dialog.set_directory(dir);
        }
        if let Some(path) = dialog.pick_file() {
            self.open(ctx, path, model);
        }
    }

    /// A new model: the scan on show gets a fresh verdict.
    pub(crate) fn model_changed(&mut self, ctx: &egui::Context, model: Option<&Arc<LoadedModel>>) {
        if let Some(path) = self.current.clone() {
            self.open(ctx, path, model);
        }
    }

    pub(crate) fn busy(&self) -> Option<String> {
        let name = self.current.as_deref().map(file_name).unwrap_or_default();
        self.worker.as_ref().map(|_| match self.shown {
            None => format!("reading {name}"),
            Some(_) => format!("cleaning up and classifying {name}"),
        })
    }

    pub(crate) fn poll(&mut self) {
        let Self {
            shown,
            cleanup,
            judgement,
            error,
            worker,
            camera,
            ..
        } = self;
        let crashed = poll_slot(worker, |event| match event {
            InspectEvent::Shown(Ok(s)) => *shown = Some(s),
            InspectEvent::CleanedUp(Ok(mut c)) => {
                if let (Some(s), Some(levelled)) = (shown.as_mut(), c.levelled.take()) {
                    s.cloud = levelled;
                    camera.reset();
                }
                *cleanup = Some(c);
            }
            InspectEvent::Judged(Ok(j)) => *judgement = Some(j),
            InspectEvent::Shown(Err(e))
            | InspectEvent::CleanedUp(Err(e))
            | InspectEvent::Judged(Err(e)) => *error = Some(e.to_string()),
        });
        if let Some(e) = crashed {
            *error = Some(e.to_string());
        }
    }

    pub(crate) fn ui(&mut self, ui: &mut egui::Ui, shared: &mut Shared) {
        let mut step = shared.keys.step;
        if shared.keys.reset_view {
            self.camera.reset();
        }
        let mut open = None;
        let Self {
            current,
            shown,
            cleanup,
            judgement,
            error,
            worker,
            camera,
            view,
        } = self;

        egui::Panel::left("inspect scans")
            .resizable(true)
            .default_size(230.0)
            .show(ui, |ui| {
                if ui
                    .button("Open a scan…")
                    .on_hover_text("Ctrl+O. You can also drop a scan file on the window.")
                    .clicked()
                {
                    open = Some(None);
                }
                ui.separator();
                scan_list(ui, shared, current.as_deref(), &mut open);
            });

        egui::Panel::right("inspect verdict")
            .resizable(true)
            .default_size(340.0)
            // The verdict and the review block must stay readable at a glance.
            .min_size(300.0)
            .show(ui, |ui| {
                egui::ScrollArea::vertical().show(ui, |ui| {
                    let stage = match (worker.is_some(), shown.is_some(), cleanup.is_some()) {
                        (true, _, false) => Stage::CleaningUp,
                        (true, true, true) => Stage::Judging,
                        (false, true, true) if shared.model.is_none() => Stage::NoModel,
                        _ => Stage::Idle,
                    };
                    verdict_panel(ui, cleanup.as_ref(), judgement.as_ref(), stage);
                });
            });

        egui::CentralPanel::default().show(ui, |ui| {
            match (current.as_deref(), shown.as_ref()) {
                (Some(path), Some(s)) => {
                    ui.horizontal_wrapped(|ui| {
                        ui.strong(file_name(path));
                        for fact in &s.facts {
                            ui.weak(fact);
                        }
                    });
                }
                (Some(path), None) => {
                    ui.strong(file_name(path));
                }
                (None, _) => {
                    ui.weak("No scan open.");
                }
            }
            if let Some(e) = error {
                ui.colored_label(palette::error_colour(), e.as_str());
            }
            let prepared = judgement.as_ref().and_then(|j| j.prepared.as_ref());
            let raw = shown.as_ref().map(|s| &s.cloud);
            let mut available = vec![ColourBy::Height];
            if raw.is_some_and(|c| c.has(ColourBy::Removed)) {
                available.push(ColourBy::Removed);
            }
            if prepared.is_some() {
                available.push(ColourBy::Influence);
            }
            shared.view.toolbar(ui, &available);
            let cloud = match shared.view.colour {
                ColourBy::Influence => prepared.or(raw),
                _ => raw,
            };
            let empty = if worker.is_some() {
                "Reading the scan…"
            } else {
                "Drop a scan here, press Ctrl+O, or pick one from the parts bin."
            };
            let response = view.ui(ui, camera, shared.view, cloud, empty);
            if response.hovered() {
                step += Keys::arrows(ui);
            }
        });

        if step != 0 {
            if let Some(next) = shared
                .survey
                .and_then(|s| s.step_from(current.as_deref(), step))
            {
                open = Some(Some(next));
            }
        }
        match open {
            Some(Some(path)) => shared.actions.push(Action::OpenScan(path)),
            Some(None) => self.open_dialog(ui.ctx(), shared.model),
            None => {}
        }
    }
}

/// The parts bin's scans by type; a click opens one.
fn scan_list(
    ui: &mut egui::Ui,
    shared: &Shared,
    current: Option<&Path>,
    open: &mut Option<Option<PathBuf>>,
) {
    let Some(survey) = shared.survey else {
        ui.weak(if shared.bin.is_some() {
            "The parts bin is being read, or could not be read (see Messages)."
        } else {
            "No parts bin yet: choose one on the Teach tab, or drop a folder on the window."
        });
        return;
    };
    ui.strong(format!("Parts bin: {} scans", survey.scan_count()));
    egui::ScrollArea::vertical().show(ui, |ui| {
        for part_type in &survey.types {
            egui::CollapsingHeader::new(format!("{} ({})", part_type.name, part_type.scans.len()))
                .id_salt(&part_type.name)
                .default_open(current.is_some_and(|c| part_type.scans.iter().any(|s| s == c)))
                .show(ui, |ui| {
                    for scan in &part_type.scans {
                        let selected = current == Some(scan.as_path());
                        if ui.selectable_label(selected, file_name(scan)).clicked() {
                            *open = Some(Some(scan.clone()));
                        }
                    }
                });
        }
    });
}

/// Where the job is, for the verdict panel's placeholder.
#[derive(Clone, Copy, PartialEq)]
enum Stage {
    Idle,
    CleaningUp,
    Judging,
    NoModel,
}

/// The verdict, the status (a `review` is impossible to miss), the top scores, the true size
/// and the clean-up report.
fn verdict_panel(
    ui: &mut egui::Ui,
    cleanup: Option<&Cleanup>,
    judgement: Option<&Judgement>,
    stage: Stage,
) {
    ui.heading("Verdict");
    match (judgement, stage) {
        (Some(j), _) => {
            let verdict = &j.verdict;
            ui.label(egui::RichText::new(&verdict.part_type).size(26.0).strong());
            ui.label(format!("confidence {:.0} %", 100.0 * verdict.confidence));
            ui.add_space(4.0);
            status_badge(ui, verdict.status);
            ui.add_space(8.0);
            ui.strong("Top scores");
            score_chart(ui, &j.scores);
        }
        (None, Stage::CleaningUp | Stage::Judging) => {
            ui.horizontal(|ui| {
                super::busy_mark(ui);
                ui.label(if stage == Stage::CleaningUp {
                    "Reading and cleaning up…"
                } else {
                    "Classifying…"
                });
            });
        }
        (None, Stage::NoModel) => {
            ui.label("No model yet: teach one on the Teach tab, or open a model file there.");
        }
        (None, Stage::Idle) => {
            ui.weak("Open a scan to see its verdict.");
        }
    }
    let Some(cleanup) = cleanup else {
        return;
    };
    ui.add_space(8.0);
    ui.strong("True size");
    let [x, y, z] = cleanup.size.extents_mm;
    ui.label(format!(
        "{x:.1} × {y:.1} × {z:.1} mm (X × Y × Z, Z up from the table)"
    ));
    ui.label(format!("radius {:.1} mm", cleanup.size.radius_mm));
    ui.add_space(8.0);
    egui::CollapsingHeader::new("Clean-up report")
        .default_open(true)
        .show(ui, |ui| {
            for warning in &cleanup.warnings {
                ui.colored_label(palette::review_colour(), warning);
            }
            for line in &cleanup.report {
                ui.horizontal(|ui| {
                    ui.strong(line.step);
                    ui.with_layout(egui::Layout::right_to_left(egui::Align::Center), |ui| {
                        ui.monospace(line.points.to_string());
                    });
                });
                if !line.note.is_empty() {
                    ui.small(&line.note);
                }
            }
        });
}

/// `sure` as a quiet green tag; `review` as a large amber block with the caution beside it.
pub(crate) fn status_badge(ui: &mut egui::Ui, status: Status) {
    match status {
        Status::Sure => {
            ui.label(
                egui::RichText::new(" sure ")
                    .strong()
                    .color(egui::Color32::BLACK)
                    .background_color(palette::sure_colour()),
            );
        }
        Status::Review => {
            egui::Frame::new()
                .fill(palette::review_colour())
                .inner_margin(10.0)
                .corner_radius(6.0)
                .show(ui, |ui| {
                    ui.set_width(ui.available_width());
                    ui.label(
                        egui::RichText::new("REVIEW")
                            .size(28.0)
                            .strong()
                            .color(egui::Color32::BLACK),
                    );
                    ui.label(
                        egui::RichText::new("Not sure enough: a person must check this part.")
                            .strong()
                            .color(egui::Color32::BLACK),
                    );
                    ui.add_space(4.0);
                    ui.label(egui::RichText::new(CAUTION).color(egui::Color32::BLACK));
                });
        }
    }
}

/// How many types the score chart shows.
const TOP_SCORES: usize = 5;

/// A horizontal bar per type, best on top, scores in percent.
fn score_chart(ui: &mut egui::Ui, scores: &[(String, f32)]) {
    let top = &scores[..scores.len().min(TOP_SCORES)];
    let names: Vec<String> = top.iter().map(|(n, _)| n.clone()).collect();
    let bars = top
        .iter()
        .enumerate()
        .map(|(i, (name, score))| {
            // Best on top: the first score gets the highest position.
            Bar::new((top.len() - 1 - i) as f64, 100.0 * f64::from(*score))
                .name(name)
                .fill(if i == 0 {
                    palette::accent_colour()
                } else {
                    palette::accent_colour().gamma_multiply(0.45)
                })
                .width(0.7)
        })
        .collect();
    let count = top.len();
    Plot::new("inspect scores")
        .height(24.0 + 26.0 * count as f32)
        .allow_zoom(false)
        .allow_drag(false)
        .allow_scroll(false)
        .allow_boxed_zoom(false)
        .allow_double_click_reset(false)
        .show_grid([true, false])
        .include_x(0.0)
        .include_x(100.0)
        .x_axis_formatter(|mark, _| format!("{:.0} %", mark.value))
        .y_axis_formatter(move |mark, _| {
            let i = mark.value.round();
            if (mark.value - i).abs() > 1e-6 || i < 0.0 {
                return String::new();
            }
            (count - 1)
                .checked_sub(i as usize)
                .and_then(|k| names.get(k))
                .cloned()
                .unwrap_or_default()
        })
        .y_axis_min_width(80.0)
        .show(ui, |plot| {
            plot.bar_chart(BarChart::new("scores", bars).horizontal());
        });
}

pub(crate) fn file_name(path: &Path) -> String {
    path.file_name()
        .map(|n| n.to_string_lossy().into_owned())
        .unwrap_or_else(|| path.display().to_string())
}

#[cfg(test)]
impl InspectTab {
    pub(crate) fn current(&self) -> Option<&Path> {
        self.current.as_deref()
    }
    pub(crate) fn error(&self) -> Option<&str> {
        self.error.as_deref()
    }
    pub(crate) fn is_working(&self) -> bool {
        self.worker.is_some()
    }
    pub(crate) fn judgement(&self) -> Option<&Judgement> {
        self.judgement.as_ref()
    }
}
