//! partsift's classification metrics against scikit-learn's on the same label vectors.
//! The fixture is made by tests/reference/make_metrics_fixture.py (scikit-learn 1.9.1):
//! accuracy_score, balanced_accuracy_score, precision_recall_fscore_support(zero_division=0)
//! and confusion_matrix.

use partsift::learn::{Evaluation, Metrics, ScanOutcome};
use serde_json::Value;

fn fixture() -> Value {
    let path = concat!(
        env!("CARGO_MANIFEST_DIR"),
        "/tests/reference/metrics_fixture.json"
    );
    serde_json::from_str(&std::fs::read_to_string(path).unwrap()).unwrap()
}

fn labels(v: &Value) -> Vec<usize> {
    v.as_array()
        .unwrap()
        .iter()
        .map(|x| x.as_u64().unwrap() as usize)
        .collect()
}

fn floats(v: &Value) -> Vec<f64> {
    v.as_array()
        .unwrap()
        .iter()
        .map(|x| x.as_f64().unwrap())
        .collect()
}

fn close(got: f64, want: f64, what: &str) {
    assert!(
        (got - want).abs() < 1e-12,
        "{what}: got {got}, sklearn {want}"
    );
}

#[test]
fn metrics_match_scikit_learn() {
    let fixture = fixture();
    let cases = fixture["cases"].as_array().unwrap();
    assert!(cases.len() >= 5);
    for case in cases {
        let name = case["name"].as_str().unwrap();
        let types = case["types"].as_u64().unwrap() as usize;
        let part_types: Vec<String> = (0..types).map(|t| format!("type-{t}")).collect();
        let pairs: Vec<(usize, usize)> = labels(&case["truth"])
            .into_iter()
            .zip(labels(&case["predicted"]))
            .collect();
        let m = Metrics::from_pairs(&pairs, &part_types).unwrap();
        close(m.accuracy, case["accuracy"].as_f64().unwrap(), name);
        close(
            m.balanced_accuracy,
            case["balanced_accuracy"].as_f64().unwrap(),
            name,
        );
        let (p, r, f) = (
            floats(&case["precision"]),
            floats(&case["recall"]),
            floats(&case["f1"]),
        );
        let support = labels(&case["support"]);
        for (t, scores) in m.per_type.iter().enumerate() {
            assert_eq!(scores.part_type, part_types[t]);
            close(scores.precision, p[t], &format!("{name} precision {t}"));
            close(scores.recall, r[t], &format!("{name} recall {t}"));
            close(scores.f1, f[t], &format!("{name} f1 {t}"));
            assert_eq!(scores.support, support[t], "{name} support {t}");
        }
        assert_eq!(
            serde_json::to_value(&m.confusion).unwrap(),
            case["confusion"],
            "{name} confusion"
        );
    }
}

#[test]
fn evaluation_json_round_trips_and_lists_the_mistakes() {
    let fixture = fixture();
    let case = &fixture["cases"][1];
    let types = case["types"].as_u64().unwrap() as usize;
    let part_types: Vec<String> = (0..types).map(|t| format!("type-{t}")).collect();
    let outcomes: Vec<ScanOutcome> = labels(&case["truth"])
        .into_iter()
        .zip(labels(&case["predicted"]))
        .enumerate()
        .map(|(i, (truth, predicted))| ScanOutcome {
            path: format!("bin/type-{truth}/{i:03}.ply").into(),
            truth,
            predicted,
            confidence: (i % 10) as f32 / 10.0,
        })
        .collect();
    let evaluation = Evaluation::new(&outcomes, &part_types).unwrap();
    let wrong = outcomes.iter().filter(|o| o.truth != o.predicted).count();
    assert_eq!(evaluation.misclassified.len(), wrong);
    assert!(evaluation
        .misclassified
        .windows(2)
        .all(|w| w[0].confidence >= w[1].confidence));
    let json = serde_json::to_string(&evaluation).unwrap();
    let value: Value = serde_json::from_str(&json).unwrap();
    assert_eq!(value["confusion"], case["confusion"]);
    close(
        value["accuracy"].as_f64().unwrap(),
        case["accuracy"].as_f64().unwrap(),
        "accuracy",
    );
    let back: Evaluation = serde_json::from_str(&json).unwrap();
    assert_eq!(back, evaluation);
}
