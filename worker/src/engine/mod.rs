//! The one-cell engine: everything needed to decide one cell, and nothing about HTTP
//! or SQL. Numbers that are bounds travel as [`interval::Interval`]s (or affine forms),
//! never as bare f64, so that an inward rounding cannot slip in.

pub mod expr;
pub mod interval;
pub mod net;
pub mod spec;
pub mod verdict;
// Closed loop, proof, falsifier and cell check: wired in once the plant and network
// modules land.
// pub mod closed_loop;
// pub mod reach;
// pub mod falsify;
// pub mod check;
