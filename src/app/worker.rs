//! Long work off the UI thread: a [`Worker`] runs one job on its own thread; the job sends
//! events back through a channel with a [`Reporter`], which also wakes the UI
//! (`ctx.request_repaint()`). The UI drains the channel once per frame with [`Worker::poll`],
//! so it never waits on the job. Dropping a worker asks its job to stop (the job sees
//! [`Reporter::is_cancelled`]) and does not wait for it.

use eframe::egui;
use std::any::Any;
use std::sync::mpsc::{self, Receiver, Sender, TryRecvError};
use std::thread::JoinHandle;

use partsift::learn::CancelToken;

use super::AppError;

/// How soon the UI shows a job's events: quick to the eye, and at most 20 frames a second
/// however fast the job sends (each frame repaints a possibly large 3D view).
const REPAINT_WITHIN: std::time::Duration = std::time::Duration::from_millis(50);

/// The job's side: sends events to the UI and tells the job whether it should stop.
pub(crate) struct Reporter<E> {
    events: Sender<E>,
    ctx: egui::Context,
    cancel: CancelToken,
}

impl<E> Reporter<E> {
    /// Hands `event` to the UI and wakes it within [`REPAINT_WITHIN`], so a job that sends
    /// many events a second costs a few frames, not one each. Returns `false` when the UI
    /// has gone away (the worker was dropped), so the job can stop early.
    pub(crate) fn send(&self, event: E) -> bool {
        let delivered = self.events.send(event).is_ok();
        self.ctx.request_repaint_after(REPAINT_WITHIN);
        delivered
    }

    /// True once the UI asked the job to stop (Stop button, or the worker was dropped).
    pub(crate) fn is_cancelled(&self) -> bool {
        self.cancel.is_cancelled()
    }

    /// The same stop request as [`Reporter::is_cancelled`], for library calls that take one.
    pub(crate) fn cancel_token(&self) -> &CancelToken {
        &self.cancel
    }
}

/// How a job's thread ended, reported once by [`Worker::poll`] after its last event.
#[derive(Debug, PartialEq)]
pub(crate) enum Ended {
    /// The job returned.
    Finished,
    /// The job panicked: a bug, shown to the user as a readable message instead of a crash.
    Crashed(String),
}

/// The UI's side of one running job.
pub(crate) struct Worker<E> {
    events: Receiver<E>,
    cancel: CancelToken,
    thread: Option<JoinHandle<()>>,
}

impl<E: Send + 'static> Worker<E> {
    /// Starts `job` on a new thread named `name`. The job gets a [`Reporter`] to send events
    /// through; each send wakes the UI of `ctx`. Fails only if the OS refuses a thread.
    pub(crate) fn spawn(
        ctx: &egui::Context,
        name: &str,
        job: impl FnOnce(&Reporter<E>) + Send + 'static,
    ) -> std::io::Result<Self> {
        let (tx, rx) = mpsc::channel();
        let cancel = CancelToken::new();
        let reporter = Reporter {
            events: tx,
            ctx: ctx.clone(),
            cancel: cancel.clone(),
        };
        let thread = std::thread::Builder::new()
            .name(format!("partsift {name}"))
            .spawn(move || {
                job(&reporter);
                // Wake the UI once more so it notices the thread has ended.
                reporter.ctx.request_repaint();
            })?;
        Ok(Worker {
            events: rx,
            cancel,
            thread: Some(thread),
        })
    }
}

impl<E> Worker<E> {
    /// Hands every event that has arrived to `on_event`, without waiting. Returns how the
    /// job ended once its thread is done and its last event was handed over; `None` while
    /// it runs (and after the end was already reported).
    pub(crate) fn poll(&mut self, mut on_event: impl FnMut(E)) -> Option<Ended> {
        loop {
            match self.events.try_recv() {
                Ok(event) => on_event(event),
                Err(TryRecvError::Empty) => return None,
                Err(TryRecvError::Disconnected) => break,
            }
        }
        // The sender lives in the thread's closure, so a disconnected channel means the
        // thread is finishing or finished: join is at most a moment's wait.
        let thread = self.thread.take()?;
        Some(match thread.join() {
            Ok(()) => Ended::Finished,
            Err(payload) => Ended::Crashed(panic_text(payload.as_ref())),
        })
    }

    /// Asks the job to stop; it finishes at its next check of [`Reporter::is_cancelled`].
    pub(crate) fn cancel(&self) {
        self.cancel.cancel();
    }

    /// True once [`Worker::cancel`] was called.
    pub(crate) fn is_cancelling(&self) -> bool {
        self.cancel.is_cancelled()
    }
}

impl<E> Drop for Worker<E> {
    fn drop(&mut self) {
        self.cancel();
    }
}

/// Events of a job that makes one result: how far it is (0..1), then the result.
pub(crate) enum JobEvent<T> {
    Fraction(f32),
    Done(Result<T, AppError>),
}

/// Polls the worker in `slot`, if any, handing its events to `on_event`. Empties the slot
/// once the job has ended; a job that panicked comes back as an [`AppError::Crashed`].
pub(crate) fn poll_slot<E>(
    slot: &mut Option<Worker<E>>,
    on_event: impl FnMut(E),
) -> Option<AppError> {
    let ended = slot.as_mut()?.poll(on_event)?;
    *slot = None;
    match ended {
        Ended::Finished => None,
        Ended::Crashed(why) => Some(AppError::Crashed(why)),
    }
}

fn panic_text(payload: &(dyn Any + Send)) -> String {
    if let Some(s) = payload.downcast_ref::<&str>() {
        (*s).to_owned()
    } else if let Some(s) = payload.downcast_ref::<String>() {
        s.clone()
    } else {
        "no message".to_owned()
    }
}

#[cfg(test)]
pub(crate) mod tests {
    use super::*;
    use std::time::{Duration, Instant};

    /// Polls until the job ends (tests only: the UI never waits like this).
    pub(crate) fn drain<E>(worker: &mut Worker<E>) -> (Vec<E>, Ended) {
        let deadline = Instant::now() + Duration::from_secs(10);
        let mut events = Vec::new();
        loop {
            if let Some(ended) = worker.poll(|e| events.push(e)) {
                return (events, ended);
            }
            assert!(Instant::now() < deadline, "worker did not end");
            std::thread::sleep(Duration::from_millis(2));
        }
    }

    #[test]
    fn events_arrive_in_order_then_the_end() {
        let ctx = egui::Context::default();
        let mut worker = Worker::spawn(&ctx, "test", |r: &Reporter<u32>| {
            for i in 0..5 {
                r.send(i);
            }
        })
        .unwrap();
        let (events, ended) = drain(&mut worker);
        assert_eq!(events, vec![0, 1, 2, 3, 4]);
        assert_eq!(ended, Ended::Finished);
        assert_eq!(worker.poll(|_| {}), None, "the end is reported once");
    }

    #[test]
    fn cancel_reaches_the_job() {
        let ctx = egui::Context::default();
        let mut worker = Worker::spawn(&ctx, "test", |r: &Reporter<&'static str>| {
            while !r.is_cancelled() {
                std::thread::sleep(Duration::from_millis(1));
            }
            r.send("stopped");
        })
        .unwrap();
        worker.cancel();
        assert!(worker.is_cancelling());
        let (events, ended) = drain(&mut worker);
        assert_eq!(events, vec!["stopped"]);
        assert_eq!(ended, Ended::Finished);
    }

    #[test]
    fn poll_slot_empties_the_slot_at_the_end() {
        let ctx = egui::Context::default();
        let mut slot = Some(
            Worker::spawn(&ctx, "test", |r: &Reporter<u8>| {
                r.send(7);
            })
            .unwrap(),
        );
        let mut got = Vec::new();
        let deadline = Instant::now() + Duration::from_secs(10);
        while slot.is_some() {
            assert!(poll_slot(&mut slot, |e| got.push(e)).is_none());
            assert!(Instant::now() < deadline);
        }
        assert_eq!(got, vec![7]);
    }

    #[test]
    fn panicking_job_is_reported_not_propagated() {
        let ctx = egui::Context::default();
        let mut worker = Worker::spawn(&ctx, "test", |r: &Reporter<u8>| {
            r.send(1);
            panic!("boom");
        })
        .unwrap();
        let (events, ended) = drain(&mut worker);
        assert_eq!(events, vec![1]);
        assert_eq!(ended, Ended::Crashed("boom".to_owned()));
    }
}
