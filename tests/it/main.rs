//! Integration tests, one module per area.
mod cli_extract;
mod cli_learning;
mod config_policy;
mod corpus_readers;
mod cpython_email;
mod daemon;
mod demo_corpus;
mod encoded_words;
mod eval_reference;
mod html;
pub mod invariance;
mod mime;
mod murmur;
mod proto_vectors;
mod python;
mod scan_bypass;
mod solver_reference;
mod text_normalize;
