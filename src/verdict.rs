//! A verdict: the predicted part type, its calibrated confidence, and whether it is sure or needs a person.
//!
//! Offers [`Verdict`] (made from a model's logits with [`Verdict::from_logits`]), [`Status`], and
//! [`ClassifyRow`], one line of `partsift classify --json`, which can also hold a scan that failed.

use std::path::{Path, PathBuf};

use serde::ser::SerializeMap;
use serde::{Deserialize, Serialize, Serializer};

use crate::learn::Calibration;

/// The largest probability ever reported: the f32 just below 1. A calibrated probability of
/// certainty is never honest, and this keeps a review threshold of 1.0 meaning "never sure".
pub const MAX_PROBABILITY: f32 = 1.0 - f32::EPSILON / 2.0;

/// Whether a verdict may be acted on without a person looking.
#[derive(Clone, Copy, Debug, PartialEq, Eq, Hash, Serialize, Deserialize)]
#[serde(rename_all = "lowercase")]
pub enum Status {
    /// Calibrated confidence at or above the model's review threshold.
    Sure,
    /// Below the threshold: a person should look at this scan.
    Review,
}

impl Status {
    /// "sure" or "review", as in the JSON and CSV output.
    pub fn as_str(self) -> &'static str {
        match self {
            Status::Sure => "sure",
            Status::Review => "review",
        }
    }
}

/// The model's verdict on one scan.
#[derive(Clone, Debug, PartialEq)]
pub struct Verdict {
    pub part_type: String,
    /// Calibrated probability of `part_type`, in [0, [`MAX_PROBABILITY`]].
    pub confidence: f32,
    pub status: Status,
    /// Calibrated probability of every part type, in the model's order of types; they sum to 1
    /// (up to rounding).
    pub scores: Vec<(String, f32)>,
}

#[derive(Debug, thiserror::Error, PartialEq)]
pub enum VerdictError {
    #[error("the model gave {got} scores for {expected} part types")]
    WrongLength { expected: usize, got: usize },
    #[error("the model gave a score that is not a finite number")]
    NotFinite,
}

impl Verdict {
    /// The verdict for one scan from the network's raw scores (`logits`, one per part type, in
    /// the order of `part_types`): probabilities softmax(logits / T) with the calibration's
    /// temperature, the most probable type, and its status by the calibration's threshold.
    ///
    /// Errors: `logits` and `part_types` differ in length or are empty, or a logit is not finite.
    pub fn from_logits(
        logits: &[f32],
        part_types: &[String],
        calibration: &Calibration,
    ) -> Result<Verdict, VerdictError> {
        if logits.len() != part_types.len() || logits.is_empty() {
            return Err(VerdictError::WrongLength {
                expected: part_types.len(),
                got: logits.len(),
            });
        }
        let mut probabilities = vec![0.0; logits.len()];
        let top = softmax(logits, calibration.temperature(), &mut probabilities)?;
        Ok(Verdict {
            part_type: part_types[top].clone(),
            confidence: probabilities[top],
            status: calibration.status(probabilities[top]),
            scores: part_types.iter().cloned().zip(probabilities).collect(),
        })
    }
}

/// Writes softmax(logits / temperature) into `out` (same length) and returns the index of the
/// largest (the first of equals). Stable for any finite logits: the largest is subtracted before
/// `exp`. Each probability is capped at [`MAX_PROBABILITY`]. `temperature` must be positive and
/// finite (a [`Calibration`] guarantees it).
///
/// Errors when a logit is not finite; `out` is then left unspecified.
pub(crate) fn softmax(
    logits: &[f32],
    temperature: f32,
    out: &mut [f32],
) -> Result<usize, VerdictError> {
    let mut top = 0;
    for (i, &z) in logits.iter().enumerate() {
        if !z.is_finite() {
            return Err(VerdictError::NotFinite);
        }
        if z > logits[top] {
            top = i;
        }
    }
    let max = logits.get(top).copied().unwrap_or(0.0);
    let mut sum = 0.0f64;
    for (p, &z) in out.iter_mut().zip(logits) {
        let e = (((z - max) / temperature) as f64).exp();
        *p = e as f32;
        sum += e;
    }
    for p in out.iter_mut() {
        *p = ((*p as f64 / sum) as f32).min(MAX_PROBABILITY);
    }
    Ok(top)
}

/// One line of `partsift classify --json`, and one row of the Sort tab: a scan and its verdict,
/// or the error that kept it from having one. Serialised as
/// `{"path", "type", "confidence", "status": "sure"|"review"|"error", "scores": {type: probability}}`
/// with `"error": message` added (and `type` and `confidence` null, `scores` empty) for a failed scan.
#[derive(Clone, Debug, PartialEq)]
pub struct ClassifyRow {
    pub path: PathBuf,
    pub outcome: ClassifyOutcome,
}

#[derive(Clone, Debug, PartialEq)]
pub enum ClassifyOutcome {
    Verdict(Verdict),
    /// The scan could not be read or prepared: the error's message, naming the file and place.
    Failed(String),
}

impl ClassifyRow {
    /// "sure", "review" or "error".
    pub fn status_str(&self) -> &'static str {
        match &self.outcome {
            ClassifyOutcome::Verdict(v) => v.status.as_str(),
            ClassifyOutcome::Failed(_) => "error",
        }
    }
}

impl Serialize for ClassifyRow {
    fn serialize<S: Serializer>(&self, serializer: S) -> Result<S::Ok, S::Error> {
        struct Scores<'a>(&'a [(String, f32)]);
        impl Serialize for Scores<'_> {
            fn serialize<S: Serializer>(&self, serializer: S) -> Result<S::Ok, S::Error> {
                serializer.collect_map(self.0.iter().map(|(k, v)| (k, v)))
            }
        }
        let (verdict, error) = match &self.outcome {
            ClassifyOutcome::Verdict(v) => (Some(v), None),
            ClassifyOutcome::Failed(e) => (None, Some(e)),
        };
        let mut map = serializer.serialize_map(Some(if error.is_some() { 6 } else { 5 }))?;
        map.serialize_entry("path", &self.path.to_string_lossy())?;
        map.serialize_entry("type", &verdict.map(|v| &v.part_type))?;
        map.serialize_entry("confidence", &verdict.map(|v| v.confidence))?;
        map.serialize_entry("status", self.status_str())?;
        map.serialize_entry("scores", &Scores(verdict.map_or(&[], |v| &v.scores)))?;
        if let Some(e) = error {
            map.serialize_entry("error", e)?;
        }
        map.end()
    }
}

/// Serialises a path as text, replacing what is not UTF-8 (a JSON string must be), so an odd file
/// name never stops a report.
pub(crate) fn serialize_path_lossy<S: Serializer>(
    path: &Path,
    serializer: S,
) -> Result<S::Ok, S::Error> {
    serializer.serialize_str(&path.to_string_lossy())
}

#[cfg(test)]
mod tests {
    use super::*;

    fn types(names: &[&str]) -> Vec<String> {
        names.iter().map(|s| s.to_string()).collect()
    }

    #[test]
    fn softmax_matches_the_definition_and_survives_huge_logits() {
        // softmax(1, 2, 3) = e^k / (e + e^2 + e^3) = 0.0900306, 0.2447285, 0.6652410 (worked by
        // hand; the same values as scipy.special.softmax([1, 2, 3])).
        let mut p = [0.0; 3];
        assert_eq!(softmax(&[1.0, 2.0, 3.0], 1.0, &mut p), Ok(2));
        for (got, want) in p.iter().zip([0.090_030_6, 0.244_728_5, 0.665_241]) {
            assert!((got - want).abs() < 1e-6, "{p:?}");
        }
        // Shifting every logit changes nothing, even where exp(z) itself would overflow or
        // underflow (exp(1003) and exp(-1003) are out of range even in f64).
        let mut q = [0.0; 3];
        for shift in [1000.0, -1004.0] {
            softmax(&[shift + 1.0, shift + 2.0, shift + 3.0], 1.0, &mut q).unwrap();
            assert!(p.iter().zip(q).all(|(a, b)| (a - b).abs() < 1e-6), "{q:?}");
        }
        // Temperature 2 is softmax(0.5, 1, 1.5).
        softmax(&[1.0, 2.0, 3.0], 2.0, &mut p).unwrap();
        softmax(&[0.5, 1.0, 1.5], 1.0, &mut q).unwrap();
        assert_eq!(p, q);
        // A certain-looking answer stays just below 1.
        softmax(&[0.0, 200.0], 1.0, &mut p[..2]).unwrap();
        assert_eq!(p[1], MAX_PROBABILITY);
        assert_eq!(
            softmax(&[0.0, f32::NAN], 1.0, &mut p[..2]),
            Err(VerdictError::NotFinite)
        );
    }

    #[test]
    fn verdict_takes_the_top_type_and_its_status_from_the_threshold() {
        let names = types(&["bolt", "nut", "washer"]);
        let calibration = Calibration::new(1.0, 0.6).unwrap();
        let v = Verdict::from_logits(&[1.0, 3.0, 2.0], &names, &calibration).unwrap();
        assert_eq!(v.part_type, "nut");
        assert!((v.confidence - 0.665_241).abs() < 1e-6);
        assert_eq!(v.status, Status::Sure);
        assert_eq!(v.scores[0].0, "bolt");
        let strict = Calibration::new(1.0, 0.7).unwrap();
        let v = Verdict::from_logits(&[1.0, 3.0, 2.0], &names, &strict).unwrap();
        assert_eq!(v.status, Status::Review);
        assert_eq!(
            Verdict::from_logits(&[1.0], &names, &calibration),
            Err(VerdictError::WrongLength {
                expected: 3,
                got: 1
            })
        );
        assert!(Verdict::from_logits(&[], &[], &calibration).is_err());
    }

    #[test]
    fn classify_rows_have_the_classify_json_shape() {
        let names = types(&["bolt", "nut"]);
        let calibration = Calibration::new(1.0, 0.9).unwrap();
        let verdict = Verdict::from_logits(&[0.0, 0.0], &names, &calibration).unwrap();
        let row = ClassifyRow {
            path: "scans/a.ply".into(),
            outcome: ClassifyOutcome::Verdict(verdict),
        };
        assert_eq!(
            serde_json::to_value(&row).unwrap(),
            serde_json::json!({"path": "scans/a.ply", "type": "bolt", "confidence": 0.5,
                "status": "review", "scores": {"bolt": 0.5, "nut": 0.5}})
        );
        let failed = ClassifyRow {
            path: "scans/b.ply".into(),
            outcome: ClassifyOutcome::Failed("scans/b.ply, line 3: not a number".into()),
        };
        assert_eq!(
            serde_json::to_value(&failed).unwrap(),
            serde_json::json!({"path": "scans/b.ply", "type": null, "confidence": null,
                "status": "error", "scores": {}, "error": "scans/b.ply, line 3: not a number"})
        );
    }

    #[cfg(unix)]
    #[test]
    fn a_path_that_is_not_utf8_still_serialises() {
        use std::os::unix::ffi::OsStrExt;
        let row = ClassifyRow {
            path: PathBuf::from(std::ffi::OsStr::from_bytes(b"scan-\xff.ply")),
            outcome: ClassifyOutcome::Failed("unreadable".into()),
        };
        let json = serde_json::to_value(&row).unwrap();
        assert_eq!(json["path"], "scan-\u{fffd}.ply");
    }
}
