//! Helpers shared by the network integration tests.
#![allow(dead_code)]

use std::path::PathBuf;
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
