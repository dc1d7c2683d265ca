//! Bytes -> prost decode of the scoring request messages -> the service's conversion and scoring path
//! (`Scorer::score`, `Scorer::score_batch`, `ModelTarget::try_from`) against two fixed small models, under every
//! combination of the route policies.
//!
//! The first input byte picks the message type, the route and whether the decoded route name is kept; the rest is
//! the protobuf message. Checked beyond "no panic": a refused request is never an internal error, its message
//! names the field and stays short enough for a gRPC trailer, and an answered row has a probability in [0, 1].
#![no_main]

use std::collections::BTreeMap;
use std::sync::{Arc, OnceLock};
use std::time::{Duration, Instant};

use libfuzzer_sys::fuzz_target;
use probity::serve::config::{
    Limits, MissingPolicy, Route, UnknownCategoryPolicy, UnknownFeaturePolicy,
};
use probity::serve::conversions::ModelTarget;
use probity::serve::error::ServeError;
use probity::serve::proto as pb;
use probity::serve::registry::Registry;
use probity::serve::scoring::Scorer;
use probity::serve::status::code_of;
use probity_models::{DecisionRule, OutputSpec};
use prost::Message;

/// The longest error message a caller may get back; gRPC carries it in a trailer.
const MAX_MESSAGE_CHARS: usize = 4096;

const MODELS: [&str; 2] = ["fuzz-trees", "fuzz-linear"];

struct Fixture {
    scorer: Scorer,
    routes: Vec<String>,
    _dir: tempfile::TempDir,
}

fn fixture() -> &'static Fixture {
    static FIXTURE: OnceLock<Fixture> = OnceLock::new();
    FIXTURE.get_or_init(|| {
        let dir = tempfile::tempdir().expect("temp dir");
        for (name, text) in [
            ("fuzz-trees.json", include_str!("../models/fuzz-trees.json")),
            (
                "fuzz-linear.json",
                include_str!("../models/fuzz-linear.json"),
            ),
        ] {
            std::fs::write(dir.path().join(name), text).expect("write model");
        }
        let registry = Arc::new(Registry::new(dir.path().to_path_buf()));
        let runtime = tokio::runtime::Builder::new_current_thread()
            .build()
            .expect("runtime");
        runtime.block_on(registry.reload()).expect("models load");
        assert_eq!(registry.snapshot().models.len(), 2, "both fuzz models load");
        let mut routes = BTreeMap::new();
        let mut names = Vec::new();
        for (m, model) in MODELS.iter().enumerate() {
            for policy in 0..8u8 {
                let name = format!("r{m}{policy}");
                let route = Route {
                    reasons: Default::default(),
                    record: Default::default(),
                    name: name.clone(),
                    model: probity::serve::model_ref::ModelRef::bare(*model),
                    output: OutputSpec {
                        target_base_rate: (policy % 2 == 0).then_some(0.013),
                        decision: Some(if policy < 4 {
                            DecisionRule::Threshold { threshold: 0.3 }
                        } else {
                            DecisionRule::Bands {
                                edges: vec![0.01, 0.2],
                                labels: vec!["low".into(), "mid".into(), "high".into()],
                            }
                        }),
                    },
                    missing_features: if policy & 1 == 0 {
                        MissingPolicy::RouteAsMissing
                    } else {
                        MissingPolicy::Reject
                    },
                    unknown_categories: if policy & 2 == 0 {
                        UnknownCategoryPolicy::RouteAsUnknown
                    } else {
                        UnknownCategoryPolicy::Reject
                    },
                    challengers: Default::default(),
                    unknown_features: if policy & 4 == 0 {
                        UnknownFeaturePolicy::Ignore
                    } else {
                        UnknownFeaturePolicy::Reject
                    },
                };
                routes.insert(name.clone(), route);
                names.push(name);
            }
        }
        let limits = Limits {
            max_batch_rows: 64,
            max_message_bytes: 4 * 1024 * 1024,
            max_concurrent_requests: 8,
            default_deadline: Duration::from_secs(60),
            max_connections: 16,
            max_streams_per_connection: 16,
        };
        Fixture {
            scorer: Scorer::new(registry, routes, limits),
            routes: names,
            _dir: dir,
        }
    })
}

fn check_error(error: &ServeError) {
    let code = code_of(error);
    assert_ne!(code, tonic::Code::Internal, "internal error: {error}");
    let text = error.to_string();
    assert!(!text.is_empty());
    assert!(
        text.chars().count() <= MAX_MESSAGE_CHARS,
        "error message of {} characters",
        text.chars().count()
    );
    if let ServeError::InvalidField { field, .. } = error {
        assert!(
            !field.is_empty(),
            "an invalid-argument error names its field: {error}"
        );
    }
}

fn check_response(response: &pb::ScoreResponse) {
    assert!(
        (0.0..=1.0).contains(&response.probability),
        "probability {} (margin {})",
        response.probability,
        response.margin
    );
    if let Some(e) = &response.explanation {
        if !e.contributions.is_empty() {
            let total = e.contributions.iter().fold(e.bias, |a, c| a + c.log_odds);
            let magnitude = e
                .contributions
                .iter()
                .fold(e.bias.abs() + response.log_odds.abs(), |a, c| {
                    a + c.log_odds.abs()
                });
            assert!(
                (total - response.log_odds).abs() <= 1e-9 * magnitude.max(1.0),
                "contributions sum to {total}, log-odds {}",
                response.log_odds
            );
        }
        assert!(e.reasons.iter().all(|r| r.weight > 0.0));
    }
}

fuzz_target!(|data: &[u8]| {
    let Some((&selector, message)) = data.split_first() else {
        return;
    };
    let f = fixture();
    let route = f.routes[(selector as usize >> 2) % f.routes.len()].clone();
    let keep_route = selector & 0x80 != 0;
    match selector & 3 {
        0 => {
            let Ok(mut request) = pb::ScoreRequest::decode(message) else {
                return;
            };
            if !keep_route {
                request.route = route;
            }
            match f.scorer.score(request) {
                Ok(response) => check_response(&response.answer),
                Err(error) => check_error(&error),
            }
        }
        1 => {
            let Ok(mut request) = pb::ScoreBatchRequest::decode(message) else {
                return;
            };
            if !keep_route {
                request.route = route;
            }
            let rows = request.rows.len();
            match f
                .scorer
                .score_batch(request, Instant::now() + Duration::from_secs(60))
            {
                Ok(response) => {
                    assert_eq!(response.answer.results.len(), rows);
                    response.answer.results.iter().for_each(check_response);
                }
                Err(error) => check_error(&error),
            }
        }
        _ => {
            let Ok(request) = pb::ModelFactsRequest::decode(message) else {
                return;
            };
            match ModelTarget::try_from(request) {
                Ok(ModelTarget::Model(name)) | Ok(ModelTarget::Route(name)) => {
                    assert!(!name.is_empty())
                }
                Err(error) => check_error(&error),
            }
        }
    }
});
