"""Reference voxel-grid downsampling and farthest point sampling from Open3D, for
tests/prep_reference.rs.

Not run in CI: the fixture it writes (prep_fixture.json) is committed. Made with
open3d 0.20.0 and numpy 2.4.6, used as libraries (the versions are also written into the
fixture):

    python3 -m venv /tmp/ref && /tmp/ref/bin/pip install open3d==0.20.0 numpy==2.4.6
    /tmp/ref/bin/python tests/reference/make_prep_fixtures.py

(On a bare Debian, open3d's wheel also needs `apt-get install libusb-1.0-0 libgl1 libgomp1`.)

What Open3D does, as checked by this script before it writes anything:
- `voxel_down_sample(v)`: a point's voxel is floor((p - (min_bound - v/2)) / v), in f64,
  and each occupied voxel gives the mean of its points. The output order is Open3D's own
  (a hash map), so the fixture lists the centroids with their voxel index.
- `farthest_point_down_sample(n)`: starts at index 0, picks the point farthest from all
  picks so far (strict '>' so ties go to the lower index), and returns the picked points in
  index order, not pick order. The fixture lists the picked indices (recovered by matching
  coordinates exactly) and, from the same rule written in numpy here, the pick order.
"""

import json
import pathlib

import numpy as np
import open3d as o3d

def f32_text(x):
    """The shortest decimal that reads back (as f64, then rounded to f32, as serde_json and
    `as f32` do in the test) to exactly this float32."""
    s = np.format_float_positional(np.float32(x), unique=True, trim="-")
    assert np.float32(float(s)) == np.float32(x), s
    return float(s)


rng = np.random.default_rng(20260612)
# A part-like cloud (mm): a noisy ring with a denser patch, float32 as partsift stores it.
t = rng.uniform(0.0, 2.0 * np.pi, 1700)
ring = np.stack([40.0 * np.cos(t), 25.0 * np.sin(t), rng.uniform(0.0, 12.0, t.size)], axis=1)
patch = rng.normal(size=(300, 3)) * [3.0, 3.0, 1.0] + [40.0, 0.0, 6.0]
points = (np.concatenate([ring, patch]) + rng.normal(size=(2000, 3)) * 0.3).astype(np.float32)
p64 = points.astype(np.float64)
cloud = o3d.geometry.PointCloud(o3d.utility.Vector3dVector(p64))

voxels = []
for size in [1.5, 4.0]:
    got = np.asarray(cloud.voxel_down_sample(size).points)
    start = p64.min(axis=0) - size / 2.0
    keys = np.floor((got - start) / size).astype(np.int64)
    # Check the convention: our own bucketing must give exactly Open3D's centroids.
    own = {}
    for key, p in zip(map(tuple, np.floor((p64 - start) / size).astype(np.int64)), p64):
        own.setdefault(key, []).append(p)
    assert len(own) == len(got), (len(own), len(got))
    for key, c in zip(map(tuple, keys), got):
        assert np.allclose(np.mean(own[key], axis=0), c, rtol=0, atol=1e-9), key
    order = np.lexsort((keys[:, 2], keys[:, 1], keys[:, 0]))
    voxels.append(
        {
            "voxel_mm": size,
            "keys": keys[order].tolist(),
            # 7 significant digits: the test allows 1e-4 mm.
            "centroids": [[float(f"{c:.7g}") for c in p] for p in got[order]],
        }
    )

n = 200
picked_points = np.asarray(cloud.farthest_point_down_sample(n).points)
lookup = {tuple(p): i for i, p in enumerate(p64)}
assert len(lookup) == len(p64), "duplicate points would make indices ambiguous"
picked = [lookup[tuple(p)] for p in picked_points]
distance = np.full(len(p64), np.inf)
order = [0]
for _ in range(n - 1):
    distance = np.minimum(distance, ((p64 - p64[order[-1]]) ** 2).sum(axis=1))
    order.append(int(np.argmax(distance)))
assert sorted(order) == picked, "Open3D's FPS is not the rule described above"

fixture = {
    "source": "open3d.geometry.PointCloud.voxel_down_sample / farthest_point_down_sample",
    "open3d": o3d.__version__,
    "numpy": np.__version__,
    "points": [[f32_text(c) for c in p] for p in points],
    "voxel_grids": voxels,
    "fps_n": n,
    "fps_indices_open3d": picked,
    "fps_pick_order": order,
}
out = pathlib.Path(__file__).with_name("prep_fixture.json")
out.write_text(json.dumps(fixture, separators=(",", ":")) + "\n")
print(f"wrote {out} ({out.stat().st_size} bytes)")
