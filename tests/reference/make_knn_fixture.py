"""Reference neighbours from SciPy's cKDTree, for tests/prep_reference.rs.

Not run in CI: the fixture it writes (knn_fixture.json) is committed. Made with
numpy 2.4.6 and scipy 1.17.1 (the versions are also written into the fixture):

    python3 -m venv /tmp/ref && /tmp/ref/bin/pip install numpy==2.4.6 scipy==1.17.1
    /tmp/ref/bin/python tests/reference/make_knn_fixture.py

Points are float32 values (what partsift stores), written as the exact decimal of each
float32, so Rust reads back the very same numbers. No exact ties, so the neighbour order is
the same under any tie rule.
"""

import json
import pathlib

import numpy as np
import scipy
from scipy.spatial import cKDTree

def f32_text(x):
    """The shortest decimal that reads back (as f64, then rounded to f32, as serde_json and
    `as f32` do in the test) to exactly this float32."""
    s = np.format_float_positional(np.float32(x), unique=True, trim="-")
    assert np.float32(float(s)) == np.float32(x), s
    return float(s)


rng = np.random.default_rng(20260611)
# An anisotropic blob (mm) plus a dense cluster, so both sparse and dense regions are queried.
points = np.concatenate(
    [
        rng.normal(size=(500, 3)) * [30.0, 20.0, 5.0],
        rng.normal(size=(100, 3)) * 0.5 + [10.0, -5.0, 2.0],
    ]
).astype(np.float32)
queries = np.concatenate(
    [points[::30], rng.uniform(-60.0, 60.0, size=(20, 3)).astype(np.float32)]
).astype(np.float32)

tree = cKDTree(points.astype(np.float64))
k = 8
dist, index = tree.query(queries.astype(np.float64), k=k)
radius = 6.0
balls = []
for q in queries.astype(np.float64):
    found = tree.query_ball_point(q, r=radius)
    d = np.linalg.norm(points[found].astype(np.float64) - q, axis=1)
    balls.append([int(found[j]) for j in np.argsort(d, kind="stable")])

fixture = {
    "source": "scipy.spatial.cKDTree: query(k) and query_ball_point(r); distances Euclidean, not squared",
    "numpy": np.__version__,
    "scipy": scipy.__version__,
    "points": [[f32_text(c) for c in p] for p in points],
    "queries": [[f32_text(c) for c in q] for q in queries],
    "k": k,
    "knn_index": index.tolist(),
    "knn_dist": dist.tolist(),
    "radius": radius,
    "ball_index": balls,
}
out = pathlib.Path(__file__).with_name("knn_fixture.json")
out.write_text(json.dumps(fixture, separators=(",", ":")) + "\n")
print(f"wrote {out} ({out.stat().st_size} bytes)")
