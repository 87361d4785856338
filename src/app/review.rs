//! The Review tab: the confusion matrix (rows true type, columns predicted, cells shaded by
//! their share of the row), precision / recall / F1 per type; a click on a cell lists its
//! scans; a picked scan shows in 3D beside a typical scan of the predicted type, one camera for
//! both. Labels can be fixed here: move a scan to another type's folder (asks first) or set it
//! aside, and undo either during the session.

use eframe::egui;
use std::path::{Path, PathBuf};

use super::backend;
use super::inspect::file_name;
use super::view3d::{Camera, Cloud3d, ColourBy, PointView};
use super::worker::{poll_slot, JobEvent, Reporter, Worker};
use super::{palette, Action, AppError, Keys, Notice, Shared};

/// Precision, recall and F1 of one type, each 0..1; NaN where undefined (no scans).
#[derive(Clone, Copy, Debug, PartialEq)]
pub(crate) struct TypeScores {
    pub(crate) precision: f32,
    pub(crate) recall: f32,
    pub(crate) f1: f32,
}

/// One checked scan.
#[derive(Clone, Debug, PartialEq)]
pub(crate) struct Case {
    pub(crate) path: PathBuf,
    /// Index into [`Evaluation::part_types`] of its label.
    pub(crate) truth: usize,
    /// Index of the predicted type.
    pub(crate) predicted: usize,
    /// Calibrated confidence of the prediction, 0..1.
    pub(crate) confidence: f32,
}

/// How a model does on a set of labelled scans.
#[derive(Clone, Debug, PartialEq)]
pub(crate) struct Evaluation {
    /// Which scans these are, e.g. "holdout scans of the last run".
    pub(crate) scans_from: String,
    pub(crate) part_types: Vec<String>,
    /// Row-major `n x n` counts: `confusion[t * n + p]` scans of true type `t` predicted `p`.
    pub(crate) confusion: Vec<u32>,
    /// One per type.
    pub(crate) per_type: Vec<TypeScores>,
    /// Every scan behind the counts.
    pub(crate) cases: Vec<Case>,
    /// Per type, a typical scan of it (shown beside a mistaken one).
    pub(crate) typical: Vec<Option<PathBuf>>,
}

impl Evaluation {
    fn count(&self, truth: usize, predicted: usize) -> u32 {
        let n = self.part_types.len();
        self.confusion
            .get(truth * n + predicted)
            .copied()
            .unwrap_or(0)
    }

    fn row_total(&self, truth: usize) -> u32 {
        (0..self.part_types.len())
            .map(|p| self.count(truth, p))
            .sum()
    }
}

/// A label fix done this session, so it can be undone.
#[derive(Clone, Debug, PartialEq)]
struct Fix {
    case: usize,
    from: PathBuf,
    to: PathBuf,
    /// "moved to washer" or "set aside".
    what: String,
}

/// A move waiting for the user's yes.
struct PendingMove {
    case: usize,
    to_type: String,
}

/// The picked scan and a typical scan of its predicted type, as loaded.
enum Loaded {
    Scan(Result<Cloud3d, AppError>),
    Typical(Result<Cloud3d, AppError>),
}

#[derive(Default)]
pub(crate) struct ReviewTab {
    evaluation: Option<Evaluation>,
    cell: Option<(usize, usize)>,
    case: Option<usize>,
    scan: Option<Cloud3d>,
    typical: Option<Cloud3d>,
    loading: Option<Worker<Loaded>>,
    checking: Option<Worker<JobEvent<Evaluation>>>,
    checked_fraction: f32,
    camera: Camera,
    views: [PointView; 2],
    fixes: Vec<Fix>,
    pending: Option<PendingMove>,
    error: Option<String>,
}

impl ReviewTab {
    pub(crate) fn set_evaluation(&mut self, evaluation: Evaluation) {
        *self = ReviewTab {
            evaluation: Some(evaluation),
            fixes: std::mem::take(&mut self.fixes),
            ..Default::default()
        };
    }

    pub(crate) fn busy(&self) -> Option<String> {
        if self.checking.is_some() {
            Some(format!(
                "checking the model ({:.0} %)",
                100.0 * self.checked_fraction
            ))
        } else {
            self.loading
                .as_ref()
                .map(|_| "reading scans for Review".to_owned())
        }
    }

    pub(crate) fn poll(&mut self, actions: &mut Vec<Action>) {
        let Self {
            scan,
            typical,
            loading,
            checking,
            checked_fraction,
            error,
            evaluation,
            ..
        } = self;
        let crashed = poll_slot(loading, |event| match event {
            Loaded::Scan(r) => match r {
                Ok(c) => *scan = Some(c),
                Err(e) => *error = Some(e.to_string()),
            },
            Loaded::Typical(r) => match r {
                Ok(c) => *typical = Some(c),
                Err(e) => *error = Some(format!("typical scan: {e}")),
            },
        });
        if let Some(e) = crashed {
            *error = Some(e.to_string());
        }
        let mut checked = None;
        let crashed = poll_slot(checking, |event| match event {
            JobEvent::Fraction(f) => *checked_fraction = f,
            JobEvent::Done(r) => checked = Some(r),
        });
        if let Some(e) = crashed {
            *error = Some(e.to_string());
        }
        match checked {
            Some(Ok(e)) => *evaluation = Some(e),
            Some(Err(e)) => actions.push(Action::Notice(Notice::error(format!(
                "Could not check the model: {e}"
            )))),
            None => {}
        }
    }

    /// Picks the case at `index` and loads it and a typical scan of its predicted type.
    fn pick(&mut self, ctx: &egui::Context, index: usize) {
        let Some(evaluation) = &self.evaluation else {
            return;
        };
        let Some(case) = evaluation.cases.get(index) else {
            return;
        };
        let scan_path = case.path.clone();
        let typical_path = evaluation.typical.get(case.predicted).cloned().flatten();
        self.case = Some(index);
        self.scan = None;
        self.typical = None;
        self.error = None;
        self.camera.reset();
        let job = move |r: &Reporter<Loaded>| {
            r.send(Loaded::Scan(
                backend::load_cloud(&scan_path).map(Cloud3d::centred),
            ));
            if let Some(p) = typical_path {
                r.send(Loaded::Typical(
                    backend::load_cloud(&p).map(Cloud3d::centred),
                ));
            }
        };
        match Worker::spawn(ctx, "review load", job) {
            Ok(w) => self.loading = Some(w),
            Err(e) => self.error = Some(format!("could not read the scan: {e}")),
        }
    }

    /// Scans behind the chosen cell, most confident first (indices into the cases).
    fn cell_cases(&self) -> Vec<usize> {
        let (Some(evaluation), Some((t, p))) = (&self.evaluation, self.cell) else {
            return Vec::new();
        };
        let mut list: Vec<usize> = (0..evaluation.cases.len())
            .filter(|&i| evaluation.cases[i].truth == t && evaluation.cases[i].predicted == p)
            .collect();
        list.sort_by(|&a, &b| {
            evaluation.cases[b]
                .confidence
                .total_cmp(&evaluation.cases[a].confidence)
        });
        list
    }

    pub(crate) fn ui(&mut self, ui: &mut egui::Ui, shared: &mut Shared) {
        if shared.keys.reset_view {
            self.camera.reset();
        }
        let mut step = shared.keys.step;
        let Some(evaluation) = &self.evaluation else {
            self.empty_ui(ui, shared);
            return;
        };
        let mut clicked_cell = None;
        let mut picked = None;
        // Wide enough for the whole matrix (a name column and one cell per type) where it fits.
        let matrix_width = 150.0 + 50.0 * evaluation.part_types.len() as f32;
        egui::Panel::left("review matrix")
            .resizable(true)
            .default_size(matrix_width.clamp(420.0, 760.0))
            .show(ui, |ui| {
                egui::ScrollArea::both().show(ui, |ui| {
                    ui.heading("Confusion matrix");
                    ui.weak(format!(
                        "{}. Rows: true type; columns: predicted type. Click a cell to see its scans.",
                        evaluation.scans_from
                    ));
                    clicked_cell = matrix(ui, evaluation, self.cell);
                    ui.add_space(8.0);
                    ui.heading("Per type");
                    scores_table(ui, evaluation);
                });
            });
        if let Some(cell) = clicked_cell {
            self.cell = Some(cell);
            self.case = None;
            self.scan = None;
            self.typical = None;
        }
        let list = self.cell_cases();
        let mut fix = None;
        let mut undo = false;
        egui::CentralPanel::default().show(ui, |ui| {
            let Some(evaluation) = &self.evaluation else {
                return;
            };
            let Some((t, p)) = self.cell else {
                ui.weak("Click a cell of the matrix: its scans are listed here.");
                return;
            };
            let types = &evaluation.part_types;
            ui.heading(format!(
                "{} scans labelled {} and predicted {}",
                list.len(),
                name(types, t),
                name(types, p)
            ));
            egui::ScrollArea::vertical()
                .id_salt("cell scans")
                .max_height(160.0)
                .show(ui, |ui| {
                    for &i in &list {
                        let case = &evaluation.cases[i];
                        let note = self
                            .fixes
                            .iter()
                            .rev()
                            .find(|f| f.case == i)
                            .map(|f| format!("  ({})", f.what))
                            .unwrap_or_default();
                        let text = format!(
                            "{}  {:.0} %{note}",
                            file_name(&case.path),
                            100.0 * case.confidence
                        );
                        if ui.selectable_label(self.case == Some(i), text).clicked() {
                            picked = Some(i);
                        }
                    }
                });
            if let Some(e) = &self.error {
                ui.colored_label(palette::error_colour(), e);
            }
            if let Some(i) = self.case {
                ui.separator();
                fix = fix_row(ui, evaluation, i, shared.bin);
                if !self.fixes.is_empty() {
                    undo = ui
                        .button(format!(
                            "Undo: {}",
                            self.fixes.last().map_or("", |f| f.what.as_str())
                        ))
                        .clicked();
                }
                ui.separator();
                let case = &evaluation.cases[i];
                shared.view.toolbar(ui, &[ColourBy::Height]);
                ui.columns(2, |cols| {
                    cols[0].strong(format!("This scan: {}", file_name(&case.path)));
                    cols[1].strong(format!("Typical {}", name(types, case.predicted)));
                    let empty = if self.loading.is_some() {
                        "Reading…"
                    } else {
                        "Not available"
                    };
                    let [left, right] = &mut self.views;
                    let a = left.ui(
                        &mut cols[0],
                        &mut self.camera,
                        shared.view,
                        self.scan.as_ref(),
                        empty,
                    );
                    let b = right.ui(
                        &mut cols[1],
                        &mut self.camera,
                        shared.view,
                        self.typical.as_ref(),
                        empty,
                    );
                    if a.hovered() || b.hovered() {
                        step += Keys::arrows(&cols[0]);
                    }
                });
            }
        });
        if step != 0 && !list.is_empty() {
            let at = self.case.and_then(|c| list.iter().position(|&i| i == c));
            let next = match at {
                Some(k) => (k as i64 + i64::from(step)).rem_euclid(list.len() as i64) as usize,
                None => 0,
            };
            picked = Some(list[next]);
        }
        if let Some(i) = picked {
            self.pick(ui.ctx(), i);
        }
        match fix {
            Some(FixChoice::MoveTo(to_type)) => {
                if let Some(case) = self.case {
                    self.pending = Some(PendingMove { case, to_type });
                }
            }
            Some(FixChoice::SetAside) => {
                if let Some(case) = self.case {
                    self.apply_fix(case, Destination::SetAside, shared);
                }
            }
            None => {}
        }
        if undo {
            self.undo(shared);
        }
        self.confirm_move(ui.ctx(), shared);
    }

    fn empty_ui(&mut self, ui: &mut egui::Ui, shared: &mut Shared) {
        egui::CentralPanel::default().show(ui, |ui| {
            ui.heading("Review");
            ui.label("Teach a model to see which part types it confuses, or check the model in use on the parts bin.");
            let can_check = shared.bin.is_some() && shared.model.is_some() && self.checking.is_none();
            if ui
                .add_enabled(can_check, egui::Button::new("Check the model on the parts bin"))
                .on_disabled_hover_text("Needs a parts bin and a model.")
                .clicked()
            {
                if let (Some(bin), Some(model)) = (shared.bin, shared.model) {
                    let bin = bin.to_path_buf();
                    let model = std::sync::Arc::clone(model);
                    let job = move |r: &Reporter<JobEvent<Evaluation>>| {
                        let result = backend::evaluate(&bin, &model, r);
                        r.send(JobEvent::Done(result));
                    };
                    match Worker::spawn(ui.ctx(), "check model", job) {
                        Ok(w) => self.checking = Some(w),
                        Err(e) => self.error = Some(format!("could not start: {e}")),
                    }
                }
            }
            if self.checking.is_some() {
                ui.add(egui::ProgressBar::new(self.checked_fraction).show_percentage());
            }
            if let Some(e) = &self.error {
                ui.colored_label(palette::error_colour(), e);
            }
        });
    }

    /// The yes / no question before a scan moves to another type's folder.
    fn confirm_move(&mut self, ctx: &egui::Context, shared: &mut Shared) {
        let Some(pending) = &self.pending else {
            return;
        };
        let Some(case) = self
            .evaluation
            .as_ref()
            .and_then(|e| e.cases.get(pending.case))
        else {
            self.pending = None;
            return;
        };
        let question = format!(
            "Move {} to the folder of '{}'? Its label becomes '{}'. You can undo this until the app closes.",
            file_name(&case.path),
            pending.to_type,
            pending.to_type
        );
        let mut answer = None;
        egui::Modal::new(egui::Id::unique("confirm move")).show(ctx, |ui| {
            ui.set_max_width(380.0);
            ui.heading("Move this scan?");
            ui.label(question);
            ui.horizontal(|ui| {
                if ui.button("Move").clicked() {
                    answer = Some(true);
                }
                if ui.button("Cancel").clicked() {
                    answer = Some(false);
                }
            });
        });
        match answer {
            Some(true) => {
                if let Some(p) = self.pending.take() {
                    self.apply_fix(p.case, Destination::Type(p.to_type), shared);
                }
            }
            Some(false) => self.pending = None,
            None => {}
        }
    }

    fn apply_fix(&mut self, case: usize, to: Destination, shared: &mut Shared) {
        let Some(bin) = shared.bin else {
            self.error = Some("No parts bin is open, so there is nowhere to move the scan.".into());
            return;
        };
        let Some(evaluation) = &mut self.evaluation else {
            return;
        };
        let Some(c) = evaluation.cases.get_mut(case) else {
            return;
        };
        let truth = name(&evaluation.part_types, c.truth).to_owned();
        let (target, what) = match &to {
            Destination::Type(t) => (bin.join(t), format!("moved to {t}")),
            Destination::SetAside => (set_aside_folder(bin).join(&truth), "set aside".to_owned()),
        };
        let Some(file) = c.path.file_name() else {
            return;
        };
        let to_path = target.join(file);
        match move_file(&c.path, &to_path) {
            Ok(()) => {
                shared.actions.push(Action::Notice(Notice::info(format!(
                    "{}: {what}",
                    file_name(&c.path)
                ))));
                self.fixes.push(Fix {
                    case,
                    from: std::mem::replace(&mut c.path, to_path.clone()),
                    to: to_path,
                    what,
                });
                shared.actions.push(Action::RefreshBin);
                self.error = None;
            }
            Err(e) => self.error = Some(e.to_string()),
        }
    }

    fn undo(&mut self, shared: &mut Shared) {
        let Some(fix) = self.fixes.pop() else {
            return;
        };
        match move_file(&fix.to, &fix.from) {
            Ok(()) => {
                if let Some(c) = self
                    .evaluation
                    .as_mut()
                    .and_then(|e| e.cases.get_mut(fix.case))
                {
                    c.path = fix.from.clone();
                }
                shared.actions.push(Action::Notice(Notice::info(format!(
                    "Undone: {} is back in {}",
                    file_name(&fix.from),
                    fix.from
                        .parent()
                        .map(|p| p.display().to_string())
                        .unwrap_or_default()
                ))));
                shared.actions.push(Action::RefreshBin);
            }
            Err(e) => {
                self.error = Some(format!("undo failed: {e}"));
                self.fixes.push(fix);
            }
        }
    }
}

enum Destination {
    Type(String),
    SetAside,
}

enum FixChoice {
    MoveTo(String),
    SetAside,
}

/// Set-aside scans go beside the parts bin, not in it, so the next teaching does not see
/// them: `<bin>-set-aside/<type>/`.
fn set_aside_folder(bin: &Path) -> PathBuf {
    let name = bin
        .file_name()
        .map(|n| n.to_string_lossy().into_owned())
        .unwrap_or_else(|| "parts-bin".to_owned());
    bin.with_file_name(format!("{name}-set-aside"))
}

/// Moves `from` to `to`, making `to`'s folder; never overwrites a file already at `to`.
fn move_file(from: &Path, to: &Path) -> Result<(), AppError> {
    if to.exists() {
        return Err(AppError::Exists {
            path: to.to_path_buf(),
        });
    }
    if let Some(dir) = to.parent() {
        std::fs::create_dir_all(dir).map_err(|e| AppError::io(dir, e))?;
    }
    std::fs::rename(from, to).map_err(|e| AppError::io(from, e))
}

fn name(types: &[String], i: usize) -> &str {
    types.get(i).map_or("?", String::as_str)
}

/// The matrix as a grid of buttons; returns the cell clicked.
fn matrix(
    ui: &mut egui::Ui,
    evaluation: &Evaluation,
    chosen: Option<(usize, usize)>,
) -> Option<(usize, usize)> {
    let n = evaluation.part_types.len();
    let mut clicked = None;
    egui::Grid::new("confusion")
        .spacing([2.0, 2.0])
        .show(ui, |ui| {
            ui.weak("true \\ predicted");
            for name in &evaluation.part_types {
                ui.add(egui::Label::new(egui::RichText::new(name).strong()).truncate());
            }
            ui.end_row();
            for t in 0..n {
                ui.strong(&evaluation.part_types[t]);
                let total = evaluation.row_total(t).max(1);
                for p in 0..n {
                    let count = evaluation.count(t, p);
                    let share = count as f32 / total as f32;
                    let base = if t == p {
                        palette::sure_colour()
                    } else {
                        palette::review_colour()
                    };
                    let fill = if count == 0 {
                        ui.visuals().faint_bg_color
                    } else {
                        base.gamma_multiply(0.15 + 0.85 * share)
                    };
                    let text_colour = if share > 0.5 {
                        egui::Color32::BLACK
                    } else {
                        ui.visuals().text_color()
                    };
                    let mut button = egui::Button::new(
                        egui::RichText::new(count.to_string()).color(text_colour),
                    )
                    .fill(fill)
                    .min_size(egui::vec2(46.0, 26.0));
                    if chosen == Some((t, p)) {
                        button =
                            button.stroke(egui::Stroke::new(2.0, ui.visuals().strong_text_color()));
                    }
                    let response = ui.add(button).on_hover_text(format!(
                        "{count} scans labelled {} predicted {} ({:.0} % of the row)",
                        evaluation.part_types[t],
                        name(&evaluation.part_types, p),
                        100.0 * share
                    ));
                    if response.clicked() {
                        clicked = Some((t, p));
                    }
                }
                ui.end_row();
            }
        });
    clicked
}

fn scores_table(ui: &mut egui::Ui, evaluation: &Evaluation) {
    let pct = |v: f32| {
        if v.is_nan() {
            "–".to_owned()
        } else {
            format!("{:.0} %", 100.0 * v)
        }
    };
    egui::Grid::new("per type scores")
        .striped(true)
        .num_columns(5)
        .show(ui, |ui| {
            for h in ["Part type", "Scans", "Precision", "Recall", "F1"] {
                ui.strong(h);
            }
            ui.end_row();
            for (t, name) in evaluation.part_types.iter().enumerate() {
                ui.label(name);
                ui.label(evaluation.row_total(t).to_string());
                match evaluation.per_type.get(t) {
                    Some(s) => {
                        ui.label(pct(s.precision));
                        ui.label(pct(s.recall));
                        ui.label(pct(s.f1));
                    }
                    None => {
                        for _ in 0..3 {
                            ui.label("–");
                        }
                    }
                }
                ui.end_row();
            }
        });
}

/// Move to another type (asks first) or set aside.
fn fix_row(
    ui: &mut egui::Ui,
    evaluation: &Evaluation,
    case: usize,
    bin: Option<&Path>,
) -> Option<FixChoice> {
    let c = evaluation.cases.get(case)?;
    let mut choice = None;
    ui.add_enabled_ui(bin.is_some(), |ui| {
        ui.horizontal(|ui| {
            let label = ui.label("Fix the label:");
            egui::ComboBox::from_id_salt("move to type")
                .selected_text("Move to type…")
                .show_ui(ui, |ui| {
                    for (t, name) in evaluation.part_types.iter().enumerate() {
                        if t != c.truth && ui.selectable_label(false, name).clicked() {
                            choice = Some(FixChoice::MoveTo(name.clone()));
                        }
                    }
                })
                .response
                .labelled_by(label.id);
            if ui
                .button("Set aside")
                .on_hover_text("Moves the scan out of the parts bin, into a folder beside it.")
                .clicked()
            {
                choice = Some(FixChoice::SetAside);
            }
        });
    });
    choice
}

#[cfg(test)]
impl ReviewTab {
    /// Shows case `case` of `cell` with its clouds as if they had been read.
    pub(crate) fn show_case(
        &mut self,
        cell: (usize, usize),
        case: usize,
        scan: Cloud3d,
        typical: Cloud3d,
    ) {
        self.cell = Some(cell);
        self.case = self.cell_cases().get(case).copied();
        self.scan = Some(scan);
        self.typical = Some(typical);
    }
    pub(crate) fn fixes_done(&self) -> usize {
        self.fixes.len()
    }
    pub(crate) fn listed(&self) -> usize {
        self.cell_cases().len()
    }
    pub(crate) fn evaluation_shown(&self) -> Option<&Evaluation> {
        self.evaluation.as_ref()
    }
}

#[cfg(test)]
pub(crate) mod tests {
    use super::*;

    /// Three types; two washers taken for spacers.
    pub(crate) fn evaluation(root: &Path) -> Evaluation {
        let types: Vec<String> = ["bracket", "spacer", "washer"].map(String::from).to_vec();
        let mut cases = Vec::new();
        let mut add = |t: usize, p: usize, n: usize, conf: f32| {
            for k in 0..n {
                cases.push(Case {
                    path: root
                        .join(&types[t])
                        .join(format!("{}-{k:02}.ply", types[t])),
                    truth: t,
                    predicted: p,
                    confidence: conf - 0.01 * k as f32,
                });
            }
        };
        add(0, 0, 9, 0.95);
        add(1, 1, 8, 0.9);
        add(2, 2, 7, 0.9);
        add(2, 1, 2, 0.6);
        Evaluation {
            scans_from: "holdout scans of the last run".into(),
            part_types: types.clone(),
            confusion: vec![9, 0, 0, 0, 8, 0, 0, 2, 7],
            per_type: vec![
                TypeScores {
                    precision: 1.0,
                    recall: 1.0,
                    f1: 1.0,
                },
                TypeScores {
                    precision: 0.8,
                    recall: 1.0,
                    f1: 0.889,
                },
                TypeScores {
                    precision: 1.0,
                    recall: 0.778,
                    f1: 0.875,
                },
            ],
            cases,
            typical: vec![None, Some(root.join("spacer/spacer-00.ply")), None],
        }
    }

    #[test]
    fn set_aside_goes_beside_the_bin() {
        assert_eq!(
            set_aside_folder(Path::new("/data/bin")),
            PathBuf::from("/data/bin-set-aside")
        );
    }

    #[test]
    fn move_never_overwrites_and_names_the_file() {
        let dir = std::env::temp_dir().join(format!("partsift-app-move-{}", std::process::id()));
        std::fs::create_dir_all(dir.join("a")).unwrap();
        std::fs::write(dir.join("a/x.ply"), b"one").unwrap();
        std::fs::create_dir_all(dir.join("b")).unwrap();
        std::fs::write(dir.join("b/x.ply"), b"two").unwrap();
        let err = move_file(&dir.join("a/x.ply"), &dir.join("b/x.ply")).unwrap_err();
        assert!(matches!(err, AppError::Exists { .. }), "{err}");
        assert_eq!(std::fs::read(dir.join("b/x.ply")).unwrap(), b"two");
        move_file(&dir.join("a/x.ply"), &dir.join("c/x.ply")).unwrap();
        assert_eq!(std::fs::read(dir.join("c/x.ply")).unwrap(), b"one");
        std::fs::remove_dir_all(&dir).unwrap();
    }
}
