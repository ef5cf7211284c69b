//! Benchmark (not a test): time per call of interval and symbolic output bounds on a
//! random 4→64→64→64→5 ReLU network over boxes of a few sizes, and the width ratio
//! symbolic / interval.
//!
//! Run: `cargo run --release -p tessera-engine --example bench_bounds`

use ndarray::{Array1, Array2};
use std::time::Instant;
use tessera_engine::interval::Interval;
use tessera_engine::net::{output_bounds, Layer, Network, OutputBounds};
use tessera_engine::spec::BoundsMethod;

/// SplitMix64, so every run measures the same network and boxes.
struct Rng(u64);
impl Rng {
    fn unit(&mut self) -> f64 {
        self.0 = self.0.wrapping_add(0x9E37_79B9_7F4A_7C15);
        let mut z = self.0;
        z = (z ^ (z >> 30)).wrapping_mul(0xBF58_476D_1CE4_E5B9);
        z = (z ^ (z >> 27)).wrapping_mul(0x94D0_49BB_1331_11EB);
        ((z ^ (z >> 31)) >> 11) as f64 / (1u64 << 53) as f64
    }
    fn normal(&mut self) -> f64 {
        (0..12).map(|_| self.unit()).sum::<f64>() - 6.0
    }
}

fn widths(b: &OutputBounds) -> f64 {
    b.outputs.iter().map(|i| i.hi() - i.lo()).sum::<f64>() + b.diff.iter().flatten().map(|i| i.hi() - i.lo()).sum::<f64>()
}

fn main() {
    let mut rng = Rng(42);
    let dims = [4usize, 64, 64, 64, 5];
    let mut layers = Vec::new();
    for k in 0..dims.len() - 1 {
        let (n, m) = (dims[k], dims[k + 1]);
        let s = (2.0 / n as f64).sqrt();
        layers.push(Layer::Dense {
            w: Array2::from_shape_fn((m, n), |_| rng.normal() * s),
            b: Array1::from_shape_fn(m, |_| rng.normal() * 0.1),
        });
        if k < dims.len() - 2 {
            layers.push(Layer::Relu);
        }
    }
    let net = Network::new(4, layers, false).unwrap();
    println!("network 4→64→64→64→5 (ReLU), 20 boxes of half-width `radius` per row centred at random points;");
    println!("times are per call; width ratio = mean over boxes of Σ widths (outputs and differences) symbolic / interval;");
    println!("'decides' = boxes on which every pair of outputs is ordered");
    // Reference: the plain f64 forward pass.
    let x = [0.1, -0.2, 0.3, 0.4];
    let reps = 20_000;
    let t = Instant::now();
    let mut acc = 0.0;
    for _ in 0..reps {
        acc += net.eval(std::hint::black_box(&x))[0];
    }
    println!("f64 eval: {:.2} µs per call (checksum {acc:.3})", t.elapsed().as_secs_f64() * 1e6 / reps as f64);
    println!("{:>10} {:>16} {:>16} {:>16} {:>14} {:>12} {:>12}", "radius", "interval µs", "symbolic µs", "portfolio µs", "width ratio", "int decides", "sym decides");
    for &r in &[0.001, 0.01, 0.05, 0.2, 1.0] {
        let boxes: Vec<Vec<Interval>> = (0..20)
            .map(|_| (0..4).map(|_| { let c = rng.normal(); Interval::new(c - r, c + r) }).collect())
            .collect();
        let time = |method: BoundsMethod, reps: usize| -> (f64, Vec<OutputBounds>) {
            let mut out = Vec::new();
            let t = Instant::now();
            for _ in 0..reps {
                out = boxes.iter().map(|b| output_bounds(&net, b, method)).collect();
            }
            (t.elapsed().as_secs_f64() * 1e6 / (reps * boxes.len()) as f64, out)
        };
        let (ti, ib) = time(BoundsMethod::Interval, 200);
        let (ts, sb) = time(BoundsMethod::Symbolic, 10);
        let (tp, _) = time(BoundsMethod::Portfolio, 10);
        let ratio: f64 = ib.iter().zip(&sb).map(|(i, s)| widths(s) / widths(i)).sum::<f64>() / ib.len() as f64;
        let decided = sb.iter().filter(|s| s.orders_all_pairs()).count();
        let int_decided = ib.iter().filter(|s| s.orders_all_pairs()).count();
        println!("{r:>10} {ti:>16.1} {ts:>16.1} {tp:>16.1} {ratio:>14.3} {:>9}/{} {:>9}/{}", int_decided, ib.len(), decided, sb.len());
    }
}
