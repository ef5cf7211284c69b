//! The upload check reads real ONNX files: models written by the `onnx` Python
//! package (reference implementation of the format), with the widths onnxruntime
//! reports. Needs python3 with numpy, onnx and onnxruntime; fails loudly without.

use std::process::Command;

#[test]
fn inspect_model_agrees_with_onnxruntime() {
    let dir = tempfile::tempdir().unwrap();
    let script = concat!(env!("CARGO_MANIFEST_DIR"), "/../tests/reference/make_onnx_model.py");
    let out = Command::new("python3").arg(script).arg(dir.path()).output().expect("python3 must be installed");
    assert!(
        out.status.success(),
        "reference script failed (python3 with numpy, onnx, onnxruntime needed):\n{}",
        String::from_utf8_lossy(&out.stderr)
    );
    let report: serde_json::Value = serde_json::from_slice(&out.stdout).expect("JSON report");
    let files = report.as_object().unwrap();
    assert_eq!(files.len(), 5);
    for (name, want) in files {
        let bytes = std::fs::read(dir.path().join(name)).unwrap();
        let shape = tessera_server::model_check::inspect_model(&bytes).unwrap_or_else(|e| panic!("{name}: {e}"));
        assert_eq!(shape.inputs as u64, want["inputs"].as_u64().unwrap(), "{name}");
        assert_eq!(shape.outputs as u64, want["outputs"].as_u64().unwrap(), "{name}");
        // A truncated file is refused.
        assert!(tessera_server::model_check::inspect_model(&bytes[..bytes.len() - 3]).is_err(), "{name}");
    }
}
