//! The documented maximum of every text and repeated field a caller sends (the table in `docs/limits.md`), and how
//! a caller's value is quoted back: a bounded prefix with its full length, so that no status message, log line or
//! history entry grows with what a client sends.

use crate::serve::error::ServeError;

/// Route, model, challenger and version names in requests (model names are at most 128 characters by the model
/// format, route names by the configuration).
pub const NAME: usize = 128;
/// A model named in a request, `NAME` or `NAME@VERSION` (`Compare`, `Promote`, `ModelFacts`): two names and the `@`.
pub const MODEL_REF: usize = 2 * NAME + 1;
/// `PromoteRequest.requested_by`, `RestoreRequest.requested_by`.
pub const REQUESTED_BY: usize = 256;
/// `PromoteRequest.reason`, `RestoreRequest.reason`.
pub const REASON: usize = 1024;
/// Most characters of a caller's value repeated in a message.
pub const QUOTE: usize = 120;

/// A caller's text for a message: quoted, cut to [`QUOTE`] characters with its full length when longer.
pub fn quote(text: &str) -> String {
    let chars = text.chars().count();
    if chars <= QUOTE {
        format!("{text:?}")
    } else {
        let head: String = text.chars().take(QUOTE).collect();
        format!("{head:?}... ({chars} characters)")
    }
}

/// Refuses `value` of `field` when longer than `max` characters, naming the field, its length and the limit.
pub fn text(field: &str, value: &str, max: usize) -> Result<(), ServeError> {
    let chars = value.chars().count();
    if chars > max {
        return Err(ServeError::invalid(
            field,
            format!("is {chars} characters long; the limit is {max}"),
        ));
    }
    Ok(())
}

/// [`text`] with the [`NAME`] limit, for each (field, value).
pub fn names(fields: &[(&str, &str)]) -> Result<(), ServeError> {
    fields.iter().try_for_each(|(f, v)| text(f, v, NAME))
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn quotes_are_bounded_and_state_the_length() {
        assert_eq!(quote("fraud"), "\"fraud\"");
        let long = "x".repeat(100_000);
        let q = quote(&long);
        assert!(q.len() < 160, "{q}");
        assert!(q.ends_with("(100000 characters)"), "{q}");
    }

    #[test]
    fn long_names_are_refused_naming_field_and_limit() {
        let e = names(&[("route", "ok"), ("challenger", &"c".repeat(129))]).unwrap_err();
        assert_eq!(
            e.to_string(),
            "challenger: is 129 characters long; the limit is 128"
        );
        assert!(names(&[("route", &"r".repeat(128))]).is_ok());
    }
}
