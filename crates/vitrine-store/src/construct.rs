//! Building the HNSW graph (Malkov & Yashunin, 2018). Insertion is their Algorithm 1;
//! neighbours are chosen with their heuristic (Algorithm 4, without extending or
//! keeping pruned candidates), both for a new node and when an older node's full list
//! must make room for it, as hnswlib does. A new node gets up to M links per layer; an
//! older node keeps up to M on the upper layers and 2M on layer 0.
//!
//! Nodes are inserted in parallel on rayon's pool. Each node's lists sit behind their
//! own lock, held only while one list is read, appended to or replaced, so a thread
//! never holds two locks.
//!
//! Why not hnsw_rs' insertion, which built the graph before: on 100,000 × 384 vectors
//! it took 2.8 to 3.9 times as long as hnswlib on one thread, spent in its
//! per-candidate `Arc` allocations, hashed visited sets and per-list locks of `Arc`s.
//! The dumps keep hnsw_rs' file layout (`dump.rs`), so stores saved by hnsw_rs still
//! open, and the tests load our dumps with hnsw_rs itself.

use std::ops::Range;
use std::sync::{Mutex, MutexGuard, PoisonError};

use rayon::prelude::*;

use crate::compact::{self, Adjacency, Links, Scored, Vectors};
use crate::distance::{self, WithDot};
use crate::graph::MAX_LAYERS;
use crate::types::HnswParams;

/// Below this many nodes in the graph, inserting on one thread gives the first nodes
/// a real graph to link into (and beats rayon's overhead).
const PARALLEL_INSERT_MIN: usize = 256;

/// The layers of a graph that can still grow; node numbers are dense, as in [`Links`].
pub(crate) struct Layers {
    /// M: links a new node gets per layer, and an old node keeps above layer 0.
    links_per_layer: usize,
    /// 2M: links an old node keeps on layer 0.
    base_links: usize,
    ef_construction: usize,
    levels: Vec<u8>,
    /// Node `n`'s lists, one per layer from 0 to its level.
    lists: Vec<Mutex<Vec<Vec<u32>>>>,
    entry: Mutex<Option<u32>>,
}

fn lock<T>(mutex: &Mutex<T>) -> MutexGuard<'_, T> {
    mutex.lock().unwrap_or_else(PoisonError::into_inner)
}

impl Layers {
    pub fn new(params: &HnswParams) -> Layers {
        let links_per_layer = params.max_nb_connection.max(2);
        Layers {
            links_per_layer,
            base_links: 2 * links_per_layer,
            ef_construction: params.ef_construction.max(1),
            levels: Vec::new(),
            lists: Vec::new(),
            entry: Mutex::new(None),
        }
    }

    /// Layers holding the same lists as `links`, ready for more nodes.
    pub fn from_links(params: &HnswParams, links: &Links) -> Layers {
        let mut layers = Layers::new(params);
        for node in 0..links.len() as u32 {
            let level = links.level(node);
            layers.levels.push(level as u8);
            let lists = (0..=level)
                .map(|layer| links.neighbours(node, layer).to_vec())
                .collect();
            layers.lists.push(Mutex::new(lists));
        }
        *layers
            .entry
            .get_mut()
            .unwrap_or_else(PoisonError::into_inner) = links.entry();
        layers
    }

    pub fn len(&self) -> usize {
        self.levels.len()
    }

    pub fn entry(&self) -> Option<u32> {
        *lock(&self.entry)
    }

    /// A copy of node `node`'s lists, layer 0 first.
    pub fn lists(&self, node: u32) -> Vec<Vec<u32>> {
        lock(&self.lists[node as usize]).clone()
    }

    /// Adds node number `len()` without links; `key` (the node's image id) draws its
    /// level, so a node's level never depends on insertion order or threads.
    pub fn add_node(&mut self, key: u64) {
        let level = level_for(key, self.links_per_layer);
        self.levels.push(level as u8);
        let mut lists = vec![Vec::new(); level + 1];
        lists[0].reserve_exact(self.base_links);
        self.lists.push(Mutex::new(lists));
    }

    /// Links the nodes `nodes` into the graph. `vectors` holds every node's vector.
    pub fn link(&self, vectors: &Vectors, nodes: Range<u32>) {
        let insert = |node: u32| {
            distance::with_best_dot(Insertion {
                layers: self,
                vectors,
                node,
            })
        };
        let serial_end = nodes.end.min(nodes.start.max(PARALLEL_INSERT_MIN as u32));
        (nodes.start..serial_end).for_each(insert);
        (serial_end..nodes.end).into_par_iter().for_each(insert);
    }

    /// Adds `new` to `owner`'s list on `layer`. A full list is chosen anew from its
    /// nodes and `new` by the heuristic.
    fn link_back(
        &self,
        vectors: &Vectors,
        owner: u32,
        new: u32,
        layer: usize,
        dot: impl Fn(&[f32], &[f32]) -> f32 + Copy,
    ) {
        let capacity = if layer == 0 {
            self.base_links
        } else {
            self.links_per_layer
        };
        let mut lists = lock(&self.lists[owner as usize]);
        let Some(list) = lists.get_mut(layer) else {
            return;
        };
        if list.contains(&new) {
            return;
        }
        if list.len() < capacity {
            list.push(new);
            return;
        }
        let base = vectors.padded(owner as usize);
        let mut candidates: Vec<Scored> = list
            .iter()
            .chain([&new])
            .map(|&node| compact::scored(dot, vectors, base, node))
            .collect();
        candidates.sort_unstable();
        *list = select(vectors, &candidates, capacity, dot);
    }
}

impl Adjacency for Layers {
    fn node_count(&self) -> usize {
        self.len()
    }

    fn level(&self, node: u32) -> usize {
        usize::from(self.levels[node as usize])
    }

    #[inline(always)]
    fn for_each_neighbour(&self, node: u32, layer: usize, mut visit: impl FnMut(u32)) {
        if let Some(list) = lock(&self.lists[node as usize]).get(layer) {
            for &neighbour in list {
                visit(neighbour);
            }
        }
    }
}

/// A level drawn from the distribution the paper prescribes, P(level >= l) = M^-l,
/// with a hash of `key` (splitmix64) as the uniform draw; capped at the top layer
/// hnsw_rs' dump layout has.
fn level_for(key: u64, links_per_layer: usize) -> usize {
    let mut z = key.wrapping_add(0x9e37_79b9_7f4a_7c15);
    z = (z ^ (z >> 30)).wrapping_mul(0xbf58_476d_1ce4_e5b9);
    z = (z ^ (z >> 27)).wrapping_mul(0x94d0_49bb_1331_11eb);
    z ^= z >> 31;
    // In (0, 1]: 53 random bits, shifted away from zero.
    let uniform = ((z >> 11) + 1) as f64 / (1u64 << 53) as f64;
    let level = (-uniform.ln() / (links_per_layer as f64).ln()).floor();
    (level as usize).min(MAX_LAYERS - 1)
}

/// The heuristic of Algorithm 4: from `candidates`, nearest first, keeps a node unless
/// a node already kept is nearer to it than the base is, until `max` are kept.
fn select(
    vectors: &Vectors,
    candidates: &[Scored],
    max: usize,
    dot: impl Fn(&[f32], &[f32]) -> f32 + Copy,
) -> Vec<u32> {
    let mut kept: Vec<u32> = Vec::with_capacity(max);
    for candidate in candidates {
        if kept.len() == max {
            break;
        }
        let vector = vectors.padded(candidate.node as usize);
        let diverse = kept.iter().all(|&other| {
            compact::scored(dot, vectors, vector, other).distance >= candidate.distance
        });
        if diverse {
            kept.push(candidate.node);
        }
    }
    kept
}

/// Algorithm 1 for one node, already numbered and with its vector in place.
struct Insertion<'a> {
    layers: &'a Layers,
    vectors: &'a Vectors,
    node: u32,
}

impl WithDot for Insertion<'_> {
    type Output = ();

    #[inline(always)]
    fn run(self, dot: impl Fn(&[f32], &[f32]) -> f32 + Copy) {
        let Insertion {
            layers,
            vectors,
            node,
        } = self;
        let level = layers.level(node);
        let entry = {
            let mut entry = lock(&layers.entry);
            match *entry {
                Some(entry) => entry,
                None => {
                    *entry = Some(node);
                    return;
                }
            }
        };
        let query = vectors.padded(node as usize);
        let top = layers.level(entry);
        let start = compact::scored(dot, vectors, query, entry);
        let mut nearest =
            compact::descend(layers, vectors, query, start, (level + 1..=top).rev(), dot);
        compact::with_scratch(|scratch| {
            for layer in (0..=level.min(top)).rev() {
                let on_layer = |_| layer..=layer;
                let others = |found: u32| found != node;
                compact::beam(
                    layers,
                    vectors,
                    query,
                    nearest,
                    layers.ef_construction,
                    on_layer,
                    others,
                    dot,
                    scratch,
                );
                let found = scratch.take_results();
                let Some(&closest) = found.first() else {
                    continue;
                };
                nearest = closest;
                let chosen = select(vectors, &found, layers.links_per_layer, dot);
                lock(&layers.lists[node as usize])[layer].clone_from(&chosen);
                for neighbour in chosen {
                    layers.link_back(vectors, neighbour, node, layer, dot);
                }
            }
        });
        if level > top {
            let mut entry = lock(&layers.entry);
            if entry.is_none_or(|current| level > layers.level(current)) {
                *entry = Some(node);
            }
        }
    }
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn levels_follow_the_geometric_law() {
        // P(level >= 1) = 1/M and P(level >= 2) = 1/M² for M = 16.
        let draws = 200_000u64;
        let levels: Vec<usize> = (0..draws).map(|key| level_for(key, 16)).collect();
        let at_least = |l: usize| levels.iter().filter(|&&v| v >= l).count() as f64 / draws as f64;
        assert!((at_least(1) - 1.0 / 16.0).abs() < 0.003, "{}", at_least(1));
        assert!((at_least(2) - 1.0 / 256.0).abs() < 0.001, "{}", at_least(2));
        assert_eq!(level_for(42, 16), level_for(42, 16));
    }

    /// On points of a line, the heuristic keeps the nearest point on each side: the
    /// farther ones on a side are nearer to that kept point than to the base.
    #[test]
    fn heuristic_keeps_one_neighbour_per_direction() {
        let mut vectors = Vectors::with_capacity(2, 0);
        let angles = [0.0f32, 0.1, 0.2, 0.3, -0.15, -0.25];
        for angle in angles {
            vectors.push(&[angle.cos(), angle.sin()]);
        }
        let base = vectors.padded(0).to_vec();
        let mut candidates: Vec<Scored> = (1..angles.len() as u32)
            .map(|node| compact::scored(distance::dot_portable, &vectors, &base, node))
            .collect();
        candidates.sort_unstable();
        assert_eq!(
            select(&vectors, &candidates, 4, distance::dot_portable),
            vec![1, 4]
        );
        assert_eq!(
            select(&vectors, &candidates, 1, distance::dot_portable),
            vec![1]
        );
    }
}
