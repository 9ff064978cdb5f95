//! Cross-crate checks live in `tests/tests/`; this library holds shared helpers.
