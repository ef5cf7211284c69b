//! Helpers shared by the end-to-end tests (process start-up, loopback ports).

use std::path::{Path, PathBuf};
use std::process::Child;
use std::time::{Duration, Instant};

/// A binary of the workspace from the target folder the test runs from. The
/// workspace's test command (`tests/run.sh`) builds every binary first; `cargo test`
/// alone does not build the binaries of crates without tests (the `tessera` command).
pub fn bin(name: &str) -> PathBuf {
    let exe = std::env::current_exe().expect("test executable path");
    let dir = exe.parent().and_then(|d| d.parent()).expect("target profile folder");
    let p = dir.join(name);
    assert!(p.exists(), "{} is missing: build every binary first (`cargo build --workspace --bins`, as tests/run.sh does)", p.display());
    p
}

/// Wait until the server at `url` answers `/healthz` (polled every 20 ms, at most 30 s).
pub fn wait_until_up(url: &str) {
    let t0 = Instant::now();
    while ureq::get(&format!("{url}/healthz")).call().is_err() {
        assert!(t0.elapsed() < Duration::from_secs(30), "the server at {url} did not come up within 30 s");
        std::thread::sleep(Duration::from_millis(20));
    }
}

/// The token a server wrote to its bootstrap token file (`--bootstrap-token-file`).
pub fn read_token(file: &Path) -> String {
    std::fs::read_to_string(file).unwrap_or_else(|e| panic!("{}: {e}", file.display())).trim().to_string()
}

/// Child processes killed (and reaped) when the guard goes out of scope, so a failing
/// test leaves none behind.
pub struct Procs(pub Vec<Child>);

impl Drop for Procs {
    fn drop(&mut self) {
        for c in &mut self.0 {
            let _ = c.kill();
            let _ = c.wait();
        }
    }
}

/// A child process killed (and reaped) when the guard goes out of scope, so a failing
/// test leaves no server behind.
pub struct Server(pub Child);

impl Drop for Server {
    fn drop(&mut self) {
        let _ = self.0.kill();
        let _ = self.0.wait();
    }
}

/// The one-state tank of our own that the fault and load tests campaign on:
/// `h' = q − 0.1 h`, a two-output network deciding between `off` (q = 0) and `on`
/// (q = 0.2) from the level, unsafe above 1.5 m, 20 periods of 0.5 s from h ∈ [0, 1],
/// bisected on h to depth 6 with counterexample cells refined. Tests change the fields
/// their scenario needs (`spec["horizon_periods"] = json!(24)`).
pub fn tank_spec(name: &str, model_sha: &str) -> serde_json::Value {
    serde_json::json!({
        "name": name,
        "states": [{"name": "h", "unit": "m"}],
        "inputs": [{"name": "q", "unit": "m/s"}],
        "dynamics": {"h": "q - 0.1 * h"},
        "controller": {
            "period": 0.5,
            "observations": [{"name": "level", "expr": "h"}],
            "networks": [format!("sha256:{model_sha}")],
            "selection": {"mode": "single"},
            "decision": "argmax",
            "commands": [{"name": "off", "set": {"q": 0.0}}, {"name": "on", "set": {"q": 0.2}}],
            "initial_command": "off"
        },
        "unsafe": [{"all": ["h >= 1.5"]}],
        "horizon_periods": 20,
        "envelope": {"h": [0.0, 1.0]},
        "refinement": {"max_depth": 6, "split": ["h"], "refine_unsafe": true}
    })
}

/// Held by each slow end-to-end test (many processes, kills, timing of their own) for
/// its whole run, so that no two of them share the machine: the suite is one test
/// binary whose tests otherwise run side by side. Listed in DEVELOPERS.md ("Testing").
pub fn slow_test() -> std::sync::MutexGuard<'static, ()> {
    static SLOW: std::sync::Mutex<()> = std::sync::Mutex::new(());
    // A test that failed while holding the lock must not fail the others.
    SLOW.lock().unwrap_or_else(|e| e.into_inner())
}
