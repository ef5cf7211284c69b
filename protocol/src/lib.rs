//! The wire contract between the Tessera server and its clients (the worker and the
//! `tessera` command): every JSON document that crosses `/api/v1` between them, as
//! typed serde structs and enums, and the status vocabularies both sides share.
//!
//! The serde attributes fix the JSON byte for byte as it travels (field names, enum
//! spellings, which absent fields are omitted): a worker of an earlier build and the
//! server must keep understanding each other. The tests at the bottom of each module
//! compare against JSON literals taken from `server/API.md`.
//!
//! This crate knows no HTTP, no SQL and no engine: it depends on serde only.

pub mod coverage;
pub mod lease;
pub mod result;
pub mod status;

pub use coverage::{Coverage, StatusCoverage, COUNTEREXAMPLE_NOTE};
pub use lease::{
    ExtendAnswer, ItemAnswer, LeaseAnswer, ExtendRequest, LeaseRequest, LeasedCell, ReleaseAnswer,
};
pub use result::{FailedAttempt, Outcome, ResultItem, SplitHint, SubmitAnswer, SubmitRequest, VerdictKind};
pub use status::{CampaignState, CellStatus, LeaseStatus};
