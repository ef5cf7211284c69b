//! Outward-rounded interval arithmetic.
//!
//! Guarantee: for every operation `op` and all reals `x ∈ X`, `y ∈ Y` at which the
//! real function is defined, `op(x, y) ∈ op(X, Y)`. When some point of the argument
//! lies outside the function's domain (log of a non-positive number, division by an
//! interval holding zero, tan at a pole, …) the result is [`Interval::UNDEFINED`],
//! which poisons everything computed from it and can never prove anything: every
//! comparison with NaN is false.
//!
//! Rounding: IEEE 754 `+ − × ÷ sqrt` are correctly rounded to nearest, so widening the
//! result by one ulp outward (`next_down` / `next_up`) encloses the exact value.
//! Elementary functions come from the platform libm; we assume it is accurate to
//! [`LIBM_ULPS`]` − 1` ulps (glibc documents at most 1–2 ulps for the functions used
//! here) and widen by [`LIBM_ULPS`]. The mpmath reference test checks this assumption.

use std::fmt;

/// Ulps by which results of libm functions are widened outward.
pub const LIBM_ULPS: u32 = 4;

/// A closed interval `[lo, hi]` of reals; infinite ends allowed, NaN ends mean "undefined".
#[derive(Clone, Copy, PartialEq)]
pub struct Interval {
    lo: f64,
    hi: f64,
}

impl fmt::Debug for Interval {
    fn fmt(&self, f: &mut fmt::Formatter<'_>) -> fmt::Result {
        write!(f, "[{:e}, {:e}]", self.lo, self.hi)
    }
}

impl fmt::Display for Interval {
    fn fmt(&self, f: &mut fmt::Formatter<'_>) -> fmt::Result {
        write!(f, "[{}, {}]", self.lo, self.hi)
    }
}

#[inline]
fn down(x: f64) -> f64 {
    x.next_down()
}
#[inline]
fn up(x: f64) -> f64 {
    x.next_up()
}
fn down_n(mut x: f64, n: u32) -> f64 {
    for _ in 0..n {
        x = x.next_down();
    }
    x
}
fn up_n(mut x: f64, n: u32) -> f64 {
    for _ in 0..n {
        x = x.next_up();
    }
    x
}

/// Product of two bounds where `0 × ∞` means 0 (bounds stand for reals, not for ∞).
#[inline]
fn bound_mul(a: f64, b: f64) -> f64 {
    if a == 0.0 || b == 0.0 {
        0.0
    } else {
        a * b
    }
}

/// π rounded down and up.
pub const PI_LO: f64 = 3.141592653589793; // f64 nearest to π is below π
pub const PI_HI: f64 = 3.1415926535897936; // next f64 above

impl Interval {
    /// The interval of everything undefined; poisons all operations.
    pub const UNDEFINED: Interval = Interval { lo: f64::NAN, hi: f64::NAN };
    /// The whole real line.
    pub const ENTIRE: Interval = Interval { lo: f64::NEG_INFINITY, hi: f64::INFINITY };
    pub const ZERO: Interval = Interval { lo: 0.0, hi: 0.0 };
    pub const ONE: Interval = Interval { lo: 1.0, hi: 1.0 };
    /// An enclosure of π.
    pub const PI: Interval = Interval { lo: PI_LO, hi: PI_HI };

    /// `[lo, hi]`; returns `UNDEFINED` if either end is NaN or `lo > hi`.
    pub fn new(lo: f64, hi: f64) -> Interval {
        if lo.is_nan() || hi.is_nan() || lo > hi {
            Interval::UNDEFINED
        } else {
            Interval { lo, hi }
        }
    }

    /// The point interval `[x, x]` (exact: `x` is the real it stands for).
    pub fn point(x: f64) -> Interval {
        Interval::new(x, x)
    }

    /// An enclosure of the real that the decimal literal `x` was rounded from:
    /// one ulp either side, since parsing rounds to nearest.
    pub fn around(x: f64) -> Interval {
        Interval::new(down(x), up(x))
    }

    pub fn lo(&self) -> f64 {
        self.lo
    }
    pub fn hi(&self) -> f64 {
        self.hi
    }
    pub fn is_undefined(&self) -> bool {
        self.lo.is_nan() || self.hi.is_nan()
    }
    pub fn is_bounded(&self) -> bool {
        self.lo.is_finite() && self.hi.is_finite()
    }
    /// Upper bound on the width `hi − lo`.
    pub fn width(&self) -> f64 {
        up(self.hi - self.lo)
    }
    /// A point inside the interval (not a bound; use only to choose, never to prove).
    pub fn mid(&self) -> f64 {
        if self.is_undefined() {
            f64::NAN
        } else if self.lo == f64::NEG_INFINITY && self.hi == f64::INFINITY {
            0.0
        } else if self.lo == f64::NEG_INFINITY {
            f64::MIN
        } else if self.hi == f64::INFINITY {
            f64::MAX
        } else {
            let m = 0.5 * self.lo + 0.5 * self.hi;
            m.clamp(self.lo, self.hi)
        }
    }
    /// Upper bound on the largest distance from `mid()` to an end.
    pub fn rad(&self) -> f64 {
        let m = self.mid();
        up((m - self.lo).max(self.hi - m))
    }
    /// Upper bound on `max |x|` over the interval.
    pub fn mag(&self) -> f64 {
        self.lo.abs().max(self.hi.abs())
    }
    /// Lower bound on `min |x|` over the interval.
    pub fn mig(&self) -> f64 {
        if self.contains_zero() {
            0.0
        } else {
            self.lo.abs().min(self.hi.abs())
        }
    }
    pub fn contains(&self, x: f64) -> bool {
        self.lo <= x && x <= self.hi
    }
    pub fn contains_zero(&self) -> bool {
        self.lo <= 0.0 && 0.0 <= self.hi
    }
    /// `self ⊆ other` (false when either is undefined).
    pub fn subset_of(&self, other: &Interval) -> bool {
        other.lo <= self.lo && self.hi <= other.hi
    }
    /// Smallest interval holding both (undefined if either is).
    pub fn hull(&self, other: &Interval) -> Interval {
        if self.is_undefined() || other.is_undefined() {
            return Interval::UNDEFINED;
        }
        Interval { lo: self.lo.min(other.lo), hi: self.hi.max(other.hi) }
    }
    /// Intersection; `None` when disjoint or undefined.
    pub fn intersect(&self, other: &Interval) -> Option<Interval> {
        let lo = self.lo.max(other.lo);
        let hi = self.hi.min(other.hi);
        if lo <= hi {
            Some(Interval { lo, hi })
        } else {
            None
        }
    }
    /// Widened by `r ≥ 0` on both sides, rounded outward.
    pub fn inflate(&self, r: f64) -> Interval {
        Interval::new(down(self.lo - r), up(self.hi + r))
    }
    /// The two halves at the midpoint.
    pub fn bisect(&self) -> (Interval, Interval) {
        let m = self.mid();
        (Interval { lo: self.lo, hi: m }, Interval { lo: m, hi: self.hi })
    }

    fn libm(lo: f64, hi: f64) -> Interval {
        Interval::new(down_n(lo, LIBM_ULPS), up_n(hi, LIBM_ULPS))
    }

    pub fn neg(self) -> Interval {
        Interval { lo: -self.hi, hi: -self.lo }
    }

    pub fn add(self, o: Interval) -> Interval {
        Interval::new(down(self.lo + o.lo), up(self.hi + o.hi))
    }

    pub fn sub(self, o: Interval) -> Interval {
        Interval::new(down(self.lo - o.hi), up(self.hi - o.lo))
    }

    pub fn mul(self, o: Interval) -> Interval {
        if self.is_undefined() || o.is_undefined() {
            return Interval::UNDEFINED;
        }
        let p = [
            bound_mul(self.lo, o.lo),
            bound_mul(self.lo, o.hi),
            bound_mul(self.hi, o.lo),
            bound_mul(self.hi, o.hi),
        ];
        let lo = p.iter().copied().fold(f64::INFINITY, f64::min);
        let hi = p.iter().copied().fold(f64::NEG_INFINITY, f64::max);
        Interval::new(down(lo), up(hi))
    }

    /// Multiplication by an exact scalar.
    pub fn scale(self, c: f64) -> Interval {
        self.mul(Interval::point(c))
    }

    /// Division; undefined when the divisor holds zero.
    pub fn div(self, o: Interval) -> Interval {
        if self.is_undefined() || o.is_undefined() || o.contains_zero() {
            return Interval::UNDEFINED;
        }
        let q = |a: f64, b: f64| -> f64 {
            if a == 0.0 {
                0.0
            } else {
                a / b
            }
        };
        let p = [q(self.lo, o.lo), q(self.lo, o.hi), q(self.hi, o.lo), q(self.hi, o.hi)];
        let lo = p.iter().copied().fold(f64::INFINITY, f64::min);
        let hi = p.iter().copied().fold(f64::NEG_INFINITY, f64::max);
        // ∞/∞ cannot occur as a bound pair that matters: if both ends are infinite the
        // quotient of the finite-magnitude side dominates; NaN from ∞/∞ is mapped outward.
        let lo = if lo.is_nan() { f64::NEG_INFINITY } else { lo };
        let hi = if hi.is_nan() { f64::INFINITY } else { hi };
        Interval::new(down(lo), up(hi))
    }

    pub fn recip(self) -> Interval {
        Interval::ONE.div(self)
    }

    /// `x²`, never negative.
    pub fn sqr(self) -> Interval {
        if self.is_undefined() {
            return self;
        }
        let m = self.mig();
        let g = self.mag();
        Interval::new(down(m * m).max(0.0), up(g * g))
    }

    /// `xⁿ` for an integer `n`; negative `n` is undefined when the base holds zero.
    pub fn powi(self, n: i32) -> Interval {
        if self.is_undefined() {
            return self;
        }
        if n == 0 {
            return Interval::ONE;
        }
        if n < 0 {
            // `unsigned_abs`, not `-n`: −i32::MIN does not fit in an i32.
            return self.powi_u(n.unsigned_abs()).recip();
        }
        self.powi_u(n as u32)
    }

    /// `xⁿ` for `n ≥ 1`, by repeated squaring: O(log n) products, not n (an exponent
    /// such as 797025325 from a spec would otherwise loop for seconds).
    fn powi_u(self, n: u32) -> Interval {
        // |x|^n on a non-negative range. Every factor is ≥ 0 and every product is rounded
        // outward, so each partial result bounds the exact one from below (above).
        let pow_round = |b: f64, round: fn(f64) -> f64| -> f64 {
            let (mut r, mut base, mut k) = (1.0f64, b, n);
            while k > 0 {
                if k & 1 == 1 {
                    r = round(r * base).max(0.0);
                }
                k >>= 1;
                if k > 0 {
                    base = round(base * base).max(0.0);
                }
            }
            r
        };
        let pow_down = |b: f64| pow_round(b, down);
        let pow_up = |b: f64| pow_round(b, up);
        if n % 2 == 0 {
            Interval::new(pow_down(self.mig()), pow_up(self.mag()))
        } else {
            // odd powers are increasing: sign follows the base
            let lo = if self.lo >= 0.0 { pow_down(self.lo) } else { -pow_up(-self.lo) };
            let hi = if self.hi >= 0.0 { pow_up(self.hi) } else { -pow_down(-self.hi) };
            Interval::new(lo, hi)
        }
    }

    /// `x^y` for real `y`, as `exp(y · log x)`: undefined unless `x > 0`.
    pub fn pow(self, y: Interval) -> Interval {
        if y.lo == y.hi && y.lo.fract() == 0.0 && y.lo.abs() <= i32::MAX as f64 {
            return self.powi(y.lo as i32);
        }
        y.mul(self.ln()).exp()
    }

    pub fn sqrt(self) -> Interval {
        if self.is_undefined() || self.lo < 0.0 {
            return Interval::UNDEFINED;
        }
        Interval::new(down(self.lo.sqrt()).max(0.0), up(self.hi.sqrt()))
    }

    pub fn exp(self) -> Interval {
        if self.is_undefined() {
            return self;
        }
        let i = Interval::libm(self.lo.exp(), self.hi.exp());
        Interval::new(i.lo.max(0.0), i.hi)
    }

    /// Natural logarithm; undefined unless `x > 0` everywhere.
    pub fn ln(self) -> Interval {
        if self.is_undefined() || self.lo <= 0.0 {
            return Interval::UNDEFINED;
        }
        Interval::libm(self.lo.ln(), self.hi.ln())
    }

    pub fn atan(self) -> Interval {
        if self.is_undefined() {
            return self;
        }
        let half_pi_hi = up(PI_HI / 2.0);
        let i = Interval::libm(self.lo.atan(), self.hi.atan());
        Interval::new(i.lo.max(-half_pi_hi), i.hi.min(half_pi_hi))
    }

    pub fn tanh(self) -> Interval {
        if self.is_undefined() {
            return self;
        }
        let i = Interval::libm(self.lo.tanh(), self.hi.tanh());
        Interval::new(i.lo.max(-1.0), i.hi.min(1.0))
    }

    pub fn abs(self) -> Interval {
        if self.is_undefined() {
            return self;
        }
        Interval { lo: self.mig(), hi: self.mag() }
    }

    pub fn min(self, o: Interval) -> Interval {
        if self.is_undefined() || o.is_undefined() {
            return Interval::UNDEFINED;
        }
        Interval { lo: self.lo.min(o.lo), hi: self.hi.min(o.hi) }
    }

    pub fn max(self, o: Interval) -> Interval {
        if self.is_undefined() || o.is_undefined() {
            return Interval::UNDEFINED;
        }
        Interval { lo: self.lo.max(o.lo), hi: self.hi.max(o.hi) }
    }

    /// Integers `m` such that `(m + offset)·π` may lie in the interval, as a range
    /// `m_min..=m_max`; `None` when there are too many to matter (width ≳ 2π).
    /// Generous on purpose: an extra candidate only widens the enclosure.
    fn multiples_of_pi(&self, offset: f64) -> Option<(i64, i64)> {
        let a = self.lo / PI_LO - offset;
        let b = self.hi / PI_LO - offset;
        let slack = |v: f64| v.abs() * 1e-14 + 1e-300;
        let m_min = (a - slack(a)).ceil();
        let m_max = (b + slack(b)).floor();
        if !(m_min.is_finite() && m_max.is_finite()) || m_max - m_min > 4.0 {
            return None;
        }
        Some((m_min as i64, m_max as i64))
    }

    /// cos: monotone between multiples of π; maximum 1 at even, minimum −1 at odd ones.
    pub fn cos(self) -> Interval {
        self.periodic(0.0, f64::cos)
    }

    /// sin: extrema at π/2 + mπ (maximum for even m, minimum for odd m).
    pub fn sin(self) -> Interval {
        self.periodic(0.5, f64::sin)
    }

    /// Enclosure of sin or cos (`f`), whose extrema lie at (m + offset)·π: the maximum 1
    /// for even m and the minimum −1 for odd m; between them `f` is monotone, so the
    /// ends and the extrema that may lie inside bound the image.
    fn periodic(self, offset: f64, f: fn(f64) -> f64) -> Interval {
        if self.is_undefined() {
            return self;
        }
        if !self.is_bounded() {
            return Interval::new(-1.0, 1.0);
        }
        let Some((m0, m1)) = self.multiples_of_pi(offset) else {
            return Interval::new(-1.0, 1.0);
        };
        let e = Interval::libm(f(self.lo), f(self.lo)).hull(&Interval::libm(f(self.hi), f(self.hi)));
        let (mut lo, mut hi) = (e.lo, e.hi);
        for m in m0..=m1 {
            if m.rem_euclid(2) == 0 {
                hi = 1.0;
            } else {
                lo = -1.0;
            }
        }
        Interval::new(lo.max(-1.0), hi.min(1.0))
    }

    /// tan: increasing between poles; undefined when a pole π/2 + mπ may lie inside.
    pub fn tan(self) -> Interval {
        if self.is_undefined() || !self.is_bounded() {
            return Interval::UNDEFINED;
        }
        match self.multiples_of_pi(0.5) {
            Some((m0, m1)) if m0 > m1 => Interval::libm(self.lo.tan(), self.hi.tan()),
            _ => Interval::UNDEFINED,
        }
    }

    /// Two-argument arctangent `atan2(y, x)` with values in `[−π, π]`.
    /// Over a box that may touch the branch cut (x < 0, y = 0) or the origin the
    /// enclosure is the whole `[−π, π]`; elsewhere the angle range of the box is taken
    /// at its corners (a box away from the origin is seen under an angle bounded by
    /// its extreme points).
    pub fn atan2(y: Interval, x: Interval) -> Interval {
        if y.is_undefined() || x.is_undefined() {
            return Interval::UNDEFINED;
        }
        let full = Interval::new(-PI_HI, PI_HI);
        if (y.contains_zero() && x.lo <= 0.0) || !y.is_bounded() || !x.is_bounded() {
            return full;
        }
        let mut lo = f64::INFINITY;
        let mut hi = f64::NEG_INFINITY;
        for yy in [y.lo, y.hi] {
            for xx in [x.lo, x.hi] {
                // Signed zeros at corners: the box stands for reals, so use +0 for
                // y = 0 on the right half-plane (x > 0 here), where atan2 is continuous.
                let a = (if yy == 0.0 { 0.0 } else { yy }).atan2(if xx == 0.0 { 0.0 } else { xx });
                lo = lo.min(a);
                hi = hi.max(a);
            }
        }
        let i = Interval::libm(lo, hi);
        Interval::new(i.lo.max(-PI_HI), i.hi.min(PI_HI))
    }
}

impl std::ops::Add for Interval {
    type Output = Interval;
    fn add(self, o: Interval) -> Interval {
        Interval::add(self, o)
    }
}
impl std::ops::Sub for Interval {
    type Output = Interval;
    fn sub(self, o: Interval) -> Interval {
        Interval::sub(self, o)
    }
}
impl std::ops::Mul for Interval {
    type Output = Interval;
    fn mul(self, o: Interval) -> Interval {
        Interval::mul(self, o)
    }
}
impl std::ops::Div for Interval {
    type Output = Interval;
    fn div(self, o: Interval) -> Interval {
        Interval::div(self, o)
    }
}
impl std::ops::Neg for Interval {
    type Output = Interval;
    fn neg(self) -> Interval {
        Interval::neg(self)
    }
}

/// Lower bound on `Σ aᵢ·bᵢ` for exact reals `aᵢ`, `bᵢ` given as f64.
pub fn dot_lower(a: &[f64], b: &[f64]) -> f64 {
    dot(a, b).lo
}

/// Enclosure of `Σ aᵢ·bᵢ` for exact f64 operands.
pub fn dot(a: &[f64], b: &[f64]) -> Interval {
    a.iter().zip(b).fold(Interval::ZERO, |s, (&x, &y)| s + Interval::point(x) * Interval::point(y))
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn pi_bounds_enclose_pi() {
        // π = 3.14159265358979323846… (common knowledge); the nearest f64 is below π.
        assert!(PI_LO < PI_HI);
        assert_eq!(PI_LO.next_up(), PI_HI);
        assert_eq!(PI_LO, std::f64::consts::PI);
    }

    #[test]
    fn addition_rounds_outward() {
        let x = Interval::point(0.1) + Interval::point(0.2);
        // 0.1 + 0.2 is not representable; the exact sum of the two doubles must be inside.
        assert!(x.lo() < 0.30000000000000004 && x.hi() >= 0.30000000000000004);
        assert!(x.lo() <= 0.3);
    }

    #[test]
    fn division_by_interval_with_zero_is_undefined() {
        assert!((Interval::ONE / Interval::new(-1.0, 1.0)).is_undefined());
        assert!((Interval::ONE / Interval::new(0.0, 1.0)).is_undefined());
        let q = Interval::ONE / Interval::new(2.0, 4.0);
        assert!(q.contains(0.25) && q.contains(0.5));
    }

    #[test]
    fn undefined_never_proves() {
        let u = Interval::UNDEFINED;
        assert!(!(u.lo() > 0.0));
        assert!(!(u.hi() < 0.0));
        assert!((u + Interval::ONE).is_undefined());
        assert!((u * Interval::ZERO).is_undefined());
    }

    #[test]
    fn even_power_of_straddling_interval_is_nonnegative() {
        let x = Interval::new(-2.0, 1.0).powi(2);
        assert_eq!(x.lo(), 0.0);
        assert!(x.hi() >= 4.0);
        let y = Interval::new(-2.0, 1.0).powi(3);
        assert!(y.lo() <= -8.0 && y.hi() >= 1.0);
    }

    #[test]
    fn large_integer_powers_are_enclosures_and_fast() {
        // Powers of two and of three below 2^53 are exact in binary floating point
        // (IEEE 754), so the exact values are known: 2^1001, 2^-1001, 3^20 = 3486784401.
        let x = Interval::new(0.5, 2.0).powi(1001);
        assert!(x.lo() <= 2f64.powi(-1001) && x.lo() > 0.0 && x.hi() >= 2f64.powi(1001));
        assert!(Interval::point(-3.0).powi(21).contains(-10460353203.0));
        assert!(Interval::point(3.0).powi(20).contains(3486784401.0));
        // An exponent found by fuzzing: a loop of n products took seconds; squaring is
        // immediate, and the result is still an enclosure (0^n = 0, 1.1^n overflows).
        assert!(Interval::point(0.0).powi(797_025_325).contains(0.0));
        assert_eq!(Interval::point(1.1).powi(797_025_325).hi(), f64::INFINITY);
        // The most negative exponent (−i32::MIN overflowed before): 4^−2³¹ is positive
        // and below the smallest normal double.
        let m = Interval::new(2.0, 4.0).powi(i32::MIN);
        assert!(!m.is_undefined() && m.lo() < f64::MIN_POSITIVE && m.hi() > 0.0, "{m:?}");
    }

    #[test]
    fn cos_over_zero_reaches_one() {
        let c = Interval::new(-0.1, 0.1).cos();
        assert_eq!(c.hi(), 1.0);
        let s = Interval::new(1.0, 2.0).sin();
        assert_eq!(s.hi(), 1.0); // π/2 ≈ 1.5708 is inside
        assert!(Interval::new(1.0, 2.0).tan().is_undefined());
    }

    #[test]
    fn atan2_across_branch_cut_is_full_circle() {
        let a = Interval::atan2(Interval::new(-0.1, 0.1), Interval::new(-2.0, -1.0));
        assert!(a.lo() <= -PI_LO && a.hi() >= PI_LO);
        let b = Interval::atan2(Interval::new(1.0, 2.0), Interval::new(1.0, 2.0));
        assert!(b.contains(std::f64::consts::FRAC_PI_4));
    }
}
