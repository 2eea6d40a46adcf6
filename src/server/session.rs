//! One relay connection: frames in, verdicts out.
//!
//! Invariants: one read buffer per connection, advanced only past whole frames, and given
//! back between messages after a large frame; a declared frame length is checked against
//! the limit before its payload is waited for; the message being assembled never grows past
//! its cap nor past what the daemon-wide buffer budget lends (bytes beyond are read and
//! dropped, the message is still scored); its cap is the whole message (up to
//! `max_message`) when a recipient may be quarantined, else the scan limit, and `ENOUGH` is
//! sent only in the second case (PROTOCOL.md §4.5); a message not kept whole is marked so
//! and never held; one `FIELD` is one header line in it; a `VERDICT` always fits the
//! client's `max_frame` and is sent only after the store returned from holding the message
//! (`super::keeping`); `HELLO` must come within the handshake timeout and `PING` alone
//! never restarts the idle timeout; scoring and holding run on a blocking thread with the
//! engine the message started with; every value from the peer is escaped before it is
//! logged. Every error in a session ends in that session (logged and counted), never in
//! the listener.

use std::sync::Arc;
use std::time::Duration;

use bytes::{Buf, BytesMut};
use tokio::io::{AsyncRead, AsyncReadExt, AsyncWrite, AsyncWriteExt};
use tokio::time::Instant;
use tokio_util::sync::CancellationToken;

use super::access::Secret;
use super::budget::{Budget, Buffer, MESSAGE_FLOOR};
use super::engine::{Engine, Score, SharedEngine};
use super::keeping::{
    Decided, HeldAs, Keeping, NotWhole, REASONS_KEPT, Settled, settle_without_store,
};
use super::throttle::Throttle;
use crate::config::Limits as ConfigLimits;
use crate::logsafe::safe;
use crate::metrics::Metrics;
use crate::policy::{self, Action, Decision, HeaderEdit, UnscannedReason};
use crate::proto::address::{self, Role};
use crate::proto::{
    Edit, EditOp, FaultCode, Frame, Keep, Limits, MIN_MAX_FRAME, Phase, RecipientAction,
    SessionState, Verdict, encode_frame_within, parse_frame,
};
use crate::store::MessageKey;

/// Everything a session needs from the daemon.
#[derive(Clone)]
pub struct Context {
    /// The bytes all open messages may hold together.
    pub budget: Arc<Budget>,
    /// The engine in force (swapped by reloads).
    pub engine: SharedEngine,
    /// The metrics registry.
    pub metrics: Arc<Metrics>,
    /// Connection and message limits.
    pub limits: ConfigLimits,
    /// The name sent in `WELCOME`.
    pub server_name: String,
    /// Cancelled when the daemon shuts down.
    pub shutdown: CancellationToken,
    /// The shared secret a `HELLO` must carry on this listener; `None` asks for none.
    pub secret: Option<Arc<Secret>>,
    /// Refused handshakes are logged at most once a second.
    pub refused_log: Arc<Throttle>,
    /// A spent buffer budget is logged at most once a second.
    pub budget_log: Arc<Throttle>,
    /// The store: held mail and the verdict journal; `None` when the daemon keeps none.
    pub keeping: Option<Arc<Keeping>>,
}

impl Context {
    /// A context serving `engine` under `limits`, counting into `metrics`, named after this
    /// build, with its own shutdown token.
    pub fn new(engine: SharedEngine, metrics: Arc<Metrics>, limits: ConfigLimits) -> Context {
        Context {
            budget: Budget::new(limits.max_buffered_bytes, metrics.buffered_bytes_gauge()),
            engine,
            metrics,
            limits,
            server_name: format!("tamis {}", env!("CARGO_PKG_VERSION")),
            shutdown: CancellationToken::new(),
            secret: None,
            refused_log: Arc::new(Throttle::new(Duration::from_secs(1))),
            budget_log: Arc::new(Throttle::new(Duration::from_secs(1))),
            keeping: None,
        }
    }

    fn protocol_limits(&self) -> Limits {
        Limits {
            max_frame: self.limits.max_frame_bytes,
            max_message: self.limits.max_message_bytes,
            max_fields: self.limits.max_fields,
            max_recipients: self.limits.max_recipients,
            max_field_value: self.limits.max_field_bytes,
        }
    }
}

/// The clocks a connection is held to (PROTOCOL.md §7).
struct Timers {
    /// When the connection was accepted: `HELLO` must be complete within the handshake
    /// timeout from here.
    accepted: Instant,
    /// The last frame other than `PING`: the idle timeout runs from here, so `PING` alone
    /// cannot hold a connection.
    active: Instant,
    /// When the frame now being received began to arrive: a frame must be complete within
    /// the read timeout however slowly its bytes trickle in.
    frame_started: Option<Instant>,
}

/// Which clock ran out.
#[derive(Debug, Clone, Copy)]
enum Timer {
    Handshake,
    Idle,
    Frame,
}

impl Timer {
    fn explain(self, limits: &ConfigLimits) -> String {
        let show = crate::config::duration::display;
        match self {
            Timer::Handshake => format!("no HELLO within {}", show(limits.handshake_timeout)),
            Timer::Idle => format!("no frame but PING for {}", show(limits.idle_timeout)),
            Timer::Frame => format!("frame not completed within {}", show(limits.read_timeout)),
        }
    }
}

impl Timers {
    fn new(now: Instant) -> Timers {
        Timers {
            accepted: now,
            active: now,
            frame_started: None,
        }
    }

    fn frame_done(&mut self, frame: &Frame, now: Instant) {
        self.frame_started = None;
        if !matches!(frame, Frame::Ping { .. }) {
            self.active = now;
        }
    }

    fn frame_begun(&mut self, now: Instant) {
        self.frame_started.get_or_insert(now);
    }

    /// The earliest deadline and the clock it belongs to.
    fn next(&self, limits: &ConfigLimits, handshake_done: bool) -> (Instant, Timer) {
        let waiting = if handshake_done {
            (later(self.active, limits.idle_timeout), Timer::Idle)
        } else {
            (
                later(self.accepted, limits.handshake_timeout),
                Timer::Handshake,
            )
        };
        match self.frame_started {
            Some(started) if later(started, limits.read_timeout) < waiting.0 => {
                (later(started, limits.read_timeout), Timer::Frame)
            }
            _ => waiting,
        }
    }
}

/// `at + wait`, or about thirty years on when a configured duration is too long for the
/// clock (as `tokio::time::timeout` treats one), never a panic.
fn later(at: Instant, wait: Duration) -> Instant {
    const FAR: Duration = Duration::from_secs(86_400 * 365 * 30);
    at.checked_add(wait)
        .or_else(|| at.checked_add(FAR))
        .unwrap_or(at)
}

/// The message being assembled.
#[derive(Default)]
struct Message {
    /// The engine in force when the message started; it scores the message even if a
    /// reload swaps the shared one meanwhile.
    engine: Option<Arc<Engine>>,
    /// Most bytes kept: the whole message when it may be held, else the engine's raw scan
    /// limit, never more than the message limit.
    cap: usize,
    /// The envelope sender as sent (empty for the null sender or a refused one).
    sender: String,
    recipients: Vec<String>,
    /// The message as assembled for scoring (and holding), paid from the daemon's buffer
    /// budget; `None` until its content starts, and between messages.
    raw: Option<Buffer>,
    body_started: bool,
    enough_sent: bool,
    /// Whether the whole message is kept because a recipient may be quarantined
    /// (PROTOCOL.md §4.5): then no `ENOUGH` is sent.
    keep_whole: bool,
    /// The first reason the message was not kept whole, if any.
    not_whole: Option<NotWhole>,
    /// Bytes of field names, values and chunks the relay sent, kept or not.
    sent: u64,
    /// The hash of the first Message-ID field.
    message_key: Option<MessageKey>,
    /// The first Subject field, when the store records subjects.
    subject: Option<String>,
}

enum Flow {
    Continue,
    Close,
}

/// Serves one connection until it closes, fails or the daemon stops.
pub async fn serve_connection<S>(stream: S, peer: String, ctx: Arc<Context>)
where
    S: AsyncRead + AsyncWrite + Unpin + Send,
{
    let _open = ctx.metrics.connection_opened();
    let mut session = Session {
        state: SessionState::new(ctx.protocol_limits()),
        stream,
        read: BytesMut::with_capacity(READ_BUFFER),
        write: BytesMut::with_capacity(WRITE_BUFFER),
        message: Message::default(),
        ctx,
    };
    if let Err(e) = session.run().await {
        tracing::debug!(peer = %safe(&peer), error = %e, "connection ended with an I/O error");
    }
}

struct Session<S> {
    ctx: Arc<Context>,
    state: SessionState,
    stream: S,
    read: BytesMut,
    write: BytesMut,
    message: Message,
}

impl<S> Session<S>
where
    S: AsyncRead + AsyncWrite + Unpin + Send,
{
    async fn run(&mut self) -> std::io::Result<()> {
        let max_frame = self.ctx.limits.max_frame_bytes;
        let mut timers = Timers::new(Instant::now());
        loop {
            loop {
                match parse_frame(&self.read, max_frame) {
                    Ok(Some((frame, used))) => {
                        self.read.advance(used);
                        timers.frame_done(&frame, Instant::now());
                        if let Flow::Close = self.handle(frame).await? {
                            return self.finish().await;
                        }
                    }
                    Ok(None) => break,
                    Err(e) => {
                        let code = e.code();
                        self.fault(code, true, &e.to_string()).await?;
                        return self.finish().await;
                    }
                }
            }
            if !self.state.message_open() {
                // Between messages: a large frame's buffers go back (not while streaming,
                // where they would only be allocated again for the next chunk).
                shrink_after_use(&mut self.read, READ_BUFFER);
                shrink_after_use(&mut self.write, WRITE_BUFFER);
            }
            let stopping = self.ctx.shutdown.is_cancelled();
            if stopping && !self.state.message_open() {
                self.send(&Frame::ServerBye).await?;
                return self.finish().await;
            }
            if !self.read.is_empty() {
                timers.frame_begun(Instant::now());
            }
            let handshake_done = self.state.phase() != Phase::Start;
            let (deadline, timer) = timers.next(&self.ctx.limits, handshake_done);
            let shutdown = self.ctx.shutdown.clone();
            tokio::select! {
                read = tokio::time::timeout_at(deadline, self.stream.read_buf(&mut self.read)) => match read {
                    Err(_elapsed) => {
                        let text = timer.explain(&self.ctx.limits);
                        self.fault(FaultCode::Idle, true, &text).await?;
                        return self.finish().await;
                    }
                    // End of stream: an open message is abandoned (PROTOCOL.md §6).
                    Ok(Ok(0)) => return Ok(()),
                    Ok(Ok(_)) => {}
                    Ok(Err(e)) => return Err(e),
                },
                _ = shutdown.cancelled(), if !stopping => {}
            }
        }
    }

    async fn finish(&mut self) -> std::io::Result<()> {
        self.stream.flush().await?;
        self.stream.shutdown().await
    }

    async fn send(&mut self, frame: &Frame) -> std::io::Result<()> {
        let limit = self.state.peer_max_frame().unwrap_or(MIN_MAX_FRAME);
        self.write.clear();
        if let Err(e) = encode_frame_within(frame, limit, &mut self.write) {
            tracing::warn!(error = %e, "a reply did not fit the client's frame limit");
            return Err(std::io::Error::other(e.to_string()));
        }
        self.stream.write_all(&self.write).await?;
        self.stream.flush().await
    }

    async fn fault(&mut self, code: FaultCode, fatal: bool, text: &str) -> std::io::Result<()> {
        self.ctx.metrics.protocol_error(code.name());
        tracing::debug!(code = code.name(), fatal, text = %safe(text), "fault");
        // A fault must fit the smallest frame a client may announce; cut at a character
        // boundary (`String::truncate` would panic inside a character).
        let mut cut = text.len().min(1024);
        while !text.is_char_boundary(cut) {
            cut -= 1;
        }
        let text = text.get(..cut).unwrap_or_default().to_string();
        self.send(&Frame::Fault { code, fatal, text }).await
    }

    async fn handle(&mut self, frame: Frame) -> std::io::Result<Flow> {
        let accepted = match self.state.accept_client(&frame) {
            Ok(a) => a,
            Err(e) => {
                self.fault(e.code(), true, &e.to_string()).await?;
                return Ok(Flow::Close);
            }
        };
        if matches!(frame, Frame::Sender { .. }) && self.ctx.shutdown.is_cancelled() {
            self.fault(
                FaultCode::ShuttingDown,
                true,
                "the daemon is stopping; retry later",
            )
            .await?;
            return Ok(Flow::Close);
        }
        for notice in &accepted.notices {
            let text = self.notice_text(*notice, &frame);
            self.fault(*notice, false, &text).await?;
        }
        let keep = |data: &[u8]| -> usize {
            match accepted.keep {
                Keep::All => data.len(),
                Keep::Prefix(n) => n.min(data.len()),
                Keep::Nothing | Keep::Blank => 0,
            }
        };
        match frame {
            Frame::Hello { secret, .. } => {
                if let Some(expected) = &self.ctx.secret {
                    let refusal = match &secret {
                        None => Some("HELLO carries no shared secret; this listener requires one"),
                        Some(given) if !expected.matches(given) => {
                            Some("HELLO carries a wrong shared secret")
                        }
                        Some(_) => None,
                    };
                    if let Some(text) = refusal {
                        if let Some(held_back) = self.ctx.refused_log.admit(Instant::now()) {
                            tracing::warn!(reason = text, held_back, "handshake refused");
                        }
                        self.fault(FaultCode::Denied, true, text).await?;
                        return Ok(Flow::Close);
                    }
                }
                if let Some(welcome) = self.state.welcome(&self.ctx.server_name) {
                    self.send(&welcome).await?;
                }
            }
            Frame::Peer { .. } => {}
            Frame::Sender { address } => {
                let sender = match accepted.keep {
                    Keep::All | Keep::Prefix(_) => address,
                    Keep::Nothing | Keep::Blank => String::new(),
                };
                self.message = Message {
                    engine: Some(self.ctx.engine.current()),
                    sender,
                    ..Message::default()
                };
            }
            Frame::Recipient { address } => match accepted.keep {
                Keep::Nothing => {}
                // A refused address keeps its place but is neither echoed nor trusted to
                // pick a policy section: the empty address falls under the default one.
                Keep::Blank => self.message.recipients.push(String::new()),
                Keep::All | Keep::Prefix(_) => self.message.recipients.push(address),
            },
            Frame::Field { name, value } => {
                self.start_content();
                self.note_cuts(&accepted.notices);
                self.message.sent = self
                    .message
                    .sent
                    .saturating_add((name.len() + value.len()) as u64);
                let n = keep(&value);
                if n > 0 || matches!(accepted.keep, Keep::All) {
                    let room = self.scan_room();
                    let value = value.get(..n).unwrap_or(&value);
                    self.note_field(&name, value);
                    let mut line = Vec::new();
                    append_field(&mut line, &name, value, room);
                    if line.len() < name.len() + value.len() + 4 {
                        self.cut(NotWhole::OverMaxMessage);
                    }
                    self.append(&line).await?;
                }
            }
            Frame::Chunk { data } => {
                self.start_content();
                self.note_cuts(&accepted.notices);
                self.message.sent = self.message.sent.saturating_add(data.len() as u64);
                if !self.message.body_started {
                    self.append(b"\r\n").await?;
                    self.message.body_started = true;
                }
                let kept = keep(&data);
                let n = kept.min(self.scan_room());
                if n < kept {
                    self.cut(NotWhole::OverMaxMessage);
                }
                self.append(&data[..n]).await?;
                // ENOUGH only when nothing of the message may be held (PROTOCOL.md §4.5):
                // a message that may be quarantined is kept whole.
                if !self.message.keep_whole && !self.message.enough_sent && self.scan_room() == 0 {
                    self.message.enough_sent = true;
                    self.send(&Frame::Enough).await?;
                }
            }
            Frame::Seal => {
                self.start_content();
                if !self.message.body_started {
                    self.append(b"\r\n").await?;
                }
                let mut verdict = self.decide().await;
                self.message = Message::default();
                let limit = self.state.peer_max_frame().unwrap_or(MIN_MAX_FRAME);
                if let Err(length) = verdict.fit_within(limit) {
                    // The recipient room of the state machine makes this unreachable unless
                    // the edits outgrew their reserve; the relay must still hear of it.
                    tracing::error!(
                        verdict_id = %verdict.verdict_id,
                        length,
                        limit,
                        "a verdict does not fit the client's frame limit"
                    );
                    let text = format!(
                        "verdict {} needs {length} bytes, above your max_frame of {limit}; the message is not decided",
                        verdict.verdict_id
                    );
                    self.fault(FaultCode::VerdictTooLarge, true, &text).await?;
                    return Ok(Flow::Close);
                }
                self.send(&Frame::Verdict(verdict)).await?;
            }
            Frame::Drop => self.message = Message::default(),
            Frame::Ping { token } => self.send(&Frame::Pong { token }).await?,
            Frame::ClientBye => {
                self.send(&Frame::ServerBye).await?;
                return Ok(Flow::Close);
            }
            // Server kinds from a client are refused by the state machine above.
            _ => {}
        }
        Ok(Flow::Continue)
    }

    /// The text of a non-fatal `FAULT` about `frame`.
    fn notice_text(&self, code: FaultCode, frame: &Frame) -> String {
        match (code, frame) {
            (FaultCode::MessageTooLarge, _) => {
                "message larger than max_message; the rest is not read".to_string()
            }
            (FaultCode::TooMany, _) => {
                "too many recipients or fields; the extra ones are ignored".to_string()
            }
            (FaultCode::FieldTooLarge, _) => "header field value cut at the limit".to_string(),
            (FaultCode::BadAddress, Frame::Sender { address }) => {
                let why = address::check(address, Role::Sender)
                    .err()
                    .map(|e| e.to_string())
                    .unwrap_or_default();
                tracing::debug!(address = %safe(address), reason = %why, "SENDER refused");
                format!("SENDER refused: {why}; the message goes on")
            }
            (FaultCode::BadAddress, Frame::Recipient { address }) => {
                let position = self.message.recipients.len() + 1;
                let why = address::check(address, Role::Recipient)
                    .err()
                    .map(|e| e.to_string())
                    .unwrap_or_default();
                tracing::debug!(position, address = %safe(address), reason = %why, "RECIPIENT refused");
                format!(
                    "RECIPIENT {position} refused: {why}; it is listed with an empty address and decided under the default thresholds"
                )
            }
            (code, _) => code.name().to_string(),
        }
    }

    /// Sets the message up for its content, once its recipients are known (at its first
    /// `FIELD`, `CHUNK` or `SEAL`): the whole message is kept when a recipient may be
    /// quarantined and the daemon has a store to hold it in; otherwise only what the
    /// engine scans.
    fn start_content(&mut self) {
        if self.message.raw.is_some() {
            return;
        }
        let engine = match &self.message.engine {
            Some(engine) => Arc::clone(engine),
            None => self.ctx.engine.current(),
        };
        let policy = &engine.decisions().policy;
        let keep_whole = self.ctx.keeping.is_some()
            && self
                .message
                .recipients
                .iter()
                .any(|r| policy.may_quarantine(r));
        let limits = &self.ctx.limits;
        let cap = if keep_whole {
            // Every content byte the relay may send, with the ": " and CRLF of each field
            // and the empty line after the header section.
            limits
                .max_message_bytes
                .saturating_add(4u64.saturating_mul(u64::from(limits.max_fields)))
                .saturating_add(2)
        } else {
            (engine.model().spec().limits.max_raw_bytes as u64).min(limits.max_message_bytes)
        };
        let cap = usize::try_from(cap).unwrap_or(usize::MAX);
        // Room for the separators around the header section beyond the cap.
        let raw = Buffer::new(&self.ctx.budget, cap.saturating_add(4), MESSAGE_FLOOR);
        self.message.cap = cap;
        self.message.keep_whole = keep_whole;
        self.message.raw = Some(raw);
    }

    /// Records that the message is not kept whole (the first reason counts).
    fn cut(&mut self, why: NotWhole) {
        self.message.not_whole.get_or_insert(why);
    }

    /// Records the cuts the state machine announced for a frame.
    fn note_cuts(&mut self, notices: &[FaultCode]) {
        for notice in notices {
            match notice {
                FaultCode::MessageTooLarge => self.cut(NotWhole::OverMaxMessage),
                FaultCode::FieldTooLarge => self.cut(NotWhole::FieldCut),
                FaultCode::TooMany => self.cut(NotWhole::FieldsDropped),
                _ => {}
            }
        }
    }

    /// Keeps what the journal needs from a header field: the Message-ID's hash, and the
    /// Subject when the store records it.
    fn note_field(&mut self, name: &str, value: &[u8]) {
        if self.message.message_key.is_none() && name.eq_ignore_ascii_case("Message-ID") {
            self.message.message_key = MessageKey::of(&String::from_utf8_lossy(value));
        }
        if self.message.subject.is_none()
            && name.eq_ignore_ascii_case("Subject")
            && self
                .ctx
                .keeping
                .as_ref()
                .is_some_and(|k| k.records_subject())
        {
            let text = String::from_utf8_lossy(value);
            self.message.subject = Some(text.chars().take(MAX_SUBJECT_CHARS).collect());
        }
    }

    /// Bytes the message may still grow by.
    fn scan_room(&self) -> usize {
        let len = self.message.raw.as_ref().map_or(0, Buffer::len);
        self.message.cap.saturating_sub(len)
    }

    /// Adds `data` to the message within the buffer budget. When the budget cannot pay for
    /// all of it, the message takes the `MESSAGE_TOO_LARGE` path (PROTOCOL.md §5): what was
    /// kept is scored, the rest of its content is read and dropped.
    async fn append(&mut self, data: &[u8]) -> std::io::Result<()> {
        let Some(raw) = self.message.raw.as_mut() else {
            return Ok(());
        };
        let granted = raw.room_for(data.len());
        raw.extend(data.get(..granted).unwrap_or(data));
        if granted < data.len() {
            self.cut(NotWhole::OverBufferBudget);
        }
        if granted < data.len() && self.state.stop_content() {
            self.ctx.metrics.budget_exhausted();
            if let Some(held_back) = self.ctx.budget_log.admit(Instant::now()) {
                tracing::warn!(
                    limit = self.ctx.budget.limit(),
                    held_back,
                    "the buffer budget is spent; a message is decided on part of its content"
                );
            }
            self.fault(
                FaultCode::MessageTooLarge,
                false,
                "the daemon's message memory is in use by other messages; this one is decided on what it has",
            )
            .await?;
        }
        Ok(())
    }

    async fn decide(&mut self) -> Verdict {
        // The state machine allows SEAL only after SENDER, which set the engine.
        let engine = self
            .message
            .engine
            .take()
            .unwrap_or_else(|| self.ctx.engine.current());
        // The buffer's budget share stays with the message until it is reset after the
        // verdict, so the bytes count for as long as they are scored and held.
        let raw = self
            .message
            .raw
            .as_mut()
            .map(Buffer::take_bytes)
            .unwrap_or_default();
        // Kept for the verdict should the blocking task panic.
        let recipients = self.message.recipients.clone();
        let message = Assembled {
            sender: std::mem::take(&mut self.message.sender),
            recipients: std::mem::take(&mut self.message.recipients),
            raw,
            size: self.message.sent,
            message_key: self.message.message_key.take(),
            subject: self.message.subject.take(),
            whole: self.message.not_whole.map_or(Ok(()), Err),
        };
        let started = Instant::now();
        let judged = {
            let engine = Arc::clone(&engine);
            let keeping = self.ctx.keeping.clone();
            let metrics = Arc::clone(&self.ctx.metrics);
            // Scoring, and the hold that must reach the disk before the verdict leaves,
            // wait on the CPU and the disk: a blocking thread, not an async worker.
            tokio::task::spawn_blocking(move || {
                judge(&engine, keeping.as_deref(), &metrics, message)
            })
            .await
        };
        let judged = match judged {
            Ok(j) => j,
            Err(e) => {
                // The task panicked. The failure mode applies: a message it may already
                // have held is then delivered or deferred as well — kept twice, never lost.
                let d = engine.decisions();
                let why = format!("scoring task failed: {e}");
                Judged {
                    settled: Settled {
                        verdict_id: policy::verdict_id(),
                        decisions: d.policy.unscanned_each(&recipients, d.on_failure),
                        held: HeldAs::Nothing,
                        notes: Vec::new(),
                    },
                    score: None,
                    scan_seconds: started.elapsed().as_secs_f64(),
                    bytes: 0,
                    unscanned: Some(why),
                    on_failure: d.on_failure,
                }
            }
        };
        self.answer(&engine, judged)
    }

    /// The verdict for a judged message, with its metrics and its log line.
    fn answer(&self, engine: &Engine, judged: Judged) -> Verdict {
        let d = engine.decisions();
        let Judged {
            settled,
            score,
            scan_seconds,
            bytes,
            unscanned,
            on_failure,
        } = judged;
        let verdict_id = settled.verdict_id;
        let (edits, margin, probability, mut reasons) = match (&score, &unscanned) {
            (Some(score), None) => {
                let tagged = settled.decisions.iter().any(|d| d.action == Action::Tag);
                let edits = if tagged {
                    d.policy
                        .header_edits(&d.headers, &verdict_id, Action::Tag, score.margin)
                } else {
                    Vec::new()
                };
                let not_held = matches!(settled.held, HeldAs::NotHeld(_));
                self.ctx.metrics.record_outcomes(
                    &settled.decisions,
                    not_held,
                    score.margin,
                    scan_seconds,
                    bytes,
                );
                let mut reasons = vec![format!("margin {}", policy::format_margin(score.margin))];
                if !not_held
                    && settled
                        .decisions
                        .iter()
                        .any(|d| d.enforced == Action::Quarantine && d.action != Action::Quarantine)
                {
                    reasons.push("would be quarantined with tag_only off".to_string());
                }
                (edits, score.margin, score.probability, reasons)
            }
            (_, why) => {
                let why = why.clone().unwrap_or_default();
                let reason = UnscannedReason::ScanFailed;
                self.ctx.metrics.unscanned(reason);
                tracing::warn!(verdict_id = %verdict_id, error = %safe(&why), "message not scanned");
                let edits = d.policy.unscanned_edits(on_failure, reason);
                (edits, f64::NAN, None, vec![format!("not scanned: {why}")])
            }
        };
        reasons.extend(settled.notes);
        log_verdict(
            &verdict_id,
            &settled.decisions,
            &settled.held,
            margin,
            scan_seconds,
            engine,
        );
        Verdict {
            verdict_id,
            margin,
            probability: probability.unwrap_or(f64::NAN),
            recipients: settled
                .decisions
                .into_iter()
                .map(|d| RecipientAction {
                    address: d.recipient,
                    action: d.action,
                })
                .collect(),
            edits: edits.iter().map(wire_edit).collect(),
            reasons,
        }
    }
}

/// A sealed message, as the session hands it to the blocking thread.
struct Assembled {
    sender: String,
    recipients: Vec<String>,
    raw: Vec<u8>,
    size: u64,
    message_key: Option<MessageKey>,
    subject: Option<String>,
    whole: Result<(), NotWhole>,
}

/// A message scored, decided and settled with the store.
struct Judged {
    settled: Settled,
    /// `None` when it was not scanned.
    score: Option<Score>,
    scan_seconds: f64,
    bytes: u64,
    /// Why it was not scanned.
    unscanned: Option<String>,
    on_failure: crate::config::FailureMode,
}

/// Scores, decides and settles one message: the part of a verdict that waits for the CPU
/// and the disk. Features are named only for verdicts that are not a plain accept.
fn judge(
    engine: &Engine,
    keeping: Option<&Keeping>,
    metrics: &Metrics,
    message: Assembled,
) -> Judged {
    let d = engine.decisions();
    let started = std::time::Instant::now();
    let verdict_id = policy::verdict_id();
    let scored = engine.score_explained(&message.raw, REASONS_KEPT, |score| {
        d.policy
            .decide_each(&message.recipients, score.margin, score.probability)
            .iter()
            .any(|x| x.action != Action::Accept || x.enforced != Action::Accept)
    });
    let scan_seconds = started.elapsed().as_secs_f64();
    let (score, features, decisions, unscanned) = match scored {
        Ok((score, features)) => {
            let decisions =
                d.policy
                    .decide_each(&message.recipients, score.margin, score.probability);
            (Some(score), features, decisions, None)
        }
        Err(e) => {
            let decisions = d.policy.unscanned_each(&message.recipients, d.on_failure);
            (None, Vec::new(), decisions, Some(e.to_string()))
        }
    };
    let bytes = message.raw.len() as u64;
    let decided = Decided {
        verdict_id,
        model: engine.origin(),
        score: score.map(|s| (s.margin, s.probability)),
        decisions,
        features,
        sender: &message.sender,
        message: message.raw,
        size: message.size,
        message_key: message.message_key,
        subject: message.subject,
        whole: message.whole,
        on_failure: d.on_failure,
    };
    let settled = match keeping {
        Some(keeping) => keeping.settle(decided),
        None => settle_without_store(decided, metrics),
    };
    Judged {
        settled,
        score,
        scan_seconds,
        bytes,
        unscanned,
        on_failure: d.on_failure,
    }
}

/// Appends `name: value` CRLF to the message assembled for scoring, in at most `room`
/// bytes (the value is cut to fit; nothing is written when not even the name fits).
///
/// The field must stay one field (PROTOCOL.md §2, `FIELD`): CR, LF, NUL and `:` in the name,
/// and a CR or LF in the value that does not start a fold (CRLF or LF followed by SP or
/// HTAB), are written as spaces, so a relay's field can never forge another header line.
fn append_field(raw: &mut Vec<u8>, name: &str, value: &[u8], room: usize) {
    let overhead = name.len() + 4;
    if room <= overhead {
        return;
    }
    raw.extend(name.bytes().map(|b| {
        if matches!(b, b'\r' | b'\n' | 0 | b':') {
            b' '
        } else {
            b
        }
    }));
    raw.extend_from_slice(b": ");
    let value = value.get(..room - overhead).unwrap_or(value);
    let blank_at = |i: usize| matches!(value.get(i), Some(b' ' | b'\t'));
    for (i, &b) in value.iter().enumerate() {
        let folds = match b {
            b'\r' => value.get(i + 1) == Some(&b'\n') && blank_at(i + 2),
            b'\n' => blank_at(i + 1),
            _ => true,
        };
        raw.push(if folds { b } else { b' ' });
    }
    raw.extend_from_slice(b"\r\n");
}

/// The one log line of a verdict: its id, the first recipient's domain, the strictest
/// action sent, the strictest action the policy would have taken with tag-only off
/// (`would_be`, so tag-only mode shows what it would have held back), whether the message
/// was held, the margin, the scan time and the model.
fn log_verdict(
    id: &str,
    decisions: &[Decision],
    held: &HeldAs,
    margin: f64,
    seconds: f64,
    engine: &Engine,
) {
    let strictest = |pick: fn(&Decision) -> Action| {
        decisions
            .iter()
            .map(pick)
            .max_by_key(|a| a.code())
            .unwrap_or(Action::Accept)
    };
    let domain = decisions
        .first()
        .and_then(|d| policy::domain::recipient_domain(&d.recipient))
        .unwrap_or_default();
    tracing::info!(
        verdict_id = %id,
        domain = %safe(&domain),
        action = strictest(|d| d.action).as_str(),
        would_be = strictest(|d| d.enforced).as_str(),
        held = held.as_str(),
        margin = margin,
        duration_ms = seconds * 1e3,
        model = engine.origin(),
        "verdict"
    );
}

fn wire_edit(edit: &HeaderEdit) -> Edit {
    match edit {
        HeaderEdit::Add { name, value } => Edit {
            op: EditOp::AddField,
            name: name.clone(),
            value: value.clone(),
        },
        HeaderEdit::PrefixSubject { value } => Edit {
            op: EditOp::PrefixSubject,
            name: "Subject".to_string(),
            value: value.clone(),
        },
    }
}

/// Most characters of a Subject kept for the journal.
const MAX_SUBJECT_CHARS: usize = 256;

/// The read buffer's usual size; after a larger frame it is given back (see
/// [`shrink_after_use`]).
const READ_BUFFER: usize = 16 * 1024;
/// The write buffer's usual size.
const WRITE_BUFFER: usize = 1024;

/// Gives back a buffer that grew past 4 times its usual `size` (a large frame came or
/// went) once what is left in it fits the usual size, so an idle connection holds little
/// however large its last frame was.
fn shrink_after_use(buf: &mut BytesMut, size: usize) {
    if buf.capacity() > size.saturating_mul(4) && buf.len() <= size {
        let mut fresh = BytesMut::with_capacity(size);
        fresh.extend_from_slice(buf);
        *buf = fresh;
    }
}

/// How long a refused connection waits for its `HELLO` before being closed.
pub const BUSY_HELLO_WAIT: Duration = Duration::from_secs(5);

/// Answers a refused connection: reads its `HELLO` (PROTOCOL.md §3), replies with a fatal
/// `FAULT` of `code` and closes. The caller counts the refusal.
pub async fn refuse_after_hello<S>(mut stream: S, code: FaultCode, text: &str)
where
    S: AsyncRead + AsyncWrite + Unpin + Send,
{
    let mut buf = BytesMut::with_capacity(256);
    let hello = tokio::time::timeout(BUSY_HELLO_WAIT, async {
        loop {
            match parse_frame(&buf, MIN_MAX_FRAME) {
                Ok(Some(_)) | Err(_) => return true,
                Ok(None) => {}
            }
            match stream.read_buf(&mut buf).await {
                Ok(0) | Err(_) => return false,
                Ok(_) => {}
            }
        }
    })
    .await;
    if let Ok(true) = hello {
        let mut out = BytesMut::new();
        let frame = Frame::Fault {
            code,
            fatal: true,
            text: text.to_string(),
        };
        if encode_frame_within(&frame, MIN_MAX_FRAME, &mut out).is_ok() {
            let _ = stream.write_all(&out).await;
        }
    }
    let _ = stream.shutdown().await;
}

#[cfg(test)]
mod tests {
    use super::{BytesMut, Duration, Instant, READ_BUFFER, append_field, later, shrink_after_use};

    #[test]
    fn a_huge_timeout_never_overflows_the_clock() {
        let now = Instant::now();
        assert!(later(now, Duration::MAX) > now);
        assert_eq!(
            later(now, Duration::from_secs(5)),
            now + Duration::from_secs(5)
        );
    }

    #[test]
    fn a_read_buffer_is_given_back_after_a_large_frame() {
        let mut buf = BytesMut::with_capacity(READ_BUFFER);
        buf.extend_from_slice(&vec![0u8; 1 << 20]);
        shrink_after_use(&mut buf, READ_BUFFER);
        assert!(buf.capacity() >= 1 << 20, "kept while the frame is in it");
        let _ = buf.split_to((1 << 20) - 10);
        shrink_after_use(&mut buf, READ_BUFFER);
        assert!(buf.capacity() <= 4 * READ_BUFFER, "{}", buf.capacity());
        assert_eq!(buf.len(), 10, "the bytes of the next frame are kept");
    }

    fn field(name: &str, value: &[u8], room: usize) -> Vec<u8> {
        let mut raw = Vec::new();
        append_field(&mut raw, name, value, room);
        raw
    }

    #[test]
    fn a_field_is_always_one_header_field() {
        assert_eq!(field("Subject", b"hi", 100), b"Subject: hi\r\n");
        assert_eq!(
            field("X-A\r\nBcc", b"v", 100),
            b"X-A  Bcc: v\r\n",
            "CR and LF in a name"
        );
        assert_eq!(field("X:\0Y", b"v", 100), b"X  Y: v\r\n", "':' and NUL");
        assert_eq!(
            field("X-B", b"x\r\nBcc: y\rz\n", 100),
            b"X-B: x  Bcc: y z \r\n",
            "line breaks in a value that are not folding"
        );
        assert_eq!(
            field("X-C", b"a\r\n\tb\n c", 100),
            b"X-C: a\r\n\tb\n c\r\n",
            "folding is kept"
        );
        // Names the extractor must still score are left alone (issue 7, item 1).
        assert_eq!(field("X Y", b"z", 100), b"X Y: z\r\n");
        assert_eq!(field("", b"z", 100), b": z\r\n");
    }

    #[test]
    fn a_field_is_cut_to_the_room_left() {
        assert_eq!(field("Subject", b"0123456789", 15), b"Subject: 0123\r\n");
        assert_eq!(field("Subject", b"0123", 11), b"");
        // A CRLF fold cut in half is no fold any more.
        assert_eq!(field("A", b"x\r\n y", 7), b"A: x \r\n");
    }
}
