//! Every input the fuzz targets (`fuzz/`, DEVELOPERS.md) found crashing, hanging or
//! breaking an enclosure, replayed through the same checks (`fuzz/checks.rs`). The
//! files live in `tests/fuzz_regressions/<target>/`, one input each, named after the
//! fault. A watchdog fails the test, rather than hanging the suite, if an input that
//! once hung does so again.

#[path = "../../../fuzz/checks.rs"]
mod checks;

use std::path::Path;
use std::time::Duration;

fn replay(target: &str, check: fn(&[u8])) -> usize {
    let dir = Path::new(env!("CARGO_MANIFEST_DIR")).join("tests/fuzz_regressions").join(target);
    let mut n = 0;
    // Dot files (`.keep`) only hold the folder in git.
    let mut entries: Vec<_> = std::fs::read_dir(&dir)
        .unwrap()
        .map(|e| e.unwrap().path())
        .filter(|p| !p.file_name().unwrap().to_string_lossy().starts_with('.'))
        .collect();
    entries.sort();
    for p in entries {
        let data = std::fs::read(&p).unwrap();
        let name = p.display().to_string();
        let (tx, rx) = std::sync::mpsc::channel();
        let worker = std::thread::spawn(move || {
            let r = std::panic::catch_unwind(|| check(&data));
            let _ = tx.send(());
            r
        });
        // Generous: each input finishes in milliseconds once fixed; this only turns a
        // hang back into a failure.
        match rx.recv_timeout(Duration::from_secs(60)) {
            Ok(()) => assert!(worker.join().unwrap().is_ok(), "{name}: the check failed (see the panic above)"),
            Err(_) => panic!("{name}: still running after 60 s (the hang is back)"),
        }
        n += 1;
    }
    n
}

#[test]
fn expr_regressions() {
    assert!(replay("expr", checks::check_expr) >= 1);
}

#[test]
fn onnx_regressions() {
    assert!(replay("onnx", checks::check_onnx) >= 1);
    // The model declared 3 outputs but its transposed batch input made the nodes
    // compute 195; it must now be refused, naming the graph output.
    let d = std::fs::read(Path::new(env!("CARGO_MANIFEST_DIR")).join("tests/fuzz_regressions/onnx/gemm-transposed-batch-input")).unwrap();
    let e = tessera_engine::net::load_onnx(&d).unwrap_err().to_string();
    assert!(e.contains("graph output 'y'") && e.contains("[1, 3]") && e.contains("[65, 3]"), "{e}");
}

#[test]
fn spec_regressions() {
    assert!(replay("spec", checks::check_spec) >= 1);
}

