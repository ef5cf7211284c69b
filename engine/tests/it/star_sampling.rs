//! Constrained zonotopes (`engine::star`) against sampled points and an outside LP
//! solver.
//!
//! Seeded random stars (2–3 states over the cell's symbols, 1–3 further symbols, a
//! symbol that only the constraints mention, small error radii, 1–4 random
//! constraints): points are drawn by rejection sampling of `ε` in the unit box under
//! the constraints (plus points pushed along random rays to the constraints' boundary,
//! and error terms at random ends) and mapped to states. Each point must lie
//! * inside `Star::hull()` of its star;
//! * inside the hull of `restricted(extra)` when it satisfies the extra constraints
//!   (which must then not be shown empty), and its `ε` must satisfy every constraint
//!   of the restricted star (the symbols keep their meaning there);
//! * inside the result of `reduce(…)` under four settings (fresh symbols, relaxed or
//!   dropped constraints) and inside the `template_hull` of a group of stars that
//!   contains its star.
//!
//! "Inside" a result with other symbols is checked through its supports: for 22
//! directions `v` (axes, random, and towards sampled points), `v·x ≤ max over the
//! result of v·x`, the maximum from scipy.optimize.linprog (HiGHS, a general-purpose LP
//! solver from PyPI) run by `tests/reference/star_support_reference.py`, tolerance
//! 1e-9 relative. Every result's hull must also hold its points, and the rigorous upper
//! bound that the result's own `Bounder` gives for `v·x` must not be below linprog's
//! value. Run with `--nocapture` to see how close the samples come to the supports.

use crate::common;

use common::Rng;
use serde_json::{json, Value};
use tessera_engine::affine::{Affine, StateSet};
use tessera_engine::interval::Interval;
use tessera_engine::star::{Halfspace, Star};

const U64: f64 = 1.0 / 9_007_199_254_740_992.0;

/// A sampled point: its symbols (as many as the star's symbol space) and its state.
#[derive(Clone)]
struct Sample {
    eps: Vec<f64>,
    x: Vec<f64>,
}

/// Every symbol the star mentions is below this.
fn symbol_space(star: &Star) -> usize {
    let cons_max = star.cons.iter().flat_map(|h| h.terms.iter().map(|t| t.0 + 1)).max().unwrap_or(0);
    star.set.num_symbols().max(cons_max)
}

fn holds(h: &Halfspace, eps: &[f64], margin: f64) -> bool {
    let s: f64 = h.terms.iter().map(|&(k, a)| a * eps[k]).sum();
    let mag: f64 = h.terms.iter().map(|&(_, a)| a.abs()).sum::<f64>() + h.rhs.abs();
    s <= h.rhs - margin * mag
}

/// Random constraints a·ε ≤ rhs on `syms` that `anchor` satisfies with room to spare
/// (so they cut the box without emptying it).
fn random_cons(rng: &mut Rng, syms: &[usize], anchor: &[f64], count: usize) -> Vec<Halfspace> {
    (0..count)
        .map(|_| {
            let k = 1 + rng.below(syms.len().min(4));
            let mut picked: Vec<usize> = syms.to_vec();
            for i in 0..picked.len() {
                let j = i + rng.below(picked.len() - i);
                picked.swap(i, j);
            }
            picked.truncate(k);
            let terms: Vec<(usize, f64)> = picked.iter().map(|&s| (s, rng.normal())).collect();
            let at: f64 = terms.iter().map(|&(s, a)| a * anchor[s]).sum();
            let l1: f64 = terms.iter().map(|t| t.1.abs()).sum();
            Halfspace::new(terms, at + rng.uniform(0.05, 0.5) * l1)
        })
        .collect()
}

/// A star over the cell's symbols 0..n (initial), `extra` further symbols from `first`,
/// one symbol (`first + extra`) used only by constraints, and small error radii.
fn random_star(rng: &mut Rng, n: usize, first: usize, extra: usize, n_cons: usize) -> Star {
    let mut comps = Vec::new();
    for _ in 0..n {
        let mut terms: Vec<(usize, f64)> = (0..n).map(|s| (s, rng.normal())).collect();
        for s in first..first + extra {
            if rng.unit() < 0.7 {
                terms.push((s, 0.3 * rng.normal()));
            }
        }
        let e = if rng.unit() < 0.5 { 0.0 } else { 0.01 * rng.unit() };
        comps.push(Affine::from_parts(rng.normal(), &terms, e));
    }
    let space = first + extra + 1;
    let set = StateSet::from_forms(comps, space, n);
    let anchor: Vec<f64> = (0..space).map(|_| rng.uniform(-0.4, 0.4)).collect();
    let syms: Vec<usize> = (0..n).chain(first..first + extra + 1).collect();
    let cons = random_cons(rng, &syms, &anchor, n_cons);
    Star { set, cons }
}

/// The state at `eps` with error terms `d`.
fn state_at(set: &StateSet, eps: &[f64], d: &[f64]) -> Vec<f64> {
    set.components().iter().zip(d).map(|(a, &di)| a.center() + a.terms().iter().map(|&(s, g)| g * eps[s]).sum::<f64>() + di).collect()
}

/// Rejection samples of the star plus points pushed to the boundary of its constraints
/// (along random rays from accepted samples); `extra` constraints (if any) must hold too.
fn sample(rng: &mut Rng, star: &Star, extra: &[Halfspace], uniform: usize, boundary: usize) -> Vec<Sample> {
    let k = symbol_space(star).max(extra.iter().flat_map(|h| h.terms.iter().map(|t| t.0 + 1)).max().unwrap_or(0));
    let cons: Vec<&Halfspace> = star.cons.iter().chain(extra).collect();
    let errs: Vec<f64> = star.set.components().iter().map(|a| a.err()).collect();
    let margin = 1e-12;
    let mut out: Vec<Sample> = Vec::new();
    let mut tries = 0;
    while out.len() < uniform && tries < 200_000 {
        tries += 1;
        let eps: Vec<f64> = (0..k).map(|_| rng.uniform(-1.0, 1.0)).collect();
        if cons.iter().all(|h| holds(h, &eps, margin)) {
            let d: Vec<f64> = errs.iter().map(|&e| rng.uniform(-e, e)).collect();
            out.push(Sample { x: state_at(&star.set, &eps, &d), eps });
        }
    }
    let accepted = out.len();
    for _ in 0..boundary {
        if accepted == 0 {
            break;
        }
        let from = out[rng.below(accepted)].eps.clone();
        let u: Vec<f64> = (0..k).map(|_| rng.normal()).collect();
        // Largest step keeping the box and every constraint.
        let mut t = f64::INFINITY;
        for s in 0..k {
            if u[s] > 0.0 {
                t = t.min((1.0 - from[s]) / u[s]);
            } else if u[s] < 0.0 {
                t = t.min((-1.0 - from[s]) / u[s]);
            }
        }
        for h in &cons {
            let au: f64 = h.terms.iter().map(|&(s, a)| a * u[s]).sum();
            let af: f64 = h.terms.iter().map(|&(s, a)| a * from[s]).sum();
            if au > 0.0 {
                t = t.min((h.rhs - af) / au);
            }
        }
        let t = t * (1.0 - 1e-9);
        let eps: Vec<f64> = from.iter().zip(&u).map(|(f, v)| (f + t * v).clamp(-1.0, 1.0)).collect();
        if cons.iter().all(|h| holds(h, &eps, margin)) {
            let d: Vec<f64> = errs.iter().map(|&e| if rng.unit() < 0.5 { -e } else { e }).collect();
            out.push(Sample { x: state_at(&star.set, &eps, &d), eps });
        }
    }
    out
}

/// A bound on the rounding of `state_at` for this star (K + 2 roundings per state).
fn state_tolerance(set: &StateSet) -> Vec<f64> {
    set.components()
        .iter()
        .map(|a| {
            let mag = a.center().abs() + a.terms().iter().map(|t| t.1.abs()).sum::<f64>() + a.err();
            4.0 * (a.terms().len() + 3) as f64 * U64 * mag + 1e-300
        })
        .collect()
}

fn in_hull(hull: &[Interval], x: &[f64], tol: &[f64]) -> bool {
    hull.iter().zip(x).zip(tol).all(|((h, &v), &t)| h.lo() - t <= v && v <= h.hi() + t)
}

fn star_json(star: &Star, dirs: &[Vec<f64>]) -> Value {
    json!({
        "comps": star.set.components().iter().map(|a| json!({"c": a.center(), "terms": a.terms(), "e": a.err()})).collect::<Vec<_>>(),
        "cons": star.cons.iter().map(|h| json!({"terms": h.terms, "rhs": h.rhs})).collect::<Vec<_>>(),
        "dirs": dirs,
    })
}

/// A result to check: a star and the samples that must lie in it.
struct Check {
    what: String,
    result: Star,
    samples: Vec<Sample>,
    dirs: Vec<Vec<f64>>,
    /// Earlier checks (same directions) whose stars this result must contain: its
    /// support must be at least theirs in every direction.
    contains: Vec<usize>,
}

fn directions(rng: &mut Rng, n: usize, samples: &[Sample]) -> Vec<Vec<f64>> {
    let mut dirs = Vec::new();
    for i in 0..n {
        for s in [1.0, -1.0] {
            let mut d = vec![0.0; n];
            d[i] = s;
            dirs.push(d);
        }
    }
    while dirs.len() < 2 * n + 12 {
        let d: Vec<f64> = (0..n).map(|_| rng.normal()).collect();
        let norm = d.iter().map(|v| v * v).sum::<f64>().sqrt();
        dirs.push(d.iter().map(|v| v / norm).collect());
    }
    // Towards sampled points, from the samples' mean: where a cut-off corner would be.
    if !samples.is_empty() {
        let mean: Vec<f64> = (0..n).map(|i| samples.iter().map(|s| s.x[i]).sum::<f64>() / samples.len() as f64).collect();
        while dirs.len() < 22 {
            let p = &samples[rng.below(samples.len())].x;
            let d: Vec<f64> = (0..n).map(|i| p[i] - mean[i]).collect();
            let norm = d.iter().map(|v| v * v).sum::<f64>().sqrt();
            if norm > 0.0 {
                dirs.push(d.iter().map(|v| v / norm).collect());
            } else {
                break;
            }
        }
    }
    dirs
}

#[test]
fn stars_hold_their_sampled_points() {
    let mut rng = Rng(0x57A2_0017);
    let mut checks: Vec<Check> = Vec::new();
    let mut failures: Vec<String> = Vec::new();
    // Per kind of restriction: (tried, shown empty).
    let mut restrictions: std::collections::BTreeMap<&str, (usize, usize)> = Default::default();
    for t in 0..14 {
        let n = 2 + rng.below(2);
        let extra = 1 + rng.below(3);
        let n_cons = 1 + rng.below(4);
        let base = random_star(&mut rng, n, n, extra, n_cons);
        let samples = sample(&mut rng, &base, &[], 300, 300);
        assert!(samples.len() >= 400, "star {t}: only {} samples", samples.len());
        let tol = state_tolerance(&base.set);
        let label = |s: &str| format!("star {t} ({n} states, {} constraints): {s}", base.cons.len());

        // The star itself (its own supports: checks the sampler and the LP reference).
        let base_dirs = directions(&mut rng, n, &samples);
        let itself = checks.len();
        checks.push(Check { what: label("itself"), result: base.clone(), samples: samples.clone(), dirs: base_dirs.clone(), contains: vec![] });

        // hull()
        let hull = base.hull().expect("a sampled star is not empty");
        for s in &samples {
            if !in_hull(&hull, &s.x, &tol) {
                failures.push(format!("{}: {:?} outside hull {hull:?}", label("hull"), s.x));
            }
        }

        // restricted(extra): points that satisfy the extra constraints stay inside.
        // Three kinds of extra constraints: random cuts; a sliver that only the most
        // extreme samples satisfy (the set is not empty, so it must not be shown empty);
        // and the opposite of one of the star's constraints (empty).
        let space = symbol_space(&base);
        let anchor: Vec<f64> = (0..space).map(|_| rng.uniform(-0.6, 0.6)).collect();
        let syms: Vec<usize> = (0..space).collect();
        let n_more = 1 + rng.below(2);
        let random_more = random_cons(&mut rng, &syms, &anchor, n_more);
        let sliver = {
            let h = random_cons(&mut rng, &syms, &anchor, 1).pop().unwrap();
            let lowest = samples.iter().map(|s| h.terms.iter().map(|&(k, a)| a * s.eps[k]).sum::<f64>()).fold(f64::INFINITY, f64::min);
            let l1: f64 = h.terms.iter().map(|t| t.1.abs()).sum();
            vec![Halfspace::new(h.terms.clone(), lowest + 1e-6 * l1)]
        };
        let opposite = {
            let h = &base.cons[0];
            let l1: f64 = h.terms.iter().map(|t| t.1.abs()).sum();
            vec![Halfspace::new(h.terms.iter().map(|&(k, a)| (k, -a)).collect(), -h.rhs - 0.01 * l1)]
        };
        for (kind, more) in [("restricted", random_more), ("restricted to a sliver", sliver), ("restricted to nothing", opposite)] {
            let kept: Vec<Sample> = samples.iter().filter(|s| more.iter().all(|h| holds(h, &s.eps, 1e-12))).cloned().collect();
            restrictions.entry(kind).or_default().0 += 1;
            match base.restricted(more.clone()) {
                None => {
                    restrictions.entry(kind).or_default().1 += 1;
                    if !kept.is_empty() {
                        failures.push(format!("{}: shown empty but {} samples satisfy the extra constraints", label(kind), kept.len()));
                    }
                }
                Some(r) => {
                    let rh = r.hull().expect("restricted star with samples");
                    for s in &kept {
                        if !in_hull(&rh, &s.x, &tol) {
                            failures.push(format!("{}: {:?} outside the restricted hull {rh:?}", label(kind), s.x));
                        }
                        for h in &r.cons {
                            if !holds(h, &s.eps, -1e-12) {
                                failures.push(format!("{}: sample violates the restricted star's constraint {h:?}", label(kind)));
                            }
                        }
                    }
                    if kind == "restricted" {
                        let more_samples = sample(&mut rng, &base, &more, 200, 200);
                        let dirs = directions(&mut rng, n, &more_samples);
                        checks.push(Check { what: label(kind), result: r, samples: more_samples, dirs, contains: vec![] });
                    }
                }
            }
            if kind == "restricted to a sliver" && kept.is_empty() {
                failures.push(format!("{}: no sample kept (test set-up)", label(kind)));
            }
            if kind == "restricted to nothing" && !kept.is_empty() {
                failures.push(format!("{}: a sample satisfies a constraint and its opposite (test set-up)", label(kind)));
            }
        }

        // reduce(max_gens, max_cons) under several settings.
        let n_init = base.set.num_initial();
        for (g, c) in [(n_init + n, 8), (n_init + n + 1, 1), (n_init + n + 3, 8), (1, 0)] {
            let mut r = base.clone();
            r.reduce(g, c);
            let rh = r.hull().expect("reduced star not empty");
            let rtol: Vec<f64> = tol.iter().map(|v| v * 2.0).collect();
            for s in &samples {
                if !in_hull(&rh, &s.x, &rtol) {
                    failures.push(format!("{}: {:?} outside the reduced hull {rh:?}", label(&format!("reduce({g}, {c})")), s.x));
                }
            }
            checks.push(Check {
                what: label(&format!("reduce({g}, {c})")),
                result: r,
                samples: samples.clone(),
                dirs: base_dirs.clone(),
                contains: vec![itself],
            });
        }

        // template_hull of a group over the same initial symbols: the two sides of a cut
        // on the initial symbols, and a second random star with its own symbols.
        let cut_terms: Vec<(usize, f64)> = (0..n).map(|s| (s, rng.normal())).collect();
        let offset = 0.3 * rng.normal();
        let side_a = vec![Halfspace::new(cut_terms.clone(), offset)];
        let side_b = vec![Halfspace::new(cut_terms.iter().map(|&(s, a)| (s, -a)).collect(), -offset)];
        let (other_extra, other_cons) = (1 + rng.below(2), 1 + rng.below(3));
        let other = random_star(&mut rng, n, space + 2, other_extra, other_cons);
        let mut group: Vec<Star> = Vec::new();
        let mut group_samples: Vec<Vec<Sample>> = Vec::new();
        for (star, cut) in [(&base, &side_a), (&base, &side_b), (&other, &side_a)] {
            if let Some(part) = star.restricted(cut.clone()) {
                group_samples.push(sample(&mut rng, star, cut, 150, 150));
                group.push(part);
            }
        }
        let all_samples: Vec<Sample> = group_samples.iter().flatten().cloned().collect();
        let mut next = group.iter().map(symbol_space).max().unwrap() + 5;
        let hull_star = Star::template_hull(&group, &mut next);
        let th = hull_star.hull().expect("template hull not empty");
        let wide: Vec<f64> = (0..n).map(|i| tol[i].max(state_tolerance(&other.set)[i]) * 2.0).collect();
        for s in &all_samples {
            if !in_hull(&th, &s.x, &wide) {
                failures.push(format!("{}: {:?} outside the template hull's box {th:?}", label("template_hull"), s.x));
            }
        }
        let dirs = directions(&mut rng, n, &all_samples);
        let mut members = Vec::new();
        for (part, samples) in group.iter().zip(group_samples) {
            members.push(checks.len());
            checks.push(Check { what: label("template member"), result: part.clone(), samples, dirs: dirs.clone(), contains: vec![] });
        }
        checks.push(Check {
            what: label(&format!("template_hull of {}", group.len())),
            result: hull_star,
            samples: all_samples,
            dirs,
            contains: members,
        });
    }

    // Supports from linprog.
    let dir = common::temp_dir("star-sampling");
    let input = dir.join("stars.json");
    let output = dir.join("sups.json");
    let stars: Vec<Value> = checks.iter().map(|c| star_json(&c.result, &c.dirs)).collect();
    std::fs::write(&input, serde_json::to_string(&json!({ "stars": stars })).unwrap()).unwrap();
    common::run_reference("star_support_reference.py", &[input.to_str().unwrap(), output.to_str().unwrap()]);
    let sups: Value = serde_json::from_str(&std::fs::read_to_string(&output).unwrap()).unwrap();
    let sups = sups["sups"].as_array().unwrap();
    assert_eq!(sups.len(), checks.len());
    let (mut point_checks, mut lps, mut support_checks) = (0usize, 0usize, 0usize);
    // Containment through supports (both from linprog): h_result(v) ≥ h_inner(v).
    let mut support_margin: std::collections::BTreeMap<String, Vec<f64>> = Default::default();
    for (c, s) in checks.iter().zip(sups) {
        for &inner in &c.contains {
            assert_eq!(checks[inner].dirs, c.dirs);
            for (k, v) in c.dirs.iter().enumerate() {
                let (Some(outer), Some(inner_sup)) = (s[k].as_f64(), sups[inner][k].as_f64()) else { continue };
                support_checks += 1;
                let scale = 1.0 + outer.abs() + inner_sup.abs();
                if outer < inner_sup - 1e-9 * scale {
                    failures.push(format!(
                        "{}: support {outer} in direction {v:?} below {inner_sup}, the support of {} that it must contain",
                        c.what, checks[inner].what
                    ));
                }
                let kind = c.what.split(": ").nth(1).unwrap_or(&c.what).split(" of ").next().unwrap().to_string();
                support_margin.entry(kind).or_default().push((outer - inner_sup) / scale);
            }
        }
    }
    for (kind, mut v) in support_margin {
        v.sort_by(f64::total_cmp);
        println!(
            "  {kind}: support − contained star's support, relative: min {:.2e}, median {:.2e} ({} directions)",
            v[0],
            v[v.len() / 2],
            v.len()
        );
    }
    let mut closest: Vec<(String, f64)> = Vec::new();
    for (c, s) in checks.iter().zip(sups) {
        let bounder = c.result.bounder();
        let mut closest_here = f64::NEG_INFINITY;
        for (v, sup) in c.dirs.iter().zip(s.as_array().unwrap()) {
            lps += 1;
            let Some(sup) = sup.as_f64() else {
                failures.push(format!("{}: linprog finds the result empty, but it must hold {} samples", c.what, c.samples.len()));
                continue;
            };
            // Scale of v·x over the result: for the tolerances.
            let form = c.result.set.components().iter().zip(v).fold(Affine::constant(0.0), |acc, (a, &w)| acc.add(&a.scale(w)));
            let scale = 1.0 + form.center().abs() + form.rad();
            let tol = 1e-9 * scale;
            // The result's own rigorous upper bound of v·x must not be below linprog's.
            let ours = -bounder.lower(&form.neg());
            if !(ours >= sup - tol) {
                failures.push(format!("{}: Bounder's upper bound {ours} of v·x below linprog's maximum {sup} (v = {v:?})", c.what));
            }
            let mut best = f64::NEG_INFINITY;
            for p in &c.samples {
                point_checks += 1;
                let vx: f64 = v.iter().zip(&p.x).map(|(a, b)| a * b).sum();
                if vx > sup + tol {
                    failures.push(format!("{}: sample {:?} has v·x = {vx} above the maximum {sup} over the result (v = {v:?})", c.what, p.x));
                }
                best = best.max(vx);
            }
            closest_here = closest_here.max((best - sup) / scale);
        }
        closest.push((c.what.clone(), closest_here));
    }
    let mut by_kind: std::collections::BTreeMap<String, Vec<f64>> = Default::default();
    for (w, v) in &closest {
        let kind = w.split(": ").nth(1).unwrap_or(w).split(" of ").next().unwrap().to_string();
        by_kind.entry(kind).or_default().push(*v);
    }
    for (kind, mut v) in by_kind {
        v.sort_by(f64::total_cmp);
        println!("  {kind}: {} results; the samples come within (median) {:.2e} of a support (relative), closest {:.2e}", v.len(), -v[v.len() / 2], -v[v.len() - 1]);
    }
    println!(
        "{} stars, {lps} linprog supports, {support_checks} support comparisons, {point_checks} point-direction checks; \
         restrictions (tried, shown empty): {restrictions:?}",
        checks.len()
    );
    assert!(failures.is_empty(), "{} failures, first ones:\n{}", failures.len(), failures.iter().take(20).cloned().collect::<Vec<_>>().join("\n"));
    assert!(checks.len() >= 14 * 6 && point_checks >= 500_000, "{} results, {point_checks} checks", checks.len());
}

/// A constraint may mention a symbol outside the set's own symbol space (the noise
/// symbols that `decide_on_star` adds are numbered from the caller's `noise_base`).
/// `reduce` must then not mint that number for a box generator: the constraint would
/// silently restrict the new generator. Here `x = ε0 + ε2 + ε3` over symbols 0..4 with
/// the constraint `ε4 ≤ −0.9`; the point `x = 3` (ε0 = ε2 = ε3 = 1, ε4 = −1) is in the
/// star and must stay in its hull after `reduce(2, 8)`.
#[test]
fn reduce_keeps_fresh_symbols_apart_from_constraint_symbols() {
    let set = StateSet::from_forms(vec![Affine::from_parts(0.0, &[(0, 1.0), (2, 1.0), (3, 1.0)], 0.0)], 4, 1);
    let mut star = Star { set, cons: vec![Halfspace::new(vec![(4, 1.0)], -0.9)] };
    let x = state_at(&star.set, &[1.0, 0.0, 1.0, 1.0, -1.0], &[0.0]);
    assert!(star.cons.iter().all(|h| holds(h, &[1.0, 0.0, 1.0, 1.0, -1.0], 0.0)) && x == vec![3.0]);
    star.reduce(2, 8);
    let hull = star.hull().expect("not empty");
    assert!(hull[0].contains(3.0), "x = 3 lost by reduce: hull {hull:?}, set {:?}, constraints {:?}", star.set.components(), star.cons);
}
