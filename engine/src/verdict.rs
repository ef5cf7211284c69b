//! The verdict of one cell: the JSON that travels back to the server.

use serde::{Deserialize, Serialize};
use std::collections::BTreeMap;

/// The verdict kind and the split hint are part of the wire contract: the server
/// reads them (see `tessera_protocol::Outcome`).
pub use tessera_protocol::{SplitHint, VerdictKind};

/// Why a cell is inconclusive.
#[derive(Clone, Copy, Debug, Serialize, Deserialize, PartialEq, Eq)]
#[serde(rename_all = "snake_case")]
pub enum Reason {
    /// The command tree grew past `engine.node_budget`.
    NodeBudget,
    /// The cell took longer than `engine.time_budget_s`.
    TimeBudget,
    /// Some enclosure may meet the unsafe set.
    UnsafeNotExcluded,
    /// The decision stayed open on too many branches (reported with the node budget
    /// when ambiguity caused the growth).
    DecisionAmbiguous,
    /// The validated integrator could not enclose a period (step limit, blow-up or a
    /// value outside a function's domain).
    IntegrationFailed,
}

/// One sampled point of a counterexample trajectory.
#[derive(Clone, Debug, Serialize, Deserialize, PartialEq)]
pub struct TrajectoryPoint {
    pub t: f64,
    pub x: Vec<f64>,
}

/// A concrete trajectory that enters the unsafe set, re-checked by validated
/// integration before it is reported.
#[derive(Clone, Debug, Serialize, Deserialize, PartialEq)]
pub struct Counterexample {
    /// Initial state, by state name.
    pub initial_state: BTreeMap<String, f64>,
    /// The command c₋₁ the tree started from.
    pub initial_command: String,
    /// Disturbance values per period (held constant within a period), by name.
    pub disturbances: BTreeMap<String, Vec<f64>>,
    /// Observation noise per period, by observation name.
    pub noise: BTreeMap<String, Vec<f64>>,
    /// The command decided at each period k = 0, 1, ….
    pub commands: Vec<String>,
    /// Sampled states of the fine simulation up to the entry.
    pub trajectory: Vec<TrajectoryPoint>,
    /// A time at which the trajectory is inside the unsafe set (from the simulation).
    pub entry_time: f64,
    /// The time range over which the validated re-check proved the state unsafe.
    pub proven_unsafe_during: [f64; 2],
    /// Index of the unsafe region (conjunction) entered.
    pub unsafe_region: usize,
    /// Which search found it: `sampling` (random and extreme disturbances and noise) or
    /// `adversary` (every command the noise allows, see the engine's adversary).
    #[serde(default, skip_serializing_if = "Option::is_none")]
    pub found_by: Option<String>,
}

#[derive(Clone, Debug, Default, Serialize, Deserialize, PartialEq)]
pub struct Stats {
    /// Nodes (branch × period) of the command tree explored.
    pub tree_nodes: u64,
    /// Periods the proof attempt completed on every branch.
    pub periods_reached: u32,
    /// Largest number of live branches in one period.
    pub max_branches: u64,
    pub wall_ms: f64,
    pub plant_ms: f64,
    pub network_ms: f64,
    pub falsify_ms: f64,
    /// Simulated trajectories tried by the falsifier.
    pub simulations: u64,
    /// Branches ended early because their set lay inside one an earlier period held.
    #[serde(default)]
    pub repeats: u64,
    /// The set representation that gave the result (`box`, `affine`, `constrained`).
    #[serde(default, skip_serializing_if = "Option::is_none")]
    pub method: Option<String>,
    /// Time of the cheap box attempt made before constrained sets, milliseconds.
    #[serde(default)]
    pub probe_ms: f64,
    /// Time in the exact method's MILP solver, milliseconds (absent when not used).
    #[serde(default, skip_serializing_if = "is_zero")]
    pub solver_ms: f64,
    /// Programs the exact method solved, and the most binaries one of them had.
    #[serde(default, skip_serializing_if = "is_zero_u32")]
    pub milp_programs: u32,
    #[serde(default, skip_serializing_if = "is_zero_u64")]
    pub milp_binaries: u64,
}

fn is_zero(v: &f64) -> bool {
    *v == 0.0
}
fn is_zero_u32(v: &u32) -> bool {
    *v == 0
}
fn is_zero_u64(v: &u64) -> bool {
    *v == 0
}

#[derive(Clone, Debug, Serialize, Deserialize, PartialEq)]
pub struct Verdict {
    pub verdict: VerdictKind,
    #[serde(default, skip_serializing_if = "Option::is_none")]
    pub reason: Option<Reason>,
    /// Human-readable detail of the reason (which region, which period).
    #[serde(default, skip_serializing_if = "Option::is_none")]
    pub detail: Option<String>,
    #[serde(default, skip_serializing_if = "Option::is_none")]
    pub split_hint: Option<SplitHint>,
    #[serde(default, skip_serializing_if = "Option::is_none")]
    pub counterexample: Option<Counterexample>,
    pub stats: Stats,
    /// Version of the engine that produced the verdict.
    pub engine_version: String,
}

pub const ENGINE_VERSION: &str = env!("CARGO_PKG_VERSION");
