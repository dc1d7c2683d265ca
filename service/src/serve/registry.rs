//! The model registry: every `*.json` file in the model directory, loaded, validated and published as one
//! immutable [`Snapshot`] behind an atomic pointer.
//!
//! A request takes the current snapshot (an `Arc`) once and keeps it to the end, so a reload never changes the
//! model under a request that has started. A reload reads and parses every new or changed file off the request
//! path, builds the next snapshot beside the current one and swaps it in with one atomic store. A file that fails
//! to load never replaces a model that is serving: the previous version from that file stays in the snapshot.
//!
//! Files are told apart by name; a change is seen through a fingerprint of the bytes. Models are keyed by name and
//! version, so two files of one model name with different versions serve side by side (routes and challengers pin
//! one with `NAME@VERSION`, [`crate::serve::model_ref`]). Two files that declare the same name and version are a
//! conflict: the file already serving it keeps it (else the first by file name), and the other is reported as a
//! problem naming both files until one of them goes away. A name that a route names without a version
//! ([`Registry::with_single_version`]) is served in one version at a time: a second version of it is the same
//! conflict, so a file dropped into the directory never changes what a bare name means.

use std::collections::{BTreeMap, BTreeSet};
use std::hash::{Hash, Hasher};
use std::path::{Path, PathBuf};
use std::sync::Arc;
use std::time::SystemTime;

use arc_swap::ArcSwap;
use probity_models::Model;

use crate::serve::error::ServeError;
use crate::serve::metrics;
use crate::serve::model_ref::ModelRef;

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

/// A loaded model's key: (name, version).
pub type ModelKey = (String, String);

/// What is served at one moment.
#[derive(Debug, Default)]
pub struct Snapshot {
    /// Models by (name, version).
    pub models: BTreeMap<ModelKey, Arc<LoadedModel>>,
    /// Files that did not load or lost a conflict, by file name.
    pub problems: Vec<FileProblem>,
}

impl Snapshot {
    /// The versions of `name` that are loaded, lowest key first.
    pub fn versions_of(&self, name: &str) -> impl Iterator<Item = &Arc<LoadedModel>> + '_ {
        let name = name.to_string();
        self.models
            .range((name.clone(), String::new())..)
            .take_while(move |((n, _), _)| *n == name)
            .map(|(_, m)| m)
    }

    /// The model `model` names: the pinned version, or for a bare name the one version loaded (none when several
    /// are, which the registry prevents for the names routes use bare).
    pub fn find(&self, model: &ModelRef) -> Option<&Arc<LoadedModel>> {
        match &model.version {
            Some(v) => self.models.get(&(model.name.clone(), v.clone())),
            None => {
                let mut versions = self.versions_of(&model.name);
                match (versions.next(), versions.next()) {
                    (Some(one), None) => Some(one),
                    _ => None,
                }
            }
        }
    }

    /// Every loaded model, comma-separated, or `none`: `NAME` for a name loaded in one version, `NAME@VERSION` for
    /// each version of a name loaded in several.
    pub fn loaded_list(&self) -> String {
        if self.models.is_empty() {
            return "none".into();
        }
        self.models
            .keys()
            .map(|(n, v)| {
                if self.versions_of(n).nth(1).is_some() {
                    format!("{n}@{v}")
                } else {
                    n.clone()
                }
            })
            .collect::<Vec<_>>()
            .join(", ")
    }
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
    single_version: BTreeSet<String>,
}

impl Registry {
    /// An empty registry over `dir`; call [`Registry::reload`] to load it.
    pub fn new(dir: PathBuf) -> Registry {
        Registry {
            dir,
            current: ArcSwap::from_pointee(Snapshot::default()),
            files: Default::default(),
            single_version: BTreeSet::new(),
        }
    }

    /// The same registry, serving one version at a time of each of `names` (the model names routes name without a
    /// version): a second version of one of them is a conflict like a second file of the same version.
    pub fn with_single_version(mut self, names: impl IntoIterator<Item = String>) -> Registry {
        self.single_version = names.into_iter().collect();
        self
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
        let snapshot = build_snapshot(&old, &next, &mut report, &self.single_version);
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

/// The next snapshot from the file states: conflicts (same name and version, or two versions of a name served one
/// at a time) resolved in favour of the serving file, failed files keeping the version they served.
fn build_snapshot(
    old: &Snapshot,
    files: &BTreeMap<String, FileState>,
    report: &mut [FileReport],
    single_version: &BTreeSet<String>,
) -> Snapshot {
    // What a file claims: its name and version, or its name alone when one version of it is served at a time.
    let claim_of = |m: &LoadedModel| -> (String, Option<String>) {
        let name = m.model.name().to_string();
        if single_version.contains(&name) {
            (name, None)
        } else {
            (name, Some(m.model.version().to_string()))
        }
    };
    let mut claims: BTreeMap<(String, Option<String>), Vec<&Arc<LoadedModel>>> = BTreeMap::new();
    for state in files.values() {
        if let FileState::Loaded(m) = state {
            claims.entry(claim_of(m)).or_default().push(m);
        }
    }
    let mut models = BTreeMap::new();
    let mut problems = Vec::new();
    for ((name, version), candidates) in &claims {
        // The file that served this claim before keeps it, else the first by file name.
        let winner = candidates
            .iter()
            .position(|m| {
                old.models
                    .values()
                    .any(|o| o.file == m.file && claim_of(o) == (name.clone(), version.clone()))
            })
            .unwrap_or(0);
        let kept = candidates[winner];
        for (i, m) in candidates.iter().enumerate() {
            if i != winner {
                let error = match version {
                    Some(version) => format!(
                        "model `{name}` version `{version}` is also in file `{}`, which serves it; remove one of \
                         the two files (or give this one another version)",
                        kept.file
                    ),
                    None => format!(
                        "model `{name}` is also in file `{}`, which serves it (version `{}`); a route names `{name}` \
                         without a version, so one version of it is served at a time: remove one of the two \
                         files, or pin the version in every route (`{name}@VERSION`) to serve both",
                        kept.file,
                        kept.model.version()
                    ),
                };
                mark_failed(report, &m.file, &error);
                problems.push(FileProblem {
                    file: m.file.clone(),
                    error,
                });
            }
        }
        models.insert(
            (name.clone(), kept.model.version().to_string()),
            Arc::clone(kept),
        );
    }
    for (file, state) in files {
        if let FileState::Failed { error, .. } = state {
            problems.push(FileProblem {
                file: file.clone(),
                error: error.clone(),
            });
            // The version this file served before keeps serving, unless another file now serves it.
            if let Some(kept) = old.models.values().find(|m| &m.file == file) {
                let (name, version) = claim_of(kept);
                let taken = match &version {
                    Some(v) => models.contains_key(&(name.clone(), v.clone())),
                    None => models.keys().any(|(n, _)| *n == name),
                };
                if !taken {
                    models.insert(
                        (name.clone(), kept.model.version().to_string()),
                        Arc::clone(kept),
                    );
                    if let Some(line) = report.iter_mut().find(|l| &l.file == file) {
                        line.model = Some((name, kept.model.version().to_string()));
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
