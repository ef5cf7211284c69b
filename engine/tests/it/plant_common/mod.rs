//! Shared helpers of the plant tests: a small deterministic random generator, sample
//! points of boxes, and the period-by-period driver that re-feeds each end set.
#![allow(dead_code)]

use tessera_engine::affine::StateSet;
use tessera_engine::interval::Interval;
use tessera_engine::plant::{PeriodFlow, Plant};
use tessera_engine::spec::EngineOptions;

/// xorshift64* — deterministic, good enough to pick sample points.
pub struct Rng(pub u64);

impl Rng {
    pub fn next_u64(&mut self) -> u64 {
        self.0 ^= self.0 >> 12;
        self.0 ^= self.0 << 25;
        self.0 ^= self.0 >> 27;
        self.0.wrapping_mul(0x2545F4914F6CDD1D)
    }
    /// Uniform in [0, 1).
    pub fn unit(&mut self) -> f64 {
        (self.next_u64() >> 11) as f64 / (1u64 << 53) as f64
    }
    pub fn range(&mut self, lo: f64, hi: f64) -> f64 {
        lo + (hi - lo) * self.unit()
    }
}

/// Corners, centre and `extra` random points of a box.
pub fn samples(b: &[Interval], extra: usize, rng: &mut Rng) -> Vec<Vec<f64>> {
    let n = b.len();
    let mut pts = Vec::new();
    for mask in 0..(1u32 << n) {
        pts.push((0..n).map(|i| if mask >> i & 1 == 1 { b[i].hi() } else { b[i].lo() }).collect());
    }
    pts.push(b.iter().map(|i| i.mid()).collect());
    for _ in 0..extra {
        pts.push(b.iter().map(|i| rng.range(i.lo(), i.hi())).collect());
    }
    pts
}

/// Runs `periods` periods from the box `x0`, feeding each end set into the next period.
pub fn run_periods(plant: &Plant, x0: &[Interval], inputs: &[f64], dist: &[Interval], period: f64, periods: usize, opts: &EngineOptions) -> Vec<PeriodFlow> {
    let mut set = StateSet::from_box(x0);
    let mut flows = Vec::new();
    for k in 0..periods {
        let flow = plant
            .integrate_period(&set, inputs, dist, period, opts)
            .unwrap_or_else(|e| panic!("period {k}: {e}"));
        set = flow.end.clone();
        flows.push(flow);
    }
    flows
}

/// Largest width of the box hull of a set.
pub fn max_width(s: &StateSet) -> f64 {
    s.to_box().iter().map(|i| i.width()).fold(0.0, f64::max)
}

/// Checks the trajectories `exact(j, t)` for `j < count` (t from the start of period 0)
/// against the end sets and the tube pieces (at three times per piece), within `margin`
/// per coordinate. Zonotope membership is the exact test of
/// `StateSet::membership` (facet normals), not just the box hull.
pub fn check_trajectories(flows: &[PeriodFlow], period: f64, margin: f64, count: usize, exact: &dyn Fn(usize, f64) -> Vec<f64>, what: &str) {
    for (k, flow) in flows.iter().enumerate() {
        let t_end = (k + 1) as f64 * period;
        let end = flow.end.membership(margin);
        for j in 0..count {
            let p = exact(j, t_end);
            assert!(end.contains(&p), "{what}: sample {j}, period {k} end: {p:?} not in {:?}", flow.end.to_box());
        }
        for piece in &flow.tube {
            let enc = piece.enclosure.membership(margin);
            for frac in [0.0, 0.37, 1.0] {
                let t = piece.t.lo() + frac * (piece.t.hi() - piece.t.lo());
                for j in 0..count {
                    let q = exact(j, k as f64 * period + t);
                    for (i, h) in piece.hull.iter().enumerate() {
                        assert!(h.inflate(margin).contains(q[i]), "{what}: sample {j}, period {k} t={t}: state {i} = {} not in hull {h:?}", q[i]);
                    }
                    assert!(enc.contains(&q), "{what}: sample {j}, period {k} t={t}: {q:?} not in the tube enclosure");
                }
            }
        }
    }
}
