//! The ONNX importer against onnxruntime (PyPI's reference runtime of the ONNX
//! standard): models built with the `onnx` helper API by
//! `tests/reference/onnx_cases.py`, evaluated by onnxruntime on random inputs.

use crate::common;
use common::floats;

use serde_json::Value;
use tessera_engine::net::{load_onnx, Layer, Network};

/// Rounding unit of float32 (round to nearest): 2⁻²⁴.
const U32: f64 = 1.0 / 16_777_216.0;

fn gamma32(n: usize) -> f64 {
    let nu = n as f64 * U32;
    nu / (1.0 - nu)
}

/// An estimate, rigorous up to the assumption on activations below, of how far a
/// float32 evaluation of the network (any summation order, FMA or not) can be from our
/// f64 evaluation `eval`. Forward error analysis layer by layer, with `e` a bound on
/// the float32 error of the current vector and `a` our f64 value:
/// * dense `W·a + b` with `n` inputs: the float32 result differs from the exact one on
///   the float32 inputs by at most `γ_{n+2}·(|W|·(|a| + e) + |b|)` (dot product,
///   scaling and bias add; the standard dot-product bound), and the inputs' error
///   propagates as `|W|·e`;
/// * ReLU is 1-Lipschitz and exact; tanh is 1-Lipschitz, sigmoid 1/4-Lipschitz;
///   for their float32 kernels we allow 64 float32 ulps of the value (an assumption:
///   onnxruntime's vectorised kernels use polynomial approximations whose error bound
///   we do not have from a source);
/// * our own f64 rounding (~1e-16 relative) is far below these and covered by the
///   final factor 1.5 on the estimate.
fn float32_error_bound(net: &Network, x: &[f64]) -> Vec<f64> {
    let mut a = x.to_vec();
    let mut e = vec![0.0; x.len()]; // inputs are float32 numbers: no input rounding
    for layer in net.layers() {
        match layer {
            Layer::Dense { w, b } => {
                let n = w.ncols();
                let g = gamma32(n + 2);
                let mut na = vec![0.0; w.nrows()];
                let mut ne = vec![0.0; w.nrows()];
                for i in 0..w.nrows() {
                    let mut s = b[i];
                    let mut mag = b[i].abs();
                    let mut prop = 0.0;
                    for j in 0..n {
                        s += w[[i, j]] * a[j];
                        mag += w[[i, j]].abs() * (a[j].abs() + e[j]);
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
                    e[i] = 0.25 * e[i] + 64.0 * U32 * a[i].abs();
                }
            }
            Layer::Tanh => {
                for i in 0..a.len() {
                    a[i] = a[i].tanh();
                    e[i] += 64.0 * U32 * a[i].abs();
                }
            }
        }
    }
    e.iter().map(|v| 1.5 * v + 1e-30).collect()
}


#[test]
fn evaluation_matches_onnxruntime() {
    let dir = common::onnx_cases();
    let manifest: Value = serde_json::from_str(&std::fs::read_to_string(dir.join("manifest.json")).unwrap()).unwrap();
    let models = manifest["models"].as_array().unwrap();
    assert!(models.len() >= 30, "the reference script should build many models");
    let (mut worst64, mut worst32_ratio) = (0.0f64, 0.0f64);
    for m in models {
        let file = m["file"].as_str().unwrap();
        let bytes = std::fs::read(dir.join(file)).unwrap();
        let net = load_onnx(&bytes).unwrap_or_else(|e| panic!("{file}: {e}"));
        let f32_model = m["float32"].as_bool().unwrap();
        assert_eq!(net.is_float32(), f32_model, "{file}");
        for case in m["cases"].as_array().unwrap() {
            let x = floats(&case["input"]);
            let want = floats(&case["output"]);
            let got = net.eval(&x);
            assert_eq!(got.len(), want.len(), "{file}: output count");
            if f32_model {
                let tol = float32_error_bound(&net, &x);
                for k in 0..got.len() {
                    let d = (got[k] - want[k]).abs();
                    assert!(d <= tol[k], "{file} output {k}: ours {} onnxruntime {} diff {d:e} > bound {:e}", got[k], want[k], tol[k]);
                    worst32_ratio = worst32_ratio.max(d / tol[k]);
                }
            } else {
                for k in 0..got.len() {
                    // Relative difference, with values below 1 compared absolutely.
                    let rel = (got[k] - want[k]).abs() / want[k].abs().max(1.0);
                    assert!(rel <= 1e-9, "{file} output {k}: ours {} onnxruntime {} rel {rel:e}", got[k], want[k]);
                    worst64 = worst64.max(rel);
                }
            }
        }
    }
    println!("float64 models: worst relative difference {worst64:e}; float32 models: worst diff/bound {worst32_ratio:.3}");
}

#[test]
fn bad_models_are_rejected_naming_the_node() {
    let dir = common::onnx_cases();
    let manifest: Value = serde_json::from_str(&std::fs::read_to_string(dir.join("manifest.json")).unwrap()).unwrap();
    let bad = manifest["bad"].as_array().unwrap();
    assert!(bad.len() >= 8);
    for b in bad {
        let file = b["file"].as_str().unwrap();
        let bytes = std::fs::read(dir.join(file)).unwrap();
        let err = load_onnx(&bytes).expect_err(file).to_string();
        for must in b["must_contain"].as_array().unwrap() {
            let must = must.as_str().unwrap();
            assert!(err.contains(must), "{file}: error '{err}' should mention '{must}'");
        }
    }
}

#[test]
fn random_and_truncated_bytes_never_panic() {
    let dir = common::onnx_cases();
    let valid = std::fs::read(dir.join("matmul_f64_raw1.onnx")).unwrap();
    assert!(load_onnx(&valid).is_ok());
    let mut rng = common::Rng(7);
    // Every truncation of a valid model: must return (Ok or Err), never panic.
    for cut in 0..valid.len() {
        let _ = load_onnx(&valid[..cut]);
    }
    // Random bytes, and valid models with random bytes flipped.
    for _ in 0..3000 {
        let len = rng.below(300);
        let junk: Vec<u8> = (0..len).map(|_| rng.next_u64() as u8).collect();
        let _ = load_onnx(&junk);
        let mut m = valid.clone();
        for _ in 0..1 + rng.below(4) {
            let i = rng.below(m.len());
            m[i] = rng.next_u64() as u8;
        }
        let _ = load_onnx(&m);
    }
    assert!(load_onnx(&[]).is_err());
}

/// The layer kinds of a network, for checking how affine operators were merged.
fn kinds(net: &Network) -> String {
    net.layers()
        .iter()
        .map(|l| match l {
            Layer::Dense { .. } => "D",
            Layer::Relu => "R",
            Layer::Sigmoid => "S",
            Layer::Tanh => "T",
        })
        .collect()
}

#[test]
fn affine_operators_are_merged_only_when_exact() {
    let dir = common::onnx_cases();
    let load = |f: &str| load_onnx(&std::fs::read(dir.join(f)).unwrap()).unwrap();
    // MatMul+Add, MatMul+Sub and Gemm(alpha = beta = 1)+bias each become one dense
    // layer; Sub(c, x) after tanh has nothing to merge into and stays a layer.
    assert_eq!(kinds(&load("matmul_f64_raw1.onnx")), "DRDTDDSD");
    // Gemm with alpha = beta = 1: one dense layer per Gemm.
    assert_eq!(kinds(&load("gemm_unit_f64_raw1.onnx")), "DRDTD");
    // Flatten, Reshape and Identity add no layers.
    assert_eq!(kinds(&load("flatten_f64_raw1.onnx")), "DRDRD");
}
