//! The scoring engine: a model's compiled body and its evaluation on dense rows.
//!
//! See [`crate::schema`] for the dense row encoding. A tree ensemble is compiled into one flat node array
//! ([`tree`]); a linear model into a term list ([`linear`]). A batch of rows gives bit-identical margins to the
//! same rows scored one by one.

pub(crate) mod linear;
pub(crate) mod tree;

use crate::error::EvalError;
use crate::model::{BodyKind, Model, ModelSummary};

/// The compiled body of a model.
#[derive(Debug, Clone, PartialEq)]
pub(crate) enum Body {
    /// A tree ensemble.
    Ensemble(Box<tree::Ensemble>),
    /// A linear model.
    Linear(linear::Linear),
}

impl Model {
    /// The raw margin of one dense row (one value per feature, see [`crate::schema`]).
    ///
    /// A tree ensemble always gives a margin. A linear model fails on a missing value or an unknown category for
    /// a term that has no rule for that case.
    pub fn margin(&self, row: &[f64]) -> Result<f64, EvalError> {
        let expected = self.schema.len();
        if row.len() != expected {
            return Err(EvalError::RowLength {
                expected,
                got: row.len(),
            });
        }
        match &self.body {
            Body::Ensemble(e) => Ok(e.margin(row)),
            Body::Linear(l) => l.margin(row, &self.schema),
        }
    }

    /// The raw margins of a row-major batch: `rows` holds `out.len()` rows of one value per feature each.
    ///
    /// On an error in a row the error names it ([`EvalError::InRow`]) and `out` is partly written.
    pub fn margins(&self, rows: &[f64], out: &mut [f64]) -> Result<(), EvalError> {
        let n = self.schema.len();
        if n.checked_mul(out.len()) != Some(rows.len()) {
            return Err(EvalError::BatchShape {
                values: rows.len(),
                out: out.len(),
                features: n,
            });
        }
        match &self.body {
            Body::Ensemble(e) => e.margins(rows, n, out),
            Body::Linear(l) => {
                for (r, o) in out.iter_mut().enumerate() {
                    let row = &rows[r * n..(r + 1) * n];
                    *o = l
                        .margin(row, &self.schema)
                        .map_err(|error| EvalError::InRow {
                            row: r,
                            error: Box::new(error),
                        })?;
                }
            }
        }
        Ok(())
    }

    /// Counts that describe the model.
    pub fn summary(&self) -> ModelSummary {
        match &self.body {
            Body::Ensemble(e) => ModelSummary {
                kind: BodyKind::Ensemble,
                trees: e.trees(),
                nodes: e.nodes(),
                leaves: e.leaves(),
                max_depth: e.max_depth(),
                terms: 0,
                engine_bytes: e.bytes(),
            },
            Body::Linear(l) => ModelSummary {
                kind: BodyKind::Linear,
                trees: 0,
                nodes: 0,
                leaves: 0,
                max_depth: 0,
                terms: l.terms.len(),
                engine_bytes: l.bytes(),
            },
        }
    }
}
