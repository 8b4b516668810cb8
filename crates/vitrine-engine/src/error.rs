//! Errors of the engine: its own, and those of the crates it drives.

use std::path::PathBuf;

#[derive(Debug, thiserror::Error)]
pub enum EngineError {
    #[error(transparent)]
    Store(#[from] vitrine_store::StoreError),
    #[error(transparent)]
    Model(#[from] vitrine_model::error::ModelError),
    #[error(transparent)]
    Imaging(#[from] vitrine_imaging::ImagingError),
    /// An algorithm refused its input (each names the offending argument).
    #[error(transparent)]
    Analytics(#[from] crate::analytics::AnalyticsError),
    #[error("cannot encode a note on a pair of files: {0}")]
    PairNoteEncoding(serde_json::Error),
    #[error("cannot write the training list: {0}")]
    ManifestWrite(csv::Error),
    #[error("cannot encode a decision: {0}")]
    DecisionEncoding(serde_json::Error),
    #[error("decision {number} in the store cannot be read: {message}")]
    UnreadableDecision { number: u64, message: String },
    #[error("{0}")]
    InvalidDecision(String),
    /// The person decided on a state that another decision has changed since.
    #[error(
        "another decision ({latest}) was recorded on these images after the one you saw \
         ({seen}); look at the current state and decide again"
    )]
    DecisionConflict { seen: u64, latest: u64 },
    #[error("root {root} cannot be read: {message}")]
    UnreadableRoot { root: PathBuf, message: String },
    #[error("root {root} does not exist")]
    RootNotFound { root: PathBuf },
    #[error("{root} is {kind}; give the folder that holds it")]
    RootNotAFolder { root: PathBuf, kind: &'static str },
    /// The store's own error is not kept as a source: for a full device it
    /// says no more than this, as a raw i/o error.
    #[error(
        "the device holding the store {store} is full, so indexing stopped; the store keeps \
         its last commit ({}); free space on the device holding {store} and run the same \
         command again: it resumes",
        crate::ingest::counted(*committed_images, "image", "images")
    )]
    StoreDeviceFull {
        store: PathBuf,
        committed_images: usize,
    },
    #[error("ignore pattern `{pattern}` is invalid: {message}")]
    BadIgnorePattern { pattern: String, message: String },
    #[error("manifest {path} is invalid: {message}")]
    BadManifest { path: PathBuf, message: String },
    #[error("no image with id {0} in this collection")]
    UnknownImage(u64),
    #[error("no indexed image has the path {0}")]
    UnknownPath(String),
    #[error("the collection's embeddings were made by {stored}, but the loaded model is {loaded}")]
    ModelNotCollectionModel { stored: String, loaded: String },
    #[error(
        "embeddings made by {found} cannot join embeddings made by {expected} (the models \
         differ in {differing}); embeddings of two models never mix"
    )]
    ShardOfAnotherModel {
        expected: String,
        found: String,
        differing: String,
    },
    #[error("invalid argument: {0}")]
    InvalidArgument(String),
    #[error("no image is in split `{split}`; {}", known_names("splits", known))]
    UnknownSplit { split: String, known: Vec<String> },
    #[error("no image has the label `{label}`; {}", known_names("labels", known))]
    UnknownLabel { label: String, known: Vec<String> },
    /// Every part of a filter is known, but no image passes all of them.
    #[error("no image matches {0}")]
    NoImageMatches(String),
    #[error("near-duplicate verification was stopped (the service is shutting down)")]
    VerificationStopped,
}

/// "the splits are: test, train, val", or that there are none.
fn known_names(kind: &str, known: &[String]) -> String {
    if known.is_empty() {
        format!("the collection has no {kind}")
    } else {
        format!("the {kind} are: {}", known.join(", "))
    }
}

/// An error and its causes, joined by ": ", leaving out a cause whose text
/// the message before it already ends with (some errors put their cause into
/// their own message as well as into their source). Front ends show errors
/// with this, so that a reason appears once and is never lost.
pub fn describe(err: &(dyn std::error::Error + 'static)) -> String {
    let mut message = err.to_string();
    let mut cause = err.source();
    while let Some(inner) = cause {
        let text = inner.to_string();
        if !message.ends_with(&text) {
            message.push_str(": ");
            message.push_str(&text);
        }
        cause = inner.source();
    }
    message
}

#[cfg(test)]
mod tests {
    use super::*;

    #[derive(Debug, thiserror::Error)]
    #[error("cannot read {path}: {source}")]
    struct CauseInMessage {
        path: String,
        source: std::io::Error,
    }

    #[derive(Debug, thiserror::Error)]
    #[error("cannot read {path}")]
    struct CauseAsSource {
        path: String,
        source: std::io::Error,
    }

    fn missing() -> std::io::Error {
        std::io::Error::new(std::io::ErrorKind::NotFound, "No such file or directory")
    }

    #[test]
    fn a_cause_appears_once_whether_or_not_the_message_holds_it() {
        let in_message = CauseInMessage {
            path: "a.jpg".into(),
            source: missing(),
        };
        let as_source = CauseAsSource {
            path: "a.jpg".into(),
            source: missing(),
        };
        for err in [&in_message as &dyn std::error::Error, &as_source] {
            assert_eq!(
                describe(err),
                "cannot read a.jpg: No such file or directory"
            );
        }
    }
}
