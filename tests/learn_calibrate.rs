//! Temperature scaling against SciPy, and the review threshold's promise on the holdout.
//! The fixture is made by tests/reference/make_calibration_fixture.py (SciPy 1.17.1,
//! scipy.optimize.minimize_scalar, bounded, on the mean NLL of softmax(logits / T) over ln T).

use partsift::learn::{fit_temperature, Calibration, HoldoutScores};
use partsift::verdict::{Status, Verdict};
use serde_json::Value;

struct Case {
    name: String,
    types: usize,
    logits: Vec<f32>,
    labels: Vec<usize>,
    temperature: f64,
}

fn cases() -> Vec<Case> {
    let path = concat!(
        env!("CARGO_MANIFEST_DIR"),
        "/tests/reference/calibration_fixture.json"
    );
    let fixture: Value = serde_json::from_str(&std::fs::read_to_string(path).unwrap()).unwrap();
    fixture["cases"]
        .as_array()
        .unwrap()
        .iter()
        .map(|c| Case {
            name: c["name"].as_str().unwrap().to_owned(),
            types: c["types"].as_u64().unwrap() as usize,
            logits: c["logits"]
                .as_array()
                .unwrap()
                .iter()
                .map(|x| x.as_f64().unwrap() as f32)
                .collect(),
            labels: c["labels"]
                .as_array()
                .unwrap()
                .iter()
                .map(|x| x.as_u64().unwrap() as usize)
                .collect(),
            temperature: c["temperature"].as_f64().unwrap(),
        })
        .collect()
}

#[test]
fn temperature_matches_scipy() {
    let cases = cases();
    assert!(cases.len() >= 4);
    for case in &cases {
        let holdout = HoldoutScores::new(&case.logits, &case.labels, case.types).unwrap();
        let t = fit_temperature(&holdout) as f64;
        // Both minimise the same f64 NLL; near its flat minimum ln T is only resolved to about
        // sqrt(machine epsilon), so agree to 1e-5 relative.
        assert!(
            (t - case.temperature).abs() < 1e-5 * case.temperature,
            "{}: got T = {t}, scipy {}",
            case.name,
            case.temperature
        );
    }
}

#[test]
fn sure_verdicts_on_the_holdout_meet_the_target_precision() {
    let part_types: Vec<String> = (0..8).map(|t| format!("type-{t}")).collect();
    for case in cases() {
        let holdout = HoldoutScores::new(&case.logits, &case.labels, case.types).unwrap();
        for target in [0.99, 0.9, 0.75] {
            let calibration = Calibration::fit(&holdout, target).unwrap();
            let (mut sure, mut right) = (0, 0);
            for (row, &label) in case.logits.chunks_exact(case.types).zip(&case.labels) {
                let v = Verdict::from_logits(row, &part_types[..case.types], &calibration).unwrap();
                if v.status == Status::Sure {
                    sure += 1;
                    right += usize::from(v.part_type == part_types[label]);
                }
            }
            if calibration.review_threshold() < 1.0 {
                assert!(
                    sure > 0,
                    "{}: a threshold below 1 calls something sure",
                    case.name
                );
                assert!(
                    right as f64 / sure as f64 >= target,
                    "{} at {target}: {right} of {sure} sure verdicts right",
                    case.name
                );
            } else {
                assert_eq!(sure, 0, "{}", case.name);
            }
        }
    }
}
