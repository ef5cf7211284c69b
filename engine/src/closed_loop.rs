//! The closed loop of a spec, ready to analyse: plant, networks and the controller's
//! semantics, shared by the proof attempt (`reach`) and the falsifier (`falsify`).
//!
//! Semantics (README "Closed-loop semantics"): with c₋₁ the initial command, at each
//! k = 0..H−1 the controller observes x(kT) plus noise, feeds (observation − offset) /
//! scale to network `network_of_command[c_{k−1}]`, and decides c_k by argmax or argmin
//! of the outputs, ties going to the lowest index. With latency 0 the inputs of c_k hold
//! on [kT, (k+1)T]; with latency 1 those of c_{k−1}.

use super::interval::Interval;
use super::affine::Affine;
use super::net::{self, Layer, Network, OutputBounds};
use ndarray::{Array1, Array2};
use super::plant::Plant;
use super::spec::{BoundsMethod, Decision, Spec};
use super::star::{Halfspace, Star};
use std::collections::BTreeMap;
use std::path::Path;

/// Errors that stop an analysis before it starts (bad cell, bad model files).
#[derive(Debug, thiserror::Error)]
pub enum SetupError {
    #[error("cell: {0}")]
    Cell(String),
    #[error("controller.networks[{index}]: {message}")]
    Network { index: usize, message: String },
    #[error("dynamics: {0}")]
    Plant(String),
}

/// A spec with its plant and networks loaded.
pub struct ClosedLoop {
    pub spec: Spec,
    pub plant: Plant,
    pub nets: Vec<Network>,
}

impl ClosedLoop {
    /// Build from a validated spec and its networks (`nets[i]` for `spec.networks[i]`);
    /// the networks' shapes are checked against the spec.
    pub fn new(spec: Spec, nets: Vec<Network>) -> Result<ClosedLoop, SetupError> {
        if nets.len() != spec.networks.len() {
            return Err(SetupError::Network {
                index: nets.len().min(spec.networks.len()),
                message: format!("{} networks given for {} in the spec", nets.len(), spec.networks.len()),
            });
        }
        let shapes: Vec<_> = nets.iter().map(|n| n.shape()).collect();
        if let Err(errs) = spec.check_networks(&shapes) {
            let e = &errs[0];
            let index = e.path.trim_start_matches("controller.networks[").trim_end_matches(']').parse().unwrap_or(0);
            return Err(SetupError::Network { index, message: e.message.clone() });
        }
        let plant = Plant::new(&spec).map_err(|e| SetupError::Plant(e.to_string()))?;
        Ok(ClosedLoop { spec, plant, nets })
    }

    /// Load the networks named by relative paths in the spec from `base_dir`.
    pub fn load_networks(spec: &Spec, base_dir: &Path) -> Result<Vec<Network>, SetupError> {
        spec.networks
            .iter()
            .enumerate()
            .map(|(index, r)| {
                if r.starts_with("sha256:") {
                    return Err(SetupError::Network {
                        index,
                        message: format!("'{r}' is a stored model; fetch it from the server"),
                    });
                }
                let path = base_dir.join(r);
                let bytes = std::fs::read(&path).map_err(|e| SetupError::Network {
                    index,
                    message: format!("cannot read {}: {e}", path.display()),
                })?;
                net::load_onnx(&bytes).map_err(|e| SetupError::Network { index, message: e.to_string() })
            })
            .collect()
    }

    /// The whole envelope as a cell.
    pub fn envelope(&self) -> Vec<Interval> {
        self.spec.envelope.clone()
    }

    /// Parse a cell given as `{"state": [lo, hi], …}`; states left out keep their
    /// envelope interval. The cell must lie inside the envelope.
    pub fn cell_from_map(&self, map: &BTreeMap<String, [f64; 2]>) -> Result<Vec<Interval>, SetupError> {
        let mut cell = self.envelope();
        for (name, r) in map {
            let Some(i) = self.spec.state_index(name) else {
                return Err(SetupError::Cell(format!("'{name}' is not a state")));
            };
            if !(r[0].is_finite() && r[1].is_finite() && r[0] <= r[1]) {
                return Err(SetupError::Cell(format!("{name}: [{}, {}] is not a finite interval", r[0], r[1])));
            }
            let env = self.spec.envelope[i];
            if r[0] < env.lo() || r[1] > env.hi() {
                return Err(SetupError::Cell(format!(
                    "{name}: [{}, {}] leaves the envelope [{}, {}]",
                    r[0],
                    r[1],
                    env.lo(),
                    env.hi()
                )));
            }
            cell[i] = Interval::new(r[0], r[1]);
        }
        Ok(cell)
    }

    /// Which network decides after command `prev`.
    pub fn network_after(&self, prev: usize) -> &Network {
        &self.nets[self.spec.network_of_command[prev]]
    }

    /// Enclosure of the network input given enclosures of the observations (noise
    /// already added): (o − offset) / scale, outward rounded.
    pub fn network_input(&self, obs: &[Interval]) -> Vec<Interval> {
        obs.iter()
            .enumerate()
            .map(|(j, o)| (*o - Interval::point(self.spec.offset[j])) / Interval::point(self.spec.scale[j]))
            .collect()
    }

    /// Sound bounds on the outputs of the network chosen after `prev`.
    pub fn bound_outputs(&self, prev: usize, input: &[Interval], method: BoundsMethod) -> OutputBounds {
        net::output_bounds(self.network_after(prev), input, method)
    }

    /// Sound bounds on the outputs of the network chosen after `prev`, given the
    /// observations as affine forms over the set's noise symbols (noise not yet
    /// added). The normalisation and the forms are folded into an exact first affine
    /// layer over the unit box of the symbols (plus one symbol per observation for its
    /// error radius and noise), so symbolic bounds keep the correlations between
    /// observations that a box of observations would lose.
    pub fn bound_outputs_affine(&self, prev: usize, obs: &[Affine], method: BoundsMethod) -> OutputBounds {
        let spec = &self.spec;
        match self.composite(prev, obs) {
            Some((composite, _)) => {
                let unit = vec![Interval::new(-1.0, 1.0); composite.input_dim()];
                net::output_bounds(&composite, &unit, method)
            }
            None => {
                let boxes: Vec<Interval> = obs.iter().zip(&spec.observations).map(|(f, o)| f.range() + o.noise).collect();
                self.bound_outputs(prev, &self.network_input(&boxes), method)
            }
        }
    }

    /// The network after `prev` composed with the observation forms: a network over
    /// the unit box whose first inputs are the symbols the observations use (listed in
    /// the second value, in order) and whose last `n_obs` inputs stand for each
    /// observation's error radius and noise. For every point of the set and every noise
    /// value, some point of the unit box gives the same network input exactly (the
    /// normalisation and the forms are folded into an exact first affine layer; every
    /// rounding goes into the radius of the observation's own input). `None` when an
    /// observation is undefined or the composition is too wide.
    fn composite(&self, prev: usize, obs: &[Affine]) -> Option<(Network, Vec<usize>)> {
        let spec = &self.spec;
        if obs.iter().any(|f| f.is_undefined()) {
            return None;
        }
        // Symbols used by any observation, in a dense order.
        let mut syms: Vec<usize> = obs.iter().flat_map(|f| f.terms().iter().map(|t| t.0)).collect();
        syms.sort_unstable();
        syms.dedup();
        let n_obs = obs.len();
        let width = syms.len() + n_obs;
        if width > 256 {
            return None;
        }
        let mut w = Array2::<f64>::zeros((n_obs, width));
        let mut b = Array1::<f64>::zeros(n_obs);
        for (j, f) in obs.iter().enumerate() {
            // input_j = (c + Σ g ε + [−e, e] + noise − offset) / scale
            let scale = Interval::point(spec.scale[j]);
            let noise = spec.observations[j].noise;
            let centre = (Interval::point(f.center()) + Interval::point(noise.mid()) - Interval::point(spec.offset[j])) / scale;
            // Everything not carried exactly by the stored weights goes into the radius
            // of observation j's own symbol: the error radius, the noise radius, and the
            // rounding of every stored coefficient.
            let mut radius = (Interval::point(f.err()) + Interval::point(noise.rad())) / scale;
            radius = radius + Interval::point(centre.rad());
            b[j] = centre.mid();
            for &(s, g) in f.terms() {
                let k = syms.binary_search(&s).expect("symbol collected above");
                let q = Interval::point(g) / scale;
                w[[j, k]] = q.mid();
                radius = radius + Interval::point(q.rad());
            }
            w[[j, syms.len() + j]] = radius.hi();
        }
        let net = self.network_after(prev);
        let mut layers = vec![Layer::Dense { w, b }];
        layers.extend(net.layers().iter().cloned());
        let composite = Network::new(width, layers, net.is_float32()).ok()?;
        Some((composite, syms))
    }

    /// The decision over a constrained set: every command the controller may pick at
    /// some point of `star` under some noise, each with the linear constraints on the
    /// star's symbols that hold wherever it is picked, returned as the restricted star.
    ///
    /// Guarantee: if at a point `x(ε)` of the star, with some noise in its bounds, the
    /// network after `prev` picks command `c`, then `c` is listed and `ε` satisfies
    /// every constraint listed with it. Derivation: `c` picked implies
    /// `y_c − y_j ≥ 0` (argmax; `≤ 0` for argmin) for every `j`; the backward pass gives
    /// `y_j − y_c ≥ λ·z + d` over the composite box, so `λ·z + d ≤ 0` for the point's `z`
    /// (its symbols and noise inputs). The noise inputs become the symbols
    /// `noise_base + j` (observation j), which no component uses: they are existentially
    /// quantified, jointly for all constraints of the command, and the caller must keep
    /// them apart from every other symbol. Commands whose constraints provably leave the
    /// star empty are dropped. `slope_steps` optimisation steps of the ReLU lower
    /// slopes per open score difference (0: the fixed rule) tighten the constraints.
    pub fn decide_on_star(&self, prev: usize, star: &Star, method: BoundsMethod, noise_base: usize, slope_steps: u32) -> StarDecision {
        let spec = &self.spec;
        let obs: Vec<Affine> = spec.observations.iter().map(|o| star.set.eval_affine(&o.expr)).collect();
        let all = |cands: Vec<usize>| StarDecision { parts: cands.into_iter().map(|c| (c, star.clone())).collect(), sensitivity: Vec::new() };
        let Some((composite, syms)) = self.composite(prev, &obs) else {
            let boxes: Vec<Interval> = obs.iter().zip(&spec.observations).map(|(f, o)| f.range() + o.noise).collect();
            return all(possible_commands(&self.bound_outputs(prev, &self.network_input(&boxes), method), spec.decision));
        };
        // The composite's input box: each symbol's range under the constraints.
        let Some(ranges) = star.symbol_ranges() else { return StarDecision { parts: Vec::new(), sensitivity: Vec::new() } };
        let mut unit = vec![Interval::new(-1.0, 1.0); composite.input_dim()];
        for (s, r) in ranges {
            if let Ok(k) = syms.binary_search(&s) {
                unit[k] = r;
            } else if s >= noise_base && s < noise_base + obs.len() {
                // A piece may restrict this decision's noise (see the slicing in reach).
                unit[syms.len() + (s - noise_base)] = r;
            }
        }
        // Cheap first: interval bounds over the box of the symbols; then the method's
        // bounds over that box. Whatever they leave open is decided below by linear
        // programs over the star itself.
        let ib = net::output_bounds(&composite, &unit, BoundsMethod::Interval);
        if possible_commands(&ib, spec.decision).len() <= 1 {
            return all(possible_commands(&ib, spec.decision));
        }
        let box_bounds = if method == BoundsMethod::Interval { ib } else { net::output_bounds(&composite, &unit, method) };
        let cands = possible_commands(&box_bounds, spec.decision);
        if cands.len() <= 1 {
            return all(cands);
        }
        // Rows y_j − y_c (argmax) or y_c − y_j (argmin) for the pairs the box leaves open.
        let m = composite.output_dim();
        let mut pairs: Vec<(usize, usize)> = Vec::new();
        for &c in &cands {
            for j in 0..m {
                if j == c {
                    continue;
                }
                let d = box_bounds.diff[c][j]; // encloses y_c − y_j
                let settled = match spec.decision {
                    Decision::Argmax => d.lo() >= 0.0,
                    Decision::Argmin => d.hi() <= 0.0,
                };
                if !settled {
                    pairs.push((c, j));
                }
            }
        }
        let mut obj = Array2::<f64>::zeros((pairs.len(), m));
        for (r, &(c, j)) in pairs.iter().enumerate() {
            let (p, q) = match spec.decision {
                Decision::Argmax => (j, c),
                Decision::Argmin => (c, j),
            };
            obj[[r, p]] = 1.0;
            obj[[r, q]] = -1.0;
        }
        let Some((lam, d)) = net::bounds::linear_lower_bounds_tuned(&composite, &unit, obj, slope_steps, net::slopes::Target::Mean) else {
            return all(cands);
        };
        let n_sym = syms.len();
        // How much each symbol moves the open score differences over its range.
        let sensitivity: Vec<(usize, f64)> = (0..composite.input_dim())
            .map(|k| {
                let sym = if k < n_sym { syms[k] } else { noise_base + (k - n_sym) };
                (sym, (0..pairs.len()).map(|r| lam[[r, k]].abs()).sum::<f64>() * unit[k].width())
            })
            .collect();
        let mut out = Vec::new();
        for &c in &cands {
            let mut cons = Vec::new();
            for (r, &(cc, _)) in pairs.iter().enumerate() {
                if cc != c {
                    continue;
                }
                // The noise inputs become symbols of their own (one per observation,
                // numbered from `noise_base`), shared by all constraints of this
                // decision: one noise value must make c win against every j at once.
                let terms: Vec<(usize, f64)> = (0..composite.input_dim())
                    .filter(|&k| lam[[r, k]] != 0.0)
                    .map(|k| (if k < n_sym { syms[k] } else { noise_base + (k - n_sym) }, lam[[r, k]]))
                    .collect();
                let rhs = (-Interval::point(d[r])).hi();
                if !rhs.is_finite() {
                    continue;
                }
                cons.push(Halfspace::new(terms, rhs));
            }
            if let Some(part) = star.restricted(cons) {
                out.push((c, part));
            }
        }
        StarDecision { parts: out, sensitivity }
    }

    /// The inputs (plant inputs) applied during a period, given the command decided in
    /// it and the previous one.
    pub fn applied(&self, decided: usize, previous: usize) -> usize {
        if self.spec.latency == 0 {
            decided
        } else {
            previous
        }
    }

    /// f64 observation → network input → decision (simulation; not a bound).
    pub fn decide_f64(&self, prev: usize, x: &[f64], noise: &[f64]) -> usize {
        let input: Vec<f64> = self
            .spec
            .observations
            .iter()
            .enumerate()
            .map(|(j, o)| (o.expr.eval_f64(x) + noise[j] - self.spec.offset[j]) / self.spec.scale[j])
            .collect();
        let y = self.network_after(prev).eval(&input);
        pick(&y, self.spec.decision)
    }
}

/// What [`ClosedLoop::decide_on_star`] found.
pub struct StarDecision {
    /// Each command that may be picked, with the part of the star where it may be.
    pub parts: Vec<(usize, Star)>,
    /// For an open decision: each symbol the observations use, and each noise symbol,
    /// with how much it moves the open score differences over its range (the sum of the
    /// linear bounds' coefficients times the symbol's width). Empty when the decision
    /// is settled.
    pub sensitivity: Vec<(usize, f64)>,
}

/// argmax / argmin with ties to the lowest index (as numpy's argmax does).
pub fn pick(y: &[f64], decision: Decision) -> usize {
    let mut best = 0;
    for i in 1..y.len() {
        let better = match decision {
            Decision::Argmax => y[i] > y[best],
            Decision::Argmin => y[i] < y[best],
        };
        if better {
            best = i;
        }
    }
    best
}

/// Commands that the controller may pick given sound bounds on its outputs: command
/// j is ruled out only when some other output provably beats it, ties counted for
/// the lower index. Undefined (NaN) bounds rule nothing out.
pub fn possible_commands(b: &OutputBounds, decision: Decision) -> Vec<usize> {
    let n = b.outputs.len();
    (0..n)
        .filter(|&j| {
            !(0..n).any(|i| {
                if i == j {
                    return false;
                }
                // d encloses y_i − y_j
                let d = b.diff[i][j];
                match (decision, i < j) {
                    (Decision::Argmax, true) => d.lo() >= 0.0, // y_i ≥ y_j: tie goes to i
                    (Decision::Argmax, false) => d.lo() > 0.0,
                    (Decision::Argmin, true) => d.hi() <= 0.0,
                    (Decision::Argmin, false) => d.hi() < 0.0,
                }
            })
        })
        .collect()
}

#[cfg(test)]
mod tests {
    use super::*;

    fn bounds(diff01: Interval) -> OutputBounds {
        OutputBounds {
            outputs: vec![Interval::new(0.0, 1.0), Interval::new(0.0, 1.0)],
            diff: vec![vec![Interval::ZERO, diff01], vec![-diff01, Interval::ZERO]],
        }
    }

    #[test]
    fn ties_go_to_the_lowest_index() {
        // numpy.argmax([1, 1]) == 0 (numpy documentation: "the indices corresponding to
        // the first occurrence are returned").
        assert_eq!(pick(&[1.0, 1.0], Decision::Argmax), 0);
        assert_eq!(pick(&[1.0, 3.0, 3.0], Decision::Argmax), 1);
        assert_eq!(pick(&[2.0, 1.0, 1.0], Decision::Argmin), 1);
        // y0 − y1 ∈ [0, 1]: y0 ≥ y1 always, and ties go to 0, so only 0 is possible.
        assert_eq!(possible_commands(&bounds(Interval::new(0.0, 1.0)), Decision::Argmax), vec![0]);
        // y0 − y1 ∈ [−1, 0]: y1 ≥ y0, but a tie picks 0: both possible.
        assert_eq!(possible_commands(&bounds(Interval::new(-1.0, 0.0)), Decision::Argmax), vec![0, 1]);
        // y0 − y1 ∈ [−1, −0.5]: only 1.
        assert_eq!(possible_commands(&bounds(Interval::new(-1.0, -0.5)), Decision::Argmax), vec![1]);
        assert_eq!(possible_commands(&bounds(Interval::UNDEFINED), Decision::Argmax), vec![0, 1]);
        // argmin: y0 − y1 ∈ [−1, 0] ⇒ y0 ≤ y1, tie to 0: only 0.
        assert_eq!(possible_commands(&bounds(Interval::new(-1.0, 0.0)), Decision::Argmin), vec![0]);
    }
}
