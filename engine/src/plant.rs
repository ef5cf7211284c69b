//! The plant: validated integration of `dx/dt = f(x, u, w)` over one control period.
//!
//! Method (one sub-step of length `h`, from the state set `X`):
//! 1. **A-priori enclosure.** A box `B` with `hull(X) + [0, h]·f(B, u, W) ⊆ B` (the
//!    Picard–Lindelöf test, with the full disturbance box `W`). Because the inclusion
//!    holds for the convex hull of `f` over `B × W`, every solution with any measurable
//!    `w(t) ∈ W` stays in `B` on `[0, h]`; the interval Jacobian of `f` over `B × W` is
//!    required to be bounded, so `f` is Lipschitz there and solutions are unique.
//! 2. **Nominal flow.** With `w` fixed at the midpoint `w_c`, the Taylor polynomial of
//!    order `K − 1` is evaluated in affine arithmetic over `X` (keeping the dependence on
//!    the initial symbols), plus the Lagrange remainder `x_[K](B)·h^K` in interval
//!    arithmetic over `B`.
//! 3. **Disturbance deviation.** `e = x − y` (true minus nominal, same start) satisfies
//!    `e' ∈ J_x(B, W)·e + J_w(B, W)·(W − w_c)`, `e(0) = 0` (mean-value theorem on the
//!    convex `B × W`; the select nodes of [`Expr::diff`] keep kinks sound). A box `E`
//!    with `[0, h]·(J_x E + J_w (W − w_c)) ⊆ E` encloses `e` on `[0, h]`; it is added as
//!    fresh symbols. This is sound for time-varying disturbances. At `t = h` the second
//!    Picard iterate `e(h) ∈ h·d + (h²/2)·J_x·(J_x E + d)` (with `d = J_w (W − w_c)`)
//!    is intersected in, which removes most of the overestimate of `E` on stable
//!    dynamics.
//! 4. **Order reduction** to `generators_per_dim · n` generators.
//!
//! Kinks: when `abs`/`min`/`max` may switch inside `B`, the step falls back to order 2
//! for Lipschitz right-hand sides (`x₀ + t·f(x₀) + (t²/2)·J(B)·f(B)`, see
//! `taylor_lipschitz`), and to order 1 (`X + h·f(B)`), which needs no derivative, if
//! that fails. Sub-steps start at `period / substeps`,
//! are halved when the a-priori enclosure (or a defined value) cannot be found, and the
//! period is given up beyond `max_substeps` sub-steps. Sub-step boundaries are doubles;
//! each step's duration is the outward-rounded interval between them, and the last
//! boundary is `period` itself, so the end set is exactly at `t = period`.

use super::affine::{mid_rad, Affine, StateSet};
use super::expr::{self, Expr};
use super::interval::Interval;
use super::spec::{EngineOptions, Spec};
use super::taylor::{ode_coefficients, TaylorFault};

/// Why a period could not be enclosed. Every variant means "inconclusive", never unsafe.
#[derive(Clone, Debug, PartialEq, thiserror::Error)]
pub enum PlantError {
    #[error("no a-priori enclosure found at the smallest sub-step ({step:e} s) at t = {t} s into the period")]
    NoEnclosure { t: f64, step: f64 },
    #[error("the dynamics are undefined (NaN) or unbounded on the enclosure at t = {t} s into the period: {what}")]
    Undefined { t: f64, what: String },
    #[error("more than {max_substeps} sub-steps needed in one period")]
    StepLimit { max_substeps: u32 },
    #[error("invalid argument: {0}")]
    BadArgument(String),
}

/// One piece of the tube: every trajectory is in `enclosure` (and in `hull`) for all
/// times in `t` (seconds from the start of the period).
#[derive(Clone, Debug)]
pub struct TubePiece {
    pub t: Interval,
    pub enclosure: StateSet,
    pub hull: Vec<Interval>,
}

/// The result of one period: the set at `t = period` and the tube covering `[0, period]`.
#[derive(Clone, Debug)]
pub struct PeriodFlow {
    pub end: StateSet,
    pub tube: Vec<TubePiece>,
}

/// How [`Plant::integrate_period_in`] sees the set between sub-steps.
pub struct SubstepView<'a> {
    /// A box containing every point of the set (sound hull).
    pub hull: &'a dyn Fn(&StateSet) -> Vec<Interval>,
    /// Symbols the per-sub-step reduction keeps.
    pub protect: &'a dyn Fn(usize) -> bool,
    /// Generator limit of the per-sub-step reduction.
    pub max_gens: usize,
}

impl SubstepView<'static> {
    /// The plain view: the zonotope's own box, the engine's generator limit.
    pub fn plain(opts: &EngineOptions, n: usize) -> SubstepView<'static> {
        SubstepView { hull: &|x: &StateSet| x.to_box(), protect: &|_| false, max_gens: (opts.generators_per_dim.max(1) as usize) * n }
    }
}

/// Finest sub-step at a kink, as a fraction of the nominal one.
const KINK_SPLIT: u64 = 8;

/// The continuous plant `dx/dt = f(x, u, w)`.
#[derive(Clone, Debug)]
pub struct Plant {
    n: usize,
    m: usize,
    p: usize,
    /// `f` over the symbols states, inputs, disturbances.
    f: Vec<Expr>,
    /// `∂f_i/∂x_j`.
    jx: Vec<Vec<Expr>>,
    /// `∂f_i/∂w_l`.
    jw: Vec<Vec<Expr>>,
}

/// Internal failure of one sub-step attempt.
enum StepFail {
    NoEnclosure,
    Undefined(String),
}

impl Plant {
    /// The plant of a validated spec (dynamics symbol layout: states, inputs, disturbances).
    pub fn new(spec: &Spec) -> Result<Plant, PlantError> {
        if spec.dynamics.len() != spec.states.len() {
            return Err(PlantError::BadArgument(format!(
                "{} dynamics expressions for {} states",
                spec.dynamics.len(),
                spec.states.len()
            )));
        }
        Ok(Plant::from_exprs(spec.states.len(), spec.inputs.len(), spec.disturbances.len(), spec.dynamics.clone()))
    }

    /// A plant from right-hand sides given as text over the names `states`, `inputs`,
    /// `disturbances` (for tests and benchmarks).
    pub fn from_text(states: &[&str], inputs: &[&str], disturbances: &[&str], rhs: &[&str]) -> Result<Plant, PlantError> {
        if rhs.len() != states.len() {
            return Err(PlantError::BadArgument(format!("{} right-hand sides for {} states", rhs.len(), states.len())));
        }
        let names: Vec<&str> = states.iter().chain(inputs).chain(disturbances).copied().collect();
        let resolve = |s: &str| names.iter().position(|n| *n == s);
        let f = rhs
            .iter()
            .enumerate()
            .map(|(i, src)| {
                expr::parse(src, &resolve).map_err(|e| PlantError::BadArgument(format!("dynamics of '{}': {e}", states[i])))
            })
            .collect::<Result<Vec<Expr>, PlantError>>()?;
        Ok(Plant::from_exprs(states.len(), inputs.len(), disturbances.len(), f))
    }

    fn from_exprs(n: usize, m: usize, p: usize, f: Vec<Expr>) -> Plant {
        let jx = f.iter().map(|fi| (0..n).map(|j| fi.diff(j)).collect()).collect();
        let jw = f.iter().map(|fi| (0..p).map(|l| fi.diff(n + m + l)).collect()).collect();
        Plant { n, m, p, f, jx, jw }
    }

    /// The switching functions of the right-hand side's kinks that depend on the states
    /// only (symbols `0..n`), with their time derivatives along the flow under given
    /// inputs and disturbances: `(g, ġ)` with `ġ = Σ_j ∂g/∂x_j · f_j`.
    pub fn state_kinks(&self) -> Vec<(Expr, Expr)> {
        let mut args: Vec<Expr> = Vec::new();
        for fi in &self.f {
            for g in fi.kink_arguments() {
                let state_only = (self.n..self.n + self.m + self.p).all(|j| !g.uses(j));
                if state_only && (0..self.n).any(|j| g.uses(j)) && !args.contains(&g) {
                    args.push(g);
                }
            }
        }
        args.into_iter()
            .map(|g| {
                let mut rate: Option<Expr> = None;
                for j in 0..self.n {
                    if !g.uses(j) {
                        continue;
                    }
                    let term = Expr::Mul(Box::new(g.diff(j)), Box::new(self.f[j].clone()));
                    rate = Some(match rate {
                        Some(r) => Expr::Add(Box::new(r), Box::new(term)),
                        None => term,
                    });
                }
                (g, rate.unwrap_or(Expr::Num(expr::Number::exact(0.0))))
            })
            .collect()
    }

    /// Number of states.
    pub fn dim(&self) -> usize {
        self.n
    }
    /// Number of inputs.
    pub fn num_inputs(&self) -> usize {
        self.m
    }
    /// Number of disturbances.
    pub fn num_disturbances(&self) -> usize {
        self.p
    }

    /// Encloses one control period.
    ///
    /// Guarantee (on `Ok`): for every initial state in `x0`, the inputs held at
    /// `inputs` (exact doubles), and every measurable disturbance signal with
    /// `w(t) ∈ dist` for all `t`, the solution at `t = period` lies in `end`, and at
    /// every `t` in a tube piece's `t` it lies in that piece's `enclosure` and `hull`.
    /// The pieces cover `[0, period]` in order. `end` shares the initial symbols of
    /// `x0` (coefficients on them are sensitivities); its other symbols are fresh.
    /// Errors are "inconclusive" results, never claims.
    pub fn integrate_period(
        &self,
        x0: &StateSet,
        inputs: &[f64],
        dist: &[Interval],
        period: f64,
        opts: &EngineOptions,
    ) -> Result<PeriodFlow, PlantError> {
        self.integrate_period_in(x0, inputs, dist, period, opts, &SubstepView::plain(opts, self.n))
    }

    /// [`Plant::integrate_period`] for a set whose symbols carry constraints kept
    /// elsewhere: `view.hull` gives the box that the a-priori enclosure starts from (it
    /// must contain every point of the set the caller stands for, e.g. a hull computed
    /// under the constraints), and the reduction after each sub-step keeps the symbols
    /// `view.protect` names, up to `view.max_gens` generators. Same guarantee.
    pub fn integrate_period_in(
        &self,
        x0: &StateSet,
        inputs: &[f64],
        dist: &[Interval],
        period: f64,
        opts: &EngineOptions,
        view: &SubstepView<'_>,
    ) -> Result<PeriodFlow, PlantError> {
        self.check_args(x0, inputs, dist, period, opts)?;
        let order = opts.taylor_order.clamp(1, 12) as usize;
        let substeps = opts.substeps.max(1) as u64;
        let max_substeps = opts.max_substeps.max(opts.substeps).max(1);
        // Ticks: the finest grid, fine enough for max_substeps equal steps.
        let mut level = 0u32;
        while substeps << level < max_substeps as u64 && level < 30 {
            level += 1;
        }
        let total = substeps << level;
        let time_at = |tick: u64| -> f64 {
            if tick >= total {
                period
            } else {
                period * (tick as f64) / (total as f64)
            }
        };
        let nominal_step = 1u64 << level;
        let mut step = nominal_step;
        let mut pos = 0u64;
        let mut steps_taken = 0u32;
        let mut successes_at_step = 0u32;
        let mut x = x0.clone();
        let mut tube = Vec::new();
        let u: Vec<Interval> = inputs.iter().map(|&v| Interval::point(v)).collect();
        while pos < total {
            let s = step.min(total - pos);
            let (t0, t1) = (time_at(pos), time_at(pos + s));
            let h = Interval::point(t1) - Interval::point(t0);
            let result = self.step(&x, &(view.hull)(&x), &u, dist, h, Interval::new(t0, t1), order);
            // A step across a kink has only an order-2 (or order-1) remainder, which
            // shrinks with the square of the step: take smaller steps there, down to an
            // eighth of the nominal one.
            if let Ok((_, _, true, _)) = &result {
                if s > 1 && s > nominal_step / KINK_SPLIT {
                    step = s / 2;
                    successes_at_step = 0;
                    continue;
                }
            }
            match result {
                Ok((mut next, piece, _, b)) => {
                    steps_taken += 1;
                    if steps_taken > max_substeps {
                        return Err(PlantError::StepLimit { max_substeps });
                    }
                    // Every solution stays in the a-priori box B for the whole step, so
                    // the end set may be narrowed to B (through symbols minted here, whose
                    // meaning no one else relies on).
                    next.reduce_keeping(view.max_gens, view.protect);
                    let n_init = x0.num_initial();
                    if let Some(narrow) = next.contract_to_box(&b, &|s| s >= n_init && !(view.protect)(s)) {
                        next = narrow;
                    }
                    x = next;
                    tube.push(piece);
                    pos += s;
                    successes_at_step += 1;
                    // Grow back towards the nominal step when aligned and going well.
                    if successes_at_step >= 2 && step < nominal_step && pos % (2 * step) == 0 {
                        step *= 2;
                        successes_at_step = 0;
                    }
                }
                Err(fail) => {
                    if s <= 1 {
                        return Err(match fail {
                            StepFail::NoEnclosure => PlantError::NoEnclosure { t: t0, step: t1 - t0 },
                            StepFail::Undefined(what) => PlantError::Undefined { t: t0, what },
                        });
                    }
                    step = s / 2;
                    successes_at_step = 0;
                }
            }
        }
        Ok(PeriodFlow { end: x, tube })
    }

    fn check_args(&self, x0: &StateSet, inputs: &[f64], dist: &[Interval], period: f64, opts: &EngineOptions) -> Result<(), PlantError> {
        if x0.dim() != self.n {
            return Err(PlantError::BadArgument(format!("state set has {} dimensions, the plant {}", x0.dim(), self.n)));
        }
        if inputs.len() != self.m {
            return Err(PlantError::BadArgument(format!("{} input values for {} inputs", inputs.len(), self.m)));
        }
        if let Some(k) = inputs.iter().position(|v| !v.is_finite()) {
            return Err(PlantError::BadArgument(format!("input {k} is not finite")));
        }
        if dist.len() != self.p {
            return Err(PlantError::BadArgument(format!("{} disturbance ranges for {} disturbances", dist.len(), self.p)));
        }
        if let Some(k) = dist.iter().position(|w| w.is_undefined() || !w.is_bounded()) {
            return Err(PlantError::BadArgument(format!("disturbance range {k} is not a bounded interval")));
        }
        if !(period.is_finite() && period > 0.0) {
            return Err(PlantError::BadArgument(format!("period {period} is not a positive number")));
        }
        if opts.taylor_order == 0 {
            return Err(PlantError::BadArgument("taylor_order must be at least 1".into()));
        }
        Ok(())
    }

    /// Interval evaluation of `f` over a box of states, with inputs and disturbances.
    fn f_box(&self, b: &[Interval], u: &[Interval], w: &[Interval]) -> Vec<Interval> {
        let vars: Vec<Interval> = b.iter().chain(u).chain(w).copied().collect();
        self.f.iter().map(|fi| fi.eval_interval(&vars)).collect()
    }

    /// Picard–Lindelöf: a box `B ⊇ X + [0, h]·f(B, u, W)`, refined by iteration.
    fn a_priori(&self, xb: &[Interval], u: &[Interval], w: &[Interval], hmax: f64) -> Result<Vec<Interval>, StepFail> {
        let t = Interval::new(0.0, hmax);
        let image = |b: &[Interval]| -> Vec<Interval> {
            let fb = self.f_box(b, u, w);
            xb.iter().zip(&fb).map(|(x, f)| *x + t * *f).collect()
        };
        let inflate = |b: &[Interval]| -> Vec<Interval> {
            b.iter().map(|iv| iv.inflate(0.1 * iv.width() + 1e-12 * (1.0 + iv.mag()))).collect()
        };
        let first = image(xb);
        if first.iter().any(|i| i.is_undefined() || !i.is_bounded()) {
            return Err(StepFail::Undefined("f over the current hull".into()));
        }
        let mut b = inflate(&first);
        for _ in 0..12 {
            let img = image(&b);
            if img.iter().any(|i| i.is_undefined() || !i.is_bounded()) {
                return Err(StepFail::Undefined("f over a candidate a-priori box".into()));
            }
            if img.iter().zip(&b).all(|(i, bb)| i.subset_of(bb)) {
                // `img` is itself an enclosure (trajectories stay in `b`); refine twice.
                let mut enc = img;
                for _ in 0..2 {
                    let r = image(&enc);
                    if r.iter().any(|i| i.is_undefined()) {
                        break;
                    }
                    enc = enc.iter().zip(&r).map(|(a, r)| a.intersect(r).unwrap_or(*a)).collect();
                }
                return Ok(enc);
            }
            let grown: Vec<Interval> = b.iter().zip(&img).map(|(a, i)| a.hull(i)).collect();
            b = inflate(&grown);
        }
        Err(StepFail::NoEnclosure)
    }

    /// Interval Jacobians `J_x`, `J_w` over `B × W`.
    fn jacobians(&self, b: &[Interval], u: &[Interval], w: &[Interval]) -> (Vec<Vec<Interval>>, Vec<Vec<Interval>>) {
        let vars: Vec<Interval> = b.iter().chain(u).chain(w).copied().collect();
        let jx = self.jx.iter().map(|row| row.iter().map(|e| e.eval_interval(&vars)).collect()).collect();
        let jw = self.jw.iter().map(|row| row.iter().map(|e| e.eval_interval(&vars)).collect()).collect();
        (jx, jw)
    }

    /// A box `E ∋ 0` with `[0, h]·(J_x E + d) ⊆ E`: encloses the deviation caused by the
    /// disturbance (`d = J_w·(W − w_c)`).
    fn deviation_box(&self, jx: &[Vec<Interval>], d: &[Interval], hmax: f64) -> Result<Vec<Interval>, StepFail> {
        let t = Interval::new(0.0, hmax);
        let image = |e: &[Interval]| -> Vec<Interval> {
            (0..self.n)
                .map(|i| {
                    let mut s = d[i];
                    for j in 0..self.n {
                        s = s + jx[i][j] * e[j];
                    }
                    t * s
                })
                .collect()
        };
        let inflate = |b: &[Interval]| -> Vec<Interval> {
            b.iter().map(|iv| iv.inflate(0.1 * iv.width() + 1e-15 * (1.0 + iv.mag()))).collect()
        };
        let zero = vec![Interval::ZERO; self.n];
        let mut e = inflate(&image(&zero));
        for _ in 0..12 {
            let img = image(&e);
            if img.iter().any(|i| i.is_undefined() || !i.is_bounded()) {
                return Err(StepFail::Undefined("disturbance deviation".into()));
            }
            if img.iter().zip(&e).all(|(i, b)| i.subset_of(b)) {
                let mut enc = img;
                let r = image(&enc);
                if r.iter().all(|i| !i.is_undefined()) {
                    enc = enc.iter().zip(&r).map(|(a, r)| a.intersect(r).unwrap_or(*a)).collect();
                }
                return Ok(enc);
            }
            let grown: Vec<Interval> = e.iter().zip(&img).map(|(a, i)| a.hull(i)).collect();
            e = inflate(&grown);
        }
        Err(StepFail::NoEnclosure)
    }

    /// One validated sub-step of duration `h` (an enclosure of the exact duration).
    #[allow(clippy::too_many_arguments)]
    fn step(
        &self,
        x: &StateSet,
        xb: &[Interval],
        u: &[Interval],
        w: &[Interval],
        h: Interval,
        span: Interval,
        order: usize,
    ) -> Result<(StateSet, TubePiece, bool, Vec<Interval>), StepFail> {
        let n = self.n;
        // Written so that a NaN duration is rejected too.
        let positive = h.lo() > 0.0;
        if h.is_undefined() || !positive {
            return Err(StepFail::Undefined("step duration".into()));
        }
        let hmax = h.hi();
        if xb.iter().any(|i| i.is_undefined() || !i.is_bounded()) {
            return Err(StepFail::Undefined("state set".into()));
        }
        let b = self.a_priori(xb, u, w, hmax)?;
        let (jx, jw) = self.jacobians(&b, u, w);
        if jx.iter().flatten().chain(jw.iter().flatten()).any(|j| j.is_undefined() || !j.is_bounded()) {
            return Err(StepFail::Undefined("Jacobian of f over the a-priori box (f not Lipschitz there)".into()));
        }
        // Nominal disturbance: the midpoint, an exact double inside W.
        let wc: Vec<Interval> = w.iter().map(|wi| Interval::point(wi.mid())).collect();
        let params_i: Vec<Interval> = u.iter().chain(&wc).copied().collect();
        let params_a: Vec<Affine> = params_i.iter().map(|&p| Affine::from_interval(p)).collect();

        // Taylor coefficients; fall back to order 1 when a kink may be crossed.
        let mut kink = false;
        let (k, poly, rem) = match self.taylor(x, &b, &params_a, &params_i, order) {
            Ok(r) => r,
            Err(TaylorFault::NotSmooth) => match self.taylor_lipschitz(x, &b, &params_a, &params_i) {
                Ok(r) => {
                    kink = true;
                    r
                }
                Err(_) => self.taylor(x, &b, &params_a, &params_i, 1).map_err(fault_to_fail)?,
            },
            Err(f) => return Err(fault_to_fail(f)),
        };

        // Disturbance deviation box.
        let dev = if self.p > 0 && w.iter().any(|wi| wi.lo() != wi.hi()) {
            let d: Vec<Interval> = (0..n)
                .map(|i| {
                    let mut s = Interval::ZERO;
                    for l in 0..self.p {
                        s = s + jw[i][l] * (w[l] - wc[l]);
                    }
                    s
                })
                .collect();
            let e_all = self.deviation_box(&jx, &d, hmax)?;
            // At the end of the step a second Picard iterate is tighter: e(s) ∈ s·V with
            // V = J_x E + d, so e(h) ∈ h·d + (h²/2)·J_x·V.
            let half_h2 = h.sqr() * Interval::point(0.5);
            let v: Vec<Interval> = (0..n)
                .map(|i| (0..n).fold(d[i], |s, j| s + jx[i][j] * e_all[j]))
                .collect();
            let e_end: Vec<Interval> = (0..n)
                .map(|i| {
                    let jv = (0..n).fold(Interval::ZERO, |s, j| s + jx[i][j] * v[j]);
                    let r = h * d[i] + half_h2 * jv;
                    r.intersect(&e_all[i]).unwrap_or(e_all[i])
                })
                .collect();
            Some((e_all, e_end))
        } else {
            None
        };

        // End of step: Horner in the exact duration, remainder x_[K](B)·h^K.
        let hk = h.powi(k as i32);
        let t_all = Interval::new(0.0, hmax);
        let tk = t_all.powi(k as i32);
        let mut end = Vec::with_capacity(n);
        let mut mid = Vec::with_capacity(n);
        for i in 0..n {
            let e = horner(&poly[i], h).add_interval(rem[i] * hk);
            let m = horner(&poly[i], t_all).add_interval(rem[i] * tk);
            if e.is_undefined() || m.is_undefined() {
                return Err(StepFail::Undefined(format!("Taylor expansion of state {i}")));
            }
            end.push(e);
            mid.push(m);
        }
        let mut end = StateSet::from_forms(end, x.num_symbols(), x.num_initial());
        if let Some((_, dev_end)) = &dev {
            end.add_box(dev_end);
        }
        // The tube uses the same deviation symbols (any value in E is allowed anyway).
        let mut tube_set = StateSet::from_forms(mid, end.num_symbols(), x.num_initial());
        if let Some((dev, _)) = &dev {
            let first_dev = end.num_symbols() - n;
            let comps: Vec<Affine> = tube_set
                .components()
                .iter()
                .enumerate()
                .map(|(i, a)| match mid_rad(dev[i]) {
                    Some((c, r)) => a.add(&Affine::symbol(c, first_dev + i, r)),
                    None => Affine::undefined(),
                })
                .collect();
            tube_set = StateSet::from_forms(comps, end.num_symbols(), x.num_initial());
        }
        if end.is_undefined() || tube_set.is_undefined() {
            return Err(StepFail::Undefined("state set after the step".into()));
        }
        let hull: Vec<Interval> = tube_set.to_box().iter().zip(&b).map(|(a, bb)| a.intersect(bb).unwrap_or(*bb)).collect();
        Ok((end, TubePiece { t: span, enclosure: tube_set, hull }, kink, b))
    }

    /// Order 2 where a kink may be met (f only Lipschitz): `x(t) ∈ x₀ + t·f(x₀) +
    /// (t²/2)·J(B)·f(B)`. Because `x(t) − x₀ − t·f(x₀) = ∫₀ᵗ (f(x(s)) − f(x₀)) ds`, the
    /// mean-value inclusion for Lipschitz maps (Clarke's generalised Jacobian, enclosed
    /// by the interval Jacobian `J(B)` whose select nodes take the hull at kinks) gives
    /// `f(x(s)) − f(x₀) ∈ J(B)·(x(s) − x₀)`, and `x(s) − x₀ ∈ s·f(B)` because the
    /// solution stays in `B`; integrating `s` gives `t²/2`. The first two coefficients
    /// are affine over `X` (they need no derivative), the remainder interval over `B`.
    #[allow(clippy::type_complexity)]
    fn taylor_lipschitz(
        &self,
        x: &StateSet,
        b: &[Interval],
        params_a: &[Affine],
        params_i: &[Interval],
    ) -> Result<(usize, Vec<Vec<Affine>>, Vec<Interval>), TaylorFault> {
        let poly = ode_coefficients(&self.f, x.components(), params_a, 1)?;
        let vars: Vec<Interval> = b.iter().chain(params_i).copied().collect();
        let fb: Vec<Interval> = self.f.iter().map(|fi| fi.eval_interval(&vars)).collect();
        let half = Interval::point(0.5);
        let rem: Vec<Interval> = (0..self.n)
            .map(|i| (0..self.n).fold(Interval::ZERO, |s, j| s + self.jx[i][j].eval_interval(&vars) * fb[j]) * half)
            .collect();
        if rem.iter().any(|r| r.is_undefined() || !r.is_bounded()) {
            return Err(TaylorFault::Undefined);
        }
        Ok((2, poly, rem))
    }

    /// Affine coefficients `0..K` over `X` and the interval coefficient `K` over `B`.
    #[allow(clippy::type_complexity)]
    fn taylor(
        &self,
        x: &StateSet,
        b: &[Interval],
        params_a: &[Affine],
        params_i: &[Interval],
        order: usize,
    ) -> Result<(usize, Vec<Vec<Affine>>, Vec<Interval>), TaylorFault> {
        let poly = ode_coefficients(&self.f, x.components(), params_a, order - 1)?;
        let rem_all = ode_coefficients(&self.f, b, params_i, order)?;
        let rem: Vec<Interval> = rem_all.iter().map(|c| c[order]).collect();
        if rem.iter().any(|r| r.is_undefined() || !r.is_bounded()) {
            return Err(TaylorFault::Undefined);
        }
        Ok((order, poly, rem))
    }

    /// Plain fixed-step RK4 in f64 with constant inputs and disturbances; returns the
    /// `steps + 1` states from `t = 0` to `t = period` (at least one step). A simulation
    /// for the falsifier, not a bound.
    pub fn simulate_period(&self, x0: &[f64], inputs: &[f64], dist: &[f64], period: f64, steps: u32) -> Vec<Vec<f64>> {
        let steps = steps.max(1);
        let h = period / steps as f64;
        let mut vars: Vec<f64> = x0.iter().chain(inputs).chain(dist).copied().collect();
        let n = self.n;
        let f = |vars: &[f64]| -> Vec<f64> { self.f.iter().map(|fi| fi.eval_f64(vars)).collect() };
        let mut out = vec![x0.to_vec()];
        let mut tmp = vars.clone();
        for _ in 0..steps {
            let k1 = f(&vars);
            for i in 0..n {
                tmp[i] = vars[i] + 0.5 * h * k1[i];
            }
            let k2 = f(&tmp);
            for i in 0..n {
                tmp[i] = vars[i] + 0.5 * h * k2[i];
            }
            let k3 = f(&tmp);
            for i in 0..n {
                tmp[i] = vars[i] + h * k3[i];
            }
            let k4 = f(&tmp);
            for i in 0..n {
                vars[i] += h / 6.0 * (k1[i] + 2.0 * k2[i] + 2.0 * k3[i] + k4[i]);
            }
            out.push(vars[..n].to_vec());
        }
        out
    }
}

fn fault_to_fail(f: TaylorFault) -> StepFail {
    match f {
        TaylorFault::Undefined => StepFail::Undefined("Taylor coefficients".into()),
        TaylorFault::NotSmooth => StepFail::Undefined("Taylor coefficients at a kink".into()),
    }
}

/// `Σ_k c_k t^k` by Horner's rule for a time `t` known to lie in an interval.
fn horner(c: &[Affine], t: Interval) -> Affine {
    let mut acc = c[c.len() - 1].clone();
    for k in (0..c.len() - 1).rev() {
        acc = acc.mul_interval(t).add(&c[k]);
    }
    acc
}
