//! The read-only questions a collection answers, with their options, as one
//! serialisable type: a command-line run whose store is held by a running
//! service sends its question there and receives the same report it would
//! have computed itself (`POST /api/collections/{name}/reports`).

use serde::{Deserialize, Serialize};
use vitrine_store::ImageId;

use crate::clusters::ClusterOptions;
use crate::duplicates::{DuplicateOptions, LeakOptions};
use crate::labels::LabelOptions;
use crate::neighbours::NeighbourFilter;

#[derive(Clone, Debug, Serialize, Deserialize)]
#[serde(tag = "question", content = "options", rename_all = "snake_case")]
pub enum Question {
    Status {
        list_errors: bool,
    },
    Neighbours {
        of: NeighbourQuery,
        k: usize,
        filter: NeighbourFilter,
    },
    Duplicates(DuplicateOptions),
    Leaks(LeakOptions),
    Clusters(ClusterOptions),
    LabelSuggestions(LabelOptions),
    LabelSuspects(LabelOptions),
}

/// Where a neighbour search starts.
#[derive(Clone, Debug, Serialize, Deserialize)]
#[serde(rename_all = "snake_case")]
pub enum NeighbourQuery {
    Image(ImageId),
    /// Root-relative, `/`-separated, as reports print it.
    Path(String),
    /// An embedding made by the collection's model (unit length or not).
    Vector(Vec<f32>),
}
