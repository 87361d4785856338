//! The Sort tab: classify every scan of a folder in the background, list the verdicts
//! (sortable, filter to what needs a person), export them as CSV, and copy (never move) the
//! scans into one folder per type, the uncertain ones apart. A file that cannot be read is a
//! row with its error, not a stop.

use eframe::egui;
use std::path::{Component, Path, PathBuf};
use std::sync::Arc;

use super::backend::{self, LoadedModel};
use super::inspect::{file_name, Status, Verdict};
use super::worker::{poll_slot, JobEvent, Reporter, Worker};
use super::{palette, short_path, Action, AppError, Notice, Shared};
use partsift::fsutil::write_atomic;

// The sub-folder for scans whose verdict is `review`: the same as the command line's.
use partsift::learn::REVIEW_FOLDER;

/// Scans classified together before their rows are shown.
const CLASSIFY_CHUNK: usize = 8;

/// One scan of the folder and what became of it.
pub(crate) struct SortRow {
    pub(crate) path: PathBuf,
    pub(crate) outcome: Result<Verdict, AppError>,
}

/// What the sorting job sends.
pub(crate) enum SortEvent {
    /// How many scan files the folder holds.
    Found(usize),
    Row(SortRow),
    /// Every file had its turn (or the folder could not be listed).
    Finished(Result<(), AppError>),
}

/// What copying into per-type folders did.
#[derive(Debug, Default, PartialEq)]
pub(crate) struct CopySummary {
    pub(crate) copied: usize,
    /// Already in the output folder under that name: left as they were.
    pub(crate) already_there: usize,
    pub(crate) failed: Vec<String>,
}

#[derive(Clone, Copy, Debug, PartialEq, Eq, serde::Serialize, serde::Deserialize)]
enum Column {
    File,
    Type,
    Confidence,
    Status,
}

impl Column {
    const ALL: [Column; 4] = [
        Column::File,
        Column::Type,
        Column::Confidence,
        Column::Status,
    ];

    fn title(self) -> &'static str {
        match self {
            Column::File => "File",
            Column::Type => "Type",
            Column::Confidence => "Confidence",
            Column::Status => "Status",
        }
    }

    fn width(self) -> f32 {
        match self {
            Column::File => 300.0,
            Column::Type => 170.0,
            Column::Confidence => 100.0,
            Column::Status => 90.0,
        }
    }
}

#[derive(serde::Serialize, serde::Deserialize)]
#[serde(default)]
pub(crate) struct SortTab {
    folder: Option<PathBuf>,
    output: Option<PathBuf>,
    only_needing_a_person: bool,
    order_by: Column,
    ascending: bool,
    #[serde(skip)]
    rows: Vec<SortRow>,
    #[serde(skip)]
    found: usize,
    #[serde(skip)]
    worker: Option<Worker<SortEvent>>,
    #[serde(skip)]
    copying: Option<Worker<JobEvent<CopySummary>>>,
    #[serde(skip)]
    copied_fraction: f32,
    #[serde(skip)]
    error: Option<String>,
}

impl Default for SortTab {
    fn default() -> Self {
        SortTab {
            folder: None,
            output: None,
            only_needing_a_person: false,
            order_by: Column::File,
            ascending: true,
            rows: Vec::new(),
            found: 0,
            worker: None,
            copying: None,
            copied_fraction: 0.0,
            error: None,
        }
    }
}

impl SortTab {
    pub(crate) fn set_folder(&mut self, folder: PathBuf) {
        self.folder = Some(folder);
    }

    /// Classifies every scan of the chosen folder with `model`, on a worker.
    fn start(&mut self, ctx: &egui::Context, model: Arc<LoadedModel>) {
        let Some(folder) = self.folder.clone() else {
            return;
        };
        self.start_job(ctx, move |r| {
            let files = match backend::scan_files(&folder) {
                Ok(f) => f,
                Err(e) => {
                    r.send(SortEvent::Finished(Err(e)));
                    return;
                }
            };
            r.send(SortEvent::Found(files.len()));
            // A few files at a time, in parallel: rows appear as they come, both cores busy.
            for chunk in files.chunks(CLASSIFY_CHUNK) {
                if r.is_cancelled() {
                    break;
                }
                let outcomes = backend::classify(chunk, &model, r.cancel_token());
                for (path, outcome) in chunk.iter().zip(outcomes) {
                    let path = path.clone();
                    if !r.send(SortEvent::Row(SortRow { path, outcome })) {
                        return;
                    }
                }
            }
            r.send(SortEvent::Finished(Ok(())));
        });
    }

    /// Starts `job` as the sorting run on show, replacing the rows.
    pub(crate) fn start_job(
        &mut self,
        ctx: &egui::Context,
        job: impl FnOnce(&Reporter<SortEvent>) + Send + 'static,
    ) {
        self.rows.clear();
        self.found = 0;
        self.error = None;
        match Worker::spawn(ctx, "sort", job) {
            Ok(w) => self.worker = Some(w),
            Err(e) => self.error = Some(format!("could not start sorting: {e}")),
        }
    }

    pub(crate) fn busy(&self) -> Option<String> {
        if self.worker.is_some() {
            Some(format!("sorting: {} of {}", self.rows.len(), self.found))
        } else {
            self.copying
                .as_ref()
                .map(|_| format!("copying scans ({:.0} %)", 100.0 * self.copied_fraction))
        }
    }

    pub(crate) fn poll(&mut self, actions: &mut Vec<Action>) {
        let Self {
            rows,
            found,
            worker,
            copying,
            copied_fraction,
            error,
            ..
        } = self;
        let crashed = poll_slot(worker, |event| match event {
            SortEvent::Found(n) => *found = n,
            SortEvent::Row(row) => rows.push(row),
            SortEvent::Finished(Ok(())) => {
                let review = rows.iter().filter(|r| needs_a_person(r)).count();
                actions.push(Action::Notice(Notice::info(format!(
                    "Sorted {} scans: {review} need a person",
                    rows.len()
                ))));
            }
            SortEvent::Finished(Err(e)) => *error = Some(e.to_string()),
        });
        if let Some(e) = crashed {
            *error = Some(e.to_string());
        }
        let crashed = poll_slot(copying, |event| match event {
            JobEvent::Fraction(f) => *copied_fraction = f,
            JobEvent::Done(Ok(s)) => {
                let mut text = format!("Copied {} scans", s.copied);
                if s.already_there > 0 {
                    text += &format!(
                        "; {} were already there and were left alone",
                        s.already_there
                    );
                }
                actions.push(Action::Notice(Notice::info(text)));
                if !s.failed.is_empty() {
                    *error = Some(s.failed.join("\n"));
                }
            }
            JobEvent::Done(Err(e)) => *error = Some(e.to_string()),
        });
        if let Some(e) = crashed {
            *error = Some(e.to_string());
        }
    }

    pub(crate) fn ui(&mut self, ui: &mut egui::Ui, shared: &mut Shared) {
        let running = self.worker.is_some();
        let mut start = false;
        let mut export = false;
        let mut copy = false;
        ui.heading("Sort a folder of scans");
        ui.horizontal(|ui| {
            ui.label("Folder:");
            match &self.folder {
                Some(f) => ui
                    .label(short_path(f))
                    .on_hover_text(f.display().to_string()),
                None => ui.weak("none chosen"),
            };
            if ui
                .add_enabled(!running, egui::Button::new("Choose…"))
                .clicked()
            {
                if let Some(f) = rfd::FileDialog::new()
                    .set_title("Folder of scans to sort")
                    .pick_folder()
                {
                    self.folder = Some(f);
                }
            }
            let can_start = !running && self.folder.is_some() && shared.model.is_some();
            if ui
                .add_enabled(can_start, egui::Button::new("Sort"))
                .on_disabled_hover_text(
                    "Needs a folder and a model (teach one, or open one on Teach).",
                )
                .clicked()
            {
                start = true;
            }
            if let Some(w) = &self.worker {
                if ui
                    .add_enabled(!w.is_cancelling(), egui::Button::new("Stop"))
                    .clicked()
                {
                    w.cancel();
                }
            }
        });
        if running || self.found > 0 {
            let fraction = self.rows.len() as f32 / self.found.max(1) as f32;
            ui.add(
                egui::ProgressBar::new(fraction)
                    .text(format!("{} of {} scans", self.rows.len(), self.found))
                    .animate(false),
            );
            let count = |status: Option<Status>| {
                self.rows
                    .iter()
                    .filter(|r| r.outcome.as_ref().ok().map(|v| v.status) == status)
                    .count()
            };
            ui.horizontal(|ui| {
                ui.colored_label(
                    palette::sure_colour(),
                    format!("{} sure", count(Some(Status::Sure))),
                );
                ui.colored_label(
                    palette::review_colour(),
                    format!("{} review", count(Some(Status::Review))),
                );
                ui.colored_label(
                    palette::error_colour(),
                    format!("{} unreadable", count(None)),
                );
            });
        }
        ui.horizontal(|ui| {
            ui.checkbox(&mut self.only_needing_a_person, "Only review and unreadable");
            ui.separator();
            let has_rows = !self.rows.is_empty() && !running;
            export = ui.add_enabled(has_rows, egui::Button::new("Export CSV…")).clicked();
            copy = ui
                .add_enabled(has_rows && self.copying.is_none(), egui::Button::new("Copy into type folders…"))
                .on_hover_text(format!(
                    "Copies each scan into <output>/<type>/; review verdicts into <output>/{REVIEW_FOLDER}/<type>/. Nothing is moved or overwritten."
                ))
                .clicked();
        });
        if let Some(e) = &self.error {
            ui.colored_label(palette::error_colour(), e);
        }
        ui.separator();
        self.table(ui);

        if start {
            if let Some(model) = shared.model {
                self.start(ui.ctx(), Arc::clone(model));
            }
        }
        if export {
            self.export_dialog();
        }
        if copy {
            self.copy_dialog(ui.ctx());
        }
    }

    fn export_dialog(&mut self) {
        let Some(path) = rfd::FileDialog::new()
            .add_filter("CSV", &["csv"])
            .set_file_name("sorted.csv")
            .save_file()
        else {
            return;
        };
        match write_csv(&self.rows, &path) {
            Ok(()) => self.error = None,
            Err(e) => self.error = Some(e.to_string()),
        }
    }

    fn copy_dialog(&mut self, ctx: &egui::Context) {
        let mut dialog = rfd::FileDialog::new().set_title("Output folder for the sorted copies");
        if let Some(o) = &self.output {
            dialog = dialog.set_directory(o);
        }
        let Some(output) = dialog.pick_folder() else {
            return;
        };
        self.output = Some(output.clone());
        let plan = copy_plan(&self.rows, &output);
        let job = move |r: &Reporter<JobEvent<CopySummary>>| {
            let summary = copy_all(&plan, |f| {
                r.send(JobEvent::Fraction(f));
            });
            r.send(JobEvent::Done(Ok(summary)));
        };
        match Worker::spawn(ctx, "copy", job) {
            Ok(w) => self.copying = Some(w),
            Err(e) => self.error = Some(format!("could not start copying: {e}")),
        }
    }

    /// The rows in the chosen order and filter, as indices.
    fn visible_rows(&self) -> Vec<usize> {
        let mut order: Vec<usize> = (0..self.rows.len())
            .filter(|&i| !self.only_needing_a_person || needs_a_person(&self.rows[i]))
            .collect();
        let rows = &self.rows;
        order.sort_by(|&a, &b| {
            let (ra, rb) = (&rows[a], &rows[b]);
            let o = match self.order_by {
                Column::File => file_name(&ra.path).cmp(&file_name(&rb.path)),
                Column::Type => type_text(ra).cmp(type_text(rb)),
                Column::Confidence => confidence(ra).total_cmp(&confidence(rb)),
                Column::Status => status_text(ra).cmp(status_text(rb)),
            };
            if self.ascending {
                o
            } else {
                o.reverse()
            }
        });
        order
    }

    fn table(&mut self, ui: &mut egui::Ui) {
        let row_height = ui.text_style_height(&egui::TextStyle::Body) + 4.0;
        ui.horizontal(|ui| {
            for c in Column::ALL {
                let header =
                    egui::Button::new(egui::RichText::new(c.title()).strong()).frame(false);
                let response = in_column(ui, c, row_height, |ui| ui.add(header))
                    .on_hover_text("Click to sort by this column");
                if self.order_by == c {
                    sort_mark(ui, response.rect, self.ascending);
                }
                if response.clicked() {
                    if self.order_by == c {
                        self.ascending = !self.ascending;
                    } else {
                        self.order_by = c;
                        self.ascending = true;
                    }
                }
            }
        });
        let order = self.visible_rows();
        if order.is_empty() {
            ui.weak(if self.rows.is_empty() {
                "Choose a folder and press Sort."
            } else {
                "Nothing needs a person."
            });
            return;
        }
        egui::ScrollArea::vertical().auto_shrink(false).show_rows(
            ui,
            row_height,
            order.len(),
            |ui, range| {
                for &i in &order[range] {
                    let row = &self.rows[i];
                    ui.horizontal(|ui| {
                        let cell = |ui: &mut egui::Ui, c: Column, text: egui::RichText| {
                            in_column(ui, c, row_height, |ui| {
                                ui.add(egui::Label::new(text).truncate())
                            });
                        };
                        cell(ui, Column::File, egui::RichText::new(file_name(&row.path)));
                        match &row.outcome {
                            Ok(v) => {
                                cell(ui, Column::Type, egui::RichText::new(&v.part_type));
                                cell(
                                    ui,
                                    Column::Confidence,
                                    egui::RichText::new(format!("{:.0} %", 100.0 * v.confidence)),
                                );
                                let status = egui::RichText::new(v.status.name()).strong();
                                let status = match v.status {
                                    Status::Sure => status.color(palette::sure_colour()),
                                    Status::Review => status.color(palette::review_colour()),
                                };
                                cell(ui, Column::Status, status);
                            }
                            Err(e) => {
                                cell(ui, Column::Type, egui::RichText::new("–"));
                                cell(ui, Column::Confidence, egui::RichText::new("–"));
                                cell(
                                    ui,
                                    Column::Status,
                                    egui::RichText::new("error")
                                        .strong()
                                        .color(palette::error_colour()),
                                );
                                ui.colored_label(palette::error_colour(), e.to_string());
                            }
                        }
                    });
                }
            },
        );
    }
}

/// `add` in a cell of column `c`'s width, left-aligned (numbers right-aligned).
fn in_column(
    ui: &mut egui::Ui,
    c: Column,
    height: f32,
    add: impl FnOnce(&mut egui::Ui) -> egui::Response,
) -> egui::Response {
    let layout = if c == Column::Confidence {
        egui::Layout::right_to_left(egui::Align::Center)
    } else {
        egui::Layout::left_to_right(egui::Align::Center)
    };
    ui.allocate_ui_with_layout(egui::vec2(c.width(), height), layout, |ui| {
        ui.set_min_width(c.width());
        add(ui)
    })
    .inner
}

/// A small triangle just after a column header's text: point up = ascending.
fn sort_mark(ui: &egui::Ui, header: egui::Rect, ascending: bool) {
    let c = egui::pos2(header.right() + 8.0, header.center().y);
    let (tip, base) = if ascending { (-4.0, 3.0) } else { (4.0, -3.0) };
    let points = vec![
        c + egui::vec2(0.0, tip),
        c + egui::vec2(-4.0, base),
        c + egui::vec2(4.0, base),
    ];
    ui.painter().add(egui::Shape::convex_polygon(
        points,
        ui.visuals().strong_text_color(),
        egui::Stroke::NONE,
    ));
}

fn needs_a_person(row: &SortRow) -> bool {
    !matches!(&row.outcome, Ok(v) if v.status == Status::Sure)
}

fn type_text(row: &SortRow) -> &str {
    row.outcome.as_ref().map_or("", |v| v.part_type.as_str())
}

fn confidence(row: &SortRow) -> f32 {
    row.outcome.as_ref().map_or(-1.0, |v| v.confidence)
}

fn status_text(row: &SortRow) -> &'static str {
    row.outcome.as_ref().map_or("error", |v| v.status.name())
}

/// One CSV field, quoted when it holds a comma, a quote or a line break (RFC 4180, section 2).
fn csv_field(text: &str) -> String {
    if text.contains([',', '"', '\n', '\r']) {
        format!("\"{}\"", text.replace('"', "\"\""))
    } else {
        text.to_owned()
    }
}

/// Writes `file,type,confidence,status,error` rows to `path` atomically, CRLF line ends as
/// RFC 4180 gives them. Confidence is 0..1 with three decimals.
fn write_csv(rows: &[SortRow], path: &Path) -> Result<(), AppError> {
    write_atomic(path, |out| {
        out.write_all(b"file,type,confidence,status,error\r\n")?;
        for row in rows {
            let file = csv_field(&row.path.display().to_string());
            let line = match &row.outcome {
                Ok(v) => format!(
                    "{file},{},{:.3},{},\r\n",
                    csv_field(&v.part_type),
                    v.confidence,
                    v.status.name()
                ),
                Err(e) => format!("{file},,,error,{}\r\n", csv_field(&e.to_string())),
            };
            out.write_all(line.as_bytes())?;
        }
        Ok(())
    })
    .map_err(|e| AppError::io(path, e))
}

/// Source and destination of each copy; rows without a verdict are not copied.
fn copy_plan(rows: &[SortRow], output: &Path) -> Vec<(PathBuf, Result<PathBuf, String>)> {
    rows.iter()
        .filter_map(|row| {
            let v = row.outcome.as_ref().ok()?;
            let file = row.path.file_name()?;
            // A type name comes from a folder name, but it must not climb out of the output.
            let plain = {
                let mut c = Path::new(&v.part_type).components();
                matches!((c.next(), c.next()), (Some(Component::Normal(_)), None))
            };
            let to = if !plain {
                Err(format!(
                    "{}: the type name '{}' is not a plain folder name",
                    row.path.display(),
                    v.part_type
                ))
            } else if v.status == Status::Review {
                Ok(output.join(REVIEW_FOLDER).join(&v.part_type).join(file))
            } else {
                Ok(output.join(&v.part_type).join(file))
            };
            Some((row.path.clone(), to))
        })
        .collect()
}

/// Copies each planned file (atomically: a temporary file renamed into place), leaving any
/// file already at the destination alone. Reports progress 0..1 through `progress`.
fn copy_all(
    plan: &[(PathBuf, Result<PathBuf, String>)],
    mut progress: impl FnMut(f32),
) -> CopySummary {
    let mut summary = CopySummary::default();
    for (k, (from, to)) in plan.iter().enumerate() {
        progress(k as f32 / plan.len().max(1) as f32);
        let to = match to {
            Ok(to) => to,
            Err(why) => {
                summary.failed.push(why.clone());
                continue;
            }
        };
        if to.exists() {
            summary.already_there += 1;
            continue;
        }
        let result = to
            .parent()
            .map_or(Ok(()), std::fs::create_dir_all)
            .and_then(|()| {
                let mut source = std::fs::File::open(from)?;
                write_atomic(to, |out| std::io::copy(&mut source, out).map(|_| ()))
            });
        match result {
            Ok(()) => summary.copied += 1,
            Err(e) => summary
                .failed
                .push(format!("{} -> {}: {e}", from.display(), to.display())),
        }
    }
    progress(1.0);
    summary
}

#[cfg(test)]
impl SortTab {
    pub(crate) fn visible_count(&self) -> usize {
        self.visible_rows().len()
    }
}

#[cfg(test)]
mod tests {
    use super::*;
    use partsift::scan::{Location, ScanError};

    fn temp_dir(name: &str) -> PathBuf {
        let d = std::env::temp_dir().join(format!("partsift-app-{name}-{}", std::process::id()));
        let _ = std::fs::remove_dir_all(&d);
        std::fs::create_dir_all(&d).unwrap();
        d
    }

    fn row(path: &str, outcome: Result<(&str, f32, Status), &'static str>) -> SortRow {
        SortRow {
            path: PathBuf::from(path),
            outcome: outcome
                .map(|(t, c, s)| Verdict {
                    part_type: t.into(),
                    confidence: c,
                    status: s,
                })
                .map_err(|what| {
                    AppError::Scan(ScanError::new(
                        Path::new(path),
                        Some(Location::Line(3)),
                        what,
                    ))
                }),
        }
    }

    #[test]
    fn csv_quotes_per_rfc_4180() {
        // RFC 4180 section 2, rules 6 and 7: fields with commas, quotes or line breaks are
        // enclosed in double quotes, and a quote inside is written twice.
        assert_eq!(csv_field("plain"), "plain");
        assert_eq!(csv_field("a,b"), "\"a,b\"");
        assert_eq!(csv_field("say \"hi\""), "\"say \"\"hi\"\"\"");
        assert_eq!(csv_field("two\nlines"), "\"two\nlines\"");
    }

    #[test]
    fn csv_has_a_row_per_scan_errors_included() {
        let dir = temp_dir("csv");
        let rows = vec![
            row("/s/a.ply", Ok(("bracket", 0.9, Status::Sure))),
            row("/s/b,2.ply", Err("bad number")),
        ];
        let path = dir.join("out.csv");
        write_csv(&rows, &path).unwrap();
        let text = std::fs::read_to_string(&path).unwrap();
        assert_eq!(
            text,
            "file,type,confidence,status,error\r\n/s/a.ply,bracket,0.900,sure,\r\n\"/s/b,2.ply\",,,error,\"/s/b,2.ply, line 3: bad number\"\r\n"
        );
        std::fs::remove_dir_all(&dir).unwrap();
    }

    #[test]
    fn copies_go_to_type_folders_and_review_apart_without_overwriting() {
        let dir = temp_dir("copy");
        let src = dir.join("in");
        std::fs::create_dir_all(&src).unwrap();
        for n in ["a.ply", "b.ply", "c.ply"] {
            std::fs::write(src.join(n), n.as_bytes()).unwrap();
        }
        let out = dir.join("out");
        std::fs::create_dir_all(out.join("washer")).unwrap();
        std::fs::write(out.join("washer/c.ply"), b"older").unwrap();
        let p = |n: &str| src.join(n).display().to_string();
        let rows = vec![
            row(&p("a.ply"), Ok(("bracket", 0.9, Status::Sure))),
            row(&p("b.ply"), Ok(("bracket", 0.4, Status::Review))),
            row(&p("c.ply"), Ok(("washer", 0.9, Status::Sure))),
            row(&p("d.ply"), Err("unreadable")),
            row(&p("e.ply"), Ok(("../escape", 0.9, Status::Sure))),
        ];
        let summary = copy_all(&copy_plan(&rows, &out), |_| {});
        assert_eq!(summary.copied, 2);
        assert_eq!(summary.already_there, 1);
        assert_eq!(summary.failed.len(), 1, "{:?}", summary.failed);
        assert_eq!(std::fs::read(out.join("bracket/a.ply")).unwrap(), b"a.ply");
        assert_eq!(
            std::fs::read(out.join(REVIEW_FOLDER).join("bracket/b.ply")).unwrap(),
            b"b.ply"
        );
        assert_eq!(std::fs::read(out.join("washer/c.ply")).unwrap(), b"older");
        assert!(src.join("a.ply").exists(), "copied, not moved");
        std::fs::remove_dir_all(&dir).unwrap();
    }

    #[test]
    fn filter_and_order() {
        let mut tab = SortTab {
            rows: vec![
                row("/s/b.ply", Ok(("bracket", 0.9, Status::Sure))),
                row("/s/a.ply", Ok(("washer", 0.5, Status::Review))),
                row("/s/c.ply", Err("bad")),
            ],
            ..Default::default()
        };
        assert_eq!(tab.visible_rows(), vec![1, 0, 2]);
        tab.order_by = Column::Confidence;
        tab.ascending = false;
        assert_eq!(tab.visible_rows(), vec![0, 1, 2]);
        tab.only_needing_a_person = true;
        assert_eq!(tab.visible_rows(), vec![1, 2]);
    }
}
