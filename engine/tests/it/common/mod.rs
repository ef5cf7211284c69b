//! Helpers shared by the network integration tests.
#![allow(dead_code)]

use std::path::PathBuf;
use tessera_engine::net::{Layer, Network};
use std::process::Command;

/// SplitMix64: a small deterministic generator, so test data is the same on every run.
pub struct Rng(pub u64);

impl Rng {
    pub fn next_u64(&mut self) -> u64 {
        self.0 = self.0.wrapping_add(0x9E37_79B9_7F4A_7C15);
        let mut z = self.0;
        z = (z ^ (z >> 30)).wrapping_mul(0xBF58_476D_1CE4_E5B9);
        z = (z ^ (z >> 27)).wrapping_mul(0x94D0_49BB_1331_11EB);
        z ^ (z >> 31)
    }
    /// Uniform in [0, 1).
    pub fn unit(&mut self) -> f64 {
        (self.next_u64() >> 11) as f64 / (1u64 << 53) as f64
    }
    pub fn uniform(&mut self, lo: f64, hi: f64) -> f64 {
        lo + (hi - lo) * self.unit()
    }
    /// Approximately standard normal (sum of 12 uniforms − 6).
    pub fn normal(&mut self) -> f64 {
        (0..12).map(|_| self.unit()).sum::<f64>() - 6.0
    }
    pub fn below(&mut self, n: usize) -> usize {
        (self.next_u64() % n as u64) as usize
    }
}

/// Run a Python helper from `tests/reference/` with arguments; panics loudly (never
/// skips) when python3 or one of its packages is missing.
pub fn run_reference(script: &str, args: &[&str]) {
    let path = PathBuf::from(env!("CARGO_MANIFEST_DIR")).join("..").join("tests").join("reference").join(script);
    let out = Command::new("python3")
        .arg(&path)
        .args(args)
        .output()
        .unwrap_or_else(|e| panic!("cannot run python3 {}: {e}", path.display()));
    assert!(
        out.status.success(),
        "python3 {} failed (are numpy, onnx and onnxruntime installed?):\n{}",
        path.display(),
        String::from_utf8_lossy(&out.stderr)
    );
}

/// A fresh directory under the target's temporary folder.
pub fn temp_dir(name: &str) -> PathBuf {
    let dir = PathBuf::from(env!("CARGO_TARGET_TMPDIR")).join(format!("{name}-{}", std::process::id()));
    let _ = std::fs::remove_dir_all(&dir);
    std::fs::create_dir_all(&dir).expect("create temp dir");
    dir
}

/// The directory written by `tests/reference/onnx_cases.py`, built once per test binary.
pub fn onnx_cases() -> &'static PathBuf {
    static DIR: std::sync::OnceLock<PathBuf> = std::sync::OnceLock::new();
    DIR.get_or_init(|| {
        let dir = temp_dir("onnx-cases");
        run_reference("onnx_cases.py", &[dir.to_str().unwrap()]);
        dir
    })
}

pub const U64: f64 = 1.0 / 9_007_199_254_740_992.0; // 2⁻⁵³

pub fn gamma(n: usize) -> f64 {
    let nu = n as f64 * U64;
    nu / (1.0 - nu)
}

/// `net.eval(x)` and, per output, a bound `e` with `|eval − exact| ≤ e`, where `exact`
/// is the real-arithmetic network value at `x`. Forward error analysis: for a dense
/// layer with `n` inputs the computed `W·â + b` (any summation order, FMA or not)
/// differs from `W·a + b` by at most `|W|·e + γ_{n+1}·(|W|·|â| + |b|)` (the standard
/// dot-product bound, one more rounding for the bias); `|â| ≤ |a_here| + 2e` bounds the
/// magnitudes whatever order `eval` used. ReLU is exact and 1-Lipschitz; tanh is
/// 1-Lipschitz and sigmoid 1/4-Lipschitz, with 8 ulps allowed for libm's exp/tanh and
/// the divide (glibc documents errors of 1–2 ulps; common practice). The estimate's own
/// rounding is covered by a factor (1 + 1e-10), negligible next to it.
pub fn eval_with_error(net: &Network, x: &[f64]) -> (Vec<f64>, Vec<f64>) {
    let mut a = x.to_vec();
    let mut e = vec![0.0; x.len()];
    for layer in net.layers() {
        match layer {
            Layer::Dense { w, b } => {
                let n = w.ncols();
                let g = gamma(n + 1);
                let (mut na, mut ne) = (vec![0.0; w.nrows()], vec![0.0; w.nrows()]);
                for i in 0..w.nrows() {
                    let (mut s, mut mag, mut prop) = (b[i], b[i].abs(), 0.0);
                    for j in 0..n {
                        s += w[[i, j]] * a[j];
                        mag += w[[i, j]].abs() * (a[j].abs() + 2.0 * e[j]);
                        prop += w[[i, j]].abs() * e[j];
                    }
                    na[i] = s;
                    ne[i] = prop + g * mag;
                }
                a = na;
                e = ne;
            }
            Layer::Relu => a.iter_mut().for_each(|v| *v = v.max(0.0)),
            Layer::Sigmoid => {
                for i in 0..a.len() {
                    a[i] = 1.0 / (1.0 + (-a[i]).exp());
                    e[i] = 0.25 * e[i] + 8.0 * U64 * 2.0 * a[i].abs();
                }
            }
            Layer::Tanh => {
                for i in 0..a.len() {
                    a[i] = a[i].tanh();
                    e[i] += 8.0 * U64 * 2.0 * a[i].abs();
                }
            }
        }
    }
    let y = net.eval(x);
    (y, e.iter().map(|v| v * (1.0 + 1e-10) + 1e-300).collect())
}

/// The numbers of a JSON array (a reference script's answer).
pub fn floats(v: &serde_json::Value) -> Vec<f64> {
    v.as_array().expect("array").iter().map(|x| x.as_f64().expect("number")).collect()
}

/// Raw little-endian f64s, the exchange format with the reference scripts (exact, unlike
/// decimal text).
pub fn write_f64s(path: &std::path::Path, v: &[f64]) {
    let bytes: Vec<u8> = v.iter().flat_map(|x| x.to_le_bytes()).collect();
    std::fs::write(path, bytes).unwrap_or_else(|e| panic!("{}: {e}", path.display()));
}

pub fn read_f64s(path: &std::path::Path) -> Vec<f64> {
    let bytes = std::fs::read(path).unwrap_or_else(|e| panic!("{}: {e}", path.display()));
    bytes.chunks_exact(8).map(|c| f64::from_le_bytes(c.try_into().unwrap())).collect()
}
