//! The expression language of dynamics, observations and unsafe constraints.
//!
//! Grammar (precedence low → high): `+ -` (left), `* /` (left), unary `-`, `^` (right),
//! atoms: numbers (`1`, `2.5`, `1e-3`), names, `pi`, parenthesised expressions and calls
//! `f(a, …)` of `sin cos tan exp log sqrt abs atan atan2 tanh min max`.
//!
//! An expression is parsed once into an [`Expr`] whose names are bound to indices of a
//! symbol table, then evaluated over any [`Domain`] (f64, intervals, affine forms,
//! Taylor series), and differentiated symbolically with [`Expr::diff`].

use super::interval::Interval;
use std::fmt;

/// A built-in function.
#[derive(Clone, Copy, Debug, PartialEq, Eq, Hash)]
pub enum Func {
    Sin,
    Cos,
    Tan,
    Exp,
    Log,
    Sqrt,
    Abs,
    Atan,
    Atan2,
    Tanh,
    Min,
    Max,
}

impl Func {
    pub const ALL: [Func; 12] = [
        Func::Sin,
        Func::Cos,
        Func::Tan,
        Func::Exp,
        Func::Log,
        Func::Sqrt,
        Func::Abs,
        Func::Atan,
        Func::Atan2,
        Func::Tanh,
        Func::Min,
        Func::Max,
    ];
    pub fn name(self) -> &'static str {
        match self {
            Func::Sin => "sin",
            Func::Cos => "cos",
            Func::Tan => "tan",
            Func::Exp => "exp",
            Func::Log => "log",
            Func::Sqrt => "sqrt",
            Func::Abs => "abs",
            Func::Atan => "atan",
            Func::Atan2 => "atan2",
            Func::Tanh => "tanh",
            Func::Min => "min",
            Func::Max => "max",
        }
    }
    pub fn arity(self) -> usize {
        match self {
            Func::Atan2 | Func::Min | Func::Max => 2,
            _ => 1,
        }
    }
    pub fn from_name(s: &str) -> Option<Func> {
        Func::ALL.iter().copied().find(|f| f.name() == s)
    }
}

/// A numeric literal: its nearest f64, and whether that f64 is the literal exactly.
#[derive(Clone, Copy, Debug, PartialEq)]
pub struct Number {
    pub value: f64,
    pub exact: bool,
}

impl Number {
    pub fn exact(value: f64) -> Number {
        Number { value, exact: true }
    }
    /// An interval holding the real number the literal denotes.
    pub fn enclosure(&self) -> Interval {
        if self.exact {
            Interval::point(self.value)
        } else {
            Interval::around(self.value)
        }
    }
}

/// A parsed, bound expression.
#[derive(Clone, Debug, PartialEq)]
pub enum Expr {
    Num(Number),
    /// The constant π.
    Pi,
    /// Symbol by index in the table it was bound against.
    Var(usize),
    Neg(Box<Expr>),
    Add(Box<Expr>, Box<Expr>),
    Sub(Box<Expr>, Box<Expr>),
    Mul(Box<Expr>, Box<Expr>),
    Div(Box<Expr>, Box<Expr>),
    /// Power with a literal integer exponent (defined for every base).
    PowI(Box<Expr>, i32),
    /// Power with a real exponent, `exp(b · log a)`; defined for `a > 0`.
    Pow(Box<Expr>, Box<Expr>),
    Call(Func, Vec<Expr>),
    /// Internal (never parsed), produced by [`Expr::diff`]: `lt` where `p < q`, `gt` where
    /// `p > q`, and the hull of both where they may be equal.
    Select(Box<[Expr; 4]>),
}

/// Where parsing or binding went wrong: a 1-based column and a message.
#[derive(Clone, Debug, PartialEq, thiserror::Error)]
#[error("column {column}: {message}")]
pub struct ParseError {
    pub column: usize,
    pub message: String,
}

/// Reserved names that cannot be used as symbols.
pub fn is_reserved(name: &str) -> bool {
    name == "pi" || Func::from_name(name).is_some()
}

#[derive(Clone, Debug, PartialEq)]
enum Tok {
    Num(f64, bool),
    Name(String),
    Op(char),
    End,
}

struct Lexer<'a> {
    src: &'a str,
    toks: Vec<(Tok, usize)>,
}

impl<'a> Lexer<'a> {
    fn run(src: &'a str) -> Result<Vec<(Tok, usize)>, ParseError> {
        let mut lx = Lexer { src, toks: Vec::new() };
        let b = src.as_bytes();
        let mut i = 0;
        while i < b.len() {
            let c = b[i] as char;
            let col = src[..i].chars().count() + 1;
            if c.is_ascii_whitespace() {
                i += 1;
            } else if c.is_ascii_digit() || (c == '.' && i + 1 < b.len() && (b[i + 1] as char).is_ascii_digit()) {
                let start = i;
                while i < b.len() && ((b[i] as char).is_ascii_digit() || b[i] == b'.') {
                    i += 1;
                }
                if i < b.len() && (b[i] == b'e' || b[i] == b'E') {
                    let save = i;
                    i += 1;
                    if i < b.len() && (b[i] == b'+' || b[i] == b'-') {
                        i += 1;
                    }
                    if i < b.len() && (b[i] as char).is_ascii_digit() {
                        while i < b.len() && (b[i] as char).is_ascii_digit() {
                            i += 1;
                        }
                    } else {
                        i = save; // not an exponent: `2e` is a number followed by a name
                    }
                }
                let text = &lx.src[start..i];
                let v: f64 = text
                    .parse()
                    .map_err(|_| ParseError { column: col, message: format!("malformed number '{text}'") })?;
                if !v.is_finite() {
                    return Err(ParseError { column: col, message: format!("number '{text}' is out of range") });
                }
                lx.toks.push((Tok::Num(v, literal_is_exact(text, v)), col));
            } else if c.is_ascii_alphabetic() || c == '_' {
                let start = i;
                while i < b.len() && ((b[i] as char).is_ascii_alphanumeric() || b[i] == b'_') {
                    i += 1;
                }
                lx.toks.push((Tok::Name(lx.src[start..i].to_string()), col));
            } else if "+-*/^(),".contains(c) {
                lx.toks.push((Tok::Op(c), col));
                i += 1;
            } else {
                let ch = src[i..].chars().next().unwrap_or('?');
                return Err(ParseError { column: col, message: format!("unexpected character '{ch}'") });
            }
        }
        let end = src.chars().count() + 1;
        lx.toks.push((Tok::End, end));
        Ok(lx.toks)
    }
}

/// Whether the decimal literal `text` equals the f64 `v` exactly. Integers below 2^53
/// are; so are literals whose decimal expansion of `v` reproduces them. Anything we
/// cannot be sure of is treated as inexact (a one-ulp enclosure), which is always sound.
fn literal_is_exact(text: &str, v: f64) -> bool {
    if !text.contains(['.', 'e', 'E']) {
        return v.abs() < 9007199254740992.0;
    }
    // A dyadic value with a short exact decimal expansion (0.5, 0.25, 1.5e1 …):
    // multiply by powers of two until integral, all exact in f64.
    let mut x = v;
    for _ in 0..60 {
        if x.fract() == 0.0 {
            break;
        }
        x *= 2.0;
    }
    if x.fract() != 0.0 {
        return false;
    }
    // `v` is dyadic; it equals the decimal literal iff formatting `v` exactly (Rust's
    // Display prints the shortest round-trip string, which for these is exact only when
    // it parses to a value whose decimal digits match) — compare as rationals instead:
    exact_decimal_eq(text, v)
}

/// Compare a decimal literal with a dyadic f64 exactly, using integer arithmetic on
/// the literal's digits (small exponents only; otherwise report "not exact").
fn exact_decimal_eq(text: &str, v: f64) -> bool {
    let lower = text.to_ascii_lowercase();
    let (mant, exp) = match lower.split_once('e') {
        Some((m, e)) => (m.to_string(), e.parse::<i32>().unwrap_or(i32::MAX)),
        None => (lower.clone(), 0),
    };
    if exp.abs() > 30 {
        return false;
    }
    let (int, frac) = mant.split_once('.').unwrap_or((&mant, ""));
    let digits = format!("{int}{frac}");
    let scale = frac.len() as i32 - exp; // literal = digits · 10^(−scale)
    let Ok(d) = digits.trim_start_matches('0').parse::<u128>().or_else(|e| if digits.chars().all(|c| c == '0') { Ok(0) } else { Err(e) }) else {
        return false;
    };
    // v = d · 10^(−scale)  ⇔  v · 10^scale = d (for scale ≥ 0) or v = d · 10^(−scale)
    if scale >= 0 {
        if scale > 38 {
            return false;
        }
        // v·10^scale exactly: v = n / 2^k with n integer.
        let mut k = 0u32;
        let mut n = v.abs();
        while n.fract() != 0.0 && k < 1100 {
            n *= 2.0;
            k += 1;
        }
        if n > 1e30 || k > 100 {
            return false;
        }
        let n = n as u128;
        // d · 2^k == n · 10^scale ?
        let lhs = d.checked_mul(1u128.checked_shl(k).unwrap_or(0));
        let rhs = 10u128.checked_pow(scale as u32).and_then(|p| n.checked_mul(p));
        matches!((lhs, rhs), (Some(a), Some(b)) if a == b && k < 128)
    } else {
        let p = 10u128.checked_pow((-scale) as u32);
        match p.and_then(|p| d.checked_mul(p)) {
            Some(m) => (m as f64) == v.abs() && (m as f64) < 9007199254740992.0,
            None => false,
        }
    }
}

struct Parser<'a, F: Fn(&str) -> Option<usize>> {
    toks: Vec<(Tok, usize)>,
    pos: usize,
    resolve: &'a F,
}

impl<'a, F: Fn(&str) -> Option<usize>> Parser<'a, F> {
    fn peek(&self) -> &Tok {
        &self.toks[self.pos].0
    }
    fn col(&self) -> usize {
        self.toks[self.pos].1
    }
    fn next(&mut self) -> (Tok, usize) {
        let t = self.toks[self.pos].clone();
        if self.pos + 1 < self.toks.len() {
            self.pos += 1;
        }
        t
    }
    fn err<T>(&self, column: usize, message: impl Into<String>) -> Result<T, ParseError> {
        Err(ParseError { column, message: message.into() })
    }
    fn expect(&mut self, c: char) -> Result<(), ParseError> {
        match self.peek() {
            Tok::Op(o) if *o == c => {
                self.next();
                Ok(())
            }
            Tok::End => self.err(self.col(), format!("expected '{c}' but the expression ended")),
            t => self.err(self.col(), format!("expected '{c}', found {}", describe(t))),
        }
    }

    fn expression(&mut self) -> Result<Expr, ParseError> {
        let mut lhs = self.term()?;
        loop {
            match self.peek() {
                Tok::Op('+') => {
                    self.next();
                    lhs = Expr::Add(Box::new(lhs), Box::new(self.term()?));
                }
                Tok::Op('-') => {
                    self.next();
                    lhs = Expr::Sub(Box::new(lhs), Box::new(self.term()?));
                }
                _ => return Ok(lhs),
            }
        }
    }

    fn term(&mut self) -> Result<Expr, ParseError> {
        let mut lhs = self.unary()?;
        loop {
            match self.peek() {
                Tok::Op('*') => {
                    self.next();
                    lhs = Expr::Mul(Box::new(lhs), Box::new(self.unary()?));
                }
                Tok::Op('/') => {
                    self.next();
                    lhs = Expr::Div(Box::new(lhs), Box::new(self.unary()?));
                }
                _ => return Ok(lhs),
            }
        }
    }

    fn unary(&mut self) -> Result<Expr, ParseError> {
        match self.peek() {
            Tok::Op('-') => {
                self.next();
                Ok(Expr::Neg(Box::new(self.unary()?)))
            }
            Tok::Op('+') => {
                self.next();
                self.unary()
            }
            _ => self.power(),
        }
    }

    /// `a ^ b`, right-associative, binding tighter than unary minus: `-x^2 = -(x^2)`.
    fn power(&mut self) -> Result<Expr, ParseError> {
        let base = self.atom()?;
        if let Tok::Op('^') = self.peek() {
            self.next();
            let exp_col = self.col();
            let exp = self.unary_in_exponent()?;
            if let Some(n) = integer_literal(&exp) {
                if n.abs() > 1024 {
                    return self.err(exp_col, format!("integer exponent {n} is out of range (|n| ≤ 1024)"));
                }
                return Ok(Expr::PowI(Box::new(base), n));
            }
            return Ok(Expr::Pow(Box::new(base), Box::new(exp)));
        }
        Ok(base)
    }

    fn unary_in_exponent(&mut self) -> Result<Expr, ParseError> {
        match self.peek() {
            Tok::Op('-') => {
                self.next();
                Ok(Expr::Neg(Box::new(self.unary_in_exponent()?)))
            }
            _ => self.power(),
        }
    }

    fn atom(&mut self) -> Result<Expr, ParseError> {
        let (tok, col) = self.next();
        match tok {
            Tok::Num(v, exact) => Ok(Expr::Num(Number { value: v, exact })),
            Tok::Op('(') => {
                let e = self.expression()?;
                self.expect(')')?;
                Ok(e)
            }
            Tok::Name(name) => {
                if let Tok::Op('(') = self.peek() {
                    let Some(f) = Func::from_name(&name) else {
                        return self.err(col, format!("unknown function '{name}'"));
                    };
                    self.next();
                    let mut args = Vec::new();
                    if !matches!(self.peek(), Tok::Op(')')) {
                        loop {
                            args.push(self.expression()?);
                            if let Tok::Op(',') = self.peek() {
                                self.next();
                            } else {
                                break;
                            }
                        }
                    }
                    self.expect(')')?;
                    if args.len() != f.arity() {
                        return self.err(
                            col,
                            format!("{} takes {} argument(s), got {}", f.name(), f.arity(), args.len()),
                        );
                    }
                    return Ok(Expr::Call(f, args));
                }
                if name == "pi" {
                    return Ok(Expr::Pi);
                }
                if Func::from_name(&name).is_some() {
                    return self.err(col, format!("function '{name}' needs arguments in parentheses"));
                }
                match (self.resolve)(&name) {
                    Some(i) => Ok(Expr::Var(i)),
                    None => self.err(col, format!("unknown name '{name}'")),
                }
            }
            Tok::End => self.err(col, "the expression ended where a value was expected"),
            t => self.err(col, format!("expected a value, found {}", describe(&t))),
        }
    }
}

fn describe(t: &Tok) -> String {
    match t {
        Tok::Num(v, _) => format!("number {v}"),
        Tok::Name(n) => format!("name '{n}'"),
        Tok::Op(c) => format!("'{c}'"),
        Tok::End => "the end".into(),
    }
}

fn integer_literal(e: &Expr) -> Option<i32> {
    match e {
        Expr::Num(n) if n.exact && n.value.fract() == 0.0 && n.value.abs() <= 1e6 => Some(n.value as i32),
        Expr::Neg(inner) => integer_literal(inner).map(|n| -n),
        _ => None,
    }
}

/// Parse `src`, binding each name through `resolve` (name → symbol index).
pub fn parse(src: &str, resolve: &impl Fn(&str) -> Option<usize>) -> Result<Expr, ParseError> {
    if src.len() > 10_000 {
        return Err(ParseError { column: 1, message: "expression longer than 10000 characters".into() });
    }
    let toks = Lexer::run(src)?;
    let mut p = Parser { toks, pos: 0, resolve };
    let e = p.expression()?;
    match p.peek() {
        Tok::End => {}
        t => return p.err(p.col(), format!("unexpected {} after a complete expression", describe(t))),
    }
    if e.depth() > 200 {
        return Err(ParseError { column: 1, message: "expression nested deeper than 200 levels".into() });
    }
    Ok(e)
}

/// An arithmetic in which expressions can be evaluated.
///
/// Each implementation states its own guarantee (exact-ish f64, enclosure, …); the
/// evaluator only composes operations.
pub trait Domain {
    type V: Clone;
    fn num(&mut self, n: &Number) -> Self::V;
    fn pi(&mut self) -> Self::V;
    fn neg(&mut self, a: &Self::V) -> Self::V;
    fn add(&mut self, a: &Self::V, b: &Self::V) -> Self::V;
    fn sub(&mut self, a: &Self::V, b: &Self::V) -> Self::V;
    fn mul(&mut self, a: &Self::V, b: &Self::V) -> Self::V;
    fn div(&mut self, a: &Self::V, b: &Self::V) -> Self::V;
    fn powi(&mut self, a: &Self::V, n: i32) -> Self::V;
    fn pow(&mut self, a: &Self::V, b: &Self::V) -> Self::V;
    fn call(&mut self, f: Func, args: &[Self::V]) -> Self::V;
    /// `lt` where `p < q`, `gt` where `p > q`, an enclosure of both where they may meet.
    fn select(&mut self, p: &Self::V, q: &Self::V, lt: &Self::V, gt: &Self::V) -> Self::V;
}

impl Expr {
    /// Evaluate over `dom` with symbol values `vars` (indexed as bound).
    pub fn eval<D: Domain>(&self, dom: &mut D, vars: &[D::V]) -> D::V {
        match self {
            Expr::Num(n) => dom.num(n),
            Expr::Pi => dom.pi(),
            Expr::Var(i) => vars[*i].clone(),
            Expr::Neg(a) => {
                let a = a.eval(dom, vars);
                dom.neg(&a)
            }
            Expr::Add(a, b) => {
                let (a, b) = (a.eval(dom, vars), b.eval(dom, vars));
                dom.add(&a, &b)
            }
            Expr::Sub(a, b) => {
                let (a, b) = (a.eval(dom, vars), b.eval(dom, vars));
                dom.sub(&a, &b)
            }
            Expr::Mul(a, b) => {
                let (a, b) = (a.eval(dom, vars), b.eval(dom, vars));
                dom.mul(&a, &b)
            }
            Expr::Div(a, b) => {
                let (a, b) = (a.eval(dom, vars), b.eval(dom, vars));
                dom.div(&a, &b)
            }
            Expr::PowI(a, n) => {
                let a = a.eval(dom, vars);
                dom.powi(&a, *n)
            }
            Expr::Pow(a, b) => {
                let (a, b) = (a.eval(dom, vars), b.eval(dom, vars));
                dom.pow(&a, &b)
            }
            Expr::Call(f, args) => {
                let vals: Vec<D::V> = args.iter().map(|a| a.eval(dom, vars)).collect();
                dom.call(*f, &vals)
            }
            Expr::Select(s) => {
                let v: Vec<D::V> = s.iter().map(|a| a.eval(dom, vars)).collect();
                dom.select(&v[0], &v[1], &v[2], &v[3])
            }
        }
    }

    /// f64 evaluation (for simulation; not a bound).
    pub fn eval_f64(&self, vars: &[f64]) -> f64 {
        self.eval(&mut F64, vars)
    }

    /// Interval enclosure of the expression over the box `vars`.
    pub fn eval_interval(&self, vars: &[Interval]) -> Interval {
        self.eval(&mut Intervals, vars)
    }

    /// Nesting depth of the tree.
    pub fn depth(&self) -> usize {
        match self {
            Expr::Num(_) | Expr::Pi | Expr::Var(_) => 1,
            Expr::Neg(a) | Expr::PowI(a, _) => 1 + a.depth(),
            Expr::Add(a, b) | Expr::Sub(a, b) | Expr::Mul(a, b) | Expr::Div(a, b) | Expr::Pow(a, b) => {
                1 + a.depth().max(b.depth())
            }
            Expr::Call(_, args) => 1 + args.iter().map(|a| a.depth()).max().unwrap_or(0),
            Expr::Select(s) => 1 + s.iter().map(|a| a.depth()).max().unwrap_or(0),
        }
    }

    /// Whether symbol `i` occurs.
    pub fn uses(&self, i: usize) -> bool {
        let mut found = false;
        self.visit(&mut |e| {
            if let Expr::Var(j) = e {
                found |= *j == i;
            }
        });
        found
    }

    fn visit(&self, f: &mut impl FnMut(&Expr)) {
        f(self);
        match self {
            Expr::Num(_) | Expr::Pi | Expr::Var(_) => {}
            Expr::Neg(a) | Expr::PowI(a, _) => a.visit(f),
            Expr::Add(a, b) | Expr::Sub(a, b) | Expr::Mul(a, b) | Expr::Div(a, b) | Expr::Pow(a, b) => {
                a.visit(f);
                b.visit(f);
            }
            Expr::Call(_, args) => args.iter().for_each(|a| a.visit(f)),
            Expr::Select(s) => s.iter().for_each(|a| a.visit(f)),
        }
    }

    /// A division whose divisor is a constant expression that may be zero (such as
    /// `x / 0` or `x / (1 - 1)`): the text of that divisor, for a validation error.
    pub fn constant_zero_divisor(&self) -> Option<String> {
        let mut found = None;
        self.visit(&mut |e| {
            if let Expr::Div(_, d) = e {
                let is_constant = !d.has_vars();
                if found.is_none() && is_constant && d.eval_interval(&[]).contains_zero() {
                    found = Some(d.to_string());
                }
            }
        });
        found
    }

    fn has_vars(&self) -> bool {
        let mut any = false;
        self.visit(&mut |e| any |= matches!(e, Expr::Var(_)));
        any
    }

    /// Whether the expression uses a function that is not differentiable everywhere
    /// (`abs`, `min`, `max`).
    pub fn has_kinks(&self) -> bool {
        let mut found = false;
        self.visit(&mut |e| {
            if let Expr::Call(Func::Abs | Func::Min | Func::Max, _) = e {
                found = true;
            }
        });
        found
    }

    /// The switching functions of the expression's kinks: `a` for `abs(a)`, `a − b` for
    /// `min(a, b)` and `max(a, b)` (the kink is where they are 0). Duplicates removed.
    pub fn kink_arguments(&self) -> Vec<Expr> {
        let mut out: Vec<Expr> = Vec::new();
        self.visit(&mut |e| {
            if let Expr::Call(f, args) = e {
                let g = match f {
                    Func::Abs => Some(args[0].clone()),
                    Func::Min | Func::Max => Some(Expr::Sub(Box::new(args[0].clone()), Box::new(args[1].clone()))),
                    _ => None,
                };
                if let Some(g) = g {
                    if !out.contains(&g) {
                        out.push(g);
                    }
                }
            }
        });
        out
    }

    /// Symbolic derivative with respect to symbol `i`, simplified.
    ///
    /// At the kinks of `abs`, `min` and `max` the derivative is a [`Expr::Select`] whose
    /// interval value there is the hull of both one-sided derivatives (Clarke's generalized
    /// gradient), so mean-value enclosures built from it stay sound across kinks.
    pub fn diff(&self, i: usize) -> Expr {
        use Expr::*;
        let b = |e: Expr| Box::new(e);
        match self {
            Num(_) | Pi => zero(),
            Var(j) => {
                if *j == i {
                    one()
                } else {
                    zero()
                }
            }
            Neg(a) => neg(a.diff(i)),
            Add(a, c) => add(a.diff(i), c.diff(i)),
            Sub(a, c) => sub(a.diff(i), c.diff(i)),
            Mul(a, c) => add(mul(a.diff(i), (**c).clone()), mul((**a).clone(), c.diff(i))),
            Div(a, c) => {
                // (a/c)' = a'/c − a c'/c²
                sub(div(a.diff(i), (**c).clone()), div(mul((**a).clone(), c.diff(i)), PowI(b((**c).clone()), 2)))
            }
            PowI(a, n) => {
                let n = *n;
                if n == 0 {
                    return zero();
                }
                let inner = if n - 1 == 1 { (**a).clone() } else { PowI(b((**a).clone()), n - 1) };
                mul(mul(num(n as f64), if n - 1 == 0 { one() } else { inner }), a.diff(i))
            }
            Pow(a, c) => {
                // (a^c)' = a^c (c' log a + c a'/a)
                let t1 = mul(c.diff(i), Call(Func::Log, vec![(**a).clone()]));
                let t2 = div(mul((**c).clone(), a.diff(i)), (**a).clone());
                mul(self.clone(), add(t1, t2))
            }
            Select(s) => select(s[0].clone(), s[1].clone(), s[2].diff(i), s[3].diff(i)),
            Call(f, args) => {
                let a = &args[0];
                let da = a.diff(i);
                let call1 = |g: Func, x: &Expr| Call(g, vec![x.clone()]);
                match f {
                    Func::Sin => mul(call1(Func::Cos, a), da),
                    Func::Cos => neg(mul(call1(Func::Sin, a), da)),
                    Func::Tan => mul(add(one(), PowI(b(call1(Func::Tan, a)), 2)), da),
                    Func::Exp => mul(self.clone(), da),
                    Func::Log => div(da, a.clone()),
                    Func::Sqrt => div(da, mul(num(2.0), self.clone())),
                    Func::Abs => select(a.clone(), zero(), neg(da.clone()), da),
                    Func::Atan => div(da, add(one(), PowI(b(a.clone()), 2))),
                    Func::Tanh => mul(sub(one(), PowI(b(self.clone()), 2)), da),
                    Func::Atan2 => {
                        // atan2(y, x)' = (x y' − y x') / (x² + y²)
                        let (y, x) = (&args[0], &args[1]);
                        let num_ = sub(mul(x.clone(), y.diff(i)), mul(y.clone(), x.diff(i)));
                        div(num_, add(PowI(b(x.clone()), 2), PowI(b(y.clone()), 2)))
                    }
                    Func::Min => select(args[0].clone(), args[1].clone(), args[0].diff(i), args[1].diff(i)),
                    Func::Max => select(args[0].clone(), args[1].clone(), args[1].diff(i), args[0].diff(i)),
                }
            }
        }
    }
}

fn select(p: Expr, q: Expr, lt: Expr, gt: Expr) -> Expr {
    if lt == gt {
        return lt;
    }
    Expr::Select(Box::new([p, q, lt, gt]))
}

fn zero() -> Expr {
    Expr::Num(Number::exact(0.0))
}
fn one() -> Expr {
    Expr::Num(Number::exact(1.0))
}
fn num(v: f64) -> Expr {
    Expr::Num(Number::exact(v))
}
fn is_num(e: &Expr, v: f64) -> bool {
    matches!(e, Expr::Num(n) if n.exact && n.value == v)
}
fn neg(a: Expr) -> Expr {
    if is_num(&a, 0.0) {
        return a;
    }
    match a {
        Expr::Neg(inner) => *inner,
        a => Expr::Neg(Box::new(a)),
    }
}
fn add(a: Expr, b: Expr) -> Expr {
    if is_num(&a, 0.0) {
        return b;
    }
    if is_num(&b, 0.0) {
        return a;
    }
    Expr::Add(Box::new(a), Box::new(b))
}
fn sub(a: Expr, b: Expr) -> Expr {
    if is_num(&b, 0.0) {
        return a;
    }
    if is_num(&a, 0.0) {
        return neg(b);
    }
    Expr::Sub(Box::new(a), Box::new(b))
}
fn mul(a: Expr, b: Expr) -> Expr {
    if is_num(&a, 0.0) || is_num(&b, 0.0) {
        return zero();
    }
    if is_num(&a, 1.0) {
        return b;
    }
    if is_num(&b, 1.0) {
        return a;
    }
    Expr::Mul(Box::new(a), Box::new(b))
}
fn div(a: Expr, b: Expr) -> Expr {
    if is_num(&a, 0.0) {
        return zero();
    }
    if is_num(&b, 1.0) {
        return a;
    }
    Expr::Div(Box::new(a), Box::new(b))
}

/// Plain f64 arithmetic (simulation; no guarantee beyond IEEE rounding).
pub struct F64;

impl Domain for F64 {
    type V = f64;
    fn num(&mut self, n: &Number) -> f64 {
        n.value
    }
    fn pi(&mut self) -> f64 {
        std::f64::consts::PI
    }
    fn neg(&mut self, a: &f64) -> f64 {
        -a
    }
    fn add(&mut self, a: &f64, b: &f64) -> f64 {
        a + b
    }
    fn sub(&mut self, a: &f64, b: &f64) -> f64 {
        a - b
    }
    fn mul(&mut self, a: &f64, b: &f64) -> f64 {
        a * b
    }
    fn div(&mut self, a: &f64, b: &f64) -> f64 {
        a / b
    }
    fn powi(&mut self, a: &f64, n: i32) -> f64 {
        a.powi(n)
    }
    fn pow(&mut self, a: &f64, b: &f64) -> f64 {
        if *a <= 0.0 {
            f64::NAN
        } else {
            a.powf(*b)
        }
    }
    fn call(&mut self, f: Func, x: &[f64]) -> f64 {
        match f {
            Func::Sin => x[0].sin(),
            Func::Cos => x[0].cos(),
            Func::Tan => x[0].tan(),
            Func::Exp => x[0].exp(),
            Func::Log => {
                if x[0] <= 0.0 {
                    f64::NAN
                } else {
                    x[0].ln()
                }
            }
            Func::Sqrt => x[0].sqrt(),
            Func::Abs => x[0].abs(),
            Func::Atan => x[0].atan(),
            Func::Atan2 => x[0].atan2(x[1]),
            Func::Tanh => x[0].tanh(),
            Func::Min => x[0].min(x[1]),
            Func::Max => x[0].max(x[1]),
        }
    }
    fn select(&mut self, p: &f64, q: &f64, lt: &f64, gt: &f64) -> f64 {
        if p > q {
            *gt
        } else {
            *lt
        }
    }
}

/// Outward-rounded interval arithmetic: the result encloses the exact image.
pub struct Intervals;

impl Domain for Intervals {
    type V = Interval;
    fn num(&mut self, n: &Number) -> Interval {
        n.enclosure()
    }
    fn pi(&mut self) -> Interval {
        Interval::PI
    }
    fn neg(&mut self, a: &Interval) -> Interval {
        -*a
    }
    fn add(&mut self, a: &Interval, b: &Interval) -> Interval {
        *a + *b
    }
    fn sub(&mut self, a: &Interval, b: &Interval) -> Interval {
        *a - *b
    }
    fn mul(&mut self, a: &Interval, b: &Interval) -> Interval {
        *a * *b
    }
    fn div(&mut self, a: &Interval, b: &Interval) -> Interval {
        *a / *b
    }
    fn powi(&mut self, a: &Interval, n: i32) -> Interval {
        a.powi(n)
    }
    fn pow(&mut self, a: &Interval, b: &Interval) -> Interval {
        a.pow(*b)
    }
    fn call(&mut self, f: Func, x: &[Interval]) -> Interval {
        match f {
            Func::Sin => x[0].sin(),
            Func::Cos => x[0].cos(),
            Func::Tan => x[0].tan(),
            Func::Exp => x[0].exp(),
            Func::Log => x[0].ln(),
            Func::Sqrt => x[0].sqrt(),
            Func::Abs => x[0].abs(),
            Func::Atan => x[0].atan(),
            Func::Atan2 => Interval::atan2(x[0], x[1]),
            Func::Tanh => x[0].tanh(),
            Func::Min => x[0].min(x[1]),
            Func::Max => x[0].max(x[1]),
        }
    }
    fn select(&mut self, p: &Interval, q: &Interval, lt: &Interval, gt: &Interval) -> Interval {
        if p.hi() < q.lo() {
            *lt
        } else if p.lo() > q.hi() {
            *gt
        } else {
            lt.hull(gt)
        }
    }
}

impl fmt::Display for Expr {
    fn fmt(&self, f: &mut fmt::Formatter<'_>) -> fmt::Result {
        match self {
            Expr::Num(n) => write!(f, "{}", n.value),
            Expr::Pi => write!(f, "pi"),
            Expr::Var(i) => write!(f, "${i}"),
            Expr::Neg(a) => write!(f, "(-{a})"),
            Expr::Add(a, b) => write!(f, "({a} + {b})"),
            Expr::Sub(a, b) => write!(f, "({a} - {b})"),
            Expr::Mul(a, b) => write!(f, "({a} * {b})"),
            Expr::Div(a, b) => write!(f, "({a} / {b})"),
            Expr::PowI(a, n) => write!(f, "({a} ^ {n})"),
            Expr::Pow(a, b) => write!(f, "({a} ^ {b})"),
            Expr::Call(g, args) => {
                write!(f, "{}(", g.name())?;
                for (k, a) in args.iter().enumerate() {
                    if k > 0 {
                        write!(f, ", ")?;
                    }
                    write!(f, "{a}")?;
                }
                write!(f, ")")
            }
            Expr::Select(s) => write!(f, "select({}, {}, {}, {})", s[0], s[1], s[2], s[3]),
        }
    }
}

#[cfg(test)]
mod tests {
    use super::*;

    fn names(n: &str) -> Option<usize> {
        ["x", "y", "v"].iter().position(|s| *s == n)
    }

    #[test]
    fn precedence_follows_common_practice() {
        // -2^2 = -4, 2^3^2 = 2^9, 1 - 2 - 3 = -4 (left associative), as in mathematics.
        let e = parse("-2^2", &names).unwrap();
        assert_eq!(e.eval_f64(&[]), -4.0);
        assert_eq!(parse("2^3^2", &names).unwrap().eval_f64(&[]), 512.0);
        assert_eq!(parse("1 - 2 - 3", &names).unwrap().eval_f64(&[]), -4.0);
        assert_eq!(parse("8 / 4 / 2", &names).unwrap().eval_f64(&[]), 1.0);
        assert_eq!(parse("2 * x + y", &names).unwrap().eval_f64(&[3.0, 1.0]), 7.0);
        assert_eq!(parse("1.5e1 + .5", &names).unwrap().eval_f64(&[]), 15.5);
    }

    #[test]
    fn errors_give_the_column() {
        let e = parse("x + foo", &names).unwrap_err();
        assert_eq!(e.column, 5);
        assert!(e.message.contains("unknown name 'foo'"));
        let e = parse("x + bar(y)", &names).unwrap_err();
        assert!(e.message.contains("unknown function 'bar'"), "{e}");
        let e = parse("(x + y", &names).unwrap_err();
        assert_eq!(e.column, 7);
        let e = parse("x $ y", &names).unwrap_err();
        assert_eq!(e.column, 3);
        let e = parse("atan2(x)", &names).unwrap_err();
        assert!(e.message.contains("takes 2"), "{e}");
        let e = parse("x y", &names).unwrap_err();
        assert_eq!(e.column, 3);
    }

    #[test]
    fn literal_exactness() {
        assert!(literal_is_exact("0.5", 0.5));
        assert!(literal_is_exact("12", 12.0));
        assert!(literal_is_exact("1.25e2", 125.0));
        assert!(!literal_is_exact("0.1", 0.1));
        assert!(!literal_is_exact("9.80665", 9.80665));
        // 0.1 as a literal is enclosed, not taken as the nearest double
        let e = parse("0.1", &names).unwrap();
        let i = e.eval_interval(&[]);
        assert!(i.lo() < 0.1 && i.hi() > 0.1);
    }

    #[test]
    fn derivative_matches_central_difference() {
        let src = "sin(x) * exp(-y) + x^3 / (1 + y^2) + atan2(y, x) + sqrt(x*x + 1) + tanh(x - y)";
        let e = parse(src, &names).unwrap();
        let dx = e.diff(0);
        let dy = e.diff(1);
        for &(x, y) in &[(0.3, 0.7), (1.2, -0.4), (-0.8, 2.0)] {
            let h = 1e-6;
            let fx = (e.eval_f64(&[x + h, y]) - e.eval_f64(&[x - h, y])) / (2.0 * h);
            let fy = (e.eval_f64(&[x, y + h]) - e.eval_f64(&[x, y - h])) / (2.0 * h);
            assert!((dx.eval_f64(&[x, y]) - fx).abs() < 1e-6, "d/dx at {x},{y}");
            assert!((dy.eval_f64(&[x, y]) - fy).abs() < 1e-6, "d/dy at {x},{y}");
        }
    }

    #[test]
    fn interval_evaluation_encloses_samples() {
        let e = parse("x * (1 - x) + cos(3 * y) / (2 + sin(x))", &names).unwrap();
        let bx = [Interval::new(-1.0, 0.5), Interval::new(0.0, 2.0)];
        let enc = e.eval_interval(&bx);
        for i in 0..=20 {
            for j in 0..=20 {
                let x = -1.0 + 1.5 * i as f64 / 20.0;
                let y = 2.0 * j as f64 / 20.0;
                assert!(enc.contains(e.eval_f64(&[x, y])));
            }
        }
    }
}
