"""Makes tests/reference/calibration_fixture.json: temperatures fitted by SciPy, which
tests/learn_calibrate.rs compares partsift's temperature scaling against.

The temperature T minimises the mean negative log-likelihood of the true labels under
softmax(logits / T) (Guo et al. 2017, "On Calibration of Modern Neural Networks", section 4.2),
searched on ln T in [ln 0.05, ln 20] by scipy.optimize.minimize_scalar (bounded Brent).

Run from the crate root:  pip install scipy==1.17.1 numpy && python3 tests/reference/make_calibration_fixture.py
Made with SciPy 1.17.1 and NumPy 2.4.6 (the versions are also written into the fixture).
Not run in CI: the fixture is committed.
"""

import json
import math
from pathlib import Path

import numpy as np
import scipy
from scipy.optimize import minimize_scalar
from scipy.special import logsumexp

rng = np.random.default_rng(7)
LOW, HIGH = math.log(0.05), math.log(20.0)


def mean_nll(ln_t, logits, labels):
    z = logits / math.exp(ln_t)
    return float(np.mean(logsumexp(z, axis=1) - z[np.arange(len(labels)), labels]))


cases = []


def case(name, logits, labels):
    # Logits as partsift holds them: f32, here widened exactly to f64.
    logits = np.asarray(logits, dtype=np.float32).astype(np.float64)
    labels = np.asarray(labels)
    result = minimize_scalar(
        mean_nll,
        bounds=(LOW, HIGH),
        args=(logits, labels),
        method="bounded",
        options={"xatol": 1e-12, "maxiter": 2000},
    )
    assert result.success and LOW + 1e-3 < result.x < HIGH - 1e-3, (name, result)
    cases.append(
        {
            "name": name,
            "types": logits.shape[1],
            "logits": logits.ravel().tolist(),
            "labels": labels.tolist(),
            "temperature": math.exp(result.x),
            "mean_nll": result.fun,
        }
    )


def scores(n, types, sharpness, wrong_share):
    labels = rng.integers(0, types, n)
    logits = rng.normal(0.0, 1.0, (n, types))
    believed = labels.copy()
    flip = rng.random(n) < wrong_share
    believed[flip] = rng.integers(0, types, flip.sum())
    logits[np.arange(n), believed] += 2.0
    return logits * sharpness, labels


# An overconfident network (T > 1) and an underconfident one (T < 1, as label smoothing gives).
case("overconfident", *scores(80, 4, 4.0, 0.25))
case("underconfident", *scores(60, 8, 0.4, 0.05))
case("two_types", *scores(30, 2, 2.0, 0.2))
# Tiny: three scans, one wrong.
case("tiny", [[2.0, 0.5, -1.0], [0.1, 1.5, 0.2], [1.0, 0.0, 3.0]], [0, 1, 0])

out = {
    "made_by": "tests/reference/make_calibration_fixture.py",
    "scipy_version": scipy.__version__,
    "numpy_version": np.__version__,
    "cases": cases,
}
path = Path(__file__).with_name("calibration_fixture.json")
path.write_text(json.dumps(out, indent=1) + "\n")
print(f"wrote {path} ({len(cases)} cases)")
