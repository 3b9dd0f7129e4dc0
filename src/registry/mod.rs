//! Registered models, their versions and background samples, held in memory
//! for the service and persisted so that every acknowledged registration
//! survives a crash. Pure Rust: the gRPC layer converts into these types.
//!
//! # On-disk layout
//!
//! ```text
//! <dir>/lock                               held locked while a registry is open
//! <dir>/models/<model_id>/v<version>.json  one record per registered version
//! <dir>/models/<model_id>/versions.json    highest version ever assigned (written on delete)
//! <dir>/models/<model_id>/.<name>.tmp      only after an interrupted write
//! ```
//!
//! A record is one compact JSON object:
//! `{ "format": "apportion-model", "format_version": 2, "model_id", "version",
//! "checksum", "registered_unix_ms", "row_cost_ns", "spec": ModelSpec,
//! "record_digest" }`;
//! the spec's `imported` member is present only for a model read from a
//! library's file.
//! `checksum` is the lower-case hex sha256 of the spec's compact JSON
//! ([`spec_checksum`]; what `ModelInfo` reports). `record_digest` is the
//! sha256 of the whole record's compact JSON without `record_digest`, so it
//! covers the header (`row_cost_ns`, `registered_unix_ms`, …), the model, the
//! background and the provenance. Both are verified on load. A format-1
//! record (no `record_digest`) is still read: its checksum is verified, it is
//! served, and it is rewritten as format 2 when the registry opens, so its
//! header is protected from then on (a change made to it before that cannot
//! be detected). The counter is
//! `{ "format": "apportion-version-counter", "format_version": 1, "model_id",
//! "last_version" }`. The next version of a model is one above the highest of
//! the counter and every `v<version>.json` name present, so versions are
//! never reused, across restarts and deletions alike.
//!
//! Every file is written to a temporary name, fsynced, renamed into place and
//! its directory fsynced before the call returns (common practice, no
//! source). On open, a record that does not parse, fails its checksum or
//! validation, or a leftover temporary file, is reported as a
//! [`LoadProblem`] and skipped; it is never served and never fatal.
//!
//! # The PostgreSQL store
//! With a `postgres://` URL ([`Registry::open_postgres`]) the same records
//! are kept as rows of a table instead, for several replicas sharing one
//! registry; see the `postgres` module. The directory is the default.
//!
//! # Layout
//! - `spec`: the registration as submitted and stored (serde types).
//! - `validate`: limits, checks, building the model, measuring its row cost
//!   and deriving the [`PreparedModel`] (at registration and on every load).
//! - `store`: the crash-safe files, and the record encoding both stores use.
//! - `postgres`: the PostgreSQL store and the thread that talks to it.
//! - here: [`Registry`], its entries and errors.

mod postgres;
mod spec;
mod store;
mod validate;

pub use postgres::{CHANGES_CHANNEL, StoreUrl};

pub use spec::{
    Background, Decision, FeatureSpec, ImportFormat, ImportSpec, LinkSpec, ModelBody, ModelSpec,
    TreeBody,
};
pub use store::{
    FORMAT_VERSION, MAX_RECORD_FILE_BYTES, data_dir_from, default_data_dir, spec_checksum,
};
pub use validate::{
    MAX_BACKGROUND_BYTES, MAX_BACKGROUND_ROWS, MAX_DESCRIPTION_BYTES, MAX_FEATURES,
    MAX_MODEL_ID_CHARS, MAX_ONNX_BYTES, MAX_TEXT_BYTES, MAX_TREE_NODES, check_model_id,
};

use std::collections::{BTreeMap, HashMap};
use std::fmt;
use std::path::{Path, PathBuf};
use std::sync::{Arc, Mutex, PoisonError, RwLock};
use std::time::{Duration, SystemTime, UNIX_EPOCH};

use ndarray::ArrayView2;

use crate::engine::{EngineError, ErrorKind, Players, PreparedModel};
use crate::model::{Link, Model};
use store::{Record, Store};

/// What the registry reports about one registered version.
#[derive(Debug, Clone, PartialEq)]
pub struct ModelInfo {
    pub model_id: String,
    pub version: u64,
    pub features: Vec<FeatureSpec>,
    pub background_rows: usize,
    /// [`Model::kind`]: `linear`, `trees` or `onnx-graph`.
    pub model_kind: &'static str,
    pub link: Link,
    /// Measured at registration: time of one model row in a batched
    /// prediction over the background, in nanoseconds.
    pub row_cost_ns: f64,
    /// Time spent deriving the prepared model (at registration, and again
    /// on each load), in milliseconds.
    pub preparation_ms: f64,
    /// Heap bytes of what preparation derived from the model and
    /// background (statistics, factorizations, tree summaries).
    pub prepared_bytes: u64,
    pub registered_unix_ms: u64,
    /// See [`spec_checksum`].
    pub checksum: String,
    pub description: String,
    /// The file, objective and class an imported model was read from; `None`
    /// for a native registration.
    pub imported: Option<ImportSpec>,
    /// The output an ONNX graph evaluated as it is reads (empty: its first).
    pub graph_output: Option<String>,
    /// How the decision is taken; `None`: higher is favourable.
    pub decision: Option<Decision>,
}

/// One registered version, ready to explain with. Shared as `Arc<Entry>`;
/// it never changes after registration.
pub struct Entry {
    info: ModelInfo,
    body: ModelBody,
    prepared: Arc<PreparedModel>,
    reason_codes: Vec<String>,
    reason_statements: Vec<String>,
}

impl fmt::Debug for Entry {
    fn fmt(&self, formatter: &mut fmt::Formatter<'_>) -> fmt::Result {
        formatter
            .debug_struct("Entry")
            .field("info", &self.info)
            .field("players", &self.prepared.players().names())
            .finish_non_exhaustive()
    }
}

impl Entry {
    pub fn info(&self) -> &ModelInfo {
        &self.info
    }

    /// The model with everything derived from it and its background, as
    /// requests borrow it.
    pub fn prepared(&self) -> &Arc<PreparedModel> {
        &self.prepared
    }

    pub fn model(&self) -> &Arc<dyn Model> {
        self.prepared.shared_model()
    }

    pub fn players(&self) -> &Players {
        self.prepared.players()
    }

    /// Background rows × features.
    pub fn background(&self) -> ArrayView2<'_, f64> {
        self.prepared.background()
    }

    /// Reason code per player (empty when none was registered).
    pub fn reason_codes(&self) -> &[String] {
        &self.reason_codes
    }

    /// Reason statement per player, as [`crate::reasons::principal_reasons`]
    /// takes them; empty for a player that is never listed as a reason.
    pub fn reason_statements(&self) -> &[String] {
        &self.reason_statements
    }

    /// The registration as submitted, rebuilt on demand so the background
    /// is held in memory once. Its [`spec_checksum`] is `info().checksum`.
    pub fn spec(&self) -> ModelSpec {
        let background = self.background();
        ModelSpec {
            model_id: self.info.model_id.clone(),
            features: self.info.features.clone(),
            model: self.body.clone(),
            link: self.info.link.into(),
            background: Background {
                rows: background.nrows(),
                cols: background.ncols(),
                values: background.iter().copied().collect(),
            },
            description: self.info.description.clone(),
            imported: self.info.imported.clone(),
            decision: self.info.decision,
        }
    }
}

#[cfg(test)]
impl Registry {
    /// Unit tests only (not compiled into the library): serves `spec` as
    /// version 1 with its model replaced by `model`, in memory only, so the
    /// service's tests can run a model that misbehaves. No API reaches it.
    /// `row_cost_ns` steers the planner, and so whether a call computes
    /// inline or on the compute pool.
    pub(crate) fn serve_with_model_for_test(
        &self,
        spec: ModelSpec,
        model: Arc<dyn Model>,
        row_cost_ns: f64,
    ) {
        let mut validated = validate::validate(spec, None).expect("a valid test spec");
        validated.model = model;
        let entry = validated
            .into_entry(row_cost_ns)
            .expect("a preparable test model");
        let model_id = entry.info.model_id.clone();
        let mut entry = entry;
        entry.info.version = 1;
        self.models
            .write()
            .unwrap_or_else(PoisonError::into_inner)
            .entry(model_id)
            .or_default()
            .insert(1, Arc::new(entry));
    }
}

/// A record skipped on load, and why; or a format-1 record that was served
/// but could not be rewritten with a record digest (the reason says so).
#[derive(Debug, Clone, PartialEq, Eq)]
pub struct LoadProblem {
    /// The file, or for the PostgreSQL store the row written like a path
    /// (`postgres://HOST:PORT/DATABASE/apportion_models/MODEL_ID/vVERSION`).
    pub path: PathBuf,
    pub reason: String,
}

impl fmt::Display for LoadProblem {
    fn fmt(&self, formatter: &mut fmt::Formatter<'_>) -> fmt::Result {
        write!(formatter, "{}: {}", self.path.display(), self.reason)
    }
}

/// Why the registry refused a call. Nothing is changed when one is returned,
/// except where [`RegistryError::Io`] says otherwise for a partial delete.
#[derive(Debug, thiserror::Error)]
pub enum RegistryError {
    /// The spec is invalid; the engine error names the field.
    #[error("{0}")]
    Invalid(#[from] EngineError),
    #[error("{field}: {actual} {unit} exceed the limit of {limit}; {fix}")]
    TooLarge {
        field: String,
        actual: u64,
        limit: u64,
        unit: &'static str,
        fix: &'static str,
    },
    /// `version` 0 means "any version".
    #[error(
        "model_id {model_id:?}{}: not registered; list the registry for the registered models and versions",
        if *version == 0 { String::new() } else { format!(" version {version}") }
    )]
    NotFound { model_id: String, version: u64 },
    #[error(
        "{}: another registry holds this data directory; stop it or configure a different directory",
        path.display()
    )]
    InUse { path: PathBuf },
    #[error(
        "{}: could not {action}: {source}; check that the data directory is writable and has free space",
        path.display()
    )]
    Io {
        path: PathBuf,
        action: &'static str,
        source: std::io::Error,
    },
    /// The PostgreSQL store did not answer or refused; `store` shows the
    /// hosts and database only, never the credentials.
    #[error(
        "registry store {store}: could not {action}: {message}; check that the PostgreSQL server \
         is running and reachable from here"
    )]
    Database {
        store: String,
        action: &'static str,
        message: String,
    },
}

impl RegistryError {
    /// Whose fault the error is.
    pub fn kind(&self) -> ErrorKind {
        match self {
            RegistryError::Invalid(error) => error.kind,
            RegistryError::TooLarge { .. } => ErrorKind::InvalidArgument,
            RegistryError::NotFound { .. } => ErrorKind::NotFound,
            // Storage trouble is the operator's to fix and may pass.
            RegistryError::InUse { .. }
            | RegistryError::Io { .. }
            | RegistryError::Database { .. } => ErrorKind::Unavailable,
        }
    }

    /// The request field at fault, if the error is about one.
    pub fn field(&self) -> Option<&str> {
        match self {
            RegistryError::Invalid(error) => Some(&error.field),
            RegistryError::TooLarge { field, .. } => Some(field),
            RegistryError::NotFound { version: 0, .. } => Some("model_id"),
            RegistryError::NotFound { .. } => Some("version"),
            RegistryError::InUse { .. }
            | RegistryError::Io { .. }
            | RegistryError::Database { .. } => None,
        }
    }
}

pub type Result<T> = std::result::Result<T, RegistryError>;

fn unix_ms_now() -> u64 {
    SystemTime::now()
        .duration_since(UNIX_EPOCH)
        .map(|since| since.as_millis() as u64)
        .unwrap_or(0)
}

type Versions = BTreeMap<u64, Arc<Entry>>;

/// The served models; shared with the PostgreSQL store's thread, which
/// applies the changes other replicas make.
type Models = Arc<RwLock<BTreeMap<String, Versions>>>;

/// Takes the `removed` versions of `model_id` out of the served models (and
/// the id, once it has none left).
fn stop_serving(models: &Models, model_id: &str, removed: &[u64]) {
    let mut models = models.write().unwrap_or_else(PoisonError::into_inner);
    if let Some(versions) = models.get_mut(model_id) {
        for version in removed {
            versions.remove(version);
        }
        if versions.is_empty() {
            models.remove(model_id);
        }
    }
}

/// The registered models. Reads take a shared lock for a map lookup only;
/// writes are serialised (by a mutex for the directory, by the database
/// thread for PostgreSQL) and do their I/O without holding the map lock.
pub struct Registry {
    backend: Backend,
    models: Models,
}

/// Where the records are kept.
enum Backend {
    Directory {
        store: Store,
        /// Highest version ever assigned per model id, on disk or in memory.
        writer: Mutex<HashMap<String, u64>>,
    },
    /// Boxed: the parsed URL makes it several times the directory's size.
    Postgres(Box<postgres::PostgresStore>),
}

impl fmt::Debug for Registry {
    fn fmt(&self, formatter: &mut fmt::Formatter<'_>) -> fmt::Result {
        let mut debug = formatter.debug_struct("Registry");
        match &self.backend {
            Backend::Directory { store, .. } => debug.field("dir", &store.root()),
            Backend::Postgres(store) => debug.field("store", store.url()),
        };
        debug.finish_non_exhaustive()
    }
}

/// A verified record as a served entry: its spec validated against its
/// checksum and prepared, its version and registration time restored.
fn entry_from_record(record: Record<ModelSpec>) -> Result<Entry> {
    let mut entry = validate::validate(record.spec, Some(record.checksum))
        .and_then(|validated| validated.into_entry(record.row_cost_ns))?;
    entry.info.version = record.version;
    entry.info.registered_unix_ms = record.registered_unix_ms;
    Ok(entry)
}

impl Registry {
    /// Opens (creating if needed) the registry in `dir` and loads every
    /// record. Files that cannot be served are returned as problems.
    pub fn open(dir: impl AsRef<Path>) -> Result<(Registry, Vec<LoadProblem>)> {
        let store = Store::open(dir.as_ref())?;
        let mut scan = store.scan()?;
        let mut models: BTreeMap<String, Versions> = BTreeMap::new();
        for loaded in std::mem::take(&mut scan.records) {
            let record = loaded.record;
            let (model_id, version) = (record.model_id.clone(), record.version);
            let (format_version, registered_unix_ms, row_cost_ns) = (
                record.format_version,
                record.registered_unix_ms,
                record.row_cost_ns,
            );
            match entry_from_record(record) {
                Ok(entry) => {
                    if format_version == store::LEGACY_FORMAT_VERSION {
                        // A format-1 record's header is trusted this once
                        // (its spec passed its checksum) and sealed with a
                        // whole-record digest, so a later change is caught.
                        let spec = entry.spec();
                        let upgraded = Record {
                            format: String::new(),
                            format_version: FORMAT_VERSION,
                            model_id: model_id.clone(),
                            version,
                            checksum: entry.info.checksum.clone(),
                            registered_unix_ms,
                            row_cost_ns,
                            spec: &spec,
                            record_digest: String::new(),
                        };
                        if let Err(error) = store.write_record(upgraded) {
                            scan.problem(
                                &loaded.path,
                                &format!(
                                    "a format-1 record, served, but it could not be rewritten \
                                     with a record digest ({error}); its header stays unprotected \
                                     until the directory is writable and the server restarts"
                                ),
                            );
                        }
                    }
                    models
                        .entry(model_id)
                        .or_default()
                        .insert(version, Arc::new(entry));
                }
                Err(error) => scan.problem(
                    &loaded.path,
                    &format!("the stored spec fails validation: {error}"),
                ),
            }
        }
        let registry = Registry {
            backend: Backend::Directory {
                store,
                writer: Mutex::new(scan.last_versions.into_iter().collect()),
            },
            models: Arc::new(RwLock::new(models)),
        };
        Ok((registry, scan.problems))
    }

    /// Opens the registry kept in the PostgreSQL database at `url`: migrates
    /// its schema, loads every record, and from then on follows the changes
    /// other replicas make (on NOTIFY, and by a full re-read every
    /// `reread`). Records that cannot be served are returned as problems.
    pub fn open_postgres(url: &StoreUrl, reread: Duration) -> Result<(Registry, Vec<LoadProblem>)> {
        let models: Models = Arc::default();
        let (store, problems) = postgres::PostgresStore::open(url, reread, models.clone())?;
        let registry = Registry {
            backend: Backend::Postgres(Box::new(store)),
            models,
        };
        Ok((registry, problems))
    }

    /// Opens the registry in [`default_data_dir`].
    pub fn open_default() -> Result<(Registry, Vec<LoadProblem>)> {
        let dir = default_data_dir().ok_or_else(|| RegistryError::Io {
            path: PathBuf::from("$HOME"),
            action: "find a data directory",
            source: std::io::Error::new(
                std::io::ErrorKind::NotFound,
                "neither XDG_DATA_HOME nor HOME is set to an absolute path",
            ),
        })?;
        Registry::open(dir)
    }

    /// The data directory; `None` for the PostgreSQL store.
    pub fn dir(&self) -> Option<&Path> {
        match &self.backend {
            Backend::Directory { store, .. } => Some(store.root()),
            Backend::Postgres(_) => None,
        }
    }

    /// Validates `spec`, measures its row cost, assigns the next version and
    /// persists it durably; only then is it served.
    pub fn register(&self, spec: ModelSpec) -> Result<ModelInfo> {
        let validated = validate::validate(spec, None)?;
        validate::check_outputs(validated.model.as_ref(), validated.background.view())?;
        let row_cost_ns =
            validate::measure_row_cost(validated.model.as_ref(), validated.background.view());
        let mut entry = validated.into_entry(row_cost_ns)?;
        entry.info.registered_unix_ms = unix_ms_now();
        let (store, writer) = match &self.backend {
            Backend::Directory { store, writer } => (store, writer),
            Backend::Postgres(store) => return store.register(entry),
        };
        let model_id = entry.info.model_id.clone();

        let mut last_versions = writer.lock().unwrap_or_else(PoisonError::into_inner);
        // On a case-insensitive file system these would share a directory.
        if let Some(other) = last_versions
            .keys()
            .find(|other| **other != model_id && other.eq_ignore_ascii_case(&model_id))
        {
            return Err(EngineError::new(
                "model_id",
                format!("differs from the registered {other:?} only in letter case; use {other:?} or another name"),
            )
            .into());
        }
        let last = last_versions.get(&model_id).copied().unwrap_or(0);
        let Some(version) = last.checked_add(1) else {
            return Err(EngineError::new(
                "model_id",
                "has used up every version number; use a new id",
            )
            .into());
        };
        // Consumed even if the write fails: a file may have reached the disk.
        last_versions.insert(model_id.clone(), version);
        entry.info.version = version;

        let spec = entry.spec();
        let record = Record {
            format: String::new(),
            format_version: FORMAT_VERSION,
            model_id: model_id.clone(),
            version,
            checksum: entry.info.checksum.clone(),
            registered_unix_ms: entry.info.registered_unix_ms,
            row_cost_ns,
            spec: &spec,
            record_digest: String::new(),
        };
        if let Err(error) = store.write_record(record) {
            store.discard_record(&model_id, version);
            return Err(error);
        }
        drop(spec);
        let info = entry.info.clone();
        self.models
            .write()
            .unwrap_or_else(PoisonError::into_inner)
            .entry(model_id)
            .or_default()
            .insert(version, Arc::new(entry));
        Ok(info)
    }

    /// The given version, or the latest when `version` is 0.
    pub fn get(&self, model_id: &str, version: u64) -> Result<Arc<Entry>> {
        let models = self.models.read().unwrap_or_else(PoisonError::into_inner);
        let versions = models.get(model_id);
        let found = match version {
            0 => versions.and_then(|versions| versions.values().next_back()),
            _ => versions.and_then(|versions| versions.get(&version)),
        };
        found.cloned().ok_or_else(|| RegistryError::NotFound {
            model_id: model_id.to_string(),
            version,
        })
    }

    /// Every served version, sorted by model id then version.
    pub fn list(&self) -> Vec<ModelInfo> {
        let models = self.models.read().unwrap_or_else(PoisonError::into_inner);
        models
            .values()
            .flat_map(|versions| versions.values().map(|entry| entry.info.clone()))
            .collect()
    }

    /// Deletes one version, or all of them when `version` is 0, from disk
    /// (durably) or the database (in one transaction), and then from
    /// memory. Returns how many were deleted.
    pub fn delete(&self, model_id: &str, version: u64) -> Result<usize> {
        let (store, writer) = match &self.backend {
            Backend::Directory { store, writer } => (store, writer),
            Backend::Postgres(store) => return store.delete(model_id, version),
        };
        let last_versions = writer.lock().unwrap_or_else(PoisonError::into_inner);
        let doomed: Vec<u64> = {
            let models = self.models.read().unwrap_or_else(PoisonError::into_inner);
            match models.get(model_id) {
                Some(versions) if version == 0 => versions.keys().copied().collect(),
                Some(versions) if versions.contains_key(&version) => vec![version],
                _ => Vec::new(),
            }
        };
        if doomed.is_empty() {
            return Err(RegistryError::NotFound {
                model_id: model_id.to_string(),
                version,
            });
        }
        // Record the highest version first, so it outlives the files that
        // carried it.
        let last = last_versions.get(model_id).copied().unwrap_or(0);
        store.write_counter(model_id, last)?;
        let (removed, failure) = store.remove_records(model_id, &doomed);
        stop_serving(&self.models, model_id, &removed);
        drop(last_versions);
        match failure {
            Some(error) => Err(error),
            None => Ok(removed.len()),
        }
    }
}
