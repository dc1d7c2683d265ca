//! The model registry: every `*.json` file in the model directory, loaded, validated and published as one
//! immutable [`Snapshot`] behind an atomic pointer.
//!
//! A request takes the current snapshot (an `Arc`) once and keeps it to the end, so a reload never changes the
//! model under a request that has started. A reload reads and parses every new or changed file off the request
//! path, builds the next snapshot beside the current one and swaps it in with one atomic store. A file that fails
//! to load never replaces a model that is serving: the previous version from that file stays in the snapshot.
//!
//! Files are told apart by name; a change is seen through a fingerprint of the bytes. Two files that declare the
//! same model name are a conflict: the file already serving that name keeps it (else the first by file name), and
//! the other is reported as a problem until one of them goes away.

use std::collections::{BTreeMap, HashMap};
use std::hash::{Hash, Hasher};
use std::path::{Path, PathBuf};
use std::sync::Arc;
use std::time::SystemTime;

use arc_swap::ArcSwap;
use probity_models::Model;

use crate::serve::error::ServeError;
use crate::serve::metrics;

/// Largest model file read, as `docs/model-format.md` allows (256 MiB).
const MAX_FILE_BYTES: u64 = 256 * 1024 * 1024;

/// One loaded model version and where it came from.
#[derive(Debug)]
pub struct LoadedModel {
    /// The validated model.
    pub model: Model,
    /// The file name inside the model directory.
    pub file: String,
    /// When it was loaded.
    pub loaded_at: SystemTime,
    /// A fingerprint of the file's bytes (SipHash; for change detection, not integrity).
    pub fingerprint: u64,
}

/// A file that is not serving, and why.
#[derive(Debug, Clone, PartialEq, Eq)]
pub struct FileProblem {
    /// The file name inside the model directory.
    pub file: String,
    /// The error text (naming the JSON path where the loader gives one).
    pub error: String,
}

/// What is served at one moment.
#[derive(Debug, Default)]
pub struct Snapshot {
    /// Models by model name.
    pub models: BTreeMap<String, Arc<LoadedModel>>,
    /// Files that did not load or lost a name conflict, by file name.
    pub problems: Vec<FileProblem>,
}

/// What a reload did with one file.
#[derive(Debug, Clone, Copy, PartialEq, Eq)]
pub enum Outcome {
    /// New or changed, loaded, serving.
    Loaded,
    /// Not changed since the last scan.
    Unchanged,
    /// Did not load (or lost a name conflict); whatever it served before keeps serving.
    Failed,
    /// The file went away.
    Removed,
}

/// One line of a reload report.
#[derive(Debug, Clone, PartialEq, Eq)]
pub struct FileReport {
    /// The file name inside the model directory.
    pub file: String,
    /// What happened.
    pub outcome: Outcome,
    /// Model name and version in the file, or (for a failure) still serving from it.
    pub model: Option<(String, String)>,
    /// The error text of a failure.
    pub error: Option<String>,
}

/// The state of one file between scans.
enum FileState {
    Loaded(Arc<LoadedModel>),
    Failed {
        fingerprint: u64,
        len: u64,
        error: String,
    },
}

/// The registry: current snapshot plus what the last scan saw.
pub struct Registry {
    dir: PathBuf,
    current: ArcSwap<Snapshot>,
    files: tokio::sync::Mutex<BTreeMap<String, FileState>>,
}

impl Registry {
    /// An empty registry over `dir`; call [`Registry::reload`] to load it.
    pub fn new(dir: PathBuf) -> Registry {
        Registry {
            dir,
            current: ArcSwap::from_pointee(Snapshot::default()),
            files: Default::default(),
        }
    }

    /// The model directory.
    pub fn dir(&self) -> &Path {
        &self.dir
    }

    /// The current snapshot; keep it for the whole request.
    pub fn snapshot(&self) -> Arc<Snapshot> {
        self.current.load_full()
    }

    /// Scans the model directory and publishes the result. Scans are serialised; the file reading and parsing run
    /// on the blocking thread pool.
    pub async fn reload(self: &Arc<Self>) -> Result<Vec<FileReport>, ServeError> {
        let mut files = self.files.lock().await;
        let previous = std::mem::take(&mut *files);
        let this = Arc::clone(self);
        let joined = tokio::task::spawn_blocking(move || this.scan(previous)).await;
        let (next_files, report, result) = match joined {
            Ok(scanned) => scanned,
            Err(join) => {
                // A panic in the model loader: keep serving what we had, and say so.
                tracing::error!(error = %join, "model scan panicked");
                return Err(ServeError::ModelDirectory {
                    dir: self.dir.display().to_string(),
                    error: join.to_string(),
                });
            }
        };
        *files = next_files;
        result.map(|()| report)
    }

    /// One scan, given the previous file states; returns the next states, the report and the listing error if any.
    fn scan(
        &self,
        previous: BTreeMap<String, FileState>,
    ) -> (
        BTreeMap<String, FileState>,
        Vec<FileReport>,
        Result<(), ServeError>,
    ) {
        let names = match list_model_files(&self.dir) {
            Ok(names) => names,
            Err(e) => {
                let error = ServeError::ModelDirectory {
                    dir: self.dir.display().to_string(),
                    error: e.to_string(),
                };
                return (previous, Vec::new(), Err(error));
            }
        };
        let mut previous = previous;
        let mut next = BTreeMap::new();
        let mut report = Vec::new();
        for name in names {
            let old = previous.remove(&name);
            let (state, outcome) = self.load_file(&name, old);
            let line = match (&state, outcome) {
                (FileState::Loaded(m), _) => FileReport {
                    file: name.clone(),
                    outcome,
                    model: Some((m.model.name().to_string(), m.model.version().to_string())),
                    error: None,
                },
                (FileState::Failed { error, .. }, _) => FileReport {
                    file: name.clone(),
                    outcome: Outcome::Failed,
                    model: None,
                    error: Some(error.clone()),
                },
            };
            report.push(line);
            next.insert(name, state);
        }
        for name in previous.into_keys() {
            report.push(FileReport {
                file: name,
                outcome: Outcome::Removed,
                model: None,
                error: None,
            });
        }
        let old = self.snapshot();
        let snapshot = build_snapshot(&old, &next, &mut report);
        metrics::models_published(&old.models, &snapshot.models);
        self.current.store(Arc::new(snapshot));
        (next, report, Ok(()))
    }

    /// Loads one file unless its bytes are unchanged.
    fn load_file(&self, name: &str, old: Option<FileState>) -> (FileState, Outcome) {
        let path = self.dir.join(name);
        let bytes = match read_limited(&path) {
            Ok(bytes) => bytes,
            Err(error) => {
                tracing::warn!(file = name, %error, "model file unreadable");
                metrics::model_load_failed(name);
                return (
                    FileState::Failed {
                        fingerprint: 0,
                        len: 0,
                        error,
                    },
                    Outcome::Failed,
                );
            }
        };
        let fingerprint = fingerprint(&bytes);
        let len = bytes.len() as u64;
        match old {
            Some(FileState::Loaded(m)) if m.fingerprint == fingerprint => {
                return (FileState::Loaded(m), Outcome::Unchanged)
            }
            Some(FileState::Failed {
                fingerprint: f,
                len: l,
                error,
            }) if f == fingerprint && l == len => {
                return (
                    FileState::Failed {
                        fingerprint,
                        len,
                        error,
                    },
                    Outcome::Failed,
                )
            }
            _ => {}
        }
        match Model::from_json_slice(&bytes) {
            Ok(model) => {
                tracing::info!(
                    file = name,
                    model = model.name(),
                    version = model.version(),
                    "model loaded"
                );
                metrics::model_loaded(model.name(), model.version());
                let loaded = LoadedModel {
                    model,
                    file: name.to_string(),
                    loaded_at: SystemTime::now(),
                    fingerprint,
                };
                (FileState::Loaded(Arc::new(loaded)), Outcome::Loaded)
            }
            Err(e) => {
                let error = e.to_string();
                tracing::warn!(file = name, %error, "model file refused");
                metrics::model_load_failed(name);
                (
                    FileState::Failed {
                        fingerprint,
                        len,
                        error,
                    },
                    Outcome::Failed,
                )
            }
        }
    }
}

/// The next snapshot from the file states: name conflicts resolved in favour of the serving file, failed files
/// keeping the version they served.
fn build_snapshot(
    old: &Snapshot,
    files: &BTreeMap<String, FileState>,
    report: &mut [FileReport],
) -> Snapshot {
    let serving_file = |model: &str| old.models.get(model).map(|m| m.file.as_str());
    let mut claims: HashMap<&str, Vec<&Arc<LoadedModel>>> = HashMap::new();
    for state in files.values() {
        if let FileState::Loaded(m) = state {
            claims.entry(m.model.name()).or_default().push(m);
        }
    }
    let mut models = BTreeMap::new();
    let mut problems = Vec::new();
    for (name, candidates) in claims {
        let winner = candidates
            .iter()
            .position(|m| Some(m.file.as_str()) == serving_file(name))
            .unwrap_or(0);
        for (i, m) in candidates.iter().enumerate() {
            if i != winner {
                let error = format!(
                    "model `{name}` is also in file `{}`, which serves it; remove one of the two files",
                    candidates[winner].file
                );
                mark_failed(report, &m.file, &error);
                problems.push(FileProblem {
                    file: m.file.clone(),
                    error,
                });
            }
        }
        models.insert(name.to_string(), Arc::clone(candidates[winner]));
    }
    for (file, state) in files {
        if let FileState::Failed { error, .. } = state {
            problems.push(FileProblem {
                file: file.clone(),
                error: error.clone(),
            });
            // The version this file served before keeps serving, unless another file now serves the name.
            if let Some(kept) = old.models.values().find(|m| &m.file == file) {
                if !models.contains_key(kept.model.name()) {
                    models.insert(kept.model.name().to_string(), Arc::clone(kept));
                    if let Some(line) = report.iter_mut().find(|l| &l.file == file) {
                        line.model = Some((
                            kept.model.name().to_string(),
                            kept.model.version().to_string(),
                        ));
                    }
                }
            }
        }
    }
    problems.sort_by(|a, b| a.file.cmp(&b.file));
    Snapshot { models, problems }
}

fn mark_failed(report: &mut [FileReport], file: &str, error: &str) {
    if let Some(line) = report.iter_mut().find(|l| l.file == file) {
        line.outcome = Outcome::Failed;
        line.error = Some(error.to_string());
    }
}

/// Regular files named `*.json`, not hidden (editors and copy tools write hidden temporary files), sorted.
fn list_model_files(dir: &Path) -> std::io::Result<Vec<String>> {
    let mut names = Vec::new();
    for entry in std::fs::read_dir(dir)? {
        let entry = entry?;
        let Ok(name) = entry.file_name().into_string() else {
            continue;
        };
        if name.starts_with('.') || !name.ends_with(".json") {
            continue;
        }
        if std::fs::metadata(entry.path())
            .map(|m| m.is_file())
            .unwrap_or(false)
        {
            names.push(name);
        }
    }
    names.sort();
    Ok(names)
}

fn read_limited(path: &Path) -> Result<Vec<u8>, String> {
    let len = std::fs::metadata(path).map_err(|e| e.to_string())?.len();
    if len > MAX_FILE_BYTES {
        return Err(format!("$: {len} bytes, the limit is {MAX_FILE_BYTES}"));
    }
    std::fs::read(path).map_err(|e| e.to_string())
}

fn fingerprint(bytes: &[u8]) -> u64 {
    let mut h = std::collections::hash_map::DefaultHasher::new();
    bytes.hash(&mut h);
    h.finish()
}
