//! k nearest neighbours and radius queries in 3D space, on a kiddo k-d tree.
//!
//! Offers [`SpatialIndex`] (built once from a slice of points, then queried many times),
//! [`Neighbour`] and [`knn_graph`] (the k nearest of every point, as one flat `Vec<u32>`).
//! All distances handed back are **squared** Euclidean distances (mm² for points in mm).
//! Ties in distance are broken by the lower point index, so every answer is deterministic.

use std::num::NonZeroUsize;

use kiddo::{ImmutableKdTree, SquaredEuclidean};
use rayon::prelude::*;

type Tree = ImmutableKdTree<f32, 3>;

/// One neighbour of a query: the index of the point in the slice the index was built from,
/// and its **squared** distance to the query.
#[derive(Clone, Copy, Debug, PartialEq)]
pub struct Neighbour {
    pub index: u32,
    pub dist_sq: f32,
}

/// A k-d tree over a fixed set of points, answering k-nearest and radius queries.
///
/// Points should be finite (the clean-up recipe drops non-finite points first); a point with
/// a NaN or infinite coordinate is stored but its distances are meaningless.
///
/// ```
/// use partsift::graph::spatial::SpatialIndex;
/// let index = SpatialIndex::new(&[[0.0, 0.0, 0.0], [3.0, 4.0, 0.0]]);
/// let near = index.knn([0.0, 0.0, 1.0], 2);
/// assert_eq!((near[0].index, near[0].dist_sq), (0, 1.0));
/// assert_eq!((near[1].index, near[1].dist_sq), (1, 26.0)); // squared: 3² + 4² + 1²
/// ```
pub struct SpatialIndex {
    /// `None` for an empty point set (kiddo needs at least one point to be useful).
    tree: Option<Tree>,
    len: usize,
}

impl SpatialIndex {
    /// Builds the tree over `points` (mm). An empty slice gives an index that finds nothing.
    ///
    /// Panics if there are more than `u32::MAX` points (indices are `u32`).
    pub fn new(points: &[[f32; 3]]) -> Self {
        assert!(
            u32::try_from(points.len()).is_ok(),
            "SpatialIndex holds at most u32::MAX points, got {}",
            points.len()
        );
        let tree = if points.is_empty() {
            None
        } else {
            // Cannot fail: the only construction error of an immutable tree is an index
            // overflow, ruled out by the assertion above.
            Tree::new_from_slice(points).ok()
        };
        SpatialIndex {
            tree,
            len: points.len(),
        }
    }

    /// Number of points in the index.
    pub fn len(&self) -> usize {
        self.len
    }

    pub fn is_empty(&self) -> bool {
        self.len == 0
    }

    /// The `min(k, len)` points nearest to `query` (mm), nearest first, ties by lower index.
    ///
    /// When `query` is itself a point of the index, that point comes back first with
    /// `dist_sq == 0` — unless it has exact duplicates, in which case the duplicate with the
    /// lowest index comes first. `k == 0` or an empty index gives an empty vector.
    pub fn knn(&self, query: [f32; 3], k: usize) -> Vec<Neighbour> {
        let Some(tree) = &self.tree else {
            return Vec::new();
        };
        let k = k.min(self.len);
        // One more than asked, to see whether the k-th distance is tied with the next: kiddo
        // then picks any of the tied points, and we want the lowest indices.
        let Some(ask) = NonZeroUsize::new((k + 1).min(self.len)) else {
            return Vec::new();
        };
        let mut found: Vec<Neighbour> = tree
            .query(&query)
            .nearest_n::<SquaredEuclidean<f32>>(ask)
            .execute()
            .into_iter()
            .map(|n| Neighbour {
                index: n.item,
                dist_sq: n.distance,
            })
            .collect();
        sort_neighbours(&mut found);
        if found.len() > k && k > 0 && found[k].dist_sq == found[k - 1].dist_sq {
            let tied = found[k - 1].dist_sq;
            found.clear();
            tree.query(&query)
                .within::<SquaredEuclidean<f32>>(tied)
                .unsorted()
                .visit(|n| {
                    found.push(Neighbour {
                        index: n.item,
                        dist_sq: n.distance,
                    })
                });
            sort_neighbours(&mut found);
        }
        found.truncate(k);
        found
    }

    /// Every point within `radius` (mm, inclusive) of `query`, nearest first, ties by lower
    /// index. A negative or NaN radius finds nothing.
    pub fn within_radius(&self, query: [f32; 3], radius: f32) -> Vec<Neighbour> {
        let mut found = Vec::new();
        self.for_each_within(query, radius, |index, dist_sq| {
            found.push(Neighbour { index, dist_sq })
        });
        sort_neighbours(&mut found);
        found
    }

    /// Calls `visit(index, dist_sq)` for every point within `radius` (mm, inclusive) of
    /// `query`, in no particular order, without allocating.
    pub(crate) fn for_each_within(
        &self,
        query: [f32; 3],
        radius: f32,
        mut visit: impl FnMut(u32, f32),
    ) {
        let Some(tree) = &self.tree else { return };
        // Rejects NaN too.
        if radius.is_nan() || radius < 0.0 {
            return;
        }
        tree.query(&query)
            .within::<SquaredEuclidean<f32>>(radius * radius)
            .unsorted()
            .visit(|n| visit(n.item, n.distance));
    }
}

fn sort_neighbours(found: &mut [Neighbour]) {
    found.sort_unstable_by(|a, b| a.dist_sq.total_cmp(&b.dist_sq).then(a.index.cmp(&b.index)));
}

/// The k-nearest-neighbour graph of `points` (mm): `points.len() * k` indices, row `i`
/// (entries `i*k .. i*k + k`) holding the k nearest points of point `i`.
///
/// Row `i` always starts with `i` itself (the point is its own nearest neighbour, also when
/// it has exact duplicates), followed by the `k - 1` nearest other points, nearest first, ties
/// by lower index. When `k > points.len()` there are not enough points to fill a row: the
/// rest of the row repeats `i` (a self edge, which adds nothing to a max over edges).
/// Empty input or `k == 0` gives an empty vector. Runs in parallel over points (rayon).
///
/// Panics if there are more than `u32::MAX` points.
pub fn knn_graph(points: &[[f32; 3]], k: usize) -> Vec<u32> {
    let mut graph = vec![0u32; points.len() * k];
    if k == 0 {
        return graph;
    }
    let index = SpatialIndex::new(points);
    graph
        .par_chunks_mut(k)
        .zip(points.par_iter())
        .enumerate()
        .for_each(|(i, (row, &p))| {
            let me = i as u32;
            row.fill(me);
            let others = index.knn(p, k).into_iter().filter(|n| n.index != me);
            for (slot, n) in row[1..].iter_mut().zip(others) {
                *slot = n.index;
            }
        });
    graph
}

#[cfg(test)]
mod tests {
    use super::*;
    use crate::rng::Rng;

    fn random_points(rng: &mut Rng, n: usize, scale: f64) -> Vec<[f32; 3]> {
        (0..n)
            .map(|_| {
                [
                    rng.range(-scale, scale) as f32,
                    rng.range(-scale, scale) as f32,
                    rng.range(-scale, scale) as f32,
                ]
            })
            .collect()
    }

    fn dist_sq(a: [f32; 3], b: [f32; 3]) -> f32 {
        (a[0] - b[0]).powi(2) + (a[1] - b[1]).powi(2) + (a[2] - b[2]).powi(2)
    }

    /// Brute force: every point, sorted by (distance, index). The reference for all queries
    /// below (kiddo's own tests check it the same way).
    fn brute_sorted(points: &[[f32; 3]], q: [f32; 3]) -> Vec<Neighbour> {
        let mut all: Vec<Neighbour> = points
            .iter()
            .enumerate()
            .map(|(i, &p)| Neighbour {
                index: i as u32,
                dist_sq: dist_sq(p, q),
            })
            .collect();
        sort_neighbours(&mut all);
        all
    }

    /// kiddo may sum the three squared differences in another order than we do, so the
    /// distances may differ in the last bit; indices then match except where two distances
    /// are that close, which random f32 points essentially never produce.
    fn assert_same(got: &[Neighbour], want: &[Neighbour]) {
        assert_eq!(got.len(), want.len());
        for (g, w) in got.iter().zip(want) {
            assert!(
                (g.dist_sq - w.dist_sq).abs() <= 1e-5 * w.dist_sq.max(1e-6),
                "{g:?} vs {w:?}"
            );
        }
        let gi: Vec<u32> = got.iter().map(|n| n.index).collect();
        let wi: Vec<u32> = want.iter().map(|n| n.index).collect();
        assert_eq!(gi, wi);
    }

    #[test]
    fn knn_and_radius_match_brute_force_on_random_points() {
        let mut rng = Rng::new(11);
        let points = random_points(&mut rng, 3000, 50.0);
        let index = SpatialIndex::new(&points);
        assert_eq!(index.len(), 3000);
        for t in 0..200 {
            // Half the queries are cloud points, half are anywhere.
            let q = if t % 2 == 0 {
                points[rng.below(points.len())]
            } else {
                random_points(&mut rng, 1, 60.0)[0]
            };
            let brute = brute_sorted(&points, q);
            for k in [1, 2, 7, 32] {
                assert_same(&index.knn(q, k), &brute[..k]);
            }
            let radius = rng.range(0.0, 20.0) as f32;
            let inside: Vec<Neighbour> = brute
                .iter()
                .copied()
                .filter(|n| n.dist_sq <= radius * radius)
                .collect();
            assert_same(&index.within_radius(q, radius), &inside);
        }
    }

    #[test]
    fn knn_graph_rows_start_with_the_point_and_match_brute_force() {
        let mut rng = Rng::new(12);
        let points = random_points(&mut rng, 500, 10.0);
        let k = 9;
        let graph = knn_graph(&points, k);
        assert_eq!(graph.len(), 500 * k);
        for (i, row) in graph.chunks(k).enumerate() {
            assert_eq!(row[0] as usize, i);
            let want: Vec<u32> = brute_sorted(&points, points[i])
                .into_iter()
                .map(|n| n.index)
                .filter(|&j| j as usize != i)
                .take(k - 1)
                .collect();
            assert_eq!(&row[1..], &want[..]);
        }
    }

    #[test]
    fn duplicates_and_all_equal_points() {
        // Every point three times: each point's row holds itself, then its two twins.
        let mut rng = Rng::new(13);
        let base = random_points(&mut rng, 50, 5.0);
        let points: Vec<[f32; 3]> = base.iter().flat_map(|&p| [p, p, p]).collect();
        let graph = knn_graph(&points, 3);
        for (i, row) in graph.chunks(3).enumerate() {
            let first = (i / 3 * 3) as u32;
            let mut twins: Vec<u32> = (first..first + 3).filter(|&j| j as usize != i).collect();
            twins.insert(0, i as u32);
            assert_eq!(row, &twins[..], "row {i}");
        }
        let index = SpatialIndex::new(&points);
        let near = index.knn(points[4], 3);
        assert_eq!(
            near.iter().map(|n| n.index).collect::<Vec<_>>(),
            vec![3, 4, 5]
        );
        assert!(near.iter().all(|n| n.dist_sq == 0.0));

        // All points equal: every row is the point itself, then the lowest other indices.
        let same = vec![[1.5f32, -2.0, 7.0]; 40];
        let graph = knn_graph(&same, 4);
        assert_eq!(&graph[..4], &[0, 1, 2, 3]);
        assert_eq!(&graph[39 * 4..], &[39, 0, 1, 2]);
        let index = SpatialIndex::new(&same);
        assert_eq!(index.within_radius([1.5, -2.0, 7.0], 0.0).len(), 40);
        assert_eq!(index.knn([0.0; 3], 100).len(), 40);
    }

    #[test]
    fn k_at_least_n_pads_rows_with_the_point_itself() {
        let points = [[0.0f32, 0.0, 0.0], [1.0, 0.0, 0.0], [3.0, 0.0, 0.0]];
        let graph = knn_graph(&points, 5);
        assert_eq!(graph, vec![0, 1, 2, 0, 0, 1, 0, 2, 1, 1, 2, 1, 0, 2, 2]);
        let index = SpatialIndex::new(&points);
        assert_eq!(index.knn([2.9, 0.0, 0.0], 10).len(), 3);
        assert_eq!(knn_graph(&points[..1], 3), vec![0, 0, 0]);
    }

    #[test]
    fn empty_input_zero_k_and_bad_radius_find_nothing() {
        let index = SpatialIndex::new(&[]);
        assert!(index.is_empty());
        assert!(index.knn([0.0; 3], 3).is_empty());
        assert!(index.within_radius([0.0; 3], 1.0).is_empty());
        assert!(knn_graph(&[], 4).is_empty());
        let points = [[0.0f32; 3], [1.0, 1.0, 1.0]];
        assert!(knn_graph(&points, 0).is_empty());
        let index = SpatialIndex::new(&points);
        assert!(index.knn([0.0; 3], 0).is_empty());
        assert!(index.within_radius([0.0; 3], -1.0).is_empty());
        assert!(index.within_radius([0.0; 3], f32::NAN).is_empty());
    }

    #[test]
    fn non_finite_points_do_not_panic() {
        let points = [
            [0.0f32, 0.0, 0.0],
            [f32::NAN, 0.0, 0.0],
            [f32::INFINITY, 1.0, 1.0],
            [1.0, 0.0, 0.0],
        ];
        let index = SpatialIndex::new(&points);
        let near = index.knn([0.1, 0.0, 0.0], 1);
        assert_eq!(near[0].index, 0);
        let _ = knn_graph(&points, 3);
        let _ = index.within_radius([0.0; 3], 2.0);
    }
}
