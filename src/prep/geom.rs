//! Small vector helpers for the clean-up steps: points are `[f32; 3]`, sums in f64.

pub(crate) fn sub(a: [f32; 3], b: [f32; 3]) -> [f32; 3] {
    [a[0] - b[0], a[1] - b[1], a[2] - b[2]]
}

pub(crate) fn dot(a: [f32; 3], b: [f32; 3]) -> f32 {
    a[0] * b[0] + a[1] * b[1] + a[2] * b[2]
}

pub(crate) fn cross(a: [f32; 3], b: [f32; 3]) -> [f32; 3] {
    [
        a[1] * b[2] - a[2] * b[1],
        a[2] * b[0] - a[0] * b[2],
        a[0] * b[1] - a[1] * b[0],
    ]
}

pub(crate) fn norm(a: [f32; 3]) -> f32 {
    dot(a, a).sqrt()
}

/// Mean of the points at `indices` (f64 sums so 100k points lose nothing). `None` if empty.
pub(crate) fn centroid_of(
    points: &[[f32; 3]],
    indices: impl Iterator<Item = usize>,
) -> Option<[f64; 3]> {
    let mut sum = [0f64; 3];
    let mut n = 0usize;
    for i in indices {
        for a in 0..3 {
            sum[a] += points[i][a] as f64;
        }
        n += 1;
    }
    (n > 0).then(|| sum.map(|s| s / n as f64))
}

/// Covariance (not normalised by count) of the points at `indices` about `centre`.
pub(crate) fn scatter_of(
    points: &[[f32; 3]],
    indices: impl Iterator<Item = usize>,
    centre: [f64; 3],
) -> [[f64; 3]; 3] {
    let mut m = [[0f64; 3]; 3];
    for i in indices {
        let d = [0, 1, 2].map(|a| points[i][a] as f64 - centre[a]);
        for r in 0..3 {
            for c in 0..3 {
                m[r][c] += d[r] * d[c];
            }
        }
    }
    m
}

/// Eigenvalues (ascending) and unit eigenvectors (`vectors[i]` belongs to `values[i]`) of a
/// symmetric 3x3 matrix, by cyclic Jacobi rotations (Golub and Van Loan, Matrix
/// Computations, 4th ed., section 8.5). Converges to machine precision in a few sweeps.
pub(crate) fn symmetric_eigen(m: [[f64; 3]; 3]) -> ([f64; 3], [[f64; 3]; 3]) {
    let mut a = m;
    let mut v = [[1.0, 0.0, 0.0], [0.0, 1.0, 0.0], [0.0, 0.0, 1.0]];
    for _sweep in 0..50 {
        let off = a[0][1].powi(2) + a[0][2].powi(2) + a[1][2].powi(2);
        let scale = a[0][0].powi(2) + a[1][1].powi(2) + a[2][2].powi(2);
        if off <= 1e-30 * scale.max(1e-300) {
            break;
        }
        for (p, q) in [(0, 1), (0, 2), (1, 2)] {
            if a[p][q] == 0.0 {
                continue;
            }
            let theta = (a[q][q] - a[p][p]) / (2.0 * a[p][q]);
            let t = theta.signum() / (theta.abs() + (theta * theta + 1.0).sqrt());
            let t = if theta == 0.0 { 1.0 } else { t };
            let c = 1.0 / (t * t + 1.0).sqrt();
            let s = t * c;
            for row in &mut a {
                let (akp, akq) = (row[p], row[q]);
                row[p] = c * akp - s * akq;
                row[q] = s * akp + c * akq;
            }
            let (row_p, row_q) = (a[p], a[q]);
            for k in 0..3 {
                a[p][k] = c * row_p[k] - s * row_q[k];
                a[q][k] = s * row_p[k] + c * row_q[k];
            }
            for row in &mut v {
                let (vp, vq) = (row[p], row[q]);
                row[p] = c * vp - s * vq;
                row[q] = s * vp + c * vq;
            }
        }
    }
    let mut order = [0usize, 1, 2];
    order.sort_by(|&i, &j| a[i][i].total_cmp(&a[j][j]));
    let values = order.map(|i| a[i][i]);
    let vectors = order.map(|i| [v[0][i], v[1][i], v[2][i]]);
    (values, vectors)
}

/// The rotation (row-major) that turns unit vector `n` onto +Z by the shortest way
/// (Rodrigues' formula); a half turn about X when `n` points down.
pub(crate) fn rotation_to_z(n: [f32; 3]) -> [[f32; 3]; 3] {
    let [x, y, z] = n.map(|c| c as f64);
    let m: [[f64; 3]; 3] = if z < -1.0 + 1e-9 {
        [[1.0, 0.0, 0.0], [0.0, -1.0, 0.0], [0.0, 0.0, -1.0]]
    } else {
        // axis = n x z = (y, -x, 0), sin = |axis|, cos = z; R = I + [k]x + [k]x^2 / (1 + cos)
        let k = 1.0 / (1.0 + z);
        [
            [1.0 - x * x * k, -x * y * k, -x],
            [-x * y * k, 1.0 - y * y * k, -y],
            [x, y, z],
        ]
    };
    m.map(|row| row.map(|c| c as f32))
}

pub(crate) fn rotate(r: &[[f32; 3]; 3], p: [f32; 3]) -> [f32; 3] {
    [dot(r[0], p), dot(r[1], p), dot(r[2], p)]
}

/// The row-major product `a · b`: `b` first, then `a`.
pub(crate) fn compose(a: &[[f32; 3]; 3], b: &[[f32; 3]; 3]) -> [[f32; 3]; 3] {
    let column = |j: usize| [b[0][j], b[1][j], b[2][j]];
    a.map(|row| [0, 1, 2].map(|j| dot(row, column(j))))
}

/// Convex hull, counter-clockwise, by Andrew's monotone chain (1979); collinear points
/// dropped. Sorts `points`.
pub(crate) fn convex_hull(points: &mut [[f64; 2]]) -> Vec<[f64; 2]> {
    points.sort_unstable_by(|a, b| a[0].total_cmp(&b[0]).then(a[1].total_cmp(&b[1])));
    let turn = |o: [f64; 2], a: [f64; 2], b: [f64; 2]| {
        (a[0] - o[0]) * (b[1] - o[1]) - (a[1] - o[1]) * (b[0] - o[0])
    };
    let mut hull: Vec<[f64; 2]> = Vec::with_capacity(64);
    for pass in 0..2 {
        let floor = hull.len();
        let mut chain = |p: [f64; 2]| {
            while hull.len() >= floor + 2
                && turn(hull[hull.len() - 2], hull[hull.len() - 1], p) <= 0.0
            {
                hull.pop();
            }
            hull.push(p);
        };
        if pass == 0 {
            points.iter().for_each(|&p| chain(p));
        } else {
            points.iter().rev().for_each(|&p| chain(p));
        }
        hull.pop(); // the last point of each chain starts the other
    }
    hull
}

/// Whether `p` is inside or on the counter-clockwise convex polygon `hull` (at least 3
/// corners; fewer contain nothing).
pub(crate) fn inside_convex(hull: &[[f64; 2]], p: [f64; 2]) -> bool {
    hull.len() >= 3
        && (0..hull.len()).all(|i| {
            let (a, b) = (hull[i], hull[(i + 1) % hull.len()]);
            (b[0] - a[0]) * (p[1] - a[1]) - (b[1] - a[1]) * (p[0] - a[0]) >= 0.0
        })
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn eigen_of_a_known_matrix() {
        // diag(1, 2, 4) turned by a rotation about Z by 30 degrees: the eigenvalues stay
        // 1, 2, 4 and the eigenvector of 4 stays Z (worked by hand).
        let (c, s) = (30f64.to_radians().cos(), 30f64.to_radians().sin());
        let m = [
            [c * c + 2.0 * s * s, (1.0 - 2.0) * c * s, 0.0],
            [(1.0 - 2.0) * c * s, s * s + 2.0 * c * c, 0.0],
            [0.0, 0.0, 4.0],
        ];
        let (values, vectors) = symmetric_eigen(m);
        for (got, want) in values.iter().zip([1.0, 2.0, 4.0]) {
            assert!((got - want).abs() < 1e-12, "{values:?}");
        }
        assert!((vectors[2][2].abs() - 1.0).abs() < 1e-12);
        assert!((vectors[0][0].abs() - c).abs() < 1e-12, "{vectors:?}");
    }

    #[test]
    fn hull_of_a_square_with_inner_points() {
        let mut pts = vec![
            [0.0, 0.0],
            [2.0, 0.0],
            [1.0, 1.0],
            [2.0, 2.0],
            [0.0, 2.0],
            [1.0, 0.0],
        ];
        let hull = convex_hull(&mut pts);
        assert_eq!(hull, vec![[0.0, 0.0], [2.0, 0.0], [2.0, 2.0], [0.0, 2.0]]);
        assert!(inside_convex(&hull, [1.0, 1.5]));
        assert!(inside_convex(&hull, [2.0, 1.0]));
        assert!(!inside_convex(&hull, [2.1, 1.0]));
        assert!(!inside_convex(&hull[..2], [1.0, 0.0]));
    }

    #[test]
    fn rotation_to_z_turns_normals_up() {
        for n in [
            [0.0f32, 0.0, 1.0],
            [0.0, 0.0, -1.0],
            [1.0, 0.0, 0.0],
            [0.6, -0.48, 0.64],
            [-0.36, 0.48, -0.8],
        ] {
            let r = rotation_to_z(n);
            let up = rotate(&r, n);
            assert!(norm(sub(up, [0.0, 0.0, 1.0])) < 1e-6, "{n:?} -> {up:?}");
            // Orthonormal rows.
            for i in 0..3 {
                for j in 0..3 {
                    let want = if i == j { 1.0 } else { 0.0 };
                    assert!((dot(r[i], r[j]) - want).abs() < 1e-6);
                }
            }
            assert!(dot(cross(r[0], r[1]), r[2]) > 0.0, "a reflection");
        }
    }
}
