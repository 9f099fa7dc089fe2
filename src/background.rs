//! Background work that runs off the lanes (a reload's load, plan, warm-up and self-test) on
//! a thread of its own at idle CPU priority, so that it takes only the time live requests
//! leave: on Linux the thread's scheduling policy is `SCHED_IDLE` (it runs when no
//! ordinary thread of the box wants the core); elsewhere it runs at ordinary priority.
//!
//! Background work that runs a served model goes through the model's lanes instead
//! ([`crate::batch::Batcher::infer_background`]). Threads a background thread starts inherit
//! its policy and a thread cannot leave `SCHED_IDLE` without privilege, so nothing that
//! outlives the work (a lane) may be started from it: the caller starts lanes afterwards,
//! from an ordinary thread.

use anyhow::Context as _;

/// Run `work` on a new thread named `name` at idle priority and await its result.
///
/// # Errors
/// The thread cannot be started, or `work` panicked (the panic's message is in the error).
pub async fn run_idle<T: Send + 'static>(name: &str, work: impl FnOnce() -> T + Send + 'static) -> anyhow::Result<T> {
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

/// Whether the calling thread runs at idle priority (`SCHED_IDLE`; Linux only).
pub fn is_idle_priority() -> bool {
    #[cfg(target_os = "linux")]
    {
        // SAFETY: sched_getscheduler(0) reads the calling thread's policy; no pointers.
        unsafe { libc::sched_getscheduler(0) == libc::SCHED_IDLE }
    }
    #[cfg(not(target_os = "linux"))]
    {
        false
    }
}

/// Put the calling thread on `SCHED_IDLE` (lowering one's own priority needs no privilege).
fn lower_priority() {
    #[cfg(target_os = "linux")]
    {
        let param = libc::sched_param { sched_priority: 0 };
        // SAFETY: `param` is a valid sched_param that outlives the call; pid 0 is this thread.
        let rc = unsafe { libc::sched_setscheduler(0, libc::SCHED_IDLE, &raw const param) };
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
    async fn work_runs_at_idle_priority_and_the_caller_keeps_its_own() {
        let idle = run_idle("bg-test", is_idle_priority).await.unwrap();
        assert_eq!(idle, cfg!(target_os = "linux"), "Linux runs background work under SCHED_IDLE");
        assert!(!is_idle_priority(), "the calling thread's priority is left alone");
    }

    #[tokio::test]
    async fn a_panic_in_background_work_is_an_error_naming_it() {
        let e = run_idle("bg-panics", || -> u32 { panic!("bad file") }).await.unwrap_err();
        let msg = format!("{e:#}");
        assert!(msg.contains("bg-panics") && msg.contains("bad file"), "{msg}");
    }
}
