//! Interval enclosures against mpmath at 60 digits (tests/reference/check_intervals.py).
//!
//! For every function, 10,000 random intervals drawn from several regimes (huge, tiny,
//! negative, straddling zero, near multiples of π/2, across the atan2 branch cut); the
//! exact image of the endpoints and of interior sample points must lie inside our
//! enclosure. This also checks the libm accuracy assumption of `interval.rs`.

use std::io::Write;
use std::process::Command;
use tessera_engine::interval::Interval;

/// SplitMix64: a small deterministic generator (common practice for test data).
struct Rng(u64);
impl Rng {
    fn next(&mut self) -> u64 {
        self.0 = self.0.wrapping_add(0x9E3779B97F4A7C15);
        let mut z = self.0;
        z = (z ^ (z >> 30)).wrapping_mul(0xBF58476D1CE4E5B9);
        z = (z ^ (z >> 27)).wrapping_mul(0x94D049BB133111EB);
        z ^ (z >> 31)
    }
    fn unit(&mut self) -> f64 {
        (self.next() >> 11) as f64 / (1u64 << 53) as f64
    }
    fn range(&mut self, lo: f64, hi: f64) -> f64 {
        lo + (hi - lo) * self.unit()
    }
    /// A value of random magnitude 10^[e0, e1] and random sign.
    fn log_uniform(&mut self, e0: f64, e1: f64) -> f64 {
        let m = 10f64.powf(self.range(e0, e1));
        if self.next() & 1 == 0 {
            m
        } else {
            -m
        }
    }
}

/// A random interval from one of several regimes chosen by `k`.
fn random_interval(r: &mut Rng, k: u64) -> Interval {
    let (a, b) = match k % 7 {
        0 => {
            let c = r.range(-10.0, 10.0);
            (c, c + r.range(0.0, 5.0))
        }
        1 => {
            let c = r.log_uniform(5.0, 300.0);
            (c, c + c.abs() * r.range(0.0, 1e-3))
        }
        2 => {
            let c = r.log_uniform(-300.0, -5.0);
            (c, c + c.abs() * r.range(0.0, 2.0))
        }
        3 => (-r.range(0.0, 3.0), r.range(0.0, 3.0)), // straddles zero
        4 => {
            // near a multiple of π/2
            let m = (r.next() % 41) as f64 - 20.0;
            let c = m * std::f64::consts::FRAC_PI_2 + r.log_uniform(-16.0, -1.0);
            (c, c + r.range(0.0, 1e-3))
        }
        5 => {
            let c = r.range(-1e6, 1e6);
            (c, c + r.range(0.0, 10.0))
        }
        _ => {
            let c = r.range(-2.0, 2.0);
            (c, c) // point interval
        }
    };
    Interval::new(a.min(b), a.max(b))
}

fn samples(r: &mut Rng, x: Interval) -> Vec<f64> {
    let mut v = vec![x.lo(), x.hi()];
    for _ in 0..2 {
        v.push(x.lo() + (x.hi() - x.lo()) * r.unit());
    }
    v.into_iter().filter(|p| p.is_finite() && x.contains(*p)).collect()
}

fn json_f(x: f64) -> serde_json::Value {
    if x.is_nan() {
        serde_json::Value::Null
    } else if x.is_infinite() {
        serde_json::Value::String(if x > 0.0 { "inf" } else { "-inf" }.into())
    } else {
        serde_json::json!(x)
    }
}

#[test]
fn enclosures_hold_the_exact_image_per_mpmath() {
    let mut r = Rng(20261202);
    let per_function = 10_000u64;
    let unary: Vec<(&str, fn(Interval) -> Interval)> = vec![
        ("sqr", |x| x.sqr()),
        ("powi3", |x| x.powi(3)),
        ("powi_m2", |x| x.powi(-2)),
        ("sqrt", |x| x.sqrt()),
        ("exp", |x| x.exp()),
        ("log", |x| x.ln()),
        ("sin", |x| x.sin()),
        ("cos", |x| x.cos()),
        ("tan", |x| x.tan()),
        ("atan", |x| x.atan()),
        ("tanh", |x| x.tanh()),
    ];
    let binary: Vec<(&str, fn(Interval, Interval) -> Interval)> = vec![
        ("add", |a, b| a + b),
        ("sub", |a, b| a - b),
        ("mul", |a, b| a * b),
        ("div", |a, b| a / b),
        ("pow", |a, b| a.pow(b)),
        ("atan2", Interval::atan2),
    ];
    let path = std::env::temp_dir().join(format!("tessera-intervals-{}.jsonl", std::process::id()));
    let mut out = std::io::BufWriter::new(std::fs::File::create(&path).unwrap());
    for (name, f) in &unary {
        for k in 0..per_function {
            let mut x = random_interval(&mut r, k);
            if *name == "exp" && x.hi() > 700.0 {
                x = Interval::new(x.lo() / 1e3, x.hi() / 1e3); // keep mpmath out of huge exponents
            }
            if (*name == "sqrt" || *name == "log") && k % 2 == 0 {
                x = x.abs(); // mostly inside the domain, sometimes across its edge
            }
            let enc = f(x);
            let pts: Vec<Vec<f64>> = samples(&mut r, x).into_iter().map(|p| vec![p]).collect();
            let rec = serde_json::json!({"f": name, "args": [[x.lo(), x.hi()]], "pts": pts, "enc": [json_f(enc.lo()), json_f(enc.hi())]});
            writeln!(out, "{rec}").unwrap();
        }
    }
    for (name, f) in &binary {
        for k in 0..per_function {
            let mut a = random_interval(&mut r, k);
            let mut b = random_interval(&mut r, k / 7 + k);
            if *name == "pow" {
                a = Interval::new(a.lo().clamp(-50.0, 50.0), a.hi().clamp(-50.0, 50.0));
                if k % 4 != 0 {
                    a = a.abs();
                }
                b = Interval::new(b.lo().clamp(-5.0, 5.0), b.hi().clamp(-5.0, 5.0));
            }
            if *name == "atan2" && k % 3 == 0 {
                // across the branch cut: x negative, y around zero
                a = Interval::new(-r.range(0.0, 1.0), r.range(0.0, 1.0));
                b = Interval::new(-r.range(1.0, 3.0), -r.range(0.0, 0.9));
            }
            let enc = f(a, b);
            let pa = samples(&mut r, a);
            let pb = samples(&mut r, b);
            // every pair of sampled coordinates, so corners are included
            let mut pts = Vec::new();
            for x in &pa {
                for y in &pb {
                    pts.push(vec![*x, *y]);
                }
            }
            let rec = serde_json::json!({"f": name, "args": [[a.lo(), a.hi()], [b.lo(), b.hi()]], "pts": pts, "enc": [json_f(enc.lo()), json_f(enc.hi())]});
            writeln!(out, "{rec}").unwrap();
        }
    }
    drop(out);
    let script = concat!(env!("CARGO_MANIFEST_DIR"), "/../tests/reference/check_intervals.py");
    let o = Command::new("python3").arg(script).arg(&path).output().expect("python3 must be installed");
    let stdout = String::from_utf8_lossy(&o.stdout);
    println!("{stdout}{}", String::from_utf8_lossy(&o.stderr));
    std::fs::remove_file(&path).ok();
    assert!(o.status.success(), "mpmath check failed:\n{stdout}");
    // The check must not be vacuous: every function reported, each with all of its
    // intervals read back, most enclosures defined, and at least two exact values
    // compared per defined enclosure (each carries its two endpoints and two interior
    // points, or all their pairs for two arguments).
    let mut reported = Vec::new();
    for line in stdout.lines().filter(|l| l.contains("intervals,")) {
        let (name, counts) = line.split_once(':').expect("name: counts");
        let nums: Vec<u64> = counts.split(|c: char| !c.is_ascii_digit()).filter_map(|s| s.parse().ok()).collect();
        let [total, defined, compared] = nums[..] else { panic!("unexpected line: {line}") };
        let name = name.to_string();
        assert_eq!(total, per_function, "intervals read back: {line}");
        assert!(defined * 2 >= total, "too few defined enclosures: {line}");
        assert!(compared >= 2 * defined, "too few exact values compared: {line}");
        reported.push(name);
    }
    let mut expected: Vec<String> = unary.iter().map(|(n, _)| n.to_string()).chain(binary.iter().map(|(n, _)| n.to_string())).collect();
    expected.sort();
    reported.sort();
    assert_eq!(reported, expected, "every function must be reported by the mpmath check:\n{stdout}");
}
