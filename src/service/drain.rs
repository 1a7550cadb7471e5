//! Admission of predict requests, and draining them at shutdown.
//!
//! Shutdown must not lose a request the server accepted, and must not accept new ones while
//! it waits for those to finish. [`Admission`] counts requests between acceptance and reply;
//! once [`Admission::close`] has run, every later request is refused (the caller answers
//! UNAVAILABLE, which clients may retry on another replica: the gRPC status code
//! specification, doc/statuscodes.md, lists it as the code for "a transient condition, which
//! can be corrected by retrying"), and [`Admission::idle`] resolves when the last accepted
//! request has left.
//!
//! The count is incremented before the closed flag is read, and `close` sets the flag before
//! reading the count (both sequentially consistent): a request either sees the flag and backs
//! out, or is counted before the drainer looks — never neither.

use std::sync::atomic::{AtomicBool, AtomicUsize, Ordering};

use tokio::sync::Notify;

/// Requests accepted and not yet answered, and whether new ones are still accepted.
#[derive(Debug, Default)]
pub struct Admission {
    closed: AtomicBool,
    in_flight: AtomicUsize,
    left: Notify,
}

/// One accepted request; it leaves when dropped (also when its caller goes away and the
/// transport drops the handler's future).
#[derive(Debug)]
pub struct Admitted<'a> {
    admission: &'a Admission,
}

impl Admission {
    /// Accepts one request, or `None` once draining has begun.
    pub fn admit(&self) -> Option<Admitted<'_>> {
        self.in_flight.fetch_add(1, Ordering::SeqCst);
        if self.closed.load(Ordering::SeqCst) {
            self.leave();
            return None;
        }
        Some(Admitted { admission: self })
    }

    /// Refuses every request from now on.
    pub fn close(&self) {
        self.closed.store(true, Ordering::SeqCst);
    }

    pub fn is_closed(&self) -> bool {
        self.closed.load(Ordering::SeqCst)
    }

    /// Requests accepted and not yet answered.
    pub fn in_flight(&self) -> usize {
        self.in_flight.load(Ordering::SeqCst)
    }

    /// Resolves when no accepted request is left (at once if none is). Meant to be awaited
    /// after [`close`](Self::close); before it, new requests may keep the count above zero.
    pub async fn idle(&self) {
        loop {
            let left = self.left.notified();
            tokio::pin!(left);
            // Registered before the count is read, so a request leaving in between wakes us.
            left.as_mut().enable();
            if self.in_flight() == 0 {
                return;
            }
            left.await;
        }
    }

    fn leave(&self) {
        if self.in_flight.fetch_sub(1, Ordering::SeqCst) == 1 {
            self.left.notify_waiters();
        }
    }
}

impl Drop for Admitted<'_> {
    fn drop(&mut self) {
        self.admission.leave();
    }
}

#[cfg(test)]
mod tests {
    use super::*;
    use std::sync::Arc;
    use std::time::Duration;

    #[test]
    fn closing_refuses_new_requests_and_keeps_counting_old_ones() {
        let a = Admission::default();
        let first = a.admit().expect("open");
        assert_eq!(a.in_flight(), 1);
        a.close();
        assert!(a.admit().is_none());
        assert_eq!(a.in_flight(), 1, "a refused request is not counted");
        drop(first);
        assert_eq!(a.in_flight(), 0);
    }

    #[tokio::test]
    async fn idle_waits_for_the_last_accepted_request() {
        let a = Arc::new(Admission::default());
        let (started_tx, started_rx) = tokio::sync::oneshot::channel();
        let worker = {
            let a = Arc::clone(&a);
            tokio::spawn(async move {
                let _held = a.admit().expect("open");
                let _ = started_tx.send(());
                tokio::time::sleep(Duration::from_millis(50)).await;
            })
        };
        started_rx.await.unwrap();
        a.close();
        tokio::time::timeout(Duration::from_secs(5), a.idle())
            .await
            .expect("idle after the request left");
        assert!(worker.is_finished() || a.in_flight() == 0);
        worker.await.unwrap();
    }

    #[tokio::test]
    async fn idle_is_immediate_with_nothing_in_flight() {
        let a = Admission::default();
        a.close();
        tokio::time::timeout(Duration::from_millis(100), a.idle())
            .await
            .expect("nothing to wait for");
    }
}
