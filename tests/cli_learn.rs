//! `partsift train`, `classify` and `evaluate` through the real binary, on real files: a
//! generated bin learnt well above chance, the committed sample scans with a corrupt scan in
//! the bin and a corrupt file among the scans to sort, `--copy-to`, and model files that
//! cannot be opened.

mod train_common;

use std::fs;
use std::path::Path;

use serde_json::Value;
use train_common::{
    assert_exit, generated_bin, partsift, sample_scans_bin, stderr, stdout, TempDir, DISTINCT,
    TRUNCATED_PLY,
};

fn last_json_line(text: &str) -> Value {
    let line = text.lines().last().unwrap_or_default();
    serde_json::from_str(line).unwrap_or_else(|e| panic!("{e}: {line:?}"))
}

fn path_str(p: &Path) -> &str {
    p.to_str().unwrap()
}

/// The end-to-end run: a generated bin of three types, `quick` for a few epochs, then the
/// model sorts the bin and a folder of scans.
#[test]
fn quick_learns_a_generated_bin_well_above_chance_and_sorts_it() {
    let dir = TempDir::new("cli-e2e");
    let cache = dir.join("cache");
    let bin = generated_bin(&dir.join("bin"), &DISTINCT, 12, 21);
    let model = dir.join("model.safetensors");
    let out = partsift(
        &cache,
        &[
            "train",
            path_str(&bin),
            "-o",
            path_str(&model),
            "--preset",
            "quick",
            "--epochs",
            "8",
            "--seed",
            "3",
            "--holdout",
            "0.25",
            "--threads",
            "2",
            "--json",
        ],
    );
    assert_exit(&out, 0);
    let summary = last_json_line(&stdout(&out));
    let mut keys: Vec<&str> = summary
        .as_object()
        .unwrap()
        .keys()
        .map(|k| k.as_str())
        .collect();
    keys.sort_unstable();
    assert_eq!(
        keys,
        [
            "epochs",
            "holdout_accuracy",
            "model",
            "part_types",
            "seconds"
        ]
    );
    assert_eq!(summary["model"], path_str(&model));
    assert_eq!(
        summary["part_types"],
        serde_json::json!(["angle_bracket", "flat_washer", "hex_bolt"])
    );
    let epochs = summary["epochs"].as_u64().unwrap();
    assert!((1..=8).contains(&epochs));
    // Chance is 1/3 for three types; 9 holdout scans, so 6 of 9 right is 0.667.
    let accuracy = summary["holdout_accuracy"].as_f64().unwrap();
    assert!(accuracy >= 0.66, "holdout accuracy {accuracy}");
    assert!(stderr(&out).contains("epoch   1/8"), "{}", stderr(&out));

    // evaluate --json has the documented shape and agrees with the bin's counts.
    let out = partsift(
        &cache,
        &["evaluate", path_str(&bin), "-m", path_str(&model), "--json"],
    );
    assert_exit(&out, 0);
    let evaluation = last_json_line(&stdout(&out));
    let mut keys: Vec<&str> = evaluation
        .as_object()
        .unwrap()
        .keys()
        .map(|k| k.as_str())
        .collect();
    keys.sort_unstable();
    assert_eq!(
        keys,
        [
            "accuracy",
            "balanced_accuracy",
            "confusion",
            "misclassified",
            "part_types",
            "per_type"
        ]
    );
    let confusion = evaluation["confusion"].as_array().unwrap();
    let rows: Vec<u64> = confusion
        .iter()
        .map(|r| {
            r.as_array()
                .unwrap()
                .iter()
                .map(|c| c.as_u64().unwrap())
                .sum()
        })
        .collect();
    assert_eq!(rows, [12, 12, 12]);
    assert!(evaluation["accuracy"].as_f64().unwrap() > 0.5);
    assert_eq!(evaluation["per_type"][0]["support"], 12);

    // The human evaluation shows the table, the matrix and the mistakes (or that there are none).
    let out = partsift(
        &cache,
        &["evaluate", path_str(&bin), "-m", path_str(&model)],
    );
    assert_exit(&out, 0);
    let text = stdout(&out);
    for expected in [
        "accuracy",
        "balanced accuracy",
        "precision",
        "confusion matrix (rows: true type, columns: predicted type)",
        "flat_washer",
    ] {
        assert!(text.contains(expected), "{expected:?} missing in\n{text}");
    }
    assert!(text.contains("misclassified scans") || text.contains("no scan was misclassified"));

    // classify a folder recursively: one JSON line per scan, in the ClassifyRow shape.
    let out = partsift(
        &cache,
        &["classify", path_str(&bin), "-m", path_str(&model), "--json"],
    );
    assert_exit(&out, 0);
    let rows: Vec<Value> = stdout(&out)
        .lines()
        .map(|l| serde_json::from_str(l).unwrap())
        .collect();
    assert_eq!(rows.len(), 36);
    for row in &rows {
        let status = row["status"].as_str().unwrap();
        assert!(status == "sure" || status == "review", "{row}");
        let scores = row["scores"].as_object().unwrap();
        assert_eq!(scores.len(), 3);
        let total: f64 = scores.values().map(|v| v.as_f64().unwrap()).sum();
        assert!((total - 1.0).abs() < 1e-4, "{row}");
        assert_eq!(row["confidence"], scores[row["type"].as_str().unwrap()]);
    }
}

/// The committed sample scans (three types), with a corrupt scan in the bin: it is reported,
/// skipped, and training goes on (exit 1 with the model saved). Then classify sorts a folder
/// with a corrupt file in it, and copies the scans.
#[test]
fn sample_scans_with_corrupt_files_are_reported_and_the_rest_go_on() {
    let dir = TempDir::new("cli-corrupt");
    let cache = dir.join("cache");
    let bin = sample_scans_bin(
        &dir.join("bin"),
        &["flat_washer", "hex_bolt", "spur_gear"],
        6,
    );
    let broken = bin.join("hex_bolt").join("hex_bolt_broken.ply");
    fs::write(&broken, TRUNCATED_PLY).unwrap();
    let model = dir.join("model.safetensors");
    let out = partsift(
        &cache,
        &[
            "train",
            path_str(&bin),
            "-o",
            path_str(&model),
            "--epochs",
            "2",
            "--json",
        ],
    );
    assert_exit(&out, 1);
    assert!(
        stderr(&out).contains("skipped:") && stderr(&out).contains("hex_bolt_broken.ply"),
        "{}",
        stderr(&out)
    );
    assert!(model.is_file());
    let summary = last_json_line(&stdout(&out));
    assert_eq!(summary["part_types"].as_array().unwrap().len(), 3);

    // Human train output, and evaluate on the bin with the broken scan: exit 1, the rest scored.
    let out = partsift(
        &cache,
        &["evaluate", path_str(&bin), "-m", path_str(&model), "--json"],
    );
    assert_exit(&out, 1);
    let evaluation = last_json_line(&stdout(&out));
    let supports: Vec<u64> = evaluation["per_type"]
        .as_array()
        .unwrap()
        .iter()
        .map(|t| t["support"].as_u64().unwrap())
        .collect();
    assert_eq!(supports, [6, 6, 6]);

    // classify: a folder with a corrupt file among good ones, and a missing file.
    let scans = dir.join("new-scans");
    fs::create_dir_all(scans.join("deeper")).unwrap();
    for (i, t) in ["flat_washer", "spur_gear"].iter().enumerate() {
        let from = bin
            .join(t)
            .read_dir()
            .unwrap()
            .map(|e| e.unwrap().path())
            .min()
            .unwrap();
        fs::copy(
            &from,
            scans.join(format!(
                "scan_{i}.{}",
                from.extension().unwrap().to_str().unwrap()
            )),
        )
        .unwrap();
    }
    fs::write(
        scans.join("deeper").join("bad.xyz"),
        b"1.0 2.0 3.0\n4.0 five 6.0\n",
    )
    .unwrap();
    let missing = dir.join("missing.ply");
    let out = partsift(
        &cache,
        &[
            "classify",
            path_str(&scans),
            path_str(&missing),
            "-m",
            path_str(&model),
            "--json",
        ],
    );
    assert_exit(&out, 1);
    let rows: Vec<Value> = stdout(&out)
        .lines()
        .map(|l| serde_json::from_str(l).unwrap())
        .collect();
    assert_eq!(rows.len(), 4);
    let bad = rows
        .iter()
        .find(|r| r["path"].as_str().unwrap().ends_with("bad.xyz"))
        .unwrap();
    assert_eq!(bad["status"], "error");
    assert_eq!(bad["type"], Value::Null);
    // The error names the file and the line (line 2: "five" is not a number).
    let error = bad["error"].as_str().unwrap();
    assert!(error.contains("bad.xyz") && error.contains('2'), "{error}");
    let gone = rows
        .iter()
        .find(|r| r["path"].as_str().unwrap().ends_with("missing.ply"))
        .unwrap();
    assert_eq!(gone["status"], "error");
    assert_eq!(rows.iter().filter(|r| r["status"] != "error").count(), 2);

    // CSV: a header, one line per scan, the error in its column.
    let out = partsift(
        &cache,
        &[
            "classify",
            path_str(&scans),
            "-m",
            path_str(&model),
            "--csv",
        ],
    );
    assert_exit(&out, 1);
    let text = stdout(&out);
    let lines: Vec<&str> = text.lines().collect();
    assert_eq!(
        lines[0],
        "path,type,confidence,status,error,flat_washer,hex_bolt,spur_gear"
    );
    assert_eq!(lines.len(), 4);
    assert!(lines
        .iter()
        .any(|l| l.contains(",error,") && l.contains("bad.xyz")));

    // Human output: the caution once, a row per scan.
    let out = partsift(
        &cache,
        &["classify", path_str(&scans), "-m", path_str(&model)],
    );
    assert_exit(&out, 1);
    let text = stdout(&out);
    assert_eq!(text.matches("does not replace").count(), 1, "{text}");
    assert!(text.contains("3 scan(s)"), "{text}");

    // --copy-to copies, never moves, never overwrites.
    let sorted = dir.join("sorted");
    let run = |expect: i32| {
        let out = partsift(
            &cache,
            &[
                "classify",
                path_str(&scans),
                "-m",
                path_str(&model),
                "--json",
                "--copy-to",
                path_str(&sorted),
            ],
        );
        assert_exit(&out, expect);
        out
    };
    let out = run(1);
    let rows: Vec<Value> = stdout(&out)
        .lines()
        .map(|l| serde_json::from_str(l).unwrap())
        .collect();
    let copies = |name: &str| -> Vec<std::path::PathBuf> {
        walk(&sorted)
            .into_iter()
            .filter(|p| p.file_name().unwrap().to_str().unwrap().starts_with(name))
            .collect()
    };
    for row in rows.iter().filter(|r| r["status"] != "error") {
        let source = Path::new(row["path"].as_str().unwrap());
        assert!(source.is_file(), "the scan was moved, not copied");
        let stem = source.file_stem().unwrap().to_str().unwrap();
        let found = copies(stem);
        assert_eq!(found.len(), 1, "{found:?}");
        let expected_folder = match row["status"].as_str().unwrap() {
            "sure" => sorted.join(row["type"].as_str().unwrap()),
            _ => sorted
                .join("_to-review")
                .join(row["type"].as_str().unwrap()),
        };
        assert_eq!(found[0].parent().unwrap(), expected_folder);
        assert_eq!(fs::read(&found[0]).unwrap(), fs::read(source).unwrap());
    }
    assert!(copies("bad").is_empty(), "a failed scan was copied");
    // A second run keeps the first copies and adds name-2 beside them.
    let first_copies = walk(&sorted);
    let marker = &first_copies[0];
    fs::write(marker, b"edited by a person").unwrap();
    run(1);
    assert_eq!(fs::read(marker).unwrap(), b"edited by a person");
    let second = walk(&sorted);
    assert_eq!(second.len(), 2 * first_copies.len());
    assert!(second
        .iter()
        .any(|p| p.file_stem().unwrap().to_str().unwrap().ends_with("-2")));
    assert!(
        second
            .iter()
            .all(|p| !p.file_name().unwrap().to_str().unwrap().starts_with('.')),
        "a staging file was left: {second:?}"
    );
}

/// Every file under `dir`, hidden ones included, sorted.
fn walk(dir: &Path) -> Vec<std::path::PathBuf> {
    let mut files = Vec::new();
    let Ok(entries) = fs::read_dir(dir) else {
        return files;
    };
    for entry in entries {
        let path = entry.unwrap().path();
        if path.is_dir() {
            files.extend(walk(&path));
        } else {
            files.push(path);
        }
    }
    files.sort();
    files
}

#[test]
fn model_files_that_cannot_be_opened_and_bad_arguments_are_usage_errors() {
    let dir = TempDir::new("cli-badmodel");
    let cache = dir.join("cache");
    let bin = sample_scans_bin(&dir.join("bin"), &["flat_washer", "hex_bolt"], 2);
    let scan = bin
        .join("hex_bolt")
        .read_dir()
        .unwrap()
        .next()
        .unwrap()
        .unwrap()
        .path();
    let junk = dir.join("junk.safetensors");
    fs::write(&junk, b"\x10\x00\x00\x00\x00\x00\x00\x00{\"a\":").unwrap();
    let missing = dir.join("missing.safetensors");
    for model in [&junk, &missing] {
        for args in [
            vec!["classify", path_str(&scan), "-m", path_str(model)],
            vec!["evaluate", path_str(&bin), "-m", path_str(model)],
        ] {
            let out = partsift(&cache, &args);
            assert_exit(&out, 2);
            let err = stderr(&out);
            assert!(
                err.contains(model.file_name().unwrap().to_str().unwrap()),
                "{err}"
            );
            assert!(stdout(&out).is_empty());
        }
    }

    let model = dir.join("m.safetensors");
    let usage = |args: &[&str], says: &str| {
        let out = partsift(&cache, args);
        assert_exit(&out, 2);
        assert!(
            stderr(&out).contains(says),
            "{says:?} not in {}",
            stderr(&out)
        );
        assert!(!model.exists());
    };
    usage(
        &[
            "train",
            path_str(&bin),
            "-o",
            path_str(&model),
            "--holdout",
            "1.5",
        ],
        "holdout",
    );
    usage(
        &[
            "train",
            path_str(&bin),
            "-o",
            path_str(&model),
            "--epochs",
            "0",
        ],
        "epochs",
    );
    usage(
        &[
            "train",
            path_str(&bin),
            "-o",
            path_str(&model),
            "--threads",
            "0",
        ],
        "threads",
    );
    usage(
        &[
            "train",
            path_str(&bin),
            "-o",
            path_str(&model),
            "--arch",
            "transformer",
        ],
        "edgeconv",
    );
    usage(
        &["train", path_str(&dir.join("nope")), "-o", path_str(&model)],
        "nope",
    );
    usage(
        &[
            "train",
            path_str(&bin),
            "-o",
            path_str(&dir.join("no-folder").join("m.safetensors")),
        ],
        "no-folder",
    );
    usage(
        &[
            "classify",
            path_str(&scan),
            "-m",
            path_str(&junk),
            "--json",
            "--csv",
        ],
        "--csv",
    );
    let empty = dir.join("empty");
    fs::create_dir_all(&empty).unwrap();
    usage(
        &["classify", path_str(&empty), "-m", path_str(&junk)],
        "junk.safetensors",
    );
}
