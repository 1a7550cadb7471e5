//! The batching scheduler, deterministically: tokio's paused clock drives `batch_wait`, and a
//! runner that can be held shows which samples rode together.

use std::sync::mpsc::{Receiver, Sender, channel};
use std::sync::{Arc, Mutex};
use std::time::Duration;

use convoy::bundle::BundleWriter;
use convoy::bundle::manifest::{InputSpec, OutputKind, OutputSpec};
use convoy::graph::Op;
use convoy::graph::build::GraphBuilder;
use convoy::registry::{LoadSettings, ModelVersion, Policy, Registry};
use convoy::scheduler::{BatchRunner, ComputeError, Scheduler, SchedulerConfig, SubmitError};

/// A model with input [2] and output [1]; the runner below ignores its engine.
fn model() -> Arc<ModelVersion> {
    let r = Registry::new(LoadSettings::default(), Policy::default(), None);
    r.load_bytes(adder("1"), "test").0.result.unwrap();
    r.resolve("adder", "").unwrap()
}

/// The bundle of [`model`], as `version`.
fn adder(version: &str) -> Vec<u8> {
    let mut b = GraphBuilder::new("x", &[2]);
    let w = b.tensor("w", &[1, 2], vec![1.0, 1.0]);
    let y = b.node(
        "sum",
        Op::Dense {
            weight: w,
            bias: None,
            weight_layout: Default::default(),
        },
        &["x"],
    );
    let (graph, tensors) = b.finish(&y);
    let mut w = BundleWriter::new(
        "adder",
        version,
        graph,
        InputSpec {
            shape: vec![2],
            image: None,
        },
        OutputSpec {
            labels: vec![],
            kind: OutputKind::Logits,
        },
    );
    for (n, s, d) in tensors {
        w.add_tensor(n, &s, d).unwrap();
    }
    w.to_bytes().unwrap()
}

/// Sums each sample's two inputs; records batch sizes; optionally waits for a go-ahead per
/// batch; fails a batch holding the value 666 and panics on 999.
struct TestRunner {
    sizes: Mutex<Vec<usize>>,
    gate: Option<Mutex<Receiver<()>>>,
}

impl BatchRunner for TestRunner {
    fn run(
        &self,
        _: &ModelVersion,
        inputs: &[f32],
        count: usize,
        out: &mut [f32],
    ) -> Result<(), String> {
        self.sizes.lock().unwrap().push(count);
        if let Some(g) = &self.gate {
            g.lock().unwrap().recv().map_err(|e| e.to_string())?;
        }
        if inputs.contains(&999.0) {
            panic!("test panic");
        }
        if inputs.contains(&666.0) {
            return Err("bad sample".into());
        }
        for (o, x) in out.iter_mut().zip(inputs.chunks(2)) {
            *o = x[0] + x[1];
        }
        Ok(())
    }
}

fn setup(
    gated: bool,
    limit: usize,
    wait_ms: u64,
    queue: usize,
) -> (Scheduler, Arc<TestRunner>, Option<Sender<()>>) {
    let (tx, rx) = channel();
    let runner = Arc::new(TestRunner {
        sizes: Mutex::new(Vec::new()),
        gate: gated.then(|| Mutex::new(rx)),
    });
    let s = Scheduler::with_runner(
        &SchedulerConfig {
            compute_threads: 1,
            batch_limit: limit,
            batch_wait: Duration::from_millis(wait_ms),
            queue_limit: queue,
        },
        runner.clone(),
    );
    (s, runner, gated.then_some(tx))
}

/// Lets the batcher task run (the runtime is single-threaded).
async fn settle() {
    for _ in 0..20 {
        tokio::task::yield_now().await;
    }
}

/// Waits (on the real clock) until the held runner has received `n` batches.
async fn until_batches(r: &TestRunner, n: usize) {
    for _ in 0..2000 {
        if r.sizes.lock().unwrap().len() >= n {
            return;
        }
        settle().await;
        std::thread::sleep(Duration::from_millis(1));
    }
    panic!("only {:?} batches", r.sizes.lock().unwrap());
}

#[tokio::test(start_paused = true)]
async fn an_idle_thread_takes_everything_waiting() {
    let (s, r, _) = setup(false, 8, 10, 100);
    let m = model();
    let rx: Vec<_> = (0..3)
        .map(|i| s.submit(m.clone(), vec![i as f32, 1.0], 1, None).unwrap())
        .collect();
    for (i, rx) in rx.into_iter().enumerate() {
        let c = rx.await.unwrap().unwrap();
        assert_eq!(c.outputs, [i as f32 + 1.0]);
        assert_eq!(c.batch_size, 3);
    }
    assert_eq!(*r.sizes.lock().unwrap(), [3]);
}

#[tokio::test(start_paused = true)]
async fn a_large_request_spans_full_batches() {
    let (s, r, gate) = setup(true, 4, 10, 100);
    let gate = gate.unwrap();
    let m = model();
    let inputs: Vec<f32> = (0..20).map(|v| v as f32).collect();
    let rx = s.submit(m.clone(), inputs, 10, None).unwrap();
    for n in 1..=3 {
        until_batches(&r, n).await;
        gate.send(()).unwrap();
    }
    let c = rx.await.unwrap().unwrap();
    assert_eq!(*r.sizes.lock().unwrap(), [4, 4, 2]);
    let want: Vec<f32> = (0..10).map(|i| (4 * i + 1) as f32).collect();
    assert_eq!(c.outputs, want, "parts come back in sample order");
    assert_eq!(c.batch_size, 2);
}

#[tokio::test(start_paused = true)]
async fn a_busy_thread_seals_the_batch_after_batch_wait() {
    let (s, r, gate) = setup(true, 8, 10, 100);
    let gate = gate.unwrap();
    let m = model();
    let a = s.submit(m.clone(), vec![1.0, 0.0], 1, None).unwrap();
    until_batches(&r, 1).await; // A computes (held)
    let b = s.submit(m.clone(), vec![2.0, 0.0], 1, None).unwrap();
    let c = s.submit(m.clone(), vec![3.0, 0.0], 1, None).unwrap();
    settle().await;
    tokio::time::advance(Duration::from_millis(11)).await;
    settle().await; // the batch of B and C is sealed; it waits for the thread
    let d = s.submit(m.clone(), vec![4.0, 0.0], 1, None).unwrap();
    settle().await;
    gate.send(()).unwrap(); // A done
    until_batches(&r, 2).await;
    gate.send(()).unwrap(); // B + C done
    until_batches(&r, 3).await;
    gate.send(()).unwrap(); // D done
    for (rx, want) in [(a, 1.0), (b, 2.0), (c, 3.0), (d, 4.0)] {
        assert_eq!(rx.await.unwrap().unwrap().outputs, [want]);
    }
    assert_eq!(
        *r.sizes.lock().unwrap(),
        [1, 2, 1],
        "D arrived after the seal"
    );
}

#[tokio::test(start_paused = true)]
async fn a_full_queue_sheds_at_once() {
    let (s, r, gate) = setup(true, 8, 10, 4);
    let gate = gate.unwrap();
    let m = model();
    let first = s.submit(m.clone(), vec![0.0, 0.0], 1, None).unwrap();
    until_batches(&r, 1).await;
    let queued: Vec<_> = (0..4)
        .map(|_| s.submit(m.clone(), vec![0.0, 1.0], 1, None).unwrap())
        .collect();
    let refused = s.submit(m.clone(), vec![0.0, 1.0], 1, None).unwrap_err();
    assert!(
        matches!(refused, SubmitError::Full { limit: 4, .. }),
        "{refused}"
    );
    gate.send(()).unwrap();
    until_batches(&r, 2).await;
    gate.send(()).unwrap();
    first.await.unwrap().unwrap();
    for q in queued {
        assert_eq!(q.await.unwrap().unwrap().batch_size, 4);
    }
    // Room again.
    let again = s.submit(m.clone(), vec![5.0, 1.0], 1, None).unwrap();
    until_batches(&r, 3).await;
    gate.send(()).unwrap();
    assert_eq!(again.await.unwrap().unwrap().outputs, [6.0]);
}

#[tokio::test(start_paused = true)]
async fn expired_and_cancelled_requests_are_not_computed() {
    let (s, r, gate) = setup(true, 8, 50, 100);
    let gate = gate.unwrap();
    let m = model();
    let a = s.submit(m.clone(), vec![1.0, 0.0], 1, None).unwrap();
    until_batches(&r, 1).await;
    let soon = tokio::time::Instant::now() + Duration::from_millis(5);
    let late = s.submit(m.clone(), vec![2.0, 0.0], 1, Some(soon)).unwrap();
    let gone = s.submit(m.clone(), vec![3.0, 0.0], 1, None).unwrap();
    drop(gone);
    let kept = s.submit(m.clone(), vec![4.0, 0.0], 1, None).unwrap();
    settle().await;
    tokio::time::advance(Duration::from_millis(10)).await;
    settle().await;
    gate.send(()).unwrap();
    until_batches(&r, 2).await;
    gate.send(()).unwrap();
    a.await.unwrap().unwrap();
    assert!(matches!(
        late.await.unwrap(),
        Err(ComputeError::DeadlineExceeded { .. })
    ));
    assert_eq!(kept.await.unwrap().unwrap().outputs, [4.0]);
    assert_eq!(
        *r.sizes.lock().unwrap(),
        [1, 1],
        "only A and the kept request were computed"
    );
}

#[tokio::test(start_paused = true)]
async fn a_failed_batch_fails_only_its_requests() {
    let (s, _r, _) = setup(false, 8, 10, 100);
    let m = model();
    let bad = s.submit(m.clone(), vec![666.0, 0.0], 1, None).unwrap();
    let neighbour = s.submit(m.clone(), vec![1.0, 0.0], 1, None).unwrap();
    assert!(matches!(
        bad.await.unwrap(),
        Err(ComputeError::Failed { batch: 2, .. })
    ));
    assert!(matches!(
        neighbour.await.unwrap(),
        Err(ComputeError::Failed { .. })
    ));
    let panics = s.submit(m.clone(), vec![999.0, 0.0], 1, None).unwrap();
    assert!(matches!(
        panics.await.unwrap(),
        Err(ComputeError::Panicked { .. })
    ));
    // The worker carries on.
    let ok = s.submit(m.clone(), vec![1.0, 2.0], 1, None).unwrap();
    assert_eq!(ok.await.unwrap().unwrap().outputs, [3.0]);
}

#[tokio::test(start_paused = true)]
async fn a_retired_version_finishes_its_queue_then_lets_go() {
    let (s, r, gate) = setup(true, 8, 10, 100);
    let gate = gate.unwrap();
    let registry = Registry::new(LoadSettings::default(), Policy::default(), None);
    registry.load_bytes(adder("1"), "v1").0.result.unwrap();
    let v1 = registry.resolve("adder", "").unwrap();
    let a = s.submit(v1.clone(), vec![1.0, 0.0], 1, None).unwrap();
    until_batches(&r, 1).await; // A computes (held)
    let b = s.submit(v1.clone(), vec![2.0, 0.0], 1, None).unwrap(); // B waits in the queue
    settle().await;

    // Version 2 arrives: the registry swaps and releases 1, the scheduler closes its queue.
    let (outcome, settled) = registry.load_bytes(adder("2"), "v2");
    outcome.result.unwrap();
    assert_eq!(settled.switched, Some((Some("1".into()), "2".into())));
    assert_eq!(settled.released.len(), 1);
    for (m, _) in &settled.released {
        s.retire(m);
    }
    drop(settled);
    assert!(v1.is_retired());
    assert_eq!(registry.resolve("adder", "").unwrap().version, "2");
    // New work for 1 is refused (the caller chooses again); what was queued still computes.
    assert!(matches!(
        s.submit(v1.clone(), vec![3.0, 0.0], 1, None),
        Err(SubmitError::Retired { .. })
    ));
    gate.send(()).unwrap(); // A done
    until_batches(&r, 2).await;
    gate.send(()).unwrap(); // B done
    assert_eq!(a.await.unwrap().unwrap().outputs, [1.0]);
    assert_eq!(b.await.unwrap().unwrap().outputs, [2.0]);
    // Its batcher has ended and no batch holds it: this test's handle is the last one.
    for _ in 0..200 {
        if Arc::strong_count(&v1) == 1 {
            break;
        }
        settle().await;
        std::thread::sleep(Duration::from_millis(1));
    }
    assert_eq!(Arc::strong_count(&v1), 1);
    assert_eq!(s.open_queues(), 0);
}
