//! Helpers shared by the end-to-end tests (process start-up, loopback ports).
