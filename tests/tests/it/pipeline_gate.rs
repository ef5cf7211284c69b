//! The pipeline gate (`deploy/pipeline/gate.py`) against a stand-in server on loopback:
//! upload and rewrite of model references, threshold verdicts, and exit status 2 on HTTP
//! errors and hash mismatches. The checks live in `tests/reference/check_gate.py`; this
//! test fails (never skips) when python3 is missing.

use std::path::Path;
use std::process::Command;

#[test]
fn gate_script_passes_its_checks() {
    let manifest = Path::new(env!("CARGO_MANIFEST_DIR"));
    let root = manifest.parent().expect("tests/ has a parent");
    let script = manifest.join("reference/check_gate.py");
    let out = Command::new("python3")
        .arg(&script)
        .arg(root)
        .output()
        .unwrap_or_else(|e| panic!("cannot run python3 {}: {e}", script.display()));
    assert!(
        out.status.success(),
        "{} failed ({}):\n{}{}",
        script.display(),
        out.status,
        String::from_utf8_lossy(&out.stdout),
        String::from_utf8_lossy(&out.stderr)
    );
    assert!(String::from_utf8_lossy(&out.stdout).contains("8 checks passed"));
}
