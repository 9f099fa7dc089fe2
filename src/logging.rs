//! The log filter, changeable while serving (`PUT /log-filter`, an admin action) and put back
//! to the startup filter after a set time, so a debug session at the line cannot be
//! forgotten and fill the disk.

use std::sync::Mutex;
use std::time::Duration;

/// Applies a filter (tracing-subscriber's `EnvFilter` syntax) to the running logger.
pub type ApplyFilter = Box<dyn Fn(&str) -> Result<(), String> + Send + Sync>;

/// The running logger's filter: what it was at start, what it is now, and until when.
pub struct LogControl {
    apply: ApplyFilter,
    startup: String,
    state: Mutex<State>,
}

impl std::fmt::Debug for LogControl {
    fn fmt(&self, f: &mut std::fmt::Formatter<'_>) -> std::fmt::Result {
        f.debug_struct("LogControl").field("startup", &self.startup).finish_non_exhaustive()
    }
}

#[derive(Debug, Clone)]
struct State {
    filter: String,
    /// Unix seconds when the startup filter comes back; `None`: it is in force.
    until: Option<u64>,
    /// Counts changes, so that a revert timer of an older change does nothing.
    generation: u64,
}

/// The filter in force, as `GET /log-filter` shows it.
#[derive(Debug, Clone, serde::Serialize)]
pub struct FilterView {
    /// The filter now.
    pub filter: String,
    /// The filter at start (`--log-level` or `LINESIDE_LOG`, else `info`).
    pub startup: String,
    /// Unix seconds when `startup` comes back; absent when it is in force.
    #[serde(skip_serializing_if = "Option::is_none")]
    pub reverts_at: Option<u64>,
}

/// Longest a changed filter stays (4 hours: a shift's debugging, not a permanent setting).
pub const MAX_MINUTES: u64 = 240;

impl LogControl {
    /// Control a logger whose filter is `startup` now, through `apply`.
    pub fn new(startup: impl Into<String>, apply: ApplyFilter) -> LogControl {
        let startup = startup.into();
        LogControl { apply, state: Mutex::new(State { filter: startup.clone(), until: None, generation: 0 }), startup }
    }

    fn lock(&self) -> std::sync::MutexGuard<'_, State> {
        self.state.lock().unwrap_or_else(std::sync::PoisonError::into_inner)
    }

    /// The filter in force.
    pub fn view(&self) -> FilterView {
        let s = self.lock();
        FilterView { filter: s.filter.clone(), startup: self.startup.clone(), reverts_at: s.until }
    }

    /// Use `filter` for `duration` from `now` (Unix seconds); returns the change's generation
    /// for [`LogControl::revert`].
    ///
    /// # Errors
    /// A filter the logger does not accept (the message says why).
    pub fn set(&self, filter: &str, duration: Duration, now: u64) -> Result<u64, String> {
        let mut s = self.lock();
        (self.apply)(filter)?;
        s.filter = filter.to_owned();
        s.until = Some(now + duration.as_secs());
        s.generation += 1;
        Ok(s.generation)
    }

    /// Put the startup filter back, unless the filter changed again since `generation`.
    pub fn revert(&self, generation: u64) {
        let mut s = self.lock();
        if s.generation != generation || s.until.is_none() {
            return;
        }
        match (self.apply)(&self.startup) {
            Ok(()) => {
                s.filter = self.startup.clone();
                s.until = None;
            }
            Err(e) => tracing::error!(cause = %e, "cannot put the startup log filter back"),
        }
    }
}

#[cfg(test)]
mod tests {
    use super::*;
    use std::sync::Arc;

    #[test]
    fn a_change_reverts_unless_a_newer_one_came() {
        let applied = Arc::new(Mutex::new(Vec::<String>::new()));
        let seen = Arc::clone(&applied);
        let c = LogControl::new(
            "info",
            Box::new(move |f| {
                if f.contains('!') {
                    return Err(format!("bad filter {f:?}"));
                }
                seen.lock().unwrap().push(f.to_owned());
                Ok(())
            }),
        );
        let g1 = c.set("debug", Duration::from_secs(60), 100).unwrap();
        assert_eq!(c.view().reverts_at, Some(160));
        let g2 = c.set("lineside=trace", Duration::from_secs(60), 110).unwrap();
        c.revert(g1);
        assert_eq!(c.view().filter, "lineside=trace");
        assert!(c.set("!", Duration::from_secs(1), 120).is_err());
        assert_eq!(c.view().filter, "lineside=trace");
        c.revert(g2);
        let v = c.view();
        assert_eq!((v.filter.as_str(), v.reverts_at), ("info", None));
        assert_eq!(*applied.lock().unwrap(), ["debug", "lineside=trace", "info"]);
    }
}
