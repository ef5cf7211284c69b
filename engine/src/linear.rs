//! Linear loops: whether a spec's plant, observations and unsafe sets are affine, and
//! a sound discretisation of an affine plant over one sampling step.
//!
//! The exact method ([`super::exact`]) needs the closed loop as a mixed-integer linear
//! program, which it is when
//! * every right-hand side `dx/dt = f(x, u, w)` is affine in states, inputs and
//!   disturbances: `f = A x + B u + E w + c`;
//! * every observation is affine in the states;
//! * every unsafe constraint `g(x) ≤ 0` is affine in the states (an unsafe region is then
//!   a polyhedron, a conjunction of linear inequalities).
//!
//! Detection is structural ([`affine_parts`]): sums, differences, negations, products
//! where one factor is constant, quotients by a constant, and constant subexpressions
//! (evaluated in interval arithmetic, so a literal like `0.1` keeps its exact real
//! value inside an interval). Anything else that involves a symbol is reported, with the
//! JSON path and the text of the offending subexpression. An expression that is affine
//! only after cancellation (`x*x - x*x`) is reported too: rewrite it.
//!
//! Discretisation ([`discretise`]): with zero-order hold over a step `h`,
//! `x(t+τ) = Φ(τ) x(t) + Γ(τ) (B u + E w + c)` where `Φ(τ) = e^{Aτ}` and
//! `Γ(τ) = ∫_0^τ e^{As} ds`. Both are enclosed by their Taylor series in outward-rounded
//! interval arithmetic plus a bound on the remainder (common practice; the bound is the
//! tail of the exponential series of `‖Aτ‖∞`), for a point `τ` or for every `τ` in an
//! interval `[0, h]` at once (used to bound the state between samples).

use super::expr::Expr;
use super::interval::Interval;
use super::spec::Spec;

/// An expression that is not affine, where it was found and which part of it is at fault.
#[derive(Clone, Debug, PartialEq, thiserror::Error)]
#[error("{path}: not linear: '{culprit}' (in '{text}'); the exact method needs {needs}")]
pub struct NotLinear {
    /// JSON path of the expression (`dynamics.v`, `controller.observations[0].expr`).
    pub path: String,
    /// The whole expression as written.
    pub text: String,
    /// The offending subexpression.
    pub culprit: String,
    /// What the exact method requires of this expression.
    pub needs: &'static str,
}

/// `Σ coeffs[i]·v_i + constant`, each coefficient and the constant known to lie in an
/// interval (usually a point; literals that are not binary fractions give a thin one).
#[derive(Clone, Debug, PartialEq)]
pub struct AffineParts {
    pub coeffs: Vec<Interval>,
    pub constant: Interval,
}

impl AffineParts {
    fn constant(n: usize, c: Interval) -> AffineParts {
        AffineParts { coeffs: vec![Interval::ZERO; n], constant: c }
    }

    fn is_constant(&self) -> bool {
        self.coeffs.iter().all(|c| c.lo() == 0.0 && c.hi() == 0.0)
    }

    fn scaled(self, s: Interval) -> AffineParts {
        AffineParts { coeffs: self.coeffs.into_iter().map(|c| c * s).collect(), constant: self.constant * s }
    }

    fn combine(self, o: AffineParts, sign: f64) -> AffineParts {
        let s = Interval::point(sign);
        AffineParts {
            coeffs: self.coeffs.into_iter().zip(o.coeffs).map(|(a, b)| a + b * s).collect(),
            constant: self.constant + o.constant * s,
        }
    }

    /// Whether every coefficient and the constant are bounded numbers.
    fn is_defined(&self) -> bool {
        self.constant.is_bounded() && !self.constant.is_undefined() && self.coeffs.iter().all(|c| c.is_bounded() && !c.is_undefined())
    }
}

/// Whether `e` uses any symbol.
fn uses_symbols(e: &Expr, n: usize) -> bool {
    (0..n).any(|i| e.uses(i))
}

/// The text of `e` with its symbols named by `names` (parentheses only where needed).
pub fn render(e: &Expr, names: &[String]) -> String {
    fn prec(e: &Expr) -> u8 {
        match e {
            Expr::Add(..) | Expr::Sub(..) => 1,
            Expr::Mul(..) | Expr::Div(..) => 2,
            Expr::Neg(_) => 3,
            Expr::PowI(..) | Expr::Pow(..) => 4,
            _ => 5,
        }
    }
    fn wrap(e: &Expr, names: &[String], min: u8) -> String {
        let t = render(e, names);
        if prec(e) < min {
            format!("({t})")
        } else {
            t
        }
    }
    match e {
        Expr::Num(n) => format!("{}", n.value),
        Expr::Pi => "pi".into(),
        Expr::Var(i) => names.get(*i).cloned().unwrap_or_else(|| format!("${i}")),
        Expr::Neg(a) => format!("-{}", wrap(a, names, 4)),
        Expr::Add(a, b) => format!("{} + {}", wrap(a, names, 1), wrap(b, names, 2)),
        Expr::Sub(a, b) => format!("{} - {}", wrap(a, names, 1), wrap(b, names, 2)),
        Expr::Mul(a, b) => format!("{} * {}", wrap(a, names, 2), wrap(b, names, 3)),
        Expr::Div(a, b) => format!("{} / {}", wrap(a, names, 2), wrap(b, names, 3)),
        Expr::PowI(a, k) => format!("{}^{k}", wrap(a, names, 5)),
        Expr::Pow(a, b) => format!("{}^{}", wrap(a, names, 5), wrap(b, names, 4)),
        Expr::Call(f, args) => {
            format!("{}({})", f.name(), args.iter().map(|a| render(a, names)).collect::<Vec<_>>().join(", "))
        }
        Expr::Select(_) => e.to_string(),
    }
}

/// The affine parts of `e` over `n` symbols, or the smallest offending subexpression
/// found.
pub fn affine_parts(e: &Expr, n: usize) -> Result<AffineParts, Expr> {
    if !uses_symbols(e, n) {
        // A constant subexpression: its interval value (the symbols are unused).
        let c = e.eval_interval(&vec![Interval::ZERO; n]);
        if c.is_undefined() || !c.is_bounded() {
            return Err(e.clone());
        }
        return Ok(AffineParts::constant(n, c));
    }
    let parts = match e {
        Expr::Var(i) => {
            let mut p = AffineParts::constant(n, Interval::ZERO);
            p.coeffs[*i] = Interval::ONE;
            p
        }
        Expr::Neg(a) => affine_parts(a, n)?.scaled(Interval::point(-1.0)),
        Expr::Add(a, b) => affine_parts(a, n)?.combine(affine_parts(b, n)?, 1.0),
        Expr::Sub(a, b) => affine_parts(a, n)?.combine(affine_parts(b, n)?, -1.0),
        Expr::Mul(a, b) => {
            let (pa, pb) = (affine_parts(a, n)?, affine_parts(b, n)?);
            if pa.is_constant() {
                pb.scaled(pa.constant)
            } else if pb.is_constant() {
                pa.scaled(pb.constant)
            } else {
                return Err(e.clone());
            }
        }
        Expr::Div(a, b) => {
            if uses_symbols(b, n) {
                return Err(e.clone());
            }
            let d = affine_parts(b, n)?.constant;
            if d.contains_zero() {
                return Err(e.clone());
            }
            affine_parts(a, n)?.scaled(Interval::ONE / d)
        }
        Expr::PowI(a, 1) => affine_parts(a, n)?,
        _ => return Err(e.clone()),
    };
    if !parts.is_defined() {
        return Err(e.clone());
    }
    Ok(parts)
}

/// The plant `dx/dt = A x + B u + E w + c` with interval entries.
#[derive(Clone, Debug, PartialEq)]
pub struct LinearPlant {
    /// `a[i][j]`: coefficient of state j in the derivative of state i.
    pub a: Vec<Vec<Interval>>,
    /// `b[i][j]`: coefficient of input j.
    pub b: Vec<Vec<Interval>>,
    /// `e[i][j]`: coefficient of disturbance j.
    pub e: Vec<Vec<Interval>>,
    pub c: Vec<Interval>,
}

/// An affine function of the states with interval coefficients (an observation, or an
/// unsafe constraint's `g` in `g(x) ≤ 0`).
pub type StateAffine = AffineParts;

/// The spec's loop in linear form: plant, observations, unsafe regions.
#[derive(Clone, Debug, PartialEq)]
pub struct LinearLoop {
    pub plant: LinearPlant,
    pub observations: Vec<StateAffine>,
    /// `unsafe_regions[r]`: the constraints `g(x) ≤ 0` of region r.
    pub unsafe_regions: Vec<Vec<StateAffine>>,
}

/// Whether the spec's loop is linear; the first expression that is not, otherwise.
pub fn linear_loop(spec: &Spec) -> Result<LinearLoop, NotLinear> {
    let n = spec.states.len();
    let (p, d) = (spec.inputs.len(), spec.disturbances.len());
    let mut plant = LinearPlant { a: Vec::new(), b: Vec::new(), e: Vec::new(), c: Vec::new() };
    let all_names: Vec<String> = spec.states.iter().chain(&spec.inputs).chain(&spec.disturbances).cloned().collect();
    let names = &all_names;
    for (i, f) in spec.dynamics.iter().enumerate() {
        let name = &spec.states[i];
        let parts = affine_parts(f, n + p + d).map_err(|culprit| NotLinear {
            path: format!("dynamics.{name}"),
            text: spec.doc.dynamics.get(name).cloned().unwrap_or_default(),
            culprit: render(&culprit, names),
            needs: "dynamics affine in states, inputs and disturbances",
        })?;
        plant.a.push(parts.coeffs[..n].to_vec());
        plant.b.push(parts.coeffs[n..n + p].to_vec());
        plant.e.push(parts.coeffs[n + p..].to_vec());
        plant.c.push(parts.constant);
    }
    let mut observations = Vec::new();
    for (j, o) in spec.observations.iter().enumerate() {
        observations.push(affine_parts(&o.expr, n).map_err(|culprit| NotLinear {
            path: format!("controller.observations[{j}].expr"),
            text: spec.doc.controller.observations[j].expr.clone(),
            culprit: render(&culprit, names),
            needs: "observations affine in the states",
        })?);
    }
    let mut unsafe_regions = Vec::new();
    for (r, conj) in spec.unsafe_set.iter().enumerate() {
        let mut region = Vec::new();
        for (k, c) in conj.iter().enumerate() {
            region.push(affine_parts(&c.g, n).map_err(|culprit| NotLinear {
                path: format!("unsafe[{r}].all[{k}]"),
                text: c.text.clone(),
                culprit: render(&culprit, names),
                needs: "unsafe regions that are conjunctions of linear inequalities",
            })?);
        }
        unsafe_regions.push(region);
    }
    Ok(LinearLoop { plant, observations, unsafe_regions })
}

/// A dense matrix of intervals, row-major.
pub type IMat = Vec<Vec<Interval>>;

fn identity(n: usize) -> IMat {
    (0..n).map(|i| (0..n).map(|j| if i == j { Interval::ONE } else { Interval::ZERO }).collect()).collect()
}

/// `x · y`, outward rounded.
pub fn mat_mul(x: &IMat, y: &IMat) -> IMat {
    let (n, k, m) = (x.len(), y.len(), y.first().map_or(0, |r| r.len()));
    (0..n)
        .map(|i| {
            (0..m)
                .map(|j| (0..k).fold(Interval::ZERO, |s, l| s + x[i][l] * y[l][j]))
                .collect()
        })
        .collect()
}

/// Upper bound on the ∞-norm (largest row sum of magnitudes).
pub fn norm_inf(x: &IMat) -> f64 {
    x.iter()
        .map(|row| row.iter().fold(Interval::ZERO, |s, v| s + Interval::point(v.mag())).hi())
        .fold(0.0, f64::max)
}

/// Enclosures of `Φ(τ) = e^{Aτ}` and `Γ(τ) = ∫_0^τ e^{As} ds` valid for every `τ` in
/// `tau` (which must lie in `[0, ∞)`; a point for one step, `[0, h]` for every time
/// within a step). Requires `‖A‖∞·max τ ≤ 1/2` (the caller cuts the step); `None`
/// otherwise or if anything is not finite.
///
/// Series: `Φ = Σ_{k≤K} A^k τ^k / k! + R`, `Γ = Σ_{k≤K} A^k τ^{k+1} / (k+1)! + R'` with
/// `|R|, |R'|/τ ≤ q^{K+1} / (K+1)! · 1/(1 − q/(K+2))` entrywise, `q = ‖A‖∞ τ` (the tail
/// of the exponential series bounds every entry, as the ∞-norm bounds each entry's
/// magnitude).
pub fn discretise(a: &IMat, tau: Interval) -> Option<(IMat, IMat)> {
    const K: usize = 18;
    let n = a.len();
    if tau.is_undefined() || tau.lo() < 0.0 || !tau.is_bounded() {
        return None;
    }
    let t = tau.hi();
    let q = Interval::point(norm_inf(a)) * Interval::point(t);
    if !(q.hi() <= 0.5) {
        return None;
    }
    let mut phi = identity(n);
    let mut gamma: IMat = identity(n).into_iter().map(|r| r.into_iter().map(|v| v * tau).collect()).collect();
    // term_k = A^k / k!
    let mut term = identity(n);
    for k in 1..=K {
        term = mat_mul(&term, a).into_iter().map(|r| r.into_iter().map(|v| v / Interval::point(k as f64)).collect()).collect();
        let tk = tau.powi(k as i32);
        let tk1 = tau.powi(k as i32 + 1) / Interval::point((k + 1) as f64);
        for i in 0..n {
            for j in 0..n {
                phi[i][j] = phi[i][j] + term[i][j] * tk;
                gamma[i][j] = gamma[i][j] + term[i][j] * tk1;
            }
        }
    }
    // Remainder bound: q^{K+1}/(K+1)! / (1 − q/(K+2)), rounded up.
    let mut rem = Interval::ONE;
    for k in 1..=(K + 1) {
        rem = rem * q / Interval::point(k as f64);
    }
    rem = rem / (Interval::ONE - q / Interval::point((K + 2) as f64));
    let r = rem.hi();
    let rg = (Interval::point(r) * Interval::point(t)).hi();
    let widen = |v: Interval, r: f64| Interval::new(v.lo(), v.hi()) + Interval::new(-r, r);
    let phi: IMat = phi.into_iter().map(|row| row.into_iter().map(|v| widen(v, r)).collect()).collect();
    let gamma: IMat = gamma.into_iter().map(|row| row.into_iter().map(|v| widen(v, rg)).collect()).collect();
    let finite = |m: &IMat| m.iter().flatten().all(|v| v.is_bounded() && !v.is_undefined());
    (finite(&phi) && finite(&gamma)).then_some((phi, gamma))
}

/// Sub-steps per period so that `‖A‖∞ · T / m ≤ 1/2`, at least `at_least`.
pub fn substeps_for(a: &IMat, period: f64, at_least: u32) -> u32 {
    let need = (Interval::point(norm_inf(a)) * Interval::point(period) * Interval::point(2.0)).hi().ceil();
    if !need.is_finite() {
        return u32::MAX;
    }
    (need as u32).max(at_least).max(1)
}

#[cfg(test)]
mod tests {
    use super::*;
    use crate::expr;

    fn parts(src: &str, names: &[&str]) -> Result<AffineParts, String> {
        let e = expr::parse(src, &|s| names.iter().position(|n| *n == s)).unwrap();
        let owned: Vec<String> = names.iter().map(|s| s.to_string()).collect();
        affine_parts(&e, names.len()).map_err(|c| render(&c, &owned))
    }

    #[test]
    fn affine_expressions_are_recognised() {
        let p = parts("2*x - y/4 + 3*(u - 1) + sin(0)", &["x", "y", "u"]).unwrap();
        // Interval operations are widened one ulp, so the values are thin enclosures.
        for (got, want) in p.coeffs.iter().zip([2.0, -0.25, 3.0]).chain([(&p.constant, -3.0)]) {
            assert!(got.contains(want) && got.width() < 1e-14, "{got:?} for {want}");
        }
        // 0.1 is not a binary fraction: its coefficient is a thin interval holding 1/10.
        let p = parts("-0.1 * x", &["x"]).unwrap();
        assert!(p.coeffs[0].lo() < -0.1 && p.coeffs[0].hi() > -0.1 - 1e-16 && p.coeffs[0].width() < 1e-15, "{:?}", p.coeffs[0]);
    }

    #[test]
    fn nonlinear_parts_are_named() {
        assert_eq!(parts("x + 2*x*y", &["x", "y"]).unwrap_err(), "2 * x * y");
        assert_eq!(parts("x - (x + 1)*(y - 2)", &["x", "y"]).unwrap_err(), "(x + 1) * (y - 2)");
        assert!(parts("sin(x) + 1", &["x"]).is_err());
        assert!(parts("1 / x", &["x"]).is_err());
        assert!(parts("x^2", &["x"]).is_err());
        assert!(parts("x / (1 - 1)", &["x"]).is_err());
    }

    #[test]
    fn exponential_of_a_diagonal_matrix_holds_the_scalar_exponentials() {
        // e^{aτ} and (e^{aτ} − 1)/a in closed form (exp rounded by libm, compared with slack).
        let a = vec![vec![Interval::point(-1.5), Interval::ZERO], vec![Interval::ZERO, Interval::point(0.25)]];
        let (phi, gamma) = discretise(&a, Interval::point(0.2)).unwrap();
        for (i, l) in [-1.5f64, 0.25].iter().enumerate() {
            let e = (l * 0.2).exp();
            assert!(phi[i][i].inflate(1e-15).contains(e) && phi[i][i].width() < 1e-14, "{:?}", phi[i][i]);
            assert!(gamma[i][i].inflate(1e-15).contains((e - 1.0) / l) && gamma[i][i].width() < 1e-14);
            assert!(phi[i][1 - i].contains(0.0) && phi[i][1 - i].width() < 1e-15);
        }
        assert!(discretise(&a, Interval::point(1.0)).is_none(), "norm 1.5 > 1/2 must be refused");
        // A range of times holds the value at every time in it.
        let (phi_r, _) = discretise(&a, Interval::new(0.0, 0.2)).unwrap();
        for t in [0.0, 0.05, 0.2] {
            assert!(phi_r[0][0].contains((-1.5f64 * t).exp()));
        }
    }
}
