//! `probity serve` as a child process of a test: started on ports the server picks itself (127.0.0.1:0, read back
//! from its "probity serving" log line, so no port is chosen, released and raced for), its log kept for the test
//! to read, and killed with SIGKILL and reaped when the handle is dropped, a failed assertion's unwinding included,
//! so a failed test leaves no server running. Included with `#[path = "support/serve.rs"] mod serve;`.
#![allow(dead_code)] // each including binary uses a part

use std::io::BufRead;
use std::net::SocketAddr;
use std::path::Path;
use std::process::{Child, Command, Stdio};
use std::sync::{mpsc, Arc, Mutex};
use std::time::Duration;

/// A running `probity serve`.
pub struct Spawned {
    child: Child,
    /// Where it answers gRPC.
    pub grpc: SocketAddr,
    /// Where it answers `/metrics`, `/livez` and `/readyz`.
    pub metrics: SocketAddr,
    log: Arc<Mutex<String>>,
    reader: Option<std::thread::JoinHandle<()>>,
}

impl Spawned {
    /// `probity serve --config <config>` plus `args`, on ports of its own choosing, logging JSON lines (kept).
    /// Waits until it listens (a prediction store on PostgreSQL may make that a while: up to 60 s); panics with its
    /// log if it exits first.
    pub fn start(config: &Path, args: &[&str]) -> Spawned {
        let mut child = Command::new(env!("CARGO_BIN_EXE_probity"))
            .args(["serve", "--config"])
            .arg(config)
            .args([
                "--grpc-listen",
                "127.0.0.1:0",
                "--metrics-listen",
                "127.0.0.1:0",
            ])
            .args(["--log-format", "json"])
            .args(args)
            .stdout(Stdio::null())
            .stderr(Stdio::piped())
            .spawn()
            .unwrap();
        let stderr = child.stderr.take().unwrap();
        let log = Arc::new(Mutex::new(String::new()));
        let (found, addresses) = mpsc::channel();
        let kept = Arc::clone(&log);
        let reader = std::thread::spawn(move || {
            for line in std::io::BufReader::new(stderr).lines() {
                let Ok(line) = line else { break };
                if let Ok(v) = serde_json::from_str::<serde_json::Value>(&line) {
                    if v["message"] == "probity serving" {
                        let addr = |key: &str| v[key].as_str().and_then(|a| a.parse().ok());
                        if let (Some(g), Some(m)) = (addr("grpc_addr"), addr("metrics_addr")) {
                            let _ = found.send((g, m));
                        }
                    }
                }
                let mut kept = kept
                    .lock()
                    .unwrap_or_else(std::sync::PoisonError::into_inner);
                kept.push_str(&line);
                kept.push('\n');
            }
        });
        let mut spawned = Spawned {
            child,
            grpc: SocketAddr::from(([127, 0, 0, 1], 0)),
            metrics: SocketAddr::from(([127, 0, 0, 1], 0)),
            log,
            reader: Some(reader),
        };
        for _ in 0..600 {
            match addresses.recv_timeout(Duration::from_millis(100)) {
                Ok((grpc, metrics)) => {
                    spawned.grpc = grpc;
                    spawned.metrics = metrics;
                    return spawned;
                }
                Err(_) => {
                    if let Ok(Some(status)) = spawned.child.try_wait() {
                        // Let the reader take the last lines before they are shown.
                        std::thread::sleep(Duration::from_millis(100));
                        panic!(
                            "probity serve exited ({status}) before serving:\n{}",
                            spawned.log()
                        );
                    }
                }
            }
        }
        panic!(
            "probity serve did not start within 60 s:\n{}",
            spawned.log()
        );
    }

    /// Its gRPC address as a URL (`http://127.0.0.1:PORT`).
    pub fn url(&self) -> String {
        format!("http://{}", self.grpc)
    }

    /// Its metrics address, `127.0.0.1:PORT`.
    pub fn metrics_addr(&self) -> String {
        self.metrics.to_string()
    }

    /// Everything it has logged so far (JSON lines).
    pub fn log(&self) -> String {
        self.log
            .lock()
            .unwrap_or_else(std::sync::PoisonError::into_inner)
            .clone()
    }

    /// Its process id, to signal it.
    pub fn pid(&self) -> u32 {
        self.child.id()
    }

    /// Sends `signal` (a `kill` name: `HUP`, `TERM`, ...).
    pub fn signal(&self, signal: &str) {
        let status = Command::new("kill")
            .args([format!("-{signal}"), self.pid().to_string()])
            .status()
            .unwrap();
        assert!(status.success(), "kill -{signal} failed");
    }

    /// SIGTERM, then waits for it to drain and exit; returns its exit status and its whole log.
    pub fn stop(mut self) -> (std::process::ExitStatus, String) {
        self.signal("TERM");
        let status = self.child.wait().unwrap();
        if let Some(reader) = self.reader.take() {
            let _ = reader.join();
        }
        (status, self.log())
    }

    /// SIGKILL: no drain, no flush.
    pub fn kill(mut self) {
        let _ = self.child.kill();
        let _ = self.child.wait();
    }
}

impl Drop for Spawned {
    /// SIGKILL and reap, also when an assertion fails first: a failed test leaves no server running.
    fn drop(&mut self) {
        let _ = self.child.kill();
        let _ = self.child.wait();
    }
}
