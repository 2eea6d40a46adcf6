//! The relay protocol's frame decoder and the server's state machine on arbitrary bytes.
//!
//! The input is what a client sends on one connection. Frames are decoded as the session
//! decodes them and fed to `SessionState::accept_client` until the stream ends, a frame is
//! malformed, or the state machine answers with a fatal fault (after which the server
//! closes). Invariants checked beyond "no panic": a decoded frame consumes at least its
//! length prefix and never more bytes than there are; re-encoding a decoded frame and
//! decoding that again gives the same bytes (the codec's round trip).
#![no_main]

use bytes::BytesMut;
use libfuzzer_sys::fuzz_target;
use tamis::proto::{Limits, SessionState, encode_frame, parse_frame};

/// The server's default frame limit (PROTOCOL.md), so the fuzzer meets the real bound.
const MAX_FRAME: u32 = 1 << 16;

fuzz_target!(|data: &[u8]| {
    let mut state = SessionState::new(Limits::default());
    let mut rest = data;
    loop {
        let (frame, used) = match parse_frame(rest, MAX_FRAME) {
            Ok(Some(decoded)) => decoded,
            // Incomplete at the end of the input, or a malformed frame: the session stops.
            Ok(None) | Err(_) => return,
        };
        assert!(
            used >= 4 && used <= rest.len(),
            "frame used {used} of {}",
            rest.len()
        );
        rest = &rest[used..];

        let mut once = BytesMut::new();
        if encode_frame(&frame, &mut once).is_ok() {
            let again = parse_frame(&once, u32::MAX)
                .expect("an encoded frame decodes")
                .expect("an encoded frame is complete");
            assert_eq!(again.1, once.len(), "the whole encoded frame is consumed");
            let mut twice = BytesMut::new();
            encode_frame(&again.0, &mut twice).expect("a decoded frame encodes");
            assert_eq!(once, twice, "decode and encode round-trip");
        }

        match state.accept_client(&frame) {
            Ok(_) => {}
            Err(e) if e.code().is_fatal() => return,
            Err(_) => {}
        }
    }
});
