//! The `[serve]` section of the configuration file: address, access, limits.

use std::collections::BTreeMap;
use std::path::PathBuf;

use serde::Deserialize;

/// Settings of the web service. Every field has a default, so an empty or
/// missing `[serve]` section gives a local-only, read-only server.
#[derive(Clone, Debug, Deserialize, PartialEq, Eq)]
#[serde(default, deny_unknown_fields)]
pub struct ServeSettings {
    /// Address to listen on. Anything but a loopback address needs a token.
    pub bind: String,
    pub port: u16,
    /// Bearer token for write endpoints; `$VITRINE_TOKEN` takes precedence.
    /// Without one, write endpoints answer 403.
    pub token: Option<String>,
    /// Origins allowed by CORS; empty means CORS is off.
    pub cors_origins: Vec<String>,
    /// Extra collections served besides `--store`: name = store directory.
    pub collections: BTreeMap<String, PathBuf>,
    /// Largest request body (uploads, JSON) in bytes; larger ones get 413.
    pub max_body_bytes: usize,
    /// Largest uploaded image in pixels, checked from its header.
    pub max_upload_pixels: u64,
    /// Largest `k` a neighbour query may ask for.
    pub max_k: usize,
    pub default_k: usize,
    /// Largest `per_page` of a paged listing.
    pub max_page_size: usize,
    pub default_page_size: usize,
    /// A request still unanswered after this many seconds gets 503.
    pub request_timeout_s: u64,
    /// Background jobs (rescans, uploads, clustering) running at once; more wait.
    pub heavy_jobs: usize,
    /// Uploaded images are saved in this folder of the collection's first root.
    pub upload_folder: String,
    /// Thumbnails kept in memory.
    pub thumbnail_cache_entries: usize,
    /// Largest thumbnail side in pixels; larger requests are capped to it.
    pub thumbnail_max_size: u32,
    /// HTTP worker threads; 0 means one per core.
    pub workers: usize,
    /// On shutdown, in-flight requests get this long to finish.
    pub shutdown_timeout_s: u64,
    /// At start, compute each collection's default duplicate and leak reports
    /// in the background, so the first reader does not wait for verification.
    pub precompute: bool,
}

impl Default for ServeSettings {
    fn default() -> Self {
        Self {
            bind: "127.0.0.1".into(),
            port: 8080,
            token: None,
            cors_origins: Vec::new(),
            collections: BTreeMap::new(),
            max_body_bytes: 32 << 20,
            max_upload_pixels: 50_000_000,
            max_k: 1000,
            default_k: 10,
            max_page_size: 500,
            default_page_size: 50,
            request_timeout_s: 30,
            heavy_jobs: 1,
            upload_folder: "uploads".into(),
            thumbnail_cache_entries: 512,
            thumbnail_max_size: 512,
            workers: 0,
            shutdown_timeout_s: 30,
            precompute: true,
        }
    }
}

impl ServeSettings {
    /// The write token: `$VITRINE_TOKEN` if set and non-empty, else the file's.
    pub fn effective_token(&self) -> Option<String> {
        std::env::var("VITRINE_TOKEN")
            .ok()
            .filter(|t| !t.is_empty())
            .or_else(|| self.token.clone().filter(|t| !t.is_empty()))
    }
}
