//! Lanes with a stub engine: the order passes run in, what background work may delay, and
//! what a closing batcher answers. The stub engine records each run's images (by the id
//! written in each image's first value) and can hold every run until the test releases it,
//! so no test depends on how fast this machine is.

use std::sync::atomic::{AtomicUsize, Ordering};
use std::sync::{Arc, Condvar, Mutex};
use std::time::{Duration, Instant};

use super::{BatchError, Batcher, BatcherGuard, BatchingConfig, Lanes};
use crate::metrics::Metrics;
use crate::model::{EngineKind, EngineState, Input, Model, Planned, RunError, StackMode, Tensor};

const LEN: u32 = 4;
const CAP: usize = 8;

/// The stub engine: answers each image with `[id, 2 * id]` and logs each run's ids.
#[derive(Default)]
struct Stub {
    log: Mutex<Vec<Vec<u32>>>,
    held: Mutex<bool>,
    opened: Condvar,
    entered: AtomicUsize,
}

struct StubPlan(Arc<Stub>);
struct StubState(Arc<Stub>);

impl Planned for StubPlan {
    fn kind(&self) -> EngineKind {
        EngineKind::Tract
    }
    fn can_stack(&self) -> bool {
        true
    }
    fn state(&self, _threads: usize) -> Result<Box<dyn EngineState>, RunError> {
        Ok(Box::new(StubState(Arc::clone(&self.0))))
    }
}

impl EngineState for StubState {
    fn run(&mut self, input: Input<'_>, images: usize) -> Result<Vec<f32>, RunError> {
        let Input::F32(x) = input else { return Err(RunError::Engine("stub takes f32".into())) };
        self.0.entered.fetch_add(1, Ordering::SeqCst);
        let mut held = self.0.held.lock().unwrap();
        while *held {
            held = self.0.opened.wait(held).unwrap();
        }
        drop(held);
        let ids: Vec<u32> = (0..images).map(|i| x[i * LEN as usize] as u32).collect();
        self.0.log.lock().unwrap().push(ids.clone());
        Ok(ids.iter().flat_map(|&id| [id as f32, 2.0 * id as f32]).collect())
    }
}

impl Stub {
    fn hold(&self) {
        *self.held.lock().unwrap() = true;
    }
    fn release(&self) {
        *self.held.lock().unwrap() = false;
        self.opened.notify_all();
    }
    fn log(&self) -> Vec<Vec<u32>> {
        self.log.lock().unwrap().clone()
    }
}

/// One stacking lane over the stub, and the metrics it records into.
fn start(stub: &Arc<Stub>) -> (Batcher, BatcherGuard, Metrics) {
    let model = Arc::new(Model::stub(Arc::new(StubPlan(Arc::clone(stub))), LEN, 2, true));
    let cfg = BatchingConfig {
        batch_cap: CAP,
        gather: Duration::ZERO,
        backlog: 64,
        lanes: Lanes::Fixed(1),
        lane_threads: 1,
        stack: StackMode::Always,
    };
    let metrics = Metrics::new();
    let mm = metrics.for_model("stub", "0", "tract", &["0".into(), "1".into()]);
    let (b, g) = Batcher::start(model, &cfg, 1, mm, None).unwrap();
    (b, g, metrics)
}

fn image(id: u32) -> Tensor {
    let mut x = vec![0.0; LEN as usize];
    x[0] = id as f32;
    Tensor::F32(x)
}

fn later() -> Instant {
    Instant::now() + Duration::from_secs(60)
}

/// Wait until `ok` holds; the bound only turns a broken test into a failure, not a hang.
async fn until(what: &str, ok: impl Fn() -> bool) {
    for _ in 0..2000 {
        if ok() {
            return;
        }
        tokio::time::sleep(Duration::from_millis(5)).await;
    }
    panic!("timed out waiting for {what}");
}

#[tokio::test(flavor = "multi_thread", worker_threads = 2)]
async fn live_requests_run_before_queued_background_work() {
    let stub = Arc::new(Stub::default());
    let (b, _guard, metrics) = start(&stub);
    stub.hold();
    let first = tokio::spawn({
        let b = b.clone();
        async move { b.infer(image(1), later()).await }
    });
    until("the lane to take job 1", || stub.entered.load(Ordering::SeqCst) == 1).await;
    let bg: Vec<_> = (10..13)
        .map(|id| {
            let b = b.clone();
            tokio::spawn(async move { b.infer_background(image(id)).await })
        })
        .collect();
    until("three background jobs queued", || b.background_depth().0 == 3).await;
    let live: Vec<_> = (2..4)
        .map(|id| {
            let b = b.clone();
            tokio::spawn(async move { b.infer(image(id), later()).await })
        })
        .collect();
    until("two live jobs queued", || b.depth().0 == 2).await;
    stub.release();
    assert_eq!(first.await.unwrap().unwrap().scores, vec![1.0, 2.0]);
    for (id, h) in (2..4).zip(live) {
        assert_eq!(h.await.unwrap().unwrap().scores, vec![id as f32, 2.0 * id as f32], "live job {id}");
    }
    for (id, h) in (10..13).zip(bg) {
        assert_eq!(h.await.unwrap().unwrap().scores, vec![id as f32, 2.0 * id as f32], "background job {id}");
    }
    // The live jobs queued after the background ones ran first, in one pass; then the
    // background pass (its order is the order the tasks were queued in: any).
    let mut log = stub.log();
    log.iter_mut().for_each(|pass| pass.sort_unstable());
    assert_eq!(log, vec![vec![1], vec![2, 3], vec![10, 11, 12]]);
    let text = metrics.render();
    assert!(text.contains("lineside_background_frames_total{model=\"stub\"} 3"), "{text}");
    assert!(text.contains("lineside_pass_size_requests_count{model=\"stub\"} 2"), "live passes only: {text}");
}

#[tokio::test(flavor = "multi_thread", worker_threads = 2)]
async fn a_live_request_waits_for_at_most_the_background_pass_in_progress() {
    let stub = Arc::new(Stub::default());
    let (b, _guard, _metrics) = start(&stub);
    stub.hold();
    // 12 background images: more than the 8 (lanes x batch_cap) that may wait, so some
    // submitters wait for room; none is refused.
    let bg: Vec<_> = (10..22)
        .map(|id| {
            let b = b.clone();
            tokio::spawn(async move { b.infer_background(image(id)).await })
        })
        .collect();
    until("a background pass to start", || stub.entered.load(Ordering::SeqCst) == 1).await;
    let live = tokio::spawn({
        let b = b.clone();
        async move { b.infer(image(1), later()).await }
    });
    until("the live job queued", || b.depth().0 == 1).await;
    stub.release();
    assert_eq!(live.await.unwrap().unwrap().scores, vec![1.0, 2.0]);
    for (id, h) in (10..22).zip(bg) {
        assert_eq!(h.await.unwrap().unwrap().scores, vec![id as f32, 2.0 * id as f32], "background job {id}");
    }
    let log = stub.log();
    // The pass in progress, then the live job, then the rest of the background work.
    assert_eq!(log[1], vec![1], "{log:?}");
    assert!(log[0].len() <= CAP && log[0].iter().all(|&id| id >= 10), "{log:?}");
    let ran: usize = log.iter().map(Vec::len).sum();
    assert_eq!(ran, 13, "every image ran once: {log:?}");
}

#[tokio::test(flavor = "multi_thread", worker_threads = 2)]
async fn expired_jobs_are_not_run_and_a_closing_batcher_answers_every_waiting_job() {
    let stub = Arc::new(Stub::default());
    let (b, guard, _metrics) = start(&stub);
    let submit = |id: u32, deadline: Instant| {
        let b = b.clone();
        tokio::spawn(async move { b.infer(image(id), deadline).await })
    };
    // Job 2 is past its deadline before the lane is free: answered without running.
    stub.hold();
    let first = submit(1, later());
    until("the lane to take job 1", || stub.entered.load(Ordering::SeqCst) == 1).await;
    let expired = submit(2, Instant::now());
    until("job 2 queued", || b.depth().0 == 1).await;
    stub.release();
    assert_eq!(first.await.unwrap().unwrap().scores, vec![1.0, 2.0]);
    let expired = expired.await.unwrap();
    assert!(matches!(expired, Err(BatchError::DeadlineExpired { .. })), "{expired:?}");
    // Closing while a pass runs: the waiting live and background jobs are answered at once,
    // new ones refused, and the pass in progress still answers.
    stub.hold();
    let running = submit(5, later());
    until("the lane to take job 5", || stub.entered.load(Ordering::SeqCst) == 2).await;
    let waiting = submit(3, later());
    let bg = tokio::spawn({
        let b = b.clone();
        async move { b.infer_background(image(10)).await }
    });
    until("both queued", || b.depth().0 == 1 && b.background_depth().0 == 1).await;
    drop(guard);
    assert_eq!(waiting.await.unwrap().unwrap_err(), BatchError::ShuttingDown);
    assert_eq!(bg.await.unwrap().unwrap_err(), BatchError::ShuttingDown);
    assert_eq!(b.infer(image(4), later()).await.unwrap_err(), BatchError::ShuttingDown);
    assert_eq!(b.infer_background(image(11)).await.unwrap_err(), BatchError::ShuttingDown);
    stub.release();
    assert_eq!(running.await.unwrap().unwrap().scores, vec![5.0, 10.0]);
    assert_eq!(stub.log(), vec![vec![1], vec![5]], "only jobs 1 and 5 ran");
}
