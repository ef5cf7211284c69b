//! Tessera worker: sound closed-loop reachability of one cell of a campaign, and the
//! process that leases cells from the server and reports verdicts.

pub mod client;
