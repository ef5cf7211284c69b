//! `tessera-worker validate` and `check` on a two-tank spec of our own: `validate` runs
//! the engine's own model checks (a network with 3 outputs for 2 commands is refused,
//! naming `controller.networks[0]`, exactly as `check` refuses it), and `check` carries
//! the caution under every verdict (a line of text, or a field with `--json`).
//!
//! The networks are written by the `onnx` package, with their widths as onnxruntime
//! reports them (tests/reference/make_onnx_model.py); the test fails, never skips,
//! without python3 and those packages.

use serde_json::{json, Value};
use std::path::{Path, PathBuf};
use std::process::{Command, Output};
use tessera_engine::caution::{CAUTION, CAUTION_LINE};

fn worker() -> Command {
    Command::new(env!("CARGO_BIN_EXE_tessera-worker"))
}

fn text(o: &Output) -> String {
    format!("{}{}", String::from_utf8_lossy(&o.stdout), String::from_utf8_lossy(&o.stderr))
}

/// The reference models in a fresh folder, written once per test binary; checks the
/// widths onnxruntime reports.
fn models() -> PathBuf {
    static DIR: std::sync::OnceLock<PathBuf> = std::sync::OnceLock::new();
    DIR.get_or_init(|| {
        let dir = PathBuf::from(env!("CARGO_TARGET_TMPDIR")).join(format!("spec-cli-{}", std::process::id()));
        let _ = std::fs::remove_dir_all(&dir);
        std::fs::create_dir_all(&dir).unwrap();
        let script = concat!(env!("CARGO_MANIFEST_DIR"), "/../tests/reference/make_onnx_model.py");
        let out = Command::new("python3").arg(script).arg(&dir).output().expect("python3 must be installed");
        assert!(out.status.success(), "reference script failed (python3 with numpy, onnx, onnxruntime needed):\n{}", text(&out));
        let widths: Value = serde_json::from_slice(&out.stdout).unwrap();
        assert_eq!(widths["pump_2_outputs.onnx"], json!({"inputs": 2, "outputs": 2}));
        assert_eq!(widths["pump_3_outputs.onnx"], json!({"inputs": 2, "outputs": 3}));
        dir
    })
    .clone()
}

/// Two tanks in a row, the first fed by a pump that is off or on: 2 observations,
/// 2 commands, so the network must take 2 inputs and give 2 scores.
fn write_spec(dir: &Path, file: &str, network: &str) -> PathBuf {
    let spec = json!({
        "name": "two tanks",
        "states": [{"name": "h1", "unit": "m"}, {"name": "h2", "unit": "m"}],
        "inputs": [{"name": "q", "unit": "m/s"}],
        "dynamics": {"h1": "q - 0.2 * h1", "h2": "0.2 * h1 - 0.1 * h2"},
        "controller": {
            "period": 0.5,
            "observations": [{"name": "level1", "expr": "h1"}, {"name": "level2", "expr": "h2"}],
            "networks": [network],
            "selection": {"mode": "single"},
            "decision": "argmax",
            "commands": [{"name": "off", "set": {"q": 0.0}}, {"name": "on", "set": {"q": 0.3}}],
            "initial_command": "off"
        },
        "unsafe": [{"all": ["h2 >= 3"]}],
        "horizon_periods": 4,
        "envelope": {"h1": [0.5, 1.0], "h2": [0.5, 1.0]},
        "refinement": {"max_depth": 4, "split": ["h1", "h2"]},
        "engine": {"time_budget_s": 5.0}
    });
    let path = dir.join(file);
    std::fs::write(&path, serde_json::to_string_pretty(&spec).unwrap()).unwrap();
    path
}

#[test]
fn validate_runs_the_engine_model_checks_and_names_the_network() {
    let dir = models();
    let field = "controller.networks[0]";
    let message = "network has 3 outputs but the spec has 2 commands";

    let bad = write_spec(&dir, "three_outputs.json", "pump_3_outputs.onnx");
    let o = worker().arg("validate").arg(&bad).output().unwrap();
    assert_eq!(o.status.code(), Some(1), "{}", text(&o));
    assert!(String::from_utf8_lossy(&o.stderr).contains(&format!("{field}: {message}")), "{}", text(&o));
    let o = worker().arg("validate").arg(&bad).arg("--json").output().unwrap();
    assert_eq!(o.status.code(), Some(1), "{}", text(&o));
    let v: Value = serde_json::from_slice(&o.stdout).unwrap();
    assert_eq!(v, json!({"valid": false, "errors": [{"path": field, "message": message}]}));
    // `check` refuses it with the same words: the same check, in the engine.
    let o = worker().arg("check").arg(&bad).output().unwrap();
    assert_eq!(o.status.code(), Some(2), "{}", text(&o));
    assert!(String::from_utf8_lossy(&o.stderr).contains(&format!("{field}: {message}")), "{}", text(&o));

    // A model that does not load names the network too.
    let missing = write_spec(&dir, "missing.json", "no_such_model.onnx");
    let o = worker().arg("validate").arg(&missing).output().unwrap();
    assert_eq!(o.status.code(), Some(1), "{}", text(&o));
    assert!(String::from_utf8_lossy(&o.stderr).contains(&format!("{field}: cannot read")), "{}", text(&o));

    // The fitting network passes; a stored model is left to the server, and said so.
    let good = write_spec(&dir, "fits.json", "pump_2_outputs.onnx");
    let o = worker().arg("validate").arg(&good).output().unwrap();
    assert_eq!(o.status.code(), Some(0), "{}", text(&o));
    assert!(String::from_utf8_lossy(&o.stdout).starts_with("valid: 'two tanks'"), "{}", text(&o));
    let stored = write_spec(&dir, "stored.json", &format!("sha256:{}", "ab".repeat(32)));
    let o = worker().arg("validate").arg(&stored).arg("--json").output().unwrap();
    assert_eq!(o.status.code(), Some(0), "{}", text(&o));
    let v: Value = serde_json::from_slice(&o.stdout).unwrap();
    assert_eq!(v["networks_checked"], 0);
    assert_eq!(v["networks_stored"], json!([field]));
}

#[test]
fn check_carries_the_caution_with_its_verdict() {
    let dir = models();
    let spec = write_spec(&dir, "fits_check.json", "pump_2_outputs.onnx");
    let cell = r#"{"h1":[0.5,0.5625],"h2":[0.5,0.5625]}"#;
    let o = worker().arg("check").arg(&spec).args(["--cell", cell]).output().unwrap();
    assert!(o.status.success(), "{}", text(&o));
    let out = String::from_utf8(o.stdout).unwrap();
    let lines: Vec<&str> = out.lines().collect();
    assert!(["safe:", "unsafe:", "inconclusive:"].iter().any(|v| lines[0].starts_with(v)), "{out}");
    assert_eq!(*lines.last().unwrap(), CAUTION_LINE, "{out}");

    let o = worker().arg("check").arg(&spec).args(["--cell", cell, "--json"]).output().unwrap();
    assert!(o.status.success(), "{}", text(&o));
    let v: Value = serde_json::from_slice(&o.stdout).expect("--json prints JSON only");
    assert!(["safe", "unsafe", "inconclusive"].contains(&v["verdict"].as_str().unwrap()), "{v}");
    assert_eq!(v["caution"], CAUTION);
}
