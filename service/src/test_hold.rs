//! A test-only pause at an exact step of the real ingest and publish paths, so an
//! end-to-end test can act there (append to a file being read, kill a process holding a
//! claim, stop a process about to publish) without timing.
//!
//! Set `TIDEMARK_TEST_HOLD` to a folder. At each step, the work on `NAME` (a file or a
//! series) writes `NAME.STEP` there and waits until `NAME.STEP.go` exists (at most
//! 120 s). Steps: a file's `read` (bytes read, nothing parsed or written yet) and
//! `committed` (its batch committed, the file not yet archived); a series' `publishing`
//! (its fit passed the gate, forecasts and draws are ready, the publishing transaction
//! has not begun). Unset, this does nothing.

use std::path::PathBuf;
use std::time::{Duration, Instant};

const VARIABLE: &str = "TIDEMARK_TEST_HOLD";
const LONGEST: Duration = Duration::from_secs(120);

/// Pause at `step` of `name` while `TIDEMARK_TEST_HOLD` asks for it.
pub async fn at(step: &str, name: &str) {
    let Some(dir) = std::env::var_os(VARIABLE).map(PathBuf::from) else {
        return;
    };
    let marker = dir.join(format!("{name}.{step}"));
    let go = dir.join(format!("{name}.{step}.go"));
    if std::fs::write(&marker, b"").is_err() {
        return;
    }
    let start = Instant::now();
    while !go.exists() && start.elapsed() < LONGEST {
        tokio::time::sleep(Duration::from_millis(20)).await;
    }
}
