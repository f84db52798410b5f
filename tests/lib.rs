//! Shared helpers for the end-to-end tests (see the files in `tests/tests/`).
