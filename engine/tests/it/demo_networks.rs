//! The committed demo scenarios (`demo/*/spec.json` and their ONNX networks) are
//! consistent: each network computes what the training code's numpy forward pass computes
//! (checked against onnxruntime, a reference runtime, by
//! `tests/reference/check_demo_networks.py`), each spec validates on the Rust side, and the
//! networks' input/output counts read from the ONNX graphs match the specs.

use serde_json::Value;
use std::path::{Path, PathBuf};
use std::process::Command;
use tessera_engine::spec::{parse_spec, NetworkShape};

fn repo_root() -> PathBuf {
    Path::new(env!("CARGO_MANIFEST_DIR")).parent().expect("worker/ has a parent").to_path_buf()
}

/// Runs the Python check; fails loudly (never skips) when python3 or a package is missing.
fn python_report() -> Value {
    let root = repo_root();
    let script = root.join("tests/reference/check_demo_networks.py");
    let out = Command::new("python3")
        .arg(&script)
        .arg(&root)
        .output()
        .unwrap_or_else(|e| panic!("cannot run python3 {}: {e}", script.display()));
    assert!(
        out.status.success(),
        "{} failed ({}):\n{}",
        script.display(),
        out.status,
        String::from_utf8_lossy(&out.stderr)
    );
    serde_json::from_slice(&out.stdout).expect("the check prints JSON")
}

const DEMO_SPECS: [&str; 3] = ["demo/aisle/spec.json", "demo/heading/spec.json", "demo/lander/spec.json"];

#[test]
fn demo_networks_match_numpy_and_their_specs() {
    let report = python_report();
    let specs = report["specs"].as_array().expect("specs array");
    let checked: Vec<&str> = specs.iter().map(|s| s["spec"].as_str().unwrap()).collect();
    assert_eq!(checked, DEMO_SPECS, "the check must cover every demo spec");

    for entry in specs {
        let rel = entry["spec"].as_str().unwrap();
        let text = std::fs::read_to_string(repo_root().join(rel)).unwrap();
        let spec = parse_spec(&text).unwrap_or_else(|e| panic!("{rel} does not validate: {e:?}"));
        let nets = entry["networks"].as_array().unwrap();
        let refs: Vec<&str> = nets.iter().map(|n| n["ref"].as_str().unwrap()).collect();
        assert_eq!(refs, spec.networks, "{rel}: the check saw other networks than the spec names");
        let shapes: Vec<NetworkShape> = nets
            .iter()
            .map(|n| NetworkShape {
                inputs: n["inputs"].as_u64().unwrap() as usize,
                outputs: n["outputs"].as_u64().unwrap() as usize,
            })
            .collect();
        spec.check_networks(&shapes).unwrap_or_else(|e| panic!("{rel}: {e:?}"));
        // The comparison is not vacuous: a network with one output too many is refused.
        let wrong: Vec<NetworkShape> =
            shapes.iter().map(|s| NetworkShape { inputs: s.inputs, outputs: s.outputs + 1 }).collect();
        assert!(spec.check_networks(&wrong).is_err());
        for n in nets {
            assert_eq!(n["samples"].as_u64(), Some(1000), "{rel}: {n}");
        }
    }
}

#[test]
fn demo_specs_validate_and_reference_existing_files() {
    for rel in DEMO_SPECS {
        let path = repo_root().join(rel);
        let text = std::fs::read_to_string(&path).unwrap();
        let spec = parse_spec(&text).unwrap_or_else(|e| panic!("{rel} does not validate: {e:?}"));
        for net in &spec.networks {
            let file = path.parent().unwrap().join(net);
            assert!(file.is_file(), "{rel}: network {net} is not a file next to the spec");
        }
    }
    let aisle = parse_spec(&std::fs::read_to_string(repo_root().join(DEMO_SPECS[0])).unwrap()).unwrap();
    assert_eq!(aisle.network_of_command, vec![0, 1, 2, 3], "the aisle rover uses a bank chosen by the previous command");
    let heading = parse_spec(&std::fs::read_to_string(repo_root().join(DEMO_SPECS[1])).unwrap()).unwrap();
    assert_eq!(heading.network_of_command, vec![0, 1, 2], "the heading keeper uses a bank chosen by the previous command");
    assert!(heading.horizon >= 24, "the heading scenario is the long-horizon one: {} periods", heading.horizon);
}

/// Runs `demo/simulate.py` (fixed seed) and returns the printed (safe, unsafe) fractions.
fn simulated_fractions(rel: &str) -> (f64, f64) {
    let root = repo_root();
    let out = Command::new("python3")
        .arg(root.join("demo/simulate.py"))
        .arg(root.join(rel))
        .args(["--n", "600", "--seed", "5"])
        .output()
        .expect("cannot run python3 demo/simulate.py");
    let text = String::from_utf8_lossy(&out.stdout).into_owned();
    assert!(out.status.success(), "simulate.py {rel} failed:\n{text}{}", String::from_utf8_lossy(&out.stderr));
    let line = text.lines().find(|l| l.trim_start().starts_with("safe ")).expect("a 'safe … unsafe …' line");
    let nums: Vec<f64> = line.split_whitespace().filter_map(|w| w.parse().ok()).collect();
    assert_eq!(nums.len(), 2, "{line}");
    (nums[0], nums[1])
}

/// The demo is only a demo if a campaign has something to find: sampled closed-loop
/// trajectories of each scenario include both safe and unsafe ones.
#[test]
fn demo_scenarios_have_safe_and_unsafe_trajectories() {
    for rel in DEMO_SPECS {
        let (safe, unsafe_) = simulated_fractions(rel);
        assert!(safe > 0.5 && unsafe_ > 0.0, "{rel}: safe {safe}, unsafe {unsafe_}");
    }
}
