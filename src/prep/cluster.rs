//! Step 4: keep the part. Euclidean clustering (Rusu, "Semantic 3D Object Maps for Everyday
//! Manipulation in Human Living Environments", 2009, section 6.2; PCL's
//! EuclideanClusterExtraction): points closer than a radius are in the same cluster, and so
//! is everything reachable by such steps.

use crate::graph::spatial::SpatialIndex;

/// Label of a point outside every cluster (masked out by the caller).
pub(crate) const UNLABELLED: u32 = u32::MAX;

#[derive(Clone, Debug, PartialEq)]
pub(crate) struct Clusters {
    /// One per point: its cluster, numbered in order of each cluster's lowest point index;
    /// [`UNLABELLED`] for points left out.
    pub labels: Vec<u32>,
    /// Points in each cluster, by label.
    pub sizes: Vec<usize>,
}

impl Clusters {
    /// Labels of the largest and second-largest clusters (ties: lower label).
    pub fn two_largest(&self) -> (Option<u32>, Option<u32>) {
        let mut order: Vec<u32> = (0..self.sizes.len() as u32).collect();
        order.sort_by(|&a, &b| {
            self.sizes[b as usize]
                .cmp(&self.sizes[a as usize])
                .then(a.cmp(&b))
        });
        (order.first().copied(), order.get(1).copied())
    }
}

/// Clusters the points with `active[i]` (mm; `index` built over all of `points`), joining
/// points within `radius_mm` (inclusive). Inactive points are neither labelled nor used as
/// steps. A breadth-first flood from each unlabelled point, one radius query per point.
pub(crate) fn euclidean_clusters(
    index: &SpatialIndex,
    points: &[[f32; 3]],
    active: &[bool],
    radius_mm: f32,
) -> Clusters {
    let mut labels = vec![UNLABELLED; points.len()];
    let mut sizes = Vec::new();
    let mut frontier: Vec<u32> = Vec::new();
    for seed in 0..points.len() {
        if !active[seed] || labels[seed] != UNLABELLED {
            continue;
        }
        let label = sizes.len() as u32;
        labels[seed] = label;
        frontier.clear();
        frontier.push(seed as u32);
        let mut size = 0usize;
        while let Some(i) = frontier.pop() {
            size += 1;
            index.for_each_within(points[i as usize], radius_mm, |j, _| {
                let j_us = j as usize;
                if active[j_us] && labels[j_us] == UNLABELLED {
                    labels[j_us] = label;
                    frontier.push(j);
                }
            });
        }
        sizes.push(size);
    }
    Clusters { labels, sizes }
}

/// Pieces of one part that a depth step separates (a screw head standing over its shank)
/// are joined back to the largest cluster: a cluster of at least `min_size` points that comes
/// within `merge_mm` of the largest is relabelled as the largest, repeatedly, until no more
/// does. Returns how many clusters were joined.
pub(crate) fn join_pieces(
    points: &[[f32; 3]],
    clusters: &mut Clusters,
    largest: u32,
    merge_mm: f32,
    min_size: usize,
) -> usize {
    let mut joined = 0;
    loop {
        let members: Vec<[f32; 3]> = points
            .iter()
            .zip(&clusters.labels)
            .filter(|&(_, &l)| l == largest)
            .map(|(&p, _)| p)
            .collect();
        let index = SpatialIndex::new(&members);
        let mut near = vec![false; clusters.sizes.len()];
        for (p, &l) in points.iter().zip(&clusters.labels) {
            let l_us = l as usize;
            if l == largest || l == UNLABELLED || near[l_us] || clusters.sizes[l_us] < min_size {
                continue;
            }
            if index
                .knn(*p, 1)
                .first()
                .is_some_and(|n| n.dist_sq <= merge_mm * merge_mm)
            {
                near[l_us] = true;
            }
        }
        let newly = near.iter().filter(|&&x| x).count();
        if newly == 0 {
            return joined;
        }
        joined += newly;
        for l in &mut clusters.labels {
            if *l != UNLABELLED && near[*l as usize] {
                *l = largest;
            }
        }
        for (l, _) in near.iter().enumerate().filter(|(_, &x)| x) {
            clusters.sizes[largest as usize] += clusters.sizes[l];
            clusters.sizes[l] = 0;
        }
    }
}

#[cfg(test)]
mod tests {
    use super::*;

    fn blob(centre: [f32; 3], n: usize, step: f32) -> Vec<[f32; 3]> {
        (0..n)
            .map(|i| {
                [
                    centre[0] + step * (i % 10) as f32,
                    centre[1] + step * (i / 10) as f32,
                    centre[2],
                ]
            })
            .collect()
    }

    #[test]
    fn separate_blobs_are_separate_clusters() {
        // Three 10-wide grids of 1 mm step, far apart, and one point 1.5 mm off the first
        // grid that joins it only when active and within the radius.
        let mut points = blob([0.0; 3], 100, 1.0);
        points.extend(blob([30.0, 0.0, 0.0], 40, 1.0));
        points.extend(blob([0.0, 40.0, 0.0], 60, 1.0));
        points.push([0.0, 10.5, 0.0]); // 1.5 mm from the first grid's last row
        let index = SpatialIndex::new(&points);
        let mut active = vec![true; points.len()];
        active[200] = false;
        let c = euclidean_clusters(&index, &points, &active, 1.2);
        assert_eq!(c.sizes, vec![100, 40, 60]);
        assert_eq!(c.two_largest(), (Some(0), Some(2)));
        assert_eq!(c.labels[150], 2);
        assert_eq!(c.labels[200], UNLABELLED);

        // Active and with a larger radius it joins the first grid.
        active[200] = true;
        let c = euclidean_clusters(&index, &points, &active, 1.6);
        assert_eq!(c.sizes, vec![101, 40, 60]);
        assert_eq!(c.labels[200], 0);
    }

    #[test]
    fn pieces_near_the_largest_are_joined_and_far_or_tiny_ones_are_not() {
        // Largest grid at the origin; a 30-point grid 3 mm off it; a 40-point grid 5 mm off
        // that one (so 3 + 9 + 5 from the first: joined only in a second round); a 2-point
        // crumb 2 mm off; a 50-point grid far away.
        let mut points = blob([0.0; 3], 100, 1.0); // x 0..9, y 0..9
        points.extend(blob([12.0, 0.0, 0.0], 30, 1.0)); // x 12..21
        points.extend(blob([26.0, 0.0, 0.0], 40, 1.0));
        points.extend([[0.0, 11.0, 0.0], [1.0, 11.0, 0.0]]);
        points.extend(blob([100.0, 0.0, 0.0], 50, 1.0));
        let index = SpatialIndex::new(&points);
        let mut c = euclidean_clusters(&index, &points, &vec![true; points.len()], 1.2);
        assert_eq!(c.sizes, vec![100, 30, 40, 2, 50]);
        assert_eq!(join_pieces(&points, &mut c, 0, 5.5, 10), 2);
        assert_eq!(c.sizes, vec![170, 0, 0, 2, 50]);
        assert_eq!(c.labels[140], 0);
        assert_eq!(c.labels[170], 3);
        assert_eq!(c.two_largest(), (Some(0), Some(4)));
    }

    #[test]
    fn duplicates_and_empty_input() {
        let points = vec![[3.0f32; 3]; 10];
        let index = SpatialIndex::new(&points);
        let c = euclidean_clusters(&index, &points, &[true; 10], 0.0);
        assert_eq!(c.sizes, vec![10]);
        let index = SpatialIndex::new(&[]);
        let c = euclidean_clusters(&index, &[], &[], 1.0);
        assert!(c.sizes.is_empty());
        assert_eq!(c.two_largest(), (None, None));
    }
}
