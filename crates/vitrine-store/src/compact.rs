//! The search side of the HNSW graph: a compact, read-only form of its layers.
//!
//! Nodes are dense `u32` numbers, neighbour lists are flat `u32` arrays (layer 0 in
//! fixed-size slots, so the next node's list can be prefetched), all vectors sit in one
//! 64-byte-aligned block, and the visited set is an array of generation stamps reused
//! across queries. (The layout came from profiling hnsw_rs' search, whose time went to
//! chasing pointers from a neighbour to its id.)
//!
//! The search is the one of Malkov & Yashunin (2018): greedy descent through the upper
//! layers (Algorithm 5), then a beam search of width `ef` on layer 0 (Algorithm 2),
//! where nodes that are not accepted (removed images, filters) are still traversed but
//! never returned, and the beam keeps going until it holds `ef` accepted nodes.
//!
//! One departure: on layer 0 the beam also follows a node's links on its upper layers.
//! Every node reached is still a real node ranked by its exact dot product. On graphs
//! built by hnsw_rs, which trims a full layer 0 list by distance alone (dropping the
//! long links first), it lifted recall@10 at ef 128 from 0.94 to 0.99 (`hnsw_bench`,
//! 100,000 vectors, 100 noisy centres); such graphs still load from older stores. On
//! graphs built by `construct.rs` the gain is small (0.9664 to 0.9679 at ef 16, 1,000
//! centres) and its cost was within the benchmark's noise.

use std::cell::Cell;
use std::cmp::{Ordering, Reverse};
use std::collections::BinaryHeap;

use crate::distance::{self, WithDot};

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

    /// Appends a row whose `dim` native-endian f32s (the layout hnsw_rs dumps) `fill`
    /// writes into the given bytes; the row is dropped again when `fill` fails.
    pub fn push_ne_bytes_from<E>(
        &mut self,
        fill: impl FnOnce(&mut [u8]) -> Result<(), E>,
    ) -> Result<(), E> {
        let start = self.lines.len();
        self.lines.resize(start + self.lines_per_row, ZERO_LINE);
        let bytes = self.dim * 4;
        let row = self.padded_mut(start);
        // SAFETY: the floats are plain memory that any bit pattern is valid for, and
        // `bytes` is within the row.
        let row_bytes =
            unsafe { std::slice::from_raw_parts_mut(row.as_mut_ptr().cast::<u8>(), bytes) };
        let filled = fill(row_bytes);
        if filled.is_err() {
            self.lines.truncate(start);
        }
        filled
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

    /// Asks the CPU to start loading the first cache line of row `index`.
    #[inline]
    fn prefetch_start(&self, index: usize) {
        prefetch(&self.lines[index * self.lines_per_row]);
    }

    /// Asks the CPU to start loading row `index` into cache.
    #[inline]
    fn prefetch(&self, index: usize) {
        let start = index * self.lines_per_row;
        for line in &self.lines[start..start + self.lines_per_row] {
            prefetch(line);
        }
    }
}

/// Asks the CPU to start loading the cache line holding `value`.
#[inline(always)]
fn prefetch<T>(value: &T) {
    #[cfg(target_arch = "x86_64")]
    {
        use std::arch::x86_64::{_mm_prefetch, _MM_HINT_T0};
        // SAFETY: prefetching is a hint that never faults, and the address is valid.
        unsafe { _mm_prefetch::<_MM_HINT_T0>((value as *const T).cast::<i8>()) };
    }
    #[cfg(not(target_arch = "x86_64"))]
    let _ = value;
}

/// Marks a node without upper layers in `upper_first`, and an empty graph's entry.
const NONE: u32 = u32::MAX;

/// The neighbour lists of every layer, by dense node number.
pub struct Links {
    /// Where searches start: a node of the top layer.
    entry: u32,
    levels: Vec<u8>,
    /// Layer 0, every node's list in a slot of `base_stride` numbers: the list's
    /// length, then the list (a fixed stride puts a node's list at a known address,
    /// which can be prefetched).
    base_stride: usize,
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
        let mut builder = LinksBuilder::with_capacity(nodes.len());
        for lists in nodes {
            builder.add_node(lists.len().saturating_sub(1));
            for list in lists {
                builder.add_list(list);
            }
        }
        builder.finish(entry)
    }

    /// Replaces every node number (in lists and the entry point) by `map`'s answer;
    /// false, leaving the links half-mapped, when `map` has none for one of them.
    pub fn map_nodes(&mut self, map: impl Fn(u32) -> Option<u32>) -> bool {
        let nodes = self.len();
        let base_lists = self
            .base
            .chunks_exact_mut(self.base_stride)
            .flat_map(|slot| {
                let (len, list) = slot.split_first_mut().expect("a slot holds its length");
                list[..*len as usize].iter_mut()
            });
        let entry = (self.entry != NONE).then_some(&mut self.entry);
        let mut all = true;
        for node in base_lists.chain(&mut self.upper).chain(entry) {
            match map(*node) {
                Some(mapped) if (mapped as usize) < nodes => *node = mapped,
                _ => all = false,
            }
        }
        all
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

    /// Asks the CPU to start loading node `node`'s layer 0 list.
    #[inline]
    fn prefetch_base(&self, node: u32) {
        let start = node as usize * self.base_stride;
        for word in self.base[start..start + self.base_stride]
            .iter()
            .step_by(16)
        {
            prefetch(word);
        }
    }

    /// Node `node`'s neighbours on `layer` (none above its level).
    #[inline]
    pub fn neighbours(&self, node: u32, layer: usize) -> &[u32] {
        let node = node as usize;
        if layer == 0 {
            let slot = &self.base[node * self.base_stride..(node + 1) * self.base_stride];
            return &slot[1..1 + slot[0] as usize];
        }
        if layer > usize::from(self.levels[node]) {
            return &[];
        }
        let offsets = self.upper_first[node] as usize + layer - 1;
        let (start, end) = (self.upper_start[offsets], self.upper_start[offsets + 1]);
        &self.upper[start as usize..end as usize]
    }
}

/// Makes [`Links`] one node at a time, in node order: `add_node` with the node's
/// level, then `add_list` once per layer from 0 up to that level.
pub struct LinksBuilder {
    links: Links,
    /// Layer 0 in CSR form until `finish`: node `n`'s list is
    /// `base[base_start[n]..base_start[n + 1]]`.
    base_start: Vec<u32>,
    base: Vec<u32>,
    /// Lists the current node still needs.
    lists_left: usize,
}

impl LinksBuilder {
    pub fn with_capacity(nodes: usize) -> LinksBuilder {
        let mut base_start = Vec::with_capacity(nodes + 1);
        base_start.push(0);
        LinksBuilder {
            links: Links {
                entry: NONE,
                levels: Vec::with_capacity(nodes),
                base_stride: 1,
                base: Vec::new(),
                upper_first: Vec::with_capacity(nodes),
                upper_start: Vec::new(),
                upper: Vec::new(),
            },
            base_start,
            base: Vec::new(),
            lists_left: 0,
        }
    }

    pub fn add_node(&mut self, level: usize) {
        assert_eq!(self.lists_left, 0, "the previous node lacks lists");
        let links = &mut self.links;
        links
            .levels
            .push(u8::try_from(level).expect("the dump layout has at most 16 layers"));
        if level == 0 {
            links.upper_first.push(NONE);
        } else {
            links.upper_first.push(to_u32(links.upper_start.len()));
            links.upper_start.push(to_u32(links.upper.len()));
        }
        self.lists_left = level + 1;
    }

    pub fn add_list(&mut self, list: impl IntoIterator<Item = u32>) {
        assert!(self.lists_left > 0, "more lists than layers");
        let level = usize::from(*self.links.levels.last().expect("add_node comes first"));
        if self.lists_left == level + 1 {
            self.base.extend(list);
            self.base_start.push(to_u32(self.base.len()));
        } else {
            let links = &mut self.links;
            links.upper.extend(list);
            links.upper_start.push(to_u32(links.upper.len()));
        }
        self.lists_left -= 1;
    }

    pub fn finish(mut self, entry: Option<u32>) -> Links {
        assert_eq!(self.lists_left, 0, "the last node lacks lists");
        let lists = self
            .base_start
            .windows(2)
            .map(|w| w[0] as usize..w[1] as usize);
        let longest = lists.clone().map(|list| list.len()).max().unwrap_or(0);
        let stride = longest + 1;
        let mut base = Vec::with_capacity(self.links.levels.len() * stride);
        for list in lists {
            base.push(to_u32(list.len()));
            base.extend_from_slice(&self.base[list.clone()]);
            base.resize(base.len() + longest - list.len(), NONE);
        }
        self.links.base_stride = stride;
        self.links.base = base;
        self.links.entry = entry.unwrap_or(NONE);
        self.links
    }
}

fn to_u32(value: usize) -> u32 {
    u32::try_from(value).expect("more than 4 billion graph links")
}

/// Neighbour lists a search can walk: the frozen [`Links`], or the lists of a graph
/// still being built (`construct.rs`), which locks a node's lists while they are read.
pub(crate) trait Adjacency {
    fn node_count(&self) -> usize;
    fn level(&self, node: u32) -> usize;
    /// Calls `visit` with each of `node`'s neighbours on `layer`, in list order.
    fn for_each_neighbour(&self, node: u32, layer: usize, visit: impl FnMut(u32));
    /// A hint that `node`'s lists are read next.
    fn prefetch_lists(&self, _node: u32) {}
}

impl Adjacency for Links {
    fn node_count(&self) -> usize {
        self.len()
    }

    fn level(&self, node: u32) -> usize {
        Links::level(self, node)
    }

    #[inline(always)]
    fn for_each_neighbour(&self, node: u32, layer: usize, mut visit: impl FnMut(u32)) {
        for &neighbour in self.neighbours(node, layer) {
            visit(neighbour);
        }
    }

    #[inline(always)]
    fn prefetch_lists(&self, node: u32) {
        self.prefetch_base(node);
    }
}

/// A node and its distance to the query, the negated dot product (smaller is nearer).
#[derive(Clone, Copy, Debug)]
pub(crate) struct Scored {
    pub distance: f32,
    pub node: u32,
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
pub(crate) struct Scratch {
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

    /// The last beam's results, nearest first.
    pub fn take_results(&mut self) -> Vec<Scored> {
        let mut found: Vec<Scored> = self.results.drain().collect();
        found.sort_unstable();
        found
    }
}

thread_local! {
    static SCRATCH: Cell<Scratch> = Cell::new(Scratch::default());
}

/// Runs `work` with this thread's scratch buffers. They are taken out meanwhile, so a
/// search nested in `work` (in an `accept` callback, say) finds none and makes its own.
pub(crate) fn with_scratch<R>(work: impl FnOnce(&mut Scratch) -> R) -> R {
    let mut scratch = SCRATCH.take();
    let result = work(&mut scratch);
    SCRATCH.set(scratch);
    result
}

/// How many vectors ahead of the dot product the beam search loads a vector.
const PREFETCH_AHEAD: usize = 3;

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
    distance::with_best_dot(LinksSearch {
        vectors,
        links,
        query,
        ef,
        accept,
    })
}

struct LinksSearch<'a, F> {
    vectors: &'a Vectors,
    links: &'a Links,
    query: &'a [f32],
    ef: usize,
    accept: F,
}

impl<F: Fn(u32) -> bool> WithDot for LinksSearch<'_, F> {
    type Output = Vec<(f32, u32)>;

    #[inline(always)]
    fn run(self, dot: impl Fn(&[f32], &[f32]) -> f32 + Copy) -> Vec<(f32, u32)> {
        let LinksSearch {
            vectors,
            links,
            query,
            ef,
            accept,
        } = self;
        let Some(entry) = links.entry() else {
            return Vec::new();
        };
        if ef == 0 {
            return Vec::new();
        }
        let start = scored(dot, vectors, query, entry);
        let nearest = descend(
            links,
            vectors,
            query,
            start,
            (1..=links.level(entry)).rev(),
            dot,
        );
        let found = with_scratch(|scratch| {
            // Layer 0 also follows a node's upper-layer links (see the module notes).
            let layers = |node: u32| 0..=links.level(node);
            beam(
                links, vectors, query, nearest, ef, layers, accept, dot, scratch,
            );
            scratch.take_results()
        });
        found.into_iter().map(|s| (-s.distance, s.node)).collect()
    }
}

/// `node` scored against `query`.
#[inline(always)]
pub(crate) fn scored(
    dot: impl Fn(&[f32], &[f32]) -> f32,
    vectors: &Vectors,
    query: &[f32],
    node: u32,
) -> Scored {
    Scored {
        distance: -dot(query, vectors.padded(node as usize)),
        node,
    }
}

/// Greedy descent (the upper part of Algorithm 5): on each of `layers`, top down, moves
/// to the nearest neighbour until no neighbour is nearer.
#[inline(always)]
pub(crate) fn descend(
    adjacency: &impl Adjacency,
    vectors: &Vectors,
    query: &[f32],
    mut nearest: Scored,
    layers: impl Iterator<Item = usize>,
    dot: impl Fn(&[f32], &[f32]) -> f32 + Copy,
) -> Scored {
    for layer in layers {
        loop {
            let from = nearest.node;
            adjacency.for_each_neighbour(from, layer, |node| {
                nearest = nearest.min(scored(dot, vectors, query, node));
            });
            if nearest.node == from {
                break;
            }
        }
    }
    nearest
}

/// Beam search of width `ef` (Algorithm 2) from `start`, expanding each node along its
/// lists on `layers(node)`. Nodes `accept` refuses are traversed but never kept, and the
/// beam goes on until it holds `ef` accepted nodes; they are left in `scratch` (see
/// [`Scratch::take_results`]).
#[allow(clippy::too_many_arguments)]
#[inline(always)]
pub(crate) fn beam<L: IntoIterator<Item = usize>>(
    adjacency: &impl Adjacency,
    vectors: &Vectors,
    query: &[f32],
    start: Scored,
    ef: usize,
    layers: impl Fn(u32) -> L,
    accept: impl Fn(u32) -> bool,
    dot: impl Fn(&[f32], &[f32]) -> f32 + Copy,
    scratch: &mut Scratch,
) {
    scratch.start(adjacency.node_count());
    scratch.visit(start.node);
    scratch.candidates.push(Reverse(start));
    if accept(start.node) {
        scratch.results.push(start);
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
        for layer in layers(current.node) {
            adjacency.for_each_neighbour(current.node, layer, |node| {
                if scratch.visit(node) {
                    scratch.unvisited.push(node);
                }
            });
        }
        // Start every vector's first line loading, then load each vector fully a few
        // dot products ahead (measured: 1, 3 and 5 ahead are within noise of each
        // other; prefetching every vector fully at once is slower).
        for &node in &scratch.unvisited {
            vectors.prefetch_start(node as usize);
        }
        for &node in scratch.unvisited.iter().take(PREFETCH_AHEAD) {
            vectors.prefetch(node as usize);
        }
        for (i, &node) in scratch.unvisited.iter().enumerate() {
            if let Some(&next) = scratch.unvisited.get(i + PREFETCH_AHEAD) {
                vectors.prefetch(next as usize);
            }
            let candidate = scored(dot, vectors, query, node);
            if scratch.results.len() < ef || candidate.distance < bound {
                scratch.candidates.push(Reverse(candidate));
                if accept(node) {
                    scratch.results.push(candidate);
                    if scratch.results.len() > ef {
                        scratch.results.pop();
                    }
                    bound = scratch.results.peek().map_or(bound, |worst| worst.distance);
                }
            }
        }
        // The next node to expand is known now: start loading its lists.
        if let Some(Reverse(next)) = scratch.candidates.peek() {
            adjacency.prefetch_lists(next.node);
        }
    }
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
        let even = |node: u32| node.is_multiple_of(2);
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
