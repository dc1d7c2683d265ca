//! A read-only data directory at start: the server refuses to start, with an error that names `store.directory`,
//! the directory and the reason, and says what to do (the decision is documented in DEVELOPERS.md, "Prediction
//! log"). Two cases on a real read-only mount (tmpfs mounted read-only in the server's own mount namespace): an
//! empty file system where the log directory would have to be made, and an existing log copied in before the
//! mount was made read-only.
//!
//! A file system that turns read-only under the running server: ext4 mounted with `errors=remount-ro` from an
//! image file on a loop device, and a file system error triggered through `/sys/fs/ext4/<device>/trigger_fs_error`
//! (the kernel's own test hook; ext4 then remounts read-only as it does when a disk fails). Scoring goes on, every
//! prediction after that is counted as dropped with `reason="read_only"`, outcome calls are refused with
//! UNAVAILABLE, reports still answer, each kind of failure is logged once, and the server stops cleanly.

use std::process::{Command, Stdio};
use std::time::Duration;

use probity::serve::proto as pb;

use crate::common::*;

/// Runs the command to its end (it must not start serving) and returns (success, stderr).
fn run_to_end(mut command: std::process::Command) -> (bool, String) {
    let out = command
        .stdout(Stdio::null())
        .stderr(Stdio::piped())
        .output()
        .unwrap();
    (
        out.status.success(),
        String::from_utf8_lossy(&out.stderr).to_string(),
    )
}

fn assert_refused(success: bool, stderr: &str, dir: &std::path::Path) {
    assert!(!success, "the server must not start: {stderr}");
    let line = stderr
        .lines()
        .find(|l| l.starts_with("error: "))
        .unwrap_or_else(|| panic!("no error line: {stderr}"));
    for part in [
        "store.directory",
        &dir.display().to_string(),
        "is not writable",
        "Read-only file system",
        "leave out store.directory",
    ] {
        assert!(line.contains(part), "`{part}` missing from: {line}");
    }
    assert!(!stderr.contains("probity serving"), "{stderr}");
}

#[tokio::test(flavor = "multi_thread", worker_threads = 2)]
#[ignore = "needs root to mount a tmpfs: .ci/run (as root) runs it with --ignored"]
async fn a_read_only_data_directory_refuses_to_start_with_a_clear_error() {
    if !mounts_allowed("read-only data directory") {
        return;
    }
    let dir = tempfile::tempdir().unwrap();
    let models = dir.path().join("models");
    std::fs::create_dir(&models).unwrap();
    std::fs::write(models.join("linear.json"), linear_model("1")).unwrap();
    let mount = dir.path().join("ro");
    std::fs::create_dir(&mount).unwrap();

    // 1. Nothing there yet: the log directory cannot even be made.
    let config = dir.path().join("fresh.toml");
    let log_dir = mount.join("log");
    write_config(
        &config,
        &models,
        &format!("directory = {:?}", log_dir.display().to_string()),
        &["r"],
    );
    let (ok, stderr) = run_to_end(serve_on_tmpfs(
        &config,
        &mount,
        "4m",
        "mount -o remount,ro \"$1\"",
    ));
    assert_refused(ok, &stderr, &log_dir);

    // 2. An existing log, made by a server that ran and stopped, then the file system turned read-only.
    let existing = dir.path().join("existing");
    let config = dir.path().join("existing.toml");
    write_config(
        &config,
        &models,
        &format!("directory = {:?}", existing.display().to_string()),
        &["r"],
    );
    let server = spawn(serve_command(&config));
    pb::scoring_client::ScoringClient::new(server.channel().await)
        .score_batch(pb::ScoreBatchRequest {
            explain: 0,
            route: "r".into(),
            rows: rows("p", 0..10),
        })
        .await
        .unwrap();
    assert!(server.terminate().success());
    assert!(existing.join("predictions.db").exists());
    let config = dir.path().join("copied.toml");
    write_config(
        &config,
        &models,
        &format!("directory = {:?}", mount.display().to_string()),
        &["r"],
    );
    let (ok, stderr) = run_to_end(serve_on_tmpfs(
        &config,
        &mount,
        "4m",
        &format!(
            "cp -a {:?}/. \"$1\"/ && test -s \"$1/predictions.db\" && mount -o remount,ro \"$1\"",
            existing.display().to_string()
        ),
    ));
    assert_refused(ok, &stderr, &mount);
}

/// The device of the mount at `mount_point` as the process `pid` sees it, from `/proc/PID/mountinfo` (proc(5):
/// field 5 is the mount point, the field after ` - ` and the file system type is the source).
fn mount_source(pid: u32, mount_point: &std::path::Path) -> Option<(String, String)> {
    let info = std::fs::read_to_string(format!("/proc/{pid}/mountinfo")).ok()?;
    let want = mount_point.display().to_string();
    info.lines().find_map(|l| {
        let fields: Vec<&str> = l.split(' ').collect();
        if fields.get(4) != Some(&want.as_str()) {
            return None;
        }
        let dash = fields.iter().position(|f| *f == "-")?;
        Some((
            fields.get(dash + 2)?.to_string(),
            fields.get(5)?.to_string(),
        ))
    })
}

#[tokio::test(flavor = "multi_thread", worker_threads = 2)]
#[ignore = "needs root to mount a tmpfs: .ci/run (as root) runs it with --ignored"]
async fn a_file_system_turning_read_only_under_the_server_is_counted_and_scoring_goes_on() {
    if !mounts_allowed("file system turning read-only") {
        return;
    }
    let dir = tempfile::tempdir().unwrap();
    let models = dir.path().join("models");
    std::fs::create_dir(&models).unwrap();
    std::fs::write(models.join("linear.json"), linear_model("1")).unwrap();
    let image = dir.path().join("ext4.img");
    std::fs::File::create(&image)
        .unwrap()
        .set_len(32 * 1024 * 1024)
        .unwrap();
    let mkfs = Command::new("mkfs.ext4")
        .args(["-q", "-F"])
        .arg(&image)
        .output();
    match mkfs {
        Ok(o) if o.status.success() => {}
        other => {
            if std::env::var(SKIP_MOUNTS).as_deref() == Ok("1") {
                eprintln!("SKIPPED: mkfs.ext4 failed ({other:?}); {SKIP_MOUNTS}=1 allows the skip");
                return;
            }
            panic!(
                "this test needs mkfs.ext4 (e2fsprogs) and loop devices: {other:?}; \
                 {SKIP_MOUNTS}=1 skips it explicitly"
            );
        }
    }
    let mount = dir.path().join("ext4");
    std::fs::create_dir(&mount).unwrap();
    let config = dir.path().join("probity.toml");
    write_config(
        &config,
        &models,
        &format!(
            "directory = {:?}\nflush_interval = \"5ms\"",
            mount.join("log").display().to_string()
        ),
        &["ro"],
    );
    let server = spawn(serve_with_mount(
        &config,
        &mount,
        &format!(
            "mount -o loop,errors=remount-ro {:?} \"$1\"",
            image.display().to_string()
        ),
    ));
    let (device, options) = mount_source(server.pid(), &mount).expect("the ext4 mount");
    assert!(options.starts_with("rw"), "{options}");
    let device = device.rsplit('/').next().unwrap().to_string();
    assert!(device.starts_with("loop"), "{device}");
    let channel = server.channel().await;
    let mut scoring = pb::scoring_client::ScoringClient::new(channel.clone());
    let mut outcomes = pb::outcomes_client::OutcomesClient::new(channel);
    let route = [("route", "ro")];
    let limit = Duration::from_secs(120);
    for start in (0..200).step_by(100) {
        scoring
            .score_batch(pb::ScoreBatchRequest {
                explain: 0,
                route: "ro".into(),
                rows: rows("a", start..start + 100),
            })
            .await
            .unwrap();
    }
    wait_until("200 predictions written", limit, || async {
        sample(
            &server.metrics().await,
            "probity_store_predictions_written_total",
            &route,
        ) == 200.0
    })
    .await;

    // The kernel's error path: ext4 aborts its journal and remounts read-only.
    std::fs::write(format!("/sys/fs/ext4/{device}/trigger_fs_error"), "1")
        .expect("the ext4 error trigger (CONFIG_EXT4_FS)");
    let probe = inside(server.pid(), &mount.join("probe"));
    wait_until("the file system is read-only", limit, || async {
        std::fs::File::create(&probe)
            .is_err_and(|e| e.kind() == std::io::ErrorKind::ReadOnlyFilesystem)
    })
    .await;

    for start in (0..500).step_by(100) {
        let answer = scoring
            .score_batch(pb::ScoreBatchRequest {
                explain: 0,
                route: "ro".into(),
                rows: rows("b", start..start + 100),
            })
            .await
            .unwrap()
            .into_inner();
        assert_eq!(answer.results.len(), 100);
    }
    wait_until("every prediction written or counted", limit, || async {
        let m = server.metrics().await;
        sample(&m, "probity_store_predictions_written_total", &route)
            + sample(&m, "probity_store_predictions_dropped_total", &route)
            == 700.0
    })
    .await;
    let m = server.metrics().await;
    assert_eq!(
        sample(
            &m,
            "probity_store_predictions_dropped_total",
            &[("route", "ro"), ("reason", "read_only")]
        ),
        500.0,
        "{m}"
    );
    let refused = outcomes
        .record_outcomes(pb::RecordOutcomesRequest {
            outcomes: vec![pb::Outcome {
                prediction_id: "a-1".into(),
                label: true,
                outcome_time_unix_ms: 0,
            }],
        })
        .await
        .unwrap_err();
    assert_eq!(refused.code(), tonic::Code::Unavailable, "{refused:?}");
    assert!(
        refused.message().contains("read-only"),
        "{}",
        refused.message()
    );
    let report = outcomes
        .report(pb::ReportRequest::default())
        .await
        .unwrap()
        .into_inner();
    assert_eq!(report.series[0].predictions, 200);
    assert_eq!(
        server.write_failure_kinds(),
        [
            ("outcomes".to_string(), "read_only".to_string()),
            ("predictions".to_string(), "read_only".to_string())
        ]
    );
    let status = server.terminate();
    assert!(
        status.success(),
        "the server did not stop cleanly: {status:?}"
    );
}
