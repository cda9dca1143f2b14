//! Store tests (see tests/it for the end-to-end ones).
