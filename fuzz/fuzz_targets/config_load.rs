//! Bytes -> the server's configuration loader (`Config::load`): a TOML file, environment variables and `--set`
//! overrides, layered as `probity serve` layers them.
//!
//! The input is split on 0xFF bytes: the first part is the file's text, each later part one `NAME=VALUE` (an
//! environment variable when NAME starts with `PROBITY_`, otherwise a `--set` flag's text, read as the flag is). Checked beyond "no panic": a
//! refusal names where it is (a key path, a file or an override) in a message short enough to print on one screen,
//! and an accepted configuration keeps the rules the server relies on (positive limits, every route's model named,
//! challenger shares in [0, 1]).
#![no_main]

use std::io::Write;
use std::sync::OnceLock;

use libfuzzer_sys::fuzz_target;
use probity::serve::challenger::ChallengerMode;
use probity::serve::config::{parse_override, Config, ConfigError, Sources};

/// The longest refusal a caller may get back.
const MAX_MESSAGE_CHARS: usize = 4096;

fn file() -> &'static tempfile::NamedTempFile {
    static FILE: OnceLock<tempfile::NamedTempFile> = OnceLock::new();
    FILE.get_or_init(|| tempfile::NamedTempFile::new().expect("temp file"))
}

fuzz_target!(|data: &[u8]| {
    let mut parts = data.split(|&b| b == 0xFF);
    let text = parts.next().unwrap_or_default();
    let mut sources = Sources {
        file: None,
        env: Vec::new(),
        overrides: Vec::new(),
    };
    if !text.is_empty() {
        let path = file().path();
        let mut f = std::fs::File::create(path).expect("rewrite temp file");
        f.write_all(text).expect("write temp file");
        sources.file = Some(path.to_path_buf());
    }
    for part in parts.take(16) {
        let part = String::from_utf8_lossy(part);
        if part.starts_with("PROBITY_") {
            let (name, value) = part.split_once('=').unwrap_or((&part, ""));
            sources.env.push((name.to_string(), value.to_string()));
        } else {
            // As `--set` reads it.
            match parse_override(&part) {
                Ok(pair) => sources.overrides.push(pair),
                Err(error) => {
                    assert!(matches!(error, ConfigError::Override { .. }), "{error}");
                    return;
                }
            }
        }
    }
    match Config::load(&sources) {
        Ok(config) => {
            assert!(config.limits.max_batch_rows > 0);
            assert!(config.limits.max_message_bytes > 0);
            assert!(config.limits.max_concurrent_requests > 0);
            for (name, route) in &config.routes {
                assert_eq!(&route.name, name);
                assert!(!route.model.name.is_empty(), "route {name} without a model");
                let mut live = 0.0;
                for c in &route.challengers.list {
                    if let ChallengerMode::Live { share, .. } = c.mode {
                        assert!(
                            (0.0..=1.0).contains(&share),
                            "route {name}: share {share} accepted"
                        );
                        live += share;
                    }
                }
                assert!(
                    live <= 1.0 + 1e-12,
                    "route {name}: live shares add to {live}"
                );
            }
        }
        Err(error) => {
            let text = error.to_string();
            assert!(!text.is_empty());
            // A message may quote the value given; the fuzzer's values are short, so a long message is a loop.
            assert!(
                text.chars().count() <= MAX_MESSAGE_CHARS + data.len(),
                "message of {} characters",
                text.chars().count()
            );
            if let ConfigError::Invalid { key, .. } = &error {
                assert!(!key.is_empty(), "a refusal names its key: {text}");
            }
        }
    }
});
