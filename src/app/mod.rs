//! The desktop app: one [`App`] state (it remembers only the user's choices), one file per tab
//! (Inspect, Teach, Review, Sort, Map), a 3D point view ([`view3d`]), and a worker pattern
//! ([`worker`]) that keeps every long job off the UI thread. Every library call the app makes
//! sits in [`backend`].
//!
//! Keyboard (when no text field has the keyboard):
//! - Ctrl+O (Cmd+O on macOS): open a scan in Inspect.
//! - N / P: next / previous scan (Inspect: in the parts bin list; Review: in the list of scans
//!   behind the chosen cell). The Right / Left arrow keys do the same while the pointer is over
//!   the 3D view.
//! - R: reset the 3D view (as does a double-click on it).
//!
//! Mouse on a 3D view: drag = orbit, right- or middle-drag or Shift+drag = pan,
//! wheel = zoom toward the pointer, double-click = reset.
//!
//! Dropping files on the window: a scan file opens in Inspect; a folder becomes the folder to
//! sort on the Sort tab, or the parts bin on any other tab.

use eframe::egui;
mod backend;
#[cfg(test)]
mod demo;
mod inspect;
mod map;
mod palette;
mod review;
mod sort;
mod teach;
mod view3d;
mod worker;

use std::path::{Path, PathBuf};
use std::sync::Arc;

use backend::LoadedModel;
use teach::BinSurvey;
use view3d::ViewSettings;
use worker::{poll_slot, Worker};

/// What the app opens with.
pub struct StartOptions {
    pub bin: Option<PathBuf>,
    pub model: Option<PathBuf>,
}

/// Where eframe keeps the app's remembered choices (and the first-start model).
const APP_ID: &str = "partsift";

/// The keyboard and mouse controls, as About lists them.
const CONTROLS: &[(&str, &str)] = &[
    ("Ctrl+O", "open a scan"),
    ("N / P", "next / previous scan"),
    (
        "Right / Left",
        "the same, with the pointer over the 3D view",
    ),
    ("R", "reset the 3D view"),
    ("drag", "orbit the 3D view"),
    ("right- or middle-drag, Shift+drag", "pan"),
    ("wheel", "zoom toward the pointer"),
    ("double-click", "reset the 3D view"),
    (
        "drop a file",
        "inspect it; a folder becomes the parts bin (on Sort: the folder to sort)",
    ),
];

/// Shown in About and beside every `review` verdict.
pub(crate) const CAUTION: &str = "partsift's verdict supports, and does not replace, the plant's \
inspection procedures, gauges and sign-off. Uncertain (review) verdicts go to a person.";

/// Opens the desktop app and runs it until its window closes.
pub fn run(options: StartOptions) -> eframe::Result {
    let native = eframe::NativeOptions {
        viewport: egui::ViewportBuilder::default()
            .with_app_id(APP_ID)
            .with_title("partsift")
            .with_inner_size([1360.0, 860.0])
            .with_min_inner_size([720.0, 480.0])
            .with_drag_and_drop(true),
        ..Default::default()
    };
    eframe::run_native(
        APP_ID,
        native,
        Box::new(move |cc| Ok(Box::new(App::new(cc, options)))),
    )
}

/// The tabs, in the order shown.
#[derive(Clone, Copy, Debug, Default, PartialEq, Eq, serde::Serialize, serde::Deserialize)]
pub(crate) enum Tab {
    #[default]
    Inspect,
    Teach,
    Review,
    Sort,
    Map,
}

impl Tab {
    const ALL: [Tab; 5] = [Tab::Inspect, Tab::Teach, Tab::Review, Tab::Sort, Tab::Map];

    fn name(self) -> &'static str {
        match self {
            Tab::Inspect => "Inspect",
            Tab::Teach => "Teach",
            Tab::Review => "Review",
            Tab::Sort => "Sort",
            Tab::Map => "Map",
        }
    }

    fn hint(self) -> &'static str {
        match self {
            Tab::Inspect => "One scan: see it in 3D and read its verdict",
            Tab::Teach => "Teach a model on a parts bin",
            Tab::Review => "Which types the model confuses, and the scans behind each mistake",
            Tab::Sort => "Sort a folder of new scans by type",
            Tab::Map => "Every scan of the parts bin, placed by what the model learned",
        }
    }
}

/// Anything the app could not do, as the user reads it.
#[derive(Debug, thiserror::Error)]
pub(crate) enum AppError {
    #[error(transparent)]
    Scan(#[from] partsift::scan::ScanError),
    #[error("{path}: {source}")]
    Io {
        path: PathBuf,
        source: std::io::Error,
    },
    #[error("{0}")]
    Bin(String),
    #[error("clean-up: {0}")]
    Recipe(String),
    #[error("{path}: a file of that name is already there; nothing was moved")]
    Exists { path: PathBuf },
    #[error("{0}")]
    Settings(String),
    /// Teaching, checking a model on a bin or mapping it.
    #[error("{0}")]
    Learn(String),
    /// Reading or writing a model file (the message names the file).
    #[error("{0}")]
    Model(String),
    /// A scan that got no verdict (the message names the file).
    #[error("{0}")]
    Verdict(String),
    #[error("the background work stopped unexpectedly ({0}); please report this")]
    Crashed(String),
}

impl AppError {
    pub(crate) fn io(path: &Path, source: std::io::Error) -> Self {
        AppError::Io {
            path: path.to_path_buf(),
            source,
        }
    }
}

/// One line for the status bar and the message log.
#[derive(Clone, Debug, PartialEq)]
pub(crate) struct Notice {
    pub(crate) text: String,
    pub(crate) is_error: bool,
}

impl Notice {
    pub(crate) fn info(text: impl Into<String>) -> Self {
        Notice {
            text: text.into(),
            is_error: false,
        }
    }
    pub(crate) fn error(text: impl std::fmt::Display) -> Self {
        Notice {
            text: text.to_string(),
            is_error: true,
        }
    }
}

/// What a tab asks of the app; applied after the tabs have drawn.
pub(crate) enum Action {
    /// Show this scan in Inspect (and switch there).
    OpenScan(PathBuf),
    /// Make this folder the parts bin and survey it.
    UseBin(PathBuf),
    /// The parts bin changed on disk (a label was fixed): survey it again.
    RefreshBin,
    /// A model to use from now on, and the file it is saved in, if any.
    UseModel(Arc<LoadedModel>, Option<PathBuf>),
    /// Read this model file and use it.
    OpenModel(PathBuf),
    /// The model in use was saved here.
    ModelSaved(PathBuf),
    /// How the model does on the parts bin, for Review.
    Evaluated(review::Evaluation),
    Notice(Notice),
}

/// What every tab may read, and where it leaves its requests.
pub(crate) struct Shared<'a> {
    pub(crate) bin: Option<&'a Path>,
    pub(crate) survey: Option<&'a BinSurvey>,
    pub(crate) model: Option<&'a Arc<LoadedModel>>,
    pub(crate) view: &'a mut ViewSettings,
    pub(crate) keys: Keys,
    pub(crate) actions: &'a mut Vec<Action>,
}

/// This frame's app-wide keys (read once, so each tab sees the same).
#[derive(Clone, Copy, Debug, Default)]
pub(crate) struct Keys {
    /// +1 next, -1 previous.
    pub(crate) step: i32,
    pub(crate) reset_view: bool,
}

impl Keys {
    fn read(ctx: &egui::Context) -> Self {
        if ctx.egui_wants_keyboard_input() {
            return Keys::default();
        }
        ctx.input(|i| {
            let plain = !i.modifiers.any();
            let step = match (i.key_pressed(egui::Key::N), i.key_pressed(egui::Key::P)) {
                (true, false) if plain => 1,
                (false, true) if plain => -1,
                _ => 0,
            };
            Keys {
                step,
                reset_view: plain && i.key_pressed(egui::Key::R),
            }
        })
    }

    /// The step from the arrow keys, for a tab whose 3D view has the pointer over it.
    pub(crate) fn arrows(ui: &egui::Ui) -> i32 {
        if ui.ctx().egui_wants_keyboard_input() {
            return 0;
        }
        ui.input(|i| {
            i32::from(i.key_pressed(egui::Key::ArrowRight))
                - i32::from(i.key_pressed(egui::Key::ArrowLeft))
        })
    }
}

/// The parts bin's survey, running or done.
#[derive(Default)]
struct BinState {
    survey: Option<BinSurvey>,
    worker: Option<Worker<Result<BinSurvey, AppError>>>,
}

/// A model file being opened.
type ModelOpening = Worker<(PathBuf, Result<LoadedModel, AppError>)>;

/// Everything the app knows this session and does not keep.
#[derive(Default)]
struct Session {
    bin: BinState,
    model: Option<Arc<LoadedModel>>,
    model_opening: Option<ModelOpening>,
    notices: Vec<Notice>,
    about_open: bool,
    log_open: bool,
}

/// The whole app. Only the user's choices are remembered between runs.
#[derive(serde::Serialize, serde::Deserialize, Default)]
#[serde(default)]
pub(crate) struct App {
    tab: Tab,
    last_bin: Option<PathBuf>,
    last_model: Option<PathBuf>,
    view: ViewSettings,
    teach: teach::TeachTab,
    sort: sort::SortTab,
    #[serde(skip)]
    inspect: inspect::InspectTab,
    #[serde(skip)]
    review: review::ReviewTab,
    #[serde(skip)]
    map: map::MapTab,
    #[serde(skip)]
    session: Session,
}

impl App {
    fn new(cc: &eframe::CreationContext<'_>, options: StartOptions) -> Self {
        let mut app: App = cc
            .storage
            .and_then(|s| eframe::get_value(s, eframe::APP_KEY))
            .unwrap_or_default();
        let bin = options
            .bin
            .or_else(|| app.last_bin.clone())
            .or_else(default_bin);
        let first_model = eframe::storage_dir(APP_ID).map(|d| d.join("first-model.safetensors"));
        let saved = options
            .model
            .or_else(|| app.last_model.clone())
            .or_else(|| first_model.clone().filter(|f| f.is_file()));
        if let Some(model) = saved {
            app.open_model(&cc.egui_ctx, model);
        } else if let Some(bin) = &bin {
            // First start: teach a model on the bin in the background; the app is usable meanwhile.
            app.teach.start(&cc.egui_ctx, bin, first_model);
        }
        if let Some(bin) = bin {
            app.use_bin(&cc.egui_ctx, bin);
        }
        app
    }

    fn use_bin(&mut self, ctx: &egui::Context, bin: PathBuf) {
        if self
            .session
            .bin
            .survey
            .as_ref()
            .is_some_and(|s| s.root != bin)
        {
            self.session.bin.survey = None;
        }
        let job_bin = bin.clone();
        match Worker::spawn(ctx, "bin survey", move |r| {
            r.send(backend::survey_bin(&job_bin));
        }) {
            Ok(w) => self.session.bin.worker = Some(w),
            Err(e) => self.notify(Notice::error(AppError::io(&bin, e))),
        }
        self.last_bin = Some(bin);
    }

    fn open_model(&mut self, ctx: &egui::Context, path: PathBuf) {
        match Worker::spawn(ctx, "model open", move |r| {
            let result = backend::open_model(&path);
            r.send((path, result));
        }) {
            Ok(w) => self.session.model_opening = Some(w),
            Err(e) => self.notify(Notice::error(format!("Could not open the model: {e}"))),
        }
    }

    fn notify(&mut self, notice: Notice) {
        self.session.notices.push(notice);
    }

    /// Collects what every worker sent since the last frame, whichever tab is shown.
    fn poll_workers(&mut self, ctx: &egui::Context, actions: &mut Vec<Action>) {
        let mut notices = Vec::new();
        let Session {
            bin,
            model,
            model_opening,
            ..
        } = &mut self.session;
        let BinState { survey, worker } = bin;
        let crashed = poll_slot(worker, |result| match result {
            Ok(s) => {
                notices.push(Notice::info(format!(
                    "Parts bin {}: {} types, {} scans",
                    s.root.display(),
                    s.types.len(),
                    s.scan_count()
                )));
                *survey = Some(s);
            }
            Err(e) => notices.push(Notice::error(format!("Could not read the parts bin: {e}"))),
        });
        notices.extend(crashed.map(Notice::error));
        let last_model = &mut self.last_model;
        let crashed = poll_slot(model_opening, |(path, result)| match result {
            Ok(m) => {
                notices.push(Notice::info(format!("Model {} opened", path.display())));
                *model = Some(Arc::new(m));
                *last_model = Some(path);
            }
            Err(e) => notices.push(Notice::error(format!("Could not open the model: {e}"))),
        });
        notices.extend(crashed.map(Notice::error));
        self.session.notices.extend(notices);

        self.inspect.poll();
        self.teach.poll(ctx, actions);
        self.review.poll(actions);
        self.sort.poll(actions);
        self.map.poll();
    }

    fn apply(&mut self, ctx: &egui::Context, actions: Vec<Action>) {
        for action in actions {
            match action {
                Action::OpenScan(path) => {
                    self.tab = Tab::Inspect;
                    self.inspect.open(ctx, path, self.session.model.as_ref());
                }
                Action::UseBin(bin) => self.use_bin(ctx, bin),
                Action::RefreshBin => {
                    if let Some(bin) = self.last_bin.clone() {
                        self.use_bin(ctx, bin);
                    }
                }
                Action::UseModel(model, path) => {
                    if path.is_some() {
                        self.last_model = path;
                    }
                    self.session.model = Some(model);
                    self.inspect.model_changed(ctx, self.session.model.as_ref());
                }
                Action::OpenModel(path) => self.open_model(ctx, path),
                Action::ModelSaved(path) => {
                    // The model in use now has a file: name it by that file.
                    if let Some(model) = &self.session.model {
                        let mut named = LoadedModel::clone(model);
                        named.name = inspect::file_name(&path);
                        self.session.model = Some(Arc::new(named));
                    }
                    self.last_model = Some(path);
                }
                Action::Evaluated(evaluation) => self.review.set_evaluation(evaluation),
                Action::Notice(n) => self.notify(n),
            }
        }
    }

    /// Files dropped on the window: a folder is a parts bin (or, on Sort, the folder to sort);
    /// the first file opens in Inspect.
    fn take_dropped_files(&mut self, ctx: &egui::Context) {
        let dropped: Vec<PathBuf> = ctx.input(|i| {
            i.raw
                .dropped_files
                .iter()
                .map(|f| f.path().to_path_buf())
                .collect()
        });
        let Some(first) = dropped.first() else {
            return;
        };
        if first.is_dir() {
            if self.tab == Tab::Sort {
                self.sort.set_folder(first.clone());
            } else {
                self.use_bin(ctx, first.clone());
            }
        } else {
            if dropped.len() > 1 {
                self.notify(Notice::info(format!(
                    "{} files dropped; showing the first. Use the Sort tab for many scans.",
                    dropped.len()
                )));
            }
            self.tab = Tab::Inspect;
            self.inspect
                .open(ctx, first.clone(), self.session.model.as_ref());
        }
    }

    /// The whole UI for one frame (also what the headless tests drive).
    pub(crate) fn show(&mut self, ui: &mut egui::Ui) {
        let ctx = ui.ctx().clone();
        let mut actions = Vec::new();
        self.poll_workers(&ctx, &mut actions);
        self.take_dropped_files(&ctx);
        let open_pressed = ctx.input_mut(|i| {
            i.consume_shortcut(&egui::KeyboardShortcut::new(
                egui::Modifiers::COMMAND,
                egui::Key::O,
            ))
        });
        if open_pressed {
            self.tab = Tab::Inspect;
            self.inspect.open_dialog(&ctx, self.session.model.as_ref());
        }
        let keys = Keys::read(&ctx);

        self.top_bar(ui);
        self.status_bar(ui);

        egui::CentralPanel::default().show(ui, |ui| {
            let Session { bin, model, .. } = &mut self.session;
            let mut shared = Shared {
                bin: self.last_bin.as_deref(),
                survey: bin.survey.as_ref(),
                model: model.as_ref(),
                view: &mut self.view,
                keys,
                actions: &mut actions,
            };
            match self.tab {
                Tab::Inspect => self.inspect.ui(ui, &mut shared),
                Tab::Teach => self.teach.ui(ui, &mut shared),
                Tab::Review => self.review.ui(ui, &mut shared),
                Tab::Sort => self.sort.ui(ui, &mut shared),
                Tab::Map => self.map.ui(ui, &mut shared),
            }
        });
        self.apply(&ctx, actions);

        self.about_window(&ctx);
        self.log_window(&ctx);
        hovered_files_overlay(&ctx);
    }

    fn top_bar(&mut self, ui: &mut egui::Ui) {
        egui::Panel::top("tabs").show(ui, |ui| {
            ui.horizontal(|ui| {
                ui.heading("partsift");
                ui.separator();
                for tab in Tab::ALL {
                    ui.selectable_value(&mut self.tab, tab, tab.name())
                        .on_hover_text(tab.hint());
                }
                ui.with_layout(egui::Layout::right_to_left(egui::Align::Center), |ui| {
                    if ui.button("About").clicked() {
                        self.session.about_open = true;
                    }
                    let dark = ui.ctx().theme() == egui::Theme::Dark;
                    let other = if dark { "Light" } else { "Dark" };
                    if ui
                        .button(other)
                        .on_hover_text("Switch the colour theme")
                        .clicked()
                    {
                        ui.ctx().set_theme(if dark {
                            egui::Theme::Light
                        } else {
                            egui::Theme::Dark
                        });
                    }
                });
            });
        });
    }

    fn status_bar(&mut self, ui: &mut egui::Ui) {
        egui::Panel::bottom("status").show(ui, |ui| {
            ui.horizontal(|ui| {
                let bin_text = match (&self.last_bin, &self.session.bin.survey) {
                    (None, _) => "Parts bin: none".to_owned(),
                    (Some(p), Some(s)) if s.root == *p => {
                        format!("Parts bin: {} ({} scans)", short_path(p), s.scan_count())
                    }
                    (Some(p), _) => format!("Parts bin: {}", short_path(p)),
                };
                ui.label(bin_text);
                ui.separator();
                let model_text = match (&self.session.model, &self.last_model) {
                    (Some(m), _) => format!("Model: {}", m.name),
                    (None, Some(p)) if self.session.model_opening.is_some() => {
                        format!("Model: opening {}", short_path(p))
                    }
                    _ => "Model: none yet".to_owned(),
                };
                ui.label(model_text);
                for busy in [
                    self.session
                        .bin
                        .worker
                        .as_ref()
                        .map(|_| "surveying the parts bin".to_owned()),
                    self.inspect.busy(),
                    self.teach.busy(),
                    self.review.busy(),
                    self.sort.busy(),
                    self.map.busy(),
                ]
                .into_iter()
                .flatten()
                {
                    ui.separator();
                    busy_mark(ui);
                    ui.label(busy);
                }
                ui.with_layout(egui::Layout::right_to_left(egui::Align::Center), |ui| {
                    if !self.session.notices.is_empty() && ui.small_button("Messages").clicked() {
                        self.session.log_open = true;
                    }
                    if let Some(last) = self.session.notices.last() {
                        let text = egui::RichText::new(&last.text);
                        let text = if last.is_error {
                            text.color(palette::error_colour())
                        } else {
                            text
                        };
                        ui.add(egui::Label::new(text).truncate());
                    }
                });
            });
        });
    }

    fn about_window(&mut self, ctx: &egui::Context) {
        egui::Window::new("About partsift")
            .open(&mut self.session.about_open)
            .collapsible(false)
            .resizable(false)
            .default_width(460.0)
            .pivot(egui::Align2::CENTER_CENTER)
            .default_pos(ctx.content_rect().center())
            .show(ctx, |ui| {
                ui.label(
                    "partsift sorts scanned parts by type. It learns the types from a parts bin \
                     (a folder with one sub-folder of labelled scans per part type) and runs \
                     on this computer's processor alone.",
                );
                ui.add_space(6.0);
                caution(ui);
                ui.add_space(6.0);
                ui.strong("Keys and mouse");
                egui::Grid::new("about controls")
                    .num_columns(2)
                    .striped(true)
                    .show(ui, |ui| {
                        for (what, does) in CONTROLS {
                            ui.label(egui::RichText::new(*what).monospace());
                            ui.label(*does);
                            ui.end_row();
                        }
                    });
                ui.add_space(4.0);
                ui.weak(format!("version {}", env!("CARGO_PKG_VERSION")));
            });
    }

    fn log_window(&mut self, ctx: &egui::Context) {
        let notices = &self.session.notices;
        egui::Window::new("Messages")
            .open(&mut self.session.log_open)
            .default_width(520.0)
            .show(ctx, |ui| {
                egui::ScrollArea::vertical()
                    .stick_to_bottom(true)
                    .show(ui, |ui| {
                        for n in notices {
                            if n.is_error {
                                ui.colored_label(palette::error_colour(), &n.text);
                            } else {
                                ui.label(&n.text);
                            }
                        }
                    });
            });
    }
}

impl eframe::App for App {
    fn ui(&mut self, ui: &mut egui::Ui, _frame: &mut eframe::Frame) {
        self.show(ui);
    }

    fn save(&mut self, storage: &mut dyn eframe::Storage) {
        eframe::set_value(storage, eframe::APP_KEY, self);
    }
}

/// A still dot beside "working" texts. Not a spinner: a spinner repaints every frame, and a
/// frame with a large 3D view costs real time while a job wants the processor.
pub(crate) fn busy_mark(ui: &mut egui::Ui) {
    let (rect, _) = ui.allocate_exact_size(egui::vec2(10.0, 10.0), egui::Sense::hover());
    ui.painter()
        .circle_filled(rect.center(), 4.0, palette::accent_colour());
}

/// The caution, framed so it is not overlooked.
pub(crate) fn caution(ui: &mut egui::Ui) {
    egui::Frame::group(ui.style())
        .stroke(egui::Stroke::new(1.0, palette::review_colour()))
        .show(ui, |ui| {
            ui.label(egui::RichText::new(CAUTION).strong());
        });
}

/// The bundled sample scans, when the app is started from the crate folder or its build.
fn default_bin() -> Option<PathBuf> {
    [
        PathBuf::from("sample-scans"),
        Path::new(env!("CARGO_MANIFEST_DIR")).join("sample-scans"),
    ]
    .into_iter()
    .find(|p| p.is_dir())
    // Remembered for the next start, which may run from another folder.
    .map(|p| std::fs::canonicalize(&p).unwrap_or(p))
}

/// The last two components of a path: enough to recognise it in a status line.
pub(crate) fn short_path(path: &Path) -> String {
    let parts: Vec<_> = path.components().collect();
    let start = parts.len().saturating_sub(2);
    let tail: PathBuf = parts[start..].iter().collect();
    if start > 0 {
        format!("…/{}", tail.display())
    } else {
        tail.display().to_string()
    }
}

/// While files are dragged over the window, say what dropping them will do.
fn hovered_files_overlay(ctx: &egui::Context) {
    if ctx.input(|i| i.raw.hovered_files.is_empty()) {
        return;
    }
    let painter = ctx.layer_painter(egui::LayerId::new(
        egui::Order::Foreground,
        egui::Id::unique("drop overlay"),
    ));
    let rect = ctx.content_rect();
    painter.rect_filled(rect, 0.0, egui::Color32::from_black_alpha(170));
    painter.text(
        rect.center(),
        egui::Align2::CENTER_CENTER,
        "Drop a scan to inspect it, or a folder to use it",
        egui::FontId::proportional(24.0),
        egui::Color32::WHITE,
    );
}

#[cfg(test)]
mod tests;
