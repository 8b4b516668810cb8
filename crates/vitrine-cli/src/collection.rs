//! Where a command's answers come from: the store itself, or, while a running
//! service holds the store, that service. The service computes the same
//! engine reports with the same options (`POST …/reports`), so a command
//! prints the same answer either way.

use std::cell::{OnceCell, RefCell};
use std::io::Read;
use std::path::Path;
use std::time::{Duration, Instant};

use anyhow::{anyhow, bail, Context, Result};
use serde::de::DeserializeOwned;
use vitrine_engine::catalog::Catalog;
use vitrine_engine::clusters::{cluster_collection, ClusterOptions, ClusterReport};
use vitrine_engine::decisions::{self, DecisionState, LoggedDecision, Request};
use vitrine_engine::duplicates::{
    find_duplicates, find_leaks_verified, DuplicateOptions, DuplicateReport, LeakOptions,
    LeakReport,
};
use vitrine_engine::labels::{
    find_label_suspects, suggest_labels, LabelOptions, SuggestionReport, SuspectReport,
};
use vitrine_engine::neighbours::{nearest_to_image, nearest_to_vector, Neighbour, NeighbourFilter};
use vitrine_engine::questions::{NeighbourQuery, Question};
use vitrine_engine::status::{CollectionStatus, StatusSource};
use vitrine_service::discovery::ServedBy;
use vitrine_store::{Store, StoreError};

use crate::session::Session;

/// What the command line asks of a collection, and the decisions it records.
pub trait Collection {
    fn status(&self, list_errors: bool) -> Result<CollectionStatus>;
    /// The model that made the collection's embeddings, as status names it.
    fn model(&self) -> Result<String>;
    fn neighbours(
        &self,
        of: NeighbourQuery,
        k: usize,
        filter: &NeighbourFilter,
    ) -> Result<Vec<Neighbour>>;
    fn duplicates(&self, options: &DuplicateOptions) -> Result<DuplicateReport>;
    fn leaks(&self, options: &LeakOptions) -> Result<LeakReport>;
    fn clusters(&self, options: &ClusterOptions) -> Result<ClusterReport>;
    fn label_suggestions(&self, options: &LabelOptions) -> Result<SuggestionReport>;
    fn label_suspects(&self, options: &LabelOptions) -> Result<SuspectReport>;
    /// Checks and records a person's decision (durable when this returns).
    fn decide(&self, by: &str, request: Request) -> Result<LoggedDecision>;
    /// The decision log, in the order the decisions were made.
    fn decisions(&self) -> Result<Vec<LoggedDecision>>;
    /// The clean training list as CSV `path,split,label`.
    fn manifest_csv(&self) -> Result<Vec<u8>>;
}

/// The collection of `--store`: opened here, or reached through the service
/// that holds it.
pub fn open(session: &Session) -> Result<Box<dyn Collection + '_>> {
    let dir = &session.global.store;
    // Asked first: opening a store that is in use waits for its lock.
    if let Some(served) = ServedBy::read(dir)? {
        let service = ServedCollection::new(served, session.settings.serve.effective_token());
        if service.answers() {
            eprintln!(
                "note: the service at {} holds this store; asking it (process {})",
                service.served.url, service.served.pid
            );
            return Ok(Box::new(service));
        }
    }
    match Store::open(dir) {
        Ok(store) => Ok(Box::new(LocalCollection::new(session, store)?)),
        Err(err) => Err(opening_failed(dir, err)),
    }
}

/// Why a store could not be opened for a command that needs the store
/// itself (it writes, or reads more than the service answers), with what to
/// do when a running service holds it.
pub fn opening_failed(dir: &Path, err: StoreError) -> anyhow::Error {
    // The record is only a hint here: a missing or unreadable one leaves the
    // store's own error to speak.
    let served = match &err {
        StoreError::InUse { .. } => ServedBy::read(dir)
            .ok()
            .flatten()
            .filter(|served| ServedCollection::new(served.clone(), None).answers()),
        _ => None,
    };
    match served {
        Some(served) => anyhow!(
            "{err}: the service at {} (process {}) holds it; stop the service to run this \
             command (to index while it runs, ask it: `POST /api/v1/collections/{}/jobs/rescan`, \
             with its token)",
            served.url,
            served.pid,
            served.collection
        ),
        None => {
            anyhow::Error::new(err).context(format!("while opening collection {}", dir.display()))
        }
    }
}

struct LocalCollection<'a> {
    session: &'a Session,
    store: Store,
    catalog: Catalog,
    /// The decision log, replayed once for all the decisions of one command.
    decisions: RefCell<Option<DecisionState>>,
}

impl<'a> LocalCollection<'a> {
    fn new(session: &'a Session, store: Store) -> Result<Self> {
        let catalog = Catalog::load(&store)?;
        Ok(Self {
            session,
            store,
            catalog,
            decisions: RefCell::new(None),
        })
    }
}

impl Collection for LocalCollection<'_> {
    fn status(&self, list_errors: bool) -> Result<CollectionStatus> {
        let errors = self.store.errors()?;
        Ok(CollectionStatus::new(
            &StatusSource {
                catalog: &self.catalog,
                errors: &errors,
                fingerprint: self.store.fingerprint(),
                roots: &self.store.roots(),
                index_disk_bytes: self.store.index_disk_bytes(),
                decisions: DecisionState::load(&self.store, &self.catalog)?.counts(),
            },
            list_errors,
        ))
    }

    fn model(&self) -> Result<String> {
        Ok(self.store.fingerprint().to_string())
    }

    fn neighbours(
        &self,
        of: NeighbourQuery,
        k: usize,
        filter: &NeighbourFilter,
    ) -> Result<Vec<Neighbour>> {
        let (store, catalog) = (&self.store, &self.catalog);
        Ok(match of {
            NeighbourQuery::Image(id) => nearest_to_image(store, catalog, id, k, filter)?,
            NeighbourQuery::Path(path) => {
                nearest_to_image(store, catalog, catalog.id_of_path(&path)?, k, filter)?
            }
            NeighbourQuery::Vector(vector) => {
                nearest_to_vector(store, catalog, &vector, k, filter, None)?
            }
        })
    }

    fn duplicates(&self, options: &DuplicateOptions) -> Result<DuplicateReport> {
        let verifier = self.session.verifier(&self.store, options);
        Ok(find_duplicates(
            &self.store,
            &self.catalog,
            options,
            verifier.as_ref(),
        )?)
    }

    fn leaks(&self, options: &LeakOptions) -> Result<LeakReport> {
        let verifier = self.session.verifier(&self.store, &options.duplicates);
        Ok(find_leaks_verified(
            &self.store,
            &self.catalog,
            options,
            verifier.as_ref(),
        )?)
    }

    fn clusters(&self, options: &ClusterOptions) -> Result<ClusterReport> {
        Ok(cluster_collection(&self.catalog, options)?)
    }

    fn label_suggestions(&self, options: &LabelOptions) -> Result<SuggestionReport> {
        Ok(suggest_labels(&self.store, &self.catalog, options)?)
    }

    fn label_suspects(&self, options: &LabelOptions) -> Result<SuspectReport> {
        Ok(find_label_suspects(&self.store, &self.catalog, options)?)
    }

    fn decide(&self, by: &str, request: Request) -> Result<LoggedDecision> {
        let action = request.resolve(&self.catalog)?;
        let mut state = self.decisions.borrow_mut();
        let state = match &mut *state {
            Some(state) => state,
            empty => empty.insert(DecisionState::load(&self.store, &self.catalog)?),
        };
        Ok(decisions::record(
            &self.store,
            &self.catalog,
            state,
            by,
            action,
            None,
        )?)
    }

    fn decisions(&self) -> Result<Vec<LoggedDecision>> {
        Ok(DecisionState::load(&self.store, &self.catalog)?.log)
    }

    fn manifest_csv(&self) -> Result<Vec<u8>> {
        let state = DecisionState::load(&self.store, &self.catalog)?;
        let mut csv = Vec::new();
        decisions::write_manifest(&decisions::clean_manifest(&self.catalog, &state), &mut csv)?;
        Ok(csv)
    }
}

/// How long a command keeps asking a service that is still computing (it
/// answers `request_timeout` after its own request limit and keeps working)
/// or whose store an index job is writing (`collection_busy`).
const PATIENCE: Duration = Duration::from_secs(3600);

struct ServedCollection {
    served: ServedBy,
    agent: ureq::Agent,
    /// The service's write token, when the configuration or `$VITRINE_TOKEN` has one.
    token: Option<String>,
    /// Without a token: the key the service accepts writes with, asked for once.
    page_key: OnceCell<String>,
}

impl ServedCollection {
    fn new(served: ServedBy, token: Option<String>) -> Self {
        Self {
            served,
            token,
            page_key: OnceCell::new(),
            agent: ureq::AgentBuilder::new()
                .timeout_connect(Duration::from_secs(5))
                .build(),
        }
    }

    /// Whether the recorded service is up (a record outlives a killed service).
    fn answers(&self) -> bool {
        self.agent
            .get(&format!("{}/healthz", self.served.url))
            .timeout(Duration::from_secs(5))
            .call()
            .is_ok()
    }

    /// The address of `suffix` under this collection's API path.
    fn api(&self, suffix: &str) -> String {
        format!(
            "{}/api/v1/collections/{}{suffix}",
            self.served.url, self.served.collection
        )
    }

    fn page_key(&self) -> Result<&str> {
        #[derive(serde::Deserialize)]
        struct PageKey {
            key: String,
        }
        if let Some(key) = self.page_key.get() {
            return Ok(key);
        }
        let fetched: PageKey = self.get(&format!("{}/api/v1/page-key", self.served.url))?;
        Ok(self.page_key.get_or_init(|| fetched.key))
    }

    fn get<T: DeserializeOwned>(&self, url: &str) -> Result<T> {
        self.answer(self.agent.get(url).call())
    }

    /// The response of a call that succeeded, else the service's error in its own words.
    fn success(&self, outcome: Result<ureq::Response, ureq::Error>) -> Result<ureq::Response> {
        match outcome {
            Ok(response) => Ok(response),
            Err(ureq::Error::Status(status, response)) => {
                let (_, message) = error_of(response);
                bail!(
                    "{message} (answered by the service at {}, {status})",
                    self.served.url
                )
            }
            Err(ureq::Error::Transport(transport)) => bail!(
                "the service at {} (process {}) that holds this store stopped answering: \
                 {transport}",
                self.served.url,
                self.served.pid
            ),
        }
    }

    fn answer<T: DeserializeOwned>(
        &self,
        outcome: Result<ureq::Response, ureq::Error>,
    ) -> Result<T> {
        self.success(outcome)?.into_json().with_context(|| {
            format!(
                "the service at {} sent an unreadable answer",
                self.served.url
            )
        })
    }

    fn ask<T: DeserializeOwned>(&self, question: &Question) -> Result<T> {
        let url = self.api("/reports");
        let started = Instant::now();
        loop {
            match self.agent.post(&url).send_json(question) {
                Err(ureq::Error::Status(503, response)) if started.elapsed() < PATIENCE => {
                    let (code, message) = error_of(response);
                    if !matches!(code.as_str(), "request_timeout" | "collection_busy") {
                        bail!(
                            "{message} (answered by the service at {}, 503)",
                            self.served.url
                        );
                    }
                    eprintln!("note: {message}; asking again");
                }
                outcome => return self.answer(outcome),
            }
        }
    }
}

/// The `code` and `message` of the service's error body.
fn error_of(response: ureq::Response) -> (String, String) {
    let status = response.status_text().to_owned();
    match response.into_json::<serde_json::Value>() {
        Ok(body) => {
            let field = |name: &str| body["error"][name].as_str().map(str::to_owned);
            (
                field("code").unwrap_or_default(),
                field("message").unwrap_or(status),
            )
        }
        Err(_) => (String::new(), status),
    }
}

impl Collection for ServedCollection {
    fn status(&self, list_errors: bool) -> Result<CollectionStatus> {
        self.ask(&Question::Status { list_errors })
    }

    fn model(&self) -> Result<String> {
        Ok(self.status(false)?.model)
    }

    fn neighbours(
        &self,
        of: NeighbourQuery,
        k: usize,
        filter: &NeighbourFilter,
    ) -> Result<Vec<Neighbour>> {
        self.ask(&Question::Neighbours {
            of,
            k,
            filter: filter.clone(),
        })
    }

    fn duplicates(&self, options: &DuplicateOptions) -> Result<DuplicateReport> {
        self.ask(&Question::Duplicates(options.clone()))
    }

    fn leaks(&self, options: &LeakOptions) -> Result<LeakReport> {
        self.ask(&Question::Leaks(options.clone()))
    }

    fn clusters(&self, options: &ClusterOptions) -> Result<ClusterReport> {
        self.ask(&Question::Clusters(options.clone()))
    }

    fn label_suggestions(&self, options: &LabelOptions) -> Result<SuggestionReport> {
        self.ask(&Question::LabelSuggestions(options.clone()))
    }

    fn label_suspects(&self, options: &LabelOptions) -> Result<SuspectReport> {
        self.ask(&Question::LabelSuspects(options.clone()))
    }

    fn decide(&self, by: &str, request: Request) -> Result<LoggedDecision> {
        let mut body = serde_json::to_value(&request)?;
        body["by"] = by.into();
        let url = self.api("/decisions");
        let call = match &self.token {
            Some(token) => self
                .agent
                .post(&url)
                .set("Authorization", &format!("Bearer {token}")),
            None => self
                .agent
                .post(&url)
                .set("X-Vitrine-Page-Key", self.page_key()?),
        };
        self.answer(call.send_json(body))
    }

    fn decisions(&self) -> Result<Vec<LoggedDecision>> {
        #[derive(serde::Deserialize)]
        struct Log {
            decisions: Vec<LoggedDecision>,
        }
        Ok(self.get::<Log>(&self.api("/decisions"))?.decisions)
    }

    fn manifest_csv(&self) -> Result<Vec<u8>> {
        let response = self.agent.get(&self.api("/manifest")).call();
        let mut csv = Vec::new();
        self.success(response)?
            .into_reader()
            .read_to_end(&mut csv)
            .with_context(|| format!("while reading the training list from {}", self.served.url))?;
        Ok(csv)
    }
}
