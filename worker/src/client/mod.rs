//! Talking to the server: the REST client, the outbox of results and the worker loop.

pub mod api;
pub mod outbox;
pub mod run;
