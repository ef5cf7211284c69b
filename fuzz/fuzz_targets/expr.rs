//! The expression parser on arbitrary text; whatever parses is evaluated in f64 and in
//! interval arithmetic, and differentiated. Checked beyond "no panic": at a point where
//! the f64 value is finite and the interval enclosure defined, the enclosure (of the
//! exact real value) contains the f64 value, since every interval operation is rounded
//! outward at least as far as the f64 operation rounds.
#![no_main]

use libfuzzer_sys::fuzz_target;
use tessera_worker::engine::expr;
use tessera_worker::engine::interval::Interval;

const NAMES: [&str; 3] = ["x", "y", "z"];
const POINT: [f64; 3] = [0.75, -1.5, 2.0];

fuzz_target!(|data: &[u8]| {
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
});
