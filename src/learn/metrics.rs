//! How well a model sorts labelled scans: accuracy, balanced accuracy, per-type precision /
//! recall / F1 / support, and the confusion matrix; [`Evaluation`] is what
//! `partsift evaluate --json` prints and what the Review tab shows.

use std::path::PathBuf;

use serde::{Deserialize, Serialize};

/// Counts of (true type, predicted type) pairs: rows are the true type, columns the predicted.
/// Serialised as a list of rows, `[[...], ...]`.
#[derive(Clone, Debug, PartialEq, Eq)]
pub struct ConfusionMatrix {
    types: usize,
    /// Row-major, `types * types`.
    counts: Vec<usize>,
}

impl ConfusionMatrix {
    /// A matrix of zeros for `types` part types.
    pub fn new(types: usize) -> Self {
        ConfusionMatrix {
            types,
            counts: vec![0; types * types],
        }
    }

    /// Counts one scan of true type `truth` predicted as `predicted`.
    /// Errors when either is not below the number of types.
    pub fn add(&mut self, truth: usize, predicted: usize) -> Result<(), LabelOutOfRange> {
        let types = self.types;
        for label in [truth, predicted] {
            if label >= types {
                return Err(LabelOutOfRange { label, types });
            }
        }
        self.counts[truth * types + predicted] += 1;
        Ok(())
    }

    pub fn types(&self) -> usize {
        self.types
    }

    /// The number of scans of type `truth` predicted as `predicted`, 0 outside the matrix.
    pub fn get(&self, truth: usize, predicted: usize) -> usize {
        if truth < self.types && predicted < self.types {
            self.counts[truth * self.types + predicted]
        } else {
            0
        }
    }

    /// The predictions for the scans of type `truth`, one count per predicted type; empty
    /// outside the matrix.
    pub fn row(&self, truth: usize) -> &[usize] {
        self.counts
            .chunks_exact(self.types.max(1))
            .nth(truth)
            .unwrap_or(&[])
    }

    fn column_sum(&self, predicted: usize) -> usize {
        (0..self.types).map(|t| self.get(t, predicted)).sum()
    }
}

impl Serialize for ConfusionMatrix {
    fn serialize<S: serde::Serializer>(&self, serializer: S) -> Result<S::Ok, S::Error> {
        serializer.collect_seq((0..self.types).map(|t| self.row(t)))
    }
}

impl<'de> Deserialize<'de> for ConfusionMatrix {
    fn deserialize<D: serde::Deserializer<'de>>(deserializer: D) -> Result<Self, D::Error> {
        let rows = Vec::<Vec<usize>>::deserialize(deserializer)?;
        let types = rows.len();
        if let Some(bad) = rows.iter().position(|r| r.len() != types) {
            return Err(serde::de::Error::custom(format!(
                "confusion matrix row {bad} has {} entries, expected {types}",
                rows[bad].len()
            )));
        }
        Ok(ConfusionMatrix {
            types,
            counts: rows.concat(),
        })
    }
}

#[derive(Debug, thiserror::Error, PartialEq, Eq)]
#[error("label {label} is out of range for {types} part types")]
pub struct LabelOutOfRange {
    pub label: usize,
    pub types: usize,
}

/// Precision, recall and F1 of one part type, and its support (scans truly of that type).
#[derive(Clone, Debug, PartialEq, Serialize, Deserialize)]
pub struct TypeScores {
    #[serde(rename = "type")]
    pub part_type: String,
    pub precision: f64,
    pub recall: f64,
    pub f1: f64,
    pub support: usize,
}

/// The scores of a set of (true type, predicted type) pairs.
#[derive(Clone, Debug, PartialEq, Serialize, Deserialize)]
pub struct Metrics {
    /// Share of scans whose predicted type is the true type.
    pub accuracy: f64,
    /// Mean recall over the types that have at least one scan.
    pub balanced_accuracy: f64,
    pub part_types: Vec<String>,
    pub confusion: ConfusionMatrix,
    pub per_type: Vec<TypeScores>,
}

impl Metrics {
    /// Scores `pairs` of (true label, predicted label), labels indexing `part_types`.
    ///
    /// Where a ratio has nothing to divide by, it is 0, as scikit-learn's `zero_division=0`:
    /// precision of a type never predicted, recall of a type with no scans, F1 when precision
    /// and recall are both 0; accuracy and balanced accuracy of no pairs. Types with no scans are
    /// left out of the balanced accuracy, as scikit-learn's `balanced_accuracy_score` does.
    ///
    /// Errors when a label is not below `part_types.len()`.
    pub fn from_pairs(
        pairs: &[(usize, usize)],
        part_types: &[String],
    ) -> Result<Metrics, LabelOutOfRange> {
        let mut confusion = ConfusionMatrix::new(part_types.len());
        for &(truth, predicted) in pairs {
            confusion.add(truth, predicted)?;
        }
        let ratio = |num: usize, den: usize| {
            if den == 0 {
                0.0
            } else {
                num as f64 / den as f64
            }
        };
        let per_type: Vec<TypeScores> = part_types
            .iter()
            .enumerate()
            .map(|(t, name)| {
                let hits = confusion.get(t, t);
                let support: usize = confusion.row(t).iter().sum();
                let predicted = confusion.column_sum(t);
                // F1 = 2 tp / (2 tp + fp + fn), the same as the harmonic mean of precision and
                // recall wherever that is defined.
                TypeScores {
                    part_type: name.clone(),
                    precision: ratio(hits, predicted),
                    recall: ratio(hits, support),
                    f1: ratio(2 * hits, predicted + support),
                    support,
                }
            })
            .collect();
        let hits: usize = (0..part_types.len()).map(|t| confusion.get(t, t)).sum();
        let present: Vec<f64> = per_type
            .iter()
            .filter(|s| s.support > 0)
            .map(|s| s.recall)
            .collect();
        let balanced_accuracy = if present.is_empty() {
            0.0
        } else {
            present.iter().sum::<f64>() / present.len() as f64
        };
        Ok(Metrics {
            accuracy: ratio(hits, pairs.len()),
            balanced_accuracy,
            part_types: part_types.to_vec(),
            confusion,
            per_type,
        })
    }
}

/// What the model made of one labelled scan.
#[derive(Clone, Debug, PartialEq)]
pub struct ScanOutcome {
    pub path: PathBuf,
    pub truth: usize,
    pub predicted: usize,
    /// Calibrated probability of the predicted type, in [0, 1].
    pub confidence: f32,
}

/// A scan whose predicted type is not its true type.
#[derive(Clone, Debug, PartialEq, Serialize, Deserialize)]
pub struct Misclassified {
    #[serde(serialize_with = "crate::verdict::serialize_path_lossy")]
    pub path: PathBuf,
    #[serde(rename = "true")]
    pub true_type: String,
    pub predicted: String,
    pub confidence: f32,
}

/// The result of evaluating a model on labelled scans, in the shape `partsift evaluate --json`
/// prints: `{"accuracy", "balanced_accuracy", "part_types", "confusion", "per_type": [{"type",
/// "precision", "recall", "f1", "support"}], "misclassified": [{"path", "true", "predicted",
/// "confidence"}]}`.
#[derive(Clone, Debug, PartialEq, Serialize, Deserialize)]
pub struct Evaluation {
    #[serde(flatten)]
    pub metrics: Metrics,
    /// Most confident mistakes first (they are the likeliest mislabelled scans), then by path.
    pub misclassified: Vec<Misclassified>,
}

impl Evaluation {
    /// Scores the outcomes, labels indexing `part_types`.
    /// Errors when a label is not below `part_types.len()`.
    pub fn new(
        outcomes: &[ScanOutcome],
        part_types: &[String],
    ) -> Result<Evaluation, LabelOutOfRange> {
        let pairs: Vec<(usize, usize)> = outcomes.iter().map(|o| (o.truth, o.predicted)).collect();
        let metrics = Metrics::from_pairs(&pairs, part_types)?;
        let mut wrong: Vec<&ScanOutcome> =
            outcomes.iter().filter(|o| o.truth != o.predicted).collect();
        wrong.sort_by(|a, b| {
            b.confidence
                .total_cmp(&a.confidence)
                .then_with(|| a.path.cmp(&b.path))
        });
        let misclassified = wrong
            .into_iter()
            .map(|o| Misclassified {
                path: o.path.clone(),
                true_type: part_types[o.truth].clone(),
                predicted: part_types[o.predicted].clone(),
                confidence: o.confidence,
            })
            .collect();
        Ok(Evaluation {
            metrics,
            misclassified,
        })
    }
}

#[cfg(test)]
mod tests {
    use super::*;

    fn types(names: &[&str]) -> Vec<String> {
        names.iter().map(|s| s.to_string()).collect()
    }

    #[test]
    fn a_hand_counted_case() {
        // 3 types; truth 0,0,0,1,1,2 predicted 0,0,1,1,2,2. Counted by hand:
        // precision 2/2, 1/2, 1/2; recall 2/3, 1/2, 1/1; accuracy 4/6; balanced (2/3+1/2+1)/3.
        let pairs = [(0, 0), (0, 0), (0, 1), (1, 1), (1, 2), (2, 2)];
        let m = Metrics::from_pairs(&pairs, &types(&["a", "b", "c"])).unwrap();
        assert_eq!(m.confusion.row(0), [2, 1, 0]);
        assert_eq!(m.confusion.row(1), [0, 1, 1]);
        assert_eq!(m.confusion.row(2), [0, 0, 1]);
        assert!((m.accuracy - 4.0 / 6.0).abs() < 1e-12);
        assert!((m.balanced_accuracy - (2.0 / 3.0 + 0.5 + 1.0) / 3.0).abs() < 1e-12);
        let p: Vec<f64> = m.per_type.iter().map(|s| s.precision).collect();
        assert_eq!(p, [1.0, 0.5, 0.5]);
        assert!((m.per_type[0].f1 - 0.8).abs() < 1e-12);
        assert_eq!(m.per_type[2].support, 1);
    }

    #[test]
    fn nothing_to_divide_by_gives_zero() {
        let m = Metrics::from_pairs(&[], &types(&["a", "b"])).unwrap();
        assert_eq!((m.accuracy, m.balanced_accuracy), (0.0, 0.0));
        // Type 1 has no scans and is never predicted.
        let m = Metrics::from_pairs(&[(0, 0)], &types(&["a", "b"])).unwrap();
        let b = &m.per_type[1];
        assert_eq!((b.precision, b.recall, b.f1, b.support), (0.0, 0.0, 0.0, 0));
        assert_eq!(m.balanced_accuracy, 1.0);
    }

    #[test]
    fn labels_out_of_range_are_errors() {
        assert_eq!(
            Metrics::from_pairs(&[(0, 2)], &types(&["a", "b"])),
            Err(LabelOutOfRange { label: 2, types: 2 })
        );
        let m = ConfusionMatrix::new(2);
        assert_eq!((m.get(5, 0), m.row(5)), (0, &[][..]));
        assert_eq!(ConfusionMatrix::new(0).row(0), &[] as &[usize]);
    }

    #[test]
    fn evaluation_json_has_the_evaluate_shape() {
        let outcomes = [
            ScanOutcome {
                path: "bin/a/1.ply".into(),
                truth: 0,
                predicted: 0,
                confidence: 0.9,
            },
            ScanOutcome {
                path: "bin/a/2.ply".into(),
                truth: 0,
                predicted: 1,
                confidence: 0.6,
            },
            ScanOutcome {
                path: "bin/b/3.ply".into(),
                truth: 1,
                predicted: 0,
                confidence: 0.75,
            },
        ];
        let evaluation = Evaluation::new(&outcomes, &types(&["a", "b"])).unwrap();
        let json = serde_json::to_value(&evaluation).unwrap();
        let keys: Vec<&str> = json
            .as_object()
            .unwrap()
            .keys()
            .map(|k| k.as_str())
            .collect();
        let mut sorted = keys.clone();
        sorted.sort_unstable();
        assert_eq!(
            sorted,
            [
                "accuracy",
                "balanced_accuracy",
                "confusion",
                "misclassified",
                "part_types",
                "per_type"
            ]
        );
        assert_eq!(json["confusion"], serde_json::json!([[1, 1], [1, 0]]));
        assert_eq!(
            json["per_type"][0],
            serde_json::json!({"type": "a", "precision": 0.5, "recall": 0.5, "f1": 0.5, "support": 2})
        );
        assert_eq!(
            json["misclassified"][0],
            serde_json::json!({"path": "bin/b/3.ply", "true": "b", "predicted": "a", "confidence": 0.75})
        );
        assert_eq!(json["misclassified"][1]["path"], "bin/a/2.ply");
        let back: Evaluation = serde_json::from_value(json).unwrap();
        assert_eq!(back, evaluation);
    }

    #[test]
    fn a_ragged_confusion_matrix_is_refused() {
        let err = serde_json::from_str::<ConfusionMatrix>("[[1, 2], [3]]").unwrap_err();
        assert!(err.to_string().contains("row 1"), "{err}");
    }
}
