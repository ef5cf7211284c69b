//! The ONNX reader on arbitrary bytes; a network that loads is evaluated at a point
//! and bounded over a box around it with the interval and the symbolic method. Checked
//! beyond "no panic": both bounds contain the f64 output at the point when it is finite.
#![no_main]

use libfuzzer_sys::fuzz_target;
use tessera_worker::engine::interval::Interval;
use tessera_worker::engine::net::{bounds, onnx};
use tessera_worker::engine::spec::BoundsMethod;

fuzz_target!(|data: &[u8]| {
    let Ok(net) = onnx::load_onnx(data) else { return };
    let n = net.input_dim();
    if n > 4096 || net.output_dim() > 4096 {
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
});
