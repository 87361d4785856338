//! `train`, `classify` and `evaluate`: a parts bin in, a model file out; scans in, verdicts
//! out; a labelled bin in, how well the model sorts it out. Progress goes to standard error.

use std::io::{IsTerminal, Write};
use std::path::{Path, PathBuf};
use std::sync::atomic::{AtomicBool, Ordering};
use std::sync::Mutex;
use std::time::Instant;

use serde_json::json;

use partsift::learn::{
    copy_sorted, evaluate, find_scan_files, scan_bin, train, CancelToken, EvaluationRun, PartsBin,
    PreparedCache, TrainEvent, TrainRun, TrainSettings, TrainedModel, REVIEW_FOLDER,
};
use partsift::net::{Arch, Preset};
use partsift::verdict::{ClassifyOutcome, ClassifyRow};

use super::Outcome;

/// Printed once before the verdicts of `classify` (and in `--help`).
pub(crate) const CAUTION: &str = "The verdict supports, and does not replace, the plant's \
    inspection procedures, gauges and sign-off. Verdicts marked `review` go to a person.";

/// What `partsift train` was asked.
pub(crate) struct TrainArgs {
    pub bin: PathBuf,
    pub output: PathBuf,
    pub preset: Preset,
    pub arch: Arch,
    pub epochs: Option<usize>,
    pub seed: u64,
    pub holdout: f64,
    pub threads: Option<usize>,
    pub json: bool,
}

/// `partsift train`: prepares the bin's scans, trains, saves the best model. Exit 1 (with the
/// model saved) when some scans were skipped.
pub(crate) fn train_command(args: TrainArgs) -> Outcome {
    let started = Instant::now();
    let defaults = TrainSettings::default();
    let plan = match (TrainSettings {
        arch: args.arch,
        preset: args.preset,
        epochs: args.epochs.unwrap_or(defaults.epochs),
        seed: args.seed,
        holdout: args.holdout,
        ..defaults
    })
    .check()
    {
        Ok(plan) => plan,
        Err(e) => return Outcome::Usage(e.to_string()),
    };
    if let Err(message) = check_output_path(&args.output) {
        return Outcome::Usage(message);
    }
    let bin = match scan_bin(&args.bin) {
        Ok(bin) => bin,
        Err(e) => return Outcome::Usage(e.to_string()),
    };
    print_bin_warnings(&bin);
    let cancel = CancelToken::new();
    stop_on_ctrl_c(&cancel);
    let progress = Progress::new();
    let cache = PreparedCache::at_default_location();
    let run = match in_pool(args.threads, || {
        train(
            &bin,
            &plan,
            cache.as_ref(),
            &|e| progress.train_event(&e),
            &cancel,
        )
    }) {
        Ok(Ok(run)) => run,
        Ok(Err(e)) => {
            progress.clear();
            eprintln!("error: {e}");
            return Outcome::SomeFailed;
        }
        Err(message) => return Outcome::Usage(message),
    };
    progress.clear();
    if let Err(e) = run.model.save(&args.output) {
        eprintln!("error: {e}");
        return Outcome::SomeFailed;
    }
    print_train_result(&args, &run, started.elapsed().as_secs_f64());
    if run.skipped.is_empty() {
        Outcome::Ok
    } else {
        Outcome::SomeFailed
    }
}

/// Refuses, before any work, an output that could not be written: a folder, or a file in a
/// folder that does not exist.
fn check_output_path(output: &Path) -> Result<(), String> {
    if output.is_dir() {
        return Err(format!(
            "{}: is a folder; give the model file's name",
            output.display()
        ));
    }
    let parent = output
        .parent()
        .filter(|p| !p.as_os_str().is_empty())
        .unwrap_or(Path::new("."));
    if parent.is_dir() {
        Ok(())
    } else {
        Err(format!(
            "{}: the folder {} does not exist",
            output.display(),
            parent.display()
        ))
    }
}

fn print_bin_warnings(bin: &PartsBin) {
    for warning in bin.warnings() {
        eprintln!("warning: {warning}");
    }
}

fn print_train_result(args: &TrainArgs, run: &TrainRun, seconds: f64) {
    let model = &run.model;
    let summary = model.summary();
    let holdout_accuracy = summary.map_or(0.0, |s| s.holdout_accuracy);
    let epochs = summary.map_or(0, |s| s.epochs_run);
    if args.json {
        let line = json!({
            "model": args.output.to_string_lossy(),
            "part_types": model.part_types(),
            "epochs": epochs,
            "holdout_accuracy": holdout_accuracy,
            "seconds": seconds,
        });
        println!("{line}");
        return;
    }
    println!(
        "wrote {} ({} {}, {} part types)",
        args.output.display(),
        model.arch(),
        model.preset(),
        model.part_types().len()
    );
    if let Some(s) = summary {
        println!(
            "kept the model of epoch {} of {} run: holdout accuracy {}",
            s.best_epoch,
            s.epochs_run,
            percent(s.holdout_accuracy as f64)
        );
    }
    let c = model.calibration();
    println!(
        "calibration: temperature {:.3}; verdicts below {} confidence go to review",
        c.temperature(),
        percent(c.review_threshold() as f64)
    );
    if !run.skipped.is_empty() {
        println!("{} scan(s) were skipped (see above)", run.skipped.len());
    }
    println!("took {}", duration(seconds));
}

/// Ctrl-C asks the run to stop (it keeps the best model so far); a second one quits at once.
fn stop_on_ctrl_c(cancel: &CancelToken) {
    let cancel = cancel.clone();
    let asked = AtomicBool::new(false);
    // Only fails when a handler is already set (never here) or the system refuses: the run
    // then simply cannot be stopped gently.
    let _ = ctrlc::set_handler(move || {
        if asked.swap(true, Ordering::Relaxed) {
            eprintln!("\npartsift: stopped");
            std::process::exit(130);
        }
        eprintln!(
            "\npartsift: stopping after this batch, keeping the best model so far \
             (Ctrl-C again to quit at once)"
        );
        cancel.cancel();
    });
}

/// Runs `work` on a local rayon pool of `threads` threads, or on the global pool.
fn in_pool<T: Send>(threads: Option<usize>, work: impl FnOnce() -> T + Send) -> Result<T, String> {
    match threads {
        None => Ok(work()),
        Some(n) => rayon::ThreadPoolBuilder::new()
            .num_threads(n)
            .build()
            .map(|pool| pool.install(work))
            .map_err(|e| format!("cannot start {n} threads: {e}")),
    }
}

/// `partsift classify`: a verdict for every scan; a bad file is a row with its error.
pub(crate) fn classify_command(
    inputs: &[PathBuf],
    model_path: &Path,
    format: RowFormat,
    copy_to: Option<&Path>,
) -> Outcome {
    let model = match TrainedModel::open(model_path) {
        Ok(model) => model,
        Err(e) => return Outcome::Usage(e.to_string()),
    };
    let (paths, unreadable) = find_scan_files(inputs);
    if paths.is_empty() && unreadable.is_empty() {
        return Outcome::Usage("no scan files (.ply, .xyz, .pcd) found".into());
    }
    let progress = Progress::new();
    let mut rows = model.classify_files(
        &paths,
        &|done, total| progress.count("classifying", done, total),
        &CancelToken::new(),
    );
    progress.clear();
    rows.extend(unreadable.into_iter().map(|s| ClassifyRow {
        path: s.path,
        outcome: ClassifyOutcome::Failed(s.error),
    }));
    match format {
        RowFormat::Json => {
            for row in &rows {
                // A row always serialises: plain strings and numbers.
                println!("{}", serde_json::to_string(row).unwrap_or_default());
            }
        }
        RowFormat::Csv => print_csv(&rows, model.part_types()),
        RowFormat::Human => print_rows(&rows),
    }
    let mut failed = rows.iter().any(|r| r.status_str() == "error");
    if let Some(out_dir) = copy_to {
        failed |= copy_rows(&rows, out_dir, format == RowFormat::Human);
    }
    if failed {
        Outcome::SomeFailed
    } else {
        Outcome::Ok
    }
}

/// How `classify` prints its rows.
#[derive(Clone, Copy, Debug, PartialEq, Eq)]
pub(crate) enum RowFormat {
    Human,
    Json,
    Csv,
}

fn print_rows(rows: &[ClassifyRow]) {
    println!("{CAUTION}\n");
    println!("{:<7} {:>10}  {:<24} scan", "status", "confidence", "type");
    let (mut sure, mut review, mut failed) = (0, 0, 0);
    for row in rows {
        match &row.outcome {
            ClassifyOutcome::Verdict(v) => {
                match row.status_str() {
                    "sure" => sure += 1,
                    _ => review += 1,
                }
                println!(
                    "{:<7} {:>10}  {:<24} {}",
                    row.status_str(),
                    percent(v.confidence as f64),
                    v.part_type,
                    row.path.display()
                );
            }
            ClassifyOutcome::Failed(error) => {
                failed += 1;
                println!("{:<7} {:>10}  {:<24} {error}", "error", "-", "-");
            }
        }
    }
    println!(
        "\n{} scan(s): {sure} sure, {review} to review, {failed} failed",
        rows.len()
    );
}

/// RFC 4180 CSV: a header, then one line per row; the scores of every part type follow
/// the fixed columns.
fn print_csv(rows: &[ClassifyRow], part_types: &[String]) {
    let mut header: Vec<String> = ["path", "type", "confidence", "status", "error"]
        .map(String::from)
        .to_vec();
    header.extend(part_types.iter().cloned());
    println!("{}", csv_line(&header));
    for row in rows {
        let mut fields = vec![row.path.to_string_lossy().into_owned()];
        match &row.outcome {
            ClassifyOutcome::Verdict(v) => {
                fields.extend([
                    v.part_type.clone(),
                    v.confidence.to_string(),
                    row.status_str().to_owned(),
                    String::new(),
                ]);
                fields.extend(v.scores.iter().map(|(_, p)| p.to_string()));
            }
            ClassifyOutcome::Failed(error) => {
                fields.extend([String::new(), String::new(), "error".into(), error.clone()]);
                fields.extend(part_types.iter().map(|_| String::new()));
            }
        }
        println!("{}", csv_line(&fields));
    }
}

/// Fields joined by commas; a field holding a comma, quote or line break is quoted, its
/// quotes doubled (RFC 4180, section 2).
fn csv_line(fields: &[String]) -> String {
    fields
        .iter()
        .map(|f| {
            if f.contains([',', '"', '\n', '\r']) {
                format!("\"{}\"", f.replace('"', "\"\""))
            } else {
                f.clone()
            }
        })
        .collect::<Vec<_>>()
        .join(",")
}

/// Copies the classified scans into `out_dir`; returns whether any copy failed.
fn copy_rows(rows: &[ClassifyRow], out_dir: &Path, human: bool) -> bool {
    let results = copy_sorted(rows, out_dir);
    let mut failed = false;
    let mut copied = 0;
    for result in &results {
        match result {
            Ok(_) => copied += 1,
            Err(e) => {
                failed = true;
                eprintln!("error: {e}");
            }
        }
    }
    if human {
        println!(
            "copied {copied} scan(s) into {} (the ones to review into {})",
            out_dir.display(),
            out_dir.join(REVIEW_FOLDER).display()
        );
    }
    failed
}

/// `partsift evaluate`: how well the model sorts a labelled bin. Exit 1 when some scans
/// were skipped.
pub(crate) fn evaluate_command(bin_path: &Path, model_path: &Path, as_json: bool) -> Outcome {
    let model = match TrainedModel::open(model_path) {
        Ok(model) => model,
        Err(e) => return Outcome::Usage(e.to_string()),
    };
    let bin = match scan_bin(bin_path) {
        Ok(bin) => bin,
        Err(e) => return Outcome::Usage(e.to_string()),
    };
    let progress = Progress::new();
    let cache = PreparedCache::at_default_location();
    let run = evaluate(
        &model,
        &bin,
        cache.as_ref(),
        &|e| progress.train_event(&e),
        &CancelToken::new(),
    );
    progress.clear();
    let run = match run {
        Ok(run) => run,
        Err(e) => {
            eprintln!("error: {e}");
            return Outcome::SomeFailed;
        }
    };
    for name in &run.unknown_types {
        eprintln!("warning: the model does not know part type '{name}': its scans count as wrong");
    }
    if as_json {
        // Plain numbers, strings and lists: serialising cannot fail.
        println!(
            "{}",
            serde_json::to_string(&run.evaluation).unwrap_or_default()
        );
    } else {
        print_evaluation(&run);
    }
    if run.skipped.is_empty() {
        Outcome::Ok
    } else {
        Outcome::SomeFailed
    }
}

fn print_evaluation(run: &EvaluationRun) {
    let m = &run.evaluation.metrics;
    let total = run.outcomes.len();
    let right = run
        .outcomes
        .iter()
        .filter(|o| o.truth == o.predicted)
        .count();
    println!(
        "accuracy           {:>7}  ({right} of {total} scans)",
        percent(m.accuracy)
    );
    println!("balanced accuracy  {:>7}", percent(m.balanced_accuracy));
    let width = m
        .part_types
        .iter()
        .map(String::len)
        .max()
        .unwrap_or(4)
        .max(4);
    println!(
        "\n{:<width$}  {:>9}  {:>7}  {:>7}  {:>7}",
        "type", "precision", "recall", "F1", "support"
    );
    for t in &m.per_type {
        println!(
            "{:<width$}  {:>9}  {:>7}  {:>7}  {:>7}",
            t.part_type,
            percent(t.precision),
            percent(t.recall),
            percent(t.f1),
            t.support
        );
    }
    // Columns are numbered (the names would make the matrix too wide); rows carry both.
    println!("\nconfusion matrix (rows: true type, columns: predicted type)");
    let cell = total
        .to_string()
        .len()
        .max(m.part_types.len().to_string().len())
        + 1;
    let mut line = format!("{:<w$}", "", w = width + 5);
    for c in 1..=m.part_types.len() {
        line += &format!("{c:>cell$}");
    }
    println!("{line}");
    for (t, name) in m.part_types.iter().enumerate() {
        let mut line = format!("{:>3}  {name:<width$}", t + 1);
        for &count in m.confusion.row(t) {
            line += &format!("{count:>cell$}");
        }
        println!("{line}");
    }
    if run.evaluation.misclassified.is_empty() {
        println!("\nno scan was misclassified");
        return;
    }
    println!("\nmisclassified scans (most confident first):");
    for wrong in &run.evaluation.misclassified {
        println!(
            "  {:>7}  {} taken for {}: {}",
            percent(wrong.confidence as f64),
            wrong.true_type,
            wrong.predicted,
            wrong.path.display()
        );
    }
}

fn percent(share: f64) -> String {
    format!("{:.1}%", share * 100.0)
}

/// `1h02m`, `2m10s`, `45s`.
fn duration(seconds: f64) -> String {
    let s = seconds.max(0.0).round() as u64;
    match (s / 3600, s % 3600 / 60, s % 60) {
        (0, 0, s) => format!("{s}s"),
        (0, m, s) => format!("{m}m{s:02}s"),
        (h, m, _) => format!("{h}h{m:02}m"),
    }
}

/// The progress bar on standard error. On a terminal one line is redrawn in place; otherwise
/// (a log, a test) only whole lines are written: one per epoch, and none while counting.
struct Progress {
    terminal: bool,
    /// Whether a bar is drawn on the current line (so the next message clears it first).
    drawn: Mutex<Option<Instant>>,
}

/// Characters of the bar itself.
const BAR_WIDTH: usize = 24;
/// Redraws of a count come at most this often (a terminal flooded with redraws slows the run).
const REDRAW_SECONDS: f64 = 0.1;

impl Progress {
    fn new() -> Progress {
        Progress {
            terminal: std::io::stderr().is_terminal(),
            drawn: Mutex::new(None),
        }
    }

    fn train_event(&self, event: &TrainEvent) {
        match event {
            TrainEvent::Preparing { done, total } => self.count("preparing scans", *done, *total),
            TrainEvent::ScanSkipped { error, .. } => self.line(&format!("skipped: {error}")),
            TrainEvent::EpochDone {
                epoch,
                epochs,
                train_loss,
                train_accuracy,
                holdout_accuracy,
                seconds,
                eta_seconds,
                best,
            } => {
                let mark = if *best { " best" } else { "" };
                self.line(&format!(
                    "epoch {epoch:>3}/{epochs}  loss {train_loss:.3}  train {:>6}  holdout {:>6}{mark:<5}  {}",
                    percent(*train_accuracy as f64),
                    percent(*holdout_accuracy as f64),
                    duration(*seconds as f64),
                ));
                self.bar(
                    &format!(
                        "{epoch}/{epochs} epochs, about {} left",
                        duration(*eta_seconds as f64)
                    ),
                    *epoch,
                    *epochs,
                    true,
                );
            }
            TrainEvent::EarlyStop { epoch } => self.line(&format!(
                "holdout accuracy stopped improving: stopped after epoch {epoch}"
            )),
            TrainEvent::Cancelled => self.line("stopped: keeping the best model so far"),
            TrainEvent::Finished { .. } => self.clear(),
        }
    }

    /// `what done/total` as a bar (terminal only).
    fn count(&self, what: &str, done: usize, total: usize) {
        self.bar(
            &format!("{what} {done}/{total}"),
            done,
            total,
            done == total,
        );
    }

    fn bar(&self, label: &str, done: usize, total: usize, force: bool) {
        if !self.terminal {
            return;
        }
        let mut drawn = self.drawn.lock().unwrap_or_else(|p| p.into_inner());
        let now = Instant::now();
        if !force && drawn.is_some_and(|t| now.duration_since(t).as_secs_f64() < REDRAW_SECONDS) {
            return;
        }
        let filled = (done * BAR_WIDTH)
            .checked_div(total)
            .unwrap_or(0)
            .min(BAR_WIDTH);
        let mut err = std::io::stderr().lock();
        let _ = write!(
            err,
            "\r\x1b[2K[{}{}] {label}",
            "#".repeat(filled),
            "-".repeat(BAR_WIDTH - filled)
        );
        let _ = err.flush();
        *drawn = Some(now);
    }

    /// A whole line, above the bar.
    fn line(&self, text: &str) {
        self.clear();
        eprintln!("{text}");
    }

    /// Removes the bar, if one is drawn.
    fn clear(&self) {
        let mut drawn = self.drawn.lock().unwrap_or_else(|p| p.into_inner());
        if drawn.take().is_some() {
            let mut err = std::io::stderr().lock();
            let _ = write!(err, "\r\x1b[2K");
            let _ = err.flush();
        }
    }
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn csv_fields_are_quoted_as_rfc_4180_says() {
        // RFC 4180 section 2, rules 6 and 7: fields with commas, quotes or line breaks are
        // enclosed in double quotes, and a quote inside is escaped by another quote.
        let fields = ["plain", "a,b", "say \"hi\"", "two\nlines", ""].map(String::from);
        assert_eq!(
            csv_line(&fields),
            "plain,\"a,b\",\"say \"\"hi\"\"\",\"two\nlines\","
        );
    }

    #[test]
    fn durations_read_naturally() {
        assert_eq!(duration(44.6), "45s");
        assert_eq!(duration(130.0), "2m10s");
        assert_eq!(duration(3720.0), "1h02m");
        assert_eq!(duration(-3.0), "0s");
    }
}
