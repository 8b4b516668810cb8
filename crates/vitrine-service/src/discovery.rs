//! How a command-line run finds the service that holds its store: while the
//! service runs, each collection's store folder holds `served-by.json` with
//! the address that answers for it. The service removes the file when it
//! stops; a file left by a killed service names an address that no longer
//! answers, which the reader finds out by asking.

use std::io;
use std::net::{IpAddr, Ipv4Addr, Ipv6Addr, SocketAddr};
use std::path::{Path, PathBuf};

use serde::{Deserialize, Serialize};

pub const FILE_NAME: &str = "served-by.json";

#[derive(Clone, Debug, PartialEq, Serialize, Deserialize)]
pub struct ServedBy {
    /// Where the API answers, e.g. `http://127.0.0.1:8080`.
    pub url: String,
    /// The collection's name in the API's paths.
    pub collection: String,
    pub pid: u32,
}

#[derive(Debug, thiserror::Error)]
pub enum DiscoveryError {
    #[error("cannot read {path}: {source}")]
    Read { path: PathBuf, source: io::Error },
    #[error("{path} is not a service record: {source}")]
    Malformed {
        path: PathBuf,
        source: serde_json::Error,
    },
}

impl ServedBy {
    /// The record for `collection` served on `addr`; a wildcard address is
    /// reached on loopback.
    pub fn new(addr: SocketAddr, collection: &str) -> Self {
        let ip = match addr.ip() {
            IpAddr::V4(ip) if ip.is_unspecified() => IpAddr::V4(Ipv4Addr::LOCALHOST),
            IpAddr::V6(ip) if ip.is_unspecified() => IpAddr::V6(Ipv6Addr::LOCALHOST),
            ip => ip,
        };
        Self {
            url: format!("http://{}", SocketAddr::new(ip, addr.port())),
            collection: collection.to_owned(),
            pid: std::process::id(),
        }
    }

    /// The record in `store_dir`, if a service wrote one.
    pub fn read(store_dir: &Path) -> Result<Option<Self>, DiscoveryError> {
        let path = store_dir.join(FILE_NAME);
        let text = match std::fs::read_to_string(&path) {
            Ok(text) => text,
            Err(err) if err.kind() == io::ErrorKind::NotFound => return Ok(None),
            Err(source) => return Err(DiscoveryError::Read { path, source }),
        };
        serde_json::from_str(&text)
            .map(Some)
            .map_err(|source| DiscoveryError::Malformed { path, source })
    }

    /// Writes the record into `store_dir` under a temporary name, then renames
    /// it, so a reader never sees half a record.
    pub fn write(&self, store_dir: &Path) -> io::Result<()> {
        let temporary = store_dir.join(format!("{FILE_NAME}.{}.tmp", self.pid));
        std::fs::write(&temporary, serde_json::to_vec_pretty(self)?)?;
        std::fs::rename(&temporary, store_dir.join(FILE_NAME))
    }

    /// Removes the record from `store_dir` if it is still this process's.
    pub fn remove(store_dir: &Path) -> io::Result<()> {
        match Self::read(store_dir) {
            Ok(Some(record)) if record.pid == std::process::id() => {
                std::fs::remove_file(store_dir.join(FILE_NAME))
            }
            _ => Ok(()),
        }
    }
}
