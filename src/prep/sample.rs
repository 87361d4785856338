//! Step 5b: farthest point sampling. Each next point is the one farthest from all points
//! picked so far, which spreads the picks evenly over the part.

/// Indices of `n` points (mm) picked by farthest point sampling from `start`, in pick
/// order; `min(n, len)` indices when there are fewer points. Like Open3D's
/// `farthest_point_down_sample` (checked against it in `tests/prep_reference.rs`): distances
/// start at infinity and a tie goes to the lower index. Unlike it, no index is picked twice
/// while unpicked points remain (exact duplicates come last). Squared distances in f32.
/// An empty input or `n == 0` gives an empty vector; `start` past the end is taken as 0.
pub fn farthest_point_sample(points: &[[f32; 3]], n: usize, start: usize) -> Vec<u32> {
    let n = n.min(points.len());
    let mut picked = Vec::with_capacity(n);
    if n == 0 {
        return picked;
    }
    let mut nearest_pick = vec![f32::INFINITY; points.len()];
    let mut next = if start < points.len() { start } else { 0 };
    for _ in 0..n {
        picked.push(next as u32);
        // Below every distance, so an exact duplicate of a pick (distance 0) still comes
        // before picking anything twice.
        nearest_pick[next] = -1.0;
        let c = points[next];
        // Two passes, so the first (branch-free) vectorises.
        for (p, d) in points.iter().zip(nearest_pick.iter_mut()) {
            let e = [p[0] - c[0], p[1] - c[1], p[2] - c[2]];
            *d = d.min(e[0] * e[0] + e[1] * e[1] + e[2] * e[2]);
        }
        let mut best = (f32::NEG_INFINITY, 0usize);
        for (j, &d) in nearest_pick.iter().enumerate() {
            if d > best.0 {
                best = (d, j);
            }
        }
        next = best.1;
    }
    picked
}

/// `picked` repeated in order until it holds `n` indices (a scan with fewer points than the
/// recipe asks for). Returns how many were added. Does nothing for empty `picked`.
pub(crate) fn pad_by_repetition(picked: &mut Vec<u32>, n: usize) -> usize {
    let have = picked.len();
    if have == 0 || have >= n {
        return 0;
    }
    for i in have..n {
        picked.push(picked[i % have]);
    }
    n - have
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn picks_extremes_first_worked_by_hand() {
        // On a line at 0, 1, 2, 3, 10 from index 0: 10 is farthest (index 4), then 3 or 2?
        // distances to {0, 10}: 1 -> 1, 2 -> 2, 3 -> 3: index 3; then to {0, 10, 3}: 1 -> 1,
        // 2 -> 1: tie, lower index 1.
        let points: Vec<[f32; 3]> = [0.0, 1.0, 2.0, 3.0, 10.0]
            .iter()
            .map(|&x| [x, 0.0, 0.0])
            .collect();
        assert_eq!(farthest_point_sample(&points, 4, 0), vec![0, 4, 3, 1]);
        assert_eq!(farthest_point_sample(&points, 2, 4), vec![4, 0]);
        assert_eq!(farthest_point_sample(&points, 9, 0).len(), 5);
        assert_eq!(farthest_point_sample(&points, 2, 99), vec![0, 4]);
        assert!(farthest_point_sample(&[], 3, 0).is_empty());
        assert!(farthest_point_sample(&points, 0, 0).is_empty());
    }

    #[test]
    fn duplicates_are_picked_last() {
        let points = [[0.0f32; 3], [0.0; 3], [1.0, 0.0, 0.0]];
        assert_eq!(farthest_point_sample(&points, 3, 0), vec![0, 2, 1]);
    }

    #[test]
    fn padding_repeats_in_order() {
        let mut picked = vec![5, 7, 9];
        assert_eq!(pad_by_repetition(&mut picked, 8), 5);
        assert_eq!(picked, vec![5, 7, 9, 5, 7, 9, 5, 7]);
        let mut full = vec![1, 2];
        assert_eq!(pad_by_repetition(&mut full, 2), 0);
        let mut none: Vec<u32> = Vec::new();
        assert_eq!(pad_by_repetition(&mut none, 4), 0);
    }
}
