//! Campaign spec, version 1: the JSON a user writes, and its validated, compiled form.
//!
//! [`parse_spec`] either returns a [`Spec`] whose every expression is parsed and bound,
//! every name resolved and every interval checked, or the complete list of problems,
//! each naming the JSON path at fault (`controller.commands[2].set.thrust`).

use super::expr::{self, Expr};
use super::interval::Interval;
use serde::{Deserialize, Serialize};
use std::collections::{BTreeMap, HashSet};

/// Highest refinement depth a spec may ask for (cells are 2^-depth of the envelope).
pub const MAX_DEPTH_LIMIT: u32 = 60;
/// Longest horizon a spec may ask for, in control periods.
pub const MAX_HORIZON: u32 = 10_000;

/// One problem found in a spec: where (a JSON path) and what.
#[derive(Clone, Debug, PartialEq, Serialize, Deserialize, thiserror::Error)]
#[error("{path}: {message}")]
pub struct SpecError {
    pub path: String,
    pub message: String,
}

fn err(path: impl Into<String>, message: impl Into<String>) -> SpecError {
    SpecError { path: path.into(), message: message.into() }
}

// ---------------------------------------------------------------------------
// The document as written (serde types)
// ---------------------------------------------------------------------------

#[derive(Clone, Debug, Serialize, Deserialize, PartialEq)]
#[serde(deny_unknown_fields)]
pub struct SpecDoc {
    /// Spec format version; 1 when absent.
    #[serde(default = "one", skip_serializing_if = "is_one")]
    pub version: u32,
    pub name: String,
    #[serde(default, skip_serializing_if = "Option::is_none")]
    pub description: Option<String>,
    pub states: Vec<NamedUnit>,
    pub inputs: Vec<NamedUnit>,
    #[serde(default, skip_serializing_if = "Vec::is_empty")]
    pub disturbances: Vec<Disturbance>,
    /// Right-hand side of dx/dt for each state, keyed by state name.
    pub dynamics: BTreeMap<String, String>,
    pub controller: ControllerDoc,
    /// A union of conjunctions of closed constraints over the states.
    #[serde(rename = "unsafe")]
    pub unsafe_set: Vec<Conjunction>,
    pub horizon_periods: u32,
    /// An interval for every state, keyed by state name.
    pub envelope: BTreeMap<String, [f64; 2]>,
    pub refinement: Refinement,
    #[serde(default)]
    pub engine: EngineOptions,
}

fn one() -> u32 {
    1
}
fn is_one(v: &u32) -> bool {
    *v == 1
}

#[derive(Clone, Debug, Serialize, Deserialize, PartialEq)]
#[serde(deny_unknown_fields)]
pub struct NamedUnit {
    pub name: String,
    #[serde(default)]
    pub unit: String,
}

#[derive(Clone, Debug, Serialize, Deserialize, PartialEq)]
#[serde(deny_unknown_fields)]
pub struct Disturbance {
    pub name: String,
    pub range: [f64; 2],
    #[serde(default, skip_serializing_if = "String::is_empty")]
    pub unit: String,
}

#[derive(Clone, Debug, Serialize, Deserialize, PartialEq)]
#[serde(deny_unknown_fields)]
pub struct ControllerDoc {
    /// Control period T in seconds.
    pub period: f64,
    #[serde(default)]
    pub latency_periods: u32,
    pub observations: Vec<ObservationDoc>,
    #[serde(default, skip_serializing_if = "Option::is_none")]
    pub normalization: Option<Normalization>,
    /// Model references: a path relative to the spec file, or `sha256:HEX`.
    pub networks: Vec<String>,
    pub selection: Selection,
    pub decision: Decision,
    pub commands: Vec<CommandDoc>,
    pub initial_command: OneOrMany,
}

#[derive(Clone, Debug, Serialize, Deserialize, PartialEq)]
#[serde(deny_unknown_fields)]
pub struct ObservationDoc {
    pub name: String,
    pub expr: String,
    /// Additive noise bounds; the noise takes any value in them at every sample.
    #[serde(default, skip_serializing_if = "Option::is_none")]
    pub noise: Option<[f64; 2]>,
}

#[derive(Clone, Debug, Serialize, Deserialize, PartialEq)]
#[serde(deny_unknown_fields)]
pub struct Normalization {
    pub offset: Vec<f64>,
    pub scale: Vec<f64>,
}

#[derive(Clone, Debug, Serialize, Deserialize, PartialEq)]
#[serde(tag = "mode", rename_all = "snake_case", deny_unknown_fields)]
pub enum Selection {
    Single,
    PreviousCommand { network_of_command: Vec<usize> },
}

#[derive(Clone, Copy, Debug, Serialize, Deserialize, PartialEq, Eq)]
#[serde(rename_all = "snake_case")]
pub enum Decision {
    Argmax,
    Argmin,
}

#[derive(Clone, Debug, Serialize, Deserialize, PartialEq)]
#[serde(deny_unknown_fields)]
pub struct CommandDoc {
    pub name: String,
    pub set: BTreeMap<String, f64>,
}

#[derive(Clone, Debug, Serialize, Deserialize, PartialEq)]
#[serde(untagged)]
pub enum OneOrMany {
    One(String),
    Many(Vec<String>),
}

#[derive(Clone, Debug, Serialize, Deserialize, PartialEq)]
#[serde(deny_unknown_fields)]
pub struct Conjunction {
    pub all: Vec<String>,
}

#[derive(Clone, Debug, Serialize, Deserialize, PartialEq)]
#[serde(deny_unknown_fields)]
pub struct Refinement {
    pub max_depth: u32,
    pub split: Vec<String>,
    /// Whether a cell with a counterexample is cut further, down to `max_depth`. On
    /// when absent: a counterexample in a large cell must not end the search for the
    /// safe volume inside it. Always written out in the canonical document, so a
    /// stored campaign keeps the value it was created with.
    #[serde(default = "yes")]
    pub refine_unsafe: bool,
}

fn yes() -> bool {
    true
}

/// Which set representation carries the state between periods.
#[derive(Clone, Copy, Debug, Serialize, Deserialize, PartialEq, Eq)]
#[serde(rename_all = "snake_case")]
pub enum SetKind {
    /// Axis-aligned boxes (cheap, loose).
    Box,
    /// Affine forms / zonotopes (keeps linear dependencies between states).
    Affine,
    /// Zonotopes with linear constraints on their symbols: each open decision adds the
    /// network's linear bounds as constraints instead of cutting the set into boxes.
    Constrained,
}

/// How network outputs are bounded over a box of inputs.
#[derive(Clone, Copy, Debug, Serialize, Deserialize, PartialEq, Eq)]
#[serde(rename_all = "snake_case")]
pub enum BoundsMethod {
    Interval,
    Symbolic,
    /// Interval first; symbolic only when the interval bounds leave the decision open.
    Portfolio,
}

/// Which state a branch's box is bisected along when the decision on it is open.
#[derive(Clone, Copy, Debug, Serialize, Deserialize, PartialEq, Eq)]
#[serde(rename_all = "snake_case")]
pub enum DecisionSplit {
    /// The state the network's inputs move with most over the piece.
    Sensitivity,
    /// The widest state relative to the branch's box (every state in turn).
    Widest,
}

/// Which method decides a cell.
#[derive(Clone, Copy, Debug, Default, Serialize, Deserialize, PartialEq, Eq)]
#[serde(rename_all = "snake_case")]
pub enum Method {
    /// The engine chooses. Today: the set methods (as `sets`), whatever the loop.
    #[default]
    Auto,
    /// Set propagation (`engine.set`), then the falsifier.
    Sets,
    /// The exact method: the loop over the horizon as a mixed-integer linear program.
    /// Needs linear dynamics, observations and unsafe constraints, and ReLU networks;
    /// a spec that pins it otherwise is refused, naming the expression at fault.
    Exact,
}

fn is_auto(m: &Method) -> bool {
    *m == Method::Auto
}

/// Default of `engine.exact_samples`.
pub const EXACT_SAMPLES: u32 = 4;

/// Default of [`EngineOptions::slope_steps`].
pub const SLOPE_STEPS: u32 = 0;

fn is_default_slope_steps(v: &u32) -> bool {
    *v == SLOPE_STEPS
}

fn is_default_samples(v: &u32) -> bool {
    *v == EXACT_SAMPLES
}

/// Tuning knobs of the one-cell engine. Every field has a documented default.
#[derive(Clone, Debug, Serialize, Deserialize, PartialEq)]
#[serde(deny_unknown_fields, default)]
pub struct EngineOptions {
    /// Order of the Taylor series of the validated integrator (1–8). Default 4.
    pub taylor_order: u32,
    /// Integration sub-steps per control period to start from (halved steps are added
    /// when an a-priori enclosure fails). Default 4.
    pub substeps: u32,
    /// Most sub-steps per period before the period is given up. Default 256.
    pub max_substeps: u32,
    /// Set representation. Default `constrained`.
    pub set: SetKind,
    /// Network bounds. Default `symbolic`.
    pub bounds: BoundsMethod,
    /// Most generators a zonotope keeps, per state dimension. Default 8.
    pub generators_per_dim: u32,
    /// Most nodes of the command tree for one cell. Default 4000.
    pub node_budget: u64,
    /// Wall-clock budget for one cell, seconds. Default 20.
    pub time_budget_s: f64,
    /// Live branches per period above which branches with the same command are joined
    /// into one set. Default 8.
    pub join_above: u32,
    /// Most pieces a branch's box is cut into to find where each open command may be
    /// chosen (1 keeps the whole set for every open command). Default 16.
    pub decision_pieces: u32,
    /// How those pieces are cut. Default `sensitivity`.
    pub decision_split: DecisionSplit,
    /// End branches whose set lies inside a polytope an earlier period held with the
    /// same future (constrained sets only). Default true.
    pub repeat_check: bool,
    /// With `constrained` sets: try boxes with interval network bounds first, and the
    /// constrained sets only when boxes do not prove the cell but reach 40 % of the
    /// horizon. Default true.
    pub cheap_first: bool,
    /// After random and extreme runs, let the adversary search every command the noise
    /// allows for a counterexample. Default true.
    pub adversary: bool,
    /// Simulated trajectories tried by the falsifier per cell. Default 24.
    pub falsify_samples: u32,
    /// Fixed steps per period of the falsifier's simulation. Default 50.
    pub sim_steps: u32,
    /// Which method decides a cell (`auto`, `sets`, `exact`). Default `auto`. Left out
    /// of the canonical document when it is the default, so that stored specs keep
    /// their hash.
    #[serde(skip_serializing_if = "is_auto")]
    pub method: Method,
    /// Samples per control period at which the exact method checks the unsafe set;
    /// the motion between samples is enclosed and added to the unsafe sets (more
    /// samples cost continuous variables, not binaries). Default 4. Also left out when
    /// it is the default.
    #[serde(skip_serializing_if = "is_default_samples")]
    pub exact_samples: u32,
    /// Projected-gradient steps that optimise the network relaxation's ReLU lower
    /// slopes for each score difference a decision leaves open (constrained sets;
    /// 0 keeps the fixed rule). Default 0: on the demo scenarios 12 steps proved the
    /// same cells at 1.1–1.5× the time (BENCHMARKS.md). Left out of the canonical
    /// document when it is the default.
    #[serde(skip_serializing_if = "is_default_slope_steps")]
    pub slope_steps: u32,
}

impl Default for EngineOptions {
    fn default() -> Self {
        EngineOptions {
            taylor_order: 4,
            substeps: 4,
            max_substeps: 256,
            set: SetKind::Constrained,
            bounds: BoundsMethod::Symbolic,
            generators_per_dim: 8,
            node_budget: 4000,
            time_budget_s: 20.0,
            join_above: 8,
            decision_pieces: 16,
            decision_split: DecisionSplit::Sensitivity,
            repeat_check: true,
            cheap_first: true,
            adversary: true,
            falsify_samples: 24,
            sim_steps: 50,
            method: Method::Auto,
            exact_samples: EXACT_SAMPLES,
            slope_steps: SLOPE_STEPS,
        }
    }
}

// ---------------------------------------------------------------------------
// The compiled form
// ---------------------------------------------------------------------------

/// Comparison of one unsafe constraint `lhs op rhs`; strict and non-strict alike are
/// taken as closed sets (`<` as `<=`), so the unsafe set is closed.
#[derive(Clone, Copy, Debug, PartialEq, Eq, Serialize, Deserialize)]
pub enum Cmp {
    Le,
    Ge,
}

/// One constraint `g(x) ≤ 0`, where `g = lhs − rhs` (for `<=`) or `rhs − lhs` (for `>=`).
#[derive(Clone, Debug, PartialEq)]
pub struct Constraint {
    pub text: String,
    /// `g` with the state symbols bound (indices into `states`).
    pub g: Expr,
}

#[derive(Clone, Debug, PartialEq)]
pub struct Observation {
    pub name: String,
    /// Over the states only.
    pub expr: Expr,
    pub noise: Interval,
}

#[derive(Clone, Debug, PartialEq)]
pub struct Command {
    pub name: String,
    /// Value of every input, in the order of `inputs`.
    pub inputs: Vec<f64>,
}

/// A validated campaign spec. Symbol layout of `dynamics`: states, then inputs, then
/// disturbances; of observations and unsafe constraints: states only.
#[derive(Clone, Debug)]
pub struct Spec {
    pub doc: SpecDoc,
    pub states: Vec<String>,
    pub inputs: Vec<String>,
    pub disturbances: Vec<String>,
    pub disturbance_ranges: Vec<Interval>,
    pub dynamics: Vec<Expr>,
    pub observations: Vec<Observation>,
    /// Network input = (observation − offset) / scale.
    pub offset: Vec<f64>,
    pub scale: Vec<f64>,
    pub networks: Vec<String>,
    /// Network index used when the previous command is `c`.
    pub network_of_command: Vec<usize>,
    pub decision: Decision,
    pub commands: Vec<Command>,
    pub initial_commands: Vec<usize>,
    pub period: f64,
    pub latency: u32,
    pub horizon: u32,
    /// Union of conjunctions of constraints `g ≤ 0`.
    pub unsafe_set: Vec<Vec<Constraint>>,
    pub envelope: Vec<Interval>,
    pub split: Vec<usize>,
    pub max_depth: u32,
    pub refine_unsafe: bool,
    pub engine: EngineOptions,
}

/// Parse and validate a spec. All problems found are returned together.
pub fn parse_spec(json: &str) -> Result<Spec, Vec<SpecError>> {
    let de = &mut serde_json::Deserializer::from_str(json);
    let doc: SpecDoc = match serde_path_to_error::deserialize(de) {
        Ok(d) => d,
        Err(e) => {
            let path = e.path().to_string();
            let path = if path == "." { "$".to_string() } else { path };
            return Err(vec![err(path, e.into_inner().to_string())]);
        }
    };
    compile(doc)
}

/// Validate an already-deserialized document.
pub fn compile(doc: SpecDoc) -> Result<Spec, Vec<SpecError>> {
    let mut errs = Vec::new();
    let e = &mut errs;

    if doc.version != 1 {
        e.push(err("version", format!("unsupported spec version {} (this engine reads version 1)", doc.version)));
    }
    if doc.name.trim().is_empty() {
        e.push(err("name", "must not be empty"));
    }
    if doc.name.len() > 200 {
        e.push(err("name", "longer than 200 characters"));
    }

    // Names: one namespace for states, inputs and disturbances.
    let mut seen: HashSet<String> = HashSet::new();
    let mut check_name = |path: String, name: &str, e: &mut Vec<SpecError>| {
        if !is_identifier(name) {
            e.push(err(path, format!("'{name}' is not a name (letters, digits, '_', not starting with a digit)")));
        } else if expr::is_reserved(name) {
            e.push(err(path, format!("'{name}' is reserved (a function or constant)")));
        } else if !seen.insert(name.to_string()) {
            e.push(err(path, format!("duplicate name '{name}'")));
        }
    };
    if doc.states.is_empty() {
        e.push(err("states", "at least one state is required"));
    }
    for (i, s) in doc.states.iter().enumerate() {
        check_name(format!("states[{i}].name"), &s.name, e);
    }
    for (i, s) in doc.inputs.iter().enumerate() {
        check_name(format!("inputs[{i}].name"), &s.name, e);
    }
    let mut disturbance_ranges = Vec::new();
    for (i, d) in doc.disturbances.iter().enumerate() {
        check_name(format!("disturbances[{i}].name"), &d.name, e);
        disturbance_ranges.push(check_interval(&format!("disturbances[{i}].range"), d.range, false, e));
    }
    let states: Vec<String> = doc.states.iter().map(|s| s.name.clone()).collect();
    let inputs: Vec<String> = doc.inputs.iter().map(|s| s.name.clone()).collect();
    let disturbances: Vec<String> = doc.disturbances.iter().map(|s| s.name.clone()).collect();

    // Dynamics over states, inputs, disturbances.
    let all_syms: Vec<&String> = states.iter().chain(&inputs).chain(&disturbances).collect();
    let resolve_all = |n: &str| all_syms.iter().position(|s| *s == n);
    let resolve_states = |n: &str| states.iter().position(|s| s == n);
    let mut dynamics = Vec::new();
    for name in doc.dynamics.keys() {
        if !states.contains(name) {
            e.push(err(format!("dynamics.{name}"), format!("'{name}' is not a state")));
        }
    }
    for s in &states {
        match doc.dynamics.get(s) {
            None => e.push(err("dynamics", format!("no expression for state '{s}'"))),
            Some(src) => match expr::parse(src, &resolve_all) {
                Ok(x) => {
                    if let Some(d) = x.constant_zero_divisor() {
                        e.push(err(format!("dynamics.{s}"), format!("division by a divisor that is zero: {d}")));
                    }
                    dynamics.push(x)
                }
                Err(pe) => e.push(err(format!("dynamics.{s}"), pe.to_string())),
            },
        }
    }

    // Controller.
    let c = &doc.controller;
    if !(c.period.is_finite() && c.period > 0.0) {
        e.push(err("controller.period", "must be a positive finite number of seconds"));
    }
    if c.latency_periods > 1 {
        e.push(err("controller.latency_periods", "must be 0 or 1"));
    }
    if c.observations.is_empty() {
        e.push(err("controller.observations", "at least one observation is required"));
    }
    let mut observations = Vec::new();
    let mut obs_names = HashSet::new();
    for (i, o) in c.observations.iter().enumerate() {
        let p = format!("controller.observations[{i}]");
        if !obs_names.insert(o.name.clone()) {
            e.push(err(format!("{p}.name"), format!("duplicate observation '{}'", o.name)));
        }
        let noise = match o.noise {
            Some(n) => check_interval(&format!("{p}.noise"), n, true, e),
            None => Interval::ZERO,
        };
        if let Some(n) = o.noise {
            if n[0] > 0.0 || n[1] < 0.0 {
                e.push(err(format!("{p}.noise"), "noise bounds must contain 0"));
            }
        }
        match expr::parse(&o.expr, &resolve_states) {
            Ok(x) => {
                if let Some(d) = x.constant_zero_divisor() {
                    e.push(err(format!("{p}.expr"), format!("division by a divisor that is zero: {d}")));
                }
                observations.push(Observation { name: o.name.clone(), expr: x, noise })
            }
            Err(pe) => {
                let hint = if resolve_all(first_unknown(&o.expr, &resolve_states).as_deref().unwrap_or("")).is_some() {
                    " (observations may use states only)"
                } else {
                    ""
                };
                e.push(err(format!("{p}.expr"), format!("{pe}{hint}")))
            }
        }
    }
    let n_obs = c.observations.len();
    let (offset, scale) = match &c.normalization {
        None => (vec![0.0; n_obs], vec![1.0; n_obs]),
        Some(nz) => {
            if nz.offset.len() != n_obs {
                e.push(err(
                    "controller.normalization.offset",
                    format!("has {} entries for {} observations", nz.offset.len(), n_obs),
                ));
            }
            if nz.scale.len() != n_obs {
                e.push(err(
                    "controller.normalization.scale",
                    format!("has {} entries for {} observations", nz.scale.len(), n_obs),
                ));
            }
            for (i, v) in nz.offset.iter().enumerate() {
                if !v.is_finite() {
                    e.push(err(format!("controller.normalization.offset[{i}]"), "must be finite"));
                }
            }
            for (i, v) in nz.scale.iter().enumerate() {
                if !(v.is_finite() && *v > 0.0) {
                    e.push(err(format!("controller.normalization.scale[{i}]"), "must be positive and finite"));
                }
            }
            (nz.offset.clone(), nz.scale.clone())
        }
    };
    if c.networks.is_empty() {
        e.push(err("controller.networks", "at least one network is required"));
    }
    for (i, n) in c.networks.iter().enumerate() {
        if let Err(m) = check_model_ref(n) {
            e.push(err(format!("controller.networks[{i}]"), m));
        }
    }
    // Commands.
    if c.commands.len() < 2 {
        e.push(err("controller.commands", "at least two commands are required"));
    }
    let mut commands = Vec::new();
    let mut cmd_names = HashSet::new();
    for (i, cmd) in c.commands.iter().enumerate() {
        let p = format!("controller.commands[{i}]");
        if !cmd_names.insert(cmd.name.clone()) {
            e.push(err(format!("{p}.name"), format!("duplicate command '{}'", cmd.name)));
        }
        if cmd.name.trim().is_empty() {
            e.push(err(format!("{p}.name"), "must not be empty"));
        }
        for k in cmd.set.keys() {
            if !inputs.contains(k) {
                e.push(err(format!("{p}.set.{k}"), format!("'{k}' is not an input")));
            }
        }
        let mut vals = Vec::new();
        for inp in &inputs {
            match cmd.set.get(inp) {
                None => e.push(err(format!("{p}.set"), format!("does not set input '{inp}'"))),
                Some(v) if !v.is_finite() => e.push(err(format!("{p}.set.{inp}"), "must be finite")),
                Some(v) => vals.push(*v),
            }
        }
        commands.push(Command { name: cmd.name.clone(), inputs: vals });
    }
    let cmd_index = |n: &str| c.commands.iter().position(|k| k.name == n);
    let network_of_command = match &c.selection {
        Selection::Single => {
            if c.networks.len() != 1 {
                e.push(err(
                    "controller.selection",
                    format!("mode 'single' needs exactly one network, {} given", c.networks.len()),
                ));
            }
            vec![0; c.commands.len()]
        }
        Selection::PreviousCommand { network_of_command } => {
            if network_of_command.len() != c.commands.len() {
                e.push(err(
                    "controller.selection.network_of_command",
                    format!("has {} entries for {} commands", network_of_command.len(), c.commands.len()),
                ));
            }
            for (i, k) in network_of_command.iter().enumerate() {
                if *k >= c.networks.len() {
                    e.push(err(
                        format!("controller.selection.network_of_command[{i}]"),
                        format!("network {k} out of range (there are {})", c.networks.len()),
                    ));
                }
            }
            network_of_command.clone()
        }
    };
    let initial_names: Vec<String> = match &c.initial_command {
        OneOrMany::One(s) => vec![s.clone()],
        OneOrMany::Many(v) => v.clone(),
    };
    if initial_names.is_empty() {
        e.push(err("controller.initial_command", "at least one command is required"));
    }
    let mut initial_commands = Vec::new();
    for (i, n) in initial_names.iter().enumerate() {
        let p = match &c.initial_command {
            OneOrMany::One(_) => "controller.initial_command".to_string(),
            OneOrMany::Many(_) => format!("controller.initial_command[{i}]"),
        };
        match cmd_index(n) {
            Some(k) if !initial_commands.contains(&k) => initial_commands.push(k),
            Some(_) => e.push(err(p, format!("command '{n}' listed twice"))),
            None => e.push(err(p, format!("'{n}' is not a command"))),
        }
    }

    // Unsafe set.
    if doc.unsafe_set.is_empty() {
        e.push(err("unsafe", "at least one unsafe region is required"));
    }
    let mut unsafe_set = Vec::new();
    for (i, conj) in doc.unsafe_set.iter().enumerate() {
        if conj.all.is_empty() {
            e.push(err(format!("unsafe[{i}].all"), "at least one constraint is required"));
        }
        let mut cs = Vec::new();
        for (j, text) in conj.all.iter().enumerate() {
            match parse_constraint(text, &resolve_states) {
                Ok(g) => {
                    if let Some(d) = g.constant_zero_divisor() {
                        e.push(err(format!("unsafe[{i}].all[{j}]"), format!("division by a divisor that is zero: {d}")));
                    }
                    cs.push(Constraint { text: text.clone(), g })
                }
                Err(m) => e.push(err(format!("unsafe[{i}].all[{j}]"), m)),
            }
        }
        unsafe_set.push(cs);
    }

    if doc.horizon_periods == 0 || doc.horizon_periods > MAX_HORIZON {
        e.push(err("horizon_periods", format!("must be between 1 and {MAX_HORIZON}")));
    }

    // Envelope.
    let mut envelope = Vec::new();
    for k in doc.envelope.keys() {
        if !states.contains(k) {
            e.push(err(format!("envelope.{k}"), format!("'{k}' is not a state")));
        }
    }
    for s in &states {
        match doc.envelope.get(s) {
            None => {
                e.push(err("envelope", format!("no interval for state '{s}'")));
                envelope.push(Interval::ZERO);
            }
            Some(r) => envelope.push(check_interval(&format!("envelope.{s}"), *r, true, e)),
        }
    }

    // Refinement.
    let r = &doc.refinement;
    if r.max_depth > MAX_DEPTH_LIMIT {
        e.push(err("refinement.max_depth", format!("must be at most {MAX_DEPTH_LIMIT}")));
    }
    if r.split.is_empty() {
        e.push(err("refinement.split", "at least one state to split is required"));
    }
    let mut split = Vec::new();
    for (i, n) in r.split.iter().enumerate() {
        let p = format!("refinement.split[{i}]");
        match states.iter().position(|s| s == n) {
            None => e.push(err(p, format!("'{n}' is not a state"))),
            Some(k) if split.contains(&k) => e.push(err(p, format!("'{n}' listed twice"))),
            Some(k) => {
                if let Some(iv) = envelope.get(k) {
                    if !(iv.lo() < iv.hi()) {
                        e.push(err(p, format!("the envelope of '{n}' is a point; it cannot be split")));
                    }
                }
                split.push(k)
            }
        }
    }

    check_engine(&doc.engine, e);

    if !errs.is_empty() {
        return Err(errs);
    }
    let spec = Spec {
        states,
        inputs,
        disturbances,
        disturbance_ranges,
        dynamics,
        observations,
        offset,
        scale,
        networks: c.networks.clone(),
        network_of_command,
        decision: c.decision,
        commands,
        initial_commands,
        period: c.period,
        latency: c.latency_periods,
        horizon: doc.horizon_periods,
        unsafe_set,
        envelope,
        split,
        max_depth: doc.refinement.max_depth,
        refine_unsafe: doc.refinement.refine_unsafe,
        engine: doc.engine.clone(),
        doc,
    };
    // A spec that pins the exact method must have a linear loop.
    if spec.engine.method == Method::Exact {
        if let Err(nl) = super::linear::linear_loop(&spec) {
            return Err(vec![err(
                nl.path,
                format!(
                    "engine.method is 'exact', which needs {}; '{}' is not linear (in '{}')",
                    nl.needs, nl.culprit, nl.text
                ),
            )]);
        }
    }
    Ok(spec)
}

fn check_engine(o: &EngineOptions, e: &mut Vec<SpecError>) {
    let mut range = |name: &str, v: f64, lo: f64, hi: f64| {
        if !(v.is_finite() && v >= lo && v <= hi) {
            e.push(err(format!("engine.{name}"), format!("must be between {lo} and {hi}")));
        }
    };
    range("taylor_order", o.taylor_order as f64, 1.0, 8.0);
    range("substeps", o.substeps as f64, 1.0, 1024.0);
    range("max_substeps", o.max_substeps as f64, o.substeps.max(1) as f64, 65536.0);
    range("generators_per_dim", o.generators_per_dim as f64, 1.0, 100.0);
    range("node_budget", o.node_budget as f64, 1.0, 1e7);
    range("time_budget_s", o.time_budget_s, 0.001, 86400.0);
    range("join_above", o.join_above as f64, 1.0, 1e6);
    range("decision_pieces", o.decision_pieces as f64, 1.0, 4096.0);
    range("falsify_samples", o.falsify_samples as f64, 0.0, 100_000.0);
    range("sim_steps", o.sim_steps as f64, 1.0, 100_000.0);
    range("exact_samples", o.exact_samples as f64, 1.0, 1024.0);
    range("slope_steps", o.slope_steps as f64, 0.0, 1000.0);
}

fn is_identifier(s: &str) -> bool {
    let mut ch = s.chars();
    matches!(ch.next(), Some(c) if c.is_ascii_alphabetic() || c == '_')
        && ch.all(|c| c.is_ascii_alphanumeric() || c == '_')
        && s.len() <= 64
}

/// A model reference: `sha256:` and 64 hex digits, or a relative path without `..`.
pub fn check_model_ref(s: &str) -> Result<(), String> {
    if let Some(hex) = s.strip_prefix("sha256:") {
        if hex.len() == 64 && hex.chars().all(|c| c.is_ascii_hexdigit() && !c.is_ascii_uppercase()) {
            return Ok(());
        }
        return Err("a stored model is 'sha256:' followed by 64 lowercase hex digits".into());
    }
    if s.is_empty() {
        return Err("must not be empty".into());
    }
    if s.starts_with('/') || s.split(['/', '\\']).any(|p| p == "..") || s.contains('\0') {
        return Err(format!("'{s}' must be a path relative to the spec file, without '..'"));
    }
    Ok(())
}

/// `[lo, hi]` finite with `lo ≤ hi` (or `lo < hi` unless `point_ok`).
fn check_interval(path: &str, r: [f64; 2], point_ok: bool, e: &mut Vec<SpecError>) -> Interval {
    if !r[0].is_finite() || !r[1].is_finite() {
        e.push(err(path, "bounds must be finite numbers"));
        return Interval::ZERO;
    }
    if r[0] > r[1] {
        e.push(err(path, format!("inverted interval [{}, {}]", r[0], r[1])));
        return Interval::ZERO;
    }
    if !point_ok && r[0] == r[1] {
        // A point disturbance is allowed: it is a constant. Only reject emptiness.
    }
    Interval::new(r[0], r[1])
}

fn first_unknown(src: &str, resolve: &impl Fn(&str) -> Option<usize>) -> Option<String> {
    match expr::parse(src, resolve) {
        Err(pe) if pe.message.starts_with("unknown name '") => {
            pe.message.strip_prefix("unknown name '").and_then(|r| r.strip_suffix('\'')).map(String::from)
        }
        _ => None,
    }
}

/// Parse `lhs op rhs` with one of `<= < >= >` into `g` with the set being `g ≤ 0`.
fn parse_constraint(text: &str, resolve: &impl Fn(&str) -> Option<usize>) -> Result<Expr, String> {
    let ops = ["<=", ">=", "<", ">"];
    let mut found: Option<(usize, &str)> = None;
    let bytes = text.as_bytes();
    let mut i = 0;
    let mut count = 0;
    while i < bytes.len() {
        // Compare bytes, not `&text[i..]`: `i` may fall inside a multi-byte character
        // (slicing there panicked, found by fuzzing). The operators are ASCII, and an
        // ASCII byte never occurs inside a multi-byte UTF-8 character, so a match is
        // always at a character boundary.
        let rest = &bytes[i..];
        if let Some(op) = ops.iter().find(|op| rest.starts_with(op.as_bytes())) {
            count += 1;
            if found.is_none() {
                found = Some((i, op));
            }
            i += op.len();
        } else {
            i += 1;
        }
    }
    let Some((at, op)) = found else {
        return Err("a constraint needs one of <=, <, >=, > between two expressions".into());
    };
    if count > 1 {
        return Err("a constraint has exactly one comparison; write chains as separate constraints".into());
    }
    let lhs_src = &text[..at];
    let rhs_src = &text[at + op.len()..];
    let shift = at + op.len();
    let lhs = expr::parse(lhs_src, resolve).map_err(|e| format!("left side, {e}"))?;
    let rhs = expr::parse(rhs_src, resolve).map_err(|pe| {
        format!("right side, column {}: {}", pe.column + text[..shift].chars().count(), pe.message)
    })?;
    Ok(match op {
        "<=" | "<" => Expr::Sub(Box::new(lhs), Box::new(rhs)),
        _ => Expr::Sub(Box::new(rhs), Box::new(lhs)),
    })
}

/// The input and output counts of a network, for checking it against a spec.
#[derive(Clone, Copy, Debug, PartialEq, Eq)]
pub struct NetworkShape {
    pub inputs: usize,
    pub outputs: usize,
}

impl Spec {
    /// Check the shape of network `index` (`controller.networks[index]`) against the
    /// spec: one input per observation, one output per command. The one model check
    /// shared by the engine ([`Spec::check_networks`]), `tessera-worker validate` and
    /// the server's campaign submission; each error names the network's JSON path.
    pub fn check_network(&self, index: usize, s: NetworkShape) -> Vec<SpecError> {
        let p = format!("controller.networks[{index}]");
        let mut e = Vec::new();
        if s.inputs != self.observations.len() {
            e.push(err(
                p.clone(),
                format!("network takes {} inputs but the spec has {} observations", s.inputs, self.observations.len()),
            ));
        }
        if s.outputs != self.commands.len() {
            e.push(err(p, format!("network has {} outputs but the spec has {} commands", s.outputs, self.commands.len())));
        }
        e
    }

    /// Check the networks' shapes against the spec (`shapes[i]` for `networks[i]`).
    pub fn check_networks(&self, shapes: &[NetworkShape]) -> Result<(), Vec<SpecError>> {
        let e: Vec<SpecError> = shapes.iter().enumerate().flat_map(|(i, s)| self.check_network(i, *s)).collect();
        if e.is_empty() {
            Ok(())
        } else {
            Err(e)
        }
    }

    /// Canonical JSON of the document (stable key order), for hashing and storage.
    pub fn canonical_json(&self) -> String {
        serde_json::to_string(&self.doc).expect("spec document serializes")
    }

    /// Names of the states.
    pub fn state_index(&self, name: &str) -> Option<usize> {
        self.states.iter().position(|s| s == name)
    }

    /// Volume fraction bookkeeping: the envelope restricted to the split dimensions.
    pub fn split_box(&self) -> Vec<Interval> {
        self.split.iter().map(|&k| self.envelope[k]).collect()
    }
}

#[cfg(test)]
mod tests {
    use super::*;

    pub(crate) fn example() -> serde_json::Value {
        serde_json::json!({
            "name": "tank",
            "states": [{"name": "h", "unit": "m"}],
            "inputs": [{"name": "q", "unit": "m/s"}],
            "disturbances": [{"name": "leak", "range": [-0.01, 0.01]}],
            "dynamics": {"h": "q - 0.1 * h + leak"},
            "controller": {
                "period": 0.5,
                "observations": [{"name": "level", "expr": "h", "noise": [-0.01, 0.01]}],
                "networks": ["tank.onnx"],
                "selection": {"mode": "single"},
                "decision": "argmax",
                "commands": [{"name": "off", "set": {"q": 0.0}}, {"name": "on", "set": {"q": 0.2}}],
                "initial_command": "off"
            },
            "unsafe": [{"all": ["h >= 2"]}, {"all": ["h < 0.1"]}],
            "horizon_periods": 20,
            "envelope": {"h": [0.5, 1.5]},
            "refinement": {"max_depth": 8, "split": ["h"]}
        })
    }

    fn errors_of(v: serde_json::Value) -> Vec<SpecError> {
        parse_spec(&v.to_string()).err().unwrap_or_default()
    }

    #[test]
    fn example_is_valid() {
        let s = parse_spec(&example().to_string()).unwrap();
        assert_eq!(s.states, vec!["h"]);
        assert_eq!(s.commands[1].inputs, vec![0.2]);
        assert_eq!(s.unsafe_set.len(), 2);
        // h >= 2 becomes 2 - h <= 0
        assert_eq!(s.unsafe_set[0][0].g.eval_f64(&[3.0]), -1.0);
    }

    #[test]
    fn unknown_field_names_its_path() {
        let mut v = example();
        v["controller"]["perod"] = serde_json::json!(1);
        let e = errors_of(v);
        assert_eq!(e[0].path, "controller.perod");
        assert!(e[0].message.contains("perod"), "{:?}", e);
    }

    #[test]
    fn wrong_type_names_its_path() {
        let mut v = example();
        v["controller"]["commands"][1]["set"]["q"] = serde_json::json!("fast");
        let e = errors_of(v);
        assert_eq!(e[0].path, "controller.commands[1].set.q");
    }

    #[test]
    fn semantic_errors_are_all_reported() {
        let mut v = example();
        v["dynamics"]["h"] = serde_json::json!("q - k * h");
        v["envelope"]["h"] = serde_json::json!([2.0, 1.0]);
        v["controller"]["normalization"] = serde_json::json!({"offset": [0.0], "scale": [0.0]});
        v["controller"]["initial_command"] = serde_json::json!("idle");
        v["refinement"]["max_depth"] = serde_json::json!(99);
        v["unsafe"][0]["all"][0] = serde_json::json!("h >= 2 >= 3");
        let e = errors_of(v);
        let paths: Vec<&str> = e.iter().map(|e| e.path.as_str()).collect();
        for p in [
            "dynamics.h",
            "envelope.h",
            "controller.normalization.scale[0]",
            "controller.initial_command",
            "refinement.max_depth",
            "unsafe[0].all[0]",
        ] {
            assert!(paths.contains(&p), "missing {p} in {paths:?}");
        }
        let dyn_err = e.iter().find(|e| e.path == "dynamics.h").unwrap();
        assert!(dyn_err.message.contains("column 5") && dyn_err.message.contains("'k'"), "{dyn_err:?}");
    }

    #[test]
    fn division_by_a_zero_constant_is_rejected() {
        let mut v = example();
        v["dynamics"]["h"] = serde_json::json!("q / (1 - 1) - 0.1 * h");
        let e = errors_of(v);
        assert_eq!(e[0].path, "dynamics.h");
        assert!(e[0].message.contains("zero"), "{:?}", e);
        // A divisor that is a state is fine at validation time (decided per set).
        let mut v = example();
        v["dynamics"]["h"] = serde_json::json!("q / (1 + h^2)");
        assert!(errors_of(v).is_empty());
    }

    #[test]
    fn cells_with_counterexamples_are_refined_unless_the_spec_says_not() {
        let mut v = example();
        v["refinement"].as_object_mut().unwrap().remove("refine_unsafe");
        let s = parse_spec(&v.to_string()).unwrap();
        assert!(s.refine_unsafe);
        // The canonical document states the default, so its hash pins the behaviour.
        assert!(s.canonical_json().contains("\"refine_unsafe\":true"), "{}", s.canonical_json());
        v["refinement"]["refine_unsafe"] = serde_json::json!(false);
        assert!(!parse_spec(&v.to_string()).unwrap().refine_unsafe);
    }

    #[test]
    fn pinning_the_exact_method_needs_a_linear_loop() {
        let mut v = example();
        v["engine"] = serde_json::json!({"method": "exact"});
        let s = parse_spec(&v.to_string()).unwrap();
        assert_eq!(s.engine.method, Method::Exact);
        v["dynamics"]["h"] = serde_json::json!("q - 0.1 * h * h + leak");
        let e = errors_of(v.clone());
        assert_eq!(e.len(), 1, "{e:?}");
        assert_eq!(e[0].path, "dynamics.h");
        assert!(e[0].message.contains("'0.1 * h * h'") && e[0].message.contains("exact"), "{}", e[0].message);
        // The same dynamics are fine with the set methods.
        v["engine"] = serde_json::json!({"method": "sets"});
        assert!(errors_of(v.clone()).is_empty());
        // A nonlinear unsafe constraint is named by its path.
        v["dynamics"]["h"] = serde_json::json!("q - 0.1 * h + leak");
        v["engine"] = serde_json::json!({"method": "exact"});
        v["unsafe"][1]["all"][0] = serde_json::json!("h^2 < 0.01");
        let e = errors_of(v);
        assert_eq!(e[0].path, "unsafe[1].all[0]");
    }

    #[test]
    fn default_method_options_keep_the_canonical_document() {
        let s = parse_spec(&example().to_string()).unwrap();
        let c = s.canonical_json();
        assert!(!c.contains("method") && !c.contains("exact_samples") && !c.contains("slope_steps"), "{c}");
    }

    #[test]
    fn network_shapes_are_checked() {
        let s = parse_spec(&example().to_string()).unwrap();
        assert!(s.check_networks(&[NetworkShape { inputs: 1, outputs: 2 }]).is_ok());
        let e = s.check_networks(&[NetworkShape { inputs: 3, outputs: 2 }]).unwrap_err();
        assert_eq!(e[0].path, "controller.networks[0]");
        let e = s.check_network(2, NetworkShape { inputs: 1, outputs: 3 });
        assert_eq!(e.len(), 1);
        assert_eq!(e[0].path, "controller.networks[2]");
        assert_eq!(e[0].message, "network has 3 outputs but the spec has 2 commands");
    }

    #[test]
    fn model_refs() {
        assert!(check_model_ref("nets/a.onnx").is_ok());
        assert!(check_model_ref("../a.onnx").is_err());
        assert!(check_model_ref("/etc/passwd").is_err());
        assert!(check_model_ref(&format!("sha256:{}", "a".repeat(64))).is_ok());
        assert!(check_model_ref("sha256:xyz").is_err());
    }
}
