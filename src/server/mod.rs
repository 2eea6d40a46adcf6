//! The daemon: listeners, per-connection sessions, scoring off the async workers, limits,
//! graceful shutdown and reload.

pub mod engine;
pub mod http;
