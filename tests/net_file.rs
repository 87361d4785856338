//! The model file end to end: save and load real files, and every way a file can be bad.
//! The safetensors container format is its published spec (huggingface/safetensors README:
//! 8-byte little-endian header length, JSON header with `__metadata__`, raw data); the damaged
//! files below are built with the reference `safetensors` crate.

use std::fs;
use std::path::{Path, PathBuf};

use partsift::net::file::{ModelFileProblem, FORMAT_VERSION, META_KEY};
use partsift::net::{load, save, Arch, Calibration, ModelMeta, NetConfig, Network, Preset};
use partsift::rng::Rng;
use safetensors::tensor::{Dtype, SafeTensors, TensorView};

fn temp_dir(name: &str) -> PathBuf {
    let dir = std::env::temp_dir().join(format!("partsift-net-file-{name}-{}", std::process::id()));
    let _ = fs::remove_dir_all(&dir);
    fs::create_dir_all(&dir).expect("temp dir");
    dir
}

fn network(arch: Arch) -> Network {
    let config = NetConfig {
        arch,
        preset: Preset::Quick,
        classes: 3,
        size_aware: true,
    };
    Network::new(config, 9)
}

fn meta_for(net: &Network) -> ModelMeta {
    let config = net.config();
    ModelMeta {
        format_version: FORMAT_VERSION,
        arch: config.arch,
        preset: config.preset,
        size_aware: config.size_aware,
        part_types: vec!["hex-nut-m8".into(), "washer-10".into(), "bracket-l".into()],
        recipe: serde_json::json!({"points": 512, "strays": {"k": 16, "sigma": 2.0}}),
        calibration: Calibration {
            temperature: 1.37,
            review_threshold: 0.82,
        },
        training: serde_json::json!({"epochs": 12, "holdout_accuracy": 0.96}),
    }
}

fn some_input(net: &Network, samples: usize) -> (Vec<f32>, Vec<f32>) {
    let mut rng = Rng::new(4);
    let points = (0..samples * net.points() * 3)
        .map(|_| rng.normal() as f32 * 0.4)
        .collect();
    let size = (0..samples * 4)
        .map(|_| rng.range(2.0, 5.0) as f32)
        .collect();
    (points, size)
}

/// A file's tensors and metadata, to be changed and written back.
struct Parts {
    tensors: Vec<(String, Dtype, Vec<usize>, Vec<u8>)>,
    meta: serde_json::Value,
}

fn read_parts(path: &Path) -> Parts {
    let bytes = fs::read(path).expect("read");
    let (_, header) = SafeTensors::read_metadata(&bytes).expect("header");
    let meta = serde_json::from_str(&header.metadata().as_ref().expect("metadata")[META_KEY])
        .expect("json");
    let file = SafeTensors::deserialize(&bytes).expect("file");
    let mut tensors: Vec<_> = file
        .tensors()
        .into_iter()
        .map(|(name, t)| (name, t.dtype(), t.shape().to_vec(), t.data().to_vec()))
        .collect();
    tensors.sort_by(|a, b| a.0.cmp(&b.0));
    Parts { tensors, meta }
}

fn write_parts(path: &Path, parts: &Parts, meta_key: &str) {
    let views: Vec<(String, TensorView<'_>)> = parts
        .tensors
        .iter()
        .map(|(name, dtype, shape, data)| {
            (
                name.clone(),
                TensorView::new(*dtype, shape.clone(), data).expect("view"),
            )
        })
        .collect();
    let header = std::collections::HashMap::from([(meta_key.to_owned(), parts.meta.to_string())]);
    fs::write(
        path,
        safetensors::serialize(views, Some(header)).expect("serialize"),
    )
    .expect("write");
}

/// Loads `path`, expecting an error that names the file; returns its problem.
fn load_error(path: &Path) -> ModelFileProblem {
    let err = load(path).expect_err("a bad file must not load");
    let text = err.to_string();
    assert!(
        text.contains(&path.display().to_string()),
        "names the file: {text}"
    );
    err.problem
}

#[test]
fn round_trip_keeps_the_network_and_the_bytes() {
    let dir = temp_dir("round-trip");
    for arch in Arch::ALL {
        let net = network(arch);
        let meta = meta_for(&net);
        let path = dir.join(format!("{arch}.safetensors"));
        save(&path, &net, &meta).expect("save");
        let (loaded, loaded_meta) = load(&path).expect("load");
        assert_eq!(loaded_meta, meta);
        assert_eq!(loaded.config(), net.config());
        let (points, size) = some_input(&net, 2);
        assert_eq!(
            loaded.infer(&points, &size),
            net.infer(&points, &size),
            "{arch}: same answers"
        );
        let again = dir.join(format!("{arch}-again.safetensors"));
        save(&again, &loaded, &loaded_meta).expect("save again");
        assert_eq!(
            fs::read(&path).expect("a"),
            fs::read(&again).expect("b"),
            "{arch}: byte for byte"
        );
    }
    let leftovers: Vec<_> = fs::read_dir(&dir)
        .expect("dir")
        .filter_map(|e| e.ok())
        .filter(|e| e.file_name().to_string_lossy().contains("tmp"))
        .collect();
    assert!(leftovers.is_empty(), "no temporary files left");
    fs::remove_dir_all(&dir).expect("clean");
}

#[test]
fn truncated_file_is_reported_with_its_size() {
    let dir = temp_dir("truncated");
    let net = network(Arch::EdgeConv);
    let path = dir.join("model.safetensors");
    save(&path, &net, &meta_for(&net)).expect("save");
    let bytes = fs::read(&path).expect("read");
    let cut = dir.join("cut.safetensors");
    // Inside the length, inside the header, inside the data, one byte short; and empty.
    for keep in [0, 5, 100, bytes.len() / 2, bytes.len() - 1] {
        fs::write(&cut, &bytes[..keep]).expect("write");
        match load_error(&cut) {
            ModelFileProblem::Truncated { bytes } => assert_eq!(bytes, keep),
            other => panic!("cut at {keep}: {other}"),
        }
    }
    // Bytes appended after the data.
    let mut longer = bytes.clone();
    longer.extend_from_slice(b"trailing");
    fs::write(&cut, &longer).expect("write");
    assert!(matches!(
        load_error(&cut),
        ModelFileProblem::Truncated { .. }
    ));
    fs::remove_dir_all(&dir).expect("clean");
}

#[test]
fn corrupt_file_is_reported() {
    let dir = temp_dir("corrupt");
    let net = network(Arch::EdgeConv);
    let path = dir.join("model.safetensors");
    save(&path, &net, &meta_for(&net)).expect("save");
    let bytes = fs::read(&path).expect("read");
    let bad = dir.join("bad.safetensors");
    // A text file, and a header whose JSON is broken (first byte after the length).
    fs::write(
        &bad,
        b"ply\nformat ascii 1.0\nelement vertex 3\nend_header\n",
    )
    .expect("write");
    assert!(matches!(
        load_error(&bad),
        ModelFileProblem::Corrupt(_) | ModelFileProblem::Truncated { .. }
    ));
    let mut broken = bytes.clone();
    broken[8] = b'#';
    fs::write(&bad, &broken).expect("write");
    assert!(matches!(load_error(&bad), ModelFileProblem::Corrupt(_)));
    // Our metadata entry, but not JSON.
    let mut parts = read_parts(&path);
    parts.meta = serde_json::Value::String("not json".into());
    write_parts(&bad, &parts, META_KEY);
    assert!(matches!(load_error(&bad), ModelFileProblem::BadMetadata(_)));
    fs::remove_dir_all(&dir).expect("clean");
}

#[test]
fn foreign_safetensors_file_is_not_taken_for_a_model() {
    let dir = temp_dir("foreign");
    let path = dir.join("other.safetensors");
    let data = vec![0u8; 16];
    let views = vec![(
        "weight",
        TensorView::new(Dtype::F32, vec![2, 2], &data).expect("view"),
    )];
    fs::write(
        &path,
        safetensors::serialize(views.clone(), None).expect("serialize"),
    )
    .expect("write");
    assert!(matches!(load_error(&path), ModelFileProblem::Foreign));
    let header = std::collections::HashMap::from([("format".to_owned(), "pt".to_owned())]);
    fs::write(
        &path,
        safetensors::serialize(views, Some(header)).expect("serialize"),
    )
    .expect("write");
    assert!(matches!(load_error(&path), ModelFileProblem::Foreign));
    fs::remove_dir_all(&dir).expect("clean");
}

#[test]
fn newer_format_version_is_refused_before_its_fields_are_read() {
    let dir = temp_dir("newer");
    let net = network(Arch::PointNet);
    let path = dir.join("model.safetensors");
    save(&path, &net, &meta_for(&net)).expect("save");
    let mut parts = read_parts(&path);
    parts.meta["format_version"] = serde_json::json!(FORMAT_VERSION + 1);
    parts.meta["a_field_from_the_future"] = serde_json::json!(true);
    parts
        .meta
        .as_object_mut()
        .expect("object")
        .remove("calibration");
    write_parts(&path, &parts, META_KEY);
    match load_error(&path) {
        ModelFileProblem::NewerVersion { found, supported } => {
            assert_eq!((found, supported), (FORMAT_VERSION + 1, FORMAT_VERSION));
        }
        other => panic!("{other}"),
    }
    fs::remove_dir_all(&dir).expect("clean");
}

#[test]
fn missing_misshaped_extra_and_non_finite_tensors_are_reported_by_name() {
    let dir = temp_dir("tensors");
    let net = network(Arch::Gcn);
    let path = dir.join("model.safetensors");
    save(&path, &net, &meta_for(&net)).expect("save");
    let bad = dir.join("bad.safetensors");
    let name = "gcn1.norm.running_var";

    let mut parts = read_parts(&path);
    parts.tensors.retain(|t| t.0 != name);
    write_parts(&bad, &parts, META_KEY);
    assert!(matches!(load_error(&bad), ModelFileProblem::MissingTensor { name: n } if n == name));

    let mut parts = read_parts(&path);
    let t = parts
        .tensors
        .iter_mut()
        .find(|t| t.0 == name)
        .expect("there");
    t.2 = vec![t.2[0] / 2, 2];
    write_parts(&bad, &parts, META_KEY);
    assert!(matches!(load_error(&bad), ModelFileProblem::WrongShape { name: n, .. } if n == name));

    let mut parts = read_parts(&path);
    let t = parts
        .tensors
        .iter_mut()
        .find(|t| t.0 == name)
        .expect("there");
    t.1 = Dtype::I32;
    write_parts(&bad, &parts, META_KEY);
    assert!(matches!(
        load_error(&bad),
        ModelFileProblem::WrongShape { .. }
    ));

    let mut parts = read_parts(&path);
    parts.tensors.push((
        "edge0.linear.weight".into(),
        Dtype::F32,
        vec![1],
        vec![0; 4],
    ));
    write_parts(&bad, &parts, META_KEY);
    assert!(
        matches!(load_error(&bad), ModelFileProblem::UnexpectedTensor { name: n } if n == "edge0.linear.weight")
    );

    let mut parts = read_parts(&path);
    let t = parts
        .tensors
        .iter_mut()
        .find(|t| t.0 == "head.fc1.linear.weight")
        .expect("there");
    t.3[4..8].copy_from_slice(&f32::NAN.to_le_bytes());
    write_parts(&bad, &parts, META_KEY);
    assert!(
        matches!(load_error(&bad), ModelFileProblem::NonFinite { name: n } if n == "head.fc1.linear.weight")
    );
    fs::remove_dir_all(&dir).expect("clean");
}

#[test]
fn part_types_must_match_the_classes_and_be_sound() {
    let dir = temp_dir("part-types");
    let net = network(Arch::EdgeConv);
    let path = dir.join("model.safetensors");
    save(&path, &net, &meta_for(&net)).expect("save");
    let mut parts = read_parts(&path);
    parts.meta["part_types"] = serde_json::json!(["a", "b", "c", "d"]);
    write_parts(&path, &parts, META_KEY);
    match load_error(&path) {
        ModelFileProblem::PartTypes {
            part_types,
            classes,
        } => assert_eq!((part_types, classes), (4, 3)),
        other => panic!("{other}"),
    }
    for (types, why) in [
        (serde_json::json!([]), "no part types"),
        (serde_json::json!(["a", "a", "b"]), "listed twice"),
        (serde_json::json!(["a", " ", "b"]), "has no name"),
    ] {
        parts.meta["part_types"] = types;
        write_parts(&path, &parts, META_KEY);
        match load_error(&path) {
            ModelFileProblem::BadPartTypes(text) => assert!(text.contains(why), "{text}"),
            other => panic!("{other}"),
        }
    }
    fs::remove_dir_all(&dir).expect("clean");
}

#[test]
fn save_refuses_inconsistent_metadata_and_leaves_no_file() {
    let dir = temp_dir("save-refuses");
    let net = network(Arch::EdgeConv);
    let path = dir.join("model.safetensors");
    let mut meta = meta_for(&net);
    meta.arch = Arch::Gcn;
    assert!(matches!(
        save(&path, &net, &meta).map_err(|e| e.problem),
        Err(ModelFileProblem::MetaMismatch(_))
    ));
    let mut meta = meta_for(&net);
    meta.part_types.pop();
    assert!(matches!(
        save(&path, &net, &meta).map_err(|e| e.problem),
        Err(ModelFileProblem::MetaMismatch(_))
    ));
    let mut meta = meta_for(&net);
    meta.calibration.temperature = 0.0;
    assert!(matches!(
        save(&path, &net, &meta).map_err(|e| e.problem),
        Err(ModelFileProblem::BadCalibration(_))
    ));
    meta.calibration = Calibration {
        temperature: 1.0,
        review_threshold: 1.5,
    };
    assert!(matches!(
        save(&path, &net, &meta).map_err(|e| e.problem),
        Err(ModelFileProblem::BadCalibration(_))
    ));
    // A folder that does not exist: an I/O error naming the file.
    let nowhere = dir.join("no-such-folder").join("model.safetensors");
    let err = save(&nowhere, &net, &meta_for(&net)).expect_err("cannot write there");
    assert!(matches!(err.problem, ModelFileProblem::Io(_)));
    assert!(err.to_string().contains("no-such-folder"));
    assert_eq!(
        fs::read_dir(&dir).expect("dir").count(),
        0,
        "nothing written"
    );
    // Loading a file that is not there.
    assert!(matches!(load_error(&path), ModelFileProblem::Io(_)));
    fs::remove_dir_all(&dir).expect("clean");
}
