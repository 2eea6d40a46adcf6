//! The model file decoder on arbitrary bytes.
//!
//! Invariants beyond "no panic, no allocation the input cannot justify": a model that
//! decodes re-encodes to bytes that decode to a model re-encoding to the very same bytes,
//! and it can build the analyzer its feature spec describes and score a message.
#![no_main]

use std::path::Path;

use libfuzzer_sys::fuzz_target;
use tamis::analyze::Analyzer;
use tamis::model::file::{decode_model, encode_model};

fuzz_target!(|data: &[u8]| {
    let path = Path::new("fuzz.tamis");
    let Ok(model) = decode_model(data, path) else {
        return;
    };
    let once = encode_model(&model);
    let again = decode_model(&once, path).expect("an encoded model decodes");
    assert_eq!(once, encode_model(&again), "encode and decode round-trip");
    // A decoded spec is one this binary reproduces.
    let mut analyzer = Analyzer::new(model.spec().clone()).expect("decoded spec is supported");
    let x = analyzer
        .vectorize(b"Subject: seed\r\n\r\nclaim your prize now\r\n")
        .expect("mail");
    let _ = model.margin(x);
});
