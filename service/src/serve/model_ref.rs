//! How configuration, requests, the route history and the command line name a model: `NAME` or `NAME@VERSION`.
//!
//! Model names and versions are 1 to 128 characters of `A-Za-z0-9._-` (`docs/model-format.md`), so `@` cannot
//! occur in either and the text splits at it without doubt. A reference with a version ("pinned") names exactly one
//! loaded model; a bare name names the one version of that model that is loaded. The registry loads one version of
//! a name that any route names bare ([`crate::serve::registry::Registry::with_single_version`]), so a bare name
//! never has two candidates: dropping a second version of such a model into the directory cannot change what a route
//! serves without a configuration change (see README, "Model versions side by side").

use std::fmt;

/// A model named by name and, optionally, version.
#[derive(Debug, Clone, PartialEq, Eq, Hash, PartialOrd, Ord)]
pub struct ModelRef {
    /// The model name.
    pub name: String,
    /// The pinned version, if any.
    pub version: Option<String>,
}

/// Why a text is not a model reference.
#[derive(Debug, Clone, PartialEq, Eq, thiserror::Error)]
#[error("not a model (NAME or NAME@VERSION, each 1 to 128 of A-Za-z0-9._-), got `{0}`")]
pub struct BadModelRef(pub String);

/// The character rule of model names and versions.
pub fn valid_part(text: &str) -> bool {
    (1..=128).contains(&text.len())
        && text
            .bytes()
            .all(|b| b.is_ascii_alphanumeric() || b"._-".contains(&b))
}

impl ModelRef {
    /// A bare name.
    pub fn bare(name: impl Into<String>) -> ModelRef {
        ModelRef {
            name: name.into(),
            version: None,
        }
    }

    /// A name pinned to a version.
    pub fn pinned(name: impl Into<String>, version: impl Into<String>) -> ModelRef {
        ModelRef {
            name: name.into(),
            version: Some(version.into()),
        }
    }

    /// Reads `NAME` or `NAME@VERSION`. The error quotes at most 300 characters of the text.
    pub fn parse(text: &str) -> Result<ModelRef, BadModelRef> {
        let bad = || BadModelRef(text.chars().take(300).collect());
        match text.split_once('@') {
            None if valid_part(text) => Ok(ModelRef::bare(text)),
            Some((name, version)) if valid_part(name) && valid_part(version) => {
                Ok(ModelRef::pinned(name, version))
            }
            _ => Err(bad()),
        }
    }

    /// Whether a model of `name` and `version` is the one named (any version for a bare name).
    pub fn matches(&self, name: &str, version: &str) -> bool {
        self.name == name && self.version.as_deref().is_none_or(|v| v == version)
    }

    /// Whether a version is pinned.
    pub fn is_pinned(&self) -> bool {
        self.version.is_some()
    }
}

impl fmt::Display for ModelRef {
    fn fmt(&self, f: &mut fmt::Formatter<'_>) -> fmt::Result {
        match &self.version {
            Some(v) => write!(f, "{}@{v}", self.name),
            None => f.write_str(&self.name),
        }
    }
}

/// For models named in code (tests, fixtures): splits at the first `@` without checking the characters. Text from
/// a configuration, a request or a command line goes through [`ModelRef::parse`].
impl From<&str> for ModelRef {
    fn from(text: &str) -> ModelRef {
        match text.split_once('@') {
            Some((name, version)) => ModelRef::pinned(name, version),
            None => ModelRef::bare(text),
        }
    }
}

impl From<String> for ModelRef {
    fn from(text: String) -> ModelRef {
        ModelRef::from(text.as_str())
    }
}

impl PartialEq<&str> for ModelRef {
    fn eq(&self, other: &&str) -> bool {
        match (&self.version, other.split_once('@')) {
            (None, None) => self.name == *other,
            (Some(v), Some((n, w))) => self.name == n && v == w,
            _ => false,
        }
    }
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn reads_and_writes_both_forms() {
        assert_eq!(
            ModelRef::parse("fraud-gbm").unwrap(),
            ModelRef::bare("fraud-gbm")
        );
        let pinned = ModelRef::parse("fraud-gbm@2026.03-b").unwrap();
        assert_eq!(pinned, ModelRef::pinned("fraud-gbm", "2026.03-b"));
        assert_eq!(pinned.to_string(), "fraud-gbm@2026.03-b");
        assert!(pinned.matches("fraud-gbm", "2026.03-b"));
        assert!(!pinned.matches("fraud-gbm", "2026.02"));
        assert!(ModelRef::bare("fraud-gbm").matches("fraud-gbm", "anything"));
        for bad in [
            "",
            "@",
            "a@",
            "@v",
            "a@b@c",
            "a b",
            "a@v w",
            &"x".repeat(129),
        ] {
            assert!(ModelRef::parse(bad).is_err(), "{bad:?}");
        }
    }
}
