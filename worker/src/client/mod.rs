//! Talking to the server: the REST client and the worker loop.

pub mod api;
pub mod run;
