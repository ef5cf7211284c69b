//! Affine arithmetic with outward rounding, and zonotopes of states built from it.
//!
//! An [`Affine`] form stands for the set of functions
//! `x(ε) ∈ c + Σ_k g_k ε_k + [−e, e]` over the shared noise symbols `ε_k ∈ [−1, 1]`;
//! `e ≥ 0` is an error radius private to the form (it may depend on anything).
//!
//! Guarantee of every operation: if the true values of the operands lie in their forms
//! for a given `ε`, the true value of the result lies in the result form for the same
//! `ε`. Every floating-point rounding of a coefficient is measured exactly (TwoSum /
//! fused multiply-add) or bounded by an outward-rounded interval, and added to `e`
//! rounding upward. A form with a NaN centre is *undefined*: it arises wherever the
//! interval version of a function would be undefined (log of a range reaching 0, a
//! divisor range holding 0, tan at a pole, an overflow), its range is
//! [`Interval::UNDEFINED`], and it can never prove anything.
//!
//! Nonlinear functions use the min-range linearisations (exp, log, sqrt, reciprocal:
//! slope at the end with the smaller derivative, chosen by one outward-rounded bound so
//! that the residual stays monotone) or the mean-value form (sin, cos, tan, atan, tanh,
//! atan2): `f(x) ∈ f(m) + α(x − m) + (f'(X) − α)(X − m)` with `α = f'(m)`, whichever
//! leaves a range at most 1.5 times as wide as plain interval evaluation; otherwise the
//! interval result is taken as a constant form (sound, loses correlation).

use super::expr::{Domain, Func, Number};
use super::interval::Interval;
use std::collections::BTreeMap;

/// `a + b` rounded upward (exactly: TwoSum tells the sign of the rounding error).
#[inline]
fn add_up(a: f64, b: f64) -> f64 {
    let (s, err) = two_sum_signed(a, b);
    if err > 0.0 {
        s.next_up()
    } else {
        s
    }
}

/// `a + b` rounded downward.
#[inline]
fn add_down(a: f64, b: f64) -> f64 {
    let (s, err) = two_sum_signed(a, b);
    if err < 0.0 {
        s.next_down()
    } else {
        s
    }
}

/// `fl(a + b)` and its signed rounding error `a + b − fl(a + b)` (Knuth's TwoSum,
/// exact in round-to-nearest barring overflow; overflow gives non-finite values that
/// make the caller's form undefined).
#[inline]
fn two_sum_signed(a: f64, b: f64) -> (f64, f64) {
    let s = a + b;
    let bb = s - a;
    let err = (a - (s - bb)) + (b - bb);
    (s, err)
}

/// `a · b` for `a, b ≥ 0`, rounded upward.
#[inline]
fn mul_up(a: f64, b: f64) -> f64 {
    if a == 0.0 || b == 0.0 {
        0.0
    } else {
        (a * b).next_up()
    }
}

/// `fl(a + b)` and the magnitude of its rounding error.
#[inline]
fn two_sum(a: f64, b: f64) -> (f64, f64) {
    let (s, err) = two_sum_signed(a, b);
    (s, err.abs())
}

/// Exact error of `fl(a · b)` via a fused multiply-add: `(p, |a·b − p|)`.
/// Underflow could make the fma residual inexact, so a subnormal-sized slack is added.
#[inline]
fn two_prod(a: f64, b: f64) -> (f64, f64) {
    let p = a * b;
    let err = a.mul_add(b, -p).abs();
    if (p.abs() < 1e-290 && a != 0.0 && b != 0.0) || (err != 0.0 && err < 1e-290) {
        (p, add_up(err, 1e-300))
    } else {
        (p, err)
    }
}

/// Midpoint and an upper bound on the radius of a bounded interval (exact when the
/// differences are representable, so `[0, 2]` becomes `1 ± 1`).
pub(crate) fn mid_rad(i: Interval) -> Option<(f64, f64)> {
    if i.is_undefined() || !i.is_bounded() {
        return None;
    }
    let m = i.mid();
    let r = add_up(m, -i.lo()).max(add_up(i.hi(), -m));
    if r.is_finite() {
        Some((m, r))
    } else {
        None
    }
}

/// A point of a bounded interval, or NaN when it is undefined or unbounded (unlike
/// [`Interval::mid`], never panics on NaN ends).
fn safe_mid(i: Interval) -> f64 {
    if i.is_undefined() || !i.is_bounded() {
        f64::NAN
    } else {
        i.mid()
    }
}

/// An affine form `c + Σ g_k ε_k + [−e, e]` (see the module documentation).
#[derive(Clone, Debug, PartialEq)]
pub struct Affine {
    c: f64,
    /// Symbol index and coefficient, sorted by symbol, no zero coefficients.
    terms: Vec<(usize, f64)>,
    e: f64,
}

impl Affine {
    /// The undefined form (NaN centre).
    pub fn undefined() -> Affine {
        Affine { c: f64::NAN, terms: Vec::new(), e: f64::NAN }
    }

    /// The exact constant `x` (undefined if `x` is not finite).
    pub fn constant(x: f64) -> Affine {
        if x.is_finite() {
            Affine { c: x, terms: Vec::new(), e: 0.0 }
        } else {
            Affine::undefined()
        }
    }

    /// A constant known only to lie in `i`: centre `mid(i)`, error radius `rad(i)`.
    /// Undefined when `i` is undefined or unbounded.
    pub fn from_interval(i: Interval) -> Affine {
        match mid_rad(i) {
            Some((m, r)) => Affine { c: m, terms: Vec::new(), e: r },
            None => Affine::undefined(),
        }
    }

    /// `c + g·ε_sym` exactly.
    pub fn symbol(c: f64, sym: usize, g: f64) -> Affine {
        if !(c.is_finite() && g.is_finite()) {
            return Affine::undefined();
        }
        let terms = if g == 0.0 { Vec::new() } else { vec![(sym, g)] };
        Affine { c, terms, e: 0.0 }
    }

    /// Builds a form from parts (terms are sorted and merged here; rounding of merged
    /// coefficients goes into the error radius).
    pub fn from_parts(c: f64, terms: &[(usize, f64)], e: f64) -> Affine {
        let mut acc = Affine::constant(c);
        acc.e = if e >= 0.0 { e } else { f64::NAN };
        let mut sorted: Vec<(usize, f64)> = terms.to_vec();
        sorted.sort_by_key(|t| t.0);
        let mut merged: Vec<(usize, f64)> = Vec::with_capacity(sorted.len());
        for (s, g) in sorted {
            if let Some(last) = merged.last_mut() {
                if last.0 == s {
                    let (v, err) = two_sum(last.1, g);
                    last.1 = v;
                    acc.e = add_up(acc.e, err);
                    continue;
                }
            }
            merged.push((s, g));
        }
        merged.retain(|t| t.1 != 0.0);
        acc.terms = merged;
        acc.normalize()
    }

    /// Centre `c` (the value at `ε = 0`, up to the error radius).
    pub fn center(&self) -> f64 {
        self.c
    }

    /// Coefficient of symbol `sym` (0 when absent).
    pub fn coeff(&self, sym: usize) -> f64 {
        match self.terms.binary_search_by_key(&sym, |t| t.0) {
            Ok(k) => self.terms[k].1,
            Err(_) => 0.0,
        }
    }

    /// The error radius `e ≥ 0`.
    pub fn err(&self) -> f64 {
        self.e
    }

    /// The symbol terms, sorted by symbol.
    pub fn terms(&self) -> &[(usize, f64)] {
        &self.terms
    }

    /// Whether the form is undefined (it then proves nothing; its range is undefined).
    pub fn is_undefined(&self) -> bool {
        !(self.c.is_finite() && self.e.is_finite())
    }

    /// Upper bound on `Σ|g_k| + e`.
    pub fn rad(&self) -> f64 {
        self.terms.iter().fold(self.e, |s, t| add_up(s, t.1.abs()))
    }

    /// Upper bound on `Σ|g_k|`.
    fn gen_rad(&self) -> f64 {
        self.terms.iter().fold(0.0, |s, t| add_up(s, t.1.abs()))
    }

    /// A sound enclosure of every value the form can take.
    pub fn range(&self) -> Interval {
        if self.is_undefined() {
            return Interval::UNDEFINED;
        }
        let r = self.rad();
        Interval::new(add_down(self.c, -r), add_up(self.c, r))
    }

    /// Marks the form undefined if anything overflowed.
    fn normalize(self) -> Affine {
        if self.c.is_finite() && self.e.is_finite() && self.e >= 0.0 && self.terms.iter().all(|t| t.1.is_finite()) {
            self
        } else {
            Affine::undefined()
        }
    }

    /// `−x`, exact.
    pub fn neg(&self) -> Affine {
        Affine { c: -self.c, terms: self.terms.iter().map(|&(s, g)| (s, -g)).collect(), e: self.e }
    }

    /// `self + sign·o` with sign ±1.
    fn add_signed(&self, o: &Affine, sign: f64) -> Affine {
        if self.is_undefined() || o.is_undefined() {
            return Affine::undefined();
        }
        let (c, mut e) = two_sum(self.c, sign * o.c);
        e = add_up(e, add_up(self.e, o.e));
        let mut terms = Vec::with_capacity(self.terms.len() + o.terms.len());
        let (mut i, mut j) = (0, 0);
        while i < self.terms.len() || j < o.terms.len() {
            let a = self.terms.get(i);
            let b = o.terms.get(j);
            match (a, b) {
                (Some(&(sa, ga)), Some(&(sb, gb))) if sa == sb => {
                    let (g, r) = two_sum(ga, sign * gb);
                    e = add_up(e, r);
                    if g != 0.0 {
                        terms.push((sa, g));
                    }
                    i += 1;
                    j += 1;
                }
                (Some(&(sa, ga)), Some(&(sb, _))) if sa < sb => {
                    terms.push((sa, ga));
                    i += 1;
                }
                (Some(&(sa, ga)), None) => {
                    terms.push((sa, ga));
                    i += 1;
                }
                (_, Some(&(sb, gb))) => {
                    terms.push((sb, sign * gb));
                    j += 1;
                }
                (None, None) => unreachable!(),
            }
        }
        Affine { c, terms, e }.normalize()
    }

    /// `x + y`; coefficient roundings (measured by TwoSum) go into the error radius.
    pub fn add(&self, o: &Affine) -> Affine {
        self.add_signed(o, 1.0)
    }

    /// `x − y`; as [`Affine::add`].
    pub fn sub(&self, o: &Affine) -> Affine {
        self.add_signed(o, -1.0)
    }

    /// `self · s` for an exact scalar `s`.
    pub fn scale(&self, s: f64) -> Affine {
        if self.is_undefined() || !s.is_finite() {
            return Affine::undefined();
        }
        if s == 0.0 {
            return Affine::constant(0.0);
        }
        let (c, mut e) = two_prod(self.c, s);
        e = add_up(e, mul_up(self.e, s.abs()));
        let mut terms = Vec::with_capacity(self.terms.len());
        for &(sym, g) in &self.terms {
            let (p, r) = two_prod(g, s);
            e = add_up(e, r);
            if p != 0.0 {
                terms.push((sym, p));
            }
        }
        Affine { c, terms, e }.normalize()
    }

    /// `self + i` for a constant known to lie in `i`.
    pub fn add_interval(&self, i: Interval) -> Affine {
        self.add(&Affine::from_interval(i))
    }

    /// `self · i` for a constant known to lie in `i` (exact scaling when `i` is a point).
    pub fn mul_interval(&self, i: Interval) -> Affine {
        if i.is_undefined() {
            return Affine::undefined();
        }
        if i.lo() == i.hi() {
            return self.scale(i.lo());
        }
        self.mul(&Affine::from_interval(i))
    }

    /// Product. The quadratic part `(Σg ε + δx)(Σh ε + δy)` is bounded by
    /// `½Σ g_k h_k ± (R_x R_y − ½Σ|g_k h_k|)` (the squares `ε_k²` lie in `[0, 1]`), so
    /// `x·x` is enclosed as tightly as a square can be by one affine form.
    pub fn mul(&self, o: &Affine) -> Affine {
        if self.is_undefined() || o.is_undefined() {
            return Affine::undefined();
        }
        if self.terms.is_empty() && self.e == 0.0 {
            return o.scale(self.c);
        }
        if o.terms.is_empty() && o.e == 0.0 {
            return self.scale(o.c);
        }
        // Linear part cx·(y − cy) + cy·(x − cx) + cx·cy, merged in one pass.
        let (cx, cy) = (self.c, o.c);
        let (cc, mut e) = two_prod(cx, cy);
        let mut terms = Vec::with_capacity(self.terms.len() + o.terms.len());
        let (mut i, mut j) = (0, 0);
        while i < self.terms.len() || j < o.terms.len() {
            let a = self.terms.get(i).copied();
            let b = o.terms.get(j).copied();
            let (sym, g) = match (a, b) {
                (Some((sa, ga)), Some((sb, gb))) if sa == sb => {
                    let (p1, r1) = two_prod(cy, ga);
                    let (p2, r2) = two_prod(cx, gb);
                    let (g, r3) = two_sum(p1, p2);
                    e = add_up(e, add_up(r1, add_up(r2, r3)));
                    i += 1;
                    j += 1;
                    (sa, g)
                }
                (Some((sa, ga)), Some((sb, _))) if sa < sb => {
                    let (p, r) = two_prod(cy, ga);
                    e = add_up(e, r);
                    i += 1;
                    (sa, p)
                }
                (Some((sa, ga)), None) => {
                    let (p, r) = two_prod(cy, ga);
                    e = add_up(e, r);
                    i += 1;
                    (sa, p)
                }
                (_, Some((sb, gb))) => {
                    let (p, r) = two_prod(cx, gb);
                    e = add_up(e, r);
                    j += 1;
                    (sb, p)
                }
                (None, None) => unreachable!(),
            };
            if g != 0.0 {
                terms.push((sym, g));
            }
        }
        let mut r = Affine { c: cc, terms, e };
        // Error radii times the centres.
        r.e = add_up(r.e, add_up(mul_up(self.c.abs(), o.e), mul_up(o.c.abs(), self.e)));
        // Quadratic part.
        let rx = add_up(self.gen_rad(), self.e);
        let ry = add_up(o.gen_rad(), o.e);
        let mut diag = Interval::ZERO;
        let mut diag_abs = Interval::ZERO;
        let (mut i, mut j) = (0, 0);
        while i < self.terms.len() && j < o.terms.len() {
            let (sa, ga) = self.terms[i];
            let (sb, gb) = o.terms[j];
            if sa == sb {
                let p = Interval::point(ga) * Interval::point(gb);
                diag = diag + p;
                diag_abs = diag_abs + p.abs();
                i += 1;
                j += 1;
            } else if sa < sb {
                i += 1;
            } else {
                j += 1;
            }
        }
        let shift = diag * Interval::point(0.5);
        let radius = (Interval::point(mul_up(rx, ry)) - diag_abs * Interval::point(0.5)).hi().max(0.0);
        match mid_rad(shift) {
            Some((m, rr)) => {
                let (c, e2) = two_sum(r.c, m);
                r.c = c;
                r.e = add_up(r.e, add_up(e2, add_up(rr, radius)));
            }
            None => return Affine::undefined(),
        }
        r.normalize()
    }

    /// `α·x + Δ`: the linearisation of a function with residual interval `Δ`.
    fn linear_plus(&self, alpha: f64, delta: Interval) -> Affine {
        if delta.is_undefined() || !alpha.is_finite() {
            return Affine::undefined();
        }
        self.scale(alpha).add_interval(delta)
    }

    /// Chooses between an affine linearisation and the plain interval result: the
    /// linearisation (which keeps the correlation with the symbols) unless its range
    /// is more than 1.5 times wider than the interval one, i.e. unless the
    /// linearisation residual dominates (near an extremum of the function).
    fn prefer(lin: Affine, plain: Interval) -> Affine {
        if plain.is_undefined() {
            return Affine::undefined();
        }
        if lin.is_undefined() || lin.range().width() > 1.5 * plain.width() {
            Affine::from_interval(plain)
        } else {
            lin
        }
    }

    /// Degenerate case: a form without spread is evaluated as an interval.
    fn is_pointlike(&self) -> bool {
        self.terms.is_empty()
    }

    /// Mean-value linearisation of a smooth unary `f` with derivative `df` (both as
    /// outward-rounded interval functions).
    fn mean_value(&self, f: impl Fn(Interval) -> Interval, df: impl Fn(Interval) -> Interval) -> Affine {
        if self.is_undefined() {
            return Affine::undefined();
        }
        let x = self.range();
        let plain = f(x);
        if plain.is_undefined() {
            return Affine::undefined();
        }
        if self.is_pointlike() {
            return Affine::from_interval(plain);
        }
        let m = Interval::point(x.mid());
        let slope = df(x);
        let alpha = safe_mid(df(m));
        if slope.is_undefined() || !slope.is_bounded() || !alpha.is_finite() {
            return Affine::from_interval(plain);
        }
        let a = Interval::point(alpha);
        let delta = f(m) - a * m + (slope - a) * (x - m);
        Affine::prefer(self.linear_plus(alpha, delta), plain)
    }

    /// `eˣ` by the min-range rule: `α ≤ e^lo`, so `eˣ − αx` increases on the range.
    pub fn exp(&self) -> Affine {
        if self.is_undefined() {
            return Affine::undefined();
        }
        let x = self.range();
        let plain = x.exp();
        if self.is_pointlike() || !plain.is_bounded() {
            return Affine::from_interval(plain);
        }
        let (a, b) = (Interval::point(x.lo()), Interval::point(x.hi()));
        let alpha = a.exp().lo();
        let al = Interval::point(alpha);
        let ga = a.exp() - al * a;
        let gb = b.exp() - al * b;
        Affine::prefer(self.linear_plus(alpha, Interval::new(ga.lo(), gb.hi())), plain)
    }

    /// `ln x` by the min-range rule: `α ≤ 1/hi`, so `ln x − αx` increases on the range.
    pub fn ln(&self) -> Affine {
        if self.is_undefined() {
            return Affine::undefined();
        }
        let x = self.range();
        let plain = x.ln();
        if plain.is_undefined() {
            return Affine::undefined();
        }
        if self.is_pointlike() {
            return Affine::from_interval(plain);
        }
        let (a, b) = (Interval::point(x.lo()), Interval::point(x.hi()));
        let alpha = b.recip().lo();
        let al = Interval::point(alpha);
        let ga = a.ln() - al * a;
        let gb = b.ln() - al * b;
        Affine::prefer(self.linear_plus(alpha, Interval::new(ga.lo(), gb.hi())), plain)
    }

    /// `√x` by the min-range rule: `α ≤ 1/(2√hi)`, so `√x − αx` increases on the range.
    pub fn sqrt(&self) -> Affine {
        if self.is_undefined() {
            return Affine::undefined();
        }
        let x = self.range();
        let plain = x.sqrt();
        if plain.is_undefined() {
            return Affine::undefined();
        }
        if self.is_pointlike() || x.hi() <= 0.0 {
            return Affine::from_interval(plain);
        }
        let (a, b) = (Interval::point(x.lo()), Interval::point(x.hi()));
        let alpha = (Interval::point(2.0) * b.sqrt()).recip().lo();
        let al = Interval::point(alpha);
        let ga = a.sqrt() - al * a;
        let gb = b.sqrt() - al * b;
        Affine::prefer(self.linear_plus(alpha, Interval::new(ga.lo(), gb.hi())), plain)
    }

    /// `1/x` by the min-range rule (for a positive range `α ≥ −1/hi²`, so `1/x − αx`
    /// decreases); undefined when the range holds 0.
    pub fn recip(&self) -> Affine {
        if self.is_undefined() {
            return Affine::undefined();
        }
        let x = self.range();
        let plain = x.recip();
        if plain.is_undefined() {
            return Affine::undefined();
        }
        if self.is_pointlike() {
            return Affine::from_interval(plain);
        }
        if x.hi() < 0.0 {
            return self.neg().recip().neg();
        }
        let (a, b) = (Interval::point(x.lo()), Interval::point(x.hi()));
        let alpha = (-(b.sqr().recip())).hi();
        let al = Interval::point(alpha);
        let ga = a.recip() - al * a;
        let gb = b.recip() - al * b;
        Affine::prefer(self.linear_plus(alpha, Interval::new(gb.lo(), ga.hi())), plain)
    }

    /// `x / y = x · (1/y)`; undefined when the range of `y` holds 0.
    pub fn div(&self, o: &Affine) -> Affine {
        self.mul(&o.recip())
    }

    /// Mean-value form (see the module documentation); likewise cos, tan, atan, tanh.
    /// `tan` is undefined when a pole may lie in the range.
    pub fn sin(&self) -> Affine {
        self.mean_value(|x| x.sin(), |x| x.cos())
    }
    pub fn cos(&self) -> Affine {
        self.mean_value(|x| x.cos(), |x| -x.sin())
    }
    pub fn tan(&self) -> Affine {
        self.mean_value(|x| x.tan(), |x| Interval::ONE + x.tan().sqr())
    }
    pub fn atan(&self) -> Affine {
        self.mean_value(|x| x.atan(), |x| (Interval::ONE + x.sqr()).recip())
    }
    pub fn tanh(&self) -> Affine {
        self.mean_value(|x| x.tanh(), |x| Interval::ONE - x.tanh().sqr())
    }

    /// `|x|`: exact when the sign is fixed; otherwise `αx + [0, max(g(lo), g(hi))]`
    /// with the chord slope `α ∈ [−1, 1]` (`|x| − αx` is smallest at 0).
    pub fn abs(&self) -> Affine {
        if self.is_undefined() {
            return Affine::undefined();
        }
        let x = self.range();
        if x.lo() >= 0.0 {
            return self.clone();
        }
        if x.hi() <= 0.0 {
            return self.neg();
        }
        let alpha = ((x.hi() + x.lo()) / (x.hi() - x.lo())).clamp(-1.0, 1.0);
        let al = Interval::point(alpha);
        let (a, b) = (Interval::point(x.lo()), Interval::point(x.hi()));
        let ga = a.abs() - al * a;
        let gb = b.abs() - al * b;
        let top = ga.hi().max(gb.hi());
        Affine::prefer(self.linear_plus(alpha, Interval::new(0.0, top)), x.abs())
    }

    /// `min(x, y) = (x + y − |x − y|)/2` (an identity of the reals).
    pub fn min(&self, o: &Affine) -> Affine {
        self.add(o).sub(&self.sub(o).abs()).scale(0.5)
    }

    /// `max(x, y) = (x + y + |x − y|)/2`.
    pub fn max(&self, o: &Affine) -> Affine {
        self.add(o).add(&self.sub(o).abs()).scale(0.5)
    }

    /// A form holding, for every `ε`, the whole segment between `self(ε)` and `o(ε)`:
    /// `(a + b)/2 ± |a − b|_max / 2`.
    pub fn hull(&self, o: &Affine) -> Affine {
        let m = self.add(o).scale(0.5);
        let d = self.sub(o).range();
        if m.is_undefined() || d.is_undefined() {
            return Affine::undefined();
        }
        let mut m = m;
        m.e = add_up(m.e, mul_up(d.mag(), 0.5));
        m.normalize()
    }

    /// `x^n` for an integer `n` (repeated squaring; negative powers by the reciprocal).
    pub fn powi(&self, n: i32) -> Affine {
        if self.is_undefined() {
            return Affine::undefined();
        }
        if n == 0 {
            return Affine::constant(1.0);
        }
        if n < 0 {
            return self.powi(-n).recip();
        }
        let mut result: Option<Affine> = None;
        let mut base = self.clone();
        let mut k = n as u32;
        while k > 0 {
            if k & 1 == 1 {
                result = Some(match result {
                    None => base.clone(),
                    Some(r) => r.mul(&base),
                });
            }
            k >>= 1;
            if k > 0 {
                base = base.mul(&base);
            }
        }
        result.unwrap_or_else(|| Affine::constant(1.0))
    }

    /// `x^y = exp(y·ln x)`, or an integer power when `y` is an exact integer constant.
    pub fn pow(&self, y: &Affine) -> Affine {
        if y.terms.is_empty() && y.e == 0.0 && y.c.fract() == 0.0 && y.c.abs() <= 1024.0 {
            return self.powi(y.c as i32);
        }
        y.mul(&self.ln()).exp()
    }

    /// `atan2(y, x)`: mean-value form in both arguments away from the branch cut
    /// (`x ≤ 0, y = 0`) and the origin; the interval enclosure otherwise.
    pub fn atan2(y: &Affine, x: &Affine) -> Affine {
        if y.is_undefined() || x.is_undefined() {
            return Affine::undefined();
        }
        let (yr, xr) = (y.range(), x.range());
        let plain = Interval::atan2(yr, xr);
        if plain.is_undefined() {
            return Affine::undefined();
        }
        if (yr.contains_zero() && xr.lo() <= 0.0) || (y.is_pointlike() && x.is_pointlike()) {
            return Affine::from_interval(plain);
        }
        let (my, mx) = (Interval::point(yr.mid()), Interval::point(xr.mid()));
        let r2m = mx.sqr() + my.sqr();
        let ay = safe_mid(mx / r2m);
        let ax = safe_mid(-my / r2m);
        let r2 = xr.sqr() + yr.sqr();
        let dy = xr / r2;
        let dx = -yr / r2;
        if !(ay.is_finite() && ax.is_finite() && dy.is_bounded() && dx.is_bounded()) {
            return Affine::from_interval(plain);
        }
        let (iay, iax) = (Interval::point(ay), Interval::point(ax));
        let delta = Interval::atan2(my, mx) - iay * my - iax * mx + (dy - iay) * (yr - my) + (dx - iax) * (xr - mx);
        let lin = y.scale(ay).add(&x.scale(ax)).add_interval(delta);
        Affine::prefer(lin, plain)
    }

    /// `lt` where `p < q`, `gt` where `p > q`, the segment between them where undecided.
    pub fn select(p: &Affine, q: &Affine, lt: &Affine, gt: &Affine) -> Affine {
        let (pr, qr) = (p.range(), q.range());
        if pr.is_undefined() || qr.is_undefined() {
            return Affine::undefined();
        }
        if pr.hi() < qr.lo() {
            lt.clone()
        } else if pr.lo() > qr.hi() {
            gt.clone()
        } else {
            lt.hull(gt)
        }
    }
}

/// The affine-arithmetic [`Domain`]: evaluates an expression to an [`Affine`] form.
/// Literals that are not exact doubles become interval constants.
pub struct AffineArith;

impl Domain for AffineArith {
    type V = Affine;
    fn num(&mut self, n: &Number) -> Affine {
        Affine::from_interval(n.enclosure())
    }
    fn pi(&mut self) -> Affine {
        Affine::from_interval(Interval::PI)
    }
    fn neg(&mut self, a: &Affine) -> Affine {
        a.neg()
    }
    fn add(&mut self, a: &Affine, b: &Affine) -> Affine {
        a.add(b)
    }
    fn sub(&mut self, a: &Affine, b: &Affine) -> Affine {
        a.sub(b)
    }
    fn mul(&mut self, a: &Affine, b: &Affine) -> Affine {
        a.mul(b)
    }
    fn div(&mut self, a: &Affine, b: &Affine) -> Affine {
        a.div(b)
    }
    fn powi(&mut self, a: &Affine, n: i32) -> Affine {
        a.powi(n)
    }
    fn pow(&mut self, a: &Affine, b: &Affine) -> Affine {
        a.pow(b)
    }
    fn call(&mut self, f: Func, x: &[Affine]) -> Affine {
        match f {
            Func::Sin => x[0].sin(),
            Func::Cos => x[0].cos(),
            Func::Tan => x[0].tan(),
            Func::Exp => x[0].exp(),
            Func::Log => x[0].ln(),
            Func::Sqrt => x[0].sqrt(),
            Func::Abs => x[0].abs(),
            Func::Atan => x[0].atan(),
            Func::Atan2 => Affine::atan2(&x[0], &x[1]),
            Func::Tanh => x[0].tanh(),
            Func::Min => x[0].min(&x[1]),
            Func::Max => x[0].max(&x[1]),
        }
    }
    fn select(&mut self, p: &Affine, q: &Affine, lt: &Affine, gt: &Affine) -> Affine {
        Affine::select(p, q, lt, gt)
    }
}

/// A zonotope of states: one [`Affine`] form per state dimension over one shared
/// symbol space.
///
/// Symbols `0..dim` are the *initial* symbols: symbol `i` was the unit noise of initial
/// dimension `i` when the set was made by [`StateSet::from_box`]. Order reduction never
/// removes or merges them, so the coefficient of symbol `i` in any state (or in any
/// expression evaluated by [`StateSet::eval_affine`]) measures its sensitivity to the
/// initial dimension `i`. Other symbols are fresh ones minted by this set; their numbers
/// carry no meaning outside the set they belong to.
///
/// Set semantics: `{ (c_i + Σ_k g_ik ε_k + d_i)_i : ε ∈ [−1,1]^K, |d_i| ≤ e_i }`.
#[derive(Clone, Debug, PartialEq)]
pub struct StateSet {
    comps: Vec<Affine>,
    n_sym: usize,
    n_init: usize,
}

impl StateSet {
    /// The box `b` as a zonotope: state `i` is `mid_i + rad_i·ε_i` (an enclosure of the
    /// box; the radius is rounded up). An unbounded or undefined side gives an
    /// undefined component.
    pub fn from_box(b: &[Interval]) -> StateSet {
        let comps = b
            .iter()
            .enumerate()
            .map(|(i, iv)| match mid_rad(*iv) {
                Some((m, r)) => Affine::symbol(m, i, r),
                None => Affine::undefined(),
            })
            .collect();
        StateSet { comps, n_sym: b.len(), n_init: b.len() }
    }

    /// The single point `x` (the initial symbols exist, with zero coefficients).
    pub fn point(x: &[f64]) -> StateSet {
        StateSet { comps: x.iter().map(|&v| Affine::constant(v)).collect(), n_sym: x.len(), n_init: x.len() }
    }

    /// Builds a set from forms over the symbol space `0..num_symbols`, the first
    /// `num_initial` being initial symbols (see the type documentation).
    pub fn from_forms(comps: Vec<Affine>, num_symbols: usize, num_initial: usize) -> StateSet {
        let used = comps.iter().flat_map(|a| a.terms.iter().map(|t| t.0 + 1)).max().unwrap_or(0);
        StateSet { comps, n_sym: num_symbols.max(used).max(num_initial), n_init: num_initial }
    }

    /// Number of state dimensions.
    pub fn dim(&self) -> usize {
        self.comps.len()
    }

    /// Size of the symbol space (every symbol used is below this).
    pub fn num_symbols(&self) -> usize {
        self.n_sym
    }

    /// Number of initial symbols (`0..num_initial()`).
    pub fn num_initial(&self) -> usize {
        self.n_init
    }

    /// The form of each state.
    pub fn components(&self) -> &[Affine] {
        &self.comps
    }

    /// Whether some component is undefined.
    pub fn is_undefined(&self) -> bool {
        self.comps.iter().any(|a| a.is_undefined())
    }

    /// Makes the symbols this set mints from now on start at `base` or above (so that
    /// sets from different branches of a tree never give one number two meanings).
    pub fn reserve_symbols_below(&mut self, base: usize) {
        self.n_sym = self.n_sym.max(base);
    }

    /// A new symbol of this set's space.
    pub fn fresh_symbol(&mut self) -> usize {
        self.n_sym += 1;
        self.n_sym - 1
    }

    /// Sound interval hull of the set, one interval per state.
    pub fn to_box(&self) -> Vec<Interval> {
        self.comps.iter().map(|a| a.range()).collect()
    }

    /// The affine form of `e` (whose symbols are the states) over this set; its
    /// coefficients refer to this set's symbols. Guarantee: for every point of the set
    /// the value of `e` lies in the form at the same `ε`.
    pub fn eval_affine(&self, e: &crate::expr::Expr) -> Affine {
        e.eval(&mut AffineArith, &self.comps)
    }

    /// A sound enclosure of the values of `e` over the set: the range of the affine
    /// form, intersected with plain interval evaluation over the hull when both are
    /// defined. Undefined when the affine evaluation is.
    pub fn enclose(&self, e: &crate::expr::Expr) -> Interval {
        let a = self.eval_affine(e).range();
        if a.is_undefined() {
            return Interval::UNDEFINED;
        }
        let b = e.eval_interval(&self.to_box());
        if b.is_undefined() {
            return a;
        }
        a.intersect(&b).unwrap_or(a)
    }

    /// Adds the box `b` to the set (Minkowski sum), each bounded side as a fresh symbol
    /// on its own dimension.
    pub fn add_box(&mut self, b: &[Interval]) {
        for (i, iv) in b.iter().enumerate() {
            match mid_rad(*iv) {
                Some((m, r)) => {
                    let s = self.fresh_symbol();
                    let term = Affine::symbol(m, s, r);
                    self.comps[i] = self.comps[i].add(&term);
                }
                None => self.comps[i] = Affine::undefined(),
            }
        }
    }

    /// A sound over-approximation of the union of two sets of the same dimension over
    /// the same initial symbols: `(a + b)/2 + t·(c_a − c_b)/2` with one fresh symbol
    /// `t` shared by all dimensions (`t = 1` gives `a`'s centre, `t = −1` `b`'s), the
    /// differing generators boxed into the error radius.
    ///
    /// Panics if the dimensions differ (a programming error, not an input error).
    pub fn join(&self, other: &StateSet) -> StateSet {
        assert_eq!(self.dim(), other.dim(), "join of sets of different dimension");
        let mut n_sym = self.n_sym.max(other.n_sym);
        let t = n_sym;
        n_sym += 1;
        let half = Interval::point(0.5);
        let comps = self
            .comps
            .iter()
            .zip(&other.comps)
            .map(|(a, b)| {
                if a.is_undefined() || b.is_undefined() {
                    return Affine::undefined();
                }
                let mut terms = Vec::new();
                let mut e = a.e.max(b.e);
                let mut push = |sym: usize, iv: Interval, e: &mut f64| -> bool {
                    match mid_rad(iv) {
                        Some((m, r)) => {
                            if m != 0.0 {
                                terms.push((sym, m));
                            }
                            *e = add_up(*e, r);
                            true
                        }
                        None => false,
                    }
                };
                let (ca, cb) = (Interval::point(a.c), Interval::point(b.c));
                let Some((c, rc)) = mid_rad((ca + cb) * half) else { return Affine::undefined() };
                e = add_up(e, rc);
                if !push(t, (ca - cb) * half, &mut e) {
                    return Affine::undefined();
                }
                // Generators: mean in the form, half-difference boxed.
                let mut syms: Vec<usize> = a.terms.iter().chain(&b.terms).map(|t| t.0).collect();
                syms.sort_unstable();
                syms.dedup();
                for s in syms {
                    let (ga, gb) = (Interval::point(a.coeff(s)), Interval::point(b.coeff(s)));
                    if !push(s, (ga + gb) * half, &mut e) {
                        return Affine::undefined();
                    }
                    e = add_up(e, ((ga - gb) * half).mag());
                }
                Affine::from_parts(c, &terms, e)
            })
            .collect();
        StateSet { comps, n_sym, n_init: self.n_init.min(other.n_init) }
    }

    /// Girard-style order reduction to at most `max_generators` symbol terms (never
    /// fewer than the initial symbols plus one box generator per dimension): the error
    /// radii first become fresh axis-aligned symbols, then the non-initial generators
    /// with the smallest `‖g‖₁ − ‖g‖∞` are replaced by their axis-aligned bounding box
    /// (fresh symbols). The result contains the original set; non-initial symbols of
    /// the result are unrelated to those of the input.
    pub fn reduce(&mut self, max_generators: usize) {
        self.reduce_keeping(max_generators, &|_| false);
    }

    /// [`StateSet::reduce`], keeping every symbol for which `protect` holds as it is
    /// (like the initial symbols), so that constraints on those symbols keep their
    /// meaning. The caller bounds how many symbols it protects.
    pub fn reduce_keeping(&mut self, max_generators: usize, protect: &dyn Fn(usize) -> bool) {
        if self.is_undefined() {
            return;
        }
        let n = self.dim();
        let mut cols: BTreeMap<usize, Vec<f64>> = BTreeMap::new();
        for (i, a) in self.comps.iter().enumerate() {
            for &(s, g) in &a.terms {
                cols.entry(s).or_insert_with(|| vec![0.0; n])[i] = g;
            }
        }
        let mut boxed = vec![0.0f64; n];
        let mut others: Vec<(usize, Vec<f64>)> = Vec::new();
        let mut keep: Vec<(usize, Vec<f64>)> = Vec::new();
        for (s, col) in cols {
            if s < self.n_init || protect(s) {
                keep.push((s, col));
            } else {
                others.push((s, col));
            }
        }
        // Error radii become generators (axis-aligned, score 0 so boxed first).
        let mut axis_err: Vec<f64> = self.comps.iter().map(|a| a.e).collect();
        let room = max_generators.saturating_sub(keep.len() + n);
        if others.len() + keep.len() + axis_err.iter().filter(|e| **e > 0.0).count() > max_generators {
            let score = |c: &Vec<f64>| {
                let l1: f64 = c.iter().map(|v| v.abs()).sum();
                let linf = c.iter().fold(0.0f64, |m, v| m.max(v.abs()));
                l1 - linf
            };
            others.sort_by(|a, b| score(&b.1).total_cmp(&score(&a.1)));
            let dropped = others.split_off(room.min(others.len()));
            for (_, col) in dropped {
                for i in 0..n {
                    boxed[i] = add_up(boxed[i], col[i].abs());
                }
            }
        }
        for i in 0..n {
            boxed[i] = add_up(boxed[i], axis_err[i]);
            axis_err[i] = 0.0;
        }
        keep.extend(others);
        let mut terms: Vec<Vec<(usize, f64)>> = vec![Vec::new(); n];
        for (s, col) in keep {
            for i in 0..n {
                if col[i] != 0.0 {
                    terms[i].push((s, col[i]));
                }
            }
        }
        for i in 0..n {
            if boxed[i] > 0.0 {
                let s = self.fresh_symbol();
                terms[i].push((s, boxed[i]));
            }
        }
        for (i, t) in terms.into_iter().enumerate() {
            let c = self.comps[i].c;
            self.comps[i] = Affine::from_parts(c, &t, 0.0);
        }
    }

    /// Narrows symbols so that the set keeps only points whose components may lie in
    /// `b`: for component i = c + g·ε_k + rest, with |rest| ≤ ρ, the constraint
    /// a ≤ x_i ≤ b forces ε_k ∈ [(a − c − ρ)/g, (b − c + ρ)/g] ∩ [−1, 1]; the symbol is
    /// then re-parametrised as ε_k = m + r·ε′ in every component (rounding into the error
    /// radii). Only symbols for which `may_move` holds are re-parametrised (a symbol that
    /// constraints elsewhere refer to must keep its meaning). Only points outside `b` are
    /// removed, so the result encloses `set ∩ b`; `None` when they provably do not meet.
    pub fn contract_to_box(&self, b: &[Interval], may_move: &dyn Fn(usize) -> bool) -> Option<StateSet> {
        let mut comps: Vec<Affine> = self.comps.clone();
        for _round in 0..2 {
            for i in 0..comps.len() {
                let x = &comps[i];
                if x.is_undefined() || x.range().subset_of(&b[i]) {
                    continue;
                }
                let Some(&(k, g)) = x.terms().iter().filter(|t| may_move(t.0)).max_by(|p, q| p.1.abs().total_cmp(&q.1.abs())) else {
                    if x.range().intersect(&b[i]).is_none() {
                        return None;
                    }
                    continue;
                };
                // ρ: everything but the chosen term, rounded up.
                let rho = x.terms().iter().filter(|t| t.0 != k).fold(Interval::point(x.err()), |acc, t| acc + Interval::point(t.1.abs()));
                let rho = rho.hi();
                let c = Interval::point(x.center());
                let lo = Interval::point(b[i].lo()) - c - Interval::point(rho);
                let hi = Interval::point(b[i].hi()) - c + Interval::point(rho);
                let gi = Interval::point(g);
                let range = (lo / gi).hull(&(hi / gi));
                let Some(eps) = range.intersect(&Interval::new(-1.0, 1.0)) else {
                    return None; // no point of the set has component i in b
                };
                if eps.width() > 1.9 {
                    continue; // not worth a re-parametrisation
                }
                let Some((m, r)) = mid_rad(eps) else { continue };
                comps = comps.iter().map(|a| crate::star::substitute(a, k, m, r)).collect();
            }
        }
        Some(StateSet::from_forms(comps, self.n_sym, self.n_init))
    }

    /// Total number of symbol terms (generators) over all dimensions' distinct symbols.
    pub fn num_generators(&self) -> usize {
        let mut syms: Vec<usize> = self.comps.iter().flat_map(|a| a.terms.iter().map(|t| t.0)).collect();
        syms.sort_unstable();
        syms.dedup();
        syms.len()
    }

    /// Test helper: whether `p` may lie within `margin` (per coordinate) of the set.
    /// See [`Membership`] for the guarantee; build one with [`StateSet::membership`]
    /// to test many points against the same set.
    pub fn contains_point_with_margin(&self, p: &[f64], margin: f64) -> bool {
        self.membership(margin).contains(p)
    }

    /// [`StateSet::contains_point_with_margin`] with no margin.
    pub fn contains_point(&self, p: &[f64]) -> bool {
        self.contains_point_with_margin(p, 0.0)
    }

    /// A membership test of this set enlarged by `margin` per coordinate.
    pub fn membership(&self, margin: f64) -> Membership {
        let n = self.dim();
        let mut cols: BTreeMap<usize, Vec<f64>> = BTreeMap::new();
        for (i, a) in self.comps.iter().enumerate() {
            for &(s, g) in &a.terms {
                cols.entry(s).or_insert_with(|| vec![0.0; n])[i] = g;
            }
        }
        let gens: Vec<Vec<f64>> = cols.into_values().collect();
        let axis_rad: Vec<f64> = self.comps.iter().map(|a| add_up(a.e, margin.max(0.0))).collect();
        let mut all = gens.clone();
        for i in 0..n {
            let mut g = vec![0.0; n];
            g[i] = 1.0;
            all.push(g);
        }
        let mut normals = all.clone();
        if (2..=4).contains(&n) && all.len() >= n - 1 {
            let (m, k) = (all.len(), n - 1);
            // All k-subsets of the generators, in lexicographic order.
            let mut idx: Vec<usize> = (0..k).collect();
            loop {
                let vecs: Vec<&Vec<f64>> = idx.iter().map(|&j| &all[j]).collect();
                let d = cross(&vecs, n);
                if d.iter().any(|v| *v != 0.0) {
                    normals.push(d);
                }
                let Some(pos) = (0..k).rev().find(|&i| idx[i] < m - k + i) else { break };
                idx[pos] += 1;
                for l in pos + 1..k {
                    idx[l] = idx[l - 1] + 1;
                }
            }
        }
        // Support in each direction, in f64 (screening) and outward-rounded (proof).
        let supports = normals
            .iter()
            .map(|d| {
                let mut sf = 0.0f64;
                let mut mag = 0.0f64;
                let mut si = Interval::ZERO;
                for i in 0..n {
                    sf += (d[i] * axis_rad[i]).abs();
                    mag += (d[i] * axis_rad[i]).abs();
                    si = si + Interval::point(d[i]).abs() * Interval::point(axis_rad[i]);
                }
                for g in &gens {
                    let mut v = 0.0;
                    let mut vi = Interval::ZERO;
                    for i in 0..n {
                        v += d[i] * g[i];
                        mag += (d[i] * g[i]).abs();
                        vi = vi + Interval::point(d[i]) * Interval::point(g[i]);
                    }
                    sf += v.abs();
                    si = si + vi.abs();
                }
                (sf, mag, si.hi())
            })
            .collect();
        Membership {
            center: self.comps.iter().map(|a| a.c).collect(),
            normals,
            supports,
            defined: !self.is_undefined(),
        }
    }
}

/// A precomputed membership test of a zonotope (a test helper, not a bound).
///
/// [`Membership::contains`] returns `false` only when a separating direction `d` is
/// *proved*: `|d·(p − c)| > Σ_k |d·g_k| + Σ_i |d_i|·(e_i + margin)` in outward-rounded
/// arithmetic. Candidate directions are the coordinate axes, the generators and, for
/// dimensions 2 to 4, every facet normal of the zonotope (generalised cross products of
/// `dim − 1` generators, error radii and margin counted as axis generators), which makes
/// the test exact for full-dimensional zonotopes of those dimensions. For higher
/// dimensions it is a weaker one-sided check (a point reported inside may be outside).
pub struct Membership {
    center: Vec<f64>,
    normals: Vec<Vec<f64>>,
    /// Per normal: f64 support, sum of magnitudes (for the screening error bound), and
    /// an outward-rounded upper bound of the support.
    supports: Vec<(f64, f64, f64)>,
    defined: bool,
}

impl Membership {
    pub fn contains(&self, p: &[f64]) -> bool {
        let n = self.center.len();
        if !self.defined || p.len() != n {
            return false;
        }
        let diff: Vec<Interval> = (0..n).map(|i| Interval::point(p[i]) - Interval::point(self.center[i])).collect();
        for (d, &(sf, mag, s_hi)) in self.normals.iter().zip(&self.supports) {
            // Screening in f64: the slack is computed with an error below 1e-13 of the
            // magnitudes involved (dot-product bound γ_k·Σ|terms|, k < 1000), so a slack
            // above 1e-10 of them proves this direction does not separate.
            let mut lhs = 0.0f64;
            let mut m = mag;
            for i in 0..n {
                let t = d[i] * (p[i] - self.center[i]);
                lhs += t;
                m += t.abs();
            }
            if sf - lhs.abs() > 1e-10 * m {
                continue;
            }
            let mut li = Interval::ZERO;
            for i in 0..n {
                li = li + Interval::point(d[i]) * diff[i];
            }
            if li.abs().lo() > s_hi {
                return false;
            }
        }
        true
    }
}

/// Generalised cross product of `n − 1` vectors of `Rⁿ` (a normal of their span), by
/// cofactor expansion; approximate (only used to pick candidate directions).
fn cross(v: &[&Vec<f64>], n: usize) -> Vec<f64> {
    (0..n)
        .map(|j| {
            let rows: Vec<usize> = (0..n).filter(|&r| r != j).collect();
            let mut m: Vec<Vec<f64>> = rows.iter().map(|&r| v.iter().map(|c| c[r]).collect()).collect();
            let d = det(&mut m);
            if j % 2 == 0 {
                d
            } else {
                -d
            }
        })
        .collect()
}

fn det(m: &mut [Vec<f64>]) -> f64 {
    let k = m.len();
    if k == 0 {
        return 1.0;
    }
    let mut d = 1.0;
    for col in 0..k {
        let piv = (col..k).max_by(|&a, &b| m[a][col].abs().total_cmp(&m[b][col].abs())).unwrap_or(col);
        if m[piv][col] == 0.0 {
            return 0.0;
        }
        if piv != col {
            m.swap(piv, col);
            d = -d;
        }
        d *= m[col][col];
        for r in col + 1..k {
            let f = m[r][col] / m[col][col];
            let pivot_row = m[col].clone();
            for (x, v) in m[r].iter_mut().zip(&pivot_row).skip(col) {
                *x -= f * v;
            }
        }
    }
    d
}

#[cfg(test)]
mod tests {
    use super::*;
    use crate::expr::parse;

    fn names(n: &str) -> Option<usize> {
        ["x", "y", "z"].iter().position(|s| *s == n)
    }

    /// Sample points of the box `b` (corners, centre, a grid).
    fn grid(b: &[Interval], k: usize) -> Vec<Vec<f64>> {
        let mut pts = vec![vec![]];
        for iv in b {
            let mut next = Vec::new();
            for p in &pts {
                for j in 0..=k {
                    let mut q = p.clone();
                    q.push(iv.lo() + (iv.hi() - iv.lo()) * j as f64 / k as f64);
                    next.push(q);
                }
            }
            pts = next;
        }
        pts
    }

    #[test]
    fn affine_evaluation_encloses_samples() {
        // Soundness check against plain f64 evaluation at sample points (the real value
        // differs from f64 evaluation by rounding only, far below the enclosure slack
        // we would need to miss).
        let srcs = [
            "x * (1 - x) + cos(3 * y) / (2 + sin(x))",
            "exp(x) - log(y + 3) * sqrt(x + 2)",
            "x^2 - 2*x*y + y^2",
            "atan(x) + tanh(y) + atan2(y + 3, x + 4) + abs(x - y) + min(x, y) - max(x, 0.1)",
            "1 / (x + 3) + (y + 2)^0.5 + tan(0.3 * x)",
        ];
        let b = [Interval::new(-1.0, 0.5), Interval::new(-0.5, 1.0)];
        let set = StateSet::from_box(&b);
        for src in srcs {
            let e = parse(src, &names).unwrap();
            let a = set.eval_affine(&e);
            let r = a.range();
            for p in grid(&b, 12) {
                let v = e.eval_f64(&p);
                // The value at ε = (p − mid)/rad must lie in the form evaluated at ε.
                let eps: Vec<f64> = (0..2).map(|i| (p[i] - b[i].mid()) / b[i].rad()).collect();
                let lin = a.center() + a.coeff(0) * eps[0] + a.coeff(1) * eps[1];
                assert!(r.contains(v), "{src} at {p:?}: {v} not in {r:?}");
                assert!((v - lin).abs() <= a.err() * (1.0 + 1e-12) + 1e-12, "{src} at {p:?}: {v} vs {lin} ± {}", a.err());
            }
        }
    }

    #[test]
    fn affine_keeps_linear_dependency() {
        // x − x is exactly 0 in affine arithmetic (and [−w, w] in interval arithmetic).
        let set = StateSet::from_box(&[Interval::new(1.0, 2.0)]);
        let e = parse("x - x", &names).unwrap();
        let a = set.eval_affine(&e);
        assert_eq!(a.range(), Interval::ZERO);
        // A square encloses [0, 1] tightly (x ∈ [−1, 1]: x² ∈ [0, 1]).
        let s = StateSet::from_box(&[Interval::new(-1.0, 1.0)]);
        let r = s.eval_affine(&parse("x * x", &names).unwrap()).range();
        assert!(r.lo() <= 0.0 && r.lo() > -1e-12 && r.hi() >= 1.0 && r.hi() < 1.0 + 1e-12, "{r:?}");
    }

    #[test]
    fn nonlinear_functions_keep_the_correlation() {
        // f(x) − f(x) over x ∈ [0.4, 0.6]: interval arithmetic gives the full width of
        // f's range twice; the linearisations must cancel the linear part, leaving only
        // the (second-order) residuals.
        let set = StateSet::from_box(&[Interval::new(0.4, 0.6)]);
        for f in ["sin", "cos", "exp", "log", "sqrt", "atan", "tanh", "tan"] {
            let e = parse(&format!("{f}(x) - {f}(x)"), &names).unwrap();
            let w = set.eval_affine(&e).range().width();
            let plain = e.eval_interval(&set.to_box()).width();
            assert!(w < 0.3 * plain, "{f}: affine width {w}, interval width {plain}");
        }
        let e = parse("1 / (x + 1) - 1 / (x + 1)", &names).unwrap();
        assert!(set.eval_affine(&e).range().width() < 0.3 * e.eval_interval(&set.to_box()).width());
    }

    #[test]
    fn undefined_where_interval_is_undefined() {
        let set = StateSet::from_box(&[Interval::new(-1.0, 1.0)]);
        for src in ["log(x)", "1 / x", "sqrt(x)", "x ^ 0.5", "tan(2 * x)"] {
            let a = set.eval_affine(&parse(src, &names).unwrap());
            assert!(a.is_undefined(), "{src}");
            assert!(a.range().is_undefined(), "{src}");
        }
        let ok = set.eval_affine(&parse("sqrt(x + 1)", &names).unwrap());
        assert!(!ok.is_undefined());
        assert!(ok.range().contains(0.0) && ok.range().contains(2f64.sqrt()));
    }

    #[test]
    fn enclose_bounds_a_constraint_over_a_rotated_set() {
        // The set {(a + b, a − b)} for a, b ∈ [−1, 1]: x + y = 2a ∈ [−2, 2] exactly,
        // while the box hull [−2, 2]² would give [−4, 4].
        let a = Affine::from_parts(0.0, &[(0, 1.0), (1, 1.0)], 0.0);
        let b = Affine::from_parts(0.0, &[(0, 1.0), (1, -1.0)], 0.0);
        let set = StateSet::from_forms(vec![a, b], 2, 2);
        let e = parse("x + y", &names).unwrap();
        assert_eq!(set.enclose(&e), Interval::new(-2.0, 2.0));
        assert_eq!(set.eval_affine(&e).coeff(0), 2.0);
        assert_eq!(set.eval_affine(&e).coeff(1), 0.0);
        // An undefined expression stays undefined.
        assert!(set.enclose(&parse("log(x)", &names).unwrap()).is_undefined());
    }

    #[test]
    fn reduction_keeps_initial_symbols_and_encloses() {
        let b = [Interval::new(0.0, 1.0), Interval::new(-1.0, 1.0)];
        let mut set = StateSet::from_box(&b);
        let e0 = parse("x + 0.3 * y + 0.1 * x * y", &names).unwrap();
        let e1 = parse("y - 0.2 * x + 0.05 * x * x", &names).unwrap();
        // rotate a few times so many generators accumulate
        for _ in 0..5 {
            let c0 = set.eval_affine(&e0);
            let c1 = set.eval_affine(&e1);
            let mut n = StateSet::from_forms(vec![c0, c1], set.num_symbols(), 2);
            n.add_box(&[Interval::new(-1e-3, 1e-3), Interval::new(-1e-3, 1e-3)]);
            set = n;
        }
        let before = set.clone();
        set.reduce(4);
        assert!(set.num_generators() <= 4, "{}", set.num_generators());
        assert_eq!(set.components()[0].coeff(0), before.components()[0].coeff(0));
        assert_eq!(set.components()[1].coeff(1), before.components()[1].coeff(1));
        // Every point of the old zonotope (sampled at ε vertices) is in the new one.
        let syms: Vec<usize> = (0..before.num_symbols()).collect();
        let mut rng = 12345u64;
        for _ in 0..400 {
            let eps: Vec<f64> = syms
                .iter()
                .map(|_| {
                    rng ^= rng << 13;
                    rng ^= rng >> 7;
                    rng ^= rng << 17;
                    if rng % 2 == 0 {
                        1.0
                    } else {
                        -1.0
                    }
                })
                .collect();
            let p: Vec<f64> = before
                .components()
                .iter()
                .map(|a| a.center() + a.terms().iter().map(|&(s, g)| g * eps[s]).sum::<f64>())
                .collect();
            assert!(set.contains_point_with_margin(&p, 1e-12), "{p:?}");
        }
    }

    #[test]
    fn membership_is_exact_for_a_parallelogram() {
        // The parallelogram c + ε0·(1, 1) + ε1·(1, −1) is the square |x| + |y| ≤ 2 rotated:
        // (1.9, 0) is inside, (1.1, 1.1) outside although inside the box hull [−2, 2]²;
        // it is 0.1 per coordinate away from the nearest point (1, 1).
        let a = Affine::from_parts(0.0, &[(0, 1.0), (1, 1.0)], 0.0);
        let b = Affine::from_parts(0.0, &[(0, 1.0), (1, -1.0)], 0.0);
        let set = StateSet::from_forms(vec![a, b], 2, 2);
        assert!(set.contains_point(&[1.9, 0.0]));
        assert!(!set.contains_point(&[1.1, 1.1]));
        assert!(set.contains_point(&[1.0, 1.0]));
        assert!(set.contains_point_with_margin(&[1.1, 1.1], 0.11));
        assert!(!set.contains_point_with_margin(&[1.1, 1.1], 0.09));
    }

    #[test]
    fn join_contains_both() {
        let a = StateSet::from_box(&[Interval::new(0.0, 1.0), Interval::new(0.0, 1.0)]);
        let mut b = StateSet::from_box(&[Interval::new(2.0, 3.0), Interval::new(-1.0, 0.5)]);
        b.add_box(&[Interval::new(-0.1, 0.1), Interval::ZERO]);
        let j = a.join(&b);
        for p in grid(&a.to_box(), 4).into_iter().chain(grid(&b.to_box(), 4)) {
            assert!(j.contains_point(&p), "{p:?}");
        }
    }
}
