//! A blocking client of the relay protocol, for `tamis check`, `tamis demo` and the load
//! benchmark. (An independent client written from PROTOCOL.md alone lives in
//! `clients/python/`.)

use std::io::{Read, Write};
use std::net::TcpStream;
use std::os::unix::net::UnixStream;
use std::time::Duration;

use bytes::{Buf, BytesMut};

use super::{
    FaultCode, Frame, MIN_MAX_FRAME, PROTOCOL_VERSION, Verdict, encode_frame_within, parse_frame,
};

/// Why a conversation failed.
#[derive(Debug, thiserror::Error)]
pub enum ClientError {
    /// Connecting, reading or writing failed.
    #[error("{0}")]
    Io(#[from] std::io::Error),
    /// The server sent bytes that are not a valid frame.
    #[error("server sent an invalid frame: {0}")]
    Protocol(#[from] super::ProtoError),
    /// The server ended the conversation with a fatal fault.
    #[error("server refused: {code} ({text})")]
    Fault {
        /// The fault code.
        code: FaultCode,
        /// The server's explanation.
        text: String,
    },
    /// A frame could not be encoded within the server's limit.
    #[error("{0}")]
    Encode(#[from] super::EncodeError),
    /// The server sent something the conversation did not expect.
    #[error("unexpected frame from the server: {0}")]
    Unexpected(String),
}

enum Stream {
    Tcp(TcpStream),
    Unix(UnixStream),
}

impl Read for Stream {
    fn read(&mut self, buf: &mut [u8]) -> std::io::Result<usize> {
        match self {
            Stream::Tcp(s) => s.read(buf),
            Stream::Unix(s) => s.read(buf),
        }
    }
}

impl Write for Stream {
    fn write(&mut self, buf: &[u8]) -> std::io::Result<usize> {
        match self {
            Stream::Tcp(s) => s.write(buf),
            Stream::Unix(s) => s.write(buf),
        }
    }

    fn flush(&mut self) -> std::io::Result<()> {
        match self {
            Stream::Tcp(s) => s.flush(),
            Stream::Unix(s) => s.flush(),
        }
    }
}

/// A connection to a tamis daemon after the handshake.
pub struct Client {
    stream: Stream,
    read: BytesMut,
    write: BytesMut,
    server_max_frame: u32,
}

/// The largest frame this client accepts.
const CLIENT_MAX_FRAME: u32 = 1 << 20;

impl Client {
    /// Connects to `addr` — `unix:/path/to/socket` or `host:port` — and shakes hands.
    pub fn connect(addr: &str, timeout: Duration) -> Result<Client, ClientError> {
        Client::connect_with_secret(addr, timeout, None)
    }

    /// Connects as [`Client::connect`] does, presenting `secret` in `HELLO` (a daemon
    /// configured with `access.secret_file` refuses TCP clients without it).
    pub fn connect_with_secret(
        addr: &str,
        timeout: Duration,
        secret: Option<&[u8]>,
    ) -> Result<Client, ClientError> {
        let stream = match addr.strip_prefix("unix:") {
            Some(path) => {
                let s = UnixStream::connect(path)?;
                s.set_read_timeout(Some(timeout))?;
                Stream::Unix(s)
            }
            None => {
                let s = TcpStream::connect(addr)?;
                s.set_read_timeout(Some(timeout))?;
                s.set_nodelay(true)?;
                Stream::Tcp(s)
            }
        };
        let mut client = Client {
            stream,
            read: BytesMut::with_capacity(4096),
            write: BytesMut::with_capacity(64 * 1024),
            server_max_frame: MIN_MAX_FRAME,
        };
        client.send(&Frame::Hello {
            version: PROTOCOL_VERSION,
            max_frame: CLIENT_MAX_FRAME,
            client: format!("tamis-check {}", env!("CARGO_PKG_VERSION")),
            secret: secret.map(<[u8]>::to_vec),
        })?;
        client.flush()?;
        match client.receive()? {
            Frame::Welcome { max_frame, .. } => client.server_max_frame = max_frame,
            other => return Err(ClientError::Unexpected(format!("{other:?}"))),
        }
        Ok(client)
    }

    fn send(&mut self, frame: &Frame) -> Result<(), ClientError> {
        encode_frame_within(frame, self.server_max_frame, &mut self.write)?;
        if self.write.len() >= 32 * 1024 {
            self.flush()?;
        }
        Ok(())
    }

    fn flush(&mut self) -> Result<(), ClientError> {
        self.stream.write_all(&self.write)?;
        self.stream.flush()?;
        self.write.clear();
        Ok(())
    }

    fn receive(&mut self) -> Result<Frame, ClientError> {
        loop {
            if let Some((frame, used)) = parse_frame(&self.read, CLIENT_MAX_FRAME)? {
                self.read.advance(used);
                if let Frame::Fault {
                    code,
                    fatal: true,
                    text,
                } = frame
                {
                    return Err(ClientError::Fault { code, text });
                }
                return Ok(frame);
            }
            let mut chunk = [0u8; 8192];
            let n = self.stream.read(&mut chunk)?;
            if n == 0 {
                return Err(ClientError::Io(std::io::Error::new(
                    std::io::ErrorKind::UnexpectedEof,
                    "server closed the connection",
                )));
            }
            self.read.extend_from_slice(&chunk[..n]);
        }
    }

    /// Streams one message and returns its verdict.
    pub fn scan(
        &mut self,
        sender: &str,
        recipients: &[String],
        raw: &[u8],
    ) -> Result<Verdict, ClientError> {
        self.send(&Frame::Sender {
            address: sender.to_string(),
        })?;
        for r in recipients {
            self.send(&Frame::Recipient { address: r.clone() })?;
        }
        let (fields, body) = split_message(raw);
        // Leave room for the frame's own fields within the server's limit.
        let room = (self.server_max_frame as usize).saturating_sub(64);
        for (name, value) in fields {
            let cut = value.len().min(room.saturating_sub(name.len()));
            self.send(&Frame::Field {
                name,
                value: value[..cut].to_vec(),
            })?;
        }
        for piece in body.chunks(room.clamp(1, 16 * 1024)) {
            self.send(&Frame::Chunk {
                data: piece.to_vec(),
            })?;
        }
        self.send(&Frame::Seal)?;
        self.flush()?;
        loop {
            match self.receive()? {
                Frame::Verdict(v) => return Ok(v),
                // Non-fatal notices and ENOUGH: the message was sent whole already.
                Frame::Fault { .. } | Frame::Enough | Frame::Pong { .. } => {}
                other => return Err(ClientError::Unexpected(format!("{other:?}"))),
            }
        }
    }

    /// Ends the conversation politely.
    pub fn bye(mut self) -> Result<(), ClientError> {
        self.send(&Frame::ClientBye)?;
        self.flush()?;
        match self.receive() {
            Ok(Frame::ServerBye) => Ok(()),
            Ok(other) => Err(ClientError::Unexpected(format!("{other:?}"))),
            Err(e) => Err(e),
        }
    }
}

/// Splits an RFC 5322 message into header fields (name, value after the colon with the
/// blanks after it removed, folding kept) and the body (after the empty line).
pub fn split_message(raw: &[u8]) -> (Vec<(String, Vec<u8>)>, &[u8]) {
    let mut fields: Vec<(String, Vec<u8>)> = Vec::new();
    let mut rest = raw;
    loop {
        let end = rest
            .iter()
            .position(|&b| b == b'\n')
            .map_or(rest.len(), |p| p + 1);
        let line = &rest[..end];
        let content = line.strip_suffix(b"\n").unwrap_or(line);
        let content = content.strip_suffix(b"\r").unwrap_or(content);
        if content.is_empty() {
            return (fields, &rest[end..]);
        }
        if content[0] == b' ' || content[0] == b'\t' {
            if let Some((_, value)) = fields.last_mut() {
                value.extend_from_slice(b"\r\n");
                value.extend_from_slice(content);
            }
        } else if let Some(colon) = content.iter().position(|&b| b == b':') {
            let name = String::from_utf8_lossy(&content[..colon])
                .trim_end()
                .to_string();
            let value = &content[colon + 1..];
            let start = value
                .iter()
                .position(|&b| b != b' ' && b != b'\t')
                .unwrap_or(value.len());
            fields.push((name, value[start..].to_vec()));
        } else {
            // Not a field: the header section ended without its empty line.
            return (fields, rest);
        }
        rest = &rest[end..];
        if rest.is_empty() {
            return (fields, rest);
        }
    }
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn splits_fields_with_folding_and_body() {
        let raw = b"Subject: a\r\n b\r\nFrom:  x@example.org\r\n\r\nbody\r\n";
        let (fields, body) = split_message(raw);
        assert_eq!(
            fields,
            vec![
                ("Subject".to_string(), b"a\r\n b".to_vec()),
                ("From".to_string(), b"x@example.org".to_vec())
            ]
        );
        assert_eq!(body, b"body\r\n");
    }
}
