"""Makes tests/reference/metrics_fixture.json: classification metrics computed by scikit-learn,
which tests/learn_metrics.rs compares partsift's metrics against.

Run from the crate root:  pip install scikit-learn==1.9.1 numpy && python3 tests/reference/make_metrics_fixture.py
Made with scikit-learn 1.9.1 and NumPy 2.4.6 (the versions are also written into the fixture).
Not run in CI: the fixture is committed.
"""

import json
import warnings
from pathlib import Path

import numpy as np
import sklearn
from sklearn.metrics import (
    accuracy_score,
    balanced_accuracy_score,
    confusion_matrix,
    precision_recall_fscore_support,
)

rng = np.random.default_rng(20240611)


def noisy(truth, types, wrong_share):
    predicted = truth.copy()
    flip = rng.random(len(truth)) < wrong_share
    predicted[flip] = rng.integers(0, types, flip.sum())
    return predicted


cases = []


def case(name, types, truth, predicted):
    truth = np.asarray(truth)
    predicted = np.asarray(predicted)
    labels = list(range(types))
    with warnings.catch_warnings():
        # balanced_accuracy_score warns when a predicted type has no scans; it leaves it out.
        warnings.simplefilter("ignore")
        balanced = balanced_accuracy_score(truth, predicted)
    p, r, f, s = precision_recall_fscore_support(
        truth, predicted, labels=labels, average=None, zero_division=0
    )
    cases.append(
        {
            "name": name,
            "types": types,
            "truth": truth.tolist(),
            "predicted": predicted.tolist(),
            "accuracy": float(accuracy_score(truth, predicted)),
            "balanced_accuracy": float(balanced),
            "precision": p.tolist(),
            "recall": r.tolist(),
            "f1": f.tolist(),
            "support": s.tolist(),
            "confusion": confusion_matrix(truth, predicted, labels=labels).tolist(),
        }
    )


case("hand", 3, [0, 0, 0, 1, 1, 2], [0, 0, 1, 1, 2, 2])
truth = rng.integers(0, 5, 60)
case("random_5_types", 5, truth, noisy(truth, 5, 0.35))
truth = rng.integers(0, 8, 200)
case("random_8_types", 8, truth, noisy(truth, 8, 0.1))
# Type 3 is predicted but has no scans; type 2 has scans but is never predicted.
case("absent_types", 4, [0, 0, 1, 1, 2, 2, 0], [0, 3, 1, 1, 0, 1, 3])
# Type 2 neither has scans nor is predicted: an all-zero row and column.
case("unused_type", 3, [0, 1, 1, 0], [0, 1, 0, 0])
case("perfect", 3, [2, 0, 1, 1, 0], [2, 0, 1, 1, 0])
case("all_one_type", 3, [0, 1, 2, 2, 1], [1, 1, 1, 1, 1])

out = {
    "made_by": "tests/reference/make_metrics_fixture.py",
    "sklearn_version": sklearn.__version__,
    "numpy_version": np.__version__,
    "cases": cases,
}
path = Path(__file__).with_name("metrics_fixture.json")
path.write_text(json.dumps(out, indent=1) + "\n")
print(f"wrote {path} ({len(cases)} cases)")
