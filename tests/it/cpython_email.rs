//! placeholder, being written
