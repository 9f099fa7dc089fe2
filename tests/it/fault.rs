//! A fault-injecting engine that tests put around the real one (through
//! `RunOptions::wrap_lanes`): lanes run the real engine, and the plan can make a run panic,
//! stall once, or hold every run until the test releases it. Nothing of it is in the
//! production path.

use std::sync::atomic::{AtomicU64, AtomicUsize, Ordering};
use std::sync::{Arc, Condvar, Mutex};
use std::time::Duration;

use lineside::model::{EngineState, Input, RunError, StateWrap};

/// What the wrapped lanes do, shared between the test and every lane.
#[derive(Clone, Default)]
pub(crate) struct FaultPlan {
    /// Runs before the injected panic (0: never): the run that brings it from 1 to 0 panics.
    pub(crate) panic_countdown: Arc<AtomicUsize>,
    /// Milliseconds the next run stalls its lane (0: none; cleared when used).
    pub(crate) stall_once_ms: Arc<AtomicU64>,
    gate: Arc<Gate>,
}

#[derive(Default)]
struct Gate {
    held: Mutex<bool>,
    opened: Condvar,
    /// Runs that have reached the engine (held or not).
    entered: AtomicUsize,
}

impl FaultPlan {
    /// Make every run wait at the engine until [`FaultPlan::release`].
    pub(crate) fn hold(&self) {
        *self.gate.held.lock().unwrap() = true;
    }

    /// Let held runs (and later ones) through.
    pub(crate) fn release(&self) {
        *self.gate.held.lock().unwrap() = false;
        self.gate.opened.notify_all();
    }

    /// Runs that have reached the engine so far.
    pub(crate) fn entered(&self) -> usize {
        self.gate.entered.load(Ordering::SeqCst)
    }

    /// Wait (polling, bounded at 30 s so that a broken test fails instead of hanging) until
    /// `n` runs have reached the engine.
    pub(crate) async fn wait_entered(&self, n: usize) {
        for _ in 0..3000 {
            if self.entered() >= n {
                return;
            }
            tokio::time::sleep(Duration::from_millis(10)).await;
        }
        panic!("only {} of {n} runs reached the engine in 30 s", self.entered());
    }

    /// The wrap that puts this plan around each lane's engine state.
    pub(crate) fn wrap(&self) -> StateWrap {
        let plan = self.clone();
        Arc::new(move |inner| Box::new(Faulty { inner, plan: plan.clone() }) as Box<dyn EngineState>)
    }

    fn before_run(&self) {
        self.gate.entered.fetch_add(1, Ordering::SeqCst);
        let mut held = self.gate.held.lock().unwrap();
        while *held {
            held = self.gate.opened.wait(held).unwrap();
        }
        drop(held);
        std::thread::sleep(Duration::from_millis(self.stall_once_ms.swap(0, Ordering::SeqCst)));
        let fire = self.panic_countdown.fetch_update(Ordering::SeqCst, Ordering::SeqCst, |n| n.checked_sub(1)) == Ok(1);
        if fire {
            panic!("injected fault (FaultPlan)");
        }
    }
}

/// The real engine state behind the plan.
struct Faulty {
    inner: Box<dyn EngineState>,
    plan: FaultPlan,
}

impl EngineState for Faulty {
    fn run(&mut self, input: Input<'_>, images: usize) -> Result<Vec<f32>, RunError> {
        self.plan.before_run();
        self.inner.run(input, images)
    }
}

#[test]
fn the_panic_fires_once_on_the_counted_run() {
    let f = FaultPlan::default();
    let fires = |f: &FaultPlan| std::panic::catch_unwind(|| f.before_run()).is_err();
    assert!(!fires(&f), "0 never fires");
    f.panic_countdown.store(2, Ordering::SeqCst);
    assert_eq!([fires(&f), fires(&f), fires(&f)], [false, true, false]);
    assert_eq!(f.entered(), 4);
}
