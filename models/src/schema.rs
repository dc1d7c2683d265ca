//! The feature schema of a model: names, kinds, category lists, and the dense row encoding.
//! PLACEHOLDER: to be completed by the model-file work.

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

/// The ordered features of a model.
#[derive(Debug, Clone, PartialEq, Default)]
pub struct Schema {
    pub(crate) features: Vec<Feature>,
}
