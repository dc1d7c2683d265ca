//! The short form of the mixed-load soak: `probity-load soak` for 45 seconds against the `probity` binary of this
//! build (`cargo build -p probity` first; `.ci/run` does, then runs the ignored tests explicitly), with the prediction store on: scoring from 8 connections (unary
//! calls and batches of 20), two outcome streams, a model reload and a report every 3 seconds.
//!
//! Checked: no failed request of any kind; the p99 latency of each kind under 2 s, a stall detector and not a
//! speed check (a debug build on a shared 2-core machine answers in milliseconds; a stalled writer, lock or
//! reload shows up as seconds); the server's resident memory at the end at most 32 MiB above its value after the
//! 15-second warm-up, both as single samples and as the lowest sample of the first and last quarter (a chosen
//! margin, no external source: SQLite's page cache is 2 MiB, the windows behind the monitoring gauges are bounded
//! by `store.psi_window` and `store.prior_window`, and a report holds the rows of its range only while it runs;
//! measured: 34.2 to 37.4 MiB). The long form is
//! `tools/soak.sh` (ten minutes by default); DEVELOPERS.md gives its last figures.

#![allow(clippy::unwrap_used)]

use std::process::Command;

use serde_json::Value;

/// The `probity` binary beside this test's own build (`target/<profile>/probity`).
fn probity_binary() -> std::path::PathBuf {
    let exe = std::env::current_exe().unwrap();
    let profile_dir = exe.parent().and_then(|deps| deps.parent()).unwrap();
    let bin = profile_dir.join("probity");
    assert!(
        bin.is_file(),
        "{} is missing: build it first (cargo build -p probity)",
        bin.display()
    );
    bin
}

#[test]
#[ignore = "long (45 s of load): .ci/run runs it with --ignored"]
fn a_short_mixed_load_soak_has_no_failed_request_no_stall_and_flat_memory() {
    let out = Command::new(env!("CARGO_BIN_EXE_probity-load"))
        .args(["soak", "--seconds", "45", "--warmup", "15"])
        .args(["--connections", "8", "--rate", "150"])
        .args(["--reload-every", "3", "--report-every", "3"])
        .args(["--p99-limit-ms", "2000", "--rss-margin-mib", "32", "--json"])
        .arg("--probity")
        .arg(probity_binary())
        .output()
        .unwrap();
    let stdout = String::from_utf8_lossy(&out.stdout);
    let stderr = String::from_utf8_lossy(&out.stderr);
    let line = stdout
        .lines()
        .last()
        .unwrap_or_else(|| panic!("no summary; stderr:\n{stderr}"));
    let v: Value = serde_json::from_str(line).unwrap();
    eprintln!("{v:#}");
    assert!(
        out.status.success(),
        "problems: {}\nstderr:\n{stderr}",
        v["problems"]
    );
    assert_eq!(v["failures"], 0);
    // The load really ran: about 150 calls a second for 45 seconds, and every other kind of call.
    assert!(v["scoring_calls"].as_u64().unwrap() > 3_000, "{v}");
    assert!(
        v["calls"]["outcomes"]["calls"].as_u64().unwrap() > 500,
        "{v}"
    );
    assert!(v["calls"]["reload"]["calls"].as_u64().unwrap() >= 10, "{v}");
    assert!(v["calls"]["report"]["calls"].as_u64().unwrap() >= 10, "{v}");
    for kind in ["score", "score_batch", "reload", "report"] {
        let p99 = v["calls"][kind]["p99_ms"].as_f64().unwrap();
        assert!(p99 < 2_000.0, "{kind} p99 {p99} ms: a stall");
    }
    // Flat: the lowest samples of the first and last quarter (the tool's own criterion), and the first and last
    // samples themselves.
    let floor = |k: &str| v[k].as_u64().unwrap();
    let (start, end) = (floor("rss_kib_floor_start"), floor("rss_kib_floor_end"));
    assert!(end <= start + 32 * 1024, "RSS floor {start} -> {end} KiB");
    let (start, end) = (floor("rss_kib_start"), floor("rss_kib_end"));
    assert!(end <= start + 32 * 1024, "RSS {start} -> {end} KiB");
    // Every prediction reached the log.
    assert_eq!(v["log_dropped"].as_f64(), Some(0.0));
    assert!(v["log_written"].as_f64().unwrap() >= v["scoring_calls"].as_f64().unwrap());
}
