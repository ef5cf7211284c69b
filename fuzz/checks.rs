//! What each fuzz target checks, shared by the fuzz targets (`fuzz/fuzz_targets/`) and
//! the regression tests that replay every input the fuzzer ever found failing
//! (`engine/tests/it/fuzz_regressions.rs`). Each check panics on a violation.

use tessera_engine::expr;
use tessera_engine::interval::Interval;
use tessera_engine::net::{bounds, onnx};
use tessera_engine::spec::{self, BoundsMethod};

const NAMES: [&str; 3] = ["x", "y", "z"];
const POINT: [f64; 3] = [0.75, -1.5, 2.0];

/// The expression parser on arbitrary text; whatever parses is evaluated in f64 and in
/// interval arithmetic, and differentiated. Beyond "no panic, no hang": at a point
/// where the f64 value is finite and the enclosure defined, the enclosure contains the
/// f64 value (each interval operation is rounded outward at least as far as the f64
/// operation rounds, and libm results are widened by several ulps).
pub fn check_expr(data: &[u8]) {
    let Ok(src) = std::str::from_utf8(data) else { return };
    let resolve = |n: &str| NAMES.iter().position(|&k| k == n);
    let Ok(e) = expr::parse(src, &resolve) else { return };
    let v = e.eval_f64(&POINT);
    let boxed: Vec<Interval> = POINT.iter().map(|&p| Interval::point(p)).collect();
    let i = e.eval_interval(&boxed);
    if v.is_finite() && !i.is_undefined() {
        assert!(i.contains(v), "{src:?}: f64 value {v:e} outside its enclosure {i:?}");
    }
    let wide = [Interval::new(-1.0, 1.0), Interval::new(0.5, 4.0), Interval::new(-3.0, -2.0)];
    let _ = e.eval_interval(&wide);
    for k in 0..NAMES.len() {
        let d = e.diff(k);
        let _ = d.eval_f64(&POINT);
        let _ = d.eval_interval(&wide);
    }
}

/// The ONNX reader on arbitrary bytes; a network that loads is evaluated at a point and
/// bounded over a box around it with the interval and the symbolic method. Beyond "no
/// panic": both bounds contain the f64 output at the point where it is finite.
pub fn check_onnx(data: &[u8]) {
    let Ok(net) = onnx::load_onnx(data) else { return };
    let n = net.input_dim();
    // The bounds cost grows with the weights and with the square of the outputs (one
    // objective per ordered pair of outputs, for the arg-max): a valid model the size of
    // a real controller bank takes seconds per call by design. Bound only small ones,
    // so that the fuzzer's time goes into the reader.
    let weights: usize = net
        .layers()
        .iter()
        .map(|l| match l {
            tessera_engine::net::Layer::Dense { w, .. } => w.len(),
            _ => 0,
        })
        .sum();
    if n > 4096 || net.output_dim() > 32 || weights > 1 << 16 {
        return;
    }
    let x: Vec<f64> = (0..n).map(|k| (k % 5) as f64 * 0.25 - 0.5).collect();
    let y = net.eval(&x);
    assert_eq!(y.len(), net.output_dim());
    let bx: Vec<Interval> = x.iter().map(|&v| Interval::new(v - 0.125, v + 0.125)).collect();
    for m in [BoundsMethod::Interval, BoundsMethod::Symbolic] {
        let b = bounds::output_bounds(&net, &bx, m);
        assert_eq!(b.outputs.len(), y.len());
        for (k, (o, &v)) in b.outputs.iter().zip(&y).enumerate() {
            if v.is_finite() && !o.is_undefined() {
                assert!(o.contains(v), "{m:?}: output {k} = {v:e} outside its bound {o:?}");
            }
        }
    }
}

/// The campaign spec validator on arbitrary text: a spec or a non-empty list of
/// errors, never a panic or a hang.
pub fn check_spec(data: &[u8]) {
    let Ok(src) = std::str::from_utf8(data) else { return };
    if let Err(errors) = spec::parse_spec(src) {
        assert!(!errors.is_empty(), "rejected without an error");
    }
}
