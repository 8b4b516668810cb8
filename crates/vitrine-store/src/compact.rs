//! The search side of the HNSW graph: a compact, read-only copy of hnsw_rs' layers.
//!
//! hnsw_rs keeps every node behind an `Arc`, every neighbour list behind an
//! `Arc<RwLock<..>>` of `Arc`s, each vector in its own allocation, and hashes visited
//! nodes into a map; a profile of its search showed most time waiting on the pointer
//! chase from a neighbour to its id. Here nodes are dense `u32` numbers, neighbour
//! lists are flat arrays (CSR), all vectors sit in one 64-byte-aligned block, and the
//! visited set is an array of generation stamps reused across queries.
//!
//! The search is the one of Malkov & Yashunin (2018): greedy descent through the upper
//! layers (Algorithm 5), then a beam search of width `ef` on layer 0 (Algorithm 2),
//! where nodes that are not accepted (removed images, filters) are still traversed but
//! never returned, and the beam keeps going until it holds `ef` accepted nodes.

use std::cell::RefCell;
use std::cmp::{Ordering, Reverse};
use std::collections::BinaryHeap;

use crate::distance::dot_kernel;

/// Floats per 64-byte cache line.
const LINE_FLOATS: usize = 16;

#[repr(C, align(64))]
#[derive(Clone, Copy)]
struct Line([f32; LINE_FLOATS]);

const ZERO_LINE: Line = Line([0.0; LINE_FLOATS]);

/// Equal-length f32 rows, each padded with zeros to whole cache lines and starting on
/// a line boundary (zero padding leaves dot products unchanged).
pub struct Vectors {
    dim: usize,
    lines_per_row: usize,
    lines: Vec<Line>,
}

impl Vectors {
    pub fn with_capacity(dim: usize, rows: usize) -> Vectors {
        let lines_per_row = dim.div_ceil(LINE_FLOATS).max(1);
        Vectors {
            dim,
            lines_per_row,
            lines: Vec::with_capacity(rows * lines_per_row),
        }
    }

    pub fn dim(&self) -> usize {
        self.dim
    }

    /// Appends a row of `dim` floats.
    pub fn push(&mut self, row: &[f32]) {
        debug_assert_eq!(row.len(), self.dim);
        let start = self.lines.len();
        self.lines.resize(start + self.lines_per_row, ZERO_LINE);
        self.padded_mut(start)[..row.len()].copy_from_slice(row);
    }

    /// Appends a row given as `dim` native-endian f32s (the layout hnsw_rs dumps).
    pub fn push_ne_bytes(&mut self, bytes: &[u8]) {
        debug_assert_eq!(bytes.len(), self.dim * 4);
        let start = self.lines.len();
        self.lines.resize(start + self.lines_per_row, ZERO_LINE);
        let row = self.padded_mut(start);
        for (value, chunk) in row.iter_mut().zip(bytes.chunks_exact(4)) {
            *value = f32::from_ne_bytes([chunk[0], chunk[1], chunk[2], chunk[3]]);
        }
    }

    /// Row `index` with its zero padding.
    #[inline]
    pub fn padded(&self, index: usize) -> &[f32] {
        let lines = &self.lines[index * self.lines_per_row..(index + 1) * self.lines_per_row];
        // SAFETY: `Line` is `repr(C)` around `[f32; 16]` with size 64 and no padding,
        // so a slice of lines is a slice of 16 times as many floats.
        unsafe {
            std::slice::from_raw_parts(lines.as_ptr().cast::<f32>(), lines.len() * LINE_FLOATS)
        }
    }

    fn padded_mut(&mut self, first_line: usize) -> &mut [f32] {
        let lines = &mut self.lines[first_line..first_line + self.lines_per_row];
        // SAFETY: as in `padded`.
        unsafe {
            std::slice::from_raw_parts_mut(
                lines.as_mut_ptr().cast::<f32>(),
                lines.len() * LINE_FLOATS,
            )
        }
    }

    /// `query` copied into an aligned, padded row like the stored ones.
    pub fn query(&self, query: &[f32]) -> Vectors {
        let mut row = Vectors::with_capacity(self.dim, 1);
        row.push(&query[..self.dim]);
        row
    }

    /// Asks the CPU to start loading row `index` into cache.
    #[inline]
    fn prefetch(&self, index: usize) {
        #[cfg(target_arch = "x86_64")]
        {
            use std::arch::x86_64::{_mm_prefetch, _MM_HINT_T0};
            let start = index * self.lines_per_row;
            for line in &self.lines[start..start + self.lines_per_row] {
                // SAFETY: prefetching is a hint and never faults; the address is in bounds.
                unsafe { _mm_prefetch::<_MM_HINT_T0>((line as *const Line).cast::<i8>()) };
            }
        }
        #[cfg(not(target_arch = "x86_64"))]
        let _ = index;
    }
}

/// Marks a node without upper layers in `upper_first`, and an empty graph's entry.
const NONE: u32 = u32::MAX;

/// The neighbour lists of every layer, by dense node number.
pub struct Links {
    /// Where searches start: a node of the top layer.
    entry: u32,
    levels: Vec<u8>,
    /// Layer 0 in CSR form: node `n`'s neighbours are `base[base_start[n]..base_start[n + 1]]`.
    base_start: Vec<u32>,
    base: Vec<u32>,
    /// Layers 1 and up, only for the few nodes that reach them. For a node of level
    /// `L >= 1`, `upper_first[n]` indexes `L + 1` offsets in `upper_start`; layer `l`'s
    /// neighbours are `upper[upper_start[f + l - 1]..upper_start[f + l]]`.
    upper_first: Vec<u32>,
    upper_start: Vec<u32>,
    upper: Vec<u32>,
}

impl Links {
    /// Links from each node's lists (one per layer, from 0 up to the node's level) and
    /// the search entry point, a node of the top layer.
    pub fn new(nodes: impl ExactSizeIterator<Item = Vec<Vec<u32>>>, entry: Option<u32>) -> Links {
        let n = nodes.len();
        let mut links = Links {
            entry: entry.unwrap_or(NONE),
            levels: Vec::with_capacity(n),
            base_start: Vec::with_capacity(n + 1),
            base: Vec::new(),
            upper_first: Vec::with_capacity(n),
            upper_start: Vec::new(),
            upper: Vec::new(),
        };
        links.base_start.push(0);
        for lists in nodes {
            let level = lists.len().saturating_sub(1);
            links
                .levels
                .push(u8::try_from(level).expect("hnsw_rs has at most 16 layers"));
            let mut layers = lists.iter();
            if let Some(base) = layers.next() {
                links.base.extend_from_slice(base);
            }
            links.base_start.push(to_u32(links.base.len()));
            if level == 0 {
                links.upper_first.push(NONE);
                continue;
            }
            links.upper_first.push(to_u32(links.upper_start.len()));
            links.upper_start.push(to_u32(links.upper.len()));
            for list in layers {
                links.upper.extend_from_slice(list);
                links.upper_start.push(to_u32(links.upper.len()));
            }
        }
        links
    }

    pub fn len(&self) -> usize {
        self.levels.len()
    }

    pub fn entry(&self) -> Option<u32> {
        (self.entry != NONE).then_some(self.entry)
    }

    pub fn level(&self, node: u32) -> usize {
        usize::from(self.levels[node as usize])
    }

    /// Node `node`'s neighbours on `layer` (none above its level).
    #[inline]
    pub fn neighbours(&self, node: u32, layer: usize) -> &[u32] {
        let node = node as usize;
        if layer == 0 {
            let (start, end) = (self.base_start[node], self.base_start[node + 1]);
            return &self.base[start as usize..end as usize];
        }
        if layer > usize::from(self.levels[node]) {
            return &[];
        }
        let offsets = self.upper_first[node] as usize + layer - 1;
        let (start, end) = (self.upper_start[offsets], self.upper_start[offsets + 1]);
        &self.upper[start as usize..end as usize]
    }
}

fn to_u32(value: usize) -> u32 {
    u32::try_from(value).expect("more than 4 billion graph links")
}

/// A node and its distance to the query, the negated dot product (smaller is nearer).
#[derive(Clone, Copy, Debug)]
struct Scored {
    distance: f32,
    node: u32,
}

impl PartialEq for Scored {
    fn eq(&self, other: &Self) -> bool {
        self.cmp(other) == Ordering::Equal
    }
}

impl Eq for Scored {}

impl PartialOrd for Scored {
    fn partial_cmp(&self, other: &Self) -> Option<Ordering> {
        Some(self.cmp(other))
    }
}

impl Ord for Scored {
    fn cmp(&self, other: &Self) -> Ordering {
        self.distance
            .total_cmp(&other.distance)
            .then(self.node.cmp(&other.node))
    }
}

/// Per-thread buffers reused by every search, so a query allocates nothing but its
/// answer.
#[derive(Default)]
struct Scratch {
    /// `stamps[n] == stamp` marks node `n` as visited by the current query; bumping
    /// `stamp` forgets every mark at once.
    stamps: Vec<u16>,
    stamp: u16,
    candidates: BinaryHeap<Reverse<Scored>>,
    results: BinaryHeap<Scored>,
    unvisited: Vec<u32>,
}

impl Scratch {
    fn start(&mut self, nodes: usize) {
        if self.stamps.len() < nodes {
            self.stamps.resize(nodes, 0);
        }
        self.stamp = self.stamp.wrapping_add(1);
        if self.stamp == 0 {
            self.stamps.fill(0);
            self.stamp = 1;
        }
        self.candidates.clear();
        self.results.clear();
    }

    /// Marks `node` visited; false when it already was.
    #[inline]
    fn visit(&mut self, node: u32) -> bool {
        let stamp = &mut self.stamps[node as usize];
        let first = *stamp != self.stamp;
        *stamp = self.stamp;
        first
    }
}

thread_local! {
    static SCRATCH: RefCell<Scratch> = RefCell::new(Scratch::default());
}

fn with_scratch<R>(work: impl FnOnce(&mut Scratch) -> R) -> R {
    SCRATCH.with(|cell| match cell.try_borrow_mut() {
        Ok(mut scratch) => work(&mut scratch),
        // A filter that itself searches on this thread: give the inner search its own.
        Err(_) => work(&mut Scratch::default()),
    })
}

/// Up to `ef` nodes nearest to `query` among those `accept` returns true for, as
/// (dot product, node), most similar first. `query` is a padded row as made by
/// [`Vectors::query`]; `links` and `vectors` number the same nodes.
pub fn search(
    vectors: &Vectors,
    links: &Links,
    query: &[f32],
    ef: usize,
    accept: impl Fn(u32) -> bool,
) -> Vec<(f32, u32)> {
    let Some(entry) = links.entry() else {
        return Vec::new();
    };
    if ef == 0 {
        return Vec::new();
    }
    let dot = dot_kernel();
    let distance = |node: u32| -dot(query, vectors.padded(node as usize));

    let mut nearest = Scored {
        distance: distance(entry),
        node: entry,
    };
    for layer in (1..=links.level(entry)).rev() {
        loop {
            let mut moved = false;
            for &node in links.neighbours(nearest.node, layer) {
                let candidate = Scored {
                    distance: distance(node),
                    node,
                };
                if candidate < nearest {
                    nearest = candidate;
                    moved = true;
                }
            }
            if !moved {
                break;
            }
        }
    }

    with_scratch(|scratch| {
        scratch.start(links.len());
        scratch.visit(nearest.node);
        scratch.candidates.push(Reverse(nearest));
        if accept(nearest.node) {
            scratch.results.push(nearest);
        }
        // The distance a node must beat to enter a full result list.
        let mut bound = scratch
            .results
            .peek()
            .map_or(f32::INFINITY, |worst| worst.distance);
        while let Some(Reverse(current)) = scratch.candidates.pop() {
            if current.distance > bound && scratch.results.len() >= ef {
                break;
            }
            scratch.unvisited.clear();
            for &node in links.neighbours(current.node, 0) {
                if scratch.visit(node) {
                    scratch.unvisited.push(node);
                }
            }
            // Load the next vector while computing with this one.
            if let Some(&first) = scratch.unvisited.first() {
                vectors.prefetch(first as usize);
            }
            for (i, &node) in scratch.unvisited.iter().enumerate() {
                if let Some(&next) = scratch.unvisited.get(i + 1) {
                    vectors.prefetch(next as usize);
                }
                let scored = Scored {
                    distance: distance(node),
                    node,
                };
                if scratch.results.len() < ef || scored.distance < bound {
                    scratch.candidates.push(Reverse(scored));
                    if accept(node) {
                        scratch.results.push(scored);
                        if scratch.results.len() > ef {
                            scratch.results.pop();
                        }
                        bound = scratch.results.peek().map_or(bound, |worst| worst.distance);
                    }
                }
            }
        }
        let mut found: Vec<Scored> = scratch.results.drain().collect();
        found.sort_unstable();
        found.into_iter().map(|s| (-s.distance, s.node)).collect()
    })
}

#[cfg(test)]
mod tests {
    use super::*;

    /// Points on a circle (dimension 2, padded to a cache line), each linked on layer 0
    /// to its two ring neighbours; node 0 also has a layer 1 linking it to node 5.
    fn ring(n: u32) -> (Vectors, Links) {
        let mut vectors = Vectors::with_capacity(2, n as usize);
        for i in 0..n {
            let angle = std::f32::consts::TAU * i as f32 / n as f32;
            vectors.push(&[angle.cos(), angle.sin()]);
        }
        let lists = (0..n).map(|i| {
            let mut lists = vec![vec![(i + n - 1) % n, (i + 1) % n]];
            if i == 0 || i == 5 {
                lists.push(vec![5 - i]);
            }
            lists
        });
        (
            vectors,
            Links::new(lists.collect::<Vec<_>>().into_iter(), Some(0)),
        )
    }

    /// Reference: exact ranking by dot product over the accepted nodes.
    fn brute_force(
        vectors: &Vectors,
        query: &[f32],
        n: u32,
        ef: usize,
        accept: impl Fn(u32) -> bool,
    ) -> Vec<u32> {
        let mut scored: Vec<(f32, u32)> = (0..n)
            .filter(|i| accept(*i))
            .map(|i| (-crate::distance::dot(query, vectors.padded(i as usize)), i))
            .collect();
        scored.sort_by(|a, b| a.0.total_cmp(&b.0).then(a.1.cmp(&b.1)));
        scored.into_iter().take(ef).map(|(_, i)| i).collect()
    }

    #[test]
    fn links_keep_each_layer_of_each_node() {
        let (_, links) = ring(12);
        assert_eq!(links.len(), 12);
        assert_eq!(links.entry(), Some(0));
        assert_eq!(links.neighbours(3, 0), &[2, 4]);
        assert_eq!(links.neighbours(0, 1), &[5]);
        assert_eq!(links.neighbours(5, 1), &[0]);
        assert_eq!(links.level(5), 1);
        assert!(links.neighbours(3, 1).is_empty(), "above node 3's level");
        assert!(links.neighbours(0, 2).is_empty(), "above node 0's level");
    }

    #[test]
    fn beam_search_on_a_ring_is_exact_and_honours_acceptance() {
        let (vectors, links) = ring(40);
        let even = |node: u32| node % 2 == 0;
        for step in 0..40 {
            let angle = std::f32::consts::TAU * (step as f32 + 0.3) / 40.0;
            let query = vectors.query(&[angle.cos(), angle.sin()]);
            let query = query.padded(0);
            for ef in [1, 3, 10] {
                let found: Vec<u32> = search(&vectors, &links, query, ef, |_| true)
                    .into_iter()
                    .map(|(_, node)| node)
                    .collect();
                assert_eq!(found, brute_force(&vectors, query, 40, ef, |_| true));
                let found: Vec<u32> = search(&vectors, &links, query, ef, even)
                    .into_iter()
                    .map(|(_, node)| node)
                    .collect();
                assert_eq!(found, brute_force(&vectors, query, 40, ef, even));
            }
            let similarities = search(&vectors, &links, query, 3, |_| true);
            for (similarity, node) in similarities {
                let exact = crate::distance::dot(query, vectors.padded(node as usize));
                assert_eq!(similarity, exact);
            }
        }
    }

    #[test]
    fn visited_marks_survive_the_stamp_wrapping_around() {
        let (vectors, links) = ring(16);
        let query = vectors.query(&[1.0, 0.0]);
        let expected = brute_force(&vectors, query.padded(0), 16, 5, |_| true);
        for _ in 0..(u16::MAX as usize + 10) {
            let found: Vec<u32> = search(&vectors, &links, query.padded(0), 5, |_| true)
                .into_iter()
                .map(|(_, node)| node)
                .collect();
            assert_eq!(found, expected);
        }
    }

    #[test]
    fn empty_graph_finds_nothing() {
        let vectors = Vectors::with_capacity(4, 0);
        let links = Links::new(std::iter::empty(), None);
        let query = vectors.query(&[1.0, 0.0, 0.0, 0.0]);
        assert!(search(&vectors, &links, query.padded(0), 10, |_| true).is_empty());
    }
}
