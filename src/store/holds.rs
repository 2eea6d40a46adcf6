//! The hold writer: commits the holds of many sessions together, one flush to disk for
//! all the holds that arrived while the previous flush ran ("group commit").
//!
//! A hold must be on disk before its `quarantine` verdict is sent, and a flush costs
//! milliseconds whatever it carries; one flush per message would make holds queue behind
//! each other under load. Here a caller hands its hold over and waits; a thread of its own
//! takes every hold waiting, writes them with [`Store::hold_all`] in one transaction, and
//! answers each caller with its own outcome.
//!
//! Invariants: [`HoldWriter::hold`] returns only once its message is committed and
//! flushed, or with the error that kept it from being so; every hold handed over before
//! [`HoldWriter::close`] gets an answer; a batch never holds more than
//! [`HoldSettings::max_batch`] messages nor, past its first, more than
//! [`HoldSettings::max_bytes`] bytes.

use std::sync::mpsc::{Receiver, SyncSender, TryRecvError, channel, sync_channel};
use std::sync::{Arc, Mutex, PoisonError};
use std::thread::JoinHandle;

use super::{Hold, HoldOutcome, JournalEntry, Store, StoreError};

/// How the writer batches.
#[derive(Debug, Clone, PartialEq)]
pub struct HoldSettings {
    /// Most messages per transaction.
    pub max_batch: usize,
    /// Most message bytes per transaction, past its first message.
    pub max_bytes: usize,
}

impl Default for HoldSettings {
    /// 64 messages or 32 MiB.
    fn default() -> HoldSettings {
        HoldSettings {
            max_batch: 64,
            max_bytes: 32 << 20,
        }
    }
}

/// One message to hold, owned, as a session hands it over.
#[derive(Debug)]
pub struct HoldRequest {
    /// Its journal entry.
    pub entry: JournalEntry,
    /// The envelope sender.
    pub sender: String,
    /// The recipients whose copy is held.
    pub recipients: Vec<String>,
    /// The whole message.
    pub message: Vec<u8>,
}

struct Waiting {
    request: HoldRequest,
    answer: SyncSender<Result<HoldOutcome, StoreError>>,
}

/// Commits holds in groups on a thread of its own.
pub struct HoldWriter {
    sender: Mutex<Option<std::sync::mpsc::Sender<Waiting>>>,
    thread: Mutex<Option<JoinHandle<()>>>,
    store: Arc<dyn Store>,
}

impl std::fmt::Debug for HoldWriter {
    fn fmt(&self, f: &mut std::fmt::Formatter<'_>) -> std::fmt::Result {
        f.debug_struct("HoldWriter").finish_non_exhaustive()
    }
}

impl HoldWriter {
    /// Starts the writer thread.
    ///
    /// # Errors
    /// When the thread cannot be started.
    pub fn start(store: Arc<dyn Store>, settings: HoldSettings) -> std::io::Result<HoldWriter> {
        let (sender, receiver) = channel();
        let thread = {
            let store = Arc::clone(&store);
            std::thread::Builder::new()
                .name("tamis-holds".to_string())
                .spawn(move || run(&*store, &settings, &receiver))?
        };
        Ok(HoldWriter {
            sender: Mutex::new(Some(sender)),
            thread: Mutex::new(Some(thread)),
            store,
        })
    }

    /// Hands a hold over and waits until it is committed and flushed, or refused.
    /// Blocking: call from a blocking thread.
    pub fn hold(&self, request: HoldRequest) -> Result<HoldOutcome, StoreError> {
        let (answer, wait) = sync_channel(1);
        let sent = self
            .sender
            .lock()
            .unwrap_or_else(PoisonError::into_inner)
            .as_ref()
            .map(|s| s.send(Waiting { request, answer }).is_ok())
            .unwrap_or(false);
        if !sent {
            return Err(self.stopped());
        }
        wait.recv().unwrap_or_else(|_| Err(self.stopped()))
    }

    fn stopped(&self) -> StoreError {
        StoreError::Io {
            path: self.store.location().to_path_buf(),
            operation: "hold a message",
            detail: "the hold writer has stopped (the daemon is stopping)".to_string(),
        }
    }

    /// Answers every hold handed over, then stops the thread; returns once it is done.
    pub fn close(&self) {
        drop(
            self.sender
                .lock()
                .unwrap_or_else(PoisonError::into_inner)
                .take(),
        );
        let thread = self
            .thread
            .lock()
            .unwrap_or_else(PoisonError::into_inner)
            .take();
        if let Some(thread) = thread {
            // A panic on the writer thread has been reported by the panic hook; its
            // callers got an error when their answer channel closed.
            let _ = thread.join();
        }
    }
}

impl Drop for HoldWriter {
    fn drop(&mut self) {
        self.close();
    }
}

fn run(store: &dyn Store, settings: &HoldSettings, receiver: &Receiver<Waiting>) {
    let max_batch = settings.max_batch.max(1);
    let mut batch: Vec<Waiting> = Vec::with_capacity(max_batch);
    loop {
        match receiver.recv() {
            Ok(first) => batch.push(first),
            Err(_) => return,
        }
        // Everything that queued up meanwhile goes into the same commit.
        let mut bytes = 0usize;
        while batch.len() < max_batch && bytes < settings.max_bytes {
            match receiver.try_recv() {
                Ok(next) => {
                    bytes = bytes.saturating_add(next.request.message.len());
                    batch.push(next);
                }
                Err(TryRecvError::Empty | TryRecvError::Disconnected) => break,
            }
        }
        let holds: Vec<Hold<'_>> = batch
            .iter()
            .map(|w| Hold {
                sender: &w.request.sender,
                recipients: &w.request.recipients,
                message: &w.request.message,
            })
            .collect();
        let items: Vec<(&JournalEntry, &Hold<'_>)> = batch
            .iter()
            .zip(&holds)
            .map(|(w, h)| (&w.request.entry, h))
            .collect();
        let results = store.hold_all(&items);
        drop(items);
        drop(holds);
        for (waiting, result) in batch.drain(..).zip(results) {
            // A caller that gave up waiting is gone; nothing to tell it.
            let _ = waiting.answer.send(result);
        }
    }
}

#[cfg(test)]
mod tests {
    use super::*;
    use crate::policy::Action;
    use crate::store::{DomainOutcome, SqliteStore, StoreOptions};

    fn request(id: &str, body: &str) -> HoldRequest {
        HoldRequest {
            entry: JournalEntry {
                verdict_id: id.to_string(),
                at: crate::store::record::now(),
                model: "test".to_string(),
                margin: Some(1.5),
                probability: None,
                outcomes: DomainOutcome::group([(
                    "bob@hold.test",
                    Action::Quarantine,
                    Action::Quarantine,
                )]),
                size: body.len() as u64,
                sender_domain: None,
                reasons: Vec::new(),
                scanned: true,
                subject: None,
                message_key: None,
            },
            sender: "alice@example.org".to_string(),
            recipients: vec!["bob@hold.test".to_string()],
            message: format!("Subject: x\r\n\r\n{body}\r\n").into_bytes(),
        }
    }

    #[test]
    fn concurrent_holds_are_all_kept_once_and_a_bad_one_costs_only_itself() {
        let dir = tempfile::tempdir().expect("temp dir");
        let path = dir.path().join("store.sqlite");
        let store: Arc<dyn Store> =
            Arc::new(SqliteStore::open(&path, StoreOptions::default()).expect("open"));
        let writer = Arc::new(
            HoldWriter::start(Arc::clone(&store), HoldSettings::default()).expect("start"),
        );
        let threads: Vec<_> = (0..32)
            .map(|i| {
                let writer = Arc::clone(&writer);
                std::thread::spawn(move || {
                    let mut r = request(&format!("V{i:02}"), &format!("message {}", i % 16));
                    if i == 5 {
                        // No recipient to hold for: refused as invalid.
                        r.recipients.clear();
                    }
                    (i, writer.hold(r))
                })
            })
            .collect();
        let mut held = 0;
        let mut again = 0;
        for t in threads {
            let (i, result) = t.join().expect("thread");
            match result {
                Ok(HoldOutcome::Held) => held += 1,
                Ok(HoldOutcome::AlreadyHeld { verdict_id }) => {
                    again += 1;
                    assert_ne!(verdict_id, format!("V{i:02}"));
                }
                Err(StoreError::Invalid { .. }) => assert_eq!(i, 5),
                Err(e) => panic!("{i}: {e}"),
            }
        }
        // 16 distinct messages, each sent twice; one copy of message 5 was refused.
        assert_eq!((held, again), (16, 15));
        assert_eq!(store.held_totals().expect("totals").messages, 16);
        writer.close();
        let late = writer.hold(request("LATE", "late"));
        assert!(matches!(late, Err(StoreError::Io { .. })), "{late:?}");
    }
}
