//! Stratified holdout split: each part type is split on its own, so every type shows up in the
//! holdout in about the same share as in the bin.

use crate::rng::Rng;

/// The share of each type's scans held out when the user does not say (common practice, no source).
pub const DEFAULT_HOLDOUT: f64 = 0.2;

/// Indices into the scans that were split, each list ascending.
#[derive(Clone, Debug, PartialEq, Eq)]
pub struct Split {
    pub train: Vec<usize>,
    pub holdout: Vec<usize>,
}

#[derive(Debug, thiserror::Error, PartialEq)]
#[error("the holdout share must be above 0 and below 1, got {0}")]
pub struct HoldoutShareError(pub f64);

/// Splits scans with the given type labels (any values; one group per distinct label) into
/// train and holdout. Each type holds out `round(count * share)` of its scans, but a type with
/// at least 2 scans keeps at least one on each side, and a single scan goes to train.
///
/// Deterministic: the same labels, share and seed give the same split. Each type is shuffled by
/// its own generator derived from `seed` and the label, so adding scans of one type leaves the
/// split of the other types as it was.
///
/// Errors: `share` is not strictly between 0 and 1 (or is NaN).
pub fn holdout_split(labels: &[usize], share: f64, seed: u64) -> Result<Split, HoldoutShareError> {
    if !(share > 0.0 && share < 1.0) {
        return Err(HoldoutShareError(share));
    }
    let mut order: Vec<usize> = (0..labels.len()).collect();
    order.sort_by_key(|&i| (labels[i], i));
    let mut split = Split {
        train: Vec::with_capacity(labels.len()),
        holdout: Vec::with_capacity(labels.len()),
    };
    for group in order.chunk_by_mut(|&a, &b| labels[a] == labels[b]) {
        let n = group.len();
        let held = if n < 2 {
            0
        } else {
            ((n as f64 * share).round() as usize).clamp(1, n - 1)
        };
        Rng::new(seed).fork(labels[group[0]] as u64).shuffle(group);
        split.holdout.extend_from_slice(&group[..held]);
        split.train.extend_from_slice(&group[held..]);
    }
    split.train.sort_unstable();
    split.holdout.sort_unstable();
    Ok(split)
}

#[cfg(test)]
mod tests {
    use super::*;

    fn labels_of(counts: &[usize]) -> Vec<usize> {
        // Interleaved, so the split cannot rely on scans of a type lying together.
        let mut labels = Vec::new();
        let most = counts.iter().copied().max().unwrap_or(0);
        for i in 0..most {
            for (t, &c) in counts.iter().enumerate() {
                if i < c {
                    labels.push(t);
                }
            }
        }
        labels
    }

    fn per_type(indices: &[usize], labels: &[usize], types: usize) -> Vec<usize> {
        let mut counts = vec![0; types];
        for &i in indices {
            counts[labels[i]] += 1;
        }
        counts
    }

    #[test]
    fn stratified_shares_and_every_scan_once() {
        let counts = [40, 10, 2, 1, 3, 7];
        let labels = labels_of(&counts);
        let split = holdout_split(&labels, 0.2, 5).unwrap();
        assert_eq!(
            per_type(&split.holdout, &labels, counts.len()),
            [8, 2, 1, 0, 1, 1]
        );
        let mut all: Vec<usize> = split.train.iter().chain(&split.holdout).copied().collect();
        all.sort_unstable();
        assert_eq!(all, (0..labels.len()).collect::<Vec<_>>());
        assert!(split.train.windows(2).all(|w| w[0] < w[1]));
    }

    #[test]
    fn large_shares_still_leave_one_scan_to_train() {
        let labels = labels_of(&[2, 5]);
        let split = holdout_split(&labels, 0.95, 1).unwrap();
        assert_eq!(per_type(&split.train, &labels, 2), [1, 1]);
        assert_eq!(per_type(&split.holdout, &labels, 2), [1, 4]);
    }

    #[test]
    fn same_seed_same_split_other_seed_other_split() {
        let labels = labels_of(&[30, 30]);
        let a = holdout_split(&labels, 0.2, 9).unwrap();
        assert_eq!(a, holdout_split(&labels, 0.2, 9).unwrap());
        assert_ne!(a, holdout_split(&labels, 0.2, 10).unwrap());
    }

    #[test]
    fn adding_scans_of_one_type_keeps_the_others_split() {
        let before = labels_of(&[10, 10]);
        let mut after = before.clone();
        after.extend([0, 0, 0]);
        let holdout_of_type_1 = |labels: &[usize]| -> Vec<usize> {
            let split = holdout_split(labels, 0.2, 3).unwrap();
            split
                .holdout
                .into_iter()
                .filter(|&i| labels[i] == 1)
                .collect()
        };
        assert_eq!(holdout_of_type_1(&before), holdout_of_type_1(&after));
    }

    #[test]
    fn shares_outside_zero_to_one_are_refused() {
        for share in [0.0, 1.0, -0.1, 1.5, f64::NAN] {
            assert!(holdout_split(&[0, 0, 1], share, 0).is_err(), "{share}");
        }
        assert_eq!(
            holdout_split(&[], 0.2, 0).unwrap(),
            Split {
                train: vec![],
                holdout: vec![]
            }
        );
    }
}
