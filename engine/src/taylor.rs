//! Taylor-mode automatic differentiation of the solution of `dx/dt = f(x, p)`.
//!
//! A truncated series `a(t) = Σ_{k<L} a_k t^k` is a `Vec` of `L` coefficients. The
//! expression tree is evaluated over series with the classic recurrences (Cauchy
//! product, division, exp, log, sqrt, the sin/cos pair, tan, atan, tanh, atan2; integer
//! powers by repeated products). The coefficient arithmetic is generic ([`Coef`]):
//! affine forms for the polynomial part of a validated step, intervals over the a-priori
//! box for the Lagrange remainder.
//!
//! Guarantee: if every coefficient operation is an enclosure (as for [`Interval`] and
//! [`Affine`]), the computed `x_k` enclose `x^{(k)}(0)/k!` for every initial value
//! enclosed by `x0` — provided no [`TaylorFault`] is reported. `abs`, `min`, `max` and
//! the internal select are differentiated only where the sign of their argument is fixed
//! over the whole enclosure, `atan2` only away from its branch cut; elsewhere the
//! function is not smooth and the fault [`TaylorFault::NotSmooth`] tells the caller to
//! drop to an order that needs no derivative there.

use super::affine::Affine;
use super::expr::{Domain, Expr, Func, Number};
use super::interval::Interval;

/// Why Taylor coefficients could not be computed.
#[derive(Clone, Copy, Debug, PartialEq, Eq)]
pub enum TaylorFault {
    /// A kink (abs/min/max/select) or the atan2 branch cut may be met: derivatives of
    /// order ≥ 1 do not exist everywhere in the enclosure.
    NotSmooth,
    /// Some coefficient is undefined (domain violation or overflow).
    Undefined,
}

/// A coefficient arithmetic in which every operation encloses the real result.
pub trait Coef: Clone {
    fn from_interval(i: Interval) -> Self;
    fn zero() -> Self {
        Self::from_interval(Interval::ZERO)
    }
    fn add(&self, o: &Self) -> Self;
    fn sub(&self, o: &Self) -> Self;
    fn mul(&self, o: &Self) -> Self;
    fn div(&self, o: &Self) -> Self;
    fn neg(&self) -> Self;
    /// Multiplication by the exact constant `k`.
    fn scale(&self, k: f64) -> Self;
    /// Division by a small positive integer (an enclosure of `1/k` is used).
    fn div_int(&self, k: usize) -> Self {
        let inv = Interval::ONE / Interval::point(k as f64);
        self.mul(&Self::from_interval(inv))
    }
    fn unary(&self, f: Func) -> Self;
    fn atan2(y: &Self, x: &Self) -> Self;
    fn min(&self, o: &Self) -> Self;
    fn max(&self, o: &Self) -> Self;
    fn powi(&self, n: i32) -> Self;
    fn pow(&self, o: &Self) -> Self;
    fn select(p: &Self, q: &Self, lt: &Self, gt: &Self) -> Self;
    /// A sound enclosure of the coefficient's values.
    fn range(&self) -> Interval;
    /// Whether this is the exact constant 0 (products with it are skipped).
    fn is_zero(&self) -> bool;
    fn is_undefined(&self) -> bool;
}

/// `a·b`, skipped (None) when one factor is the exact constant 0 and the other is
/// defined; an undefined factor always poisons, as in interval arithmetic.
fn product_term<C: Coef>(a: &C, b: &C) -> Option<C> {
    if (a.is_zero() && !b.is_undefined()) || (b.is_zero() && !a.is_undefined()) {
        None
    } else {
        Some(a.mul(b))
    }
}

impl Coef for Interval {
    fn from_interval(i: Interval) -> Self {
        i
    }
    fn add(&self, o: &Self) -> Self {
        *self + *o
    }
    fn sub(&self, o: &Self) -> Self {
        *self - *o
    }
    fn mul(&self, o: &Self) -> Self {
        *self * *o
    }
    fn div(&self, o: &Self) -> Self {
        *self / *o
    }
    fn neg(&self) -> Self {
        -*self
    }
    fn scale(&self, k: f64) -> Self {
        *self * Interval::point(k)
    }
    fn unary(&self, f: Func) -> Self {
        super::expr::Intervals.call(f, &[*self])
    }
    fn atan2(y: &Self, x: &Self) -> Self {
        Interval::atan2(*y, *x)
    }
    fn min(&self, o: &Self) -> Self {
        Interval::min(*self, *o)
    }
    fn max(&self, o: &Self) -> Self {
        Interval::max(*self, *o)
    }
    fn powi(&self, n: i32) -> Self {
        Interval::powi(*self, n)
    }
    fn pow(&self, o: &Self) -> Self {
        Interval::pow(*self, *o)
    }
    fn select(p: &Self, q: &Self, lt: &Self, gt: &Self) -> Self {
        super::expr::Intervals.select(p, q, lt, gt)
    }
    fn range(&self) -> Interval {
        *self
    }
    fn is_zero(&self) -> bool {
        *self == Interval::ZERO
    }
    fn is_undefined(&self) -> bool {
        Interval::is_undefined(self)
    }
}

impl Coef for Affine {
    fn from_interval(i: Interval) -> Self {
        Affine::from_interval(i)
    }
    fn add(&self, o: &Self) -> Self {
        Affine::add(self, o)
    }
    fn sub(&self, o: &Self) -> Self {
        Affine::sub(self, o)
    }
    fn mul(&self, o: &Self) -> Self {
        Affine::mul(self, o)
    }
    fn div(&self, o: &Self) -> Self {
        Affine::div(self, o)
    }
    fn neg(&self) -> Self {
        Affine::neg(self)
    }
    fn scale(&self, k: f64) -> Self {
        Affine::scale(self, k)
    }
    fn unary(&self, f: Func) -> Self {
        super::affine::AffineArith.call(f, std::slice::from_ref(self))
    }
    fn atan2(y: &Self, x: &Self) -> Self {
        Affine::atan2(y, x)
    }
    fn min(&self, o: &Self) -> Self {
        Affine::min(self, o)
    }
    fn max(&self, o: &Self) -> Self {
        Affine::max(self, o)
    }
    fn powi(&self, n: i32) -> Self {
        Affine::powi(self, n)
    }
    fn pow(&self, o: &Self) -> Self {
        Affine::pow(self, o)
    }
    fn select(p: &Self, q: &Self, lt: &Self, gt: &Self) -> Self {
        Affine::select(p, q, lt, gt)
    }
    fn range(&self) -> Interval {
        Affine::range(self)
    }
    fn is_zero(&self) -> bool {
        self.center() == 0.0 && self.err() == 0.0 && self.terms().is_empty()
    }
    fn is_undefined(&self) -> bool {
        Affine::is_undefined(self)
    }
}

/// The [`Domain`] of truncated series with `len` coefficients over `C`.
pub struct Series<C: Coef> {
    len: usize,
    /// The first fault met (results after a fault are meaningless).
    pub fault: Option<TaylorFault>,
    _c: std::marker::PhantomData<C>,
}

impl<C: Coef> Series<C> {
    pub fn new(len: usize) -> Series<C> {
        Series { len: len.max(1), fault: None, _c: std::marker::PhantomData }
    }

    fn constant(&self, c: C) -> Vec<C> {
        let mut v = vec![C::zero(); self.len];
        v[0] = c;
        v
    }

    fn fail(&mut self, f: TaylorFault) {
        if self.fault.is_none() {
            self.fault = Some(f);
        }
    }

    /// Cauchy product, truncated (exact-zero coefficients are skipped: constants and
    /// parameters have zero higher coefficients).
    fn product(&self, a: &[C], b: &[C]) -> Vec<C> {
        (0..self.len)
            .map(|k| {
                let mut s = C::zero();
                for j in 0..=k {
                    if let Some(p) = product_term(&a[j], &b[k - j]) {
                        s = s.add(&p);
                    }
                }
                s
            })
            .collect()
    }

    /// `a / b`: `c_k = (a_k − Σ_{j=1..k} b_j c_{k−j}) / b_0`.
    fn quotient(&self, a: &[C], b: &[C]) -> Vec<C> {
        let mut c: Vec<C> = Vec::with_capacity(self.len);
        for k in 0..self.len {
            let mut s = a[k].clone();
            for j in 1..=k {
                if let Some(p) = product_term(&b[j], &c[k - j]) {
                    s = s.sub(&p);
                }
            }
            c.push(s.div(&b[0]));
        }
        c
    }

    /// `Σ_{j=1..k} j·a_j·q_{k−j}` — the common sum of `c' = a'·q` recurrences.
    fn weighted(a: &[C], q: &[C], k: usize) -> C {
        let mut s = C::zero();
        for j in 1..=k {
            if let Some(p) = product_term(&a[j], &q[k - j]) {
                s = s.add(&p.scale(j as f64));
            }
        }
        s
    }

    fn exp_series(&self, a: &[C]) -> Vec<C> {
        let mut c = vec![a[0].unary(Func::Exp)];
        for k in 1..self.len {
            let s = Self::weighted(a, &c, k);
            c.push(s.div_int(k));
        }
        c
    }

    fn log_series(&self, a: &[C]) -> Vec<C> {
        let mut c = vec![a[0].unary(Func::Log)];
        for k in 1..self.len {
            // k c_k a_0 = k a_k − Σ_{j=1}^{k−1} j c_j a_{k−j}
            let mut s = a[k].scale(k as f64);
            for j in 1..k {
                s = s.sub(&c[j].scale(j as f64).mul(&a[k - j]));
            }
            c.push(s.div(&a[0]).div_int(k));
        }
        c
    }

    fn sqrt_series(&self, a: &[C]) -> Vec<C> {
        let c0 = a[0].unary(Func::Sqrt);
        let two_c0 = c0.scale(2.0);
        let mut c = vec![c0];
        for k in 1..self.len {
            let mut s = a[k].clone();
            for j in 1..k {
                s = s.sub(&c[j].mul(&c[k - j]));
            }
            c.push(s.div(&two_c0));
        }
        c
    }

    fn sin_cos(&self, a: &[C]) -> (Vec<C>, Vec<C>) {
        let mut s = vec![a[0].unary(Func::Sin)];
        let mut c = vec![a[0].unary(Func::Cos)];
        for k in 1..self.len {
            let sk = Self::weighted(a, &c, k).div_int(k);
            let ck = Self::weighted(a, &s, k).div_int(k).neg();
            s.push(sk);
            c.push(ck);
        }
        (s, c)
    }

    /// `c' = q·a'` where `q_k` is computed from `c_0..c_k` by `qfn` (tan: `1 + c²`,
    /// tanh: `1 − c²`).
    fn riccati(&self, a: &[C], c0: C, sign: f64) -> Vec<C> {
        let mut c = vec![c0];
        let mut q: Vec<C> = Vec::new();
        for k in 1..self.len {
            // q_{k−1} = δ_{k−1,0} + sign·Σ_{j=0}^{k−1} c_j c_{k−1−j}
            let m = k - 1;
            let mut sq = c[0].mul(&c[m]);
            for j in 1..=m {
                sq = sq.add(&c[j].mul(&c[m - j]));
            }
            let qm = if m == 0 { C::from_interval(Interval::ONE).add(&sq.scale(sign)) } else { sq.scale(sign) };
            q.push(qm);
            c.push(Self::weighted(a, &q, k).div_int(k));
        }
        c
    }

    fn atan_series(&self, a: &[C]) -> Vec<C> {
        // q = 1 + a², k q_0 c_k = k a_k − Σ_{j=1}^{k−1} j c_j q_{k−j}
        let one = self.constant(C::from_interval(Interval::ONE));
        let q = {
            let sq = self.product(a, a);
            one.iter().zip(&sq).map(|(x, y)| x.add(y)).collect::<Vec<C>>()
        };
        let mut c = vec![a[0].unary(Func::Atan)];
        for k in 1..self.len {
            let mut s = a[k].scale(k as f64);
            for j in 1..k {
                s = s.sub(&c[j].scale(j as f64).mul(&q[k - j]));
            }
            c.push(s.div(&q[0]).div_int(k));
        }
        c
    }

    fn derivative(&self, a: &[C]) -> Vec<C> {
        let mut d: Vec<C> = (1..self.len).map(|k| a[k].scale(k as f64)).collect();
        d.push(C::zero());
        d
    }

    fn sign_fixed(&mut self, a: &C) -> Option<bool> {
        let r = a.range();
        if r.lo() > 0.0 {
            Some(true)
        } else if r.hi() < 0.0 {
            Some(false)
        } else {
            if r.is_undefined() {
                self.fail(TaylorFault::Undefined);
            } else {
                self.fail(TaylorFault::NotSmooth);
            }
            None
        }
    }
}

impl<C: Coef> Domain for Series<C> {
    type V = Vec<C>;
    fn num(&mut self, n: &Number) -> Vec<C> {
        self.constant(C::from_interval(n.enclosure()))
    }
    fn pi(&mut self) -> Vec<C> {
        self.constant(C::from_interval(Interval::PI))
    }
    fn neg(&mut self, a: &Vec<C>) -> Vec<C> {
        a.iter().map(|x| x.neg()).collect()
    }
    fn add(&mut self, a: &Vec<C>, b: &Vec<C>) -> Vec<C> {
        a.iter().zip(b).map(|(x, y)| x.add(y)).collect()
    }
    fn sub(&mut self, a: &Vec<C>, b: &Vec<C>) -> Vec<C> {
        a.iter().zip(b).map(|(x, y)| x.sub(y)).collect()
    }
    fn mul(&mut self, a: &Vec<C>, b: &Vec<C>) -> Vec<C> {
        self.product(a, b)
    }
    fn div(&mut self, a: &Vec<C>, b: &Vec<C>) -> Vec<C> {
        self.quotient(a, b)
    }
    fn powi(&mut self, a: &Vec<C>, n: i32) -> Vec<C> {
        if self.len == 1 {
            return vec![a[0].powi(n)];
        }
        if n == 0 {
            return self.constant(C::from_interval(Interval::ONE));
        }
        let m = n.unsigned_abs();
        let mut result: Option<Vec<C>> = None;
        let mut base = a.clone();
        let mut k = m;
        while k > 0 {
            if k & 1 == 1 {
                result = Some(match result {
                    None => base.clone(),
                    Some(r) => self.product(&r, &base),
                });
            }
            k >>= 1;
            if k > 0 {
                base = self.product(&base, &base);
            }
        }
        let p = result.unwrap_or_else(|| self.constant(C::from_interval(Interval::ONE)));
        if n < 0 {
            let one = self.constant(C::from_interval(Interval::ONE));
            self.quotient(&one, &p)
        } else {
            p
        }
    }
    fn pow(&mut self, a: &Vec<C>, b: &Vec<C>) -> Vec<C> {
        if self.len == 1 {
            return vec![a[0].pow(&b[0])];
        }
        // An exact integer constant exponent is an integer power.
        let b0 = b[0].range();
        let constant = b[1..].iter().all(|x| x.range() == Interval::ZERO);
        if constant && b0.lo() == b0.hi() && b0.lo().fract() == 0.0 && b0.lo().abs() <= 1024.0 {
            return self.powi(a, b0.lo() as i32);
        }
        let l = self.log_series(a);
        let p = self.product(b, &l);
        self.exp_series(&p)
    }
    fn call(&mut self, f: Func, x: &[Vec<C>]) -> Vec<C> {
        if self.len == 1 {
            return vec![match f {
                Func::Atan2 => C::atan2(&x[0][0], &x[1][0]),
                Func::Min => x[0][0].min(&x[1][0]),
                Func::Max => x[0][0].max(&x[1][0]),
                _ => x[0][0].unary(f),
            }];
        }
        let a = &x[0];
        match f {
            Func::Exp => self.exp_series(a),
            Func::Log => self.log_series(a),
            Func::Sqrt => self.sqrt_series(a),
            Func::Sin => self.sin_cos(a).0,
            Func::Cos => self.sin_cos(a).1,
            Func::Tan => {
                let c0 = a[0].unary(Func::Tan);
                self.riccati(a, c0, 1.0)
            }
            Func::Tanh => {
                let c0 = a[0].unary(Func::Tanh);
                self.riccati(a, c0, -1.0)
            }
            Func::Atan => self.atan_series(a),
            Func::Abs => match self.sign_fixed(&a[0]) {
                Some(true) => a.clone(),
                Some(false) => self.neg(a),
                None => a.clone(),
            },
            Func::Min | Func::Max => {
                let d = self.sub(&x[0], &x[1]);
                match self.sign_fixed(&d[0]) {
                    // x0 > x1
                    Some(true) => if f == Func::Min { x[1].clone() } else { x[0].clone() },
                    Some(false) => if f == Func::Min { x[0].clone() } else { x[1].clone() },
                    None => x[0].clone(),
                }
            }
            Func::Atan2 => {
                let (y, xx) = (&x[0], &x[1]);
                let (yr, xr) = (y[0].range(), xx[0].range());
                if yr.is_undefined() || xr.is_undefined() {
                    self.fail(TaylorFault::Undefined);
                    return y.clone();
                }
                if yr.contains_zero() && xr.lo() <= 0.0 {
                    self.fail(TaylorFault::NotSmooth);
                    return y.clone();
                }
                // c' = (x y' − y x') / (x² + y²)
                let num_ = {
                    let a1 = self.product(xx, &self.derivative(y));
                    let a2 = self.product(y, &self.derivative(xx));
                    self.sub(&a1, &a2)
                };
                let r2 = {
                    let p1 = self.product(xx, xx);
                    let p2 = self.product(y, y);
                    self.add(&p1, &p2)
                };
                let q = self.quotient(&num_, &r2);
                let mut c = vec![C::atan2(&y[0], &xx[0])];
                for k in 1..self.len {
                    c.push(q[k - 1].div_int(k));
                }
                c
            }
        }
    }
    fn select(&mut self, p: &Vec<C>, q: &Vec<C>, lt: &Vec<C>, gt: &Vec<C>) -> Vec<C> {
        if self.len == 1 {
            return vec![C::select(&p[0], &q[0], &lt[0], &gt[0])];
        }
        let d = self.sub(p, q);
        match self.sign_fixed(&d[0]) {
            Some(true) => gt.clone(),
            Some(false) => lt.clone(),
            None => lt.clone(),
        }
    }
}

/// Taylor coefficients `x_0..=x_order` (per state) of the solution of `x' = f(x, p)`
/// through `x0`, with the parameters `params` held constant. `f[i]` is over the symbols
/// states, then parameters. Guarantee: see the module documentation.
pub fn ode_coefficients<C: Coef>(f: &[Expr], x0: &[C], params: &[C], order: usize) -> Result<Vec<Vec<C>>, TaylorFault> {
    let n = x0.len();
    let mut xs: Vec<Vec<C>> = x0.iter().map(|x| vec![x.clone()]).collect();
    for k in 0..order {
        let len = k + 1;
        let mut dom = Series::<C>::new(len);
        let mut vars: Vec<Vec<C>> = xs.clone();
        for p in params {
            let mut s = vec![C::zero(); len];
            s[0] = p.clone();
            vars.push(s);
        }
        let fs: Vec<Vec<C>> = f.iter().map(|fi| fi.eval(&mut dom, &vars)).collect();
        if let Some(fault) = dom.fault {
            return Err(fault);
        }
        for i in 0..n {
            let next = fs[i][k].div_int(k + 1);
            if next.range().is_undefined() {
                return Err(TaylorFault::Undefined);
            }
            xs[i].push(next);
        }
    }
    Ok(xs)
}

#[cfg(test)]
mod tests {
    use super::*;
    use crate::expr::parse;

    fn names(n: &str) -> Option<usize> {
        ["x", "y"].iter().position(|s| *s == n)
    }

    fn coeffs_f64(src: &[&str], x0: &[f64], order: usize) -> Vec<Vec<Interval>> {
        let f: Vec<Expr> = src.iter().map(|s| parse(s, &names).unwrap()).collect();
        let x: Vec<Interval> = x0.iter().map(|&v| Interval::point(v)).collect();
        ode_coefficients(&f, &x, &[], order).unwrap()
    }

    #[test]
    fn exponential_decay_coefficients() {
        // x' = −x, x(0) = 1: x(t) = e^{−t}, coefficients (−1)^k / k! (textbook series).
        let c = coeffs_f64(&["-x"], &[1.0], 6);
        let mut fact = 1.0;
        for k in 0..=6 {
            if k > 0 {
                fact *= k as f64;
            }
            let want = if k % 2 == 0 { 1.0 } else { -1.0 } / fact;
            assert!(c[0][k].contains(want) || (c[0][k].mid() - want).abs() < 1e-15, "k={k}: {:?} vs {want}", c[0][k]);
        }
    }

    #[test]
    fn coefficients_match_finite_differences_of_functions() {
        // x' = f(x) for several f; compare the Taylor polynomial with an RK4 solution at
        // small t (a consistency check of the recurrences, RK4 error ~ 1e-13 here).
        let cases = [
            "sin(x) + cos(x)",
            "exp(-x) * sqrt(x + 2)",
            "log(x + 3) - tan(0.3 * x)",
            "atan(x) + tanh(x)",
            "1 / (x + 2) + x^3",
            "atan2(x + 1, 2)",
            "abs(x + 5) + min(x, 7) - max(x, -4)",
            "(x + 2)^1.5",
        ];
        for src in cases {
            let f = parse(src, &names).unwrap();
            let x0 = 0.4;
            let c = coeffs_f64(&[src], &[x0], 6);
            let t: f64 = 0.05;
            let poly: f64 = (0..=6).map(|k| c[0][k].mid() * t.powi(k as i32)).sum();
            let mut x = x0;
            let steps = 200;
            let h = t / steps as f64;
            let g = |x: f64| f.eval_f64(&[x]);
            for _ in 0..steps {
                let k1 = g(x);
                let k2 = g(x + 0.5 * h * k1);
                let k3 = g(x + 0.5 * h * k2);
                let k4 = g(x + h * k3);
                x += h / 6.0 * (k1 + 2.0 * k2 + 2.0 * k3 + k4);
            }
            // truncation ~ |x_7| t^7 ≈ 1e-9 at most for these mild functions
            assert!((poly - x).abs() < 1e-8, "{src}: {poly} vs {x}");
        }
    }

    #[test]
    fn undefined_is_never_skipped() {
        // 0 · log(x) with x ≤ 0 is undefined in interval arithmetic; the series must be too.
        let f = vec![parse("0 * log(x) + 1", &names).unwrap()];
        let x = vec![Interval::new(-1.0, 1.0)];
        assert_eq!(ode_coefficients(&f, &x, &[], 3).unwrap_err(), TaylorFault::Undefined);
        let xa = vec![Affine::from_interval(Interval::new(-1.0, 1.0))];
        assert_eq!(ode_coefficients(&f, &xa, &[], 3).unwrap_err(), TaylorFault::Undefined);
    }

    #[test]
    fn kink_inside_the_enclosure_is_reported() {
        let f = vec![parse("abs(x)", &names).unwrap()];
        let x = vec![Interval::new(-1.0, 1.0)];
        assert_eq!(ode_coefficients(&f, &x, &[], 3).unwrap_err(), TaylorFault::NotSmooth);
        // order 1 needs no derivative of abs
        assert!(ode_coefficients(&f, &x, &[], 1).is_ok());
    }
}
