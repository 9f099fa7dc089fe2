//! Background work that runs off the lanes (a reload's load, plan, warm-up and self-test) on
//! a thread of its own at low CPU priority, so that live requests come first: on Linux the
//! thread's nice value is raised to [`BACKGROUND_NICE`]. The scheduler then gives a lane
//! that wakes the core at once, and when both want it, shares it about 10 : 1 in the lane's
//! favour (nice 0 weighs 1024, nice 10 weighs 110); on a box with spare time the work runs at
//! full speed, on a saturated one it still progresses at about a tenth of a core.
//!
//! Why not `SCHED_IDLE` (run only when nothing else wants the core): measured here, a reload
//! under that policy never finished while 16 clients kept the cores busy, and requests timed
//! out during it (a thread starved while holding a lock others need, such as the allocator's,
//! stalls them too). A nice value bounds that wait instead.
//!
//! Background work that runs a served model goes through the model's lanes instead
//! ([`crate::batch::Batcher::infer_background`]). Threads a background thread starts inherit
//! its nice value and an unprivileged thread cannot lower it again, so nothing that outlives
//! the work (a lane) may be started from it: the caller starts lanes afterwards, from an
//! ordinary thread.

use anyhow::Context as _;

/// The nice value of background threads (0 is ordinary, 19 the lowest priority).
pub const BACKGROUND_NICE: i32 = 10;

/// Run `work` on a new thread named `name` at low priority and await its result.
///
/// # Errors
/// The thread cannot be started, or `work` panicked (the panic's message is in the error).
pub async fn run_background<T: Send + 'static>(
    name: &str,
    work: impl FnOnce() -> T + Send + 'static,
) -> anyhow::Result<T> {
    let (tx, rx) = tokio::sync::oneshot::channel();
    std::thread::Builder::new()
        .name(name.to_owned())
        .spawn(move || {
            lower_priority();
            let out = std::panic::catch_unwind(std::panic::AssertUnwindSafe(work));
            let _ = tx.send(out);
        })
        .with_context(|| format!("cannot start the background thread {name:?}"))?;
    match rx.await {
        Ok(Ok(out)) => Ok(out),
        Ok(Err(panic)) => {
            let why = panic
                .downcast_ref::<&str>()
                .map(|s| (*s).to_owned())
                .or_else(|| panic.downcast_ref::<String>().cloned())
                .unwrap_or_else(|| "a panic".to_owned());
            anyhow::bail!("the background work {name:?} panicked: {why}")
        }
        Err(_) => anyhow::bail!("the background thread {name:?} ended without an answer"),
    }
}

/// Hand the allocator's free memory back to the system (glibc's `malloc_trim`, which
/// releases free pages in every arena, not only at a heap's top). Without it, each reload of
/// a large model left the memory of its load and of the version it replaced resident:
/// measured with ResNet-18 (46.8 MB of ONNX), 132 MB after start grew to 972 MB after 15
/// reloads. A no-op off glibc.
pub fn release_free_memory() {
    #[cfg(all(target_os = "linux", target_env = "gnu"))]
    // SAFETY: malloc_trim takes a size and touches only the allocator's own state.
    unsafe {
        libc::malloc_trim(0);
    }
}

/// The calling thread's nice value (Linux; 0 elsewhere).
pub fn nice() -> i32 {
    #[cfg(target_os = "linux")]
    {
        // SAFETY: gettid has no arguments; getpriority reads the nice value of that thread
        // (on Linux, PRIO_PROCESS with a thread id names one thread). -1 is also a valid nice
        // value, but background threads never have it.
        unsafe { libc::getpriority(libc::PRIO_PROCESS, libc::gettid() as libc::id_t) }
    }
    #[cfg(not(target_os = "linux"))]
    {
        0
    }
}

/// Raise the calling thread's nice value to [`BACKGROUND_NICE`], unless it is already that
/// high (lowering one's own priority needs no privilege).
fn lower_priority() {
    #[cfg(target_os = "linux")]
    {
        // A process already started at a lower priority (a unit's `Nice=15`) keeps it.
        if nice() >= BACKGROUND_NICE {
            return;
        }
        // SAFETY: as in `nice`; setpriority changes only this thread.
        let rc = unsafe { libc::setpriority(libc::PRIO_PROCESS, libc::gettid() as libc::id_t, BACKGROUND_NICE) };
        if rc != 0 {
            tracing::warn!(
                cause = %std::io::Error::last_os_error(),
                "cannot lower the background thread's priority; it runs at ordinary priority"
            );
        }
    }
}

#[cfg(test)]
mod tests {
    use super::*;

    #[tokio::test]
    async fn work_runs_at_low_priority_and_the_caller_keeps_its_own() {
        let before = nice();
        let inside = run_background("bg-test", nice).await.unwrap();
        if cfg!(target_os = "linux") {
            assert_eq!(inside, BACKGROUND_NICE.max(before), "background work runs at nice 10 (or lower priority)");
        }
        assert_eq!(nice(), before, "the calling thread's priority is left alone");
    }

    #[tokio::test]
    async fn a_panic_in_background_work_is_an_error_naming_it() {
        let e = run_background("bg-panics", || -> u32 { panic!("bad file") }).await.unwrap_err();
        let msg = format!("{e:#}");
        assert!(msg.contains("bg-panics") && msg.contains("bad file"), "{msg}");
    }
}
