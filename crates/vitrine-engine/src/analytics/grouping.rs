//! Groups of items joined by strong similarity edges (connected components via union-find).
//!
//! Typical use: near-duplicate groups. Each item's nearest neighbours become edges; every edge
//! whose cosine similarity reaches `near_duplicate_threshold` merges its two ends, so a group is
//! a connected component of the thresholded neighbour graph (single linkage: two members of a
//! group may be less similar than the threshold if a chain of strong edges joins them).

use std::collections::HashMap;
use std::hash::Hash;

use petgraph::unionfind::UnionFind;

use super::AnalyticsError;

/// An undirected edge between two items with their cosine similarity.
#[derive(Debug, Clone, Copy, PartialEq)]
pub struct SimilarityEdge<Id> {
    pub first: Id,
    pub second: Id,
    pub similarity: f32,
}

/// Joins items by every edge with `similarity >= near_duplicate_threshold` and returns the
/// groups with at least two members.
///
/// Items that appear only on weaker edges (or only on self-edges) form no group. Edges whose
/// similarity is NaN never join anything. Output order is deterministic: members ascending
/// within a group; groups by descending size, then by their smallest member.
pub fn group_by_similarity<Id, Edges>(
    edges: Edges,
    near_duplicate_threshold: f32,
) -> Result<Vec<Vec<Id>>, AnalyticsError>
where
    Id: Copy + Eq + Hash + Ord,
    Edges: IntoIterator<Item = SimilarityEdge<Id>>,
{
    if near_duplicate_threshold.is_nan() {
        return Err(AnalyticsError::InvalidParameter {
            name: "near_duplicate_threshold",
            value: near_duplicate_threshold.to_string(),
            reason: "must be a number",
        });
    }
    let mut dense_index_of: HashMap<Id, usize> = HashMap::new();
    let mut ids: Vec<Id> = Vec::new();
    let mut components: UnionFind<usize> = UnionFind::new_empty();
    let mut dense_index = |id: Id, components: &mut UnionFind<usize>| {
        *dense_index_of.entry(id).or_insert_with(|| {
            ids.push(id);
            components.new_set()
        })
    };
    for edge in edges {
        if edge.first == edge.second
            || edge.similarity.is_nan()
            || edge.similarity < near_duplicate_threshold
        {
            continue;
        }
        let first = dense_index(edge.first, &mut components);
        let second = dense_index(edge.second, &mut components);
        components.union(first, second);
    }

    let mut members_by_root: HashMap<usize, Vec<Id>> = HashMap::new();
    for (index, root) in components.into_labeling().into_iter().enumerate() {
        members_by_root.entry(root).or_default().push(ids[index]);
    }
    let mut groups: Vec<Vec<Id>> = members_by_root.into_values().collect();
    for group in &mut groups {
        group.sort_unstable();
    }
    groups.sort_unstable_by(|left, right| {
        right
            .len()
            .cmp(&left.len())
            .then_with(|| left[0].cmp(&right[0]))
    });
    Ok(groups)
}
