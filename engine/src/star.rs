//! Constrained zonotopes: a [`StateSet`] (affine forms over symbols `ε ∈ [−1, 1]^K`)
//! together with linear constraints `a·ε ≤ b` on its symbols.
//!
//! Set semantics: `{ x(ε) : ε ∈ [−1, 1]^K, a_i·ε ≤ b_i for every constraint i }`, with
//! `x(ε)` the zonotope's value (error radii included). A constraint may mention a
//! symbol that no component uses any more: that symbol is then simply existentially
//! quantified, which is sound (the set is a projection).
//!
//! This is how a branch of the command tree remembers where its command may be chosen
//! without losing the dependence on the cell: the decision "command c beats command j"
//! becomes a linear constraint on the symbols (from the network's linear bounds),
//! instead of a box. Bounds over the set are linear programs; they are made rigorous by
//! duality ([`super::lp`]), so the simplex that finds the multipliers is never trusted.
//!
//! Guarantee of every operation: the result contains every point of the input set
//! (restrictions remove only points that violate a constraint proven necessary by the
//! caller).

use super::affine::{mid_rad, Affine, StateSet};
use super::interval::Interval;
use super::lp::{self, Lp};

/// One linear constraint `Σ a_s ε_s ≤ rhs` on symbols (terms sorted by symbol, no
/// zero coefficient; the coefficients are exact reals).
#[derive(Clone, Debug, PartialEq)]
pub struct Halfspace {
    pub terms: Vec<(usize, f64)>,
    pub rhs: f64,
}

impl Halfspace {
    /// From unsorted terms (merged exactly when a symbol repeats, or the rounding of
    /// the merge is added to `rhs`).
    pub fn new(terms: Vec<(usize, f64)>, rhs: f64) -> Halfspace {
        let mut t = terms;
        t.sort_by_key(|p| p.0);
        let mut merged: Vec<(usize, f64)> = Vec::with_capacity(t.len());
        let mut slack = Interval::point(rhs);
        for (s, g) in t {
            if let Some(last) = merged.last_mut() {
                if last.0 == s {
                    let sum = Interval::point(last.1) + Interval::point(g);
                    last.1 = sum.mid();
                    slack = slack + Interval::point(sum.rad());
                    continue;
                }
            }
            merged.push((s, g));
        }
        merged.retain(|p| p.1 != 0.0);
        Halfspace { terms: merged, rhs: slack.hi() }
    }

    /// Whether every point of the unit box satisfies it (`Σ|a| ≤ rhs`, rounded up).
    pub fn always_holds(&self) -> bool {
        let s = self.terms.iter().fold(Interval::ZERO, |acc, t| acc + Interval::point(t.1.abs()));
        s.hi() <= self.rhs
    }

    /// The constraint with symbol `s` projected out (`∃ ε_s ∈ [−1, 1]`): `rhs + |a_s|`.
    fn project_out(&mut self, s: usize) {
        if let Ok(k) = self.terms.binary_search_by_key(&s, |t| t.0) {
            let a = self.terms.remove(k).1;
            self.rhs = (Interval::point(self.rhs) + Interval::point(a.abs())).hi();
        }
    }
}

/// A polytope of states `{x : d·x ≤ s for every face (d, s)}` (exact reals).
#[derive(Clone, Debug)]
pub struct Polytope {
    pub faces: Vec<(Vec<f64>, f64)>,
}

impl Polytope {
    /// Whether every state of `star` provably lies in the polytope: for each face,
    /// a rigorous upper bound of `d·x` over the star (an LP) is at most `s`.
    pub fn contains(&self, star: &Star) -> bool {
        let b = star.bounder();
        let comps = star.set.components();
        self.faces.iter().all(|(d, s)| {
            let mut f = Affine::constant(0.0);
            for (i, a) in comps.iter().enumerate() {
                if d[i] != 0.0 {
                    f = f.add(&a.scale(d[i]));
                }
            }
            !f.is_undefined() && -b.lower(&f.neg()) <= *s
        })
    }
}

/// A zonotope with linear constraints on its symbols (see the module documentation).
#[derive(Clone, Debug)]
pub struct Star {
    pub set: StateSet,
    pub cons: Vec<Halfspace>,
}

/// The linear program of a list of constraints over the symbols they mention, built
/// once and used for many objectives (any forms over the same symbols).
pub struct Bounder {
    vars: Vec<usize>,
    lp: Lp,
}

impl Bounder {
    /// The LP of `cons` (symbols in `[−1, 1]`).
    pub fn new(cons: &[Halfspace]) -> Bounder {
        let mut vars: Vec<usize> = cons.iter().flat_map(|h| h.terms.iter().map(|t| t.0)).collect();
        vars.sort_unstable();
        vars.dedup();
        let cols = vars.len();
        let mut a = vec![0.0; cons.len() * cols];
        for (i, h) in cons.iter().enumerate() {
            for &(s, g) in &h.terms {
                let j = vars.binary_search(&s).expect("collected above");
                a[i * cols + j] = g;
            }
        }
        let lp = Lp { cols, a, b: cons.iter().map(|h| h.rhs).collect(), lo: vec![-1.0; cols], hi: vec![1.0; cols] };
        Bounder { vars, lp }
    }

    fn unconstrained(&self) -> bool {
        self.lp.rows() == 0
    }

    /// The hull of a zonotope under these constraints, intersected with its own box.
    pub fn hull_of(&self, set: &StateSet) -> Vec<Interval> {
        set.components()
            .iter()
            .map(|a| {
                let plain = a.range();
                match self.range(a) {
                    Some(r) => r.intersect(&plain).unwrap_or(plain),
                    None => plain,
                }
            })
            .collect()
    }

    /// A rigorous lower bound of the form over the star (`+∞` when the star is shown
    /// empty, `−∞` when the form is undefined).
    pub fn lower(&self, f: &Affine) -> f64 {
        if f.is_undefined() {
            return f64::NEG_INFINITY;
        }
        let plain = f.range().lo();
        if self.unconstrained() {
            return plain;
        }
        // Terms on constrained symbols go to the LP; the others are free in [−1, 1].
        let mut c = vec![0.0; self.vars.len()];
        let mut c0 = Interval::point(f.center()) - Interval::point(f.err());
        let mut any = false;
        for &(s, g) in f.terms() {
            match self.vars.binary_search(&s) {
                Ok(j) => {
                    c[j] = g;
                    any = true;
                }
                Err(_) => c0 = c0 - Interval::point(g.abs()),
            }
        }
        if !any {
            // The constraints matter only through emptiness.
            return if lp::is_empty(&self.lp) { f64::INFINITY } else { c0.lo().max(plain) };
        }
        lp::lower_bound(&self.lp, &c, c0.lo()).max(plain)
    }

    /// A rigorous enclosure of the form over the star (`None` when the star is shown
    /// empty).
    pub fn range(&self, f: &Affine) -> Option<Interval> {
        if f.is_undefined() {
            return Some(Interval::UNDEFINED);
        }
        let lo = self.lower(f);
        let hi = -self.lower(&f.neg());
        if lo == f64::INFINITY || hi == f64::NEG_INFINITY {
            return None;
        }
        if lo > hi {
            return None;
        }
        Some(Interval::new(lo, hi))
    }

    /// Whether the star is shown empty.
    pub fn is_empty(&self) -> bool {
        !self.unconstrained() && lp::is_empty(&self.lp)
    }
}

impl Star {
    /// A star without constraints.
    pub fn from_set(set: StateSet) -> Star {
        Star { set, cons: Vec::new() }
    }

    /// The LP view of the constraints, for bounding many forms.
    pub fn bounder(&self) -> Bounder {
        Bounder::new(&self.cons)
    }

    /// Rigorous hull, one interval per state (`None` when shown empty). Undefined
    /// components give undefined intervals.
    pub fn hull(&self) -> Option<Vec<Interval>> {
        if self.cons.is_empty() {
            return Some(self.set.to_box());
        }
        let b = self.bounder();
        self.set.components().iter().map(|a| b.range(a)).collect()
    }

    /// The star with more constraints, or `None` when that set is shown empty.
    pub fn restricted(&self, extra: Vec<Halfspace>) -> Option<Star> {
        let mut s = self.clone();
        for h in extra {
            if h.terms.is_empty() {
                if h.rhs >= 0.0 {
                    continue;
                }
                return None; // 0 ≤ rhs < 0
            }
            if !h.always_holds() && !s.cons.contains(&h) {
                s.cons.push(h);
            }
        }
        if s.cons.len() > self.cons.len() && s.bounder().is_empty() {
            return None;
        }
        Some(s)
    }

    /// The range of every symbol the constraints mention, under the constraints (two
    /// LPs each, intersected with `[−1, 1]`); `None` when the star is shown empty.
    pub fn symbol_ranges(&self) -> Option<Vec<(usize, Interval)>> {
        let mut vars: Vec<usize> = self.cons.iter().flat_map(|h| h.terms.iter().map(|t| t.0)).collect();
        vars.sort_unstable();
        vars.dedup();
        let b = self.bounder();
        vars.into_iter()
            .map(|s| {
                let r = b.range(&Affine::symbol(0.0, s, 1.0))?;
                let lo = r.lo().max(-1.0);
                let hi = r.hi().min(1.0);
                if lo > hi {
                    return None;
                }
                Some((s, Interval::new(lo, hi)))
            })
            .collect()
    }

    /// Makes the symbols minted from now on start at `base` or above.
    pub fn reserve_symbols_below(&mut self, base: usize) {
        self.set.reserve_symbols_below(base);
    }

    /// Order reduction to about `max_gens` generators and at most `max_cons`
    /// constraints. Constrained symbols are kept where room allows (largest state
    /// impact first); a symbol that is boxed away is projected out of the constraints
    /// (`rhs + |a_s|`), and so are symbols no component uses any more. Constraints that
    /// every point of the box satisfies are dropped, then the oldest beyond `max_cons`.
    pub fn reduce(&mut self, max_gens: usize, max_cons: usize) {
        // Fresh symbols must not take a number a constraint already uses (such as a
        // decision's noise symbol, which no component mentions).
        let top = self.cons.iter().flat_map(|h| h.terms.iter().map(|t| t.0 + 1)).max().unwrap_or(0);
        self.set.reserve_symbols_below(top);
        // Symbols the components use.
        let mut used: Vec<usize> = self.set.components().iter().flat_map(|a| a.terms().iter().map(|t| t.0)).collect();
        used.sort_unstable();
        used.dedup();
        let n = self.set.dim();
        let n_init = self.set.num_initial();
        let mut constrained: Vec<usize> = self.cons.iter().flat_map(|h| h.terms.iter().map(|t| t.0)).collect();
        constrained.sort_unstable();
        constrained.dedup();

        // Which constrained (non-initial) symbols to protect.
        let room = max_gens.saturating_sub(n_init + n);
        let mut cand: Vec<(usize, f64)> = constrained
            .iter()
            .copied()
            .filter(|&s| s >= n_init && used.binary_search(&s).is_ok())
            .map(|s| (s, self.set.components().iter().map(|a| a.coeff(s).abs()).sum::<f64>()))
            .collect();
        cand.sort_by(|a, b| b.1.total_cmp(&a.1));
        let protected: Vec<usize> = {
            let mut p: Vec<usize> = cand.iter().take(room).map(|c| c.0).collect();
            p.sort_unstable();
            p
        };
        self.set.reduce_keeping(max_gens, &|s| protected.binary_search(&s).is_ok());
        // Constrained symbols the reduction boxed away: project out (symbols that no
        // component used before the reduction, such as a decision's noise, stay: they
        // are existentially quantified in the LP anyway, jointly for all constraints).
        let mut still: Vec<usize> = self.set.components().iter().flat_map(|a| a.terms().iter().map(|t| t.0)).collect();
        still.sort_unstable();
        still.dedup();
        for &s in &constrained {
            if used.binary_search(&s).is_ok() && still.binary_search(&s).is_err() {
                for h in &mut self.cons {
                    h.project_out(s);
                }
            }
        }
        self.cons.retain(|h| !(h.terms.is_empty() && h.rhs >= 0.0) && !h.always_holds());
        if self.cons.len() > max_cons {
            let extra = self.cons.len() - max_cons;
            self.cons.drain(0..extra);
        }
    }

    /// A sound enclosure of the union of `stars` (same dimension and initial symbols)
    /// as a template polytope that keeps the dependence on the initial symbols.
    ///
    /// With `Ḡ` the midpoint of the stars' coefficients on the initial symbols `ε_I`
    /// (for each state where the image of the cell, `Ḡ·ε_I`, is not much wider than the
    /// union; elsewhere `Ḡ = 0`),
    /// every point of every star is `x = Ḡ·ε_I + ρ` where the residual `ρ` lies in the
    /// box `m ± r` (its bounds over each star, from LPs), so `x = m + Ḡ·ε_I + r∘δ` with
    /// fresh symbols `δ ∈ [−1, 1]^n`. For each direction `d` of the template the support
    /// `s_d = max over all stars of d·x` (LPs) gives the constraint
    /// `(d·Ḡ)·ε_I + Σ d_i r_i δ_i ≤ s_d − d·m`, which every represented point satisfies.
    /// The directions are the axes and, for every pair of states, the diagonals of the
    /// union's bounding box (a strip lying along a diagonal of its box is kept thin).
    /// Roundings go into right-hand sides. Undefined stars give an undefined result.
    pub fn template_hull(stars: &[Star], next_symbol: &mut usize) -> Star {
        Star::template_hull_described(stars, next_symbol).0
    }

    /// [`Star::template_hull`], and when the result does not use the initial symbols
    /// (`Ḡ = 0`), the polytope it stands for: every state `x` with `d·x ≤ s` for all the
    /// listed `(d, s)` (the axes among them) is a point of the result, and every point
    /// of every input star satisfies them.
    pub fn template_hull_described(stars: &[Star], next_symbol: &mut usize) -> (Star, Option<Polytope>) {
        assert!(!stars.is_empty(), "hull of no stars");
        let n = stars[0].set.dim();
        let n_init = stars.iter().map(|s| s.set.num_initial()).min().unwrap_or(0);
        let top_constrained = stars.iter().flat_map(|s| s.cons.iter().flat_map(|h| h.terms.iter().map(|t| t.0 + 1))).max().unwrap_or(0);
        let base = stars.iter().map(|s| s.set.num_symbols()).max().unwrap_or(0).max(*next_symbol).max(top_constrained);
        let delta: Vec<usize> = (base..base + n).collect();
        *next_symbol = base + n;
        let undefined = || {
            Star::from_set(StateSet::from_forms(vec![Affine::undefined(); n], base + n, n_init))
        };
        if stars.iter().any(|s| s.set.is_undefined()) {
            return (undefined(), None);
        }
        let half = Interval::point(0.5);
        // Ḡ: midpoint of the coefficients on each initial symbol.
        let mut gbar: Vec<Vec<f64>> = (0..n)
            .map(|i| {
                (0..n_init)
                    .map(|s| {
                        let lo = stars.iter().map(|st| st.set.components()[i].coeff(s)).fold(f64::INFINITY, f64::min);
                        let hi = stars.iter().map(|st| st.set.components()[i].coeff(s)).fold(f64::NEG_INFINITY, f64::max);
                        ((Interval::point(lo) + Interval::point(hi)) * half).mid()
                    })
                    .collect()
            })
            .collect();
        let bounders: Vec<Bounder> = stars.iter().map(|s| s.bounder()).collect();
        // The largest value of a form over the union (`None` when every star is empty,
        // `+∞` when some star leaves it unbounded); one LP per star.
        let sup_over_all = |f: &dyn Fn(&Star) -> Affine| -> Option<f64> {
            let mut acc: Option<f64> = None;
            for (st, b) in stars.iter().zip(&bounders) {
                let v = -b.lower(&f(st).neg());
                if v == f64::NEG_INFINITY {
                    continue; // an empty star adds nothing
                }
                acc = Some(acc.map_or(v, |a: f64| a.max(v)));
            }
            acc
        };
        let range_over_all = |f: &dyn Fn(&Star) -> Affine| -> Option<Interval> {
            let hi = sup_over_all(f)?;
            let lo = -sup_over_all(&|st: &Star| f(st).neg())?;
            if hi.is_nan() || lo.is_nan() || lo > hi {
                return Some(Interval::UNDEFINED);
            }
            Some(Interval::new(lo, hi))
        };
        let gbar_form = |g: &[f64]| -> Affine {
            let terms: Vec<(usize, f64)> = (0..n_init).filter(|&s| g[s] != 0.0).map(|s| (s, g[s])).collect();
            Affine::from_parts(0.0, &terms, 0.0)
        };
        // The union's hull, then the residual box m ± r. Keep the initial symbols only
        // where they describe the union well: the zonotope's range in state i is that of
        // Ḡ·ε_I plus the residual's, and when the stars hold only part of the cell's image
        // the two must cancel, so the plain box (Ḡ = 0) is the better zonotope. Keep Ḡ
        // when its zonotope is at most 1.25 times as wide as the union.
        let mut m = vec![0.0; n];
        let mut r = vec![0.0; n];
        let mut hull_x = vec![Interval::ZERO; n];
        for i in 0..n {
            let Some(h) = range_over_all(&|st: &Star| st.set.components()[i].clone()) else {
                // Every star is empty: so is the union.
                let mut e = undefined();
                e.cons.push(Halfspace { terms: Vec::new(), rhs: -1.0 });
                e.set = StateSet::from_box(&vec![Interval::ZERO; n]);
                return (e, None);
            };
            if h.is_undefined() || !h.is_bounded() {
                return (undefined(), None);
            }
            hull_x[i] = h;
            let spread = (0..n_init).fold(Interval::ZERO, |acc, s| acc + Interval::point(gbar[i][s].abs())).hi();
            let mut res = h;
            if spread > 0.0 {
                let g = gbar_form(&gbar[i]);
                match range_over_all(&|st: &Star| st.set.components()[i].sub(&g)) {
                    // Worth keeping: the zonotope stays within 1.25 times the union's
                    // width, and Ḡ carries a real share of it.
                    Some(rr) if !rr.is_undefined() && spread + rr.rad() <= 1.25 * h.rad() && spread > 0.25 * rr.rad() => res = rr,
                    _ => gbar[i].iter_mut().for_each(|g| *g = 0.0),
                }
            }
            let Some((mi, ri)) = mid_rad(res) else { return (undefined(), None) };
            m[i] = mi;
            r[i] = ri;
        }
        let comps: Vec<Affine> = (0..n)
            .map(|i| {
                let mut terms: Vec<(usize, f64)> = (0..n_init).filter(|&s| gbar[i][s] != 0.0).map(|s| (s, gbar[i][s])).collect();
                if r[i] != 0.0 {
                    terms.push((delta[i], r[i]));
                }
                Affine::from_parts(m[i], &terms, 0.0)
            })
            .collect();
        let set = StateSet::from_forms(comps.clone(), base + n, n_init);
        // Template directions (with the support already known for the axes): axes, box
        // diagonals of every pair, and the stars' own constraint directions in state
        // space (the decision boundaries): the d with Gᵀd closest to the constraint's
        // coefficients.
        let mut dirs: Vec<(Vec<f64>, Option<f64>)> = Vec::new();
        for i in 0..n {
            let mut d = vec![0.0; n];
            d[i] = 1.0;
            dirs.push((d.clone(), Some(hull_x[i].hi())));
            d[i] = -1.0;
            dirs.push((d, Some(-hull_x[i].lo())));
        }
        for i in 0..n {
            for j in i + 1..n {
                let (wi, wj) = (hull_x[i].width(), hull_x[j].width());
                if !(wi > 0.0 && wj > 0.0) {
                    continue;
                }
                for (si, sj) in [(1.0, 1.0), (1.0, -1.0), (-1.0, 1.0), (-1.0, -1.0)] {
                    let mut d = vec![0.0; n];
                    d[i] = si / wi;
                    d[j] = sj / wj;
                    dirs.push((d, None));
                }
            }
        }
        let norm = |v: &[f64]| v.iter().map(|x| x * x).sum::<f64>().sqrt();
        for st in stars {
            for h in &st.cons {
                let Some(d) = state_direction(&st.set, h) else { continue };
                let nd = norm(&d);
                if !(nd > 0.0) || !nd.is_finite() {
                    continue;
                }
                let d: Vec<f64> = d.iter().map(|x| x / nd).collect();
                let similar = dirs.iter().any(|(e, _)| {
                    let ne = norm(e);
                    ne > 0.0 && (d.iter().zip(e).map(|(a, b)| a * b).sum::<f64>() / ne) > 0.995
                });
                if !similar && dirs.len() < 6 * n + 12 {
                    dirs.push((d, None));
                }
            }
        }
        let mut cons = Vec::new();
        let mut faces: Vec<(Vec<f64>, f64)> = Vec::new();
        for (d, known) in &dirs {
            let dot = |f: &[Affine]| -> Affine {
                let mut acc = Affine::constant(0.0);
                for (i, a) in f.iter().enumerate() {
                    if d[i] != 0.0 {
                        acc = acc.add(&a.scale(d[i]));
                    }
                }
                acc
            };
            let sup = match known {
                Some(v) => *v,
                None => match sup_over_all(&|st: &Star| dot(st.set.components())) {
                    Some(v) => v,
                    None => continue,
                },
            };
            if !sup.is_finite() {
                continue;
            }
            faces.push((d.clone(), sup));
            // d·x over the new set's own form: dot(comps) = const + Σ coeffs·symbols ± err.
            let form = dot(&comps);
            if form.is_undefined() {
                continue;
            }
            // form ≤ sup  ⇐  Σ coeffs·ε ≤ sup − centre + err (rounded up).
            let rhs = (Interval::point(sup) - Interval::point(form.center()) + Interval::point(form.err())).hi();
            let h = Halfspace::new(form.terms().to_vec(), rhs);
            if h.always_holds() {
                continue;
            }
            cons.push(h);
        }
        let pure = gbar.iter().all(|row| row.iter().all(|g| *g == 0.0));
        (Star { set, cons }, pure.then_some(Polytope { faces }))
    }

}

/// The state-space direction `d` whose linear form `d·x(ε)` best matches a constraint's
/// coefficients `a` on the set's symbols: the least-squares solution of `Gᵀd = a` (`G`
/// the generator matrix), from the normal equations `G·Gᵀ·d = G·a`. A heuristic for
/// choosing template directions only (any direction is sound). `None` when singular.
fn state_direction(set: &StateSet, h: &Halfspace) -> Option<Vec<f64>> {
    let n = set.dim();
    let comps = set.components();
    let mut gg = vec![vec![0.0f64; n]; n];
    let mut ga = vec![0.0f64; n];
    for i in 0..n {
        for j in 0..n {
            gg[i][j] = comps[i].terms().iter().map(|&(s, g)| g * comps[j].coeff(s)).sum();
        }
        ga[i] = h.terms.iter().map(|&(s, a)| a * comps[i].coeff(s)).sum();
    }
    // Gaussian elimination with partial pivoting (n is small).
    let scale = (0..n).map(|i| gg[i][i].abs()).fold(0.0, f64::max);
    if !(scale > 0.0) {
        return None;
    }
    for c in 0..n {
        let p = (c..n).max_by(|&a, &b| gg[a][c].abs().total_cmp(&gg[b][c].abs()))?;
        if gg[p][c].abs() <= 1e-12 * scale {
            return None;
        }
        gg.swap(c, p);
        ga.swap(c, p);
        for r in 0..n {
            if r != c {
                let f = gg[r][c] / gg[c][c];
                for k in c..n {
                    gg[r][k] -= f * gg[c][k];
                }
                ga[r] -= f * ga[c];
            }
        }
    }
    let d: Vec<f64> = (0..n).map(|i| ga[i] / gg[i][i]).collect();
    d.iter().all(|v| v.is_finite()).then_some(d)
}

/// `a` with ε_k replaced by m + r·ε_k (m, r exact doubles standing for the interval
/// `[m − r, m + r]` the symbol is known to lie in); roundings go into the error radius.
pub fn substitute(a: &Affine, k: usize, m: f64, r: f64) -> Affine {
    let g = a.coeff(k);
    if g == 0.0 || a.is_undefined() {
        return a.clone();
    }
    let (m, r) = (Interval::point(m), Interval::point(r));
    let gi = Interval::point(g);
    let c = Interval::point(a.center()) + gi * m;
    let gk = gi * r;
    let err = Interval::point(a.err()) + Interval::point(c.rad()) + Interval::point(gk.rad());
    let terms: Vec<(usize, f64)> = a.terms().iter().map(|&(s, v)| if s == k { (s, gk.mid()) } else { (s, v) }).collect();
    Affine::from_parts(c.mid(), &terms, err.hi())
}

#[cfg(test)]
mod tests {
    use super::*;

    fn square() -> Star {
        // x = ε0, y = ε1 over [−1, 1]².
        Star::from_set(StateSet::from_box(&[Interval::new(-1.0, 1.0), Interval::new(-1.0, 1.0)]))
    }

    #[test]
    fn a_cut_narrows_the_hull() {
        // x + y ≤ −1 inside the square: x ∈ [−1, 0], y ∈ [−1, 0] (worked by hand).
        let s = square().restricted(vec![Halfspace::new(vec![(0, 1.0), (1, 1.0)], -1.0)]).unwrap();
        let h = s.hull().unwrap();
        assert!(h[0].lo() <= -1.0 && h[0].hi() >= 0.0 && h[0].hi() < 1e-9, "{h:?}");
        assert!(h[1].hi() >= 0.0 && h[1].hi() < 1e-9);
        // The form x + y is at most −1 there.
        let f = Affine::from_parts(0.0, &[(0, 1.0), (1, 1.0)], 0.0);
        let r = s.bounder().range(&f).unwrap();
        assert!(r.hi() >= -1.0 && r.hi() < -1.0 + 1e-9, "{r:?}");
    }

    #[test]
    fn contradicting_cuts_are_empty() {
        let s = square().restricted(vec![Halfspace::new(vec![(0, 1.0)], -0.5)]).unwrap();
        assert!(s.restricted(vec![Halfspace::new(vec![(0, -1.0)], -0.6)]).is_none());
    }

    #[test]
    fn template_hull_contains_both_sides() {
        let a = square().restricted(vec![Halfspace::new(vec![(0, 1.0)], -0.5)]).unwrap(); // x ≤ −0.5
        let b = square().restricted(vec![Halfspace::new(vec![(0, -1.0)], -0.5)]).unwrap(); // x ≥ 0.5
        let mut next = 2;
        let j = Star::template_hull(&[a, b], &mut next);
        let h = j.hull().unwrap();
        assert!(h[0].lo() <= -1.0 && h[0].hi() >= 1.0, "{h:?}");
    }

    #[test]
    fn reduction_relaxes_constraints_on_dropped_symbols() {
        // Three symbols on one state, a constraint on symbol 2; reducing to one generator
        // per dimension boxes symbol 2 away and must relax the constraint.
        let set = StateSet::from_forms(vec![Affine::from_parts(0.0, &[(0, 1.0), (1, 0.5), (2, 0.25)], 0.0)], 3, 1);
        let mut s = Star::from_set(set).restricted(vec![Halfspace::new(vec![(2, 1.0)], -0.5)]).unwrap();
        s.reduce(2, 8);
        let h = s.hull().unwrap();
        // x = ε0 + 0.5 ε1 + 0.25 ε2 with ε2 ≤ −0.5: x ∈ [−1.75, 1.375]; after relaxing,
        // the hull must contain that range.
        assert!(h[0].lo() <= -1.75 && h[0].hi() >= 1.375, "{h:?}");
    }
}
