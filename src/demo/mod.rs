//! placeholder: demo corpus (being written)
