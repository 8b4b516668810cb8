//! Reads and writes the graph's dump files, in the layout hnsw_rs 0.3 writes with
//! `file_dump` in full mode (its `hnswio.rs`), all integers native-endian and `usize`
//! as 8 bytes, so that hnsw_rs itself can load every dump (the tests do):
//!
//! - graph file: description (magic, mode, M, level scale, layer count, ef_construction,
//!   point count, dimension, distance type name, value type name); layer count again;
//!   per layer a magic, its point count and its points (magic, origin id, layer, rank,
//!   then per layer a neighbour count and neighbours as origin id, layer, rank,
//!   distance); finally the entry point (origin id, layer, rank);
//! - data file: magic and dimension, then per point in the same order a magic, the
//!   origin id, the byte length and the f32 values.
//!
//! Reading goes straight into the compact search form. The checksum recorded in the
//! manifest is computed while reading or writing, in the same pass.

use std::fs::File;
use std::io::{self, BufReader, BufWriter, Read, Write};
use std::path::Path;

use crate::compact::{Links, LinksBuilder, Vectors};
use crate::distance::dot;
use crate::graph::{DumpFile, IndexManifest, LoadFailure, MAX_LAYERS};
use crate::types::{HnswParams, ImageId};

const MAGIC_DESCRIPTION: u32 = 0x002a_6779;
const MAGIC_LAYER: u32 = 0x000a_676f;
const MAGIC_POINT: u32 = 0x000a_678f;
const MAGIC_DATA: u32 = 0xa67f_0000;
/// `file_dump` always writes full mode (point ids with every neighbour).
const FULL_MODE: u8 = 1;
/// The distance's type name, which hnsw_rs checks on loading. Graphs used to be built
/// by hnsw_rs with a distance type of this name; the name stays so that those dumps
/// still load, and so that hnsw_rs loads ours with `graph::CosineDistance`.
const DISTANCE_NAME: &str = "vitrine_store::graph::CosineDistance";
/// Longer neighbour lists than hnsw_rs can make (it caps M at 256, layer 0 at 2M)
/// mean a malformed file; refusing them bounds allocations.
const MAX_LIST: usize = 512;

/// A dump in search form: node `n` is the `n`-th point of the dump.
pub struct CompactDump {
    pub vectors: Vectors,
    pub image_ids: Vec<ImageId>,
    pub links: Links,
}

/// Reads the dump `manifest` describes from `dir`, checking every file's length and
/// checksum. `dim` is the store's embedding dimension.
pub fn read(dir: &Path, manifest: &IndexManifest, dim: usize) -> Result<CompactDump, LoadFailure> {
    let file = |suffix: &str| {
        manifest
            .files
            .iter()
            .find(|f| f.name.ends_with(suffix))
            .ok_or_else(|| LoadFailure::Unreadable(format!("manifest lists no {suffix} file")))
    };
    let graph_file = file(".hnsw.graph")?;
    let data_file = file(".hnsw.data")?;
    let points = usize::try_from(manifest.points)
        .map_err(|_| LoadFailure::Unreadable("point count overflows".into()))?;
    let (graph, data) = rayon::join(
        || read_checked(dir, graph_file, |input| read_graph(input, dim, points)),
        || read_checked(dir, data_file, |input| read_data(input, dim, points)),
    );
    let graph = graph?;
    let (vectors, data_origins) = data?;
    if data_origins != graph.origins {
        return Err(LoadFailure::Unreadable(
            "graph and data files list different points".into(),
        ));
    }
    Ok(CompactDump {
        vectors,
        image_ids: graph.origins,
        links: graph.links,
    })
}

/// Parses one file with `parse` while hashing it, then checks length and checksum. A
/// file that fails to parse is reported as altered when its checksum differs.
fn read_checked<T>(
    dir: &Path,
    expected: &DumpFile,
    parse: impl FnOnce(&mut Fields) -> io::Result<T>,
) -> Result<T, LoadFailure> {
    let path = dir.join(&expected.name);
    let opened = File::open(&path).and_then(|file| Ok((file.metadata()?.len(), file)));
    let file = match opened {
        Ok((len, _)) if len != expected.len => return Err(LoadFailure::FileAltered(path)),
        Ok((_, file)) => file,
        Err(error) if error.kind() == io::ErrorKind::NotFound => {
            return Err(LoadFailure::FileMissing(path))
        }
        Err(error) => return Err(LoadFailure::Unreadable(error.to_string())),
    };
    let mut fields = Fields {
        input: BufReader::with_capacity(
            1 << 20,
            Hashing {
                inner: file,
                hasher: blake3::Hasher::new(),
            },
        ),
    };
    let parsed = parse(&mut fields).and_then(|value| {
        let mut extra = [0u8; 1];
        if fields.input.read(&mut extra)? != 0 {
            return Err(malformed("bytes after the end"));
        }
        Ok(value)
    });
    // Hash whatever the parser left unread, so a damaged file is named as such.
    let drained = io::copy(&mut fields.input, &mut io::sink());
    if drained.is_err() || *fields.input.get_ref().hasher.finalize().as_bytes() != expected.blake3 {
        return Err(LoadFailure::FileAltered(path));
    }
    parsed.map_err(|error| LoadFailure::Unreadable(format!("{}: {error}", path.display())))
}

/// Passes reads through while hashing every byte.
struct Hashing<R> {
    inner: R,
    hasher: blake3::Hasher,
}

impl<R: Read> Read for Hashing<R> {
    fn read(&mut self, buf: &mut [u8]) -> io::Result<usize> {
        let read = self.inner.read(buf)?;
        self.hasher.update(&buf[..read]);
        Ok(read)
    }
}

struct Fields {
    input: BufReader<Hashing<File>>,
}

impl Fields {
    fn bytes<const N: usize>(&mut self) -> io::Result<[u8; N]> {
        let mut bytes = [0u8; N];
        self.input.read_exact(&mut bytes)?;
        Ok(bytes)
    }

    fn u8(&mut self) -> io::Result<u8> {
        Ok(self.bytes::<1>()?[0])
    }

    fn u32(&mut self) -> io::Result<u32> {
        self.bytes().map(u32::from_ne_bytes)
    }

    fn i32(&mut self) -> io::Result<i32> {
        self.bytes().map(i32::from_ne_bytes)
    }

    fn u64(&mut self) -> io::Result<u64> {
        self.bytes().map(u64::from_ne_bytes)
    }

    fn f32(&mut self) -> io::Result<f32> {
        self.bytes().map(f32::from_ne_bytes)
    }

    /// A `usize` as hnsw_rs writes it on 64-bit targets.
    fn size(&mut self) -> io::Result<usize> {
        usize::try_from(self.u64()?).map_err(|_| malformed("size overflows"))
    }

    fn magic(&mut self, expected: u32, what: &str) -> io::Result<()> {
        if self.u32()? != expected {
            return Err(malformed(&format!("bad magic number at {what}")));
        }
        Ok(())
    }

    fn name(&mut self) -> io::Result<String> {
        let len = self.size()?;
        if len > 256 {
            return Err(malformed("type name longer than 256 bytes"));
        }
        let mut bytes = vec![0u8; len];
        self.input.read_exact(&mut bytes)?;
        String::from_utf8(bytes).map_err(|_| malformed("type name is not UTF-8"))
    }
}

fn malformed(reason: &str) -> io::Error {
    io::Error::new(io::ErrorKind::InvalidData, reason.to_string())
}

struct GraphPart {
    origins: Vec<ImageId>,
    links: Links,
}

/// A point's (layer, rank) packed into a u32 until every layer's size is known: bits
/// for the rank; layers (< 16) take the top 4 bits.
const RANK_BITS: u32 = 28;

fn pack(layer: u8, rank: i32) -> io::Result<u32> {
    match u32::try_from(rank) {
        Ok(rank) if rank < 1 << RANK_BITS && usize::from(layer) < MAX_LAYERS => {
            Ok(u32::from(layer) << RANK_BITS | rank)
        }
        _ => Err(malformed("bad point id")),
    }
}

fn read_graph(input: &mut Fields, dim: usize, points: usize) -> io::Result<GraphPart> {
    input.magic(MAGIC_DESCRIPTION, "the description")?;
    if input.u8()? != FULL_MODE {
        return Err(malformed("not a full-mode dump"));
    }
    let _max_nb_connection = input.u8()?;
    let _level_scale = input.bytes::<8>()?;
    let layers = usize::from(input.u8()?);
    let _ef_construction = input.size()?;
    if input.size()? != points {
        return Err(malformed("point count differs from the manifest's"));
    }
    if input.size()? != dim {
        return Err(malformed("dimension differs from the store's"));
    }
    if input.name()? != DISTANCE_NAME {
        return Err(malformed("written with another distance"));
    }
    if input.name()? != std::any::type_name::<f32>() {
        return Err(malformed("values are not f32"));
    }
    if layers > MAX_LAYERS || usize::from(input.u8()?) != layers {
        return Err(malformed("bad layer count"));
    }

    let mut origins = Vec::with_capacity(points);
    let mut builder = LinksBuilder::with_capacity(points);
    let mut list = Vec::new();
    let mut layer_start = Vec::with_capacity(layers + 1);
    for layer in 0..layers {
        input.magic(MAGIC_LAYER, "a layer")?;
        let count = input.size()?;
        if count > points - origins.len() {
            return Err(malformed("more points than the description says"));
        }
        layer_start.push(origins.len());
        for rank in 0..count {
            input.magic(MAGIC_POINT, "a point")?;
            origins.push(input.u64()?);
            if usize::from(input.u8()?) != layer || usize::try_from(input.i32()?) != Ok(rank) {
                return Err(malformed("point stored out of place"));
            }
            builder.add_node(layer);
            for list_layer in 0..layers {
                let len = input.size()?;
                if len > MAX_LIST {
                    return Err(malformed("neighbour list too long"));
                }
                list.clear();
                for _ in 0..len {
                    let _origin = input.u64()?;
                    list.push(pack(input.u8()?, input.i32()?)?);
                    let _distance = input.f32()?;
                }
                // hnsw_rs also writes lists above a point's own level (never searched).
                if list_layer <= layer {
                    builder.add_list(list.iter().copied());
                }
            }
        }
    }
    layer_start.push(origins.len());
    if origins.len() != points {
        return Err(malformed("fewer points than the description says"));
    }
    let entry_origin = input.u64()?;
    let entry = pack(input.u8()?, input.i32()?)?;

    let mut links = builder.finish((points > 0).then_some(entry));
    let resolved = links.map_nodes(|packed| {
        let layer = (packed >> RANK_BITS) as usize;
        let rank = (packed & ((1 << RANK_BITS) - 1)) as usize;
        let (start, end) = (*layer_start.get(layer)?, *layer_start.get(layer + 1)?);
        let node = start + rank;
        (node < end).then_some(node as u32)
    });
    if !resolved {
        return Err(malformed("neighbour beyond its layer"));
    }
    if links
        .entry()
        .is_some_and(|node| origins[node as usize] != entry_origin)
    {
        return Err(malformed("entry point names another point"));
    }
    Ok(GraphPart { origins, links })
}

fn read_data(input: &mut Fields, dim: usize, points: usize) -> io::Result<(Vectors, Vec<ImageId>)> {
    input.magic(MAGIC_DATA, "the data header")?;
    if input.size()? != dim {
        return Err(malformed("data dimension differs from the store's"));
    }
    let mut vectors = Vectors::with_capacity(dim, points);
    let mut origins = Vec::with_capacity(points);
    for _ in 0..points {
        input.magic(MAGIC_DATA, "a vector")?;
        origins.push(input.u64()?);
        if input.size()? != dim * 4 {
            return Err(malformed("vector of the wrong length"));
        }
        vectors.push_ne_bytes_from(|bytes| input.input.read_exact(bytes))?;
    }
    Ok((vectors, origins))
}

/// A graph as [`write`] needs it: node `n` has the vector `vectors.padded(n)` and the
/// id `image_ids[n]`.
pub struct Written<'a> {
    pub vectors: &'a Vectors,
    pub image_ids: &'a [ImageId],
    pub links: &'a Links,
    pub params: &'a HnswParams,
}

/// Writes `basename.hnsw.graph` and `basename.hnsw.data` in `dir` and fsyncs them;
/// returns each file's manifest entry. The graph must have an entry point.
pub fn write(dir: &Path, basename: &str, graph: &Written) -> io::Result<Vec<DumpFile>> {
    let links = graph.links;
    let entry = links
        .entry()
        .ok_or_else(|| io::Error::new(io::ErrorKind::InvalidInput, "an empty graph has no dump"))?;
    // Points go layer by layer (a point's layer is its level), in node order within one.
    let mut by_layer: Vec<Vec<u32>> = vec![Vec::new(); MAX_LAYERS];
    for node in 0..links.len() as u32 {
        by_layer[links.level(node)].push(node);
    }
    let mut rank = vec![0i32; links.len()];
    for layer in &by_layer {
        for (position, &node) in layer.iter().enumerate() {
            rank[node as usize] =
                i32::try_from(position).map_err(|_| malformed("layer too large"))?;
        }
    }
    // Origin id, layer, rank.
    let point_id = |node: u32| -> [u8; 13] {
        let mut bytes = [0u8; 13];
        bytes[..8].copy_from_slice(&graph.image_ids[node as usize].to_ne_bytes());
        bytes[8] = links.level(node) as u8;
        bytes[9..].copy_from_slice(&rank[node as usize].to_ne_bytes());
        bytes
    };
    let dim = graph.vectors.dim();
    let name = |suffix: &str| format!("{basename}.{suffix}");

    let mut out = Sink::create(dir, name("hnsw.graph"))?;
    out.put(&MAGIC_DESCRIPTION.to_ne_bytes())?;
    out.put(&[
        FULL_MODE,
        u8::try_from(graph.params.max_nb_connection).unwrap_or(u8::MAX),
    ])?;
    out.put(&(1.0 / (graph.params.max_nb_connection as f64).ln()).to_ne_bytes())?;
    out.put(&[MAX_LAYERS as u8])?;
    out.size(graph.params.ef_construction)?;
    out.size(links.len())?;
    out.size(dim)?;
    for type_name in [DISTANCE_NAME, std::any::type_name::<f32>()] {
        out.size(type_name.len())?;
        out.put(type_name.as_bytes())?;
    }
    out.put(&[MAX_LAYERS as u8])?;
    for (layer, nodes) in by_layer.iter().enumerate() {
        out.put(&MAGIC_LAYER.to_ne_bytes())?;
        out.size(nodes.len())?;
        for &node in nodes {
            out.put(&MAGIC_POINT.to_ne_bytes())?;
            out.put(&point_id(node))?;
            let own = graph.vectors.padded(node as usize);
            for list_layer in 0..MAX_LAYERS {
                let list: &[u32] = if list_layer <= layer {
                    links.neighbours(node, list_layer)
                } else {
                    &[]
                };
                out.size(list.len())?;
                for &neighbour in list {
                    out.put(&point_id(neighbour))?;
                    // hnsw_rs' distance: 1 - cosine similarity, never below zero.
                    let distance =
                        (1.0 - dot(own, graph.vectors.padded(neighbour as usize))).max(0.0);
                    out.put(&distance.to_ne_bytes())?;
                }
            }
        }
    }
    out.put(&point_id(entry))?;
    let graph_file = out.finish()?;

    let mut out = Sink::create(dir, name("hnsw.data"))?;
    out.put(&MAGIC_DATA.to_ne_bytes())?;
    out.size(dim)?;
    let mut row = Vec::with_capacity(dim * 4);
    for &node in by_layer.iter().flatten() {
        out.put(&MAGIC_DATA.to_ne_bytes())?;
        out.put(&graph.image_ids[node as usize].to_ne_bytes())?;
        out.size(dim * 4)?;
        row.clear();
        row.extend(
            graph.vectors.padded(node as usize)[..dim]
                .iter()
                .flat_map(|v| v.to_ne_bytes()),
        );
        out.put(&row)?;
    }
    Ok(vec![graph_file, out.finish()?])
}

/// A new file, written through a buffer while counting and hashing its bytes.
struct Sink {
    name: String,
    out: BufWriter<File>,
    len: u64,
    hasher: blake3::Hasher,
}

impl Sink {
    fn create(dir: &Path, name: String) -> io::Result<Sink> {
        Ok(Sink {
            out: BufWriter::with_capacity(1 << 20, File::create(dir.join(&name))?),
            name,
            len: 0,
            hasher: blake3::Hasher::new(),
        })
    }

    fn put(&mut self, bytes: &[u8]) -> io::Result<()> {
        self.hasher.update(bytes);
        self.len += bytes.len() as u64;
        self.out.write_all(bytes)
    }

    /// A `usize` as hnsw_rs writes it.
    fn size(&mut self, value: usize) -> io::Result<()> {
        self.put(&(value as u64).to_ne_bytes())
    }

    fn finish(self) -> io::Result<DumpFile> {
        let file = self.out.into_inner().map_err(|error| error.into_error())?;
        file.sync_all()?;
        Ok(DumpFile {
            name: self.name,
            len: self.len,
            blake3: *self.hasher.finalize().as_bytes(),
        })
    }
}

#[cfg(test)]
mod tests {
    use std::collections::{HashMap, HashSet};

    use hnsw_rs::prelude::{AnnT, HnswIo};
    use rand::{Rng, SeedableRng};
    use rand_chacha::ChaCha8Rng;

    use super::*;
    use crate::graph::{CosineDistance, Graph};
    use crate::types::HnswParams;

    const DIM: usize = 12;

    fn unit_rows(rng: &mut ChaCha8Rng, rows: usize) -> Vec<f32> {
        let mut data: Vec<f32> = (0..rows * DIM)
            .map(|_| rng.random_range(-1.0..1.0))
            .collect();
        for row in data.chunks_exact_mut(DIM) {
            let norm = row.iter().map(|v| v * v).sum::<f32>().sqrt();
            row.iter_mut().for_each(|v| *v /= norm);
        }
        data
    }

    fn graph(points: usize) -> (Graph, Vec<f32>) {
        let data = unit_rows(&mut ChaCha8Rng::seed_from_u64(3), points);
        let items: Vec<(ImageId, &[f32])> = data
            .chunks_exact(DIM)
            .enumerate()
            .map(|(i, row)| (1_000 + 7 * i as ImageId, row))
            .collect();
        (Graph::build(&HnswParams::default(), DIM, &items), data)
    }

    /// Reference: hnsw_rs' own reload of the same dump holds the same points, vectors
    /// and lists, and hnsw_rs' search on it finds the exact nearest neighbours.
    #[test]
    fn parsed_dump_equals_hnsw_rs_reload() {
        let dir = tempfile::tempdir().unwrap();
        let (mut graph, data) = graph(3_000);
        let manifest = graph.dump(dir.path(), 1).unwrap();
        let parsed = read(dir.path(), &manifest, DIM).unwrap();

        let io = HnswIo::new(dir.path(), &manifest.basename);
        let reloaded = io.load_hnsw_with_dist(CosineDistance).unwrap();
        let node_of: HashMap<ImageId, u32> = parsed
            .image_ids
            .iter()
            .enumerate()
            .map(|(node, id)| (*id, node as u32))
            .collect();
        let mut seen = 0;
        let mut links = 0;
        for point in reloaded.get_point_indexation() {
            let id = point.get_origin_id() as ImageId;
            let node = node_of[&id];
            assert_eq!(point.get_v(), &parsed.vectors.padded(node as usize)[..DIM]);
            let level = usize::from(point.get_point_id().0);
            for (layer, expected) in point.get_neighborhood_id().iter().enumerate() {
                let found: HashSet<ImageId> = parsed
                    .links
                    .neighbours(node, layer)
                    .iter()
                    .map(|n| parsed.image_ids[*n as usize])
                    .collect();
                if layer > level {
                    assert!(found.is_empty(), "lists above a node's level are dropped");
                    continue;
                }
                let expected: HashSet<ImageId> =
                    expected.iter().map(|n| n.d_id as ImageId).collect();
                assert_eq!(found, expected, "node {id}, layer {layer}");
                links += found.len();
            }
            seen += 1;
        }
        assert_eq!(seen, 3_000);
        assert!(links > 3_000 * 8, "a real graph, not an empty one");
        let entry = parsed.links.entry().unwrap();
        assert_eq!(
            parsed.links.level(entry),
            usize::from(reloaded.get_max_level_observed())
        );

        // Exact top-10 by brute force against hnsw_rs' answers on the reloaded graph.
        let queries = unit_rows(&mut ChaCha8Rng::seed_from_u64(4), 100);
        let mut hits = 0;
        for query in queries.chunks_exact(DIM) {
            let mut exact: Vec<(f32, ImageId)> = data
                .chunks_exact(DIM)
                .enumerate()
                .map(|(i, row)| (dot(query, row), 1_000 + 7 * i as ImageId))
                .collect();
            exact.sort_by(|a, b| b.0.total_cmp(&a.0));
            let expected: HashSet<ImageId> = exact[..10].iter().map(|(_, id)| *id).collect();
            hits += reloaded
                .search_neighbours(query, 10, 64)
                .iter()
                .filter(|n| expected.contains(&(n.d_id as ImageId)))
                .count();
        }
        let recall = hits as f64 / 1_000.0;
        assert!(recall >= 0.95, "hnsw_rs recall@10 on our dump: {recall}");
    }

    #[test]
    fn any_damaged_byte_is_refused() {
        let dir = tempfile::tempdir().unwrap();
        let (mut graph, _) = graph(300);
        let manifest = graph.dump(dir.path(), 1).unwrap();
        for file in &manifest.files {
            let path = dir.path().join(&file.name);
            let original = std::fs::read(&path).unwrap();
            let mut damaged = original.clone();
            damaged[original.len() / 3] ^= 0x10;
            std::fs::write(&path, &damaged).unwrap();
            assert!(matches!(
                read(dir.path(), &manifest, DIM),
                Err(LoadFailure::FileAltered(_))
            ));
            std::fs::write(&path, &original).unwrap();
        }
        assert!(read(dir.path(), &manifest, DIM).is_ok());
        assert!(matches!(
            read(dir.path(), &manifest, DIM + 1),
            Err(LoadFailure::Unreadable(_))
        ));
    }
}
