//! Model reloads without stopping the line: `POST /models/{model}/reload`, SIGHUP (which
//! reloads every model whose config entry or files changed, loads new ones and retires
//! removed ones), and `watch = true` (a model's files polled, reloaded once a change has
//! settled).
//!
//! A reload re-reads the model's config entry and files, loads, checks, warms and self-tests
//! the new version beside the serving one on a thread at low CPU priority
//! ([`crate::background`]: live requests come first), keeping the serving
//! version's calibrated stacking decision, then starts its lanes from an ordinary thread and
//! only then swaps it into the served map in one step. Requests that already hold the old map
//! finish on the old version; its lanes stop once no request holds it (bounded by
//! `drain_ms`), and its memory goes with them. A failed reload changes nothing that serves.

use std::collections::BTreeMap;
use std::sync::atomic::{AtomicU64, Ordering};
use std::sync::{Arc, Mutex};
use std::time::Duration;

use serde::Serialize;
use tokio::sync::watch;

use crate::batch::BatcherGuard;
use crate::config::{Config, Overrides};
use crate::http::state::{Readiness, ServedModel};
use crate::metrics::Metrics;
use crate::model::StateWrap;
use crate::served::{LoadOptions, Loaded};

/// Who asked for a reload (for the log line and the status).
#[derive(Debug, Clone, Serialize)]
#[serde(rename_all = "snake_case", tag = "by")]
pub enum Trigger {
    /// `POST /models/{model}/reload`, from this peer.
    Route {
        /// The peer's address.
        peer: String,
    },
    /// SIGHUP.
    Signal,
    /// The model's files changed (`watch = true`).
    Watch,
}

/// The last reload of a model, as `GET /models/{model}` shows it.
#[derive(Debug, Clone, Serialize)]
pub struct ReloadStatus {
    /// Unix seconds when it ended.
    pub at: u64,
    /// `ok` or `failed`.
    pub outcome: &'static str,
    /// Why it failed (absent when it did not).
    #[serde(skip_serializing_if = "Option::is_none")]
    pub reason: Option<String>,
    /// The version serving after it.
    pub serving: String,
    /// Who asked.
    pub trigger: Trigger,
}

/// Why a reload did not happen.
#[derive(Debug, thiserror::Error)]
pub enum ReloadError {
    /// Another reload of the same model is running: this one is refused, not queued.
    #[error("a reload of model {0:?} is already running; try again when it has finished")]
    Busy(String),
    /// The model is not (or no longer) in the config.
    #[error("{0}")]
    Unknown(String),
    /// Not serving (loading, failed, draining).
    #[error("the server is not serving: {0}")]
    NotServing(String),
    /// The new version failed; the old one still serves.
    #[error("{0}")]
    Failed(String),
}

/// Reloads of the served models; one per server.
pub struct Reloader {
    ready: watch::Sender<Readiness>,
    config_path: Option<std::path::PathBuf>,
    overrides: Overrides,
    metrics: Metrics,
    wrap: Option<StateWrap>,
    drain: Duration,
    guards: Mutex<BTreeMap<String, BatcherGuard>>,
    running: Mutex<Vec<String>>,
    status: Mutex<BTreeMap<String, ReloadStatus>>,
    /// Each served model's fingerprint (config entry and files) when it was loaded.
    fingerprints: Mutex<BTreeMap<String, [u8; 32]>>,
    /// The `[server]` settings in force, to name the ones a SIGHUP cannot change.
    server: String,
    /// Models with `watch = true`, by name.
    watched: Mutex<BTreeMap<String, Watched>>,
    /// Counts SIGHUPs; a reload prepared before the one that removed its model is not swapped in.
    generation: AtomicU64,
    /// Models removed from the config, with the SIGHUP's generation that removed them.
    removed: Mutex<BTreeMap<String, u64>>,
}

/// Marks a model's reload as running; the mark goes when this is dropped, however the reload
/// ends (also when the route's client leaves and its future is dropped).
struct Running<'a> {
    reloader: &'a Reloader,
    model: String,
}

impl Drop for Running<'_> {
    fn drop(&mut self) {
        lock(&self.reloader.running).retain(|m| m != &self.model);
    }
}

/// What a watched model's files looked like: each file's path with its length, modification
/// time and inode (`None` while it cannot be read, e.g. in the middle of a rename).
type Stamp = Vec<(std::path::PathBuf, Option<FileStamp>)>;

/// One file's length, modification time, inode and change time (a rename over it changes
/// the inode or the change time even when length and modification time repeat).
type FileStamp = (u64, std::time::SystemTime, u64, i64, i64);

fn file_stamp(path: &std::path::Path) -> Option<FileStamp> {
    use std::os::unix::fs::MetadataExt as _;
    let m = std::fs::metadata(path).ok()?;
    Some((m.len(), m.modified().ok()?, m.ino(), m.ctime(), m.ctime_nsec()))
}

/// How often watched files are looked at. A change is loaded once it has been seen unchanged
/// at two looks in a row (it settled for one interval).
pub const WATCH_POLL: Duration = Duration::from_secs(1);

/// One watched model.
struct Watched {
    /// Its config entry (which files to look at).
    config: crate::config::ModelConfig,
    /// The files as they were when the serving version was read.
    loaded: Stamp,
    /// A change seen at the last look, waiting to settle.
    seen: Option<Stamp>,
    /// The files, and the config file, as they were at the last reload this watch asked for
    /// (not asked again for files that already failed, until they or the config change).
    tried: Option<(Stamp, Option<FileStamp>)>,
}

/// The stamp of a model's files on disk (the ONNX file, the labels, each self-test sample);
/// `None` for a model whose files are compiled in.
fn stamp(mc: &crate::config::ModelConfig) -> Option<Stamp> {
    use crate::source::Source;
    let Source::File(onnx) = &mc.onnx else { return None };
    let mut files = vec![onnx.clone()];
    if let Some(Source::File(l)) = &mc.labels {
        files.push(l.clone());
    }
    if let Some(st) = &mc.selftest
        && let Source::File(dir) = &st.samples
    {
        files.push(dir.clone());
        let mut entries: Vec<_> =
            std::fs::read_dir(dir).into_iter().flatten().filter_map(|e| e.ok().map(|e| e.path())).collect();
        entries.sort();
        files.extend(entries);
    }
    Some(
        files
            .into_iter()
            .map(|f| {
                let s = file_stamp(&f);
                (f, s)
            })
            .collect(),
    )
}

/// What a reload prepared at low priority: the new version loaded, checked and self-tested.
struct Prepared {
    /// The SIGHUP generation when the config was read.
    generation: u64,
    loaded: Loaded,
    selftest: Option<crate::selftest::Outcome>,
    print: Option<[u8; 32]>,
    stamp: Option<Stamp>,
}

/// A model's config entry and the bytes of its files (ONNX, labels, self-test samples):
/// what a SIGHUP compares to decide whether to reload it. `None` when a file cannot be read
/// (the reload then says why).
pub fn fingerprint(mc: &crate::config::ModelConfig) -> Option<[u8; 32]> {
    use sha2::{Digest as _, Sha256};
    let mut h = Sha256::new();
    h.update(format!("{mc:?}").as_bytes());
    h.update(mc.onnx.read().ok()?);
    if let Some(l) = &mc.labels {
        h.update(l.read().ok()?);
    }
    if let Some(st) = &mc.selftest {
        for (name, bytes) in st.samples.read_dir().ok()? {
            h.update(name.as_bytes());
            h.update(bytes);
        }
    }
    Some(h.finalize().into())
}

impl Reloader {
    /// A reloader for the server whose readiness `ready` carries.
    pub fn new(
        ready: watch::Sender<Readiness>,
        config: &Config,
        overrides: Overrides,
        metrics: Metrics,
        wrap: Option<StateWrap>,
    ) -> Reloader {
        Reloader {
            ready,
            config_path: config.path.clone(),
            overrides,
            metrics,
            wrap,
            drain: config.server.drain,
            guards: Mutex::new(BTreeMap::new()),
            running: Mutex::new(Vec::new()),
            status: Mutex::new(BTreeMap::new()),
            fingerprints: Mutex::new(
                config.models.iter().filter_map(|m| Some((m.name.clone(), fingerprint(m)?))).collect(),
            ),
            server: format!("{:?}", config.server),
            generation: AtomicU64::new(0),
            removed: Mutex::new(BTreeMap::new()),
            watched: Mutex::new(
                config
                    .models
                    .iter()
                    .filter(|m| m.watch)
                    .filter_map(|m| {
                        let loaded = stamp(m)?;
                        Some((m.name.clone(), Watched { config: m.clone(), loaded, seen: None, tried: None }))
                    })
                    .collect(),
            ),
        }
    }

    /// Look at the watched models' files every [`WATCH_POLL`] and reload a model whose files
    /// changed and then stayed unchanged for one interval. Files that fail to load are not
    /// tried again until they change.
    pub fn spawn_watcher(self: &Arc<Self>) -> tokio::task::JoinHandle<()> {
        let this = Arc::clone(self);
        tokio::spawn(async move {
            loop {
                tokio::time::sleep(WATCH_POLL).await;
                let scan = Arc::clone(&this);
                let due = tokio::task::spawn_blocking(move || scan.settled_changes()).await.unwrap_or_default();
                for name in due {
                    if let Err(ReloadError::Busy(_) | ReloadError::NotServing(_) | ReloadError::Unknown(_)) =
                        this.reload(&name, Trigger::Watch).await
                    {
                        // Not tried: look again at the next interval.
                        if let Some(w) = lock(&this.watched).get_mut(&name) {
                            w.tried = None;
                        }
                    }
                }
            }
        })
    }

    /// The watched models whose files changed and have settled since the last look.
    fn settled_changes(&self) -> Vec<String> {
        if !matches!(&*self.ready.borrow(), Readiness::Ready(_)) {
            return Vec::new(); // loading, failed or draining: nothing to reload into
        }
        // Look at the files without holding the lock (a slow mount must not stall reloads).
        let configs: Vec<_> = lock(&self.watched).iter().map(|(n, w)| (n.clone(), w.config.clone())).collect();
        let looks: Vec<_> = configs.into_iter().map(|(n, c)| (n, stamp(&c))).collect();
        let config_file = self.config_path.as_deref().and_then(file_stamp);
        let mut due = Vec::new();
        let mut watched = lock(&self.watched);
        for (name, now) in looks {
            let (Some(now), Some(w)) = (now, watched.get_mut(&name)) else { continue };
            if now == w.loaded {
                w.seen = None;
            } else if w.seen.as_ref() != Some(&now) {
                w.seen = Some(now);
            } else {
                let attempt = (now, config_file);
                if w.tried.as_ref() != Some(&attempt) {
                    tracing::info!(model = %name, "watched files changed and settled; reloading");
                    w.tried = Some(attempt);
                    due.push(name);
                }
            }
        }
        due
    }

    /// SIGHUP: read the config file again; reload every model whose entry or files changed,
    /// load models that are new, retire models that are gone; name `[server]` changes that
    /// need a restart. Each model's outcome is logged and shown on `/models/{model}`.
    pub async fn on_hangup(self: &Arc<Self>) {
        let generation = self.generation.fetch_add(1, Ordering::SeqCst) + 1;
        let config = match self.read_config() {
            Ok(c) => c,
            Err(e) => {
                tracing::error!(cause = %format!("{e:#}"), "SIGHUP: the config does not read; nothing reloaded");
                return;
            }
        };
        if format!("{:?}", config.server) != self.server {
            tracing::warn!(
                "SIGHUP: [server] settings changed; they take effect at the next restart (models reload now)"
            );
        }
        // Reading and hashing the files is background work too.
        let (this, models) = (Arc::clone(self), config.models.clone());
        let changed = crate::background::run_background("reload-scan", move || {
            models
                .iter()
                .filter(|mc| {
                    let known = lock(&this.fingerprints).get(&mc.name).copied();
                    known.is_none() || known != fingerprint(mc)
                })
                .map(|mc| mc.name.clone())
                .collect::<Vec<_>>()
        })
        .await
        .unwrap_or_else(|e| {
            tracing::error!(cause = %format!("{e:#}"), "SIGHUP: comparing the models' files failed; reloading all");
            config.models.iter().map(|m| m.name.clone()).collect()
        });
        let mut busy = Vec::new();
        for name in changed {
            if let Err(ReloadError::Busy(_)) = self.reload(&name, Trigger::Signal).await {
                busy.push(name);
            }
        }
        // A reload that was running read the config before this signal: once it has ended,
        // reload again so that what the signal announced is not lost.
        for name in busy {
            while lock(&self.running).contains(&name) {
                tokio::time::sleep(Duration::from_millis(50)).await;
            }
            let _ = self.reload(&name, Trigger::Signal).await;
        }
        let gone: Vec<String> = match &*self.ready.borrow() {
            Readiness::Ready(s) => s.keys().filter(|n| config.models.iter().all(|m| &m.name != *n)).cloned().collect(),
            _ => Vec::new(),
        };
        for name in gone {
            self.retire_model(&name, generation);
        }
    }

    /// Stop serving `model` (removed from the config): requests already holding it finish.
    fn retire_model(&self, model: &str, generation: u64) {
        // The map, the lanes' guards and the removal mark change together, under the map's
        // lock, so that a reload's swap cannot interleave.
        let old = self
            .edit_served(|map| {
                lock(&self.removed).insert(model.to_owned(), generation);
                let old = map.remove(model)?;
                Some((old, lock(&self.guards).remove(model)))
            })
            .ok()
            .flatten();
        lock(&self.fingerprints).remove(model);
        lock(&self.watched).remove(model);
        if let Some((old, Some(guard))) = old {
            tracing::info!(model, "SIGHUP: model removed from the config; it no longer serves");
            self.retire_later(old, guard);
        }
    }

    /// Change the served map in one step: a copy edited by `edit` is published, unless `edit`
    /// returns `None` (nothing changed). `Err` names the server's state when it is not serving.
    fn edit_served<T>(
        &self,
        edit: impl FnOnce(&mut crate::http::state::Served) -> Option<T>,
    ) -> Result<Option<T>, String> {
        let mut out = Err(String::new());
        self.ready.send_if_modified(|r| match r {
            Readiness::Ready(served) => {
                let mut map = (**served).clone();
                let edited = edit(&mut map);
                let changed = edited.is_some();
                if changed {
                    *served = Arc::new(map);
                }
                out = Ok(edited);
                changed
            }
            other => {
                out = Err(other.describe());
                false
            }
        });
        out
    }

    /// Stop `old`'s lanes once no request holds it (bounded by `drain_ms`, at least 1 s).
    fn retire_later(&self, old: Arc<ServedModel>, guard: BatcherGuard) {
        tokio::spawn(retire(old, guard, self.drain.max(Duration::from_secs(1))));
    }

    /// The config as it is now: the file the server started from, or the built-in one.
    fn read_config(&self) -> anyhow::Result<Config> {
        match &self.config_path {
            Some(p) => Config::from_file(p, &self.overrides),
            None => Config::builtin(&self.overrides),
        }
    }

    /// Hold the lanes of the models loaded at start.
    pub fn adopt(&self, guards: impl IntoIterator<Item = (String, BatcherGuard)>) {
        lock(&self.guards).extend(guards);
    }

    /// Stop every model's lanes (shutdown).
    pub fn stop_all(&self) {
        lock(&self.guards).clear();
    }

    /// The last reload's status of `model`.
    pub fn status(&self, model: &str) -> Option<ReloadStatus> {
        lock(&self.status).get(model).cloned()
    }

    /// Reload `model` from its config entry and files as they are now.
    ///
    /// # Errors
    /// [`ReloadError`]; after `Failed`, the old version still serves.
    pub async fn reload(self: &Arc<Self>, model: &str, trigger: Trigger) -> Result<ReloadStatus, ReloadError> {
        {
            let mut running = lock(&self.running);
            if running.iter().any(|m| m == model) {
                return Err(ReloadError::Busy(model.to_owned()));
            }
            running.push(model.to_owned());
        }
        let running = Running { reloader: self, model: model.to_owned() };
        let outcome = self.load_and_swap(model).await;
        drop(running);
        let outcome = match outcome {
            Err(e @ (ReloadError::Unknown(_) | ReloadError::NotServing(_))) => {
                // Nothing was tried: not a failed reload (not counted, not the model's status).
                tracing::warn!(model, ?trigger, reason = %e, "reload not done");
                return Err(e);
            }
            other => other,
        };
        let serving = self.serving_version(model).unwrap_or_default();
        let status = ReloadStatus {
            at: crate::http::access::now(),
            outcome: if outcome.is_ok() { "ok" } else { "failed" },
            reason: outcome.as_ref().err().map(ToString::to_string),
            serving: serving.clone(),
            trigger: trigger.clone(),
        };
        match &outcome {
            Ok(()) => tracing::info!(model, version = %serving, ?trigger, "model reloaded"),
            Err(e) => {
                tracing::error!(model, serving = %serving, ?trigger, reason = %e, "reload failed; the old version serves")
            }
        }
        self.metrics.count_reload(model, status.outcome);
        lock(&self.status).insert(model.to_owned(), status.clone());
        outcome.map(|()| status)
    }

    fn serving_version(&self, model: &str) -> Option<String> {
        match &*self.ready.borrow() {
            Readiness::Ready(s) | Readiness::Draining(s) => s.get(model).map(|m| m.model.version.clone()),
            _ => None,
        }
    }

    /// Prepare the new version at low priority, start its lanes from an ordinary thread (lanes
    /// started from the background thread would inherit its priority for good), swap it in.
    async fn load_and_swap(self: &Arc<Self>, model: &str) -> Result<(), ReloadError> {
        let (this, name) = (Arc::clone(self), model.to_owned());
        let prepared = crate::background::run_background(&format!("reload-{model}"), move || this.prepare(&name))
            .await
            .unwrap_or_else(|e| Err(ReloadError::Failed(format!("{e:#}"))))?;
        let this = Arc::clone(self);
        let (print, stamp, watch, config) =
            (prepared.print, prepared.stamp.clone(), prepared.loaded.config.watch, prepared.loaded.config.clone());
        let generation = prepared.generation;
        let (new, guard) = tokio::task::spawn_blocking(move || {
            // Loading left the parse and the planning's copies freed but resident; handed back
            // here, at ordinary priority (the trim takes the allocator's locks in turn).
            crate::background::release_free_memory();
            prepared
                .loaded
                .start(&this.metrics, this.wrap.as_ref(), prepared.selftest)
                .map_err(|e| ReloadError::Failed(format!("{e:#}")))
        })
        .await
        .unwrap_or_else(|e| Err(ReloadError::Failed(format!("starting the lanes panicked: {e}"))))?;
        self.swap(model, new, guard, generation)?;
        if let Some(p) = print {
            lock(&self.fingerprints).insert(model.to_owned(), p);
        }
        let mut watched = lock(&self.watched);
        match stamp {
            Some(loaded) if watch => {
                watched.insert(model.to_owned(), Watched { config, loaded, seen: None, tried: None });
            }
            _ => {
                watched.remove(model);
            }
        }
        Ok(())
    }

    /// Read the config again; load, check, warm and self-test the new version (on the
    /// background thread; nothing here starts a thread that outlives it).
    fn prepare(&self, model: &str) -> Result<Prepared, ReloadError> {
        let generation = self.generation.load(Ordering::SeqCst);
        let config =
            self.read_config().map_err(|e| ReloadError::Failed(format!("the config no longer reads: {e:#}")))?;
        let mc = config.named(model).map_err(|e| ReloadError::Unknown(format!("{e:#}")))?;
        let serving = match &*self.ready.borrow() {
            Readiness::Ready(s) => s.get(model).cloned(),
            other => return Err(ReloadError::NotServing(other.describe())),
        };
        // The stacking decision calibrated for the serving version stays, when it was made
        // for the same engine and pass size: calibrating again would time it under live load.
        let kept_stacking = serving
            .as_ref()
            .filter(|s| s.model.engine() == mc.engine && s.batching.batch_cap == mc.batching.batch_cap)
            .map(|s| s.model.stacking.clone());
        let opts = LoadOptions {
            limits: config.server.decode_limits(),
            models: config.models.len(),
            report: false,
            kept_stacking,
        };
        // Stamp before reading: a change made while loading is seen at the next look.
        let stamp = stamp(mc);
        let print = fingerprint(mc);
        let loaded = Loaded::load(mc, &opts).map_err(|e| ReloadError::Failed(format!("{e:#}")))?;
        if let Some(old) = &serving
            && old.model.labels.len() != loaded.model.labels.len()
        {
            return Err(ReloadError::Failed(format!(
                "the new version has {} classes where the serving one has {}: clients and the decision table expect \
                 the serving set; a model with other classes needs a restart with its config",
                loaded.model.labels.len(),
                old.model.labels.len()
            )));
        }
        drop(serving);
        // The self-test files as they are now: a retrained model ships its own expected scores.
        let selftest = loaded.selftest().map_err(|e| ReloadError::Failed(format!("{e:#}")))?;
        if let Some(outcome) = &selftest
            && !outcome.failures.is_empty()
        {
            return Err(ReloadError::Failed(format!("self-test failed: {}", outcome.failures.join("; "))));
        }
        Ok(Prepared { generation, loaded, selftest, print, stamp })
    }

    /// Swap the new version in, in one step (the map and the lanes' guards together, under the
    /// map's lock); retire the old one once nothing holds it. Refused when a SIGHUP removed
    /// the model after this reload read the config.
    fn swap(&self, model: &str, new: ServedModel, guard: BatcherGuard, generation: u64) -> Result<(), ReloadError> {
        let new = Arc::new(new);
        let mut removed = false;
        let old = self
            .edit_served(|map| {
                if lock(&self.removed).get(model).is_some_and(|&g| g > generation) {
                    removed = true;
                    return None;
                }
                let old = map.insert(model.to_owned(), new);
                Some((old, lock(&self.guards).insert(model.to_owned(), guard)))
            })
            .map_err(ReloadError::NotServing)?;
        if removed {
            return Err(ReloadError::Unknown(format!(
                "model {model:?} was removed from the config while it reloaded; it stays removed"
            )));
        }
        if let Some((Some(old), Some(old_guard))) = old {
            self.retire_later(old, old_guard);
        }
        Ok(())
    }
}

/// Keep the old version's lanes until no request holds it (or `drain` passes), then stop them.
async fn retire(old: Arc<ServedModel>, guard: BatcherGuard, drain: Duration) {
    let until = tokio::time::Instant::now() + drain;
    while Arc::strong_count(&old) > 1 && tokio::time::Instant::now() < until {
        tokio::time::sleep(Duration::from_millis(20)).await;
    }
    let model = Arc::downgrade(&old.model);
    drop(guard);
    drop(old);
    // The lanes end after the pass they are running; the model's memory goes with the last.
    let until = tokio::time::Instant::now() + drain;
    while model.strong_count() > 0 && tokio::time::Instant::now() < until {
        tokio::time::sleep(Duration::from_millis(20)).await;
    }
    let _ = tokio::task::spawn_blocking(crate::background::release_free_memory).await;
}

fn lock<T>(m: &Mutex<T>) -> std::sync::MutexGuard<'_, T> {
    m.lock().unwrap_or_else(std::sync::PoisonError::into_inner)
}

#[cfg(test)]
mod tests {
    use super::*;

    fn reloader() -> (Arc<Reloader>, Config) {
        let config = Config::builtin(&Overrides::default()).unwrap();
        let (tx, _rx) = watch::channel(Readiness::Loading("test".into()));
        (Arc::new(Reloader::new(tx, &config, Overrides::default(), Metrics::new(), None)), config)
    }

    #[tokio::test]
    async fn a_reload_while_one_runs_for_the_same_model_is_refused_not_queued() {
        let (r, _) = reloader();
        lock(&r.running).push("washers".into());
        let e = r.reload("washers", Trigger::Signal).await.unwrap_err();
        assert!(matches!(e, ReloadError::Busy(ref m) if m == "washers"), "{e:?}");
        assert!(e.to_string().contains("already running"), "{e}");
        // Refused before anything else: the running reload's entry stays, no status is kept.
        assert_eq!(*lock(&r.running), vec!["washers".to_owned()]);
        assert!(r.status("washers").is_none());
        // Once the first has ended, the next goes ahead (here to "not serving": nothing loaded).
        lock(&r.running).clear();
        let e = r.reload("washers", Trigger::Signal).await.unwrap_err();
        assert!(matches!(e, ReloadError::NotServing(_)), "{e:?}");
        assert!(lock(&r.running).is_empty(), "the running mark is removed whatever the outcome");
    }

    #[test]
    fn a_watch_reloads_a_change_only_once_it_has_settled_and_never_retries_the_same_files() {
        let dir = std::env::temp_dir().join(format!("lineside-watch-unit-{}", std::process::id()));
        std::fs::create_dir_all(&dir).unwrap();
        let onnx = dir.join("m.onnx");
        std::fs::write(&onnx, b"first").unwrap();
        let (r, config) = reloader();
        let mut mc = config.models[0].clone();
        mc.onnx = crate::source::Source::File(onnx.clone());
        mc.labels = None;
        mc.selftest = None;
        let loaded = stamp(&mc).unwrap();
        lock(&r.watched).insert("m".into(), Watched { config: mc, loaded, seen: None, tried: None });
        assert!(r.settled_changes().is_empty(), "nothing changed");
        std::fs::write(dir.join("next"), b"second, longer").unwrap();
        std::fs::rename(dir.join("next"), &onnx).unwrap();
        assert!(r.settled_changes().is_empty() && r.settled_changes().is_empty(), "not serving: nothing to reload");
        r.ready.send_replace(Readiness::Ready(Arc::new(crate::http::state::Served::new())));
        std::fs::write(dir.join("next"), b"second, longer").unwrap();
        std::fs::rename(dir.join("next"), &onnx).unwrap();
        assert!(r.settled_changes().is_empty(), "a change just seen waits one interval");
        assert_eq!(r.settled_changes(), vec!["m".to_owned()], "unchanged at the next look: reload");
        assert!(r.settled_changes().is_empty(), "the same files are not tried twice");
        std::fs::write(dir.join("next"), b"the third, longest of all").unwrap();
        std::fs::rename(dir.join("next"), &onnx).unwrap();
        assert!(r.settled_changes().is_empty());
        assert_eq!(r.settled_changes(), vec!["m".to_owned()], "new files are tried");
        let _ = std::fs::remove_dir_all(&dir);
    }
}
