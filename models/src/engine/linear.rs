//! The compiled linear model: an intercept and terms added in file order.

use crate::engine::tree::known_category;
use crate::error::EvalError;
use crate::schema::Schema;

/// One validated term. Feature indices are inside the row and of the right kind (the loader checks).
#[derive(Debug, Clone, PartialEq)]
pub(crate) enum Term {
    /// `coefficient * ((x - center) / scale)`.
    Numeric {
        feature: usize,
        coefficient: f64,
        center: f64,
        scale: f64,
        missing: Option<f64>,
    },
    /// One-hot: the coefficient of the row's category.
    Categorical {
        feature: usize,
        coefficients: Vec<f64>,
        unknown: Option<f64>,
        missing: Option<f64>,
    },
    /// The contribution of the bin the value falls in; `contributions.len() == edges.len() + 1`.
    Binned {
        feature: usize,
        edges: Vec<f64>,
        /// Bins `[e[i-1], e[i])` when true, `(e[i-1], e[i]]` when false.
        closed_left: bool,
        contributions: Vec<f64>,
        missing: Option<f64>,
    },
}

/// A compiled linear model.
#[derive(Debug, Clone, PartialEq)]
pub(crate) struct Linear {
    pub(crate) intercept: f64,
    pub(crate) terms: Vec<Term>,
}

impl Linear {
    /// Bytes held by the terms.
    pub(crate) fn bytes(&self) -> usize {
        let f64s = |v: &Vec<f64>| v.len() * std::mem::size_of::<f64>();
        self.terms.len() * std::mem::size_of::<Term>()
            + self
                .terms
                .iter()
                .map(|t| match t {
                    Term::Numeric { .. } => 0,
                    Term::Categorical { coefficients, .. } => f64s(coefficients),
                    Term::Binned {
                        edges,
                        contributions,
                        ..
                    } => f64s(edges) + f64s(contributions),
                })
                .sum::<usize>()
    }
}

fn name(schema: &Schema, feature: usize) -> String {
    schema
        .feature(feature)
        .map(|f| f.name.clone())
        .unwrap_or_default()
}

impl Term {
    /// The feature this term reads.
    pub(crate) fn feature(&self) -> usize {
        match self {
            Term::Numeric { feature, .. }
            | Term::Categorical { feature, .. }
            | Term::Binned { feature, .. } => *feature,
        }
    }

    /// This term's contribution for one row.
    #[inline]
    pub(crate) fn contribution(&self, row: &[f64], schema: &Schema) -> Result<f64, EvalError> {
        let missing_err = |f: usize| EvalError::MissingValue {
            feature: name(schema, f),
        };
        match self {
            Term::Numeric {
                feature,
                coefficient,
                center,
                scale,
                missing,
            } => {
                let x = row[*feature];
                if x.is_nan() {
                    return missing.ok_or_else(|| missing_err(*feature));
                }
                // Standardise first, then weigh: the order in which a standardised fit's coefficient applies.
                Ok(coefficient * ((x - center) / scale))
            }
            Term::Categorical {
                feature,
                coefficients,
                unknown,
                missing,
            } => {
                let x = row[*feature];
                if x.is_nan() {
                    return missing.ok_or_else(|| missing_err(*feature));
                }
                match known_category(x, coefficients.len()) {
                    Some(c) => Ok(coefficients[c]),
                    None => unknown.ok_or_else(|| EvalError::UnknownCategory {
                        feature: name(schema, *feature),
                    }),
                }
            }
            Term::Binned {
                feature,
                edges,
                closed_left,
                contributions,
                missing,
            } => {
                let x = row[*feature];
                if x.is_nan() {
                    return missing.ok_or_else(|| missing_err(*feature));
                }
                // The bin index is the number of edges at or below x (closed left) or strictly below x
                // (closed right).
                let bin = if *closed_left {
                    edges.partition_point(|&e| e <= x)
                } else {
                    edges.partition_point(|&e| e < x)
                };
                Ok(contributions[bin])
            }
        }
    }
}

impl Linear {
    /// The margin of one row whose length the caller checked: intercept, then each term in file order.
    pub(crate) fn margin(&self, row: &[f64], schema: &Schema) -> Result<f64, EvalError> {
        let mut m = self.intercept;
        for term in &self.terms {
            m += term.contribution(row, schema)?;
        }
        if m.is_nan() {
            return Err(self.overflow(row, schema));
        }
        Ok(m)
    }

    /// Why the margin of `row` is NaN: terms are finite for finite input, so some contribution overflowed.
    #[cold]
    fn overflow(&self, row: &[f64], schema: &Schema) -> EvalError {
        let first = self.terms.iter().find_map(|term| {
            let feature = match term {
                Term::Numeric { feature, .. }
                | Term::Categorical { feature, .. }
                | Term::Binned { feature, .. } => *feature,
            };
            match term.contribution(row, schema) {
                Ok(c) if !c.is_finite() => Some((feature, c)),
                _ => None,
            }
        });
        let (feature, contribution) = first.unwrap_or((0, f64::NAN));
        EvalError::Overflow {
            feature: name(schema, feature),
            contribution,
        }
    }
}
