//! Optimised lower slopes of the ReLU relaxation, per objective row.
//!
//! The backward pass of [`super::bounds`] replaces an unstable ReLU neuron (pre-activation
//! bounds `l < 0 < u`) whose coefficient is positive by the lower relaxation
//! `relu(z) ≥ α·z`. Every `α ∈ [0, 1]` gives a valid relaxation; the fixed rule picks
//! 0 or 1. Choosing `α` per neuron and per objective row to maximise the resulting
//! lower bound over the input box is the published refinement of linear bound
//! propagation by optimised slopes (projected gradient ascent on `α`, common practice).
//!
//! Soundness does not rest on this module: it only *proposes* slopes. The rigorous
//! backward pass re-derives every offset for the slopes it is given (bounds.rs, step 2:
//! any coefficient gives a valid offset), with all roundings accounted for. Here
//! plain f64 arithmetic is enough, because a poor proposal costs tightness, never
//! soundness.

use super::{Layer, Network};
use crate::interval::Interval;
use ndarray::Array2;

/// Chosen lower slopes: `alpha[r][base[k] + i]` for neuron `i` of the ReLU layer `k`
/// and objective row `r`. Neurons without a choice (stable ones) are ignored by the
/// backward pass.
#[derive(Clone, Debug)]
pub struct Slopes {
    alpha: Vec<Vec<f64>>,
    base: Vec<usize>,
}

impl Slopes {
    /// The slope of neuron `i` of layer `k` for row `r`, clamped to `[0, 1]`.
    pub fn get(&self, r: usize, k: usize, i: usize) -> f64 {
        self.alpha[r][self.base[k] + i].clamp(0.0, 1.0)
    }
}

/// The fixed rule of the backward pass: `α = 1` if `u ≥ −l`, else 0.
pub fn adaptive_slope(z: &Interval) -> f64 {
    if z.hi() >= -z.lo() {
        1.0
    } else {
        0.0
    }
}

/// What the slopes of a row maximise: the linear lower bound's lowest value over the
/// input box (the bound on the row itself), or its mean over the box (its value at the
/// centre). A decision uses the bound as a constraint `λ·x + d ≤ 0` on where a command
/// may win, so there the whole function matters, not only its minimum: raising the
/// minimum may tilt the plane and let the constraint keep more of the box.
#[derive(Clone, Copy, Debug, PartialEq, Eq)]
pub enum Target {
    Lowest,
    Mean,
}

/// Slopes for the rows of `obj` (combinations of the value after the first `top`
/// layers) found by `steps` projected-gradient steps from the fixed rule, each row
/// maximising its `target` over the box `vals[0]`; `vals[k]` encloses the value
/// entering layer `k`. The best slopes met are kept (the fixed rule's included).
/// `None` when the chain below `top` has a layer other than dense and ReLU, or a bound
/// is not finite.
pub fn optimise(net: &Network, vals: &[Vec<Interval>], top: usize, obj: &Array2<f64>, steps: u32, target: Target) -> Option<Slopes> {
    let layers = &net.layers()[..top];
    let mut base = vec![0usize; top];
    let mut count = 0;
    for (k, layer) in layers.iter().enumerate() {
        match layer {
            Layer::Relu => {
                base[k] = count;
                count += vals[k].len();
            }
            Layer::Dense { .. } => {}
            Layer::Sigmoid | Layer::Tanh => return None,
        }
    }
    if vals[..=top].iter().flatten().any(|z| !z.is_bounded() || z.is_undefined()) {
        return None;
    }
    let mut init = vec![0.0; count];
    for (k, layer) in layers.iter().enumerate() {
        if matches!(layer, Layer::Relu) {
            for (i, z) in vals[k].iter().enumerate() {
                init[base[k] + i] = adaptive_slope(z);
            }
        }
    }
    let mut alpha = Vec::with_capacity(obj.nrows());
    let mut grad = vec![0.0; count];
    for row in obj.rows() {
        let row = row.to_vec();
        let mut a = init.clone();
        let mut best = a.clone();
        let mut best_value = value_and_gradient(layers, vals, &base, &row, &a, target, &mut grad);
        // Step size halves whenever a step does not improve on the best so far.
        let mut step = 0.5;
        for _ in 0..steps {
            let gmax = grad.iter().fold(0.0f64, |m, g| m.max(g.abs()));
            if gmax == 0.0 || step < 1e-3 {
                break;
            }
            for (x, g) in a.iter_mut().zip(&grad) {
                *x = (*x + step * g / gmax).clamp(0.0, 1.0);
            }
            let v = value_and_gradient(layers, vals, &base, &row, &a, target, &mut grad);
            if v > best_value {
                best_value = v;
                best.clone_from(&a);
            } else {
                step *= 0.5;
                a.clone_from(&best);
                value_and_gradient(layers, vals, &base, &row, &a, target, &mut grad);
            }
        }
        alpha.push(best);
    }
    Some(Slopes { alpha, base })
}

/// The lower bound of `row·v[top]` over the box `vals[0]` given by the backward pass
/// with slopes `a` (plain f64), and its gradient with respect to `a` in `grad`
/// (reverse mode through the pass).
fn value_and_gradient(layers: &[Layer], vals: &[Vec<Interval>], base: &[usize], row: &[f64], a: &[f64], target: Target, grad: &mut [f64]) -> f64 {
    grad.iter_mut().for_each(|g| *g = 0.0);
    // Forward through the backward pass, taping the coefficients entering each ReLU.
    let mut lam = row.to_vec();
    let mut d = 0.0;
    let mut tape: Vec<Vec<f64>> = vec![Vec::new(); layers.len()];
    for (k, layer) in layers.iter().enumerate().rev() {
        match layer {
            Layer::Dense { w, b } => {
                d += lam.iter().zip(b).map(|(l, b)| l * b).sum::<f64>();
                let mut next = vec![0.0; w.ncols()];
                for (j, &l) in lam.iter().enumerate() {
                    if l != 0.0 {
                        for (n, &wji) in next.iter_mut().zip(w.row(j)) {
                            *n += l * wji;
                        }
                    }
                }
                lam = next;
            }
            Layer::Relu => {
                tape[k] = lam.clone();
                for (i, z) in vals[k].iter().enumerate() {
                    let (lo, hi) = (z.lo(), z.hi());
                    let l = lam[i];
                    if hi <= 0.0 {
                        lam[i] = 0.0;
                    } else if lo < 0.0 {
                        if l > 0.0 {
                            lam[i] = l * a[base[k] + i];
                        } else if l < 0.0 {
                            let s = hi / (hi - lo);
                            lam[i] = l * s;
                            d += -l * s * lo;
                        }
                    }
                }
            }
            Layer::Sigmoid | Layer::Tanh => unreachable!("refused by optimise"),
        }
    }
    let input = &vals[0];
    let mut value = d;
    // Adjoint of the coefficients at the input: the box corner each one picks (lowest
    // value over the box), or the box's centre (mean value over the box).
    let mut g: Vec<f64> = lam
        .iter()
        .zip(input)
        .map(|(&l, x)| {
            let c = match target {
                Target::Lowest => if l >= 0.0 { x.lo() } else { x.hi() },
                Target::Mean => x.mid(),
            };
            value += l * c;
            c
        })
        .collect();
    for (k, layer) in layers.iter().enumerate() {
        match layer {
            Layer::Dense { w, b } => {
                // lam_in = lam_out·W and d += lam_out·b: ∂/∂lam_out = W·g + b.
                g = w.rows().into_iter().zip(b).map(|(wr, &bj)| wr.iter().zip(&g).map(|(w, g)| w * g).sum::<f64>() + bj).collect();
            }
            Layer::Relu => {
                let lam_out = &tape[k];
                for (i, z) in vals[k].iter().enumerate() {
                    let (lo, hi) = (z.lo(), z.hi());
                    let l = lam_out[i];
                    if hi <= 0.0 {
                        g[i] = 0.0;
                    } else if lo < 0.0 {
                        if l > 0.0 {
                            grad[base[k] + i] = g[i] * l;
                            g[i] *= a[base[k] + i];
                        } else if l < 0.0 {
                            let s = hi / (hi - lo);
                            g[i] = g[i] * s - s * lo;
                        } else {
                            // At l = 0 both sides give lam_in = 0; take the lower side.
                            g[i] *= a[base[k] + i];
                        }
                    }
                }
            }
            Layer::Sigmoid | Layer::Tanh => unreachable!("refused by optimise"),
        }
    }
    value
}

#[cfg(test)]
mod tests {
    use super::super::bounds::{linear_lower_bounds, linear_lower_bounds_tuned};
    use super::*;
    use ndarray::{array, Array1};

    /// One input x ∈ [−1, 2], hidden neurons relu(x) and relu(−x), and the outputs
    /// relu(x) and 0.5·relu(x) + 0.5·relu(−x) = 0.5·|x|. Worked by hand from the
    /// relaxation relu(z) ≥ α·z (common practice): for relu(x) the lower bound
    /// min over the box of α·x is −α, best at α = 0 (value 0) while the fixed rule takes
    /// α = 1 (u = 2 ≥ −l = 1; value −1). For 0.5·|x| the bound 0.5·(α₁ − α₂)·x is best
    /// at α₁ = α₂ (value 0); the fixed rule takes α₁ = 1, α₂ = 0 (−x ∈ [−2, 1]), value
    /// −0.5.
    #[test]
    fn optimised_slopes_reach_the_worked_optimum() {
        let net = Network::new(
            1,
            vec![
                Layer::Dense { w: array![[1.0], [-1.0]], b: Array1::zeros(2) },
                Layer::Relu,
                Layer::Dense { w: array![[1.0, 0.0], [0.5, 0.5]], b: Array1::zeros(2) },
            ],
            false,
        )
        .unwrap();
        let input = [Interval::new(-1.0, 2.0)];
        let obj = array![[1.0, 0.0], [0.0, 1.0]];
        let lower = |lam: &Array2<f64>, d: &[f64], r: usize| d[r] + (lam[[r, 0]] * -1.0).min(lam[[r, 0]] * 2.0);
        let (lam, d) = linear_lower_bounds(&net, &input, obj.clone()).unwrap();
        assert!((lower(&lam, &d, 0) + 1.0).abs() < 1e-12, "fixed rule, row 0: {}", lower(&lam, &d, 0));
        assert!((lower(&lam, &d, 1) + 0.5).abs() < 1e-12, "fixed rule, row 1: {}", lower(&lam, &d, 1));
        let (lam, d) = linear_lower_bounds_tuned(&net, &input, obj, 30, Target::Lowest).unwrap();
        assert!(lower(&lam, &d, 0) > -1e-9, "optimised, row 0: {}", lower(&lam, &d, 0));
        assert!(lower(&lam, &d, 1) > -1e-2, "optimised, row 1: {}", lower(&lam, &d, 1));
        assert!(lower(&lam, &d, 1) <= 1e-12, "a lower bound of 0.5·|x| cannot exceed its minimum 0");
    }
}
