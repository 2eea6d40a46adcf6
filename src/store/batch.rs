//! The journal writer: collects the journal entries of accept and tag verdicts from any
//! number of threads and writes them to a [`Store`] in batches, on one thread of its own.
//!
//! One transaction per batch instead of per message is what keeps the journal cheap under
//! load. The trade is that an entry is on disk only once its batch is written (at most
//! [`BatchSettings::max_delay`] later); held mail never goes this way, it is committed by
//! [`Store::hold`] before its verdict.
//!
//! Invariants: [`JournalWriter::submit`] never blocks (a full queue hands the entry back,
//! for the caller to count as dropped); every entry submitted before
//! [`JournalWriter::close`] is written or reported to the error callback; an invalid
//! entry costs only itself, not its batch.

use std::sync::Arc;
use std::sync::mpsc::{Receiver, SyncSender, TryRecvError, TrySendError, sync_channel};
use std::thread::JoinHandle;
use std::time::{Duration, Instant};

use super::{JournalEntry, Store, StoreError};

/// How the writer batches.
#[derive(Debug, Clone, PartialEq)]
pub struct BatchSettings {
    /// Most entries per transaction.
    pub max_batch: usize,
    /// Longest an entry waits before its batch is written.
    pub max_delay: Duration,
    /// Entries waiting at most; further submissions are refused.
    pub queue: usize,
}

impl Default for BatchSettings {
    /// 256 entries, 100 ms, a queue of 65 536: at these sizes a batch costs a few
    /// milliseconds (`cargo bench --bench store`).
    fn default() -> BatchSettings {
        BatchSettings {
            max_batch: 256,
            max_delay: Duration::from_millis(100),
            queue: 65_536,
        }
    }
}

/// Why [`JournalWriter::submit`] refused an entry.
#[derive(Debug, Clone, Copy, PartialEq, Eq, thiserror::Error)]
pub enum Refused {
    /// The queue is full: the store is slower than the mail, or stuck.
    #[error("the journal queue is full; the entry was dropped (is the store slow or locked?)")]
    QueueFull,
    /// The writer thread has stopped.
    #[error("the journal writer has stopped; the entry was dropped")]
    Stopped,
}

/// Called on the writer thread when entries could not be written: the error and how many
/// entries were lost to it.
pub type OnError = Box<dyn Fn(&StoreError, usize) + Send>;

/// Writes journal entries in batches on a thread of its own.
pub struct JournalWriter {
    sender: Option<SyncSender<JournalEntry>>,
    thread: Option<JoinHandle<()>>,
}

impl std::fmt::Debug for JournalWriter {
    fn fmt(&self, f: &mut std::fmt::Formatter<'_>) -> std::fmt::Result {
        f.debug_struct("JournalWriter").finish_non_exhaustive()
    }
}

impl JournalWriter {
    /// Starts the writer thread.
    ///
    /// # Errors
    /// When the thread cannot be started.
    pub fn start(
        store: Arc<dyn Store>,
        settings: BatchSettings,
        on_error: OnError,
    ) -> std::io::Result<JournalWriter> {
        let (sender, receiver) = sync_channel(settings.queue.max(1));
        let thread = std::thread::Builder::new()
            .name("tamis-journal".to_string())
            .spawn(move || run(&*store, &settings, &receiver, &on_error))?;
        Ok(JournalWriter {
            sender: Some(sender),
            thread: Some(thread),
        })
    }

    /// Queues an entry without waiting; refuses it (for the caller to count as dropped)
    /// when the queue is full or the writer has stopped.
    pub fn submit(&self, entry: JournalEntry) -> Result<(), Refused> {
        match &self.sender {
            Some(sender) => sender.try_send(entry).map_err(|e| match e {
                TrySendError::Full(_) => Refused::QueueFull,
                TrySendError::Disconnected(_) => Refused::Stopped,
            }),
            None => Err(Refused::Stopped),
        }
    }

    /// Writes what is queued and stops the thread; returns once it is done.
    pub fn close(mut self) {
        self.stop();
    }

    fn stop(&mut self) {
        drop(self.sender.take());
        if let Some(thread) = self.thread.take() {
            // A panic on the writer thread has already been reported by the panic hook;
            // there is nothing left to write either way.
            let _ = thread.join();
        }
    }
}

impl Drop for JournalWriter {
    fn drop(&mut self) {
        self.stop();
    }
}

/// Longest sleep while a batch fills: short enough that a closed channel or a full batch
/// is noticed soon, long enough that the thread stays asleep under load.
const NAP: Duration = Duration::from_millis(10);

fn run(
    store: &dyn Store,
    settings: &BatchSettings,
    receiver: &Receiver<JournalEntry>,
    on_error: &OnError,
) {
    let max_batch = settings.max_batch.max(1);
    let mut batch = Vec::with_capacity(max_batch);
    loop {
        // Wait for the first entry of a batch as long as it takes.
        match receiver.recv() {
            Ok(entry) => batch.push(entry),
            Err(_) => return,
        }
        // Then let the batch fill without waking for each entry: a sender only wakes a
        // receiver that waits in `recv`, so under load this thread wakes once per batch
        // instead of once per message. A full queue is the only thing cut short.
        let deadline = Instant::now() + settings.max_delay;
        let mut open = true;
        while batch.len() < max_batch {
            match receiver.try_recv() {
                Ok(entry) => batch.push(entry),
                Err(TryRecvError::Disconnected) => {
                    open = false;
                    break;
                }
                Err(TryRecvError::Empty) => {
                    let left = deadline.saturating_duration_since(Instant::now());
                    if left.is_zero() {
                        break;
                    }
                    std::thread::sleep(left.min(NAP));
                }
            }
        }
        write(store, &batch, on_error);
        batch.clear();
        if !open {
            // Senders are gone: write what is left in the channel, then stop.
            let rest: Vec<JournalEntry> = receiver.try_iter().collect();
            for chunk in rest.chunks(max_batch) {
                write(store, chunk, on_error);
            }
            return;
        }
    }
}

fn write(store: &dyn Store, batch: &[JournalEntry], on_error: &OnError) {
    match store.record(batch) {
        Ok(()) => {}
        // One bad entry must not cost its neighbours: write them one by one.
        Err(StoreError::Invalid { .. }) if batch.len() > 1 => {
            for entry in batch {
                if let Err(e) = store.record(std::slice::from_ref(entry)) {
                    on_error(&e, 1);
                }
            }
        }
        Err(e) => on_error(&e, batch.len()),
    }
}
