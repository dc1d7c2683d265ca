//! The scoring engine. PLACEHOLDER: to be completed by the engine work.
use crate::error::EvalError;
use crate::model::Model;

/// The compiled body of a model.
#[derive(Debug, Clone)]
pub enum Body {}

impl Model {
    /// The raw margin of one dense row.
    pub fn margin(&self, row: &[f64]) -> Result<f64, EvalError> {
        let _ = row;
        match self.body {}
    }
}
