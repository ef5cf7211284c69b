//! A write whose caller goes away (an HTTP client killed mid-request drops the
//! handler's future) must not leave a pooled connection inside an open transaction:
//! such a connection holds SQLite's write lock for good, so every later write waits
//! out the busy timeout and fails with "database is locked", and a later `BEGIN` on
//! that connection fails with "non-zero transaction depth". The chaos test met this
//! after a worker was SIGKILLed while its lease request was starting a transaction.
//!
//! Here the write is started and dropped at many different points (a timeout of a
//! given number of scheduler turns, cancelled wherever it happens to be); after
//! each, a fresh write must start and commit at once.

use std::time::Duration;
use tessera_server::store::Store;

#[tokio::test(flavor = "multi_thread", worker_threads = 2)]
async fn a_cancelled_write_leaves_no_open_transaction_behind() {
    let dir = tempfile::tempdir().unwrap();
    let store = Store::open(&dir.path().join("t.sqlite")).await.unwrap();
    let mut cancelled = 0;
    for i in 0..400u64 {
        // Give the write `k` turns of the scheduler, then drop it wherever it is
        // (waiting for the lock, for a connection, for BEGIN's answer, or inside).
        let k = (i * 7) % 300;
        let write = async {
            let w = store.write().await.unwrap();
            tokio::task::yield_now().await;
            w.commit().await.unwrap();
        };
        let give_up = async {
            for _ in 0..k {
                tokio::task::yield_now().await;
            }
        };
        tokio::select! {
            biased;
            _ = write => {}
            _ = give_up => cancelled += 1,
        }
        // The write connection must be free: several writes in a row start at once.
        for _ in 0..10 {
            let w = tokio::time::timeout(Duration::from_secs(3), store.write())
                .await
                .unwrap_or_else(|_| panic!("round {i}: a new write waited more than 3 s (a connection kept the write lock)"))
                .unwrap_or_else(|e| panic!("round {i}: a new write failed: {e:?}"));
            w.commit().await.unwrap();
        }
    }
    assert!(cancelled > 50, "only {cancelled} of 400 writes were cancelled: the test did not exercise cancellation");
}
