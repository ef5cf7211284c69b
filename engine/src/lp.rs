//! Small dense linear programs over a box, with rigorous bounds from duality.
//!
//! Problem: minimise `c·x` subject to `A·x ≤ b` and `lo ≤ x ≤ hi` (every bound finite).
//!
//! [`solve`] runs a bounded-variable dual simplex in plain f64 (Dantzig's pricing on
//! the most violated row, the textbook ratio test; common practice). Its answer is
//! never trusted: it only proposes multipliers `λ ≥ 0` for the rows. Whatever they are,
//! weak Lagrangian duality gives, for every feasible `x`,
//!
//! `c·x ≥ c·x + λ·(A·x − b) = (c + Aᵀλ)·x − λ·b ≥ Σ_j min(r_j·lo_j, r_j·hi_j) − λ·b`
//!
//! with `r = c + Aᵀλ`. [`dual_bound`] evaluates the right-hand side in outward-rounded
//! interval arithmetic, so the number it returns is a lower bound of the real minimum
//! whatever the rounding inside the simplex did (the published "safe bound" technique
//! for linear programs; common practice). A poor `λ` only costs tightness. When the
//! rows cannot all hold on the box, a suitable `λ` makes the bound exceed any value:
//! [`is_empty`] checks such a certificate rigorously.

/// A linear program in dense form. `a` is row-major, `rows × cols`.
#[derive(Clone, Debug)]
pub struct Lp {
    pub cols: usize,
    pub a: Vec<f64>,
    pub b: Vec<f64>,
    pub lo: Vec<f64>,
    pub hi: Vec<f64>,
}

/// What the simplex found: multipliers for the rows (never negative), whether it
/// reached optimality, and whether it found the rows infeasible on the box.
#[derive(Clone, Debug)]
pub struct Solution {
    pub lambda: Vec<f64>,
    pub optimal: bool,
    pub infeasible: bool,
    /// For an infeasible problem: row multipliers of a (floating-point) certificate.
    pub ray: Vec<f64>,
    pub iterations: usize,
}

impl Lp {
    pub fn rows(&self) -> usize {
        self.b.len()
    }

    fn row(&self, i: usize) -> &[f64] {
        &self.a[i * self.cols..(i + 1) * self.cols]
    }
}

const PIVOT_TOL: f64 = 1e-11;
const FEAS_TOL: f64 = 1e-10;

/// Bounded-variable dual simplex on `min c·x, A·x + s = b, lo ≤ x ≤ hi, s ≥ 0`,
/// starting from the slack basis with every `x_j` at the bound its cost prefers (dual
/// feasible by construction). At most `max_iter` pivots; on the cap it returns the
/// current (dual feasible, possibly suboptimal) multipliers.
pub fn solve(lp: &Lp, c: &[f64], max_iter: usize) -> Solution {
    let m = lp.rows();
    let n = lp.cols;
    let nt = n + m;
    debug_assert_eq!(c.len(), n);
    // Tableau B⁻¹·[A I], reduced costs d, values x (all variables), bounds.
    let mut t = vec![0.0f64; m * nt];
    for i in 0..m {
        t[i * nt..i * nt + n].copy_from_slice(lp.row(i));
        t[i * nt + n + i] = 1.0;
    }
    let mut d: Vec<f64> = c.iter().copied().chain(std::iter::repeat(0.0).take(m)).collect();
    let lower = |j: usize| if j < n { lp.lo[j] } else { 0.0 };
    let upper = |j: usize| if j < n { lp.hi[j] } else { f64::INFINITY };
    let mut x = vec![0.0f64; nt];
    for j in 0..n {
        x[j] = if c[j] >= 0.0 { lp.lo[j] } else { lp.hi[j] };
    }
    for i in 0..m {
        let r = lp.row(i);
        x[n + i] = lp.b[i] - (0..n).map(|j| r[j] * x[j]).sum::<f64>();
    }
    let mut basis: Vec<usize> = (n..nt).collect();
    let mut is_basic = vec![false; nt];
    for &j in &basis {
        is_basic[j] = true;
    }
    let mut iterations = 0;
    let finish = |d: &[f64], optimal: bool, infeasible: bool, ray: Vec<f64>, iterations: usize| Solution {
        lambda: (0..m).map(|i| d[n + i].max(0.0)).collect(),
        optimal,
        infeasible,
        ray,
        iterations,
    };
    loop {
        // Leaving row: the basic variable furthest outside its bounds.
        let mut r = usize::MAX;
        let mut worst = FEAS_TOL;
        let mut below = false;
        for (i, &bv) in basis.iter().enumerate() {
            let (l, u) = (lower(bv), upper(bv));
            let scale = 1.0 + x[bv].abs();
            if l - x[bv] > worst * scale {
                worst = (l - x[bv]) / scale;
                r = i;
                below = true;
            } else if x[bv] - u > worst * scale {
                worst = (x[bv] - u) / scale;
                r = i;
                below = false;
            }
        }
        if r == usize::MAX {
            return finish(&d, true, false, Vec::new(), iterations);
        }
        if iterations >= max_iter {
            return finish(&d, false, false, Vec::new(), iterations);
        }
        iterations += 1;
        let row = &t[r * nt..(r + 1) * nt];
        // Ratio test: entering j keeps every reduced cost of the right sign.
        let mut enter = usize::MAX;
        let mut best_ratio = f64::INFINITY;
        let mut best_alpha = 0.0f64;
        for j in 0..nt {
            if is_basic[j] {
                continue;
            }
            let alpha = row[j];
            if alpha.abs() <= PIVOT_TOL {
                continue;
            }
            let at_upper = upper(j).is_finite() && x[j] == upper(j) && lower(j) != upper(j);
            let at_lower = !at_upper;
            // x_B[r] changes by −alpha·Δx_j; it must move up when below, down when above.
            let eligible = if below {
                (at_lower && alpha < 0.0 && upper(j) > x[j]) || (at_upper && alpha > 0.0)
            } else {
                (at_lower && alpha > 0.0 && upper(j) > x[j]) || (at_upper && alpha < 0.0)
            };
            if !eligible {
                continue;
            }
            let ratio = d[j].abs() / alpha.abs();
            if ratio < best_ratio - 1e-14 || (ratio <= best_ratio + 1e-14 && alpha.abs() > best_alpha.abs()) {
                best_ratio = ratio;
                enter = j;
                best_alpha = alpha;
            }
        }
        if enter == usize::MAX {
            // Row r is a certificate that the rows cannot hold on the box.
            let ray: Vec<f64> = (0..m).map(|i| row[n + i]).collect();
            return finish(&d, false, true, ray, iterations);
        }
        let leaving = basis[r];
        let bound = if below { lower(leaving) } else { upper(leaving) };
        let alpha = best_alpha;
        // Primal step.
        let dx = (x[leaving] - bound) / alpha;
        for (i, &bv) in basis.iter().enumerate() {
            x[bv] -= t[i * nt + enter] * dx;
        }
        x[enter] += dx;
        x[leaving] = bound;
        // Dual step.
        let theta = d[enter] / alpha;
        for j in 0..nt {
            if !is_basic[j] {
                d[j] -= theta * t[r * nt + j];
            }
        }
        d[enter] = 0.0;
        d[leaving] = -theta;
        // Keep the reduced costs of the right sign (rounding may tip them over).
        // Pivot.
        let piv: Vec<f64> = t[r * nt..(r + 1) * nt].iter().map(|v| v / alpha).collect();
        for i in 0..m {
            if i == r {
                continue;
            }
            let f = t[i * nt + enter];
            if f != 0.0 {
                for j in 0..nt {
                    t[i * nt + j] -= f * piv[j];
                }
            }
        }
        t[r * nt..(r + 1) * nt].copy_from_slice(&piv);
        is_basic[leaving] = false;
        is_basic[enter] = true;
        basis[r] = enter;
    }
}

/// A rigorous lower bound of `c·x + c0` over `{A·x ≤ b, lo ≤ x ≤ hi}` from the
/// multipliers `lambda` (negative entries are treated as 0). `+∞` never comes out of
/// here; an empty set is reported by [`is_empty`]. NaN inputs give `−∞`.
///
/// Rounding: with `r̂_j = fl(c_j + Σ λ_i a_ij)`, the exact `r_j` is within
/// `δ_j = γ_{m+1}·(|c_j| + Σ λ_i |a_ij|)` of it (the standard bound for a sum of `m + 1`
/// products, `γ_k = k·u/(1 − k·u)`, `u = 2⁻⁵³`), so
/// `min(r_j lo_j, r_j hi_j) ≥ min(r̂_j lo_j, r̂_j hi_j) − δ_j·max(|lo_j|, |hi_j|)`. The
/// final sum of `m + n + 1` terms is again within `γ·Σ|terms|` of its computed value.
/// Every allowance is computed, doubled, and subtracted; a subnormal-sized slack per
/// term covers underflow.
pub fn dual_bound(lp: &Lp, c: &[f64], c0: f64, lambda: &[f64]) -> f64 {
    let m = lp.rows();
    let n = lp.cols;
    const U: f64 = 1.0 / 9007199254740992.0;
    let gamma = |k: usize| {
        let ku = k as f64 * U;
        ku / (1.0 - ku)
    };
    let g_row = gamma(m + 1);
    let mut total = c0;
    let mut mag = c0.abs();
    let mut allowance = 0.0f64;
    for (i, &l) in lambda.iter().enumerate() {
        if l > 0.0 {
            let t = l * lp.b[i];
            total -= t;
            mag += t.abs();
        }
    }
    for j in 0..n {
        let mut r = c[j];
        let mut r_mag = c[j].abs();
        for (i, &l) in lambda.iter().enumerate() {
            if l > 0.0 {
                let a = lp.a[i * n + j];
                if a != 0.0 {
                    r += l * a;
                    r_mag += (l * a).abs();
                }
            }
        }
        let (lo, hi) = (lp.lo[j], lp.hi[j]);
        let term = (r * lo).min(r * hi);
        total += term;
        mag += term.abs();
        allowance += g_row * r_mag * lo.abs().max(hi.abs());
    }
    let g_sum = gamma(m + n + 2);
    let slack = 2.0 * (allowance + g_sum * mag) + (m + n + 2) as f64 * 1e-300;
    let v = total - slack;
    let v = if v.is_finite() { v.next_down() } else { v };
    if v.is_nan() || !slack.is_finite() {
        f64::NEG_INFINITY
    } else {
        v
    }
}

/// True only when the rows provably cannot all hold on the box: for the multipliers
/// `w ≥ 0`, `min over the box of w·(A·x − b) > 0` in outward-rounded arithmetic.
pub fn certifies_empty(lp: &Lp, w: &[f64]) -> bool {
    if w.iter().all(|&v| !(v > 0.0)) {
        return false;
    }
    let zero = vec![0.0; lp.cols];
    // min w·(A·x − b) = dual bound of the zero objective with multipliers w.
    dual_bound(lp, &zero, 0.0, w) > 0.0
}

/// Whether the rows provably cannot all hold on the box (a rigorous check of the
/// simplex's certificate; `false` means "not shown empty").
pub fn is_empty(lp: &Lp) -> bool {
    if lp.rows() == 0 {
        return false;
    }
    let zero = vec![0.0; lp.cols];
    let sol = solve(lp, &zero, 100 + 4 * (lp.rows() + lp.cols));
    if !sol.infeasible {
        return false;
    }
    let plus: Vec<f64> = sol.ray.iter().map(|v| v.max(0.0)).collect();
    let minus: Vec<f64> = sol.ray.iter().map(|v| (-v).max(0.0)).collect();
    certifies_empty(lp, &plus) || certifies_empty(lp, &minus)
}

/// A rigorous lower bound of `c·x + c0` over the set (`+∞` when the set is shown empty).
pub fn lower_bound(lp: &Lp, c: &[f64], c0: f64) -> f64 {
    if lp.rows() == 0 {
        return dual_bound(lp, c, c0, &[]);
    }
    let sol = solve(lp, c, 100 + 4 * (lp.rows() + lp.cols));
    if sol.infeasible {
        let plus: Vec<f64> = sol.ray.iter().map(|v| v.max(0.0)).collect();
        let minus: Vec<f64> = sol.ray.iter().map(|v| (-v).max(0.0)).collect();
        if certifies_empty(lp, &plus) || certifies_empty(lp, &minus) {
            return f64::INFINITY;
        }
    }
    let with = dual_bound(lp, c, c0, &sol.lambda);
    let without = dual_bound(lp, c, c0, &vec![0.0; lp.rows()]);
    with.max(without)
}

#[cfg(test)]
mod tests {
    use super::*;

    fn unit_box(cols: usize, a: Vec<f64>, b: Vec<f64>) -> Lp {
        Lp { cols, a, b, lo: vec![-1.0; cols], hi: vec![1.0; cols] }
    }

    #[test]
    fn box_only_minimum_is_the_corner() {
        // min x − 2y over [−1, 1]²: −1 − 2 = −3 (worked by hand).
        let lp = unit_box(2, vec![], vec![]);
        let v = lower_bound(&lp, &[1.0, -2.0], 0.0);
        assert!(v <= -3.0 && v > -3.0 - 1e-12, "{v}");
    }

    #[test]
    fn one_cut_moves_the_minimum() {
        // min x + y over [−1,1]² with −x − y ≤ 1 (x + y ≥ −1): the optimum is −1,
        // attained on the segment x + y = −1 (worked by hand).
        let lp = unit_box(2, vec![-1.0, -1.0], vec![1.0]);
        let v = lower_bound(&lp, &[1.0, 1.0], 0.0);
        assert!(v <= -1.0 && v > -1.0 - 1e-9, "{v}");
        // The bound is rigorous: below the true minimum even for a poor λ.
        let poor = dual_bound(&lp, &[1.0, 1.0], 0.0, &[0.3]);
        assert!(poor <= -1.0);
    }

    #[test]
    fn triangle_vertex() {
        // min −x − y with x + 2y ≤ 1, 2x + y ≤ 1 over [−1,1]²: the vertex (1/3, 1/3),
        // value −2/3 (worked by hand).
        let lp = unit_box(2, vec![1.0, 2.0, 2.0, 1.0], vec![1.0, 1.0]);
        let v = lower_bound(&lp, &[-1.0, -1.0], 0.0);
        assert!(v <= -2.0 / 3.0 && v > -2.0 / 3.0 - 1e-9, "{v}");
    }

    #[test]
    fn empty_set_is_certified() {
        // x ≥ 0.5 and x ≤ 0.2: empty.
        let lp = unit_box(1, vec![-1.0, 1.0], vec![-0.5, 0.2]);
        assert!(is_empty(&lp));
        assert_eq!(lower_bound(&lp, &[1.0], 0.0), f64::INFINITY);
        // x ≥ 0.5 and x ≤ 0.5: one point, not empty.
        let lp = unit_box(1, vec![-1.0, 1.0], vec![-0.5, 0.5]);
        assert!(!is_empty(&lp));
        // x ≥ 1.5 is outside the box: empty.
        let lp = unit_box(1, vec![-1.0], vec![-1.5]);
        assert!(is_empty(&lp));
    }

    #[test]
    fn random_lps_bound_never_exceeds_a_feasible_value() {
        // Any feasible point's objective is ≥ the true minimum ≥ the bound.
        let mut s = 12345u64;
        let mut rnd = || {
            s = s.wrapping_mul(6364136223846793005).wrapping_add(1442695040888963407);
            ((s >> 11) as f64 / (1u64 << 53) as f64) * 2.0 - 1.0
        };
        for _ in 0..300 {
            let (rows, cols) = (1 + (rnd().abs() * 8.0) as usize, 1 + (rnd().abs() * 8.0) as usize);
            let a: Vec<f64> = (0..rows * cols).map(|_| rnd()).collect();
            // b chosen so that a random point p is feasible.
            let p: Vec<f64> = (0..cols).map(|_| rnd()).collect();
            let b: Vec<f64> = (0..rows).map(|i| (0..cols).map(|j| a[i * cols + j] * p[j]).sum::<f64>() + rnd().abs() * 0.3).collect();
            let lp = unit_box(cols, a, b);
            let c: Vec<f64> = (0..cols).map(|_| rnd()).collect();
            let v = lower_bound(&lp, &c, 0.0);
            let at_p: f64 = c.iter().zip(&p).map(|(x, y)| x * y).sum();
            assert!(v <= at_p + 1e-12, "bound {v} above a feasible value {at_p}");
            assert!(!is_empty(&lp));
        }
    }
}
