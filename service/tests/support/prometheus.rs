//! A real Prometheus server for a test (Debian's `prometheus` package; `tests/run` and `deploy/check.sh` install
//! it), started on a free port with a data directory of its own and `deploy/prometheus/rules.yml` and `alerts.yml`
//! loaded, scraping the given `/metrics` addresses every second; plus the plain HTTP GET the tests read it with.
//! Included with `#[path = "support/prometheus.rs"] mod prom;`.
#![allow(dead_code)] // each including binary uses a part

use std::collections::BTreeMap;
use std::io::{Read, Write};
use std::path::{Path, PathBuf};
use std::process::{Child, Command, Stdio};
use std::time::Duration;

use serde_json::Value;

/// The repository root.
pub fn repo() -> PathBuf {
    Path::new(env!("CARGO_MANIFEST_DIR")).join("..")
}

/// A port nothing listens on at the moment of the call.
pub fn free_port() -> u16 {
    std::net::TcpListener::bind("127.0.0.1:0")
        .unwrap()
        .local_addr()
        .unwrap()
        .port()
}

/// The path of a program on the PATH; fails the test naming the package to install.
pub fn tool(name: &str) -> PathBuf {
    for dir in std::env::var("PATH").unwrap_or_default().split(':') {
        let p = Path::new(dir).join(name);
        if p.is_file() {
            return p;
        }
    }
    panic!(
        "`{name}` is not on the PATH: install Debian's `prometheus` package (deploy/check.sh does)"
    );
}

/// A plain HTTP/1.0 GET; returns (status, body).
pub fn http_get(addr: &str, path: &str) -> std::io::Result<(u16, String)> {
    let mut s = std::net::TcpStream::connect(addr)?;
    s.set_read_timeout(Some(Duration::from_secs(10)))?;
    write!(s, "GET {path} HTTP/1.0\r\nHost: {addr}\r\n\r\n")?;
    let mut text = String::new();
    s.read_to_string(&mut text)?;
    let (head, body) = text.split_once("\r\n\r\n").unwrap_or((&text, ""));
    let status = head
        .split_whitespace()
        .nth(1)
        .and_then(|c| c.parse().ok())
        .unwrap_or(0);
    Ok((status, body.to_string()))
}

fn percent_encode(text: &str) -> String {
    text.bytes()
        .map(|b| {
            if b.is_ascii_alphanumeric() || b"-_.~".contains(&b) {
                (b as char).to_string()
            } else {
                format!("%{b:02X}")
            }
        })
        .collect()
}

/// A running Prometheus server, killed with the test (panic included).
pub struct Prometheus {
    child: Child,
    /// Its HTTP address.
    pub addr: String,
    _dir: tempfile::TempDir,
}

impl Drop for Prometheus {
    fn drop(&mut self) {
        let _ = self.child.kill();
        let _ = self.child.wait();
    }
}

/// Starts Prometheus scraping `targets` (host:port of each `/metrics`) with the project's rules and alerts.
pub fn start_prometheus(targets: &[&str]) -> Prometheus {
    let dir = tempfile::tempdir().unwrap();
    let rules = repo().join("deploy/prometheus");
    let config = serde_json::json!({
        "global": {"scrape_interval": "1s", "evaluation_interval": "1s"},
        "rule_files": [rules.join("rules.yml"), rules.join("alerts.yml")],
        "scrape_configs": [{"job_name": "probity", "static_configs": [{"targets": targets}]}],
    });
    let file = dir.path().join("prometheus.yml");
    std::fs::write(&file, config.to_string()).unwrap();
    let addr = format!("127.0.0.1:{}", free_port());
    let child = Command::new(tool("prometheus"))
        .arg(format!("--config.file={}", file.display()))
        .arg(format!(
            "--storage.tsdb.path={}",
            dir.path().join("data").display()
        ))
        .arg(format!("--web.listen-address={addr}"))
        .arg("--log.level=warn")
        .stdout(Stdio::null())
        .stderr(Stdio::null())
        .spawn()
        .unwrap();
    Prometheus {
        child,
        addr,
        _dir: dir,
    }
}

impl Prometheus {
    /// The instant vector of `query`, as (labels, value); empty until Prometheus answers.
    pub fn query(&self, query: &str) -> Vec<(BTreeMap<String, String>, f64)> {
        let Ok((200, body)) = http_get(
            &self.addr,
            &format!("/api/v1/query?query={}", percent_encode(query)),
        ) else {
            return Vec::new();
        };
        let v: Value = serde_json::from_str(&body).unwrap();
        v["data"]["result"]
            .as_array()
            .unwrap()
            .iter()
            .map(|r| {
                let labels = r["metric"]
                    .as_object()
                    .unwrap()
                    .iter()
                    .map(|(k, v)| (k.clone(), v.as_str().unwrap().to_string()))
                    .collect();
                (labels, r["value"][1].as_str().unwrap().parse().unwrap())
            })
            .collect()
    }

    /// The value of a recorded series with these labels, once present.
    pub fn value(&self, record: &str, labels: &[(&str, &str)]) -> Option<f64> {
        self.query(record)
            .into_iter()
            .find(|(l, _)| {
                labels
                    .iter()
                    .all(|(k, v)| l.get(*k).map(String::as_str) == Some(*v))
            })
            .map(|(_, v)| v)
    }

    /// Every rule loaded, after checking that each evaluated without error (Prometheus's rules API).
    pub fn healthy_rules(&self) -> usize {
        let (_, rules) = http_get(&self.addr, "/api/v1/rules").unwrap();
        let rules: Value = serde_json::from_str(&rules).unwrap();
        let mut evaluated = 0;
        for g in rules["data"]["groups"].as_array().unwrap() {
            for r in g["rules"].as_array().unwrap() {
                assert_eq!(r["health"], "ok", "rule {} in error: {r}", r["name"]);
                evaluated += 1;
            }
        }
        evaluated
    }
}

/// Equal within 1e-9 relative (absolute below 1).
pub fn close(a: f64, b: f64) -> bool {
    (a - b).abs() <= 1e-9 * b.abs().max(1.0)
}
