//! Headless tests that drive the real [`App`] state through egui_kittest: find widgets by
//! label, click, run frames, check the state. The last tests run the main flows through the
//! real library on sample scans; the others feed a tab exactly the events the library sends,
//! to reach states (a slow run, a rare error) that real data gives only by chance.

use eframe::egui;
use std::path::{Path, PathBuf};
use std::sync::Arc;
use std::time::{Duration, Instant};

use egui_kittest::kittest::Queryable;
use egui_kittest::Harness;

use super::backend::LoadedModel;
use super::inspect::{Cleanup, InspectEvent, Judgement, ScanShown, Status, TrueSize, Verdict};
use super::sort::{SortEvent, SortRow};
use super::teach::{BinSurvey, EpochStats, Taught, TeachEvent, TypeEntry};
use super::view3d::tests::practice_cloud;
use super::*;
use partsift::scan::{Location, ScanError};

fn harness(app: App) -> Harness<'static, App> {
    Harness::builder()
        .with_size(egui::vec2(1280.0, 800.0))
        .build_ui_state(|ui, app: &mut App| app.show(ui), app)
}

/// Runs frames until `done` holds (workers finish on their own threads). Generous: the
/// library's real work runs beside other tests on a shared machine.
fn run_until(h: &mut Harness<'static, App>, done: impl Fn(&App) -> bool) {
    let deadline = Instant::now() + Duration::from_secs(180);
    while !done(h.state()) {
        assert!(Instant::now() < deadline, "timed out");
        h.step();
        std::thread::sleep(Duration::from_millis(5));
    }
    h.run_steps(3);
}

/// The bundled parts bin.
fn sample_scans() -> PathBuf {
    Path::new(env!("CARGO_MANIFEST_DIR")).join("sample-scans")
}

/// A fresh empty folder for one test.
fn temp_dir(name: &str) -> PathBuf {
    let dir = std::env::temp_dir().join(format!("partsift-app-{name}-{}", std::process::id()));
    let _ = std::fs::remove_dir_all(&dir);
    std::fs::create_dir_all(&dir).unwrap();
    dir
}

/// The part types of [`small_bin`].
const SMALL_BIN_TYPES: [&str; 3] = ["flat_washer", "hex_bolt", "spur_gear"];

/// A copy of the first six sample scans of three types: small enough to teach on in seconds.
fn small_bin(name: &str) -> PathBuf {
    let bin = temp_dir(name);
    for part_type in SMALL_BIN_TYPES {
        let to = bin.join(part_type);
        std::fs::create_dir_all(&to).unwrap();
        let scans = backend::scan_files(&sample_scans().join(part_type)).unwrap();
        for scan in scans.iter().take(6) {
            std::fs::copy(scan, to.join(scan.file_name().unwrap())).unwrap();
        }
    }
    bin
}

/// A real model, taught once per test run through the library on [`small_bin`] (quick
/// preset, three epochs): the flows below run the real library calls with it.
fn trained() -> &'static partsift::learn::TrainedModel {
    use partsift::learn::{scan_bin, train, CancelToken, TrainSettings};
    static MODEL: std::sync::OnceLock<partsift::learn::TrainedModel> = std::sync::OnceLock::new();
    MODEL.get_or_init(|| {
        let bin = scan_bin(&small_bin("model")).unwrap();
        let plan = TrainSettings {
            epochs: 3,
            seed: 5,
            ..TrainSettings::default()
        }
        .check()
        .unwrap();
        train(&bin, &plan, None, &|_| {}, &CancelToken::new())
            .unwrap()
            .model
    })
}

fn model(name: &str) -> LoadedModel {
    LoadedModel::new(name.into(), trained().clone())
}

#[test]
fn tabs_switch_on_click() {
    let mut h = harness(App::default());
    h.run();
    for (label, tab) in [
        ("Teach", Tab::Teach),
        ("Review", Tab::Review),
        ("Sort", Tab::Sort),
        ("Map", Tab::Map),
        ("Inspect", Tab::Inspect),
    ] {
        h.get_by_role_and_label(egui::accesskit::Role::Button, label)
            .click();
        h.run();
        assert_eq!(h.state().tab, tab);
    }
    h.get_by_role_and_label(egui::accesskit::Role::Button, "Teach")
        .click();
    h.run();
    h.get_by_label("Start teaching");
}

#[test]
fn about_states_the_caution() {
    let mut h = harness(App::default());
    h.run();
    assert!(h.query_by_label_contains("does not replace").is_none());
    h.get_by_label("About").click();
    h.run();
    h.get_by_label_contains("supports, and does not replace, the plant's inspection procedures");
    h.get_by_label_contains("Uncertain (review) verdicts go to a person");
}

#[test]
fn review_verdict_is_shown_with_the_caution() {
    let mut app = App::default();
    let mut h = harness(App::default());
    let path = PathBuf::from("/scans/odd-part.ply");
    std::mem::swap(h.state_mut(), &mut app);
    let ctx = h.ctx.clone();
    h.state_mut().inspect.start(&ctx, path.clone(), move |r| {
        r.send(InspectEvent::Shown(Ok(ScanShown {
            cloud: practice_cloud(2000, 1),
            facts: vec!["ply-binary-le".into(), "2000 points".into()],
        })));
        r.send(InspectEvent::CleanedUp(Ok(Cleanup {
            size: TrueSize {
                extents_mm: [50.0, 50.0, 30.0],
                radius_mm: 29.0,
            },
            report: vec![partsift::prep::StepLine {
                step: "table plane",
                points: 600,
                note: String::new(),
            }],
            warnings: vec!["a second object of 90 points beside the part".into()],
            levelled: None,
        })));
        r.send(InspectEvent::Judged(Ok(Judgement {
            verdict: Verdict {
                part_type: "flange".into(),
                confidence: 0.41,
                status: Status::Review,
            },
            scores: vec![
                ("flange".into(), 0.41),
                ("bushing".into(), 0.38),
                ("washer".into(), 0.21),
            ],
            prepared: None,
        })));
    });
    run_until(&mut h, |a| !a.inspect.is_working());
    h.get_by_label("REVIEW");
    h.get_by_label("Not sure enough: a person must check this part.");
    h.get_by_label(CAUTION);
    h.get_by_label("confidence 41 %");
    h.get_by_label_contains("50.0 × 50.0 × 30.0 mm");
    h.get_by_label("a second object of 90 points beside the part");
    h.get_by_label("table plane");
}

#[test]
fn sure_verdict_has_no_review_block() {
    let mut h = harness(App::default());
    let ctx = h.ctx.clone();
    h.state_mut()
        .inspect
        .start(&ctx, PathBuf::from("/s/a.ply"), |r| {
            r.send(InspectEvent::Judged(Ok(Judgement {
                verdict: Verdict {
                    part_type: "washer".into(),
                    confidence: 0.97,
                    status: Status::Sure,
                },
                scores: vec![("washer".into(), 0.97)],
                prepared: None,
            })));
        });
    run_until(&mut h, |a| !a.inspect.is_working());
    h.get_by_label(" sure ");
    assert!(h.query_by_label("REVIEW").is_none());
}

#[test]
fn confusion_cell_click_lists_its_scans() {
    let root = PathBuf::from("/bin");
    let mut app = App::default();
    app.review.set_evaluation(review::tests::evaluation(&root));
    app.tab = Tab::Review;
    let mut h = harness(app);
    h.run();
    assert_eq!(h.state().review.listed(), 0);
    // The only cell holding 2: washers predicted as spacers.
    h.get_by_label("2").click();
    h.run();
    assert_eq!(h.state().review.listed(), 2);
    h.get_by_label("2 scans labelled washer and predicted spacer");
    let first = h.get_by_label_contains("washer-00.ply");
    first.click();
    h.step();
    assert!(
        h.state().review.busy().is_some(),
        "the scans are read on a worker"
    );
    // The listed scans do not exist: the app must say so plainly, not fail.
    run_until(&mut h, |a| a.review.busy().is_none());
    h.get_by_label_contains("cannot read the file");
}

#[test]
fn teach_shows_progress_and_stop_keeps_the_model() {
    let mut h = harness(App::default());
    h.state_mut().tab = Tab::Teach;
    let ctx = h.ctx.clone();
    h.state_mut().teach.start_job(&ctx, None, |r| {
        let mut epoch = 0;
        while !r.is_cancelled() && epoch < 10_000 {
            epoch += 1;
            r.send(TeachEvent::Progress {
                fraction: epoch as f32 / 10_000.0,
                doing: format!("epoch {epoch} of 10000"),
            });
            r.send(TeachEvent::Epoch(EpochStats {
                epoch,
                loss: 1.0 / epoch as f32,
                train_accuracy: 0.5,
                holdout_accuracy: 0.4,
            }));
            std::thread::sleep(Duration::from_millis(2));
        }
        r.send(TeachEvent::Finished(Ok(Taught {
            model: Box::new(model("best so far")),
            evaluation: None,
            stopped: true,
        })));
    });
    run_until(&mut h, |a| a.teach.epochs_seen() >= 3);
    assert!(h.state().teach.is_running());
    h.get_by_label("Stop").click();
    run_until(&mut h, |a| !a.teach.is_running());
    let app = h.state();
    assert_eq!(
        app.session.model.as_ref().map(|m| m.name.as_str()),
        Some("best so far")
    );
    assert!(app
        .session
        .notices
        .iter()
        .any(|n| n.text.contains("best model so far")));
}

#[test]
fn sort_keeps_going_past_a_corrupt_file() {
    let mut h = harness(App::default());
    h.state_mut().tab = Tab::Sort;
    let ctx = h.ctx.clone();
    h.state_mut().sort.start_job(&ctx, |r| {
        r.send(SortEvent::Found(3));
        let verdict = |t: &str, c: f32, status| {
            Ok(Verdict {
                part_type: t.into(),
                confidence: c,
                status,
            })
        };
        r.send(SortEvent::Row(SortRow {
            path: "/in/a.ply".into(),
            outcome: verdict("bracket", 0.93, Status::Sure),
        }));
        r.send(SortEvent::Row(SortRow {
            path: "/in/broken.ply".into(),
            outcome: Err(AppError::Scan(ScanError::new(
                Path::new("/in/broken.ply"),
                Some(Location::Byte(1024)),
                "file ends inside a vertex",
            ))),
        }));
        r.send(SortEvent::Row(SortRow {
            path: "/in/c.ply".into(),
            outcome: verdict("washer", 0.52, Status::Review),
        }));
        r.send(SortEvent::Finished(Ok(())));
    });
    run_until(&mut h, |a| a.sort.busy().is_none());
    h.get_by_label("broken.ply");
    h.get_by_label_contains("byte 1024: file ends inside a vertex");
    h.get_by_label("c.ply");
    assert_eq!(h.state().sort.visible_count(), 3);
    h.get_by_label("Only review and unreadable").click();
    h.run();
    assert_eq!(h.state().sort.visible_count(), 2);
    assert!(h.query_by_label("a.ply").is_none());
}

#[test]
fn dropped_scan_goes_to_inspect_and_errors_read_plainly() {
    #[derive(Debug)]
    struct Dropped(PathBuf);
    impl egui::DroppedFile for Dropped {
        fn path(&self) -> &Path {
            &self.0
        }
        fn bytes(&self) -> Result<Vec<u8>, String> {
            Ok(Vec::new())
        }
    }
    let mut h = harness(App::default());
    h.state_mut().tab = Tab::Map;
    let path = PathBuf::from("/nowhere/dropped.xyz");
    h.input_mut()
        .dropped_files
        .push(Arc::new(Dropped(path.clone())));
    h.step();
    assert_eq!(h.state().tab, Tab::Inspect);
    assert_eq!(h.state().inspect.current(), Some(path.as_path()));
    run_until(&mut h, |a| !a.inspect.is_working());
    assert!(h
        .state()
        .inspect
        .error()
        .is_some_and(|e| e.contains("/nowhere/dropped.xyz: cannot read the file")));
}

#[test]
fn n_and_p_step_through_the_parts_bin() {
    let mut app = App::default();
    app.session.bin.survey = Some(BinSurvey {
        root: "/bin".into(),
        types: vec![TypeEntry {
            name: "washer".into(),
            scans: vec!["/bin/washer/a.ply".into(), "/bin/washer/b.ply".into()],
            warnings: vec!["only 2 scans".into()],
        }],
        ..Default::default()
    });
    let mut h = harness(app);
    h.run();
    // Keys still work after the mouse used a button.
    h.get_by_role_and_label(egui::accesskit::Role::Button, "Teach")
        .click();
    h.run();
    h.get_by_role_and_label(egui::accesskit::Role::Button, "Inspect")
        .click();
    h.run();
    h.key_press(egui::Key::N);
    h.step();
    assert_eq!(
        h.state().inspect.current(),
        Some(Path::new("/bin/washer/a.ply"))
    );
    h.key_press(egui::Key::N);
    h.step();
    assert_eq!(
        h.state().inspect.current(),
        Some(Path::new("/bin/washer/b.ply"))
    );
    h.key_press(egui::Key::P);
    h.step();
    assert_eq!(
        h.state().inspect.current(),
        Some(Path::new("/bin/washer/a.ply"))
    );
}

#[test]
fn map_marks_likely_mislabelled_scans() {
    let mut app = App::default();
    app.map.set_data(map::MapData {
        part_types: vec!["bracket".into(), "washer".into()],
        dots: vec![
            map::MapDot {
                path: "/bin/bracket/a.ply".into(),
                label: 0,
                xy: [0.0, 0.0],
                suspicious: false,
            },
            map::MapDot {
                path: "/bin/washer/b.ply".into(),
                label: 1,
                xy: [0.1, 0.0],
                suspicious: true,
            },
        ],
    });
    app.tab = Tab::Map;
    let mut h = harness(app);
    h.run();
    assert!(h.state().map.has_data());
    h.get_by_label("likely mislabelled");
    h.get_by_label("bracket");
}

#[test]
fn remembered_state_keeps_choices_and_drops_heavy_data() {
    let mut app = App {
        last_bin: Some("/bin".into()),
        tab: Tab::Sort,
        ..Default::default()
    };
    app.view.point_size = 5.0;
    app.session.model = Some(Arc::new(model("in memory")));
    app.session.notices.push(Notice::info("hello"));
    let text = serde_json::to_string(&app).unwrap();
    let back: App = serde_json::from_str(&text).unwrap();
    assert_eq!(back.last_bin, Some(PathBuf::from("/bin")));
    assert_eq!(back.tab, Tab::Sort);
    assert_eq!(back.view.point_size, 5.0);
    assert!(back.session.model.is_none() && back.session.notices.is_empty());
    // Fields added later, or missing from an old file, take their defaults.
    let old: App = serde_json::from_str(r#"{"tab":"Teach"}"#).unwrap();
    assert_eq!(old.tab, Tab::Teach);
    assert_eq!(old.view, ViewSettings::default());
}

/// Not a check: opens the real window on practice data, shows each tab in turn and saves a
/// screenshot of each with ImageMagick's `import` (for the README and for looking at it).
/// Run under a virtual X server:
/// `PARTSIFT_SHOTS=/work/shots xvfb-run -s "-screen 0 1400x900x24" cargo test --release screenshots -- --ignored`
#[test]
#[ignore = "opens a window; run under xvfb-run"]
fn screenshots() {
    use winit::platform::x11::EventLoopBuilderExtX11;
    let dir = std::env::var_os("PARTSIFT_SHOTS")
        .map(PathBuf::from)
        .unwrap_or_else(|| std::env::temp_dir().join("partsift-shots"));
    std::fs::create_dir_all(&dir).unwrap();
    let options = eframe::NativeOptions {
        viewport: egui::ViewportBuilder::default()
            .with_inner_size([1400.0, 900.0])
            .with_position([0.0, 0.0])
            .with_decorations(false),
        // libtest runs each test on its own thread.
        event_loop_builder: Some(Box::new(|b| {
            b.with_any_thread(true);
        })),
        persist_window: false,
        persistence_path: Some(dir.join("state")),
        ..Default::default()
    };
    eframe::run_native(
        "partsift-screenshots",
        options,
        Box::new(move |cc| Ok(Box::new(ShotRunner::new(&cc.egui_ctx, dir)))),
    )
    .unwrap();
}

/// Drives the app through the shots, one tab every few frames.
struct ShotRunner {
    app: App,
    dir: PathBuf,
    shot: usize,
    frames: u32,
}

/// Tab, file name, colouring of the 3D view.
const SHOTS: [(Tab, &str, view3d::ColourBy); 9] = [
    (Tab::Inspect, "inspect", view3d::ColourBy::Height),
    (Tab::Inspect, "inspect-removed", view3d::ColourBy::Removed),
    (
        Tab::Inspect,
        "inspect-influence",
        view3d::ColourBy::Influence,
    ),
    (Tab::Teach, "teach", view3d::ColourBy::Height),
    (Tab::Review, "review", view3d::ColourBy::Height),
    (Tab::Sort, "sort", view3d::ColourBy::Height),
    (Tab::Map, "map", view3d::ColourBy::Height),
    (Tab::Inspect, "about", view3d::ColourBy::Height),
    (Tab::Review, "review-light", view3d::ColourBy::Height),
];

impl ShotRunner {
    fn new(ctx: &egui::Context, dir: PathBuf) -> Self {
        let root = PathBuf::from("/home/inspector/parts-bin");
        let mut app = App {
            last_bin: Some(root.clone()),
            ..Default::default()
        };
        app.session.bin.survey = Some(super::demo::survey(&root));
        app.session.model = Some(Arc::new(model("bin-2024.safetensors")));
        let scan = root.join("bushing/bushing-004.ply");
        let (shown, cleanup, judgement) = super::demo::inspect_result(200_000);
        app.inspect.start(ctx, scan, move |r| {
            r.send(InspectEvent::Shown(Ok(shown)));
            r.send(InspectEvent::CleanedUp(Ok(cleanup)));
            r.send(InspectEvent::Judged(Ok(judgement)));
        });
        app.teach.start_job(ctx, None, |r| {
            for epoch in 1..=40u32 {
                let e = epoch as f32;
                r.send(TeachEvent::Progress {
                    fraction: e / 40.0,
                    doing: format!("epoch {} of 40", epoch.min(18)),
                });
                if epoch <= 18 {
                    r.send(TeachEvent::Epoch(EpochStats {
                        epoch,
                        loss: 1.8 * (-e / 6.0).exp() + 0.12,
                        train_accuracy: 0.95 - 0.75 * (-e / 4.0).exp(),
                        holdout_accuracy: 0.9 - 0.72 * (-e / 4.5).exp(),
                    }));
                }
                if epoch == 18 {
                    break;
                }
            }
            while !r.is_cancelled() {
                std::thread::sleep(Duration::from_millis(50));
            }
        });
        let evaluation = super::demo::evaluation(&root);
        app.review.set_evaluation(evaluation);
        let (bushing, _) = super::demo::bushing_scan(60_000, 3);
        let (flange, _) = super::demo::bushing_scan(60_000, 4);
        let part = |p: Vec<[f32; 3]>| {
            view3d::Cloud3d::new(partsift::scan::PointCloud::from_positions(
                p.into_iter()
                    .filter(|q| q[2] > 0.8 && q[0].hypot(q[1]) < 24.0)
                    .collect(),
            ))
            .centred()
        };
        app.review.show_case((1, 2), 0, part(bushing), part(flange));
        app.sort.start_job(ctx, |r| {
            let mut rng = partsift::rng::Rng::new(9);
            r.send(SortEvent::Found(64));
            for k in 0..64 {
                let t = super::demo::TYPES[rng.below(6)];
                let confidence = rng.range(0.45, 0.995) as f32;
                let outcome = if k == 17 {
                    Err(AppError::Scan(ScanError::new(
                        Path::new(&format!("/home/inspector/incoming/scan-{k:04}.ply")),
                        Some(Location::Line(9)),
                        "expected 3 numbers, found 2",
                    )))
                } else {
                    Ok(Verdict {
                        part_type: t.into(),
                        confidence,
                        status: if confidence < 0.7 {
                            Status::Review
                        } else {
                            Status::Sure
                        },
                    })
                };
                r.send(SortEvent::Row(SortRow {
                    path: format!("/home/inspector/incoming/scan-{k:04}.ply").into(),
                    outcome,
                }));
            }
            r.send(SortEvent::Finished(Ok(())));
        });
        app.sort.set_folder("/home/inspector/incoming".into());
        app.map.set_data(super::demo::map(&root));
        ShotRunner {
            app,
            dir,
            shot: 0,
            frames: 0,
        }
    }
}

impl eframe::App for ShotRunner {
    fn ui(&mut self, ui: &mut egui::Ui, frame: &mut eframe::Frame) {
        if self.shot == 0 && self.frames == 0 {
            let adapter = frame.wgpu_render_state().map(|s| s.adapter.get_info());
            eprintln!("renderer: {adapter:?}");
        }
        let Some(&(tab, name, colour)) = SHOTS.get(self.shot) else {
            ui.ctx().send_viewport_cmd(egui::ViewportCommand::Close);
            return;
        };
        self.app.tab = tab;
        self.app.view.colour = colour;
        self.app.session.about_open = name == "about";
        if name.ends_with("light") {
            ui.ctx().set_theme(egui::Theme::Light);
        }
        self.app.show(ui);
        self.frames += 1;
        if self.frames == 40 {
            let file = self.dir.join(format!("{name}.png"));
            let status = std::process::Command::new("import")
                .args(["-window", "root"])
                .arg(&file)
                .status();
            eprintln!("{}: {status:?}", file.display());
            self.shot += 1;
            self.frames = 0;
        }
        ui.ctx().request_repaint();
    }
}

#[test]
fn fixing_a_label_asks_moves_and_undoes() {
    let root = std::env::temp_dir().join(format!("partsift-app-fix-{}", std::process::id()));
    let _ = std::fs::remove_dir_all(&root);
    let bin = root.join("bin");
    let evaluation = review::tests::evaluation(&bin);
    for case in &evaluation.cases {
        std::fs::create_dir_all(case.path.parent().unwrap()).unwrap();
        std::fs::write(&case.path, b"ply").unwrap();
    }
    let scan = bin.join("washer/washer-00.ply");
    let mut app = App {
        last_bin: Some(bin.clone()),
        tab: Tab::Review,
        ..Default::default()
    };
    app.review.set_evaluation(evaluation);
    let mut h = harness(app);
    h.run();
    h.get_by_label("2").click();
    h.run();
    h.get_by_label_contains("washer-00.ply").click();
    h.step();
    run_until(&mut h, |a| a.review.busy().is_none());

    // Move to another type: asks first; Cancel leaves the file alone.
    h.get_by_label("Fix the label:").click();
    h.run();
    h.get_by_role_and_label(egui::accesskit::Role::Button, "spacer")
        .click();
    h.run();
    h.get_by_label("Move this scan?");
    h.get_by_label("Cancel").click();
    h.run();
    assert!(scan.exists());

    h.get_by_label("Fix the label:").click();
    h.run();
    h.get_by_role_and_label(egui::accesskit::Role::Button, "spacer")
        .click();
    h.run();
    h.get_by_label("Move").click();
    h.step();
    let moved = bin.join("spacer/washer-00.ply");
    assert!(!scan.exists() && moved.exists());
    assert_eq!(h.state().review.fixes_done(), 1);

    h.run_steps(2);
    h.get_by_label("Undo: moved to spacer").click();
    h.step();
    assert!(scan.exists() && !moved.exists());

    // Set aside: out of the bin, into a folder beside it.
    h.run_steps(2);
    h.get_by_label("Set aside").click();
    h.step();
    assert!(root.join("bin-set-aside/washer/washer-00.ply").exists());
    assert!(!scan.exists());
    std::fs::remove_dir_all(&root).unwrap();
}

// The main flows through the real library: the jobs are the ones the app starts, on real
// scans from `sample-scans/`.

#[test]
fn a_sample_scan_gets_a_verdict_and_the_points_behind_it() {
    let app = App {
        session: Session {
            model: Some(Arc::new(model("real"))),
            ..Default::default()
        },
        ..Default::default()
    };
    let mut h = harness(app);
    let ctx = h.ctx.clone();
    let scan = backend::scan_files(&sample_scans().join("hex_bolt")).unwrap()[0].clone();
    let model = h.state().session.model.clone();
    h.state_mut().inspect.open(&ctx, scan, model.as_ref());
    run_until(&mut h, |a| !a.inspect.is_working());
    assert_eq!(h.state().inspect.error(), None);
    let judgement = h.state().inspect.judgement().expect("a verdict");
    assert!(SMALL_BIN_TYPES.contains(&judgement.verdict.part_type.as_str()));
    assert!((0.0..=1.0).contains(&judgement.verdict.confidence));
    let scores: f32 = judgement.scores.iter().map(|(_, p)| p).sum();
    assert!((scores - 1.0).abs() < 1e-3, "scores sum to {scores}");
    let influence = judgement.prepared.as_ref().expect("influence cloud");
    assert!(influence.len() > 100 && influence.has(view3d::ColourBy::Influence));
    let badge = match judgement.verdict.status {
        Status::Sure => " sure ",
        Status::Review => "REVIEW",
    };
    h.run();
    h.get_by_label(badge);
    h.get_by_label_contains("table plane");
}

#[test]
fn teaching_on_a_small_bin_keeps_a_model_and_its_holdout_review() {
    let bin = small_bin("teach");
    let mut h = harness(App::default());
    h.state_mut().tab = Tab::Teach;
    h.state_mut().teach.settings_mut().epochs = 2;
    let ctx = h.ctx.clone();
    h.state_mut().teach.start(&ctx, &bin, None);
    run_until(&mut h, |a| !a.teach.is_running());
    let app = h.state();
    assert_eq!(app.teach.error(), None);
    assert_eq!(app.teach.epochs_seen(), 2);
    let model = app.session.model.as_ref().expect("the taught model");
    assert_eq!(model.part_types(), SMALL_BIN_TYPES);
    assert!(model.name.contains("taught on"), "{}", model.name);
    let review = app.review.evaluation_shown().expect("holdout review");
    assert!(review.scans_from.contains("holdout"));
    // 20 % of six scans held out of each type: two each, rounded up (see learn::split).
    assert!(!review.cases.is_empty() && review.cases.len() < 18);

    // Saved and opened again: the same model.
    let file = bin.join("model.safetensors");
    backend::save_model(model, &file).unwrap();
    let opened = backend::open_model(&file).unwrap();
    assert_eq!(opened.part_types(), model.part_types());
    assert_eq!(opened.name, "model.safetensors");
    std::fs::write(&file, b"not a model").unwrap();
    let err = backend::open_model(&file).unwrap_err().to_string();
    assert!(err.contains("model.safetensors"), "{err}");
    std::fs::remove_dir_all(&bin).unwrap();
}

#[test]
fn stopping_a_real_run_before_its_first_epoch_says_so() {
    let bin = small_bin("teach-stop");
    let mut h = harness(App::default());
    let ctx = h.ctx.clone();
    h.state_mut().teach.start(&ctx, &bin, None);
    h.state_mut().tab = Tab::Teach;
    h.run_steps(2);
    h.get_by_label("Stop").click();
    run_until(&mut h, |a| !a.teach.is_running());
    // Either no epoch had ended (nothing to keep, said plainly) or one had (it is kept).
    let app = h.state();
    match app.teach.error() {
        Some(e) => assert!(e.contains("stopped"), "{e}"),
        None => assert!(app.session.model.is_some()),
    }
    std::fs::remove_dir_all(&bin).unwrap();
}

#[test]
fn sorting_a_real_folder_reports_the_corrupt_file_and_sorts_the_rest() {
    let folder = temp_dir("sort");
    let scans = backend::scan_files(&sample_scans().join("spur_gear")).unwrap();
    for scan in &scans[..3] {
        std::fs::copy(scan, folder.join(scan.file_name().unwrap())).unwrap();
    }
    std::fs::write(
        folder.join("broken.ply"),
        b"ply\nformat binary_little_endian 1.0\nelement vertex 1000\nproperty float x\nproperty float y\nproperty float z\nend_header\n\x00\x00",
    )
    .unwrap();
    let app = App {
        tab: Tab::Sort,
        session: Session {
            model: Some(Arc::new(model("real"))),
            ..Default::default()
        },
        ..Default::default()
    };
    let mut h = harness(app);
    h.state_mut().sort.set_folder(folder.clone());
    h.run();
    // The tab button comes first, the tab's own button last.
    h.get_all_by_role_and_label(egui::accesskit::Role::Button, "Sort")
        .last()
        .expect("the Sort button")
        .click();
    h.step();
    run_until(&mut h, |a| a.sort.busy().is_none());
    assert_eq!(h.state().sort.visible_count(), 4);
    h.get_by_label("broken.ply");
    h.get_by_label_contains("byte 118: element 'vertex': 1000 declared");
    std::fs::remove_dir_all(&folder).unwrap();
}

#[test]
fn the_map_of_a_real_bin_has_a_dot_per_scan() {
    let bin = small_bin("map");
    let app = App {
        tab: Tab::Map,
        last_bin: Some(bin.clone()),
        session: Session {
            model: Some(Arc::new(model("real"))),
            ..Default::default()
        },
        ..Default::default()
    };
    let mut h = harness(app);
    h.run();
    h.get_by_label("Make the map").click();
    h.step();
    run_until(&mut h, |a| a.map.busy().is_none());
    let data = h.state().map.data().expect("a map");
    assert_eq!(data.dots.len(), 18);
    assert_eq!(data.part_types, SMALL_BIN_TYPES);
    assert!(data.dots.iter().all(|d| d.xy.iter().all(|c| c.is_finite())));
    std::fs::remove_dir_all(&bin).unwrap();
}

#[test]
fn the_survey_lists_an_unreadable_scan_with_its_error() {
    let bin = small_bin("survey");
    std::fs::write(bin.join("hex_bolt/truncated.xyz"), b"1 2 3\n4 5\n").unwrap();
    let survey = backend::survey_bin(&bin).unwrap();
    assert_eq!(survey.unreadable.len(), 1);
    let (path, error) = &survey.unreadable[0];
    assert!(path.ends_with("hex_bolt/truncated.xyz"));
    assert!(
        error.contains("truncated.xyz") && error.contains("line 2"),
        "{error}"
    );
    std::fs::remove_dir_all(&bin).unwrap();
}
