//! Sound bounds on a network's outputs, and on the differences of its outputs, over a
//! box of inputs.
//!
//! # Methods
//!
//! * [`BoundsMethod::Interval`]: interval bound propagation — every layer is evaluated
//!   in outward-rounded interval arithmetic.
//! * [`BoundsMethod::Symbolic`]: backward linear bound propagation. To bound `c·v` for
//!   the value `v` after some layer, a linear form `Λ·v_k + d` that is a valid lower
//!   bound is pushed backwards through the layers to the input box, where it is
//!   evaluated in interval arithmetic. Affine layers are passed exactly (up to the
//!   rounding accounted for below); a ReLU neuron with pre-activation bounds `l < 0 < u`
//!   is replaced by the standard linear relaxations of ReLU from the published
//!   literature on linear bound propagation (common practice): the triangle upper bound
//!   `relu(z) ≤ u·(z − l)/(u − l)` where the coefficient is negative, and the lower
//!   bound `relu(z) ≥ α·z` with `α = 1` if `u ≥ −l`, else `α = 0` (the adaptive choice)
//!   where it is positive. Pre-activation bounds of every ReLU layer are computed by the
//!   same backward pass (only for neurons whose interval bounds straddle 0) and
//!   intersected with their interval bounds. Output differences `y_i − y_j` are bounded
//!   directly with the objective `e_i − e_j`, which is tighter than subtracting output
//!   bounds. Sigmoid and tanh layers are not relaxed: the backward pass stops at them
//!   and uses their interval bounds (sound, looser). The result is intersected with
//!   the interval result, so it is never wider.
//! * [`BoundsMethod::Portfolio`]: interval first; symbolic only when the interval
//!   bounds leave the order of some pair of outputs undecided (a difference holds 0).
//!
//! # Soundness with floating point
//!
//! The weights are exact reals (f64 numbers); the guarantee is about the real-arithmetic
//! network. Every f64 operation that affects a bound is accounted for:
//!
//! 1. *Affine layer* `z = W·a + b`. The backward pass needs `Λ·W`; it computes
//!    `M = fl(Λ·W)` with an ordinary matrix product. For any order of summation, with
//!    or without FMA, `|M − Λ·W| ≤ γ_n·|Λ|·|W| + n·η` entry-wise, where `n` is the
//!    inner dimension, `γ_n = n·u/(1 − n·u)`, `u = 2⁻⁵³` (the standard error bound of
//!    floating-point dot products) and `η = 2⁻¹⁰⁷⁴` covers underflowing products.
//!    Hence for every `a` with `|a| ≤ amax` (known from the bounds of `a`):
//!    `Λ·W·a ≥ M·a − γ_n·|Λ|·(|W|·amax) − n·η·Σ amax`, and the error term is computed
//!    rounding upward and subtracted from the constant. Likewise `Λ·b ≥ fl(Λ·b) −
//!    γ_n·|Λ|·|b| − n·η`; both allowances are one product `|Λ|·(|W|·amax + |b|)`
//!    computed with upward-rounded error bounds.
//! 2. *ReLU*. For ANY float coefficient `λ'` we choose, the function
//!    `g(z) = λ·relu(z) − λ'·z` is piecewise linear with its only kink at 0, so its
//!    minimum over `[l, u]` is attained at `l`, `u` or `0`. Evaluating `g` at those
//!    points in interval arithmetic and taking the lowest lower end gives an offset
//!    `d` with `λ·relu(z) ≥ λ'·z + d` on `[l, u]` — rigorous whatever rounding went
//!    into the choice of `λ'` (the relaxation only *chooses* `λ'`).
//! 3. *Concretisation*: over a box `m ± ρ`, `Λ·x ≥ fl(Λ·m) − |Λ|·ρ − γ_n·|Λ|·|m| − n·η`
//!    (or, when the box is unbounded, term by term with products rounded down).
//!    All additions into the constant are rounded down.
//!
//! Interval propagation through a dense layer uses the same midpoint–radius form with
//! the same error allowance, rounded outward.
//!
//! Upper bounds are `−(lower bound of −objective)`. Any NaN met in a bound becomes an
//! infinite (vacuous) bound, never a finite one.

use super::slopes::{adaptive_slope, Slopes, Target};
use super::{Layer, Network};
use crate::interval::Interval;
use crate::spec::BoundsMethod;
use ndarray::{Array1, Array2};

/// Bounds over a box of inputs: `outputs[i] ∋ y_i(x)` and `diff[i][j] ∋ y_i(x) − y_j(x)`
/// for every real `x` in the box (`diff[i][i]` is exactly 0).
#[derive(Clone, Debug, PartialEq)]
pub struct OutputBounds {
    pub outputs: Vec<Interval>,
    pub diff: Vec<Vec<Interval>>,
}

impl OutputBounds {
    /// True when every pair of outputs is ordered over the whole box (no `diff[i][j]`
    /// with `i ≠ j` holds 0), so the arg-max of the outputs is the same everywhere.
    pub fn orders_all_pairs(&self) -> bool {
        self.diff.iter().enumerate().all(|(i, row)| {
            row.iter().enumerate().all(|(j, d)| i == j || !(d.is_undefined() || d.contains_zero()))
        })
    }
}

/// Enclosures of the network's outputs and output differences for all inputs in the
/// box `input` (one interval per input), by the chosen method.
///
/// Guarantee: for every real point `x` of the box, the real-arithmetic network value
/// `y(x)` satisfies `y_i(x) ∈ outputs[i]` and `y_i(x) − y_j(x) ∈ diff[i][j]`. An
/// undefined input interval gives undefined bounds. Panics if
/// `input.len() != net.input_dim()` (a caller's error).
pub fn output_bounds(net: &Network, input: &[Interval], method: BoundsMethod) -> OutputBounds {
    output_bounds_over(net, input, method, None)
}

/// [`output_bounds`] for inputs in a subset of the box: the backward pass of the
/// outputs and their differences is concretised by `over` (rigorous lower bounds of
/// linear forms over the subset) as well as over the box; the intermediate bounds are
/// taken over the box. Same guarantee, for the points of the subset.
pub fn output_bounds_over(net: &Network, input: &[Interval], method: BoundsMethod, over: Option<Concretiser>) -> OutputBounds {
    assert_eq!(input.len(), net.input_dim(), "network takes {} inputs, got {}", net.input_dim(), input.len());
    if input.iter().any(|i| i.is_undefined()) {
        let m = net.output_dim();
        return OutputBounds {
            outputs: vec![Interval::UNDEFINED; m],
            diff: vec![vec![Interval::UNDEFINED; m]; m],
        };
    }
    match method {
        BoundsMethod::Interval => interval_bounds(net, input),
        BoundsMethod::Symbolic => symbolic_bounds(net, input, Some(&interval_bounds(net, input)), over),
        BoundsMethod::Portfolio => {
            let ib = interval_bounds(net, input);
            if ib.orders_all_pairs() {
                ib
            } else {
                symbolic_bounds(net, input, Some(&ib), over)
            }
        }
    }
}

/// The symbolic result *before* the final intersection with interval bounds, so that
/// tests can check the backward pass on its own (the intersection would hide an
/// unsound backward pass behind a sound interval one). Same guarantee as
/// [`output_bounds`]; not for production use (it is never tighter).
#[doc(hidden)]
pub fn raw_symbolic_bounds(net: &Network, input: &[Interval]) -> OutputBounds {
    assert_eq!(input.len(), net.input_dim(), "network takes {} inputs, got {}", net.input_dim(), input.len());
    symbolic_bounds(net, input, None, None)
}

// ---------------------------------------------------------------------------
// Interval bound propagation
// ---------------------------------------------------------------------------

/// The interval image of one layer (outward rounded, so it encloses the real image).
fn forward_layer(layer: &Layer, a: &[Interval]) -> Vec<Interval> {
    match layer {
        Layer::Dense { w, b } => {
            if a.iter().any(|x| x.is_undefined()) {
                return vec![Interval::UNDEFINED; b.len()];
            }
            if a.iter().all(|x| x.is_bounded()) {
                dense_mid_rad(w, b, a)
            } else {
                dense_endpoints(w, b, a)
            }
        }
        Layer::Relu => a.iter().map(|x| x.max(Interval::ZERO)).collect(),
        Layer::Sigmoid => a
            .iter()
            .map(|x| {
                // σ(x) = 1 / (1 + e^(−x)) in interval arithmetic; σ maps into [0, 1].
                let s = Interval::ONE / (Interval::ONE + x.neg().exp());
                if s.is_undefined() {
                    return s;
                }
                Interval::new(s.lo().max(0.0), s.hi().min(1.0))
            })
            .collect(),
        Layer::Tanh => a.iter().map(|x| x.tanh()).collect(),
    }
}

/// `W·[a] + b` in midpoint–radius form, for bounded `a`. With `a ∈ m ± ρ` entry-wise
/// (`m = mid`, `ρ ≥` the radius), the exact image is `W·m + b ± |W|·ρ`. The computed
/// `c = fl(W·m + b)` (any summation order, FMA or not) is within
/// `γ_{n+1}·(|W|·|m| + |b|) + (n+1)·η` of `W·m + b` (the standard dot-product bound,
/// the bias being one more term), and the computed non-negative sums are turned into
/// upper bounds by [`abs_matvec_upper`]'s rule. So `[c − R, c + R]`, rounded outward,
/// encloses the image, with `R` the sum of those upper bounds.
fn dense_mid_rad(w: &Array2<f64>, b: &Array1<f64>, a: &[Interval]) -> Vec<Interval> {
    let n = w.ncols();
    let m = Array1::from_iter(a.iter().map(|x| x.mid()));
    let rho = Array1::from_iter(a.iter().map(|x| x.rad()));
    let abs_w = w.mapv(f64::abs);
    let c = w.dot(&m) + b;
    let mag = abs_w.dot(&m.mapv(f64::abs)) + b.mapv(f64::abs);
    let rad = abs_w.dot(&rho);
    let g1 = gamma(n + 1);
    let g0 = gamma(n);
    let eta1 = (n + 1) as f64 * ETA;
    let up_sum = |s: f64, g: f64, k: usize| mul_up(add_up(s, k as f64 * ETA), add_up(1.0, 2.0 * g));
    c.iter()
        .zip(mag.iter().zip(rad.iter()))
        .map(|(&ci, (&mi, &ri))| {
            let mag_up = up_sum(mi, g1, n + 1);
            let rad_up = up_sum(ri, g0, n);
            let r = add_up(add_up(rad_up, mul_up(g1, mag_up)), eta1);
            Interval::new(add_down(ci, -r), add_up(ci, r))
        })
        .collect()
}

/// `W·[a] + b` by endpoints (used when some input is unbounded): each product end and
/// each sum rounded outward.
fn dense_endpoints(w: &Array2<f64>, b: &Array1<f64>, a: &[Interval]) -> Vec<Interval> {
    w.rows()
        .into_iter()
        .zip(b.iter())
        .map(|(row, &bi)| {
            let (mut lo, mut hi) = (bi, bi);
            for (&wij, aj) in row.iter().zip(a) {
                if wij > 0.0 {
                    lo = add_down(lo, mul_down(wij, aj.lo()));
                    hi = add_up(hi, mul_up(wij, aj.hi()));
                } else if wij < 0.0 {
                    lo = add_down(lo, mul_down(wij, aj.hi()));
                    hi = add_up(hi, mul_up(wij, aj.lo()));
                }
            }
            Interval::new(lo, hi)
        })
        .collect()
}

/// Bounds of every value of the chain: `v[0]` is the input box, `v[k + 1]` the image
/// of layer `k`.
fn interval_values(net: &Network, input: &[Interval]) -> Vec<Vec<Interval>> {
    let mut v = vec![input.to_vec()];
    for layer in net.layers() {
        let next = forward_layer(layer, v.last().expect("starts with the input"));
        v.push(next);
    }
    v
}

fn differences(outputs: &[Interval]) -> Vec<Vec<Interval>> {
    outputs
        .iter()
        .enumerate()
        .map(|(i, &a)| outputs.iter().enumerate().map(|(j, &b)| if i == j { Interval::ZERO } else { a - b }).collect())
        .collect()
}

fn interval_bounds(net: &Network, input: &[Interval]) -> OutputBounds {
    let outputs = interval_values(net, input).pop().expect("at least the input");
    let diff = differences(&outputs);
    OutputBounds { outputs, diff }
}

// ---------------------------------------------------------------------------
// Backward linear bound propagation
// ---------------------------------------------------------------------------

/// Unit roundoff of f64 (round to nearest).
const U: f64 = 1.0 / 9007199254740992.0; // 2⁻⁵³
/// Smallest positive subnormal: bounds the absolute error of an underflowing product.
const ETA: f64 = f64::from_bits(1); // 2⁻¹⁰⁷⁴

/// An upper bound on `γ_n = n·u / (1 − n·u)`.
fn gamma(n: usize) -> f64 {
    let nu = Interval::point(n as f64 * U); // exact: an integer times a power of two
    (nu / (Interval::ONE - nu)).hi()
}

/// Entry-wise upper bounds on `A·x` for a non-negative matrix `A` and `x ≥ 0`: each
/// computed sum of `n` non-negative products is within `γ_n·exact + n·η` of the exact
/// one, so `exact ≤ (fl + n·η)/(1 − γ_n)`, and `1/(1 − γ) ≤ 1 + 2γ` for `γ ≤ 1/2`;
/// each step rounds up.
fn abs_matvec_upper(a: &Array2<f64>, x: &Array1<f64>) -> Array1<f64> {
    let n = x.len();
    let g = gamma(n);
    assert!(g <= 0.5, "dimension too large for the error bound");
    let factor = add_up(1.0, 2.0 * g);
    a.dot(x).mapv(|s| mul_up(add_up(s, n as f64 * ETA), factor))
}

// Directed rounding of one operation on exact f64 operands. Round-to-nearest is within
// half an ulp of the exact result, so one step of `next_down`/`next_up` gives a lower
// / upper bound (also at an overflow to ±∞ and in the subnormal range). A NaN result
// (∞ − ∞, 0·∞) becomes the vacuous bound.

/// Lower bound of `a·b`; `0·x` is exactly 0 even for infinite `x` (bounds stand for reals).
fn mul_down(a: f64, b: f64) -> f64 {
    if a == 0.0 || b == 0.0 {
        return 0.0;
    }
    let p = a * b;
    if p.is_nan() {
        f64::NEG_INFINITY
    } else {
        p.next_down()
    }
}

/// Upper bound of `a·b`.
fn mul_up(a: f64, b: f64) -> f64 {
    -mul_down(-a, b)
}

/// Upper bound of `a + b`.
fn add_up(a: f64, b: f64) -> f64 {
    -add_down(-a, -b)
}

/// `a + b` rounded down (a lower bound of the exact sum); NaN becomes −∞.
fn add_down(a: f64, b: f64) -> f64 {
    let s = a + b;
    if s.is_nan() {
        f64::NEG_INFINITY
    } else {
        s.next_down()
    }
}

/// Lower bounds, valid for every input in the box, of each row `r` of `obj·v[top]`,
/// where `v[top]` is the value after the first `top` layers.
///
/// Invariant kept while walking layers `top−1, …, 0`: for every input in the box,
/// `obj_r·v[top] ≥ lam_r·v[k] + d_r`, where `v[k]` is the value entering layer `k`.
/// `vals[k]` must enclose `v[k]` (the ReLU inputs with their tightened bounds).
fn backward(net: &Network, vals: &[Vec<Interval>], top: usize, obj: Array2<f64>, over: Option<Concretiser>) -> Vec<f64> {
    let rows = obj.nrows();
    let Some((lam, d, stop)) = backward_linear(net, vals, top, obj, None) else {
        return vec![f64::NEG_INFINITY; rows];
    };
    let on_box = concretise(&lam, &d, &vals[stop]);
    match over {
        Some(f) if stop == 0 => f(&lam, &d).iter().zip(on_box).map(|(a, b)| if a.is_nan() { b } else { a.max(b) }).collect(),
        _ => on_box,
    }
}

/// Rigorous lower bounds of `lam_r·x + d_r` over an input set inside the input box
/// (for example a polytope given by constraints): used instead of the box in the last
/// step of the backward pass, and intersected with the box result.
pub type Concretiser<'a> = &'a dyn Fn(&Array2<f64>, &[f64]) -> Vec<f64>;

/// The backward pass without its last step: `(lam, d, stop)` with
/// `obj_r·v[top] ≥ lam_r·v[stop] + d_r` for every input in the box, where `stop` is 0
/// (the input) unless a sigmoid/tanh layer ended the pass. `None` when a bound met on
/// the way is undefined or unbounded.
fn backward_linear(
    net: &Network,
    vals: &[Vec<Interval>],
    top: usize,
    obj: Array2<f64>,
    slopes: Option<&Slopes>,
) -> Option<(Array2<f64>, Vec<f64>, usize)> {
    let rows = obj.nrows();
    let mut lam = obj;
    let mut d = vec![0.0f64; rows];
    // Where the pass ends: the input, or the output of the topmost sigmoid/tanh.
    let mut stop = 0;
    for k in (0..top).rev() {
        match &net.layers()[k] {
            Layer::Dense { w, b } => {
                // lam·(W·a + b) = (lam·W)·a + lam·b, with lam·W rounded (step 1 above).
                let amax: Vec<f64> = vals[k].iter().map(|i| if i.is_undefined() { f64::INFINITY } else { i.mag() }).collect();
                if amax.iter().any(|v| !v.is_finite()) {
                    return None;
                }
                let n = w.nrows(); // inner dimension of lam·W and of lam·b
                let amax = Array1::from(amax);
                // q ≥ |W|·amax + |b| entry-wise
                let wa = abs_matvec_upper(&w.mapv(f64::abs), &amax);
                let q = Array1::from_iter(wa.iter().zip(b).map(|(&v, &bi)| add_up(v, bi.abs())));
                // lq ≥ |lam|·(|W|·amax + |b|)
                let lq = abs_matvec_upper(&lam.mapv(f64::abs), &q);
                let sum_amax = amax.iter().fold(0.0f64, |s, &v| add_up(s, v));
                // underflow: n·η per entry of lam·W (times Σ amax), and n·η for lam·b
                let underflow = add_up(mul_up(n as f64 * ETA, add_up(sum_amax, 1.0)), ETA);
                let g = gamma(n);
                // fl(lam·b) is within γ_n·|lam|·|b| + n·η of lam·b; fl(lam·W) within
                // γ_n·|lam|·|W| + n·η of lam·W, which costs γ_n·|lam|·|W|·amax on a.
                let lam_b = lam.dot(b);
                for r in 0..rows {
                    let err = add_up(mul_up(g, lq[r]), underflow);
                    d[r] = add_down(add_down(d[r], lam_b[r]), -err);
                }
                lam = lam.dot(w);
            }
            Layer::Relu => {
                // Step 2 above: choose λ' per neuron and row, then a rigorous offset.
                let pre = &vals[k];
                for r in 0..rows {
                    let mut offset = 0.0f64;
                    for (i, z) in pre.iter().enumerate() {
                        let l = lam[[r, i]];
                        if l == 0.0 {
                            continue;
                        }
                        let (lo, hi) = (z.lo(), z.hi());
                        if z.is_undefined() {
                            return None;
                        }
                        if hi <= 0.0 {
                            lam[[r, i]] = 0.0; // relu(z) = 0 exactly
                        } else if lo >= 0.0 {
                            // relu(z) = z exactly: λ' = λ, offset 0
                        } else {
                            let mut lp = if l > 0.0 {
                                // lower relaxation relu(z) ≥ α·z, α chosen by the
                                // optimiser when given, else by the adaptive rule
                                match slopes {
                                    Some(s) => l * s.get(r, k, i),
                                    None => l * adaptive_slope(z),
                                }
                            } else {
                                // triangle upper bound relu(z) ≤ u/(u−l)·(z − l)
                                l * (hi / (hi - lo))
                            };
                            if !lp.is_finite() {
                                lp = 0.0;
                            }
                            // min of λ·relu(z) − λ'·z over z ∈ {l, 0, u}, each rounded
                            // down: relu(l) = 0, relu(0) = 0, relu(u) = u.
                            let at_l = mul_down(-lp, lo);
                            let at_u = add_down(mul_down(l, hi), mul_down(-lp, hi));
                            offset = add_down(offset, at_l.min(at_u).min(0.0));
                            lam[[r, i]] = lp;
                        }
                    }
                    d[r] = add_down(d[r], offset);
                }
            }
            Layer::Sigmoid | Layer::Tanh => {
                // Not relaxed: concretise over the interval bounds of this layer's output.
                stop = k + 1;
                break;
            }
        }
    }
    Some((lam, d, stop))
}

/// Step 3: lower bounds of `lam_r·x + d_r` over the box `box_`.
fn concretise(lam: &Array2<f64>, d: &[f64], box_: &[Interval]) -> Vec<f64> {
    let rows = lam.nrows();
    if box_.iter().all(|x| x.is_bounded()) {
        // Midpoint–radius: lam·x ≥ lam·m − |lam|·ρ for x ∈ m ± ρ, and fl(lam·m) is
        // within γ_n·|lam|·|m| + n·η of lam·m.
        let n = box_.len();
        let m = Array1::from_iter(box_.iter().map(|x| x.mid()));
        let rho = Array1::from_iter(box_.iter().map(|x| x.rad()));
        let abs_lam = lam.mapv(f64::abs);
        let c = lam.dot(&m);
        let lm = abs_matvec_upper(&abs_lam, &m.mapv(f64::abs));
        let lr = abs_matvec_upper(&abs_lam, &rho);
        let g = gamma(n);
        return (0..rows)
            .map(|r| {
                let slack = add_up(add_up(lr[r], mul_up(g, lm[r])), n as f64 * ETA);
                add_down(d[r], add_down(c[r], -slack))
            })
            .collect();
    }
    // Some end is infinite: term by term, the lower end of each product rounded down.
    (0..rows)
        .map(|r| {
            // lower bound of Σ c·[x]: the lower end of each term, rounded down
            let s = lam.row(r).iter().zip(box_).fold(0.0f64, |s, (&c, x)| {
                let t = if c > 0.0 {
                    mul_down(c, x.lo())
                } else if c < 0.0 {
                    mul_down(c, x.hi())
                } else {
                    0.0
                };
                add_down(s, t)
            });
            let v = add_down(d[r], s);
            if v.is_nan() {
                f64::NEG_INFINITY
            } else {
                v
            }
        })
        .collect()
}

/// Rows `+e_i` and `−e_i` for each listed neuron: lower bounds of these give both ends.
fn plus_minus_units(dim: usize, which: &[usize]) -> Array2<f64> {
    let mut obj = Array2::zeros((2 * which.len(), dim));
    for (t, &i) in which.iter().enumerate() {
        obj[[2 * t, i]] = 1.0;
        obj[[2 * t + 1, i]] = -1.0;
    }
    obj
}

/// Symbolic bounds; intersected with `interval` (and with the forward interval bounds
/// of the tightened chain) when given, else the raw backward-pass result.
fn symbolic_bounds(net: &Network, input: &[Interval], interval: Option<&OutputBounds>, over: Option<Concretiser>) -> OutputBounds {
    let layers = net.layers();
    let vals = tightened_values(net, input);
    // Objectives at the output: +e_i, −e_i, then e_i − e_j for i ≠ j.
    let m = net.output_dim();
    let pairs: Vec<(usize, usize)> = (0..m).flat_map(|i| (0..m).filter(move |&j| j != i).map(move |j| (i, j))).collect();
    let mut obj = Array2::zeros((2 * m + pairs.len(), m));
    obj.slice_mut(ndarray::s![..2 * m, ..]).assign(&plus_minus_units(m, &(0..m).collect::<Vec<_>>()));
    for (t, &(i, j)) in pairs.iter().enumerate() {
        obj[[2 * m + t, i]] = 1.0;
        obj[[2 * m + t, j]] = -1.0;
    }
    let lows = backward(net, &vals, layers.len(), obj, over);
    let forward_out = vals.last().expect("at least the input");
    let outputs: Vec<Interval> = (0..m)
        .map(|i| {
            let sym = Interval::new(lows[2 * i], -lows[2 * i + 1]);
            match interval {
                Some(ib) => tightest(&[sym, forward_out[i], ib.outputs[i]]),
                None => sym,
            }
        })
        .collect();
    let mut diff = differences(&outputs);
    for (t, &(i, j)) in pairs.iter().enumerate() {
        // Lower end from e_i − e_j; upper end from −(lower bound of e_j − e_i).
        let back = pairs.iter().position(|&p| p == (j, i)).expect("both orders are listed");
        let sym = Interval::new(lows[2 * m + t], -lows[2 * m + back]);
        diff[i][j] = match interval {
            Some(ib) => tightest(&[sym, diff[i][j], ib.diff[i][j]]),
            None => sym,
        };
    }
    OutputBounds { outputs, diff }
}

/// Linear lower bounds at the input: for each row `r` of `obj` (a combination of the
/// outputs), coefficients `lam_r` and a constant `d_r` such that
/// `obj_r·y(x) ≥ lam_r·x + d_r` for every real `x` in the box `input`, the weights and
/// every rounding of the pass accounted for (module documentation, steps 1 and 2). The
/// ReLU relaxations are chosen over the box, with pre-activation bounds tightened as in
/// the symbolic method over the box. (Bounding every unstable neuron over a smaller
/// input set instead costs two linear programs each; on the lander demo it proved 22
/// instead of 21 of 64 cells at three times the cost.) `None` when the network has sigmoid/tanh layers or a bound on
/// the way is undefined or unbounded.
pub fn linear_lower_bounds(net: &Network, input: &[Interval], obj: Array2<f64>) -> Option<(Array2<f64>, Vec<f64>)> {
    linear_lower_bounds_tuned(net, input, obj, 0, Target::Mean)
}

/// [`linear_lower_bounds`] with the ReLU lower slopes optimised per row by `steps`
/// projected-gradient steps on the row's `target` over the box ([`super::slopes`]);
/// the same guarantee (the slopes are only proposals, the rigorous pass checks
/// nothing less for them). With `steps == 0` it is [`linear_lower_bounds`].
pub fn linear_lower_bounds_tuned(net: &Network, input: &[Interval], obj: Array2<f64>, steps: u32, target: Target) -> Option<(Array2<f64>, Vec<f64>)> {
    assert_eq!(input.len(), net.input_dim(), "network takes {} inputs, got {}", net.input_dim(), input.len());
    assert_eq!(obj.ncols(), net.output_dim(), "objective over {} outputs, network has {}", obj.ncols(), net.output_dim());
    if input.iter().any(|i| i.is_undefined() || !i.is_bounded()) {
        return None;
    }
    let vals = tightened_values(net, input);
    let top = net.layers().len();
    let slopes = if steps == 0 { None } else { super::slopes::optimise(net, &vals, top, &obj, steps, target) };
    let (lam, d, stop) = backward_linear(net, &vals, top, obj, slopes.as_ref())?;
    if stop != 0 || d.iter().any(|v| !v.is_finite()) {
        return None;
    }
    Some((lam, d))
}

/// Interval bounds of every value of the chain, with the pre-activation bounds of
/// unstable ReLU neurons tightened by the backward pass.
fn tightened_values(net: &Network, input: &[Interval]) -> Vec<Vec<Interval>> {
    let layers = net.layers();
    let mut vals: Vec<Vec<Interval>> = vec![input.to_vec()];
    for (k, layer) in layers.iter().enumerate() {
        if matches!(layer, Layer::Relu) && k > 0 {
            // Tighten the pre-activation bounds of the neurons whose relaxation matters.
            let unstable: Vec<usize> = (0..vals[k].len()).filter(|&i| vals[k][i].lo() < 0.0 && vals[k][i].hi() > 0.0).collect();
            if !unstable.is_empty() {
                let lows = backward(net, &vals, k, plus_minus_units(vals[k].len(), &unstable), None);
                for (t, &i) in unstable.iter().enumerate() {
                    let sym = Interval::new(lows[2 * t], -lows[2 * t + 1]);
                    if let Some(tight) = sym.intersect(&vals[k][i]) {
                        vals[k][i] = tight;
                    }
                }
            }
        }
        let next = forward_layer(layer, &vals[k]);
        vals.push(next);
    }
    vals
}


/// The intersection of sound enclosures of the same quantity. Undefined ones are
/// skipped; an empty intersection (impossible for sound inputs) falls back to the last,
/// the interval result.
fn tightest(candidates: &[Interval]) -> Interval {
    let fallback = *candidates.last().expect("at least one candidate");
    let mut acc = Interval::ENTIRE;
    for c in candidates.iter().filter(|c| !c.is_undefined()) {
        match acc.intersect(c) {
            Some(i) => acc = i,
            None => return fallback,
        }
    }
    acc
}

#[cfg(test)]
mod tests {
    use super::*;
    use ndarray::array;

    fn iv(lo: f64, hi: f64) -> Interval {
        Interval::new(lo, hi)
    }

    /// Worked example of the ReLU triangle relaxation (the standard relaxation from the
    /// published literature on linear bound propagation; common practice). The numbers
    /// below are worked by hand.
    ///
    /// Network: x1, x2 ∈ [−1, 1]; z1 = x1 + x2, z2 = x1 − x2 + 1; h = relu(z);
    /// y = −h1 + h2.
    #[test]
    fn worked_example_triangle_relaxation() {
        // Layer 1: z1 = x1 + x2, z2 = x1 − x2 + 1.  Layer 2: y = −h1 + h2.
        //
        // Pre-activation bounds (exact for one affine layer over a box):
        //   z1 ∈ [−2, 2],  z2 ∈ [−1, 3].  Both neurons are unstable.
        //
        // Lower bound of y = −h1 + h2 (objective λ = (−1, +1) on h):
        //   h1 has λ = −1 < 0: use the triangle upper bound
        //     relu(z1) ≤ u/(u−l)·(z1 − l) = 2/4·(z1 + 2) = 0.5·z1 + 1,
        //     so −h1 ≥ −0.5·z1 − 1.
        //   h2 has λ = +1 > 0: lower bound relu(z2) ≥ α·z2 with α = 1 since
        //     u = 3 ≥ −l = 1, so h2 ≥ z2.
        //   y ≥ −0.5·z1 − 1 + z2 = −0.5(x1 + x2) − 1 + x1 − x2 + 1
        //     = 0.5·x1 − 1.5·x2.
        //   Over the box: min = 0.5·(−1) − 1.5·1 = −2.
        //
        // Upper bound of y: lower bound of −y = h1 − h2 (λ = (+1, −1)):
        //   h1, λ = +1: α = 1 since u = 2 ≥ −l = 2, so h1 ≥ z1.
        //   h2, λ = −1: triangle relu(z2) ≤ 3/4·(z2 + 1), so −h2 ≥ −0.75·z2 − 0.75.
        //   −y ≥ z1 − 0.75·z2 − 0.75 = x1 + x2 − 0.75·x1 + 0.75·x2 − 0.75 − 0.75
        //      = 0.25·x1 + 1.75·x2 − 1.5;  min over the box = −0.25 − 1.75 − 1.5 = −3.5.
        //   So y ≤ 3.5.
        //
        // Interval propagation for comparison: h1 ∈ [0, 2], h2 ∈ [0, 3], so
        //   y ∈ [−2, 3]: here the interval upper end 3 is tighter than 3.5, and the
        //   result (intersected) is [−2, 3]. The symbolic lower end −2 matches.
        //
        // Difference: one output only, so diff = [[0]].
        let net = Network::new(
            2,
            vec![
                Layer::Dense { w: array![[1.0, 1.0], [1.0, -1.0]], b: array![0.0, 1.0] },
                Layer::Relu,
                Layer::Dense { w: array![[-1.0, 1.0]], b: array![0.0] },
            ],
            false,
        )
        .unwrap();
        let input = [iv(-1.0, 1.0), iv(-1.0, 1.0)];
        // The raw backward pass, before any intersection, gives the hand numbers
        // (−2 and −3.5) up to the rigorous rounding allowance (a few ulps).
        let vals = interval_values(&net, &input);
        let lows = backward(&net, &vals, 3, array![[1.0], [-1.0]], None);
        assert!(lows[0] <= -2.0 && lows[0] > -2.0 - 1e-12, "{}", lows[0]);
        assert!(lows[1] <= -3.5 && lows[1] > -3.5 - 1e-12, "{}", lows[1]);
        let sym = output_bounds(&net, &input, BoundsMethod::Symbolic);
        let ib = output_bounds(&net, &input, BoundsMethod::Interval);
        assert!(ib.outputs[0].lo() <= -2.0 && ib.outputs[0].hi() >= 3.0);
        assert!(sym.outputs[0].lo() <= -2.0 && sym.outputs[0].lo() > -2.0 - 1e-12);
        assert!(sym.outputs[0].hi() >= 3.0 && sym.outputs[0].hi() < 3.0 + 1e-12);
        assert_eq!(sym.diff[0][0], Interval::ZERO);
    }

    #[test]
    fn diff_objective_beats_subtracting_outputs() {
        // y1 = x, y2 = x − 1 for x ∈ [0, 1]: outputs [0,1] and [−1,0]; subtracting gives
        // y1 − y2 ∈ [0, 2], but y1 − y2 = 1 exactly, which the e1 − e2 objective sees.
        let net = Network::new(1, vec![Layer::Dense { w: array![[1.0], [1.0]], b: array![0.0, -1.0] }], false).unwrap();
        let sym = output_bounds(&net, &[iv(0.0, 1.0)], BoundsMethod::Symbolic);
        let d = sym.diff[0][1];
        assert!(d.lo() <= 1.0 && d.lo() > 1.0 - 1e-12 && d.hi() >= 1.0 && d.hi() < 1.0 + 1e-12, "{d:?}");
        let ib = output_bounds(&net, &[iv(0.0, 1.0)], BoundsMethod::Interval);
        assert!(ib.diff[0][1].lo() <= 0.0 && ib.diff[0][1].hi() >= 2.0);
        // Interval leaves the order open (diff holds 0), so the portfolio runs symbolic.
        let pf = output_bounds(&net, &[iv(0.0, 1.0)], BoundsMethod::Portfolio);
        assert_eq!(pf, sym);
        assert!(pf.orders_all_pairs());
    }

    #[test]
    fn gamma_is_an_upper_bound() {
        assert!(gamma(1) >= U && gamma(1) < 1.0000001 * U);
        assert!(gamma(64) >= 64.0 * U);
    }

    #[test]
    fn sigmoid_interval_encloses_values() {
        let out = forward_layer(&Layer::Sigmoid, &[iv(-1.0, 2.0), iv(-800.0, 800.0)]);
        let s = |x: f64| 1.0 / (1.0 + (-x).exp());
        assert!(out[0].contains(s(-1.0)) && out[0].contains(s(2.0)));
        assert!(out[1].lo() >= 0.0 && out[1].hi() <= 1.0 && out[1].contains(0.5));
    }
}
