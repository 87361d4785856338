//! Calibration on the holdout split: temperature scaling (Guo et al. 2017, "On Calibration of
//! Modern Neural Networks"), then the review threshold on the calibrated confidence.

use serde::{Deserialize, Serialize};

use crate::verdict::{softmax, Status};

/// The precision the review threshold aims for among the scans called `sure` (issue 3).
pub const DEFAULT_TARGET_PRECISION: f64 = 0.99;

/// The temperature is searched in [1/20, 20]: beyond that the holdout is telling us nothing
/// useful (our choice, no source; Guo et al. report fitted temperatures of about 1 to 4).
const MIN_TEMPERATURE: f64 = 0.05;
const MAX_TEMPERATURE: f64 = 20.0;

/// The golden-section search stops when the bracket on ln T is narrower than this.
const LN_T_TOLERANCE: f64 = 1e-9;

/// How a model's raw scores become a verdict: probabilities are softmax(logits / temperature);
/// a verdict is `sure` when its probability is at least `review_threshold`. A threshold of 1.0
/// makes every verdict `review` (no probability reaches 1: see
/// [`crate::verdict::MAX_PROBABILITY`]). The default is temperature 1, threshold 1.0.
///
/// Both values are checked when made and when read back (`temperature` finite and positive,
/// `review_threshold` in [0, 1]), so a model file cannot smuggle in a nonsense value.
#[derive(Clone, Copy, Debug, PartialEq, Serialize, Deserialize)]
#[serde(try_from = "CalibrationFields")]
pub struct Calibration {
    temperature: f32,
    review_threshold: f32,
}

#[derive(Deserialize)]
struct CalibrationFields {
    temperature: f32,
    review_threshold: f32,
}

impl TryFrom<CalibrationFields> for Calibration {
    type Error = CalibrationError;
    fn try_from(f: CalibrationFields) -> Result<Self, CalibrationError> {
        Calibration::new(f.temperature, f.review_threshold)
    }
}

impl Default for Calibration {
    fn default() -> Self {
        Calibration {
            temperature: 1.0,
            review_threshold: 1.0,
        }
    }
}

#[derive(Debug, thiserror::Error, PartialEq)]
pub enum CalibrationError {
    #[error("calibration temperature must be a positive number, got {0}")]
    Temperature(f32),
    #[error("review threshold must be between 0 and 1, got {0}")]
    Threshold(f32),
    #[error("target precision must be above 0 and at most 1, got {0}")]
    TargetPrecision(f64),
    #[error("{logits} holdout scores do not fit {scans} scans of {types} part types")]
    Shape {
        logits: usize,
        scans: usize,
        types: usize,
    },
    #[error("holdout label {label} is out of range for {types} part types")]
    Label { label: usize, types: usize },
    #[error("a holdout score is not a finite number")]
    NotFinite,
}

impl Calibration {
    /// Errors: `temperature` not finite and positive, or `review_threshold` not in [0, 1].
    pub fn new(temperature: f32, review_threshold: f32) -> Result<Self, CalibrationError> {
        if !(temperature.is_finite() && temperature > 0.0) {
            return Err(CalibrationError::Temperature(temperature));
        }
        if !(0.0..=1.0).contains(&review_threshold) {
            return Err(CalibrationError::Threshold(review_threshold));
        }
        Ok(Calibration {
            temperature,
            review_threshold,
        })
    }

    /// Fits both values on the holdout scores: the temperature by [`fit_temperature`], then the
    /// threshold by [`review_threshold`] for `target_precision` (see
    /// [`DEFAULT_TARGET_PRECISION`]). Errors when `target_precision` is not in (0, 1].
    pub fn fit(
        holdout: &HoldoutScores,
        target_precision: f64,
    ) -> Result<Calibration, CalibrationError> {
        if !(target_precision > 0.0 && target_precision <= 1.0) {
            return Err(CalibrationError::TargetPrecision(target_precision));
        }
        let temperature = fit_temperature(holdout);
        let review_threshold = review_threshold(holdout, temperature, target_precision);
        Ok(Calibration {
            temperature,
            review_threshold,
        })
    }

    pub fn temperature(&self) -> f32 {
        self.temperature
    }

    pub fn review_threshold(&self) -> f32 {
        self.review_threshold
    }

    /// `Sure` when `confidence` (a calibrated probability) is at least the review threshold.
    pub fn status(&self, confidence: f32) -> Status {
        if confidence >= self.review_threshold {
            Status::Sure
        } else {
            Status::Review
        }
    }
}

/// The network's raw scores on the holdout scans with their true labels, checked once.
#[derive(Clone, Copy, Debug)]
pub struct HoldoutScores<'a> {
    logits: &'a [f32],
    labels: &'a [usize],
    types: usize,
}

impl<'a> HoldoutScores<'a> {
    /// `logits` is scans x types, row-major (one row of `types` raw scores per scan); `labels`
    /// holds each scan's true type. Errors: the lengths do not fit, a label is not below
    /// `types`, or a score is not finite.
    pub fn new(
        logits: &'a [f32],
        labels: &'a [usize],
        types: usize,
    ) -> Result<Self, CalibrationError> {
        if types == 0 || logits.len() != labels.len() * types {
            return Err(CalibrationError::Shape {
                logits: logits.len(),
                scans: labels.len(),
                types,
            });
        }
        if let Some(&label) = labels.iter().find(|&&l| l >= types) {
            return Err(CalibrationError::Label { label, types });
        }
        if logits.iter().any(|z| !z.is_finite()) {
            return Err(CalibrationError::NotFinite);
        }
        Ok(HoldoutScores {
            logits,
            labels,
            types,
        })
    }

    fn rows(&self) -> impl Iterator<Item = (&'a [f32], usize)> + '_ {
        self.logits
            .chunks_exact(self.types)
            .zip(self.labels.iter().copied())
    }

    /// Mean negative log-likelihood of the true labels under softmax(logits / exp(ln_t)), in
    /// f64, by a stable log-sum-exp.
    fn mean_nll(&self, ln_t: f64) -> f64 {
        let beta = (-ln_t).exp();
        let mut total = 0.0;
        for (row, label) in self.rows() {
            let max = row.iter().fold(f32::NEG_INFINITY, |m, &z| m.max(z)) as f64;
            let sum: f64 = row.iter().map(|&z| (beta * (z as f64 - max)).exp()).sum();
            total += sum.ln() - beta * (row[label] as f64 - max);
        }
        total / self.labels.len() as f64
    }
}

/// The temperature T > 0 that minimises the mean negative log-likelihood of the holdout labels
/// under softmax(logits / T), as Guo et al. 2017 fit it; found by golden-section search on ln T
/// in [1/20, 20] (the NLL is convex in 1/T, so it has one minimum there at most).
///
/// Returns 1 (leave the scores as they are) when the holdout cannot say: no scans, one part
/// type, scores that do not change with T (every row constant), or no minimum inside the range
/// (e.g. every holdout scan right by a wide margin, where the NLL keeps falling as T -> 0).
pub fn fit_temperature(holdout: &HoldoutScores) -> f32 {
    let constant_rows = holdout
        .rows()
        .all(|(row, _)| row.iter().all(|&z| z == row[0]));
    if holdout.labels.is_empty() || holdout.types < 2 || constant_rows {
        return 1.0;
    }
    let (lo, hi) = (MIN_TEMPERATURE.ln(), MAX_TEMPERATURE.ln());
    let ln_t = golden_section_minimum(|u| holdout.mean_nll(u), lo, hi, LN_T_TOLERANCE);
    if ln_t - lo < 1e-6 || hi - ln_t < 1e-6 {
        1.0
    } else {
        ln_t.exp() as f32
    }
}

/// The minimum of a unimodal `f` on [lo, hi] to within `tolerance`, by golden-section search.
fn golden_section_minimum(f: impl Fn(f64) -> f64, lo: f64, hi: f64, tolerance: f64) -> f64 {
    let inv_phi = (5f64.sqrt() - 1.0) / 2.0;
    let (mut a, mut b) = (lo, hi);
    let mut c = b - inv_phi * (b - a);
    let mut d = a + inv_phi * (b - a);
    let (mut fc, mut fd) = (f(c), f(d));
    while b - a > tolerance {
        if fc <= fd {
            b = d;
            d = c;
            fd = fc;
            c = b - inv_phi * (b - a);
            fc = f(c);
        } else {
            a = c;
            c = d;
            fc = fd;
            d = a + inv_phi * (b - a);
            fd = f(d);
        }
    }
    // The ends themselves are candidates too: a monotone f has its minimum there.
    [(lo, f(lo)), ((a + b) / 2.0, f((a + b) / 2.0)), (hi, f(hi))]
        .into_iter()
        .fold(
            (lo, f64::INFINITY),
            |best, x| if x.1 < best.1 { x } else { best },
        )
        .0
}

/// The lowest threshold on the calibrated top probability such that, among the holdout scans at
/// or above it, the share predicted right is at least `target_precision`. The threshold is one of
/// the holdout scans' own probabilities (computed as a verdict computes them).
///
/// Returns 1.0 (everything to review) when no threshold reaches the target, including when the
/// holdout is empty: nothing shows that any verdict can be trusted.
pub fn review_threshold(holdout: &HoldoutScores, temperature: f32, target_precision: f64) -> f32 {
    let mut probabilities = vec![0.0; holdout.types];
    let mut called: Vec<(f32, bool)> = holdout
        .rows()
        .filter_map(|(row, label)| {
            let top = softmax(row, temperature, &mut probabilities).ok()?;
            Some((probabilities[top], top == label))
        })
        .collect();
    lowest_threshold_reaching(&mut called, target_precision)
}

/// See [`review_threshold`]; `called` holds (confidence, right) per scan and is sorted here.
fn lowest_threshold_reaching(called: &mut [(f32, bool)], target_precision: f64) -> f32 {
    called.sort_by(|a, b| b.0.total_cmp(&a.0));
    let mut best = 1.0;
    let (mut right, mut seen) = (0usize, 0usize);
    for group in called.chunk_by(|a, b| a.0 == b.0) {
        right += group.iter().filter(|c| c.1).count();
        seen += group.len();
        // Ties are called sure or not together, so precision is only looked at between groups.
        if right as f64 / seen as f64 >= target_precision {
            best = group[0].0;
        }
    }
    best
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn two_types_hand_derived_temperature() {
        // Logits (a, 0) for every scan, k of n right. With beta = 1/T, the NLL is
        // [k ln(1 + e^(-beta a)) + (n - k) ln(1 + e^(beta a))] / n, whose derivative is zero where
        // sigmoid(beta a) = k / n: T = a / ln(k / (n - k)). Derived by hand. For a = 4, k = 3,
        // n = 4: T = 4 / ln 3 = 3.640957, and the calibrated confidence is then exactly 3/4,
        // the holdout accuracy.
        let logits = [4.0, 0.0, 4.0, 0.0, 4.0, 0.0, 4.0, 0.0];
        let labels = [0, 0, 0, 1];
        let holdout = HoldoutScores::new(&logits, &labels, 2).unwrap();
        let t = fit_temperature(&holdout);
        assert!((t - 4.0 / 3f32.ln()).abs() < 1e-5, "T = {t}");
        let mut p = [0.0; 2];
        softmax(&logits[..2], t, &mut p).unwrap();
        assert!((p[0] - 0.75).abs() < 1e-6);
    }

    #[test]
    fn degenerate_holdouts_leave_temperature_one() {
        let empty = HoldoutScores::new(&[], &[], 3).unwrap();
        assert_eq!(fit_temperature(&empty), 1.0);
        let one_type = HoldoutScores::new(&[2.0, 5.0], &[0, 0], 1).unwrap();
        assert_eq!(fit_temperature(&one_type), 1.0);
        let flat = HoldoutScores::new(&[1.0, 1.0, 3.0, 3.0], &[0, 1], 2).unwrap();
        assert_eq!(fit_temperature(&flat), 1.0);
        // All right by a margin: the NLL falls all the way to T = 1/20.
        let all_right = HoldoutScores::new(&[5.0, 0.0, 0.0, 4.0], &[0, 1], 2).unwrap();
        assert_eq!(fit_temperature(&all_right), 1.0);
    }

    #[test]
    fn huge_logits_do_not_overflow_the_fit() {
        let logits = [
            1004.0, 1000.0, 1004.0, 1000.0, 1004.0, 1000.0, 1004.0, 1000.0,
        ];
        let holdout = HoldoutScores::new(&logits, &[0, 0, 0, 1], 2).unwrap();
        assert!((fit_temperature(&holdout) - 4.0 / 3f32.ln()).abs() < 1e-4);
    }

    #[test]
    fn bad_holdout_scores_are_refused() {
        assert!(matches!(
            HoldoutScores::new(&[1.0, 2.0, 3.0], &[0, 1], 2),
            Err(CalibrationError::Shape { .. })
        ));
        assert!(matches!(
            HoldoutScores::new(&[], &[], 0),
            Err(CalibrationError::Shape { .. })
        ));
        assert_eq!(
            HoldoutScores::new(&[1.0, 2.0], &[2], 2).unwrap_err(),
            CalibrationError::Label { label: 2, types: 2 }
        );
        assert_eq!(
            HoldoutScores::new(&[1.0, f32::INFINITY], &[0], 2).unwrap_err(),
            CalibrationError::NotFinite
        );
    }

    #[test]
    fn the_threshold_is_the_lowest_that_keeps_the_target() {
        // Worked by hand: from the top, precision is 1/1, 2/2, 2/3, 3/4.
        let called = [(0.95, true), (0.9, true), (0.8, false), (0.7, true)];
        let lowest = |target| lowest_threshold_reaching(&mut called.clone(), target);
        assert_eq!(lowest(0.99), 0.9);
        assert_eq!(lowest(0.75), 0.7);
        assert_eq!(lowest(0.7), 0.7);
        // The surest call is wrong: 99% is never reached, so everything goes to review.
        assert_eq!(
            lowest_threshold_reaching(&mut [(0.9, false), (0.8, true)], 0.99),
            1.0
        );
        // Tied confidences are called together.
        assert_eq!(
            lowest_threshold_reaching(&mut [(0.9, true), (0.9, false)], 0.99),
            1.0
        );
        assert_eq!(lowest_threshold_reaching(&mut [], 0.99), 1.0);
    }

    #[test]
    fn fit_picks_threshold_from_calibrated_probabilities() {
        // Three scans of type 0 with margins 3, 2 and -1: at any T the wrong one is the least
        // confident, so the 99% threshold is the probability of the margin-2 scan at the fitted T.
        let logits = [3.0, 0.0, 2.0, 0.0, 0.0, 1.0];
        let labels = [0, 0, 0];
        let holdout = HoldoutScores::new(&logits, &labels, 2).unwrap();
        let calibration = Calibration::fit(&holdout, 0.99).unwrap();
        let t = calibration.temperature();
        let mut p = [0.0; 2];
        softmax(&[2.0, 0.0], t, &mut p).unwrap();
        assert_eq!(calibration.review_threshold(), p[0]);
        assert_eq!(calibration.status(p[0]), Status::Sure);
        assert_eq!(calibration.status(p[0] - 1e-6), Status::Review);
        assert!(Calibration::fit(&holdout, 0.0).is_err());
        assert!(Calibration::fit(&holdout, 1.5).is_err());
    }

    #[test]
    fn calibration_checks_its_values_also_when_read() {
        assert!(Calibration::new(0.0, 0.5).is_err());
        assert!(Calibration::new(f32::NAN, 0.5).is_err());
        assert!(Calibration::new(1.0, 1.5).is_err());
        let c = Calibration::new(1.5, 0.8).unwrap();
        let json = serde_json::to_string(&c).unwrap();
        assert_eq!(json, r#"{"temperature":1.5,"review_threshold":0.8}"#);
        assert_eq!(serde_json::from_str::<Calibration>(&json).unwrap(), c);
        let bad =
            serde_json::from_str::<Calibration>(r#"{"temperature":-1,"review_threshold":0.8}"#);
        assert!(bad.unwrap_err().to_string().contains("temperature"));
        assert_eq!(
            Calibration::default().status(crate::verdict::MAX_PROBABILITY),
            Status::Review
        );
    }
}
