//! Model reloads without stopping the line: `POST /models/{model}/reload` and SIGHUP (which
//! reloads every model whose config entry or files changed, loads new ones and retires
//! removed ones). Not done yet (docs/reload.md says so): the `watch` key, warming the new
//! version at background priority, and keeping calibration decisions across a reload.
//!
//! A reload re-reads the model's config entry and files, loads, checks and self-tests the new
//! version beside the serving one (on a blocking thread), starts its lanes, and only then
//! swaps it into the served map in one step. Requests that already hold the old map finish on
//! the old version; its lanes stop once no request holds it (bounded by `drain_ms`), and its
//! memory goes with them. A failed reload changes nothing that serves.

use std::collections::BTreeMap;
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
        }
    }

    /// SIGHUP: read the config file again; reload every model whose entry or files changed,
    /// load models that are new, retire models that are gone; name `[server]` changes that
    /// need a restart. Each model's outcome is logged and shown on `/models/{model}`.
    pub async fn on_hangup(self: &Arc<Self>) {
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
        for mc in &config.models {
            let known = lock(&self.fingerprints).get(&mc.name).copied();
            if known.is_some() && known == fingerprint(mc) {
                continue;
            }
            let _ = self.reload(&mc.name, Trigger::Signal).await;
        }
        let gone: Vec<String> = match &*self.ready.borrow() {
            Readiness::Ready(s) => s.keys().filter(|n| config.models.iter().all(|m| &m.name != *n)).cloned().collect(),
            _ => Vec::new(),
        };
        for name in gone {
            self.retire_model(&name);
        }
    }

    /// Stop serving `model` (removed from the config): requests already holding it finish.
    fn retire_model(&self, model: &str) {
        let old = self.edit_served(|map| map.remove(model)).ok().flatten();
        lock(&self.fingerprints).remove(model);
        if let (Some(old), Some(guard)) = (old, lock(&self.guards).remove(model)) {
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
        let this = Arc::clone(self);
        let name = model.to_owned();
        let result = tokio::task::spawn_blocking(move || this.load_new(&name))
            .await
            .unwrap_or_else(|e| Err(ReloadError::Failed(format!("the reload panicked: {e}"))));
        let outcome = match result {
            Ok((new, guard)) => self.swap(model, new, guard),
            Err(e) => Err(e),
        };
        lock(&self.running).retain(|m| m != model);
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
        if !matches!(outcome, Err(ReloadError::Busy(_) | ReloadError::Unknown(_) | ReloadError::NotServing(_))) {
            lock(&self.status).insert(model.to_owned(), status.clone());
        }
        outcome.map(|()| status)
    }

    fn serving_version(&self, model: &str) -> Option<String> {
        match &*self.ready.borrow() {
            Readiness::Ready(s) | Readiness::Draining(s) => s.get(model).map(|m| m.model.version.clone()),
            _ => None,
        }
    }

    /// Read the config again, load, check and self-test the new version, start its lanes.
    fn load_new(&self, model: &str) -> Result<(ServedModel, BatcherGuard), ReloadError> {
        let config =
            self.read_config().map_err(|e| ReloadError::Failed(format!("the config no longer reads: {e:#}")))?;
        let mc = config.named(model).map_err(|e| ReloadError::Unknown(format!("{e:#}")))?;
        let old_labels = match &*self.ready.borrow() {
            Readiness::Ready(s) => s.get(model).map(|m| m.model.labels.clone()),
            other => return Err(ReloadError::NotServing(other.describe())),
        };
        let opts = LoadOptions { max_pixels: config.server.max_pixels, models: config.models.len(), report: false };
        let print = fingerprint(mc);
        let loaded = Loaded::load(mc, &opts).map_err(|e| ReloadError::Failed(format!("{e:#}")))?;
        if let Some(old) = old_labels
            && old.len() != loaded.model.labels.len()
        {
            return Err(ReloadError::Failed(format!(
                "the new version has {} classes where the serving one has {}: clients and the decision table expect \
                 the serving set; a model with other classes needs a restart with its config",
                loaded.model.labels.len(),
                old.len()
            )));
        }
        // The self-test files as they are now: a retrained model ships its own expected scores.
        let selftest = loaded.selftest().map_err(|e| ReloadError::Failed(format!("{e:#}")))?;
        if let Some(outcome) = &selftest
            && !outcome.failures.is_empty()
        {
            return Err(ReloadError::Failed(format!("self-test failed: {}", outcome.failures.join("; "))));
        }
        let started = loaded
            .start(&self.metrics, self.wrap.as_ref(), selftest)
            .map_err(|e| ReloadError::Failed(format!("{e:#}")))?;
        if let Some(p) = print {
            lock(&self.fingerprints).insert(model.to_owned(), p);
        }
        Ok(started)
    }

    /// Swap the new version in, in one step; retire the old one once nothing holds it.
    fn swap(&self, model: &str, new: ServedModel, guard: BatcherGuard) -> Result<(), ReloadError> {
        let new = Arc::new(new);
        // `Some(previous)`: always a change (the new version goes in whether or not one served).
        let old =
            self.edit_served(|map| Some(map.insert(model.to_owned(), new))).map_err(ReloadError::NotServing)?.flatten();
        let old_guard = lock(&self.guards).insert(model.to_owned(), guard);
        if let (Some(old), Some(old_guard)) = (old, old_guard) {
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
    drop(guard);
    drop(old);
}

fn lock<T>(m: &Mutex<T>) -> std::sync::MutexGuard<'_, T> {
    m.lock().unwrap_or_else(std::sync::PoisonError::into_inner)
}
