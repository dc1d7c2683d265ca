//! Rules of the `linear` object and its compilation into the engine's term list.

use super::finite;
use super::raw::{RawClosed, RawLinear, RawTerm};
use crate::engine::linear::{Linear, Term};
use crate::error::ModelError;
use crate::schema::{Feature, Schema};

/// Most terms in a linear model (`docs/model-format.md`, Limits).
pub const MAX_TERMS: usize = 100_000;

/// Checks and compiles a linear model.
pub(super) fn linear(raw: RawLinear, schema: &Schema) -> Result<Linear, ModelError> {
    let intercept = finite(raw.intercept, || "linear.intercept".into())?;
    if raw.terms.len() > MAX_TERMS {
        return Err(ModelError::TooLarge {
            path: "linear.terms".into(),
            what: "terms",
            got: raw.terms.len(),
            limit: MAX_TERMS,
        });
    }
    let mut terms = Vec::with_capacity(raw.terms.len());
    for (k, t) in raw.terms.into_iter().enumerate() {
        terms.push(term(t, k, schema)?);
    }
    Ok(Linear { intercept, terms })
}

/// The feature a term names, which must exist and be categorical or not as `want_categorical` says.
fn feature<'a>(
    schema: &'a Schema,
    index: u32,
    want_categorical: bool,
    path: &str,
) -> Result<&'a Feature, ModelError> {
    let Some(f) = schema.feature(index as usize) else {
        return Err(ModelError::rule(
            path,
            format!(
                "feature index {index} is out of range (the model has {} features)",
                schema.len()
            ),
        ));
    };
    if f.is_categorical() != want_categorical {
        let (is, needs) = if want_categorical {
            ("numeric", "categorical")
        } else {
            ("categorical", "numeric")
        };
        return Err(ModelError::rule(
            path,
            format!(
                "feature {index} (`{}`) is {is}; this term needs a {needs} feature",
                f.name
            ),
        ));
    }
    Ok(f)
}

fn optional(v: Option<f64>, path: impl FnOnce() -> String) -> Result<Option<f64>, ModelError> {
    v.map(|v| finite(v, path)).transpose()
}

fn all_finite(values: &[f64], path: impl Fn(usize) -> String) -> Result<(), ModelError> {
    for (i, &v) in values.iter().enumerate() {
        finite(v, || path(i))?;
    }
    Ok(())
}

fn term(t: RawTerm, k: usize, schema: &Schema) -> Result<Term, ModelError> {
    let base = format!("linear.terms[{k}]");
    let p = |rest: &str| format!("{base}.{rest}");
    match (t.numeric, t.categorical, t.binned) {
        (Some(n), None, None) => {
            feature(schema, n.feature, false, &p("numeric.feature"))?;
            let coefficient = finite(n.coefficient, || p("numeric.coefficient"))?;
            let center = finite(n.center, || p("numeric.center"))?;
            let scale = finite(n.scale, || p("numeric.scale"))?;
            if scale <= 0.0 {
                return Err(ModelError::rule(
                    p("numeric.scale"),
                    format!("scale must be > 0, got {scale}"),
                ));
            }
            let missing = optional(n.missing, || p("numeric.missing"))?;
            Ok(Term::Numeric {
                feature: n.feature as usize,
                coefficient,
                center,
                scale,
                missing,
            })
        }
        (None, Some(c), None) => {
            let f = feature(schema, c.feature, true, &p("categorical.feature"))?;
            let n = f.categories().len();
            if c.coefficients.len() != n {
                return Err(ModelError::rule(
                    p("categorical.coefficients"),
                    format!(
                        "{} coefficients for feature `{}`, which has {n} categories",
                        c.coefficients.len(),
                        f.name
                    ),
                ));
            }
            all_finite(&c.coefficients, |i| {
                p(&format!("categorical.coefficients[{i}]"))
            })?;
            Ok(Term::Categorical {
                feature: c.feature as usize,
                coefficients: c.coefficients,
                unknown: optional(c.unknown, || p("categorical.unknown"))?,
                missing: optional(c.missing, || p("categorical.missing"))?,
            })
        }
        (None, None, Some(b)) => {
            feature(schema, b.feature, false, &p("binned.feature"))?;
            all_finite(&b.edges, |i| p(&format!("binned.edges[{i}]")))?;
            if let Some(i) = b.edges.windows(2).position(|w| w[0] >= w[1]) {
                return Err(ModelError::rule(
                    p(&format!("binned.edges[{}]", i + 1)),
                    format!(
                        "edges must be strictly increasing: {} follows {}",
                        b.edges[i + 1],
                        b.edges[i]
                    ),
                ));
            }
            if b.contributions.len() != b.edges.len() + 1 {
                return Err(ModelError::rule(
                    p("binned.contributions"),
                    format!(
                        "{} contributions for {} edges; there must be one more contribution than edges",
                        b.contributions.len(),
                        b.edges.len()
                    ),
                ));
            }
            all_finite(&b.contributions, |i| {
                p(&format!("binned.contributions[{i}]"))
            })?;
            Ok(Term::Binned {
                feature: b.feature as usize,
                edges: b.edges,
                closed_left: b.closed == RawClosed::Left,
                contributions: b.contributions,
                missing: optional(b.missing, || p("binned.missing"))?,
            })
        }
        _ => Err(ModelError::rule(
            base.clone(),
            "a term needs exactly one of `numeric`, `categorical` and `binned`",
        )),
    }
}
