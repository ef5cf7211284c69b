//! Tessera engine: sound closed-loop reachability and falsification of one cell of a
//! campaign: everything needed to decide one cell, and nothing about HTTP
//! or SQL. Numbers that are bounds travel as [`interval::Interval`]s (or affine forms),
//! never as bare f64, so that an inward rounding cannot slip in.

pub mod adversary;
pub mod caution;
pub mod affine;
pub mod check;
pub mod closed_loop;
pub mod exact;
pub mod expr;
pub mod falsify;
pub mod interval;
pub mod linear;
pub mod lp;
pub mod milp;
pub mod net;
pub mod plant;
pub mod reach;
pub mod spec;
pub mod star;
pub mod taylor;
pub mod verdict;
