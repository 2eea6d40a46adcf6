//! The configuration parser on arbitrary text.
//!
//! Invariants beyond "no panic": a configuration that parses also validates, writes back to
//! TOML, and that TOML parses to the same configuration; an error's message and position
//! can be rendered.
#![no_main]

use libfuzzer_sys::fuzz_target;
use tamis::config::Config;

fuzz_target!(|data: &[u8]| {
    let Ok(text) = std::str::from_utf8(data) else {
        return;
    };
    // A bare file name: relative paths stay as written, so the round trip compares like
    // with like.
    match Config::from_toml_str(text, "fuzz.toml") {
        Ok(config) => {
            config.validate().expect("a parsed configuration validates");
            let written = config.to_toml_string().expect("a configuration writes");
            let again = Config::from_toml_str(&written, "fuzz.toml")
                .unwrap_or_else(|e| panic!("written configuration refused: {e}\n{written}"));
            assert_eq!(config, again, "TOML round trip");
        }
        Err(e) => {
            let _ = e.to_string();
            let _ = e.line_column();
        }
    }
});
