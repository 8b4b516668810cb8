//! Key layout of the store's single sled tree. One tree, so that a `sled::Batch`
//! (atomic on one tree) covers every kind of entry a commit touches.
//!
//! | key                                   | value                         |
//! |---------------------------------------|-------------------------------|
//! | `m` + name                            | meta (format, fingerprint, ..)|
//! | `r` + id (u64 BE)                     | postcard `ImageRecord`        |
//! | `e` + id (u64 BE)                     | embedding, f32 LE             |
//! | `p` + root (u32 BE) + rel_path        | id (u64 BE)                   |
//! | `h` + content hash (32) + id (u64 BE) | empty                         |
//! | `t` + root (u32 BE)                   | root path, UTF-8              |
//! | `f` + root (u32 BE) + rel_path        | postcard `FileError`          |
//! | `n` + kind (8) + hash (32) + hash (32)| a note on two files' contents |
//! | `d` + sequence number (u64 BE)        | a person's decision, opaque   |

use crate::types::ImageId;

pub const META_FORMAT: &[u8] = b"mformat";
pub const META_FINGERPRINT: &[u8] = b"mfingerprint";
pub const META_NEXT_ID: &[u8] = b"mnext_id";
pub const META_NEXT_ROOT: &[u8] = b"mnext_root";
pub const META_INDEX: &[u8] = b"mindex";

pub const RECORD: u8 = b'r';
pub const EMBEDDING: u8 = b'e';
pub const PATH: u8 = b'p';
pub const CONTENT_HASH: u8 = b'h';
pub const ROOT: u8 = b't';
pub const FILE_ERROR: u8 = b'f';
pub const PAIR_NOTE: u8 = b'n';
pub const DECISION: u8 = b'd';

pub fn decision(sequence: u64) -> [u8; 9] {
    with_id(DECISION, sequence)
}

pub fn record(id: ImageId) -> [u8; 9] {
    with_id(RECORD, id)
}

pub fn embedding(id: ImageId) -> [u8; 9] {
    with_id(EMBEDDING, id)
}

fn with_id(prefix: u8, id: ImageId) -> [u8; 9] {
    let mut key = [0u8; 9];
    key[0] = prefix;
    key[1..].copy_from_slice(&id.to_be_bytes());
    key
}

/// The number in a `record`, `embedding` or `decision` key, or `None` if the key is malformed.
pub fn id_of(key: &[u8]) -> Option<ImageId> {
    let bytes: [u8; 8] = key.get(1..9)?.try_into().ok()?;
    (key.len() == 9).then(|| ImageId::from_be_bytes(bytes))
}

pub fn path(root: u32, rel_path: &str) -> Vec<u8> {
    with_root_and_path(PATH, root, rel_path)
}

pub fn file_error(root: u32, rel_path: &str) -> Vec<u8> {
    with_root_and_path(FILE_ERROR, root, rel_path)
}

fn with_root_and_path(prefix: u8, root: u32, rel_path: &str) -> Vec<u8> {
    let mut key = Vec::with_capacity(5 + rel_path.len());
    key.push(prefix);
    key.extend_from_slice(&root.to_be_bytes());
    key.extend_from_slice(rel_path.as_bytes());
    key
}

pub fn content_hash_prefix(hash: &[u8; 32]) -> [u8; 33] {
    let mut key = [0u8; 33];
    key[0] = CONTENT_HASH;
    key[1..].copy_from_slice(hash);
    key
}

/// The image id in a `content_hash` key, or `None` if the key is malformed.
pub fn id_of_content_hash(key: &[u8]) -> Option<ImageId> {
    let bytes: [u8; 8] = key.get(33..)?.try_into().ok()?;
    (key[0] == CONTENT_HASH).then(|| ImageId::from_be_bytes(bytes))
}

pub fn content_hash(hash: &[u8; 32], id: ImageId) -> [u8; 41] {
    let mut key = [0u8; 41];
    key[..33].copy_from_slice(&content_hash_prefix(hash));
    key[33..].copy_from_slice(&id.to_be_bytes());
    key
}

pub fn pair_note(kind: &[u8; 8], first: &[u8; 32], second: &[u8; 32]) -> [u8; 73] {
    let mut key = [0u8; 73];
    key[0] = PAIR_NOTE;
    key[1..9].copy_from_slice(kind);
    key[9..41].copy_from_slice(first);
    key[41..].copy_from_slice(second);
    key
}

/// The two content hashes a `pair_note` key names, or `None` if the key is
/// malformed.
pub fn hashes_of_pair_note(key: &[u8]) -> Option<([u8; 32], [u8; 32])> {
    if key.len() != 73 || key[0] != PAIR_NOTE {
        return None;
    }
    Some((key[9..41].try_into().ok()?, key[41..].try_into().ok()?))
}

pub fn root(root: u32) -> [u8; 5] {
    let mut key = [0u8; 5];
    key[0] = ROOT;
    key[1..].copy_from_slice(&root.to_be_bytes());
    key
}

/// The root id in a `root` key, or `None` if the key is malformed.
pub fn root_of(key: &[u8]) -> Option<u32> {
    let bytes: [u8; 4] = key.get(1..5)?.try_into().ok()?;
    (key.len() == 5).then(|| u32::from_be_bytes(bytes))
}

/// Printable form of a key for error messages.
pub fn describe(key: &[u8]) -> String {
    key.iter()
        .map(|&b| {
            if b.is_ascii_graphic() {
                (b as char).to_string()
            } else {
                format!("\\x{b:02x}")
            }
        })
        .collect()
}

pub fn encode_embedding(vector: &[f32]) -> Vec<u8> {
    vector.iter().flat_map(|x| x.to_le_bytes()).collect()
}

/// `None` unless `bytes` holds exactly `dim` f32 values.
pub fn decode_embedding(bytes: &[u8], dim: usize) -> Option<Vec<f32>> {
    if bytes.len() != dim * 4 {
        return None;
    }
    Some(
        bytes
            .chunks_exact(4)
            .map(|c| f32::from_le_bytes([c[0], c[1], c[2], c[3]]))
            .collect(),
    )
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn keys_that_are_parsed_back_give_what_was_put_in() {
        let (first, second) = ([7u8; 32], [9u8; 32]);
        assert_eq!(
            hashes_of_pair_note(&pair_note(b"verdict1", &first, &second)),
            Some((first, second))
        );
        assert_eq!(
            hashes_of_pair_note(&pair_note(b"verdict1", &first, &second)[..72]),
            None
        );
        assert_eq!(id_of_content_hash(&content_hash(&first, 42)), Some(42));
        assert_eq!(id_of_content_hash(&content_hash_prefix(&first)), None);
        assert_eq!(id_of(&record(u64::MAX)), Some(u64::MAX));
        assert_eq!(root_of(&root(3)), Some(3));
    }
}
