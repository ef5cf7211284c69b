//! A small mixed-integer linear program and the solver behind it.
//!
//! The exact method builds its programs here as plain data (variables with bounds,
//! rows `lo ≤ Σ a·x ≤ hi`, a linear objective to maximise), so that the same program
//! can be handed to another solver for comparison (`to_json`, read by the reference
//! checks and the benchmark). Solving goes through `good_lp`: the pure-Rust `microlp`
//! backend always, and HiGHS (a C++ solver built from source by the `highs` crate,
//! needing cmake and libclang) with the `highs` feature, which is on by default and then
//! preferred (see BENCHMARKS.md "Exact method" for the comparison that chose it).
//!
//! Nothing here is a proof by itself: a solver's "infeasible" is a floating-point claim,
//! and a solver's point is only a candidate. The exact method widens its programs by a
//! stated margin before trusting "infeasible" and re-checks every point it reports.

use good_lp::{constraint, Expression, ProblemVariables, ResolutionError, Solution, SolverModel, Variable, WithTimeLimit};
use serde::Serialize;
use std::time::Duration;

/// One variable: bounds, and whether it must be an integer (0/1 when its bounds are).
#[derive(Clone, Debug, Serialize)]
pub struct Var {
    pub lo: f64,
    pub hi: f64,
    pub integer: bool,
}

/// One row `lo ≤ Σ coef·x ≤ hi` (either side may be infinite).
#[derive(Clone, Debug, Serialize)]
pub struct Row {
    pub terms: Vec<(usize, f64)>,
    pub lo: f64,
    pub hi: f64,
}

/// A program: maximise `objective · x` over the rows and bounds.
#[derive(Clone, Debug, Default, Serialize)]
pub struct Model {
    pub vars: Vec<Var>,
    pub rows: Vec<Row>,
    pub objective: Vec<(usize, f64)>,
}

/// What the solver said.
#[derive(Clone, Debug, PartialEq)]
pub enum Answer {
    /// No point satisfies the rows and bounds (up to the solver's tolerances).
    Infeasible,
    /// A point (values indexed like `vars`) the solver found; its objective is optimal
    /// up to the solver's tolerances.
    Point(Vec<f64>),
    /// No answer: the time limit, or an error (the text says which).
    Unknown(String),
}

/// Which solver answers.
#[derive(Clone, Copy, Debug, PartialEq, Eq)]
pub enum Backend {
    /// `microlp`, pure Rust.
    Microlp,
    /// HiGHS (only with the `highs` feature).
    #[cfg(feature = "highs")]
    Highs,
}

impl Backend {
    /// HiGHS when built in, microlp otherwise.
    pub fn preferred() -> Backend {
        #[cfg(feature = "highs")]
        return Backend::Highs;
        #[cfg(not(feature = "highs"))]
        Backend::Microlp
    }

    pub fn name(self) -> &'static str {
        match self {
            Backend::Microlp => "microlp",
            #[cfg(feature = "highs")]
            Backend::Highs => "highs",
        }
    }
}

impl Model {
    /// A new continuous variable in `[lo, hi]`; its index.
    pub fn var(&mut self, lo: f64, hi: f64) -> usize {
        self.vars.push(Var { lo, hi, integer: false });
        self.vars.len() - 1
    }

    /// A new 0/1 variable; its index.
    pub fn binary(&mut self) -> usize {
        self.vars.push(Var { lo: 0.0, hi: 1.0, integer: true });
        self.vars.len() - 1
    }

    /// The row `lo ≤ Σ terms ≤ hi`.
    pub fn row(&mut self, terms: Vec<(usize, f64)>, lo: f64, hi: f64) {
        self.rows.push(Row { terms, lo, hi });
    }

    /// Number of integer variables.
    pub fn integers(&self) -> usize {
        self.vars.iter().filter(|v| v.integer).count()
    }

    /// The program as JSON (for reference solvers outside the project).
    pub fn to_json(&self) -> String {
        serde_json::to_string(self).expect("a model serializes")
    }

    /// Solve with the preferred backend, giving up after `limit`.
    pub fn solve(&self, limit: Duration) -> Answer {
        self.solve_with(Backend::preferred(), limit)
    }

    /// Solve with `backend`, giving up after `limit`.
    pub fn solve_with(&self, backend: Backend, limit: Duration) -> Answer {
        let mut pv = ProblemVariables::new();
        let xs: Vec<Variable> = self
            .vars
            .iter()
            .map(|v| {
                let d = good_lp::variable().min(v.lo).max(v.hi);
                pv.add(if v.integer { d.integer() } else { d })
            })
            .collect();
        let mut obj = Expression::from(0.0);
        for &(i, c) in &self.objective {
            obj.add_mul(c, xs[i]);
        }
        let secs = limit.as_secs_f64().max(0.001);
        let result = match backend {
            Backend::Microlp => self.finish(pv.maximise(obj).using(good_lp::microlp).with_time_limit(secs), &xs),
            #[cfg(feature = "highs")]
            Backend::Highs => {
                let mut p = pv.maximise(obj).using(good_lp::highs).with_time_limit(secs).set_threads(1);
                p.set_verbose(false);
                self.finish(p, &xs)
            }
        };
        result
    }

    fn finish<P: SolverModel<Error = ResolutionError>>(&self, mut problem: P, xs: &[Variable]) -> Answer {
        for r in &self.rows {
            let mut e = Expression::from(0.0);
            for &(i, c) in &r.terms {
                e.add_mul(c, xs[i]);
            }
            if r.lo == r.hi {
                problem.add_constraint(constraint::eq(e, r.lo));
                continue;
            }
            if r.hi.is_finite() {
                problem.add_constraint(constraint::leq(e.clone(), r.hi));
            }
            if r.lo.is_finite() {
                problem.add_constraint(constraint::geq(e, r.lo));
            }
        }
        match problem.solve() {
            Ok(sol) => Answer::Point(xs.iter().map(|&x| sol.value(x)).collect()),
            Err(ResolutionError::Infeasible) => Answer::Infeasible,
            Err(e) => Answer::Unknown(e.to_string()),
        }
    }
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn a_tiny_program_is_solved_and_an_empty_one_is_infeasible() {
        // max x + y, x + 2y ≤ 4, 3x + y ≤ 6, y integer in [0, 3]: optimum x = 5/3, y = 1
        // (by hand: y = 1 gives x ≤ min(2, 5/3); y = 2 gives x ≤ 0; y = 0 gives x ≤ 2).
        let mut m = Model::default();
        let x = m.var(0.0, 10.0);
        let y = m.var(0.0, 3.0);
        m.vars[y].integer = true;
        m.row(vec![(x, 1.0), (y, 2.0)], f64::NEG_INFINITY, 4.0);
        m.row(vec![(x, 3.0), (y, 1.0)], f64::NEG_INFINITY, 6.0);
        m.objective = vec![(x, 1.0), (y, 1.0)];
        #[allow(unused_mut)]
        let mut backends = vec![Backend::Microlp];
        #[cfg(feature = "highs")]
        backends.push(Backend::Highs);
        for b in backends {
            match m.solve_with(b, Duration::from_secs(5)) {
                Answer::Point(p) => {
                    assert!((p[x] - 5.0 / 3.0).abs() < 1e-6 && (p[y] - 1.0).abs() < 1e-6, "{}: {p:?}", b.name())
                }
                a => panic!("{}: {a:?}", b.name()),
            }
            // x + y ≥ 2.7: the LP relaxation reaches 2.8 (x = 1.6, y = 1.2), integers only 5/3 + 1.
            let mut m2 = m.clone();
            m2.row(vec![(x, 1.0), (y, 1.0)], 2.7, f64::INFINITY);
            assert_eq!(m2.solve_with(b, Duration::from_secs(5)), Answer::Infeasible, "{}", b.name());
        }
    }
}
