//! The daemon: listeners, per-connection sessions, scoring off the async workers, limits,
//! graceful shutdown and reload.

pub mod access;
pub mod budget;
pub mod build;
pub mod engine;
pub mod http;
pub mod keeping;
pub mod listen;
pub mod session;
pub mod throttle;
