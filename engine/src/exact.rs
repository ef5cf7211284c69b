//! The exact method for linear loops: the closed loop over the horizon as a
//! mixed-integer linear program (MILP), solved to decide a cell.
//!
//! When the plant, the observations and the unsafe constraints are affine
//! ([`super::linear`]) and the networks are dense layers with ReLU, every trajectory
//! from the cell is a point of a MILP:
//! * per sample `s` (each control period cut into `m` samples, `m ≥ engine.exact_samples`
//!   and large enough for the discretisation) a state vector `x_s`, with
//!   `x_{s+1} = Φ x_s + Γ (B u_k + E w_mid + c) + d_s + e_s`; `Φ`, `Γ` are interval
//!   enclosures ([`super::linear::discretise`]), the program uses their midpoints, the
//!   slack `e_s` is bounded by the enclosures' radii times sound bounds on `x_s` and the
//!   inputs, and `d_s ∈ [−ρ, ρ]` is the effect of the disturbance's deviation from its
//!   midpoint `w_mid`, which may vary at any time (README, closed-loop semantics);
//! * per period `k`: the disturbance `w_k` and the observation noise `ν_k` (variables in
//!   their ranges), the network input `(H x_{km} + h + ν_k − offset) / scale`, every
//!   network of the bank that may decide, each ReLU with the usual big-M constraints
//!   whose constants are sound interval bounds of its pre-activation (neurons whose
//!   bounds fix their sign need none), and one binary per command for the decision;
//! * the decision: with command `c` chosen and the previous command's network `n`
//!   (a sum of the previous period's binaries), `y_c ≥ y_j` for argmax (`≤` for argmin)
//!   for every other `j`, enforced only when both hold (big-M from the sound bounds of
//!   `y_c − y_j`); the inputs applied in a period are those of the decided command
//!   (latency 0) or of the previous one (latency 1);
//! * the unsafe set: one binary per (sample step, region) that may be met (zonotope
//!   bounds with the motion within the step enclosed), exactly one of them chosen. Each
//!   inequality `g(x) ≤ 0` of that region must hold at one end of the step (a binary per
//!   inequality picks which) up to the interpolation error `(h²/8)·max|g''|` of the
//!   smooth part of the motion (`g'' = a·ÿ`, `ÿ = A ẏ` with the input and `w_mid` held)
//!   plus `2·Σ|a_j|ρ_j` for the disturbance's deviation: a trajectory that enters the
//!   region anywhere within the step is a point of the program too.
//!
//! **Robustness.** "Safe" rests on the solver's claim that this program is infeasible,
//! made in floating point. To keep rounding from flipping that claim, the program is a
//! superset of the real one widened by a stated margin: noise, disturbance and state
//! bounds, slacks, unsafe inequalities and decision inequalities each by
//! [`MARGIN`]·(1 + magnitude), and ties count for every command. A verdict that rests on
//! the solver says so (`stats.method = "exact"`, and its detail).
//!
//! **Counterexamples.** A point of the widened program may be spurious (it may need the
//! margin, or a disturbance that varies within a period). So the point reported comes
//! from a second, tightened program (real noise ranges, disturbances held per period as
//! a counterexample records them, decisions won by a margin, the sample maximally deep
//! inside the region), and it must pass the falsifier's sound re-check
//! ([`super::falsify::recheck`]) before "unsafe" is reported. Otherwise: inconclusive.
//!
//! Sizes: the program holds one period more than the last one whose samples may meet
//! the unsafe set (by zonotope bounds); a cell whose program has more than
//! [`MAX_BINARIES`] binaries is inconclusive.

use super::affine::Affine;
use super::closed_loop::ClosedLoop;
use super::falsify::{self, Candidate};
use super::interval::Interval;
use super::linear::{self, IMat, LinearLoop};
use super::milp::{Answer, Model};
use super::net::Layer;
use super::spec::Decision;
use super::verdict::Counterexample;
use std::time::{Duration, Instant};

/// Relative margin by which the program for "safe" is widened (see the module doc).
pub const MARGIN: f64 = 1e-7;
/// Most binaries of one program.
pub const MAX_BINARIES: usize = 3000;
/// Margin by which the tightened program's decisions must be won, relative to the
/// outputs' magnitude (so that the re-check's sound bounds at the point agree).
const DECISION_MARGIN: f64 = 1e-6;

/// The loop in the form the exact method needs, prepared once per spec.
pub struct Prepared {
    pub lin: LinearLoop,
    /// Samples per period.
    pub m: u32,
    /// `Φ(h)`, and `Γ(h)·B`, `Γ(h)·E`, `Γ(h)·c` for the sample step `h = T/m`.
    phi: IMat,
    gb: IMat,
    ge: IMat,
    gc: Vec<Interval>,
    /// The same for every `τ ∈ [0, h]`, with `Φ(τ) − I`: the motion within a sample step.
    phi_r: IMat,
    gc_r: Vec<Interval>,
    /// Disturbances vary within a step (any value at any time): `w = w_mid + w̃`. The
    /// midpoint's effect over a step, `Γ(h) E w_mid` and `Γ(τ) E w_mid` for τ ∈ [0, h]:
    gw: Vec<Interval>,
    gw_r: Vec<Interval>,
    /// and a bound `ρ_i ≥ |∫_0^τ (e^{A(τ−σ)} E w̃(σ))_i dσ|` for every τ ≤ h and every
    /// `w̃` within the ranges: `h · Σ_l max|(e^{Aσ}E)_il| · rad(w_l)`.
    rho: Vec<f64>,
    /// The disturbance midpoints.
    w_mid: Vec<f64>,
    gb_r: IMat,
}

/// Why the exact method does not apply to a loop (one message naming the part).
pub fn prepare(cl: &ClosedLoop) -> Result<Prepared, String> {
    let spec = &cl.spec;
    let lin = linear::linear_loop(spec).map_err(|e| e.to_string())?;
    for (i, net) in cl.nets.iter().enumerate() {
        if net.layers().iter().any(|l| !matches!(l, Layer::Dense { .. } | Layer::Relu)) {
            return Err(format!(
                "controller.networks[{i}]: the exact method needs dense and ReLU layers only (this network has sigmoid or tanh)"
            ));
        }
    }
    let a = &lin.plant.a;
    let m = linear::substeps_for(a, spec.period, spec.engine.exact_samples);
    if m > 4096 {
        return Err(format!("dynamics: too fast for the exact method's sampling ({m} samples per period needed)"));
    }
    let h = Interval::point(spec.period) / Interval::point(m as f64);
    let fail = || "dynamics: the matrix exponential could not be enclosed".to_string();
    let (phi, gamma) = linear::discretise(a, h).ok_or_else(fail)?;
    let (phi_full, gamma_r) = linear::discretise(a, Interval::new(0.0, h.hi())).ok_or_else(fail)?;
    let n = a.len();
    let phi_r: IMat = (0..n)
        .map(|i| (0..n).map(|j| phi_full[i][j] - if i == j { Interval::ONE } else { Interval::ZERO }).collect())
        .collect();
    let col = |v: &[Interval]| -> IMat { v.iter().map(|x| vec![*x]).collect() };
    let w_mid: Vec<f64> = spec.disturbance_ranges.iter().map(|r| r.mid()).collect();
    let w_rad: Vec<f64> = spec
        .disturbance_ranges
        .iter()
        .zip(&w_mid)
        .map(|(r, &m)| (Interval::point(r.hi()) - Interval::point(m)).hi().max((Interval::point(m) - Interval::point(r.lo())).hi()))
        .collect();
    let ew: Vec<Interval> = lin
        .plant
        .e
        .iter()
        .map(|row| row.iter().zip(&w_mid).fold(Interval::ZERO, |t, (e, &w)| t + *e * Interval::point(w)))
        .collect();
    let pe_r = linear::mat_mul(&phi_full, &lin.plant.e);
    let rho: Vec<f64> = pe_r
        .iter()
        .map(|row| {
            let sum = row.iter().zip(&w_rad).fold(Interval::ZERO, |t, (pe, &r)| t + Interval::point(pe.mag()) * Interval::point(r));
            (Interval::point(h.hi()) * sum).hi()
        })
        .collect();
    let gw = linear::mat_mul(&gamma, &col(&ew)).into_iter().map(|r| r[0]).collect();
    let gw_r = linear::mat_mul(&gamma_r, &col(&ew)).into_iter().map(|r| r[0]).collect();
    let gc = linear::mat_mul(&gamma, &col(&lin.plant.c)).into_iter().map(|r| r[0]).collect();
    let gc_r = linear::mat_mul(&gamma_r, &col(&lin.plant.c)).into_iter().map(|r| r[0]).collect();
    Ok(Prepared {
        m,
        gb: linear::mat_mul(&gamma, &lin.plant.b),
        ge: linear::mat_mul(&gamma, &lin.plant.e),
        gb_r: linear::mat_mul(&gamma_r, &lin.plant.b),
        gw,
        gw_r,
        rho,
        w_mid,
        gc,
        gc_r,
        phi,
        phi_r,
        lin,
    })
}

/// What the exact method decided for a cell.
#[derive(Debug)]
pub enum Outcome {
    /// The widened program is infeasible for every initial command (a solver's claim),
    /// or no sample may meet the unsafe set at all (zonotope bounds; no solver needed).
    Safe { solver_needed: bool },
    /// A re-checked counterexample.
    Unsafe(Box<Counterexample>),
    /// Neither; the text says why.
    Inconclusive(String),
}

/// The outcome with what it cost.
#[derive(Debug)]
pub struct Report {
    pub outcome: Outcome,
    /// Programs solved, their largest number of binaries, and the solver's time.
    pub programs: u32,
    pub max_binaries: usize,
    pub solver_ms: f64,
}

/// Widen an interval by the margin, outward.
fn widen(i: Interval) -> Interval {
    let m = (Interval::point(MARGIN) * (Interval::ONE + Interval::point(i.mag()))).hi();
    i + Interval::new(-m, m)
}

/// The margin for a quantity of magnitude `mag`, rounded up.
fn margin_of(mag: f64) -> f64 {
    (Interval::point(MARGIN) * (Interval::ONE + Interval::point(mag))).hi()
}

/// `Σ terms + c` over program variables, with exact f64 coefficients.
#[derive(Clone, Debug, Default)]
struct Lin {
    terms: Vec<(usize, f64)>,
    c: f64,
}

impl Lin {
    fn var(v: usize) -> Lin {
        Lin { terms: vec![(v, 1.0)], c: 0.0 }
    }
    fn constant(c: f64) -> Lin {
        Lin { terms: Vec::new(), c }
    }
    /// A sound enclosure over the variables' bounds (the constant is exact).
    fn bound(&self, model: &Model) -> Interval {
        self.terms.iter().fold(Interval::point(self.c), |s, &(v, a)| {
            s + Interval::point(a) * Interval::new(model.vars[v].lo, model.vars[v].hi)
        })
    }
    fn sub(&self, o: &Lin) -> Lin {
        let mut terms = self.terms.clone();
        terms.extend(o.terms.iter().map(|&(v, a)| (v, -a)));
        Lin { terms, c: self.c - o.c }
    }
    /// Rows need exact constants: the constant moves to the bounds, rounded outward.
    fn row(&self, model: &mut Model, lo: f64, hi: f64) {
        let (lo, hi) = ((Interval::point(lo) - Interval::point(self.c)).lo(), (Interval::point(hi) - Interval::point(self.c)).hi());
        let lo = if lo.is_nan() { f64::NEG_INFINITY } else { lo };
        let hi = if hi.is_nan() { f64::INFINITY } else { hi };
        model.row(self.terms.clone(), lo, hi);
    }
}

/// Sound zonotope bounds of the states at every sample, for all commands at once.
struct Bounds {
    /// `boxes[s]`: box of `x_s`.
    boxes: Vec<Vec<Interval>>,
    /// `forms[s]`: the affine forms of `x_s` (symbols: the cell, then per period).
    forms: Vec<Vec<Affine>>,
    /// `motion[s]`: box of `x(t) − x_s` for `t` in sample step `s`.
    motion: Vec<Vec<Interval>>,
    /// `accel[s]`: box of `ẍ = A ẋ` over step `s` (inputs and disturbances held).
    accel: Vec<Vec<Interval>>,
}

fn hull_over_commands(cl: &ClosedLoop, gb: &IMat) -> Vec<Interval> {
    let n = gb.len();
    (0..n)
        .map(|i| {
            cl.spec
                .commands
                .iter()
                .map(|c| c.inputs.iter().enumerate().fold(Interval::ZERO, |s, (l, &u)| s + gb[i][l] * Interval::point(u)))
                .reduce(|a, b| a.hull(&b))
                .unwrap_or(Interval::ZERO)
        })
        .collect()
}

/// An affine form for a value known to lie in `iv`, on a fresh symbol.
fn fresh(iv: Interval, next: &mut usize) -> Affine {
    let mid = iv.mid();
    let rad = (Interval::point(iv.hi()) - Interval::point(mid)).hi().max((Interval::point(mid) - Interval::point(iv.lo())).hi());
    *next += 1;
    Affine::symbol(mid, *next - 1, rad)
}

fn reach_bounds(cl: &ClosedLoop, p: &Prepared, cell: &[Interval], samples: usize) -> Option<Bounds> {
    let n = cell.len();
    let m = p.m as usize;
    let mut next = n;
    let mut x: Vec<Affine> = cell.iter().enumerate().map(|(i, iv)| fresh_at(*iv, i)).collect();
    let gbu_hull = hull_over_commands(cl, &p.gb);
    let gbu_hull_r = hull_over_commands(cl, &p.gb_r);
    let (mut forms, mut boxes, mut motion, mut accel) = (Vec::new(), Vec::new(), Vec::new(), Vec::new());
    let bu_hull = hull_over_commands(cl, &p.lin.plant.b);
    let a_mat = &p.lin.plant.a;
    let mut u_forms: Vec<Affine> = Vec::new();
    for s in 0..=samples {
        let bx: Vec<Interval> = x.iter().map(|f| f.range()).collect();
        if bx.iter().any(|b| b.is_undefined() || !b.is_bounded()) {
            return None;
        }
        forms.push(x.clone());
        boxes.push(bx.clone());
        if s == samples {
            break;
        }
        if s % m == 0 {
            u_forms = gbu_hull.iter().map(|iv| fresh(*iv, &mut next)).collect();
        }
        // Motion within the step: (Φ(τ) − I) x_s + Γ(τ)(B u + E w_mid + c) + [−ρ, ρ],
        // τ ∈ [0, h].
        let mv: Vec<Interval> = (0..n)
            .map(|i| {
                let mut t = gbu_hull_r[i] + p.gc_r[i] + p.gw_r[i] + Interval::new(-p.rho[i], p.rho[i]);
                for j in 0..n {
                    t = t + p.phi_r[i][j] * bx[j];
                }
                t
            })
            .collect();
        // The part of the motion driven by the disturbance midpoint, y = x − z with
        // |z| ≤ ρ, is smooth within the step: ẏ = A y + B u + E w_mid + c over the
        // step's box widened by ρ, then ÿ = A ẏ.
        let xdot: Vec<Interval> = (0..n)
            .map(|i| {
                let mut t = bu_hull[i] + p.lin.plant.c[i];
                for j in 0..n {
                    t = t + a_mat[i][j] * (bx[j] + mv[j] + Interval::new(-p.rho[j], p.rho[j]));
                }
                for (l, &w) in p.w_mid.iter().enumerate() {
                    t = t + p.lin.plant.e[i][l] * Interval::point(w);
                }
                t
            })
            .collect();
        accel.push((0..n).map(|i| (0..n).fold(Interval::ZERO, |t, j| t + a_mat[i][j] * xdot[j])).collect());
        motion.push(mv);
        x = (0..n)
            .map(|i| {
                let mut f = u_forms[i].add_interval(p.gc[i] + p.gw[i]);
                for j in 0..n {
                    f = f.add(&x[j].mul_interval(p.phi[i][j]));
                }
                // The disturbance's deviation from its midpoint over this step.
                f.add(&fresh(Interval::new(-p.rho[i], p.rho[i]), &mut next))
            })
            .collect();
    }
    Some(Bounds { boxes, forms, motion, accel })
}

/// A form holding `iv` on symbol `i` (the cell's own symbols).
fn fresh_at(iv: Interval, i: usize) -> Affine {
    let mid = iv.mid();
    let rad = (Interval::point(iv.hi()) - Interval::point(mid)).hi().max((Interval::point(mid) - Interval::point(iv.lo())).hi());
    Affine::symbol(mid, i, rad)
}

/// Whether region `r` may hold some state of step `s` (zonotope lower bounds).
fn may_meet(region: &[linear::StateAffine], form: &[Affine], motion: &[Interval]) -> bool {
    region.iter().all(|g| {
        let mut f = Affine::from_interval(g.constant);
        let mut extra = Interval::ZERO;
        for j in 0..form.len() {
            f = f.add(&form[j].mul_interval(g.coeffs[j]));
            extra = extra + g.coeffs[j] * motion[j];
        }
        let lo = (f.range() + extra).lo();
        !(lo > 0.0)
    })
}

/// Which program: the widened one whose infeasibility proves "safe", or the tightened
/// one whose points are candidate counterexamples.
#[derive(Clone, Copy, PartialEq, Eq, Debug)]
enum Mode {
    Widened,
    Tightened,
}

/// Handles to read a candidate out of a solution.
struct Handles {
    x0: Vec<usize>,
    noise: Vec<Vec<usize>>,
    dist: Vec<Vec<usize>>,
    decided: Vec<Vec<usize>>,
}

/// The program for initial command `c0`, over the periods `0..=last_period`, with the
/// unsafe (sample, region) pairs `pairs`.
fn encode(cl: &ClosedLoop, p: &Prepared, cell: &[Interval], c0: usize, b: &Bounds, pairs: &[(usize, usize)], mode: Mode) -> (Model, Handles) {
    let spec = &cl.spec;
    let n = cell.len();
    let m = p.m as usize;
    let n_cmd = spec.commands.len();
    // Steps 0..=last_step, states at their ends.
    let last_step = pairs.iter().map(|q| q.0).max().unwrap_or(0);
    let last_period = last_step / m;
    let mut model = Model::default();
    let widened = mode == Mode::Widened;
    let bound_of = |iv: Interval| if widened { widen(iv) } else { iv };
    // States at samples 0..=last_sample.
    let mut xs: Vec<Vec<usize>> = Vec::new();
    for (s, bx) in b.boxes.iter().take(last_step + 2).enumerate() {
        let v = (0..n)
            .map(|i| {
                let iv = if s == 0 { cell[i] } else { bound_of(bx[i]) };
                model.var(iv.lo(), iv.hi())
            })
            .collect();
        xs.push(v);
    }
    let mut noise = Vec::new();
    let mut dist = Vec::new();
    let mut decided: Vec<Vec<usize>> = Vec::new();
    for k in 0..=last_period {
        // Decision of period k: one binary per command, exactly one chosen.
        let d: Vec<usize> = (0..n_cmd).map(|_| model.binary()).collect();
        model.row(d.iter().map(|&v| (v, 1.0)).collect(), 1.0, 1.0);
        let nu: Vec<usize> = spec
            .observations
            .iter()
            .map(|o| {
                let iv = bound_of(o.noise);
                model.var(iv.lo(), iv.hi())
            })
            .collect();
        let w: Vec<usize> = spec
            .disturbance_ranges
            .iter()
            .map(|r| {
                let iv = bound_of(*r);
                model.var(iv.lo(), iv.hi())
            })
            .collect();
        // Network input j = (Σ H_ji x_i + h_j + ν_j − offset_j) / scale_j, with interval
        // coefficients: midpoints in the row, the rest in a bounded slack.
        let s0 = k * m;
        let mut inputs = Vec::new();
        for (j, o) in p.lin.observations.iter().enumerate() {
            let scale = Interval::point(spec.scale[j]);
            let mut lin = Lin::default();
            let mut slack = Interval::ZERO;
            let mut range = Interval::ZERO;
            for i in 0..n {
                let a = o.coeffs[i] / scale;
                if a.lo() == 0.0 && a.hi() == 0.0 {
                    continue;
                }
                lin.terms.push((xs[s0][i], a.mid()));
                let xb = Interval::new(model.vars[xs[s0][i]].lo, model.vars[xs[s0][i]].hi);
                slack = slack + (a - Interval::point(a.mid())) * xb;
                range = range + a * xb;
            }
            let an = Interval::ONE / scale;
            lin.terms.push((nu[j], an.mid()));
            let nb = Interval::new(model.vars[nu[j]].lo, model.vars[nu[j]].hi);
            slack = slack + (an - Interval::point(an.mid())) * nb;
            range = range + an * nb;
            let c = (o.constant - Interval::point(spec.offset[j])) / scale;
            lin.c = c.mid();
            slack = slack + (c - Interval::point(c.mid()));
            range = range + c;
            let zb = if widened { widen(range) } else { range };
            let z = model.var(zb.lo(), zb.hi());
            // z − lin − e = 0, e ∈ slack (widened, or 0 in the tightened program).
            let sl = if widened { widen(slack) } else { Interval::ZERO };
            let e = model.var(sl.lo(), sl.hi());
            let mut row = Lin::var(z).sub(&lin);
            row.terms.push((e, -1.0));
            row.row(&mut model, 0.0, 0.0);
            inputs.push(Lin::var(z));
        }
        // The networks that may decide in period k, and the indicator of each.
        let nets_here: Vec<(usize, Lin)> = if k == 0 {
            vec![(spec.network_of_command[c0], Lin::constant(1.0))]
        } else {
            let mut ns: Vec<usize> = spec.network_of_command.clone();
            ns.sort_unstable();
            ns.dedup();
            ns.into_iter()
                .map(|net| {
                    let terms: Vec<(usize, f64)> =
                        (0..n_cmd).filter(|&c| spec.network_of_command[c] == net).map(|c| (decided[k - 1][c], 1.0)).collect();
                    (net, Lin { terms, c: 0.0 })
                })
                .collect()
        };
        for (net, active) in nets_here {
            let y = encode_network(&mut model, cl, net, &inputs, widened);
            for c in 0..n_cmd {
                for j in 0..n_cmd {
                    if j == c {
                        continue;
                    }
                    // argmax: y_c − y_j ≥ −tol; argmin: y_j − y_c ≥ −tol (tightened: ≥ +margin),
                    // enforced when d_c = 1 and the network is active:
                    //   diff + M (2 − d_c − active) ≥ −tol.
                    let diff = match spec.decision {
                        Decision::Argmax => y[c].sub(&y[j]),
                        Decision::Argmin => y[j].sub(&y[c]),
                    };
                    let db = diff.bound(&model);
                    let tol = margin_of(db.mag()) * if widened { 1.0 } else { -DECISION_MARGIN / MARGIN };
                    // M ≥ −tol − min(diff) makes the row void unless both hold.
                    let big = (-Interval::point(tol) - Interval::point(db.lo())).hi().max(0.0) * 1.01 + 1e-9;
                    if !big.is_finite() {
                        continue;
                    }
                    let mut row = diff.clone();
                    row.terms.push((d[c], -big));
                    let lo = if active.terms.is_empty() {
                        // The network is the only one (period 0): diff − M d_c ≥ −tol − M.
                        -Interval::point(tol) - Interval::point(big)
                    } else {
                        // diff − M d_c − M active ≥ −tol − 2M.
                        for &(v, a) in &active.terms {
                            row.terms.push((v, -big * a));
                        }
                        -Interval::point(tol) - Interval::point(2.0 * big)
                    };
                    row.row(&mut model, lo.lo(), f64::INFINITY);
                }
            }
        }
        noise.push(nu);
        dist.push(w);
        decided.push(d);
    }
    // Dynamics between samples.
    for s in 0..=last_step {
        let k = s / m;
        let applied: Option<&Vec<usize>> = if spec.latency == 0 { Some(&decided[k]) } else if k == 0 { None } else { Some(&decided[k - 1]) };
        for i in 0..n {
            // x_{s+1,i} = Σ Φ_ij x_s,j + Σ_c a_c g_{c,i} + Σ_l ΓE_il w_l + Γc_i + e
            let mut lin = Lin::default();
            let mut slack = Interval::ZERO;
            for j in 0..n {
                let f = p.phi[i][j];
                lin.terms.push((xs[s][j], f.mid()));
                slack = slack + (f - Interval::point(f.mid())) * b.boxes[s][j];
            }
            let g_of = |c: usize| {
                spec.commands[c].inputs.iter().enumerate().fold(Interval::ZERO, |acc, (l, &u)| acc + p.gb[i][l] * Interval::point(u))
            };
            let mut cmd_slack = Interval::ZERO;
            match applied {
                Some(ds) => {
                    for c in 0..n_cmd {
                        let g = g_of(c);
                        lin.terms.push((ds[c], g.mid()));
                        cmd_slack = cmd_slack.hull(&(g - Interval::point(g.mid())));
                    }
                }
                None => {
                    let g = g_of(c0);
                    lin.c = g.mid();
                    cmd_slack = g - Interval::point(g.mid());
                }
            }
            slack = slack + cmd_slack;
            // Widened: the disturbance varies within the step (its midpoint's effect, plus
            // a deviation variable in [−ρ, ρ]). Tightened: held per period (a special
            // case, and what a counterexample records).
            let gc = if widened {
                let dv = widen(Interval::new(-p.rho[i], p.rho[i]));
                let d = model.var(dv.lo(), dv.hi());
                lin.terms.push((d, 1.0));
                p.gc[i] + p.gw[i]
            } else {
                for (l, &wv) in dist[k].iter().enumerate() {
                    let f = p.ge[i][l];
                    lin.terms.push((wv, f.mid()));
                    slack = slack + (f - Interval::point(f.mid())) * spec.disturbance_ranges[l];
                }
                p.gc[i]
            };
            let c_total = Interval::point(lin.c) + gc;
            lin.c = c_total.mid();
            slack = slack + (c_total - Interval::point(c_total.mid()));
            let sl = if widened { widen(slack) } else { Interval::ZERO };
            let e = model.var(sl.lo(), sl.hi());
            let mut row = Lin::var(xs[s + 1][i]).sub(&lin);
            row.terms.push((e, -1.0));
            row.row(&mut model, 0.0, 0.0);
        }
    }
    // The unsafe set: exactly one (step, region) pair, its inequalities enforced.
    let zs: Vec<usize> = pairs.iter().map(|_| model.binary()).collect();
    model.row(zs.iter().map(|&z| (z, 1.0)).collect(), 1.0, 1.0);
    let depth = if mode == Mode::Tightened {
        let t = model.var(0.0, f64::INFINITY);
        model.objective = vec![(t, 1.0)];
        Some(t)
    } else {
        None
    };
    let h = (Interval::point(spec.period) / Interval::point(m as f64)).hi();
    for (&(s, r), &z) in pairs.iter().zip(&zs) {
        for g in &p.lin.unsafe_regions[r] {
            let a: Vec<f64> = g.coeffs.iter().map(|c| c.mid()).collect();
            let lin_at = |t: usize| {
                let mut lin = Lin::default();
                for j in 0..n {
                    if a[j] != 0.0 {
                        lin.terms.push((xs[t][j], a[j]));
                    }
                }
                lin
            };
            if widened {
                // If g(x(τ)) ≤ 0 at some τ of step s, then g at one of the step's ends is
                // at most the interpolation error (h²/8)·max|g''| (g'' = a·ẍ, u and w held):
                // mid(a)·x_end ≤ −g0 + (a − mid a)·(−x) + (h²/8)·|a·ẍ|, over the step's box.
                let hull: Vec<Interval> = (0..n).map(|j| b.boxes[s][j].hull(&b.boxes[s + 1][j])).collect();
                let mut rhs = -g.constant;
                let mut curv = Interval::ZERO;
                for j in 0..n {
                    rhs = rhs - (g.coeffs[j] - Interval::point(a[j])) * hull[j];
                    curv = curv + g.coeffs[j] * b.accel[s][j];
                }
                rhs = rhs + Interval::point(h) * Interval::point(h) / Interval::point(8.0) * Interval::point(curv.mag());
                // The disturbance's deviation, at τ and at the step's end: 2·Σ|a_j|·ρ_j.
                for j in 0..n {
                    rhs = rhs + Interval::point(2.0) * Interval::point(g.coeffs[j].mag()) * Interval::point(p.rho[j]);
                }
                let rhs = (rhs + Interval::point(margin_of(rhs.mag()))).hi();
                // One binary picks the end: a·x_s ≤ rhs + M(1 − z) + M e, and
                // a·x_{s+1} ≤ rhs + M(1 − z) + M(1 − e).
                let e = model.binary();
                for (end, flip) in [(s, false), (s + 1, true)] {
                    let mut lin = lin_at(end);
                    let big = (lin.bound(&model) - Interval::point(rhs)).hi().max(0.0) * 1.01 + 1e-9;
                    lin.terms.push((z, big));
                    lin.terms.push((e, if flip { big } else { -big }));
                    let hi = Interval::point(rhs) + Interval::point(if flip { 2.0 * big } else { big });
                    lin.row(&mut model, f64::NEG_INFINITY, hi.hi());
                }
            } else {
                // At sample s itself, with the coefficients' whole intervals against us, as
                // deep as possible.
                let mut rhs = -g.constant;
                for j in 0..n {
                    rhs = rhs + (g.coeffs[j] - Interval::point(a[j])) * b.boxes[s][j];
                }
                let rhs = rhs.lo();
                let mut lin = lin_at(s);
                let big = (lin.bound(&model) - Interval::point(rhs)).hi().max(0.0) * 1.01 + 1e-9;
                // a·x + M z + depth ≤ rhs + M
                lin.terms.push((z, big));
                if let Some(t) = depth {
                    lin.terms.push((t, 1.0));
                }
                lin.row(&mut model, f64::NEG_INFINITY, (Interval::point(rhs) + Interval::point(big)).hi());
            }
        }
    }
    (model, Handles { x0: xs[0].clone(), noise, dist, decided })
}

/// Dense and ReLU layers on the program's variables; returns the outputs.
fn encode_network(model: &mut Model, cl: &ClosedLoop, net: usize, inputs: &[Lin], widened: bool) -> Vec<Lin> {
    let mut a: Vec<Lin> = inputs.to_vec();
    for layer in cl.nets[net].layers() {
        match layer {
            Layer::Dense { w, b } => {
                a = (0..w.nrows())
                    .map(|r| {
                        let mut out = Lin::constant(0.0);
                        let mut c = Interval::point(b[r]);
                        for (j, x) in a.iter().enumerate() {
                            let wj = w[[r, j]];
                            if wj == 0.0 {
                                continue;
                            }
                            for &(v, k) in &x.terms {
                                out.terms.push((v, wj * k));
                            }
                            c = c + Interval::point(wj) * Interval::point(x.c);
                        }
                        // Products of weights and coefficients are rounded; the exact
                        // method's layers are compositions only when a network has two
                        // dense layers in a row, where this rounding is below the margin.
                        out.c = c.mid();
                        out
                    })
                    .collect();
            }
            Layer::Relu => {
                a = a
                    .iter()
                    .map(|z| {
                        let zb = z.bound(model);
                        let zb = if widened { widen(zb) } else { zb };
                        if zb.hi() <= 0.0 {
                            Lin::constant(0.0)
                        } else if zb.lo() >= 0.0 {
                            z.clone()
                        } else {
                            // y ≥ z, y ≥ 0, y ≤ z − l (1 − q), y ≤ u q.
                            let (l, u) = (zb.lo(), zb.hi());
                            let y = model.var(0.0, u);
                            let q = model.binary();
                            Lin::var(y).sub(z).row(model, 0.0, f64::INFINITY);
                            // y − z − l q ≤ −l
                            let mut r1 = Lin::var(y).sub(z);
                            r1.terms.push((q, -l));
                            r1.row(model, f64::NEG_INFINITY, -l);
                            model.row(vec![(y, 1.0), (q, -u)], f64::NEG_INFINITY, 0.0);
                            Lin::var(y)
                        }
                    })
                    .collect();
            }
            Layer::Sigmoid | Layer::Tanh => unreachable!("prepare() admits dense and ReLU layers only"),
        }
    }
    a
}

/// The widened programs of a cell, one per initial command (empty when the zonotope
/// bounds alone keep every step out of the unsafe set), for benchmarks and solver
/// comparisons. `None` when the bounds are not finite.
pub fn widened_programs(cl: &ClosedLoop, p: &Prepared, cell: &[Interval]) -> Option<Vec<Model>> {
    let samples = cl.spec.horizon as usize * p.m as usize;
    let b = reach_bounds(cl, p, cell, samples)?;
    let pairs = unsafe_pairs(p, &b, samples);
    if pairs.is_empty() {
        return Some(Vec::new());
    }
    Some(cl.spec.initial_commands.iter().map(|&c0| encode(cl, p, cell, c0, &b, &pairs, Mode::Widened).0).collect())
}

/// The (step, region) pairs the zonotope bounds leave possible.
fn unsafe_pairs(p: &Prepared, b: &Bounds, samples: usize) -> Vec<(usize, usize)> {
    let mut pairs = Vec::new();
    for s in 0..samples {
        for (r, region) in p.lin.unsafe_regions.iter().enumerate() {
            if may_meet(region, &b.forms[s], &b.motion[s]) {
                pairs.push((s, r));
            }
        }
    }
    pairs
}

/// Decide a cell by the exact method, giving up at `deadline`.
pub fn decide(cl: &ClosedLoop, p: &Prepared, cell: &[Interval], deadline: Instant) -> Report {
    let spec = &cl.spec;
    let m = p.m as usize;
    let samples = spec.horizon as usize * m;
    let mut report = Report { outcome: Outcome::Inconclusive(String::new()), programs: 0, max_binaries: 0, solver_ms: 0.0 };
    let Some(b) = reach_bounds(cl, p, cell, samples) else {
        report.outcome = Outcome::Inconclusive("the exact method's state bounds are not finite".into());
        return report;
    };
    let pairs = unsafe_pairs(p, &b, samples);
    if pairs.is_empty() {
        report.outcome = Outcome::Safe { solver_needed: false };
        return report;
    }
    for &c0 in &spec.initial_commands {
        let (model, _) = encode(cl, p, cell, c0, &b, &pairs, Mode::Widened);
        report.max_binaries = report.max_binaries.max(model.integers());
        if model.integers() > MAX_BINARIES {
            report.outcome = Outcome::Inconclusive(format!(
                "the exact method's program has {} binaries (more than {MAX_BINARIES})",
                model.integers()
            ));
            return report;
        }
        let left = deadline.saturating_duration_since(Instant::now());
        if left.is_zero() {
            report.outcome = Outcome::Inconclusive("time budget spent before the exact method finished".into());
            return report;
        }
        let t = Instant::now();
        let answer = model.solve(left);
        report.solver_ms += t.elapsed().as_secs_f64() * 1e3;
        report.programs += 1;
        match answer {
            Answer::Infeasible => continue,
            Answer::Unknown(why) => {
                report.outcome = Outcome::Inconclusive(format!("the MILP solver gave no answer: {why}"));
                return report;
            }
            Answer::Point(_) => {
                report.outcome = match counterexample(cl, p, cell, c0, &b, &pairs, deadline, &mut report) {
                    Ok(cx) => Outcome::Unsafe(Box::new(cx)),
                    Err(why) => Outcome::Inconclusive(why),
                };
                return report;
            }
        }
    }
    report.outcome = Outcome::Safe { solver_needed: true };
    report
}

/// Solve the tightened program and re-check its point.
#[allow(clippy::too_many_arguments)]
fn counterexample(
    cl: &ClosedLoop,
    p: &Prepared,
    cell: &[Interval],
    c0: usize,
    b: &Bounds,
    pairs: &[(usize, usize)],
    deadline: Instant,
    report: &mut Report,
) -> Result<Counterexample, String> {
    let spec = &cl.spec;
    let (model, h) = encode(cl, p, cell, c0, b, pairs, Mode::Tightened);
    let left = deadline.saturating_duration_since(Instant::now());
    if left.is_zero() {
        return Err("time budget spent before a candidate counterexample was re-checked".into());
    }
    let t = Instant::now();
    let answer = model.solve(left.min(Duration::from_secs(3600)));
    report.solver_ms += t.elapsed().as_secs_f64() * 1e3;
    report.programs += 1;
    let point = match answer {
        Answer::Point(x) => x,
        Answer::Infeasible => {
            return Err("the widened program is feasible but the tightened one is not: a boundary case the exact method leaves open".into())
        }
        Answer::Unknown(why) => return Err(format!("the MILP solver gave no candidate: {why}")),
    };
    let clamp = |v: f64, iv: Interval| v.clamp(iv.lo(), iv.hi());
    let x0: Vec<f64> = h.x0.iter().zip(cell).map(|(&v, iv)| clamp(point[v], *iv)).collect();
    let noise: Vec<Vec<f64>> =
        h.noise.iter().map(|ks| ks.iter().zip(&spec.observations).map(|(&v, o)| clamp(point[v], o.noise)).collect()).collect();
    let dist: Vec<Vec<f64>> =
        h.dist.iter().map(|ks| ks.iter().zip(&spec.disturbance_ranges).map(|(&v, r)| clamp(point[v], *r)).collect()).collect();
    let commands: Vec<usize> = h
        .decided
        .iter()
        .map(|ds| ds.iter().enumerate().max_by(|a, b| point[*a.1].total_cmp(&point[*b.1])).map(|(c, _)| c).unwrap_or(0))
        .collect();
    let mut cand = Candidate { x0, initial_command: c0, dist, noise, commands, trajectory: Vec::new(), entry_time: 0.0, region: 0 };
    let (trajectory, _, hit) = falsify::replay(cl, &cand);
    cand.trajectory = trajectory;
    if let Some((t, r)) = hit {
        cand.entry_time = t;
        cand.region = r;
    }
    match falsify::recheck(cl, &cand) {
        Some((region, during)) => {
            if hit.is_none() {
                cand.entry_time = during[0];
                cand.region = region;
            }
            Ok(Counterexample { found_by: Some("exact".into()), ..falsify::to_counterexample(cl, &cand, region, during) })
        }
        None => Err("the exact method's candidate counterexample did not pass the sound re-check".into()),
    }
}

#[cfg(test)]
mod tests {
    use super::*;
    use crate::check::check_cell;
    use crate::net::Network;
    use crate::spec::parse_spec;
    use crate::verdict::VerdictKind;
    use ndarray::{arr1, arr2};

    fn tank(last: Layer, unsafe_at: f64) -> ClosedLoop {
        let spec = serde_json::json!({
            "name": "tank",
            "states": [{"name": "h"}],
            "inputs": [{"name": "q"}],
            "dynamics": {"h": "q - 0.5 * h"},
            "controller": {
                "period": 0.5,
                "observations": [{"name": "level", "expr": "h", "noise": [-0.01, 0.01]}],
                "networks": ["tank.onnx"],
                "selection": {"mode": "single"},
                "decision": "argmax",
                "commands": [{"name": "off", "set": {"q": 0.0}}, {"name": "on", "set": {"q": 1.0}}],
                "initial_command": "off"
            },
            "unsafe": [{"all": [format!("h >= {unsafe_at}")]}],
            "horizon_periods": 4,
            "envelope": {"h": [0.0, 1.0]},
            "refinement": {"max_depth": 4, "split": ["h"]},
            "engine": {"method": "exact"}
        });
        let spec = parse_spec(&spec.to_string()).unwrap();
        // Outputs (off, on) = (h, 1 − h) after the last layer: "on" below half full.
        let layers = vec![Layer::Dense { w: arr2(&[[1.0], [-1.0]]), b: arr1(&[0.0, 1.0]) }, last];
        ClosedLoop::new(spec, vec![Network::new(1, layers, false).unwrap()]).unwrap()
    }

    #[test]
    fn networks_with_smooth_activations_are_refused_by_name() {
        let cl = tank(Layer::Tanh, 3.0);
        let err = prepare(&cl).err().expect("tanh is not piecewise linear");
        assert!(err.starts_with("controller.networks[0]:"), "{err}");
        let v = check_cell(&cl, &cl.envelope());
        assert_eq!(v.verdict, VerdictKind::Inconclusive);
        assert!(v.detail.unwrap().contains("does not apply"));
    }

    #[test]
    fn the_tank_is_decided_with_and_without_the_solver() {
        // h' = q − h/2 with q ≤ 1 keeps h ≤ max(h0, 2) < 3 (by hand), whatever the network:
        // the bounds over all commands prove it.
        let cl = tank(Layer::Relu, 3.0);
        let v = check_cell(&cl, &cl.envelope());
        assert_eq!(v.verdict, VerdictKind::Safe, "{:?}", v.detail);
        // h ≥ 1.5: pumping all along from h = 1 would reach 2 − e^{−1} ≈ 1.63 after 2 s,
        // but the network pumps only below about half full (outputs h and 1 − h, noise
        // 0.01), and from h ≤ 1 with q = 1 over one period h stays below 1.5 (by hand:
        // 2 − 1.5·e^{−0.25} ≈ 0.83 from h = 0.5): only the solver proves it.
        let cl = tank(Layer::Relu, 1.5);
        let v = check_cell(&cl, &cl.envelope());
        assert_eq!(v.verdict, VerdictKind::Safe, "{:?}", v.detail);
        assert_eq!(v.stats.method.as_deref(), Some("exact"));
        assert!(v.stats.milp_programs >= 1 && v.detail.unwrap().contains("rests on the solver"));
        // h ≥ 0.9 holds at the start for part of the cell: a re-checked counterexample.
        let cl = tank(Layer::Relu, 0.9);
        let v = check_cell(&cl, &cl.envelope());
        assert_eq!(v.verdict, VerdictKind::Unsafe, "{:?}", v.detail);
        assert_eq!(v.counterexample.unwrap().found_by.as_deref(), Some("exact"));
    }
}
