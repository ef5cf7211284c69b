//! The `tessera-worker bounds` command: JSON shape, agreement with the library, and
//! exit code 2 with a message (never a panic) on bad input.

use crate::common;

use serde_json::Value;
use std::process::Command;
use tessera_engine::interval::Interval;
use tessera_engine::net::{load_onnx, output_bounds};
use tessera_engine::spec::BoundsMethod;

fn worker() -> Command {
    Command::new(env!("CARGO_BIN_EXE_tessera-worker"))
}

#[test]
fn bounds_command_prints_json_matching_the_library() {
    let dir = common::onnx_cases();
    let model = dir.join("deep_f64.onnx"); // 3 inputs, 4 outputs
    let net = load_onnx(&std::fs::read(&model).unwrap()).unwrap();
    for (name, method) in [("interval", BoundsMethod::Interval), ("symbolic", BoundsMethod::Symbolic), ("portfolio", BoundsMethod::Portfolio)] {
        let out = worker()
            .args(["bounds", model.to_str().unwrap(), "--lower", "-0.5,0.1,-1", "--upper", "0.5,0.2,-0.25", "--method", name, "--json"])
            .output()
            .unwrap();
        assert!(out.status.success(), "{}", String::from_utf8_lossy(&out.stderr));
        let text = String::from_utf8(out.stdout).unwrap();
        assert!(text.starts_with("{\"lower\":["), "{text}");
        let keys: Vec<usize> = ["\"lower\"", "\"upper\"", "\"diff_lower\"", "\"diff_upper\""].iter().map(|k| text.find(k).unwrap()).collect();
        assert!(keys.windows(2).all(|w| w[0] < w[1]), "key order: {text}");
        let v: Value = serde_json::from_str(&text).unwrap();
        assert_eq!(v.as_object().unwrap().len(), 4);
        let input = [Interval::new(-0.5, 0.5), Interval::new(0.1, 0.2), Interval::new(-1.0, -0.25)];
        let b = output_bounds(&net, &input, method);
        // Exactly this text: serde_json prints f64 in shortest round-trip form.
        let j = |v: Vec<f64>| serde_json::to_string(&v).unwrap();
        let jj = |v: Vec<Vec<f64>>| serde_json::to_string(&v).unwrap();
        let expected = format!(
            "{{\"lower\":{},\"upper\":{},\"diff_lower\":{},\"diff_upper\":{}}}",
            j(b.outputs.iter().map(|i| i.lo()).collect()),
            j(b.outputs.iter().map(|i| i.hi()).collect()),
            jj(b.diff.iter().map(|r| r.iter().map(|i| i.lo()).collect()).collect()),
            jj(b.diff.iter().map(|r| r.iter().map(|i| i.hi()).collect()).collect()),
        );
        assert_eq!(text.trim_end(), expected, "{name}");
        // And the numbers read back as the library's bounds (to parsing accuracy).
        for i in 0..4 {
            assert!((v["lower"][i].as_f64().unwrap() - b.outputs[i].lo()).abs() <= 1e-15 * (1.0 + b.outputs[i].mag()));
        }
    }
    // The human-readable form names every output.
    let out = worker().args(["bounds", model.to_str().unwrap(), "--lower", "0,0,0", "--upper", "1,1,1"]).output().unwrap();
    assert!(out.status.success());
    let text = String::from_utf8(out.stdout).unwrap();
    assert!(text.contains("y3") && text.contains("y0 - y1"), "{text}");
}

#[test]
fn bounds_command_rejects_bad_input_with_exit_code_2() {
    let dir = common::onnx_cases();
    let model = dir.join("deep_f64.onnx");
    let m = model.to_str().unwrap();
    let missing = dir.join("no-such.onnx");
    let garbage = dir.join("bad_text.onnx");
    let cases: Vec<(Vec<&str>, &str)> = vec![
        (vec!["bounds", missing.to_str().unwrap(), "--lower", "0", "--upper", "1"], "cannot read"),
        (vec!["bounds", garbage.to_str().unwrap(), "--lower", "0", "--upper", "1"], "not an ONNX model"),
        (vec!["bounds", m, "--lower", "0,0", "--upper", "1,1"], "takes 3 inputs"),
        (vec!["bounds", m, "--lower", "0,2,0", "--upper", "1,1,1"], "input 2: lower bound 2 is above upper bound 1"),
        (vec!["bounds", m, "--lower", "0,x,0", "--upper", "1,1,1"], "entry 2"),
        (vec!["bounds", m, "--lower", "0,0,0", "--upper", "1,1,1", "--method", "guess"], "unknown method"),
    ];
    for (args, must) in cases {
        let out = worker().args(&args).output().unwrap();
        let err = String::from_utf8_lossy(&out.stderr);
        assert_eq!(out.status.code(), Some(2), "{args:?}: {err}");
        assert!(err.contains(must), "{args:?}: stderr '{err}' should contain '{must}'");
        assert!(!err.contains("panicked"), "{args:?}: {err}");
    }
}
