//! Helpers shared by the end-to-end tests (process start-up, loopback ports).

use std::path::PathBuf;
use std::process::Child;

/// A binary of the workspace from the target folder the test runs from. The
/// workspace's test command (`cargo test --workspace`) builds every binary first.
pub fn bin(name: &str) -> PathBuf {
    let exe = std::env::current_exe().expect("test executable path");
    let dir = exe.parent().and_then(|d| d.parent()).expect("target profile folder");
    let p = dir.join(name);
    assert!(p.exists(), "{} is missing: run the workspace's tests (`cargo test --workspace`) so it gets built", p.display());
    p
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
