//! How well a model sorts a labelled parts bin: every scan's outcome, the [`Evaluation`]
//! (`partsift evaluate`, the Review tab), and the network's features of every scan for the
//! Map tab.

use crate::learn::bin::PartsBin;
use crate::learn::cache::PreparedCache;
use crate::learn::dataset::{Dataset, DatasetError, SkippedScan};
use crate::learn::metrics::{Evaluation, LabelOutOfRange, ScanOutcome};
use crate::learn::model::TrainedModel;
use crate::learn::progress::{CancelToken, TrainEvent};
use crate::learn::views::mirror_averaged_scores;
use crate::verdict::softmax;

/// The outcome of evaluating a model on a parts bin.
#[derive(Clone, Debug, PartialEq)]
pub struct EvaluationRun {
    /// Scores over every prepared scan. Its `part_types` are the model's, followed by the
    /// bin's types the model does not know (whose scans are wrong whatever the verdict).
    pub evaluation: Evaluation,
    /// One per prepared scan, in the bin's order; labels index `evaluation.metrics.part_types`.
    pub outcomes: Vec<ScanOutcome>,
    /// Scans that could not be read or prepared.
    pub skipped: Vec<SkippedScan>,
    /// The bin's part types the model was not trained on.
    pub unknown_types: Vec<String>,
}

#[derive(Debug, thiserror::Error, PartialEq)]
pub enum EvaluateError {
    #[error(transparent)]
    Dataset(#[from] DatasetError),
    #[error("the scans were prepared with another recipe than the model's")]
    RecipeMismatch,
    /// Not expected: every label is made to index the part types.
    #[error(transparent)]
    Labels(#[from] LabelOutOfRange),
}

/// Prepares the scans of `bin` with the model's recipe ([`Dataset::prepare`]: `on_event`
/// hears its `Preparing` and `ScanSkipped` events, `cancel` stops it) and evaluates the model
/// on them with [`evaluate_on`].
pub fn evaluate(
    model: &TrainedModel,
    bin: &PartsBin,
    cache: Option<&PreparedCache>,
    on_event: &(dyn Fn(TrainEvent) + Sync),
    cancel: &CancelToken,
) -> Result<EvaluationRun, EvaluateError> {
    let dataset = Dataset::prepare(bin, model.recipe(), cache, on_event, cancel)?;
    evaluate_on(model, &dataset)
}

/// Runs the network in evaluation mode on every scan of `dataset` (prepared with the model's
/// recipe) and scores the calibrated verdicts against the labels, matching part types by name.
/// Deterministic.
///
/// Errors: the dataset was prepared with another recipe.
pub fn evaluate_on(
    model: &TrainedModel,
    dataset: &Dataset,
) -> Result<EvaluationRun, EvaluateError> {
    let logits = infer_all(model, dataset)?;
    let mut part_types = model.part_types().to_vec();
    let mut unknown_types = Vec::new();
    let truth_of: Vec<usize> = dataset
        .part_types()
        .iter()
        .map(|name| match part_types.iter().position(|t| t == name) {
            Some(i) => i,
            None => {
                unknown_types.push(name.clone());
                part_types.push(name.clone());
                part_types.len() - 1
            }
        })
        .collect();
    let classes = model.part_types().len();
    let mut probabilities = vec![0.0; classes];
    let temperature = model.calibration().temperature();
    let outcomes: Vec<ScanOutcome> = dataset
        .scans()
        .iter()
        .zip(logits.chunks_exact(classes))
        .map(|(scan, row)| {
            // A row that is not finite counts as the first type at no confidence: a
            // wrong-looking outcome rather than a crash.
            let (predicted, confidence) = match softmax(row, temperature, &mut probabilities) {
                Ok(top) => (top, probabilities[top]),
                Err(_) => (0, 0.0),
            };
            ScanOutcome {
                path: scan.path.clone(),
                truth: truth_of[scan.label],
                predicted,
                confidence,
            }
        })
        .collect();
    let evaluation = Evaluation::new(&outcomes, &part_types)?;
    Ok(EvaluationRun {
        evaluation,
        outcomes,
        skipped: dataset.skipped().to_vec(),
        unknown_types,
    })
}

impl TrainedModel {
    /// The features the network's classifier sees for every scan of `dataset` (prepared with
    /// the model's recipe), `dataset.len() x network().embedding_width()` row-major, in
    /// evaluation mode: the points of a 2D map of the bin. Deterministic.
    ///
    /// Errors: the dataset was prepared with another recipe.
    pub fn embed(&self, dataset: &Dataset) -> Result<Vec<f32>, EvaluateError> {
        check_recipe(self, dataset)?;
        let (points, sizes) = dataset.all();
        Ok(self.network().embed(points, sizes))
    }
}

/// The network's scores for every scan of `dataset`, `len x classes`.
fn infer_all(model: &TrainedModel, dataset: &Dataset) -> Result<Vec<f32>, EvaluateError> {
    check_recipe(model, dataset)?;
    let (points, sizes) = dataset.all();
    Ok(mirror_averaged_scores(model.network(), points, sizes))
}

fn check_recipe(model: &TrainedModel, dataset: &Dataset) -> Result<(), EvaluateError> {
    if dataset.recipe_fingerprint() == model.recipe().fingerprint() {
        Ok(())
    } else {
        Err(EvaluateError::RecipeMismatch)
    }
}
