//! Helpers shared by the fault tests: the real `probity serve` binary started on port 0 with JSON logs read from
//! its stderr, a private mount namespace for tmpfs mounts, `/metrics` samples, resident memory.

use std::io::{BufRead, BufReader};
use std::net::SocketAddr;
use std::path::{Path, PathBuf};
use std::process::{Child, Command, Stdio};
use std::sync::{mpsc, Arc, Mutex};
use std::time::Duration;

use probity::serve::proto as pb;
use serde_json::Value;
use tokio::io::{AsyncReadExt, AsyncWriteExt};
use tonic::transport::Channel;

/// Set to `1` to skip (with a message) the tests that need to mount a tmpfs, on a machine where the user may not
/// mount. CI runs as root and never sets it, so there the tests fail instead of passing without running.
pub const SKIP_MOUNTS: &str = "PROBITY_SKIP_MOUNT_TESTS";

/// A one-feature linear model (log-odds `0.25 + 1.5 x`), named `linear`, at `version`.
pub fn linear_model(version: &str) -> String {
    format!(
        r#"{{"format": "probity.model", "format_version": 1, "name": "linear", "version": "{version}",
            "features": [{{"name": "x", "type": "numeric"}}], "margin_scale": "log_odds", "base_rate": 0.5,
            "linear": {{"intercept": 0.25, "terms": [{{"numeric": {{"feature": 0, "coefficient": 1.5}}}}]}}}}"#
    )
}

/// A configuration file: the model directory, `log_section` (the `[store]` keys, without the header) and routes.
pub fn write_config(path: &Path, models: &Path, log_section: &str, routes: &[&str]) {
    let mut text = format!(
        "[server]\nplaintext = \"loopback\"\n[logging]\nformat = \"json\"\n\
         [models]\ndirectory = {:?}\nwatch = false\n[store]\n{log_section}\n",
        models.display().to_string()
    );
    for r in routes {
        text.push_str(&format!("[routes.{r}]\nmodel = \"linear\"\n"));
    }
    // Calls carrying 10,000 outcomes into a debug build need more than the default second.
    text.push_str("[limits]\ndefault_deadline_ms = 120000\n");
    std::fs::write(path, text).unwrap();
}

/// The `probity serve` arguments after the binary: the configuration and both listeners on port 0.
pub fn serve_args(config: &Path) -> Vec<String> {
    vec![
        "serve".into(),
        "--config".into(),
        config.display().to_string(),
        "--grpc-listen".into(),
        "127.0.0.1:0".into(),
        "--metrics-listen".into(),
        "127.0.0.1:0".into(),
    ]
}

/// `probity serve` on `config`.
pub fn serve_command(config: &Path) -> Command {
    let mut c = Command::new(env!("CARGO_BIN_EXE_probity"));
    c.args(serve_args(config));
    c
}

/// `probity serve` in a private mount namespace (`unshare --mount`) with a tmpfs of `size` (e.g. `16m`) mounted
/// on `mount_point` first; `prepare` is more shell run after the mount, before the server starts (`$1` is the
/// mount point). The mount lives and dies with the server process: nothing to unmount, even if the test fails.
pub fn serve_on_tmpfs(config: &Path, mount_point: &Path, size: &str, prepare: &str) -> Command {
    serve_with_mount(
        config,
        mount_point,
        &format!("mount -t tmpfs -o size={size},mode=0755 probity-test \"$1\"; {prepare}"),
    )
}

/// `probity serve` in a private mount namespace after the shell `script` (`$1` is the mount point) has run.
pub fn serve_with_mount(config: &Path, mount_point: &Path, script: &str) -> Command {
    let mut c = Command::new("unshare");
    c.args(["--mount", "--propagation", "private", "sh", "-ec"])
        .arg(format!("{script}\nshift; exec \"$@\""))
        .arg("sh")
        .arg(mount_point)
        .arg(env!("CARGO_BIN_EXE_probity"))
        .args(serve_args(config));
    c
}

/// Whether this machine lets us mount a tmpfs in a private mount namespace. Fails the test with a clear message
/// when it does not, unless [`SKIP_MOUNTS`] is `1` (then the test is reported as skipped on stderr).
pub fn mounts_allowed(test: &str) -> bool {
    let dir = tempfile::tempdir().unwrap();
    let out = Command::new("unshare")
        .args(["--mount", "--propagation", "private", "sh", "-ec"])
        .arg("mount -t tmpfs -o size=1m probity-check \"$1\"; touch \"$1/probe\"")
        .arg("sh")
        .arg(dir.path())
        .output();
    let ok = match &out {
        Ok(o) => o.status.success() && !dir.path().join("probe").exists(),
        Err(_) => false,
    };
    if ok {
        return true;
    }
    let why = match out {
        Ok(o) => String::from_utf8_lossy(&o.stderr).trim().to_string(),
        Err(e) => format!("cannot run unshare: {e}"),
    };
    if std::env::var(SKIP_MOUNTS).as_deref() == Ok("1") {
        eprintln!(
            "SKIPPED {test}: cannot mount a tmpfs here ({why}); {SKIP_MOUNTS}=1 allows the skip"
        );
        return false;
    }
    panic!(
        "{test} needs to mount a tmpfs in a private mount namespace (`unshare --mount`, as root or with \
         CAP_SYS_ADMIN) and cannot here: {why}. CI runs as root; on a developer machine without root set \
         {SKIP_MOUNTS}=1 to skip it explicitly."
    );
}

/// A running server process with its stderr log lines (JSON) collected.
pub struct Spawned {
    pub child: Child,
    pub url: String,
    pub metrics: SocketAddr,
    pub lines: Arc<Mutex<Vec<Value>>>,
}

/// Starts `command` (a `probity serve` with JSON logs and port-0 listeners) and waits for its
/// "probity serving" line. Panics with the process's stderr if it stops first.
pub fn spawn(mut command: Command) -> Spawned {
    let mut child = command
        .stdout(Stdio::null())
        .stderr(Stdio::piped())
        .spawn()
        .unwrap();
    let stderr = child.stderr.take().unwrap();
    let lines = Arc::new(Mutex::new(Vec::new()));
    let raw = Arc::new(Mutex::new(Vec::new()));
    let (ready, wait) = mpsc::channel();
    {
        let lines = Arc::clone(&lines);
        let raw = Arc::clone(&raw);
        std::thread::spawn(move || {
            for line in BufReader::new(stderr).lines() {
                let Ok(line) = line else { break };
                raw.lock().unwrap().push(line.clone());
                if let Ok(v) = serde_json::from_str::<Value>(&line) {
                    if v["message"] == "probity serving" {
                        let _ = ready.send(Some((
                            v["grpc_addr"].as_str().unwrap_or_default().to_string(),
                            v["metrics_addr"].as_str().unwrap_or_default().to_string(),
                        )));
                    }
                    lines.lock().unwrap().push(v);
                }
            }
            let _ = ready.send(None);
        });
    }
    match wait.recv_timeout(Duration::from_secs(300)) {
        Ok(Some((grpc, metrics))) => Spawned {
            child,
            url: format!("http://{grpc}"),
            metrics: metrics.parse().unwrap(),
            lines,
        },
        other => {
            let _ = child.kill();
            let _ = child.wait();
            panic!(
                "the server did not start ({other:?}); its stderr:\n{}",
                raw.lock().unwrap().join("\n")
            );
        }
    }
}

impl Spawned {
    /// The process id.
    pub fn pid(&self) -> u32 {
        self.child.id()
    }

    /// A connected channel.
    pub async fn channel(&self) -> Channel {
        Channel::from_shared(self.url.clone())
            .unwrap()
            .connect()
            .await
            .unwrap()
    }

    /// The (operation, reason) of every "prediction store write failed" line, sorted.
    pub fn write_failure_kinds(&self) -> Vec<(String, String)> {
        let mut kinds: Vec<(String, String)> = self
            .logged("prediction store write failed")
            .iter()
            .map(|v| {
                (
                    v["operation"].as_str().unwrap().to_string(),
                    v["reason"].as_str().unwrap().to_string(),
                )
            })
            .collect();
        kinds.sort();
        kinds
    }

    /// The log lines whose `message` starts with `prefix`.
    pub fn logged(&self, prefix: &str) -> Vec<Value> {
        self.lines
            .lock()
            .unwrap()
            .iter()
            .filter(|v| v["message"].as_str().is_some_and(|m| m.starts_with(prefix)))
            .cloned()
            .collect()
    }

    /// `/metrics` now.
    pub async fn metrics(&self) -> String {
        http_get(self.metrics, "/metrics").await
    }

    /// SIGTERM, and the exit status.
    pub fn terminate(mut self) -> std::process::ExitStatus {
        let _ = Command::new("kill")
            .args(["-TERM", &self.child.id().to_string()])
            .status();
        self.child.wait().unwrap()
    }
}

impl Drop for Spawned {
    /// A test that fails half-way leaves no server behind (nor, with it, its mount namespace and mounts).
    fn drop(&mut self) {
        if let Ok(None) = self.child.try_wait() {
            let _ = self.child.kill();
            let _ = self.child.wait();
        }
    }
}

/// A plain HTTP/1.0 GET; the body.
pub async fn http_get(addr: SocketAddr, path: &str) -> String {
    let mut stream = tokio::net::TcpStream::connect(addr).await.unwrap();
    stream
        .write_all(format!("GET {path} HTTP/1.0\r\nHost: test\r\n\r\n").as_bytes())
        .await
        .unwrap();
    let mut text = String::new();
    stream.read_to_string(&mut text).await.unwrap();
    text.split_once("\r\n\r\n").unwrap().1.to_string()
}

/// The sum of the samples of `name` (exactly, no suffix) carrying every label of `labels`; 0 when none does.
pub fn sample(text: &str, name: &str, labels: &[(&str, &str)]) -> f64 {
    text.lines()
        .filter(|l| !l.starts_with('#'))
        .filter(|l| {
            let series = l.split_once(' ').map_or(*l, |(s, _)| s);
            let bare = series.split_once('{').map_or(series, |(n, _)| n);
            bare == name
                && labels
                    .iter()
                    .all(|(k, v)| series.contains(&format!("{k}=\"{v}\"")))
        })
        .filter_map(|l| l.rsplit_once(' ')?.1.parse::<f64>().ok())
        .sum()
}

/// Resident set size of a process in KiB (`VmRSS` in `/proc/PID/status`, proc(5)).
pub fn rss_kib(pid: u32) -> u64 {
    let status = std::fs::read_to_string(format!("/proc/{pid}/status")).unwrap();
    status
        .lines()
        .find(|l| l.starts_with("VmRSS:"))
        .and_then(|l| l.split_whitespace().nth(1)?.parse().ok())
        .unwrap()
}

/// A path inside the server's mount namespace (`/proc/PID/root`, proc(5)).
pub fn inside(pid: u32, path: &Path) -> PathBuf {
    PathBuf::from(format!("/proc/{pid}/root{}", path.display()))
}

/// Rows with one feature and ids `{prefix}-{i}`.
pub fn rows(prefix: &str, range: std::ops::Range<usize>) -> Vec<pb::Row> {
    range
        .map(|i| pb::Row {
            prediction_id: format!("{prefix}-{i}"),
            features: Some(pb::row::Features::Dense(pb::DenseFeatures {
                values: vec![(i % 200) as f64 / 40.0 - 2.5],
            })),
            ..Default::default()
        })
        .collect()
}

/// Polls `check` every 20 ms until it holds; panics with `what` after `limit` (a hang detector, not a speed
/// check: the limits are minutes).
pub async fn wait_until<F, Fut>(what: &str, limit: Duration, mut check: F)
where
    F: FnMut() -> Fut,
    Fut: std::future::Future<Output = bool>,
{
    let start = std::time::Instant::now();
    while !check().await {
        assert!(start.elapsed() < limit, "gave up waiting: {what}");
        tokio::time::sleep(Duration::from_millis(20)).await;
    }
}
