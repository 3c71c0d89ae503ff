//! Shared helpers for the end-to-end and reference tests.
