//! The registry's files: durable writes and deletes, the content checksum,
//! and the scan that reads every record back on start. The layout is
//! described in the parent module's documentation.
//!
//! Durability follows common practice (no source): write a temporary file in
//! the same directory, fsync it, rename it over the final name, fsync the
//! directory. A rename within one directory is atomic, so a reader sees the
//! old state or the new one, never half a file.

use std::collections::BTreeMap;
use std::ffi::OsString;
use std::fs::{self, File};
use std::io::{self, BufWriter, Write};
use std::path::{Path, PathBuf};

use serde::{Deserialize, Serialize};
use sha2::{Digest, Sha256};

use super::{LoadProblem, ModelSpec, RegistryError, check_model_id};

/// `format` of a model record.
const RECORD_FORMAT: &str = "apportion-model";
/// `format` of a per-model version counter.
const COUNTER_FORMAT: &str = "apportion-version-counter";
/// The record layout this build writes: version 2 adds `record_digest`,
/// which covers every byte that is served (header, model, background,
/// provenance), where version 1's `checksum` covers the spec only.
pub const FORMAT_VERSION: u32 = 2;
/// The earlier record layout, still read (its content checksum verified) and
/// rewritten as [`FORMAT_VERSION`] when the registry opens.
pub const LEGACY_FORMAT_VERSION: u32 = 1;
/// The counter's layout has not changed.
const COUNTER_FORMAT_VERSION: u32 = 1;

const MODELS_DIR: &str = "models";
const COUNTER_FILE: &str = "versions.json";
const LOCK_FILE: &str = "lock";
const TEMP_SUFFIX: &str = ".tmp";

/// Records larger than this are refused unread. Values in JSON take about
/// three times their binary size, so this leaves room for the largest
/// background the registry accepts.
pub const MAX_RECORD_FILE_BYTES: u64 = 512 * 1024 * 1024;

/// The data directory used when none is configured:
/// `$XDG_DATA_HOME/apportion`, else `$HOME/.local/share/apportion`.
pub fn default_data_dir() -> Option<PathBuf> {
    data_dir_from(std::env::var_os("XDG_DATA_HOME"), std::env::var_os("HOME"))
}

/// [`default_data_dir`] with the two variables given. Per the XDG Base
/// Directory Specification (freedesktop.org), an unset, empty or relative
/// `XDG_DATA_HOME` is ignored in favour of `$HOME/.local/share`.
pub fn data_dir_from(xdg_data_home: Option<OsString>, home: Option<OsString>) -> Option<PathBuf> {
    let usable =
        |value: Option<OsString>| value.map(PathBuf::from).filter(|path| path.is_absolute());
    if let Some(base) = usable(xdg_data_home) {
        return Some(base.join("apportion"));
    }
    usable(home).map(|home| home.join(".local").join("share").join("apportion"))
}

/// The on-disk record of one registered model version.
#[derive(Debug, Serialize, Deserialize)]
pub(crate) struct Record<S> {
    pub format: String,
    pub format_version: u32,
    pub model_id: String,
    pub version: u64,
    pub checksum: String,
    pub registered_unix_ms: u64,
    pub row_cost_ns: f64,
    pub spec: S,
    /// The sha256 (lower-case hex) of this record's compact JSON written
    /// without this member ([`record_digest`]). Empty only in a format-1
    /// record, which is then written without it.
    #[serde(default, skip_serializing_if = "String::is_empty")]
    pub record_digest: String,
}

/// A `Write` that only hashes what it is given.
struct HashWriter(Sha256);

impl Write for HashWriter {
    fn write(&mut self, bytes: &[u8]) -> io::Result<usize> {
        self.0.update(bytes);
        Ok(bytes.len())
    }
    fn flush(&mut self) -> io::Result<()> {
        Ok(())
    }
}

/// The sha256 (lower-case hex) of `value`'s compact JSON.
fn json_sha256(value: &impl Serialize) -> serde_json::Result<String> {
    let mut writer = HashWriter(Sha256::new());
    serde_json::to_writer(&mut writer, value)?;
    let digest = writer.0.finalize();
    Ok(digest.iter().map(|byte| format!("{byte:02x}")).collect())
}

/// The whole-record digest: the sha256 of the record's compact JSON with
/// `record_digest` left out (an empty one is not written). It is computed
/// over what was parsed, so any change that alters a served value — a
/// header digit, a background value, a dropped `imported` member — fails it,
/// and the JSON numbers round-trip exactly (serde_json's `float_roundtrip`).
pub(crate) fn record_digest<S: Serialize>(record: &Record<S>) -> serde_json::Result<String> {
    // The same record with an empty digest (serde then skips it); the spec
    // is borrowed, the short header strings copied.
    let unsealed = Record {
        format: record.format.clone(),
        format_version: record.format_version,
        model_id: record.model_id.clone(),
        version: record.version,
        checksum: record.checksum.clone(),
        registered_unix_ms: record.registered_unix_ms,
        row_cost_ns: record.row_cost_ns,
        spec: &record.spec,
        record_digest: String::new(),
    };
    json_sha256(&unsealed)
}

/// `record` as [`FORMAT_VERSION`] with its whole-record digest, whatever
/// `format`, `format_version` and `record_digest` the caller set.
fn seal<S: Serialize>(record: Record<S>) -> serde_json::Result<Record<S>> {
    let mut record = Record {
        format: RECORD_FORMAT.to_string(),
        format_version: FORMAT_VERSION,
        record_digest: String::new(),
        ..record
    };
    record.record_digest = record_digest(&record)?;
    Ok(record)
}

/// The bytes of `record` as a record file holds them: sealed as
/// [`FORMAT_VERSION`] with its digest. Other stores keep records in this
/// same form, so [`decode_record`] verifies them the same way.
pub(crate) fn encode_record(record: Record<&ModelSpec>) -> serde_json::Result<Vec<u8>> {
    serde_json::to_vec(&seal(record)?)
}

/// The highest version ever assigned to a model, kept so deleted versions
/// are never reused.
#[derive(Debug, Serialize, Deserialize)]
struct Counter {
    format: String,
    format_version: u32,
    model_id: String,
    last_version: u64,
}

/// The sha256 (lower-case hex) of the spec's compact JSON serialisation.
/// Fields are written in declaration order and numbers in their shortest
/// round-trip form, so equal specs always give equal bytes.
pub fn spec_checksum(spec: &ModelSpec) -> Result<String, RegistryError> {
    json_sha256(spec).map_err(|source| RegistryError::Io {
        path: PathBuf::new(),
        action: "serialise the model spec for its checksum",
        source: source.into(),
    })
}

/// Serde for a background's values: NaN (a missing value) is written as
/// `null` and read back as NaN, since JSON has no NaN. Infinities never get
/// here: registration refuses them.
pub(crate) mod missing_as_null {
    use serde::{Deserialize, Deserializer, Serializer};

    pub fn serialize<S: Serializer>(values: &[f64], serializer: S) -> Result<S::Ok, S::Error> {
        serializer.collect_seq(values.iter().map(|v| (!v.is_nan()).then_some(*v)))
    }

    pub fn deserialize<'de, D: Deserializer<'de>>(deserializer: D) -> Result<Vec<f64>, D::Error> {
        let values = Vec::<Option<f64>>::deserialize(deserializer)?;
        Ok(values.into_iter().map(|v| v.unwrap_or(f64::NAN)).collect())
    }
}

/// Serde for model bytes: lower-case hex, two characters a byte.
pub(crate) mod bytes_as_hex {
    use serde::de::Error;
    use serde::{Deserialize, Deserializer, Serializer};

    pub fn serialize<S: Serializer>(bytes: &[u8], serializer: S) -> Result<S::Ok, S::Error> {
        let mut text = String::with_capacity(bytes.len() * 2);
        for byte in bytes {
            text.push(char::from_digit(u32::from(byte >> 4), 16).unwrap_or('0'));
            text.push(char::from_digit(u32::from(byte & 0xf), 16).unwrap_or('0'));
        }
        serializer.serialize_str(&text)
    }

    pub fn deserialize<'de, D: Deserializer<'de>>(deserializer: D) -> Result<Vec<u8>, D::Error> {
        let text = <&str>::deserialize(deserializer)?;
        if text.len() % 2 != 0 {
            return Err(D::Error::custom("hex text of odd length"));
        }
        text.as_bytes()
            .chunks_exact(2)
            .map(|pair| {
                std::str::from_utf8(pair)
                    .ok()
                    .and_then(|digits| u8::from_str_radix(digits, 16).ok())
                    .ok_or_else(|| D::Error::custom("not hex"))
            })
            .collect()
    }
}

/// A record read back, its checksum verified and its header consistent with
/// its path.
pub(crate) struct LoadedRecord {
    pub path: PathBuf,
    pub record: Record<ModelSpec>,
}

/// Everything found under the data directory.
pub(crate) struct Scan {
    pub records: Vec<LoadedRecord>,
    /// Highest version known per model id: from the counter file and from
    /// every version file name, loadable or not.
    pub last_versions: BTreeMap<String, u64>,
    pub problems: Vec<LoadProblem>,
}

/// The data directory, held locked for the life of the registry so that
/// two processes never assign versions in the same place.
pub(crate) struct Store {
    root: PathBuf,
    models: PathBuf,
    _lock: File,
}

fn io_error(path: &Path, action: &'static str) -> impl FnOnce(io::Error) -> RegistryError {
    let path = path.to_path_buf();
    move |source| RegistryError::Io {
        path,
        action,
        source,
    }
}

impl Store {
    pub fn open(root: &Path) -> Result<Store, RegistryError> {
        ensure_dir(root)?;
        let lock_path = root.join(LOCK_FILE);
        let lock = File::options()
            .create(true)
            .truncate(false)
            .write(true)
            .open(&lock_path)
            .map_err(io_error(&lock_path, "open the lock file"))?;
        match lock.try_lock() {
            Ok(()) => {}
            Err(fs::TryLockError::WouldBlock) => {
                return Err(RegistryError::InUse { path: lock_path });
            }
            // Some network file systems cannot lock; the in-process write
            // lock still serialises this process's writers.
            Err(fs::TryLockError::Error(error)) if error.kind() == io::ErrorKind::Unsupported => {}
            Err(fs::TryLockError::Error(error)) => {
                return Err(io_error(&lock_path, "lock the data directory")(error));
            }
        }
        let models = root.join(MODELS_DIR);
        ensure_dir(&models)?;
        Ok(Store {
            root: root.to_path_buf(),
            models,
            _lock: lock,
        })
    }

    pub fn root(&self) -> &Path {
        &self.root
    }

    fn model_dir(&self, model_id: &str) -> PathBuf {
        self.models.join(model_id)
    }

    /// Writes one model version durably, as [`FORMAT_VERSION`] with its
    /// whole-record digest (whatever `format_version` and `record_digest`
    /// the caller set); returns once it would survive a crash.
    pub fn write_record(&self, record: Record<&ModelSpec>) -> Result<(), RegistryError> {
        let dir = self.model_dir(&record.model_id);
        ensure_dir(&dir)?;
        let path = dir.join(version_file_name(record.version));
        let record = seal(record).map_err(|error| {
            io_error(&path, "serialise the record for its digest")(error.into())
        })?;
        write_durably(&dir, &version_file_name(record.version), |writer| {
            serde_json::to_writer(writer, &record).map_err(io::Error::from)
        })
    }

    /// Removes a record written by a registration that then failed, so an
    /// unacknowledged model does not come back on the next start.
    pub fn discard_record(&self, model_id: &str, version: u64) {
        let dir = self.model_dir(model_id);
        let _ = fs::remove_file(dir.join(version_file_name(version)));
        let _ = sync_dir(&dir);
    }

    /// Records `last_version` durably, so versions up to it are never reused
    /// once their files are gone.
    pub fn write_counter(&self, model_id: &str, last_version: u64) -> Result<(), RegistryError> {
        let dir = self.model_dir(model_id);
        ensure_dir(&dir)?;
        let counter = Counter {
            format: COUNTER_FORMAT.to_string(),
            format_version: COUNTER_FORMAT_VERSION,
            model_id: model_id.to_string(),
            last_version,
        };
        write_durably(&dir, COUNTER_FILE, |writer| {
            serde_json::to_writer(writer, &counter).map_err(io::Error::from)
        })
    }

    /// Unlinks the given versions, then fsyncs the directory once. Returns
    /// the versions removed and, if one failed, the error (the ones before
    /// it stay removed).
    pub fn remove_records(
        &self,
        model_id: &str,
        versions: &[u64],
    ) -> (Vec<u64>, Option<RegistryError>) {
        let dir = self.model_dir(model_id);
        let mut removed = Vec::with_capacity(versions.len());
        let mut failure = None;
        for &version in versions {
            let path = dir.join(version_file_name(version));
            match fs::remove_file(&path) {
                Ok(()) => removed.push(version),
                Err(error) if error.kind() == io::ErrorKind::NotFound => removed.push(version),
                Err(error) => {
                    failure = Some(io_error(&path, "delete the model file")(error));
                    break;
                }
            }
        }
        if let Err(error) = sync_dir(&dir) {
            failure.get_or_insert(io_error(&dir, "sync the model directory")(error));
        }
        (removed, failure)
    }

    /// Reads every record; anything unreadable, inconsistent or left over
    /// from an interrupted write becomes a problem and is skipped.
    pub fn scan(&self) -> Result<Scan, RegistryError> {
        let mut scan = Scan {
            records: Vec::new(),
            last_versions: BTreeMap::new(),
            problems: Vec::new(),
        };
        for entry in sorted_entries(&self.models)? {
            let path = entry.path();
            let Some(name) = entry.file_name().to_str().map(str::to_string) else {
                scan.problem(&path, "the name is not valid UTF-8; not a model directory");
                continue;
            };
            if !path.is_dir() {
                let why = if is_temp_name(&name) {
                    "a temporary file left by an interrupted write; ignored (safe to delete)"
                } else {
                    "not a model directory; ignored"
                };
                scan.problem(&path, why);
                continue;
            }
            if let Err(error) = check_model_id(&name) {
                scan.problem(
                    &path,
                    &format!("the directory name is not a valid model id ({error}); ignored"),
                );
                continue;
            }
            scan.last_versions.entry(name.clone()).or_insert(0);
            self.scan_model_dir(&name, &path, &mut scan)?;
        }
        Ok(scan)
    }

    fn scan_model_dir(
        &self,
        model_id: &str,
        dir: &Path,
        scan: &mut Scan,
    ) -> Result<(), RegistryError> {
        for entry in sorted_entries(dir)? {
            let path = entry.path();
            let Some(name) = entry.file_name().to_str().map(str::to_string) else {
                scan.problem(&path, "the name is not valid UTF-8; ignored");
                continue;
            };
            if is_temp_name(&name) {
                scan.problem(
                    &path,
                    "a temporary file left by an interrupted write; ignored (safe to delete)",
                );
            } else if name == COUNTER_FILE {
                match read_counter(&path, model_id) {
                    Ok(last) => scan.note_version(model_id, last),
                    Err(why) => scan.problem(&path, &why),
                }
            } else if let Some(version) = parse_version_file_name(&name) {
                // Even an unreadable file keeps its version from being reused.
                scan.note_version(model_id, version);
                match read_record(&path, model_id, version) {
                    Ok(record) => scan.records.push(LoadedRecord { path, record }),
                    Err(why) => scan.problem(&path, &why),
                }
            } else {
                scan.problem(&path, "not a file the registry writes; ignored");
            }
        }
        Ok(())
    }
}

impl Scan {
    pub fn problem(&mut self, path: &Path, reason: &str) {
        self.problems.push(LoadProblem {
            path: path.to_path_buf(),
            reason: reason.to_string(),
        });
    }

    fn note_version(&mut self, model_id: &str, version: u64) {
        let last = self.last_versions.entry(model_id.to_string()).or_insert(0);
        *last = (*last).max(version);
    }
}

fn version_file_name(version: u64) -> String {
    format!("v{version}.json")
}

/// The version of a `v<version>.json` name, written without leading zeros.
fn parse_version_file_name(name: &str) -> Option<u64> {
    let digits = name.strip_prefix('v')?.strip_suffix(".json")?;
    let version: u64 = digits.parse().ok()?;
    (version >= 1 && version_file_name(version) == name).then_some(version)
}

fn is_temp_name(name: &str) -> bool {
    name.starts_with('.') && name.ends_with(TEMP_SUFFIX)
}

fn sorted_entries(dir: &Path) -> Result<Vec<fs::DirEntry>, RegistryError> {
    let mut entries = fs::read_dir(dir)
        .and_then(|entries| entries.collect::<io::Result<Vec<_>>>())
        .map_err(io_error(dir, "read the directory"))?;
    entries.sort_by_key(|entry| entry.file_name());
    Ok(entries)
}

fn read_limited(path: &Path) -> Result<Vec<u8>, String> {
    let size = fs::metadata(path)
        .map_err(|error| format!("cannot read its size: {error}"))?
        .len();
    if size > MAX_RECORD_FILE_BYTES {
        return Err(format!(
            "{size} bytes exceed the {MAX_RECORD_FILE_BYTES}-byte limit for a record; not read"
        ));
    }
    fs::read(path).map_err(|error| format!("cannot be read: {error}"))
}

fn read_counter(path: &Path, model_id: &str) -> Result<u64, String> {
    let bytes = read_limited(path)?;
    let counter: Counter = serde_json::from_slice(&bytes).map_err(|error| {
        format!("not a valid version counter (truncated or overwritten?): {error}")
    })?;
    if counter.format != COUNTER_FORMAT || counter.format_version != COUNTER_FORMAT_VERSION {
        return Err(format!(
            "format {:?} version {} is not a version counter this build reads ({COUNTER_FORMAT:?} version {COUNTER_FORMAT_VERSION})",
            counter.format, counter.format_version
        ));
    }
    if counter.model_id != model_id {
        return Err(format!(
            "counts versions of {:?} but lies in the directory of {model_id:?}",
            counter.model_id
        ));
    }
    Ok(counter.last_version)
}

fn read_record(path: &Path, model_id: &str, version: u64) -> Result<Record<ModelSpec>, String> {
    let bytes = read_limited(path)?;
    decode_record(&bytes, model_id, version, true)
}

/// Parses and verifies a record's bytes: its format, its whole-record
/// digest (for a format-1 record, allowed only where `legacy` says so, its
/// content checksum alone), and that it holds `model_id` version `version`.
/// The error says what is wrong, for a [`LoadProblem`].
pub(crate) fn decode_record(
    bytes: &[u8],
    model_id: &str,
    version: u64,
    legacy: bool,
) -> Result<Record<ModelSpec>, String> {
    let mut record: Record<ModelSpec> = serde_json::from_slice(bytes).map_err(|error| {
        format!("not a valid model record (truncated or overwritten?): {error}")
    })?;
    match record.format_version {
        _ if record.format != RECORD_FORMAT => {
            return Err(format!(
                "format {:?} is not a record this build reads ({RECORD_FORMAT:?})",
                record.format
            ));
        }
        FORMAT_VERSION => {
            // Checked first: with the digest intact, every header field
            // below is as it was written.
            let written = std::mem::take(&mut record.record_digest);
            let actual = record_digest(&record).map_err(|error| error.to_string())?;
            if written != actual {
                return Err(format!(
                    "record digest mismatch: the record says {written:?} but its header, model, \
                     background and provenance hash to {actual}; the record was altered or damaged"
                ));
            }
            record.record_digest = written;
        }
        // A format-1 record has no digest; one that claims one was altered.
        LEGACY_FORMAT_VERSION if legacy && record.record_digest.is_empty() => {}
        version => {
            return Err(format!(
                "format version {version} is not one this build reads ({FORMAT_VERSION}, or \
                 {LEGACY_FORMAT_VERSION} without a record digest where this store had such records)"
            ));
        }
    }
    if record.model_id != model_id || record.spec.model_id != model_id || record.version != version
    {
        return Err(format!(
            "holds {:?} version {} (spec says {:?}) but is stored as {model_id:?} version {version}",
            record.model_id, record.version, record.spec.model_id
        ));
    }
    if !record.row_cost_ns.is_finite() || record.row_cost_ns < 0.0 {
        return Err("row_cost_ns is not a finite, non-negative number".to_string());
    }
    let checksum = spec_checksum(&record.spec).map_err(|error| error.to_string())?;
    if checksum != record.checksum {
        return Err(format!(
            "checksum mismatch: the header says {} but the content hashes to {checksum}; the record was altered or damaged",
            record.checksum
        ));
    }
    Ok(record)
}

/// Creates `dir` if missing and makes its entry in the parent durable.
fn ensure_dir(dir: &Path) -> Result<(), RegistryError> {
    if dir.is_dir() {
        return Ok(());
    }
    fs::create_dir_all(dir).map_err(io_error(dir, "create the directory"))?;
    if let Some(parent) = dir.parent().filter(|parent| !parent.as_os_str().is_empty()) {
        sync_dir(parent).map_err(io_error(parent, "sync the directory"))?;
    }
    Ok(())
}

/// Write to a temporary file, fsync, rename into place, fsync the directory
/// (common practice, no source).
fn write_durably(
    dir: &Path,
    name: &str,
    write: impl FnOnce(&mut BufWriter<File>) -> io::Result<()>,
) -> Result<(), RegistryError> {
    let temp = dir.join(format!(".{name}{TEMP_SUFFIX}"));
    let target = dir.join(name);
    let written = (|| {
        let mut writer = BufWriter::new(File::create(&temp)?);
        write(&mut writer)?;
        let file = writer.into_inner().map_err(|error| error.into_error())?;
        file.sync_all()
    })();
    if let Err(error) = written {
        let _ = fs::remove_file(&temp);
        return Err(io_error(&temp, "write the temporary file")(error));
    }
    if let Err(error) = fs::rename(&temp, &target) {
        let _ = fs::remove_file(&temp);
        return Err(io_error(&target, "rename the temporary file into place")(
            error,
        ));
    }
    sync_dir(dir).map_err(io_error(dir, "sync the directory"))
}

#[cfg(unix)]
fn sync_dir(dir: &Path) -> io::Result<()> {
    File::open(dir)?.sync_all()
}

/// Directories cannot be opened for fsync here; the rename is still atomic.
#[cfg(not(unix))]
fn sync_dir(_dir: &Path) -> io::Result<()> {
    Ok(())
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn version_file_names_are_canonical() {
        // Common practice, no source: one spelling per version, so two files
        // can never claim the same version.
        assert_eq!(parse_version_file_name("v12.json"), Some(12));
        for bad in [
            "v0.json",
            "v012.json",
            "v+1.json",
            "v1.json.tmp",
            "12.json",
            "v.json",
        ] {
            assert_eq!(parse_version_file_name(bad), None, "{bad}");
        }
        assert!(is_temp_name(".v3.json.tmp"));
        assert!(!is_temp_name("v3.json"));
    }
}
