//! The message pipeline (extract → normalize → featurize) on arbitrary bytes, read both as a
//! file given to the CLI and as mail handed over by a relay.
//!
//! Run with `-max_len=1048576` and a per-input time limit (`-timeout=5` in
//! scripts/fuzz-smoke): header decoding that is quadratic in a field's length, as RFC 2047
//! decoding once was, takes seconds on inputs of a few hundred kilobytes and is reported
//! as a timeout. Invariants checked beyond "no panic, no hang": a non-empty vector has unit
//! L2 norm; the relayed reading never refuses, and on bytes the file reading accepts it
//! gives the same vector (models trained from files score relayed mail alike).
#![no_main]

use std::cell::RefCell;

use libfuzzer_sys::fuzz_target;
use tamis::analyze::Analyzer;

thread_local! {
    // One analyzer reused across inputs, as the daemon's pool reuses them: state left
    // over from one message must not change the next one's vector.
    static ANALYZER: RefCell<Analyzer> = RefCell::new(Analyzer::default());
}

fn unit_or_empty(norm: f64, empty: bool) -> bool {
    empty || (norm - 1.0).abs() < 1e-3
}

fuzz_target!(|data: &[u8]| {
    ANALYZER.with(|cell| {
        let mut analyzer = cell.borrow_mut();
        let file = analyzer.vectorize(data).ok().cloned();
        let relayed = analyzer.vectorize_relayed(data).clone();
        assert!(unit_or_empty(relayed.l2_norm(), relayed.is_empty()));
        if let Some(file) = file {
            assert!(unit_or_empty(file.l2_norm(), file.is_empty()));
            assert_eq!(file, relayed, "file and relayed readings differ");
        }
    });
});
