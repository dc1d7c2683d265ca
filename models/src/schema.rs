//! The feature schema of a model: names, kinds, category lists, and the dense row encoding.
//!
//! A dense row has one `f64` per feature, in schema order. A numeric value is itself and `NaN` means missing. A
//! categorical value is the index of its category as a float, `NaN` means missing, and any other value means a
//! category the model never saw; [`UNKNOWN_CATEGORY`] is the canonical form of the latter.

use std::collections::HashMap;

use crate::error::{CellError, ModelError};

/// The canonical dense encoding of a category the model does not know.
pub const UNKNOWN_CATEGORY: f64 = -1.0;

/// Most categories one feature may have (`docs/model-format.md`, Features).
pub const MAX_CATEGORIES: usize = 65_536;

/// Most features a model may have (`docs/model-format.md`, Limits).
pub const MAX_FEATURES: usize = 100_000;

/// Text cells a numeric feature reads as missing (after trimming).
const NUMERIC_MISSING: [&str; 5] = ["", "NA", "NaN", "nan", "null"];
/// Text cells a categorical feature reads as missing (after trimming), unless they are one of its categories.
const CATEGORICAL_MISSING: [&str; 3] = ["", "NA", "null"];

/// The kind of one feature.
#[derive(Debug, Clone, PartialEq)]
pub enum FeatureKind {
    /// A number; NaN means missing.
    Numeric,
    /// One of a fixed list of categories, encoded as its index.
    Categorical { categories: Vec<String> },
}

/// One input feature.
#[derive(Debug, Clone, PartialEq)]
pub struct Feature {
    /// Its name, unique in the model.
    pub name: String,
    /// Its kind.
    pub kind: FeatureKind,
}

impl Feature {
    /// Whether the feature is categorical.
    pub fn is_categorical(&self) -> bool {
        matches!(self.kind, FeatureKind::Categorical { .. })
    }

    /// The categories of a categorical feature; empty for a numeric one.
    pub fn categories(&self) -> &[String] {
        match &self.kind {
            FeatureKind::Numeric => &[],
            FeatureKind::Categorical { categories } => categories,
        }
    }
}

/// A map keyed by names from the model file, looked up with names from requests on every scored row: a fast
/// non-cryptographic hash (foldhash) with a per-map random seed. Requests never insert into it.
type NameMap = HashMap<String, usize, foldhash::fast::RandomState>;

/// The ordered features of a model, with hash lookups by name and by category text.
#[derive(Debug, Clone, PartialEq, Default)]
pub struct Schema {
    pub(crate) features: Vec<Feature>,
    by_name: NameMap,
    /// For each feature, `Some(category -> index)` when categorical.
    category_maps: Vec<Option<NameMap>>,
}

impl Schema {
    /// Builds a schema, checking the rules of `docs/model-format.md`: at most [`MAX_FEATURES`] features, names
    /// non-empty and unique, a categorical feature with 1 to [`MAX_CATEGORIES`] unique non-empty categories.
    /// Errors name the offending entry as `features[i]...`.
    pub fn new(features: Vec<Feature>) -> Result<Schema, ModelError> {
        if features.len() > MAX_FEATURES {
            return Err(ModelError::TooLarge {
                path: "features".into(),
                what: "features",
                got: features.len(),
                limit: MAX_FEATURES,
            });
        }
        let mut by_name = NameMap::with_capacity_and_hasher(features.len(), Default::default());
        let mut category_maps = Vec::with_capacity(features.len());
        for (i, feature) in features.iter().enumerate() {
            if feature.name.is_empty() {
                return Err(ModelError::rule(
                    format!("features[{i}].name"),
                    "feature name is empty",
                ));
            }
            if let Some(first) = by_name.insert(feature.name.clone(), i) {
                return Err(ModelError::rule(
                    format!("features[{i}].name"),
                    format!(
                        "duplicate feature name `{}` (also features[{first}])",
                        feature.name
                    ),
                ));
            }
            category_maps.push(match &feature.kind {
                FeatureKind::Numeric => None,
                FeatureKind::Categorical { categories } => Some(category_map(i, categories)?),
            });
        }
        Ok(Schema {
            features,
            by_name,
            category_maps,
        })
    }

    /// Number of features, the length of a dense row.
    pub fn len(&self) -> usize {
        self.features.len()
    }

    /// Whether the model takes no features.
    pub fn is_empty(&self) -> bool {
        self.features.is_empty()
    }

    /// All features in dense-row order.
    pub fn features(&self) -> &[Feature] {
        &self.features
    }

    /// The feature at index `i`.
    pub fn feature(&self, i: usize) -> Option<&Feature> {
        self.features.get(i)
    }

    /// The index of the feature called `name`.
    pub fn index_of(&self, name: &str) -> Option<usize> {
        self.by_name.get(name).copied()
    }

    /// The index of category `text` of categorical feature `feature` (exact match); `None` for an unknown
    /// category or a feature that is not categorical.
    pub fn category_index(&self, feature: usize, text: &str) -> Option<usize> {
        self.category_maps
            .get(feature)?
            .as_ref()?
            .get(text)
            .copied()
    }

    /// The index of category `text` of feature `feature`: matched exactly, then with surrounding blanks trimmed.
    /// Case matters (the training libraries' category lists are case-sensitive): `CHIP` is not `chip`.
    pub fn category_of(&self, feature: usize, text: &str) -> Option<usize> {
        let map = self.category_maps.get(feature)?.as_ref()?;
        map.get(text).or_else(|| map.get(text.trim())).copied()
    }

    /// Encodes one text cell for feature `feature` as a dense-row value; see [`Schema::read_text`].
    pub fn encode_text(&self, feature: usize, text: &str) -> Result<f64, CellError> {
        self.read_text(feature, text).map(|c| c.value)
    }

    /// Reads one text cell for feature `feature`: its dense-row value and what was noticed on the way. This is the
    /// one rule for a cell, offline and over gRPC:
    ///
    /// - numeric: after trimming, an empty cell, `NA`, `NaN`, `nan` or `null` is missing ([`CellNote::Missing`]);
    ///   a number that is not finite (`inf`, `-infinity`) is missing too ([`CellNote::NonFinite`]); anything else
    ///   must parse as a number;
    /// - categorical: a known category ([`Schema::category_of`]) gives its index; otherwise an empty cell, `NA` or
    ///   `null` (trimmed) is missing; anything else is [`UNKNOWN_CATEGORY`] ([`CellNote::UnknownCategory`]).
    pub fn read_text(&self, feature: usize, text: &str) -> Result<Cell, CellError> {
        let Some(f) = self.features.get(feature) else {
            return Err(CellError::NoSuchFeature {
                index: feature,
                len: self.features.len(),
            });
        };
        let trimmed = text.trim();
        if self
            .category_maps
            .get(feature)
            .and_then(Option::as_ref)
            .is_none()
        {
            if NUMERIC_MISSING.contains(&trimmed) {
                return Ok(Cell::noted(f64::NAN, CellNote::Missing));
            }
            let x = trimmed.parse::<f64>().map_err(|_| CellError::NotANumber {
                feature: f.name.clone(),
                text: text.to_string(),
            })?;
            return Ok(if x.is_finite() {
                Cell::plain(x)
            } else {
                Cell::noted(f64::NAN, CellNote::NonFinite)
            });
        }
        Ok(match self.category_of(feature, text) {
            Some(i) => Cell::plain(i as f64),
            None if CATEGORICAL_MISSING.contains(&trimmed) => {
                Cell::noted(f64::NAN, CellNote::Missing)
            }
            None => Cell::noted(UNKNOWN_CATEGORY, CellNote::UnknownCategory),
        })
    }
}

/// One cell read by [`Schema::read_text`].
#[derive(Debug, Clone, Copy, PartialEq)]
pub struct Cell {
    /// Its dense-row value.
    pub value: f64,
    /// What was noticed: `None` for an ordinary value.
    pub note: Option<CellNote>,
}

impl Cell {
    fn plain(value: f64) -> Self {
        Cell { value, note: None }
    }

    fn noted(value: f64, note: CellNote) -> Self {
        Cell {
            value,
            note: Some(note),
        }
    }
}

/// What reading a cell noticed beyond its value: the same kinds a gRPC answer warns of.
#[derive(Debug, Clone, Copy, PartialEq, Eq, PartialOrd, Ord, Hash)]
pub enum CellNote {
    /// No value; routed as missing.
    Missing,
    /// A number that is not finite; routed as missing.
    NonFinite,
    /// A category the model does not know; routed as unknown.
    UnknownCategory,
}

/// Checks one feature's category list and builds its lookup.
fn category_map(i: usize, categories: &[String]) -> Result<NameMap, ModelError> {
    let path = || format!("features[{i}].categories");
    if categories.is_empty() {
        return Err(ModelError::rule(
            path(),
            "a categorical feature needs at least one category",
        ));
    }
    if categories.len() > MAX_CATEGORIES {
        return Err(ModelError::TooLarge {
            path: path(),
            what: "categories",
            got: categories.len(),
            limit: MAX_CATEGORIES,
        });
    }
    let mut map = NameMap::with_capacity_and_hasher(categories.len(), Default::default());
    for (j, c) in categories.iter().enumerate() {
        if c.is_empty() {
            return Err(ModelError::rule(
                format!("{}[{j}]", path()),
                "category is empty",
            ));
        }
        if let Some(first) = map.insert(c.clone(), j) {
            return Err(ModelError::rule(
                format!("{}[{j}]", path()),
                format!("duplicate category `{c}` (also at index {first})"),
            ));
        }
    }
    Ok(map)
}

#[cfg(test)]
mod tests {
    use super::*;

    fn schema() -> Schema {
        Schema::new(vec![
            Feature {
                name: "amount".into(),
                kind: FeatureKind::Numeric,
            },
            Feature {
                name: "channel".into(),
                kind: FeatureKind::Categorical {
                    categories: vec!["pos".into(), "online".into(), "NA".into()],
                },
            },
        ])
        .unwrap()
    }

    #[test]
    fn numeric_cells() {
        let s = schema();
        for missing in ["", "  ", "NA", " NaN ", "nan", "null"] {
            assert!(s.encode_text(0, missing).unwrap().is_nan(), "{missing:?}");
        }
        assert_eq!(s.encode_text(0, " 12.5 ").unwrap(), 12.5);
        assert_eq!(s.encode_text(0, "-3e2").unwrap(), -300.0);
        let err = s.encode_text(0, "12,5").unwrap_err();
        assert_eq!(
            err,
            CellError::NotANumber {
                feature: "amount".into(),
                text: "12,5".into()
            }
        );
        assert!(err.to_string().contains("`12,5` is not a number"));
        // Not finite: missing, and said so (the gRPC path's rule for a number that is not finite).
        for text in ["inf", "-inf", "Infinity", " -infinity "] {
            let cell = s.read_text(0, text).unwrap();
            assert!(cell.value.is_nan(), "{text:?}");
            assert_eq!(cell.note, Some(CellNote::NonFinite), "{text:?}");
        }
        assert_eq!(s.read_text(0, "NA").unwrap().note, Some(CellNote::Missing));
        assert_eq!(s.read_text(0, "1e308").unwrap().note, None);
    }

    #[test]
    fn categorical_cells() {
        let s = schema();
        assert_eq!(s.encode_text(1, "online").unwrap(), 1.0);
        assert_eq!(s.encode_text(1, " pos ").unwrap(), 0.0);
        // A category literally called "NA" wins over the missing marker.
        assert_eq!(s.encode_text(1, "NA").unwrap(), 2.0);
        assert!(s.encode_text(1, "").unwrap().is_nan());
        assert!(s.encode_text(1, "null").unwrap().is_nan());
        assert_eq!(s.encode_text(1, "atm").unwrap(), UNKNOWN_CATEGORY);
        assert_eq!(
            s.read_text(1, "atm").unwrap().note,
            Some(CellNote::UnknownCategory)
        );
        // Case matters, and it is said: `ONLINE` is an unknown category, not `online`.
        assert_eq!(
            s.read_text(1, "ONLINE").unwrap(),
            Cell {
                value: UNKNOWN_CATEGORY,
                note: Some(CellNote::UnknownCategory)
            }
        );
        assert_eq!(s.category_of(1, " online "), Some(1));
        assert_eq!(
            s.encode_text(2, "x"),
            Err(CellError::NoSuchFeature { index: 2, len: 2 })
        );
    }

    #[test]
    fn lookups() {
        let s = schema();
        assert_eq!(s.len(), 2);
        assert_eq!(s.index_of("channel"), Some(1));
        assert_eq!(s.index_of("nope"), None);
        assert_eq!(s.category_index(1, "online"), Some(1));
        assert_eq!(s.category_index(0, "online"), None);
        assert_eq!(s.category_index(1, "atm"), None);
    }

    #[test]
    fn rules() {
        let num = |n: &str| Feature {
            name: n.into(),
            kind: FeatureKind::Numeric,
        };
        let err = Schema::new(vec![num("a"), num("a")]).unwrap_err();
        assert_eq!(err.path(), Some("features[1].name"));
        let cat = Feature {
            name: "c".into(),
            kind: FeatureKind::Categorical { categories: vec![] },
        };
        assert_eq!(
            Schema::new(vec![cat]).unwrap_err().path(),
            Some("features[0].categories")
        );
    }
}
