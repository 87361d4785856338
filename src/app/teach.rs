//! The Teach tab: the parts bin (types, scan counts, warnings, unreadable files), the training
//! settings, Start / Stop with progress and live curves, and saving / opening a model file.

use eframe::egui;
use std::path::{Path, PathBuf};
use std::sync::Arc;
use std::time::{Duration, Instant};

use egui_plot::{Legend, Line, Plot};

use super::backend::{self, LoadedModel};
use super::review::Evaluation;
use super::worker::{poll_slot, Reporter, Worker};
use super::{palette, short_path, Action, AppError, Notice, Shared};

/// One part type of a parts bin.
#[derive(Clone, Debug, PartialEq)]
pub(crate) struct TypeEntry {
    /// The sub-folder's name.
    pub(crate) name: String,
    /// Its scan files, sorted.
    pub(crate) scans: Vec<PathBuf>,
    /// E.g. "only 3 scans: at least 10 are advised".
    pub(crate) warnings: Vec<String>,
}

/// What is in a parts bin folder.
#[derive(Clone, Debug, Default, PartialEq)]
pub(crate) struct BinSurvey {
    pub(crate) root: PathBuf,
    pub(crate) types: Vec<TypeEntry>,
    /// Files that look like scans but could not be read, each with its error.
    pub(crate) unreadable: Vec<(PathBuf, String)>,
    /// About the bin as a whole, e.g. imbalance between types.
    pub(crate) warnings: Vec<String>,
}

impl BinSurvey {
    pub(crate) fn scan_count(&self) -> usize {
        self.types.iter().map(|t| t.scans.len()).sum()
    }

    /// The scan `step` places after (or, negative, before) `current` in the list of all
    /// scans, type by type, wrapping around; the first scan when `current` is not in the bin.
    pub(crate) fn step_from(&self, current: Option<&Path>, step: i32) -> Option<PathBuf> {
        let all: Vec<&PathBuf> = self.types.iter().flat_map(|t| &t.scans).collect();
        if all.is_empty() {
            return None;
        }
        let at = current.and_then(|c| all.iter().position(|p| p.as_path() == c));
        let next = match at {
            Some(i) => (i as i64 + i64::from(step)).rem_euclid(all.len() as i64) as usize,
            None => 0,
        };
        Some(all[next].clone())
    }
}

/// The training choices (remembered between runs).
#[derive(Clone, Debug, PartialEq, serde::Serialize, serde::Deserialize)]
#[serde(default)]
pub(crate) struct TeachSettings {
    pub(crate) preset: String,
    pub(crate) architecture: String,
    pub(crate) epochs: u32,
    pub(crate) seed: u64,
}

impl Default for TeachSettings {
    fn default() -> Self {
        TeachSettings {
            preset: backend::PRESETS
                .first()
                .map(|s| s.to_string())
                .unwrap_or_default(),
            architecture: backend::ARCHITECTURES
                .first()
                .map(|s| s.to_string())
                .unwrap_or_default(),
            epochs: 40,
            seed: 1,
        }
    }
}

/// One finished epoch.
#[derive(Clone, Copy, Debug, PartialEq)]
pub(crate) struct EpochStats {
    /// 1-based.
    pub(crate) epoch: u32,
    pub(crate) loss: f32,
    /// Share of training scans right, 0..1.
    pub(crate) train_accuracy: f32,
    /// Share of holdout scans right, 0..1.
    pub(crate) holdout_accuracy: f32,
}

/// What the train loop sends.
pub(crate) enum TeachEvent {
    /// How far the whole run is, 0..1, and what it is doing ("epoch 3 of 40").
    Progress {
        fraction: f32,
        doing: String,
    },
    Epoch(EpochStats),
    /// The run ended: the model (the best so far if stopped), or why not.
    Finished(Result<Taught, AppError>),
}

/// A finished run.
pub(crate) struct Taught {
    /// Boxed: a model is large beside the other events.
    pub(crate) model: Box<LoadedModel>,
    /// How the model does on the holdout scans, for Review.
    pub(crate) evaluation: Option<Evaluation>,
    /// True when Stop ended it early.
    pub(crate) stopped: bool,
}

/// The run on show: running, or the last one.
struct Run {
    started: Instant,
    ended: Option<Duration>,
    fraction: f32,
    doing: String,
    epochs: Vec<EpochStats>,
}

#[derive(serde::Serialize, serde::Deserialize, Default)]
#[serde(default)]
pub(crate) struct TeachTab {
    settings: TeachSettings,
    #[serde(skip)]
    run: Option<Run>,
    #[serde(skip)]
    worker: Option<Worker<TeachEvent>>,
    /// Where to save the model when the run ends (the first-start model).
    #[serde(skip)]
    save_when_done: Option<PathBuf>,
    #[serde(skip)]
    saving: Option<Worker<(PathBuf, Result<(), AppError>)>>,
    #[serde(skip)]
    error: Option<String>,
}

impl TeachTab {
    /// Starts teaching on `bin` with the current settings; `save_to` saves the model when done.
    pub(crate) fn start(&mut self, ctx: &egui::Context, bin: &Path, save_to: Option<PathBuf>) {
        let bin = bin.to_path_buf();
        let settings = self.settings.clone();
        self.start_job(ctx, save_to, move |r| {
            let result = backend::teach(&bin, &settings, r);
            r.send(TeachEvent::Finished(result));
        });
    }

    /// Starts `job` as the run on show. The job must end by sending [`TeachEvent::Finished`].
    pub(crate) fn start_job(
        &mut self,
        ctx: &egui::Context,
        save_to: Option<PathBuf>,
        job: impl FnOnce(&Reporter<TeachEvent>) + Send + 'static,
    ) {
        self.error = None;
        self.save_when_done = save_to;
        self.run = Some(Run {
            started: Instant::now(),
            ended: None,
            fraction: 0.0,
            doing: "starting".to_owned(),
            epochs: Vec::new(),
        });
        match Worker::spawn(ctx, "teach", job) {
            Ok(w) => self.worker = Some(w),
            Err(e) => {
                self.error = Some(format!("could not start teaching: {e}"));
                self.run = None;
            }
        }
    }

    pub(crate) fn busy(&self) -> Option<String> {
        let run = self.run.as_ref()?;
        self.worker
            .as_ref()
            .map(|_| format!("teaching: {} ({:.0} %)", run.doing, 100.0 * run.fraction))
            .or_else(|| self.saving.as_ref().map(|_| "saving the model".to_owned()))
    }

    /// Takes what the train loop and the saver sent; runs every frame, whichever tab is shown.
    pub(crate) fn poll(&mut self, ctx: &egui::Context, actions: &mut Vec<Action>) {
        let Self {
            run,
            worker,
            save_when_done,
            saving,
            error,
            ..
        } = self;
        let mut finished = None;
        let crashed = poll_slot(worker, |event| match (event, run.as_mut()) {
            (TeachEvent::Progress { fraction, doing }, Some(run)) => {
                run.fraction = fraction.clamp(0.0, 1.0);
                run.doing = doing;
            }
            (TeachEvent::Epoch(stats), Some(run)) => run.epochs.push(stats),
            (TeachEvent::Finished(result), _) => finished = Some(result),
            _ => {}
        });
        if let Some(run) = run.as_mut().filter(|_| worker.is_none()) {
            run.ended.get_or_insert_with(|| run.started.elapsed());
        }
        if let Some(e) = crashed {
            *error = Some(e.to_string());
        }
        match finished {
            Some(Ok(taught)) => {
                let note = if taught.stopped {
                    "Teaching stopped; the best model so far is kept"
                } else {
                    "Teaching done"
                };
                actions.push(Action::Notice(Notice::info(format!(
                    "{note}: {}",
                    taught.model.name
                ))));
                let model = Arc::from(taught.model);
                if let Some(path) = save_when_done.take() {
                    *saving = spawn_save(ctx, Arc::clone(&model), path, error);
                }
                actions.push(Action::UseModel(model, None));
                if let Some(evaluation) = taught.evaluation {
                    actions.push(Action::Evaluated(evaluation));
                }
            }
            Some(Err(e)) => {
                actions.push(Action::Notice(Notice::error(format!(
                    "Could not teach: {e}"
                ))));
                *error = Some(e.to_string());
            }
            None => {}
        }
        let crashed = poll_slot(saving, |(path, result)| match result {
            Ok(()) => {
                actions.push(Action::Notice(Notice::info(format!(
                    "Model saved to {}",
                    path.display()
                ))));
                actions.push(Action::ModelSaved(path));
            }
            Err(e) => *error = Some(format!("saving the model: {e}")),
        });
        if let Some(e) = crashed {
            *error = Some(e.to_string());
        }
    }

    pub(crate) fn ui(&mut self, ui: &mut egui::Ui, shared: &mut Shared) {
        egui::Panel::left("teach bin")
            .resizable(true)
            .default_size(360.0)
            .show(ui, |ui| {
                egui::ScrollArea::vertical().show(ui, |ui| bin_panel(ui, shared));
            });
        let running = self.worker.is_some();
        let Self {
            settings,
            run,
            worker,
            error,
            ..
        } = self;
        let mut start = false;
        let mut save = None;
        egui::CentralPanel::default().show(ui, |ui| {
            ui.heading("Teach");
            ui.horizontal_top(|ui| {
                ui.vertical(|ui| {
                    ui.add_enabled_ui(!running, |ui| settings_grid(ui, settings));
                });
                // Not a separator: in a row it would take the whole height of the panel.
                ui.add_space(40.0);
                ui.vertical(|ui| save = model_row(ui, shared));
            });
            ui.add_space(6.0);
            ui.horizontal(|ui| {
                let can_start = !running && shared.bin.is_some();
                if ui
                    .add_enabled(can_start, egui::Button::new("Start teaching"))
                    .on_disabled_hover_text(
                        "Choose a parts bin first (or wait for the run to end).",
                    )
                    .clicked()
                {
                    start = true;
                }
                if let Some(w) = worker.as_ref() {
                    let label = if w.is_cancelling() {
                        "Stopping…"
                    } else {
                        "Stop"
                    };
                    if ui
                        .add_enabled(!w.is_cancelling(), egui::Button::new(label))
                        .on_hover_text("Ends the run and keeps the best model so far.")
                        .clicked()
                    {
                        w.cancel();
                    }
                }
            });
            if let Some(e) = error {
                ui.colored_label(palette::error_colour(), e.as_str());
            }
            if let Some(run) = run {
                progress(ui, run, running);
                curves(ui, &run.epochs);
            } else {
                ui.weak("No run yet. Start teaching to see progress and curves here.");
            }
        });
        if let Some((model, path)) = save {
            self.saving = spawn_save(ui.ctx(), model, path, &mut self.error);
        }
        if start {
            if let Some(bin) = shared.bin {
                self.start(ui.ctx(), bin, None);
            }
        }
    }
}

fn spawn_save(
    ctx: &egui::Context,
    model: Arc<LoadedModel>,
    path: PathBuf,
    error: &mut Option<String>,
) -> Option<Worker<(PathBuf, Result<(), AppError>)>> {
    let job = move |r: &Reporter<(PathBuf, Result<(), AppError>)>| {
        if let Some(dir) = path.parent() {
            if let Err(e) = std::fs::create_dir_all(dir) {
                r.send((path.clone(), Err(AppError::io(dir, e))));
                return;
            }
        }
        let result = backend::save_model(&model, &path);
        r.send((path, result));
    };
    match Worker::spawn(ctx, "model save", job) {
        Ok(w) => Some(w),
        Err(e) => {
            *error = Some(format!("could not save the model: {e}"));
            None
        }
    }
}

/// The parts bin: folder, types with counts and warnings, unreadable files.
fn bin_panel(ui: &mut egui::Ui, shared: &mut Shared) {
    ui.heading("Parts bin");
    ui.horizontal(|ui| {
        match shared.bin {
            Some(bin) => ui
                .label(short_path(bin))
                .on_hover_text(bin.display().to_string()),
            None => ui.weak("none chosen"),
        };
        if ui.button("Choose folder…").clicked() {
            let mut dialog = rfd::FileDialog::new().set_title("Choose a parts bin");
            if let Some(bin) = shared.bin {
                dialog = dialog.set_directory(bin);
            }
            if let Some(folder) = dialog.pick_folder() {
                shared.actions.push(Action::UseBin(folder));
            }
        }
        if shared.bin.is_some() && ui.button("Look again").clicked() {
            shared.actions.push(Action::RefreshBin);
        }
    });
    ui.weak("One sub-folder per part type, holding its labelled scans.");
    let Some(survey) = shared.survey else {
        return;
    };
    ui.add_space(4.0);
    for w in &survey.warnings {
        ui.colored_label(palette::review_colour(), w);
    }
    egui::Grid::new("bin types")
        .striped(true)
        .num_columns(3)
        .show(ui, |ui| {
            ui.strong("Part type");
            ui.strong("Scans");
            ui.strong("Warnings");
            ui.end_row();
            for t in &survey.types {
                ui.label(&t.name);
                ui.label(t.scans.len().to_string());
                if t.warnings.is_empty() {
                    ui.weak("none");
                } else {
                    ui.colored_label(palette::review_colour(), t.warnings.join("; "));
                }
                ui.end_row();
            }
        });
    if !survey.unreadable.is_empty() {
        egui::CollapsingHeader::new(format!("Unreadable files ({})", survey.unreadable.len()))
            .default_open(true)
            .show(ui, |ui| {
                for (path, why) in &survey.unreadable {
                    ui.colored_label(palette::error_colour(), short_path(path))
                        .on_hover_text(path.display().to_string());
                    ui.label(why);
                }
            });
    }
}

fn settings_grid(ui: &mut egui::Ui, settings: &mut TeachSettings) {
    egui::Grid::new("teach settings")
        .num_columns(2)
        .show(ui, |ui| {
            let label = ui.label("Preset");
            choice(ui, "preset", &mut settings.preset, backend::PRESETS).labelled_by(label.id);
            ui.end_row();
            let label = ui.label("Architecture");
            choice(
                ui,
                "architecture",
                &mut settings.architecture,
                backend::ARCHITECTURES,
            )
            .labelled_by(label.id);
            ui.end_row();
            let label = ui.label("Epochs");
            ui.add(egui::DragValue::new(&mut settings.epochs).range(1..=2000))
                .labelled_by(label.id);
            ui.end_row();
            let label = ui.label("Seed");
            ui.add(egui::DragValue::new(&mut settings.seed))
                .labelled_by(label.id)
                .on_hover_text("The same seed on the same parts bin teaches the same model.");
            ui.end_row();
        });
}

fn choice(ui: &mut egui::Ui, id: &str, value: &mut String, options: &[&str]) -> egui::Response {
    let shown = if value.is_empty() {
        "(default)"
    } else {
        value.as_str()
    };
    egui::ComboBox::from_id_salt(id)
        .selected_text(shown.to_owned())
        .show_ui(ui, |ui| {
            for option in options {
                ui.selectable_value(value, option.to_string(), *option);
            }
        })
        .response
}

fn progress(ui: &mut egui::Ui, run: &Run, running: bool) {
    if running {
        // Keeps the clock going between the train loop's events, at one frame a second.
        ui.ctx().request_repaint_after(Duration::from_secs(1));
    }
    let elapsed = run.ended.unwrap_or_else(|| run.started.elapsed());
    let eta = (running && run.fraction > 0.01).then(|| {
        let total = elapsed.as_secs_f32() / run.fraction;
        Duration::from_secs_f32((total - elapsed.as_secs_f32()).max(0.0))
    });
    let text = match eta {
        Some(eta) => format!(
            "{} · {:.0} % · {} so far · about {} left",
            run.doing,
            100.0 * run.fraction,
            clock(elapsed),
            clock(eta)
        ),
        None => format!(
            "{} · {:.0} % · {}",
            run.doing,
            100.0 * run.fraction,
            clock(elapsed)
        ),
    };
    ui.add(
        egui::ProgressBar::new(run.fraction)
            .text(text)
            .animate(false),
    );
}

/// "1:05" or "1:02:05".
fn clock(d: Duration) -> String {
    let s = d.as_secs();
    if s >= 3600 {
        format!("{}:{:02}:{:02}", s / 3600, (s / 60) % 60, s % 60)
    } else {
        format!("{}:{:02}", s / 60, s % 60)
    }
}

/// Loss, and train / holdout accuracy, per epoch.
fn curves(ui: &mut egui::Ui, epochs: &[EpochStats]) {
    let series = |f: fn(&EpochStats) -> f32| -> Vec<[f64; 2]> {
        epochs
            .iter()
            .map(|e| [f64::from(e.epoch), f64::from(f(e))])
            .collect()
    };
    let height = ((ui.available_height() - 60.0) / 2.0).clamp(120.0, 320.0);
    ui.strong("Loss");
    Plot::new("teach loss")
        .height(height)
        .include_y(0.0)
        .x_axis_label("epoch")
        .allow_scroll(false)
        .show(ui, |plot| {
            plot.line(Line::new("loss", series(|e| e.loss)).color(palette::accent_colour()));
        });
    ui.strong("Accuracy");
    Plot::new("teach accuracy")
        .height(height)
        .include_y(0.0)
        .include_y(100.0)
        .x_axis_label("epoch")
        .y_axis_formatter(|mark, _| format!("{:.0} %", mark.value))
        // Room for "100 %".
        .y_axis_min_width(44.0)
        .legend(Legend::default())
        .allow_scroll(false)
        .show(ui, |plot| {
            let pct = |v: Vec<[f64; 2]>| {
                v.into_iter()
                    .map(|[x, y]| [x, 100.0 * y])
                    .collect::<Vec<_>>()
            };
            plot.line(
                Line::new("train", pct(series(|e| e.train_accuracy)))
                    .color(palette::type_colour(0, 2)),
            );
            plot.line(
                Line::new("holdout", pct(series(|e| e.holdout_accuracy)))
                    .color(palette::type_colour(1, 2)),
            );
        });
}

/// The model in use, and Save / Open. Returns where the user chose to save it.
fn model_row(ui: &mut egui::Ui, shared: &mut Shared) -> Option<(Arc<LoadedModel>, PathBuf)> {
    let mut save = None;
    match shared.model {
        Some(m) => {
            ui.strong(format!("Model: {}", m.name));
            ui.weak(m.summary.join(" · "));
            ui.weak(format!("types: {}", m.part_types().join(", ")));
        }
        None => {
            ui.weak("No model yet.");
        }
    }
    ui.horizontal(|ui| {
        if ui
            .add_enabled(shared.model.is_some(), egui::Button::new("Save model…"))
            .clicked()
        {
            let dialog = rfd::FileDialog::new()
                .add_filter("partsift model", &["safetensors"])
                .set_file_name("model.safetensors");
            if let (Some(path), Some(model)) = (dialog.save_file(), shared.model) {
                save = Some((Arc::clone(model), path));
            }
        }
        if ui.button("Open model…").clicked() {
            let dialog = rfd::FileDialog::new().add_filter("partsift model", &["safetensors"]);
            if let Some(path) = dialog.pick_file() {
                shared.actions.push(Action::OpenModel(path));
            }
        }
    });
    save
}

#[cfg(test)]
impl TeachTab {
    pub(crate) fn epochs_seen(&self) -> usize {
        self.run.as_ref().map_or(0, |r| r.epochs.len())
    }
    pub(crate) fn is_running(&self) -> bool {
        self.worker.is_some()
    }
    pub(crate) fn settings_mut(&mut self) -> &mut TeachSettings {
        &mut self.settings
    }
    pub(crate) fn error(&self) -> Option<&str> {
        self.error.as_deref()
    }
}

#[cfg(test)]
mod tests {
    use super::*;

    fn survey() -> BinSurvey {
        BinSurvey {
            root: PathBuf::from("/bin"),
            types: vec![
                TypeEntry {
                    name: "bracket".into(),
                    scans: vec!["/bin/bracket/a.ply".into(), "/bin/bracket/b.ply".into()],
                    warnings: vec![],
                },
                TypeEntry {
                    name: "washer".into(),
                    scans: vec!["/bin/washer/c.ply".into()],
                    warnings: vec![],
                },
            ],
            ..Default::default()
        }
    }

    #[test]
    fn step_walks_all_scans_and_wraps() {
        let s = survey();
        let a = Path::new("/bin/bracket/a.ply");
        assert_eq!(s.step_from(Some(a), 1), Some("/bin/bracket/b.ply".into()));
        assert_eq!(s.step_from(Some(a), 2), Some("/bin/washer/c.ply".into()));
        assert_eq!(s.step_from(Some(a), -1), Some("/bin/washer/c.ply".into()));
        assert_eq!(s.step_from(None, 1), Some("/bin/bracket/a.ply".into()));
        assert_eq!(BinSurvey::default().step_from(Some(a), 1), None);
    }

    #[test]
    fn clock_reads_like_a_clock() {
        assert_eq!(clock(Duration::from_secs(65)), "1:05");
        assert_eq!(clock(Duration::from_secs(3725)), "1:02:05");
    }
}
