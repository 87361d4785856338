//! Small 3D vector and rotation helpers (f64) for building parts and placing them.

pub(crate) type Vec3 = [f64; 3];

pub(crate) fn add(a: Vec3, b: Vec3) -> Vec3 {
    [a[0] + b[0], a[1] + b[1], a[2] + b[2]]
}

pub(crate) fn sub(a: Vec3, b: Vec3) -> Vec3 {
    [a[0] - b[0], a[1] - b[1], a[2] - b[2]]
}

pub(crate) fn scale(a: Vec3, s: f64) -> Vec3 {
    [a[0] * s, a[1] * s, a[2] * s]
}

pub(crate) fn dot(a: Vec3, b: Vec3) -> f64 {
    a[0] * b[0] + a[1] * b[1] + a[2] * b[2]
}

pub(crate) fn cross(a: Vec3, b: Vec3) -> Vec3 {
    [
        a[1] * b[2] - a[2] * b[1],
        a[2] * b[0] - a[0] * b[2],
        a[0] * b[1] - a[1] * b[0],
    ]
}

pub(crate) fn norm(a: Vec3) -> f64 {
    dot(a, a).sqrt()
}

/// `a / |a|`; the zero vector stays zero.
pub(crate) fn normalize(a: Vec3) -> Vec3 {
    let n = norm(a);
    if n > 0.0 {
        scale(a, 1.0 / n)
    } else {
        a
    }
}

/// Two unit vectors perpendicular to the unit vector `n` and to each other, with
/// `cross(u, v) = n`.
pub(crate) fn perpendicular_pair(n: Vec3) -> (Vec3, Vec3) {
    let helper = if n[0].abs() < 0.9 {
        [1.0, 0.0, 0.0]
    } else {
        [0.0, 1.0, 0.0]
    };
    let u = normalize(cross(helper, n));
    (u, cross(n, u))
}

/// A rotation matrix; `apply` computes `R v`.
#[derive(Clone, Copy, Debug, PartialEq)]
pub(crate) struct Rot3 {
    pub rows: [Vec3; 3],
}

impl Rot3 {
    pub fn apply(&self, v: Vec3) -> Vec3 {
        [
            dot(self.rows[0], v),
            dot(self.rows[1], v),
            dot(self.rows[2], v),
        ]
    }

    /// Rotation about +Z by `angle` radians (counter-clockwise seen from +Z).
    pub fn about_z(angle: f64) -> Rot3 {
        let (s, c) = angle.sin_cos();
        Rot3 {
            rows: [[c, -s, 0.0], [s, c, 0.0], [0.0, 0.0, 1.0]],
        }
    }

    /// A rotation taking the unit vector `from` to the unit vector `to`.
    pub fn taking(from: Vec3, to: Vec3) -> Rot3 {
        // Map `from` to `to` through orthonormal frames built around each: R = F_to F_from^T.
        let (fu, fv) = perpendicular_pair(from);
        let (tu, tv) = perpendicular_pair(to);
        let mut rows = [[0.0; 3]; 3];
        for (r, row) in rows.iter_mut().enumerate() {
            for (c, value) in row.iter_mut().enumerate() {
                *value = tu[r] * fu[c] + tv[r] * fv[c] + to[r] * from[c];
            }
        }
        Rot3 { rows }
    }

    /// `self` after `first`: the rotation `self * first`.
    pub fn after(&self, first: &Rot3) -> Rot3 {
        let mut rows = [[0.0; 3]; 3];
        for (r, row) in rows.iter_mut().enumerate() {
            for (c, value) in row.iter_mut().enumerate() {
                *value = (0..3).map(|k| self.rows[r][k] * first.rows[k][c]).sum();
            }
        }
        Rot3 { rows }
    }
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn taking_maps_from_to_to_and_stays_orthonormal() {
        let from = normalize([0.3, -0.5, 0.8]);
        let to = [0.0, 0.0, -1.0];
        let r = Rot3::taking(from, to);
        let image = r.apply(from);
        assert!(norm(sub(image, to)) < 1e-12);
        for i in 0..3 {
            for j in 0..3 {
                let expected = if i == j { 1.0 } else { 0.0 };
                assert!((dot(r.rows[i], r.rows[j]) - expected).abs() < 1e-12);
            }
        }
        // A proper rotation: determinant +1.
        assert!((dot(r.rows[0], cross(r.rows[1], r.rows[2])) - 1.0).abs() < 1e-12);
        let q = Rot3::about_z(0.7).after(&r);
        assert!((q.apply(from)[2] + 1.0).abs() < 1e-12);
    }
}
