//! A test server on loopback with the hand-made models of `service/tests/data/grpc-*.json`, and helpers.

use std::collections::HashMap;
use std::path::{Path, PathBuf};

use probity::serve::config::{Config, Sources};
use probity::serve::proto as pb;
use probity::serve::{start, RunningServer};
use tokio::io::{AsyncReadExt, AsyncWriteExt};
use tonic::transport::Channel;

/// The test data directory.
pub fn data_dir() -> PathBuf {
    PathBuf::from(env!("CARGO_MANIFEST_DIR"))
        .join("tests")
        .join("data")
}

/// Routes: `fraud` (target base rate and threshold), `fraud-strict` (rejects missing and unknown), `credit`
/// (linear model, ignores unknown features), `orphan` (a model that is never there).
pub const ROUTES: &str = r#"
[routes.fraud]
model = "grpc-fraud"
target_base_rate = 0.01
decision = { threshold = 0.5 }

[routes.fraud-strict]
model = "grpc-fraud"
missing_features = "reject"
unknown_categories = "reject"

[routes.credit]
model = "grpc-credit"
unknown_features = "ignore"

[routes.orphan]
model = "grpc-absent"
"#;

/// A running server and its model directory.
pub struct TestServer {
    pub server: RunningServer,
    pub models: tempfile::TempDir,
    _config: tempfile::TempDir,
}

impl TestServer {
    /// Starts a server over a fresh model directory holding both test models; `watch` turns the file watch on.
    pub async fn start(watch: bool) -> TestServer {
        let models = tempfile::tempdir().unwrap();
        for name in ["grpc-fraud-v1.json", "grpc-credit-v1.json"] {
            std::fs::copy(data_dir().join(name), models.path().join(name)).unwrap();
        }
        let config_dir = tempfile::tempdir().unwrap();
        let path = config_dir.path().join("probity.toml");
        let text = format!(
            "[server]\nplaintext = \"loopback\"\ngrpc_listen = \"127.0.0.1:0\"\nmetrics_listen = \"127.0.0.1:0\"\nshutdown_grace_ms = 2000\n\
             [models]\ndirectory = {:?}\nwatch = {watch}\nwatch_debounce_ms = 50\n\
             [limits]\nmax_batch_rows = 100\n{ROUTES}",
            models.path().display().to_string()
        );
        std::fs::write(&path, text).unwrap();
        let config = Config::load(&Sources {
            file: Some(path),
            ..Sources::default()
        })
        .unwrap();
        let server = start(config).await.unwrap();
        TestServer {
            server,
            models,
            _config: config_dir,
        }
    }

    /// The gRPC endpoint URL.
    pub fn url(&self) -> String {
        format!("http://{}", self.server.grpc_addr())
    }

    pub async fn channel(&self) -> Channel {
        Channel::from_shared(self.url())
            .unwrap()
            .connect()
            .await
            .unwrap()
    }

    pub async fn scoring(&self) -> pb::scoring_client::ScoringClient<Channel> {
        pb::scoring_client::ScoringClient::new(self.channel().await)
    }

    pub async fn models_client(&self) -> pb::models_client::ModelsClient<Channel> {
        pb::models_client::ModelsClient::new(self.channel().await)
    }

    /// GET on the monitoring port; returns status code and body.
    pub async fn http_get(&self, path: &str) -> (u16, String) {
        http_get(self.server.metrics_addr(), path).await
    }

    /// Writes a model file atomically (temporary file, then rename), as a deployment should.
    pub fn put_model(&self, name: &str, text: &str) {
        put_file(self.models.path(), name, text);
    }
}

pub fn put_file(dir: &Path, name: &str, text: &str) {
    let tmp = dir.join(format!(".{name}.tmp"));
    std::fs::write(&tmp, text).unwrap();
    std::fs::rename(&tmp, dir.join(name)).unwrap();
}

/// A plain HTTP/1.0 GET, enough for the monitoring endpoint.
pub async fn http_get(addr: std::net::SocketAddr, path: &str) -> (u16, String) {
    let mut stream = tokio::net::TcpStream::connect(addr).await.unwrap();
    stream
        .write_all(format!("GET {path} HTTP/1.0\r\nHost: test\r\n\r\n").as_bytes())
        .await
        .unwrap();
    let mut text = String::new();
    stream.read_to_string(&mut text).await.unwrap();
    let (head, body) = text.split_once("\r\n\r\n").unwrap();
    let code = head.split_whitespace().nth(1).unwrap().parse().unwrap();
    (code, body.to_string())
}

/// The test fraud model file's text with a different version and first-tree right leaf.
pub fn fraud_model_text(version: &str, right_leaf: f64) -> String {
    let text = std::fs::read_to_string(data_dir().join("grpc-fraud-v1.json")).unwrap();
    let mut doc: serde_json::Value = serde_json::from_str(&text).unwrap();
    doc["version"] = version.into();
    doc["ensemble"]["trees"][0]["nodes"][2]["leaf"] = right_leaf.into();
    serde_json::to_string_pretty(&doc).unwrap()
}

/// A named-feature row.
pub fn named(prediction_id: &str, values: &[(&str, Value)]) -> pb::Row {
    let values: HashMap<String, pb::FeatureValue> = values
        .iter()
        .map(|(k, v)| {
            let kind = match v {
                Value::Num(x) => Some(pb::feature_value::Kind::Number(*x)),
                Value::Cat(c) => Some(pb::feature_value::Kind::Category(c.to_string())),
                Value::Unset => None,
            };
            (k.to_string(), pb::FeatureValue { kind })
        })
        .collect();
    pb::Row {
        prediction_id: prediction_id.into(),
        features: Some(pb::row::Features::Named(pb::NamedFeatures { values })),
        ..Default::default()
    }
}

/// A dense row.
pub fn dense(values: &[f64]) -> pb::Row {
    pb::Row {
        features: Some(pb::row::Features::Dense(pb::DenseFeatures {
            values: values.to_vec(),
        })),
        ..Default::default()
    }
}

/// One named value.
#[derive(Clone, Copy)]
pub enum Value {
    Num(f64),
    Cat(&'static str),
    Unset,
}

/// A typical fraud row: amount 150 (right in tree 0), online (left in tree 1).
pub fn fraud_row(id: &str) -> pb::Row {
    named(
        id,
        &[
            ("amount", Value::Num(150.0)),
            ("channel", Value::Cat("online")),
            ("hour", Value::Num(3.0)),
        ],
    )
}

pub fn score_request(route: &str, row: pb::Row) -> pb::ScoreRequest {
    pb::ScoreRequest {
        explain: 0,
        route: route.into(),
        row: Some(row),
    }
}
