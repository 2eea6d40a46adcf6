//! The SMTP client: one connection to a next hop that carries any number of mail
//! transactions (RFC 5321 §3.3) — `MAIL`, one `RCPT` per recipient, `DATA` — until `QUIT`.
//!
//! Invariants:
//!
//! - Every wait has a timeout ([`Timeouts`], after RFC 5321 §4.5.3.2). A reply line longer
//!   than [`MAX_REPLY_LINE`] octets, or a reply of more than [`MAX_REPLY_LINES`] lines, is a
//!   protocol error, so a peer can neither stall the client nor make it grow without bound.
//! - The message goes out with CRLF line ends and dot-stuffed ([`encode_data`], RFC 5321
//!   §4.5.2): once the server undoes the transparency it holds the bytes given, except that
//!   a bare CR or LF becomes CRLF (§2.3.8) and an unterminated last line gets its CRLF.
//! - A transaction refused at `MAIL`, `RCPT` or `DATA` is reset (`RSET`), so the connection
//!   can carry the next one. A connection that timed out, broke, was closed, spoke something
//!   other than SMTP or answered 421 is marked broken and refuses further use
//!   ([`Connection::is_usable`]).
//! - Every error says which [`Failure`] it is: a 4xx refusal (try again later), a 5xx
//!   refusal or a message the next hop cannot take (do not retry as is), or a connection
//!   failure (the next hop could not be reached or the conversation broke off).
//! - Nothing the envelope holds is sent unchecked: addresses must pass
//!   [`crate::proto::address::check`], so no CR, LF or other control can reach a command.

use std::fmt;
use std::io;
use std::time::Duration;

use tokio::io::{AsyncBufRead, AsyncBufReadExt, AsyncRead, AsyncWrite, AsyncWriteExt, BufReader};
use tokio::net::TcpStream;

use crate::logsafe::safe;
use crate::proto::address::{self, Role};

/// Longest reply line accepted, CRLF included. RFC 5321 §4.5.3.1.5 sets 512 octets; some
/// servers send longer `EHLO` lines, so the client tolerates up to the 1000 octets of a
/// text line (§4.5.3.1.6) before calling the peer broken (common practice: be lenient in
/// what you accept, within a bound).
pub const MAX_REPLY_LINE: usize = 1000;
/// Most lines in one reply. No standard limit exists; an `EHLO` reply lists a few dozen
/// extensions at most (common practice).
pub const MAX_REPLY_LINES: usize = 100;
/// Longest command line sent, CRLF included (RFC 5321 §4.5.3.1.4).
pub const MAX_COMMAND_LINE: usize = 512;
/// Bytes of message written per timed write.
const CHUNK: usize = 64 * 1024;

/// How long the client waits at each step.
#[derive(Debug, Clone, Copy, PartialEq, Eq)]
pub struct Timeouts {
    /// Establishing the TCP connection.
    pub connect: Duration,
    /// The greeting and the reply to each command (`EHLO`, `MAIL`, `RCPT`, `DATA`, `RSET`,
    /// `QUIT`).
    pub command: Duration,
    /// Each write of the message's bytes.
    pub data_block: Duration,
    /// The reply to the end of the message (the final dot), while the server stores it.
    pub data_end: Duration,
}

impl Default for Timeouts {
    /// RFC 5321 §4.5.3.2: 5 minutes for the greeting, `MAIL` and `RCPT` (used for every
    /// command: §4.5.3.2 gives `DATA` initiation 2 minutes as a minimum, and these are
    /// minimums), 3 minutes per data block, 10 minutes for the final reply. 30 seconds to
    /// connect (common practice).
    fn default() -> Timeouts {
        Timeouts {
            connect: Duration::from_secs(30),
            command: Duration::from_secs(5 * 60),
            data_block: Duration::from_secs(3 * 60),
            data_end: Duration::from_secs(10 * 60),
        }
    }
}

/// Where in the conversation something happened.
#[derive(Debug, Clone, Copy, PartialEq, Eq)]
pub enum Stage {
    /// Opening the TCP connection.
    Connect,
    /// Waiting for the server's greeting.
    Greeting,
    /// `EHLO`.
    Ehlo,
    /// `HELO` (after a server refused `EHLO`).
    Helo,
    /// `MAIL FROM`.
    Mail,
    /// `RCPT TO`.
    Rcpt,
    /// `DATA`, before the message.
    Data,
    /// Sending the message.
    Message,
    /// The reply to the end of the message.
    DataEnd,
    /// `RSET`.
    Rset,
    /// `QUIT`.
    Quit,
}

impl Stage {
    /// The stage in words.
    pub fn as_str(self) -> &'static str {
        match self {
            Stage::Connect => "connect",
            Stage::Greeting => "the greeting",
            Stage::Ehlo => "EHLO",
            Stage::Helo => "HELO",
            Stage::Mail => "MAIL FROM",
            Stage::Rcpt => "RCPT TO",
            Stage::Data => "DATA",
            Stage::Message => "sending the message",
            Stage::DataEnd => "the end of the message",
            Stage::Rset => "RSET",
            Stage::Quit => "QUIT",
        }
    }
}

impl fmt::Display for Stage {
    fn fmt(&self, f: &mut fmt::Formatter<'_>) -> fmt::Result {
        f.write_str(self.as_str())
    }
}

/// A server reply: its code and the text of each line.
#[derive(Debug, Clone, PartialEq, Eq)]
pub struct Reply {
    /// The three-digit reply code.
    pub code: u16,
    /// The text after the code on each line (lossily decoded as UTF-8, line end removed).
    pub lines: Vec<String>,
}

impl Reply {
    /// 2yz: the command succeeded.
    pub fn is_positive(&self) -> bool {
        (200..300).contains(&self.code)
    }

    /// 3yz: go on (`354` after `DATA`).
    pub fn is_intermediate(&self) -> bool {
        (300..400).contains(&self.code)
    }

    /// 4yz: refused for now; the same command may succeed later.
    pub fn is_transient(&self) -> bool {
        (400..500).contains(&self.code)
    }

    /// 5yz: refused.
    pub fn is_permanent(&self) -> bool {
        (500..600).contains(&self.code)
    }
}

impl fmt::Display for Reply {
    /// The code and the lines' text joined by ` | `, escaped: the text comes from the peer.
    fn fmt(&self, f: &mut fmt::Formatter<'_>) -> fmt::Result {
        write!(f, "{}", self.code)?;
        for (i, line) in self.lines.iter().enumerate() {
            let sep = if i == 0 { " " } else { " | " };
            write!(f, "{sep}{}", safe(line))?;
        }
        Ok(())
    }
}

/// What the server announced in its `EHLO` reply (RFC 5321 §4.1.1.1).
#[derive(Debug, Clone, Default, PartialEq, Eq)]
pub struct Extensions {
    /// The server answered `EHLO` (false: it only knew `HELO`).
    pub esmtp: bool,
    /// `8BITMIME` (RFC 6152): 8-bit message bytes may be sent with `BODY=8BITMIME`.
    pub eight_bit_mime: bool,
    /// `SMTPUTF8` (RFC 6531): UTF-8 addresses and header fields may be sent.
    pub smtputf8: bool,
    /// `PIPELINING` (RFC 2920). Recorded only; the client waits for each reply.
    pub pipelining: bool,
    /// `SIZE` (RFC 1870) with its limit; `Some(0)` when the server announced no limit.
    pub size: Option<u64>,
}

impl Extensions {
    /// The extensions of an `EHLO` reply: every line but the first names one, keywords
    /// compared without regard to case.
    pub fn from_ehlo(reply: &Reply) -> Extensions {
        let mut ext = Extensions {
            esmtp: true,
            ..Extensions::default()
        };
        for line in reply.lines.iter().skip(1) {
            let mut words = line.split_ascii_whitespace();
            let Some(keyword) = words.next() else {
                continue;
            };
            match keyword.to_ascii_uppercase().as_str() {
                "8BITMIME" => ext.eight_bit_mime = true,
                "SMTPUTF8" => ext.smtputf8 = true,
                "PIPELINING" => ext.pipelining = true,
                "SIZE" => {
                    ext.size = Some(words.next().and_then(|n| n.parse().ok()).unwrap_or(0));
                }
                _ => {}
            }
        }
        ext
    }
}

/// The envelope of one transaction.
#[derive(Debug, Clone, Copy)]
pub struct Envelope<'a> {
    /// The reverse path, without angle brackets; empty for the null sender (`MAIL
    /// FROM:<>`, RFC 5321 §4.5.5).
    pub sender: &'a str,
    /// The forward paths, without angle brackets; at least one.
    pub recipients: &'a [String],
}

/// What kind of failure an [`SmtpError`] is, for deciding what to do next.
#[derive(Debug, Clone, Copy, PartialEq, Eq)]
pub enum Failure {
    /// A 4xx reply: the next hop refused for now; the same message may go through later.
    Transient,
    /// A 5xx reply, or a message or envelope the next hop cannot take: retrying the same
    /// thing will fail the same way.
    Permanent,
    /// The next hop could not be reached, did not answer in time, closed the connection or
    /// did not speak SMTP.
    Connection,
}

/// A failed step of an SMTP conversation. `peer` is the next hop as the caller named it.
#[derive(Debug, thiserror::Error)]
pub enum SmtpError {
    /// The TCP connection could not be opened.
    #[error(
        "{peer}: cannot connect ({source}); check that the next hop is up and listens on this address"
    )]
    Connect {
        /// The next hop.
        peer: String,
        /// The system's error.
        source: io::Error,
    },
    /// No reply, or no progress writing, within the stage's timeout.
    #[error("{peer}: nothing within {} at {stage}; the next hop is slow or stuck", crate::config::duration::display(*after))]
    Timeout {
        /// The next hop.
        peer: String,
        /// Where.
        stage: Stage,
        /// The timeout that ran out.
        after: Duration,
    },
    /// Reading or writing failed.
    #[error("{peer}: the connection failed at {stage} ({source})")]
    Io {
        /// The next hop.
        peer: String,
        /// Where.
        stage: Stage,
        /// The system's error.
        source: io::Error,
    },
    /// The server closed the connection.
    #[error("{peer}: the server closed the connection at {stage}")]
    Closed {
        /// The next hop.
        peer: String,
        /// Where.
        stage: Stage,
    },
    /// The server refused with a 4xx or 5xx reply.
    #[error("{peer}: {stage}{} refused with {reply}", recipient_text(recipient.as_deref()))]
    Rejected {
        /// The next hop.
        peer: String,
        /// Which command was refused.
        stage: Stage,
        /// The recipient, when a `RCPT` was refused.
        recipient: Option<String>,
        /// The server's reply.
        reply: Reply,
    },
    /// The server sent something that is not an SMTP reply, or not one that fits.
    #[error("{peer}: not a valid SMTP reply at {stage}: {detail}")]
    Protocol {
        /// The next hop.
        peer: String,
        /// Where.
        stage: Stage,
        /// What was wrong.
        detail: String,
    },
    /// The message cannot be sent to this next hop as it is (nothing was sent).
    #[error("{peer}: cannot send this message: {detail}")]
    Unsupported {
        /// The next hop.
        peer: String,
        /// Why, and what to do.
        detail: String,
    },
    /// The caller gave an envelope or setting that cannot be sent (nothing was sent).
    #[error("cannot send: {detail}")]
    Invalid {
        /// What is wrong.
        detail: String,
    },
    /// The connection broke earlier and cannot carry another transaction.
    #[error("{peer}: the connection broke earlier and cannot be used again; open a new one")]
    Broken {
        /// The next hop.
        peer: String,
    },
}

fn recipient_text(recipient: Option<&str>) -> String {
    match recipient {
        Some(r) => format!(" for <{}>", safe(r)),
        None => String::new(),
    }
}

impl SmtpError {
    /// What kind of failure this is.
    pub fn failure(&self) -> Failure {
        match self {
            SmtpError::Rejected { reply, .. } if reply.is_permanent() => Failure::Permanent,
            SmtpError::Rejected { .. } => Failure::Transient,
            SmtpError::Unsupported { .. } | SmtpError::Invalid { .. } => Failure::Permanent,
            SmtpError::Connect { .. }
            | SmtpError::Timeout { .. }
            | SmtpError::Io { .. }
            | SmtpError::Closed { .. }
            | SmtpError::Protocol { .. }
            | SmtpError::Broken { .. } => Failure::Connection,
        }
    }
}

/// Writes `message` as the content of `DATA` (RFC 5321 §4.1.1.4) into `out` (cleared
/// first): CRLF line ends, a bare CR or LF made CRLF (§2.3.8), a `.` doubled at the start
/// of every line that begins with one (§4.5.2), a CRLF after an unterminated last line, and
/// the closing `.` line.
pub fn encode_data(message: &[u8], out: &mut Vec<u8>) {
    out.clear();
    out.reserve(message.len() + message.len() / 64 + 5);
    let mut line_start = true;
    let mut bytes = message.iter().copied().peekable();
    while let Some(b) = bytes.next() {
        if line_start && b == b'.' {
            out.push(b'.');
        }
        match b {
            b'\r' => {
                if bytes.peek() == Some(&b'\n') {
                    bytes.next();
                }
                out.extend_from_slice(b"\r\n");
                line_start = true;
            }
            b'\n' => {
                out.extend_from_slice(b"\r\n");
                line_start = true;
            }
            _ => {
                out.push(b);
                line_start = false;
            }
        }
    }
    if !line_start {
        out.extend_from_slice(b"\r\n");
    }
    out.extend_from_slice(b".\r\n");
}

/// Parses one reply line without its line end: `(code, is_last, text)` (RFC 5321 §4.2:
/// `Reply-code [ ("-" / SP) textstring ]`, the code `%x32-35 %x30-35 %x30-39`).
pub fn parse_reply_line(line: &[u8]) -> Result<(u16, bool, String), String> {
    let bad = || {
        format!(
            "the line \"{}\" does not begin with a reply code (RFC 5321 §4.2)",
            crate::logsafe::safe_bytes(line)
        )
    };
    let Some(&[a, b, c]) = line.get(..3) else {
        return Err(bad());
    };
    if !(b'2'..=b'5').contains(&a) || !(b'0'..=b'5').contains(&b) || !c.is_ascii_digit() {
        return Err(bad());
    }
    let code = u16::from(a - b'0') * 100 + u16::from(b - b'0') * 10 + u16::from(c - b'0');
    let text = |rest: &[u8]| String::from_utf8_lossy(rest).into_owned();
    match line.get(3..).unwrap_or_default() {
        [] => Ok((code, true, String::new())),
        [b' ', rest @ ..] => Ok((code, true, text(rest))),
        [b'-', rest @ ..] => Ok((code, false, text(rest))),
        _ => Err(bad()),
    }
}

/// Gathers the lines of one reply.
#[derive(Debug, Default)]
struct ReplyParser {
    code: Option<u16>,
    lines: Vec<String>,
}

impl ReplyParser {
    /// Adds a line (with or without its line end); the whole reply once its last line came.
    fn push(&mut self, line: &[u8]) -> Result<Option<Reply>, String> {
        let line = line.strip_suffix(b"\n").unwrap_or(line);
        let line = line.strip_suffix(b"\r").unwrap_or(line);
        let (code, last, text) = parse_reply_line(line)?;
        if let Some(first) = self.code
            && first != code
        {
            return Err(format!(
                "a reply that began with code {first} went on with {code}; RFC 5321 §4.2.1 requires one code on every line"
            ));
        }
        if self.lines.len() >= MAX_REPLY_LINES {
            return Err(format!("a reply of more than {MAX_REPLY_LINES} lines"));
        }
        self.code = Some(code);
        self.lines.push(text);
        Ok(last.then(|| Reply {
            code,
            lines: std::mem::take(&mut self.lines),
        }))
    }
}

/// Why a reply could not be read.
enum ReadError {
    Io(io::Error),
    Closed,
    Protocol(String),
}

/// Reads one line, line end included, refusing one longer than `max` octets. End of stream
/// before a line end is [`ReadError::Closed`].
async fn read_line<R: AsyncBufRead + Unpin>(
    reader: &mut R,
    max: usize,
    line: &mut Vec<u8>,
) -> Result<(), ReadError> {
    line.clear();
    loop {
        let buf = reader.fill_buf().await.map_err(ReadError::Io)?;
        if buf.is_empty() {
            return Err(ReadError::Closed);
        }
        let (take, done) = match memchr::memchr(b'\n', buf) {
            Some(i) => (i + 1, true),
            None => (buf.len(), false),
        };
        if line.len() + take > max {
            return Err(ReadError::Protocol(format!(
                "a reply line longer than {max} octets"
            )));
        }
        line.extend_from_slice(buf.get(..take).unwrap_or_default());
        reader.consume(take);
        if done {
            return Ok(());
        }
    }
}

async fn read_reply<R: AsyncBufRead + Unpin>(reader: &mut R) -> Result<Reply, ReadError> {
    let mut parser = ReplyParser::default();
    let mut line = Vec::with_capacity(128);
    loop {
        read_line(reader, MAX_REPLY_LINE, &mut line).await?;
        if let Some(reply) = parser.push(&line).map_err(ReadError::Protocol)? {
            return Ok(reply);
        }
    }
}

/// Checks a name for `EHLO`/`HELO`: a domain or an address literal, printable ASCII
/// without spaces (RFC 5321 §4.1.1.1).
pub fn check_helo_name(name: &str) -> Result<(), String> {
    if name.is_empty() || name.len() > 255 || !name.bytes().all(|b| b.is_ascii_graphic()) {
        return Err(format!(
            "the HELO name \"{}\" is not a domain name or address literal (1 to 255 printable ASCII characters, no spaces); set release.helo_name to this host's fully qualified name",
            safe(name)
        ));
    }
    Ok(())
}

/// One SMTP connection, greeted and introduced (`EHLO` or `HELO`), ready for
/// transactions.
#[derive(Debug)]
pub struct Connection<S> {
    stream: BufReader<S>,
    peer: String,
    timeouts: Timeouts,
    greeting: Reply,
    extensions: Extensions,
    broken: bool,
    data: Vec<u8>,
}

impl Connection<TcpStream> {
    /// Connects to `next_hop` (`host:port`), reads the greeting and introduces itself as
    /// `helo_name`.
    pub async fn connect(
        next_hop: &str,
        helo_name: &str,
        timeouts: Timeouts,
    ) -> Result<Connection<TcpStream>, SmtpError> {
        check_helo_name(helo_name).map_err(|detail| SmtpError::Invalid { detail })?;
        let stream =
            match tokio::time::timeout(timeouts.connect, TcpStream::connect(next_hop)).await {
                Err(_) => {
                    return Err(SmtpError::Timeout {
                        peer: next_hop.to_string(),
                        stage: Stage::Connect,
                        after: timeouts.connect,
                    });
                }
                Ok(Err(source)) => {
                    return Err(SmtpError::Connect {
                        peer: next_hop.to_string(),
                        source,
                    });
                }
                Ok(Ok(stream)) => stream,
            };
        // Commands are small and each waits for its reply: do not let Nagle hold them.
        let _ = stream.set_nodelay(true);
        Connection::open(stream, next_hop, helo_name, timeouts).await
    }
}

impl<S: AsyncRead + AsyncWrite + Unpin> Connection<S> {
    /// Starts the conversation on an open stream: waits for the greeting, then `EHLO`,
    /// falling back to `HELO` when the server refuses `EHLO` with a 5xx reply (RFC 5321
    /// §3.2). `peer` names the other end in errors.
    pub async fn open(
        stream: S,
        peer: impl Into<String>,
        helo_name: &str,
        timeouts: Timeouts,
    ) -> Result<Connection<S>, SmtpError> {
        check_helo_name(helo_name).map_err(|detail| SmtpError::Invalid { detail })?;
        let mut conn = Connection {
            stream: BufReader::new(stream),
            peer: peer.into(),
            timeouts,
            greeting: Reply {
                code: 0,
                lines: Vec::new(),
            },
            extensions: Extensions::default(),
            broken: false,
            data: Vec::new(),
        };
        let greeting = conn.read(Stage::Greeting, timeouts.command).await?;
        if !greeting.is_positive() {
            // 554 (no service here) or 421 (not now): the server will close.
            conn.broken = true;
            return Err(conn.refusal(Stage::Greeting, None, greeting));
        }
        conn.greeting = greeting;
        let ehlo = conn
            .command(&format!("EHLO {helo_name}"), Stage::Ehlo)
            .await?;
        if ehlo.is_positive() {
            conn.extensions = Extensions::from_ehlo(&ehlo);
            return Ok(conn);
        }
        if !ehlo.is_permanent() {
            conn.broken = true;
            return Err(conn.unexpected(Stage::Ehlo, ehlo));
        }
        let helo = conn
            .command(&format!("HELO {helo_name}"), Stage::Helo)
            .await?;
        if !helo.is_positive() {
            conn.broken = true;
            return Err(conn.unexpected(Stage::Helo, helo));
        }
        Ok(conn)
    }

    /// The server's greeting.
    pub fn greeting(&self) -> &Reply {
        &self.greeting
    }

    /// What the server announced.
    pub fn extensions(&self) -> &Extensions {
        &self.extensions
    }

    /// Whether the connection can carry another transaction.
    pub fn is_usable(&self) -> bool {
        !self.broken
    }

    /// Sends one message: `MAIL`, `RCPT` for each recipient, `DATA`. Returns the server's
    /// reply to the end of the message (it often names the queue id). All recipients must
    /// be accepted: the first refusal resets the transaction and is returned, and no
    /// message is sent.
    pub async fn send(
        &mut self,
        envelope: &Envelope<'_>,
        message: &[u8],
    ) -> Result<Reply, SmtpError> {
        if self.broken {
            return Err(SmtpError::Broken {
                peer: self.peer.clone(),
            });
        }
        let parameters = self.prepare(envelope, message)?;
        let reply = self
            .command(
                &format!("MAIL FROM:<{}>{parameters}", envelope.sender),
                Stage::Mail,
            )
            .await?;
        if !reply.is_positive() {
            return Err(self.refused(reply, Stage::Mail, None).await);
        }
        for recipient in envelope.recipients {
            let reply = self
                .command(&format!("RCPT TO:<{recipient}>"), Stage::Rcpt)
                .await?;
            if !reply.is_positive() {
                return Err(self.refused(reply, Stage::Rcpt, Some(recipient)).await);
            }
        }
        let reply = self.command("DATA", Stage::Data).await?;
        if !reply.is_intermediate() {
            return Err(self.refused(reply, Stage::Data, None).await);
        }
        let data = std::mem::take(&mut self.data);
        let mut written = Ok(());
        for chunk in data.chunks(CHUNK) {
            written = self
                .write(chunk, Stage::Message, self.timeouts.data_block)
                .await;
            if written.is_err() {
                break;
            }
        }
        self.data = data;
        written?;
        let reply = self.read(Stage::DataEnd, self.timeouts.data_end).await?;
        if reply.is_positive() {
            Ok(reply)
        } else if reply.is_transient() || reply.is_permanent() {
            // The end of the data ends the transaction either way (RFC 5321 §4.1.1.4): no
            // RSET is needed before the next one.
            Err(self.refusal(Stage::DataEnd, None, reply))
        } else {
            self.broken = true;
            Err(self.unexpected(Stage::DataEnd, reply))
        }
    }

    /// Abandons the current transaction (`RSET`).
    pub async fn reset(&mut self) -> Result<(), SmtpError> {
        if self.broken {
            return Err(SmtpError::Broken {
                peer: self.peer.clone(),
            });
        }
        let reply = self.command("RSET", Stage::Rset).await?;
        if reply.is_positive() {
            Ok(())
        } else {
            self.broken = true;
            Err(self.unexpected(Stage::Rset, reply))
        }
    }

    /// Ends the conversation politely (`QUIT`) and closes the connection. A broken
    /// connection is just closed.
    pub async fn quit(mut self) -> Result<(), SmtpError> {
        let mut outcome = Ok(());
        if !self.broken {
            match self.command("QUIT", Stage::Quit).await {
                Ok(reply) if reply.is_positive() => {}
                Ok(reply) => outcome = Err(self.unexpected(Stage::Quit, reply)),
                Err(e) => outcome = Err(e),
            }
        }
        let _ = tokio::time::timeout(self.timeouts.command, self.stream.shutdown()).await;
        outcome
    }

    /// Checks the envelope, encodes the message into `self.data` and returns the `MAIL`
    /// parameters it needs. Nothing is sent; an error here leaves the connection as it was.
    fn prepare(&mut self, envelope: &Envelope<'_>, message: &[u8]) -> Result<String, SmtpError> {
        let invalid = |detail: String| SmtpError::Invalid { detail };
        if envelope.recipients.is_empty() {
            return Err(invalid("the envelope has no recipient".to_string()));
        }
        address::check(envelope.sender, Role::Sender)
            .map_err(|e| invalid(format!("the sender: {e}")))?;
        for (i, r) in envelope.recipients.iter().enumerate() {
            address::check(r, Role::Recipient)
                .map_err(|e| invalid(format!("recipient {}: {e}", i + 1)))?;
        }
        let unsupported = |detail: String| SmtpError::Unsupported {
            peer: self.peer.clone(),
            detail,
        };
        let ext = &self.extensions;
        let utf8_envelope =
            !envelope.sender.is_ascii() || envelope.recipients.iter().any(|r| !r.is_ascii());
        if utf8_envelope && !ext.smtputf8 {
            return Err(unsupported(
                "the envelope has non-ASCII addresses and the next hop does not announce SMTPUTF8 (RFC 6531)".to_string(),
            ));
        }
        let mut parameters = String::new();
        if message.iter().any(|&b| b >= 0x80) {
            if !ext.eight_bit_mime {
                return Err(unsupported(
                    "the message has 8-bit bytes and the next hop does not announce 8BITMIME (RFC 6152), so they may not be sent as they are".to_string(),
                ));
            }
            parameters.push_str(" BODY=8BITMIME");
        }
        if ext.smtputf8 && (utf8_envelope || header_section(message).iter().any(|&b| b >= 0x80)) {
            parameters.push_str(" SMTPUTF8");
        }
        encode_data(message, &mut self.data);
        if let Some(limit) = ext.size {
            let size = self.data.len() as u64;
            if limit > 0 && size > limit {
                return Err(unsupported(format!(
                    "it is {size} bytes on the wire, above the {limit} the next hop announces (SIZE, RFC 1870)"
                )));
            }
            parameters.push_str(&format!(" SIZE={size}"));
        }
        Ok(parameters)
    }

    /// Sends one command line and reads its reply.
    async fn command(&mut self, line: &str, stage: Stage) -> Result<Reply, SmtpError> {
        if line.len() + 2 > MAX_COMMAND_LINE || line.bytes().any(|b| b.is_ascii_control()) {
            return Err(SmtpError::Invalid {
                detail: format!(
                    "the {stage} command would be longer than {MAX_COMMAND_LINE} octets or hold a control character"
                ),
            });
        }
        let mut bytes = Vec::with_capacity(line.len() + 2);
        bytes.extend_from_slice(line.as_bytes());
        bytes.extend_from_slice(b"\r\n");
        self.write(&bytes, stage, self.timeouts.command).await?;
        self.read(stage, self.timeouts.command).await
    }

    async fn write(
        &mut self,
        bytes: &[u8],
        stage: Stage,
        limit: Duration,
    ) -> Result<(), SmtpError> {
        let stream = &mut self.stream;
        let io = async move {
            stream.write_all(bytes).await?;
            stream.flush().await
        };
        match tokio::time::timeout(limit, io).await {
            Ok(Ok(())) => Ok(()),
            Ok(Err(source)) => {
                self.broken = true;
                Err(SmtpError::Io {
                    peer: self.peer.clone(),
                    stage,
                    source,
                })
            }
            Err(_) => {
                self.broken = true;
                Err(SmtpError::Timeout {
                    peer: self.peer.clone(),
                    stage,
                    after: limit,
                })
            }
        }
    }

    async fn read(&mut self, stage: Stage, limit: Duration) -> Result<Reply, SmtpError> {
        let peer = || self.peer.clone();
        let outcome = tokio::time::timeout(limit, read_reply(&mut self.stream)).await;
        let error = match outcome {
            Ok(Ok(reply)) => {
                if reply.code == 421 {
                    // "Service not available, closing transmission channel" (RFC 5321 §3.8).
                    self.broken = true;
                }
                return Ok(reply);
            }
            Err(_) => SmtpError::Timeout {
                peer: peer(),
                stage,
                after: limit,
            },
            Ok(Err(ReadError::Io(source))) => SmtpError::Io {
                peer: peer(),
                stage,
                source,
            },
            Ok(Err(ReadError::Closed)) => SmtpError::Closed {
                peer: peer(),
                stage,
            },
            Ok(Err(ReadError::Protocol(detail))) => SmtpError::Protocol {
                peer: peer(),
                stage,
                detail,
            },
        };
        self.broken = true;
        Err(error)
    }

    /// The error for a reply that is not the one `stage` needs. A 4xx or 5xx refusal
    /// resets the transaction (so the connection can carry the next one); any other reply
    /// breaks the connection.
    async fn refused(&mut self, reply: Reply, stage: Stage, recipient: Option<&str>) -> SmtpError {
        if reply.is_transient() || reply.is_permanent() {
            let refusal = self.refusal(stage, recipient, reply);
            if !self.broken {
                // A failed RSET marks the connection broken; the refusal is still the news.
                let _ = self.reset().await;
            }
            return refusal;
        }
        self.broken = true;
        self.unexpected(stage, reply)
    }

    fn refusal(&self, stage: Stage, recipient: Option<&str>, reply: Reply) -> SmtpError {
        SmtpError::Rejected {
            peer: self.peer.clone(),
            stage,
            recipient: recipient.map(str::to_string),
            reply,
        }
    }

    fn unexpected(&self, stage: Stage, reply: Reply) -> SmtpError {
        if reply.is_transient() || reply.is_permanent() {
            return self.refusal(stage, None, reply);
        }
        SmtpError::Protocol {
            peer: self.peer.clone(),
            stage,
            detail: format!("the reply {reply} does not fit {stage}"),
        }
    }
}

/// The header section of a message: everything before the first empty line.
fn header_section(message: &[u8]) -> &[u8] {
    let crlf = memchr::memmem::find(message, b"\r\n\r\n");
    let lf = memchr::memmem::find(message, b"\n\n");
    let end = match (crlf, lf) {
        (Some(a), Some(b)) => a.min(b),
        (Some(a), None) | (None, Some(a)) => a,
        (None, None) => message.len(),
    };
    message.get(..end).unwrap_or(message)
}

#[cfg(test)]
mod tests {
    use super::*;
    use tokio::io::{AsyncBufReadExt, AsyncWriteExt, DuplexStream, duplex};

    /// Undoes the transparency of RFC 5321 §4.5.2 the way a receiver does: the data ends
    /// at the line holding only a dot, and a leading dot is removed from every other line.
    fn unstuff(wire: &[u8]) -> Vec<u8> {
        let mut out = Vec::new();
        for line in wire.split_inclusive(|&b| b == b'\n') {
            if line == b".\r\n" {
                break;
            }
            out.extend_from_slice(line.strip_prefix(b".").unwrap_or(line));
        }
        out
    }

    #[test]
    fn dot_stuffing_doubles_leading_dots_and_ends_with_a_dot_line() {
        // RFC 5321 §4.5.2: "Before sending a line of mail text, the SMTP client checks the
        // first character of the line. If it is a period, one additional period is
        // inserted at the beginning of the line."
        let message = b"Subject: dots\r\n\r\n.\r\n..two\r\nmid.dle\r\n.\r\nlast";
        let mut wire = Vec::new();
        encode_data(message, &mut wire);
        assert_eq!(
            wire,
            b"Subject: dots\r\n\r\n..\r\n...two\r\nmid.dle\r\n..\r\nlast\r\n.\r\n".to_vec()
        );
        // The receiver's procedure gives the message back (with the CRLF the last line
        // needed).
        assert_eq!(unstuff(&wire), [&message[..], b"\r\n"].concat());
    }

    #[test]
    fn bare_line_ends_become_crlf() {
        // RFC 5321 §2.3.8: CR and LF are only sent together, as CRLF.
        let mut wire = Vec::new();
        encode_data(b"a\nb\rc\r\n.d\n", &mut wire);
        assert_eq!(wire, b"a\r\nb\r\nc\r\n..d\r\n.\r\n".to_vec());
        encode_data(b"", &mut wire);
        assert_eq!(wire, b".\r\n".to_vec());
        // A message that is exactly CRLF-terminated goes out unchanged but for the dot line.
        encode_data(b"x\r\n", &mut wire);
        assert_eq!(wire, b"x\r\n.\r\n".to_vec());
    }

    #[test]
    fn multiline_replies_are_gathered() {
        // RFC 5321 §4.2.1: every line but the last has a hyphen after the code.
        let mut parser = ReplyParser::default();
        assert_eq!(parser.push(b"250-mx.example.org greets you\r\n"), Ok(None));
        assert_eq!(parser.push(b"250-8BITMIME\r\n"), Ok(None));
        assert_eq!(parser.push(b"250-SIZE 1000000\n"), Ok(None));
        let reply = parser.push(b"250 SMTPUTF8\r\n").ok().flatten();
        let reply = reply.unwrap_or(Reply {
            code: 0,
            lines: vec![],
        });
        assert_eq!(reply.code, 250);
        assert_eq!(reply.lines.len(), 4);
        let ext = Extensions::from_ehlo(&reply);
        assert!(ext.esmtp && ext.eight_bit_mime && ext.smtputf8 && !ext.pipelining);
        assert_eq!(ext.size, Some(1_000_000));
        // A code alone is a whole reply.
        let mut parser = ReplyParser::default();
        assert_eq!(
            parser.push(b"354\r\n"),
            Ok(Some(Reply {
                code: 354,
                lines: vec![String::new()]
            }))
        );
    }

    #[test]
    fn malformed_replies_are_refused() {
        let mut parser = ReplyParser::default();
        assert_eq!(parser.push(b"250-first\r\n"), Ok(None));
        let changed = parser.push(b"550 second\r\n");
        assert!(
            changed.as_ref().is_err_and(|e| e.contains("§4.2.1")),
            "{changed:?}"
        );
        // RFC 5321 §4.2: the first digit is 2 to 5, the second 0 to 5.
        for bad in [
            &b"hello"[..],
            b"25",
            b"160 x",
            b"260 x",
            b"250x",
            b"",
            b"2a0 x",
        ] {
            assert!(parse_reply_line(bad).is_err(), "{bad:?}");
        }
        let mut parser = ReplyParser::default();
        let mut last = Ok(None);
        for _ in 0..=MAX_REPLY_LINES {
            last = parser.push(b"250-again\r\n");
            if last.is_err() {
                break;
            }
        }
        assert!(last.is_err(), "an endless reply must be refused");
    }

    /// A scripted server on the other end of an in-memory stream: sends `greeting`, then
    /// answers each command line with what `answer` returns for it; after `354` it
    /// captures the raw data up to the dot line. Returns the commands and the captured
    /// data of each transaction.
    async fn serve(
        stream: DuplexStream,
        greeting: &'static str,
        answer: fn(&str) -> &'static str,
    ) -> (Vec<String>, Vec<Vec<u8>>) {
        let mut stream = tokio::io::BufReader::new(stream);
        let mut commands = Vec::new();
        let mut messages = Vec::new();
        if stream.write_all(greeting.as_bytes()).await.is_err() {
            return (commands, messages);
        }
        let mut line = String::new();
        loop {
            line.clear();
            match stream.read_line(&mut line).await {
                Ok(0) | Err(_) => break,
                Ok(_) => {}
            }
            let command = line.trim_end().to_string();
            let reply = answer(&command);
            commands.push(command);
            if stream.write_all(reply.as_bytes()).await.is_err() {
                break;
            }
            if reply.starts_with("354") {
                let mut data = Vec::new();
                loop {
                    let mut l = Vec::new();
                    match stream.read_until(b'\n', &mut l).await {
                        Ok(0) | Err(_) => return (commands, messages),
                        Ok(_) => {}
                    }
                    data.extend_from_slice(&l);
                    if l == b".\r\n" {
                        break;
                    }
                }
                messages.push(data);
                let _ = stream.write_all(b"250 2.0.0 queued as Q1\r\n").await;
            }
            if reply.starts_with("221") {
                break;
            }
        }
        (commands, messages)
    }

    fn friendly(command: &str) -> &'static str {
        match command.split(' ').next().unwrap_or("") {
            "EHLO" => "250-relay.example.org\r\n250-8BITMIME\r\n250 SIZE 100000\r\n",
            "DATA" => "354 go on\r\n",
            "QUIT" => "221 bye\r\n",
            "RCPT" if command.contains("nobody@") => "550 5.1.1 no such user\r\n",
            "RCPT" if command.contains("busy@") => "450 4.2.1 try later\r\n",
            _ => "250 ok\r\n",
        }
    }

    fn wire_len(message: &[u8]) -> usize {
        let mut wire = Vec::new();
        encode_data(message, &mut wire);
        wire.len()
    }

    fn timeouts() -> Timeouts {
        Timeouts::default()
    }

    #[tokio::test]
    async fn a_connection_carries_several_transactions_and_survives_refusals() {
        let (client, server) = duplex(1 << 16);
        let server = tokio::spawn(serve(server, "220 relay.example.org ready\r\n", friendly));
        let mut conn = Connection::open(client, "test", "tamis.example.net", timeouts())
            .await
            .expect("greeting and EHLO");
        assert!(conn.extensions().eight_bit_mime);
        let first = b"Subject: one\r\n\r\n.hidden dot\r\nbody\r\n";
        let rcpts = vec!["a@example.org".to_string(), "b@example.org".to_string()];
        let reply = conn
            .send(
                &Envelope {
                    sender: "",
                    recipients: &rcpts,
                },
                first,
            )
            .await
            .expect("first message");
        assert_eq!(reply.code, 250);
        // A refused recipient: permanent, reset, and the connection still works.
        let refused = vec!["nobody@example.org".to_string()];
        let err = conn
            .send(
                &Envelope {
                    sender: "s@example.net",
                    recipients: &refused,
                },
                b"x\r\n",
            )
            .await
            .err();
        assert!(
            matches!(&err, Some(e @ SmtpError::Rejected { stage: Stage::Rcpt, .. }) if e.failure() == Failure::Permanent),
            "{err:?}"
        );
        let busy = vec!["busy@example.org".to_string()];
        let err = conn
            .send(
                &Envelope {
                    sender: "s@example.net",
                    recipients: &busy,
                },
                b"x\r\n",
            )
            .await
            .err();
        assert_eq!(err.map(|e| e.failure()), Some(Failure::Transient));
        assert!(conn.is_usable());
        let second = "Subject: deux\r\n\r\ncafé\r\n".as_bytes();
        conn.send(
            &Envelope {
                sender: "s@example.net",
                recipients: &rcpts,
            },
            second,
        )
        .await
        .expect("second message");
        conn.quit().await.expect("quit");
        let (commands, messages) = server.await.expect("server task");
        let size = wire_len(second);
        assert_eq!(
            commands,
            vec![
                "EHLO tamis.example.net".to_string(),
                format!("MAIL FROM:<> SIZE={}", wire_len(first)),
                "RCPT TO:<a@example.org>".to_string(),
                "RCPT TO:<b@example.org>".to_string(),
                "DATA".to_string(),
                "MAIL FROM:<s@example.net> SIZE=6".to_string(),
                "RCPT TO:<nobody@example.org>".to_string(),
                "RSET".to_string(),
                "MAIL FROM:<s@example.net> SIZE=6".to_string(),
                "RCPT TO:<busy@example.org>".to_string(),
                "RSET".to_string(),
                format!("MAIL FROM:<s@example.net> BODY=8BITMIME SIZE={size}"),
                "RCPT TO:<a@example.org>".to_string(),
                "RCPT TO:<b@example.org>".to_string(),
                "DATA".to_string(),
                "QUIT".to_string(),
            ]
        );
        assert_eq!(messages.len(), 2);
        assert_eq!(unstuff(&messages[0]), first.to_vec());
        assert_eq!(unstuff(&messages[1]), second.to_vec());
    }

    #[tokio::test]
    async fn helo_when_ehlo_is_unknown_and_no_8bit_without_8bitmime() {
        fn old(command: &str) -> &'static str {
            match command.split(' ').next().unwrap_or("") {
                "EHLO" => "502 5.5.2 what?\r\n",
                "HELO" => "250 old.example.org\r\n",
                _ => "250 ok\r\n",
            }
        }
        let (client, server) = duplex(1 << 16);
        let server = tokio::spawn(serve(server, "220 old\r\n", old));
        let mut conn = Connection::open(client, "test", "tamis.example.net", timeouts())
            .await
            .expect("HELO fallback");
        assert!(!conn.extensions().esmtp);
        let rcpts = vec!["a@example.org".to_string()];
        let err = conn
            .send(
                &Envelope {
                    sender: "",
                    recipients: &rcpts,
                },
                "Subject: é\r\n\r\n".as_bytes(),
            )
            .await
            .err();
        assert!(
            matches!(err, Some(SmtpError::Unsupported { .. })),
            "{err:?}"
        );
        drop(conn);
        let (commands, _) = server.await.expect("server task");
        // Nothing was sent for the refused message.
        assert_eq!(
            commands,
            vec!["EHLO tamis.example.net", "HELO tamis.example.net"]
        );
    }

    #[tokio::test]
    async fn an_over_long_reply_line_is_refused() {
        let (client, mut server) = duplex(1 << 16);
        let long = format!("220 {}\r\n", "x".repeat(MAX_REPLY_LINE));
        let writer = tokio::spawn(async move {
            let _ = server.write_all(long.as_bytes()).await;
            server
        });
        let err = Connection::open(client, "test", "tamis.example.net", timeouts())
            .await
            .err();
        assert!(
            matches!(&err, Some(e @ SmtpError::Protocol { stage: Stage::Greeting, detail, .. })
                if detail.contains("longer than") && e.failure() == Failure::Connection),
            "{err:?}"
        );
        drop(writer.await);
    }

    #[tokio::test(start_paused = true)]
    async fn a_silent_server_times_out_at_the_greeting() {
        let (client, server) = duplex(1 << 16);
        let limits = Timeouts {
            command: Duration::from_secs(300),
            ..Timeouts::default()
        };
        let started = tokio::time::Instant::now();
        let err = Connection::open(client, "test", "tamis.example.net", limits)
            .await
            .err();
        assert!(
            matches!(
                err,
                Some(SmtpError::Timeout {
                    stage: Stage::Greeting,
                    ..
                })
            ),
            "{err:?}"
        );
        // RFC 5321 §4.5.3.2.1: the client waits 5 minutes for the greeting.
        assert!(started.elapsed() >= Duration::from_secs(300));
        drop(server);
    }

    #[tokio::test]
    async fn a_closed_connection_and_a_refused_greeting() {
        let (client, server) = duplex(1 << 16);
        drop(server);
        let err = Connection::open(client, "test", "tamis.example.net", timeouts())
            .await
            .err();
        assert!(matches!(err, Some(SmtpError::Closed { .. })), "{err:?}");

        let (client, server) = duplex(1 << 16);
        let server = tokio::spawn(serve(server, "554 no service\r\n", friendly));
        let err = Connection::open(client, "test", "tamis.example.net", timeouts())
            .await
            .err();
        assert_eq!(err.map(|e| e.failure()), Some(Failure::Permanent));
        drop(server);
    }

    #[tokio::test]
    async fn bad_envelopes_send_nothing() {
        let (client, server) = duplex(1 << 16);
        let server = tokio::spawn(serve(server, "220 ready\r\n", friendly));
        let mut conn = Connection::open(client, "test", "tamis.example.net", timeouts())
            .await
            .expect("open");
        for (sender, rcpts) in [
            ("a@example.org", vec![]),
            ("a@example.org\r\nRSET", vec!["b@example.org".to_string()]),
            ("a@example.org", vec!["b@example.org>\r\nDATA".to_string()]),
        ] {
            let err = conn
                .send(
                    &Envelope {
                        sender,
                        recipients: &rcpts,
                    },
                    b"x\r\n",
                )
                .await
                .err();
            assert!(matches!(err, Some(SmtpError::Invalid { .. })), "{err:?}");
        }
        assert!(conn.is_usable());
        conn.quit().await.expect("quit");
        let (commands, _) = server.await.expect("server");
        assert_eq!(commands, vec!["EHLO tamis.example.net", "QUIT"]);
    }
}
