//! The JSON body extractor, so that a body the handlers cannot read is refused like every other
//! input: a problem naming the field and the rule it broke.
//!
//! The field is a path into the body in the schema's own style (`items[2].features`,
//! `[0].label`), `body` for the body as a whole, or `Content-Type` for the header. Syntax errors
//! are 400 (the text is not JSON), shape errors 422 (JSON, but not what the route takes), a body
//! over `server.body_limit` 413 and a missing or non-JSON content type 415. Field names
//! and rules quote the caller's text, so both are cut to a bounded length.

use axum::body::Bytes;
use axum::extract::{FromRequest, Request};
use axum::http::{header, HeaderMap, StatusCode};
use serde::de::DeserializeOwned;
use serde_json::error::Category;

use super::problem::Problem;

/// The field name for the body as a whole.
pub(super) const BODY: &str = "body";

/// Longest field name or rule echoed back (the caller chooses the text in both).
const MAX_ECHO_CHARS: usize = 200;

/// `axum::Json`, with every refusal answered as a problem that names field and rule.
pub(super) struct ApiJson<T>(pub T);

/// The configured body limit, read from the state for the 413's rule: a request extension
/// cost a boxed insert into the request's extension map on every request.
pub(super) trait BodyLimitOf {
    fn body_limit(&self) -> usize;
}

impl BodyLimitOf for super::ApiState {
    fn body_limit(&self) -> usize {
        self.config.server.body_limit
    }
}

impl<T: BodyLimitOf> BodyLimitOf for std::sync::Arc<T> {
    fn body_limit(&self) -> usize {
        T::body_limit(self)
    }
}

impl<S, T> FromRequest<S> for ApiJson<T>
where
    T: DeserializeOwned,
    S: BodyLimitOf + Send + Sync,
{
    type Rejection = Problem;

    async fn from_request(req: Request, state: &S) -> Result<Self, Self::Rejection> {
        let body = read_body(req, state).await?;
        parse(&body).map(ApiJson)
    }
}

/// A JSON body's bytes, whole: refused when its content type is not JSON, when it is over
/// `server.body_limit` or when it does not arrive whole.
pub(super) async fn read_body<S: BodyLimitOf>(req: Request, state: &S) -> Result<Bytes, Problem> {
    if !is_json(req.headers()) {
        return Err(Problem::new(
            StatusCode::UNSUPPORTED_MEDIA_TYPE,
            "unsupported-media-type",
            "Unsupported media type",
            "send the body as JSON with `Content-Type: application/json`",
        )
        .naming("Content-Type", "must be application/json"));
    }
    read_limited(req, state.body_limit()).await
}

/// A body's bytes, whole and within `limit` (`server.body_limit`), read here rather than by
/// axum's extractors, whose limit comes from a request extension (a boxed insert into the
/// request's extension map on every request).
async fn read_limited(req: Request, limit: usize) -> Result<Bytes, Problem> {
    use http_body_util::BodyExt;
    match http_body_util::Limited::new(req.into_body(), limit)
        .collect()
        .await
    {
        Ok(collected) => Ok(collected.to_bytes()),
        Err(e) if e.is::<http_body_util::LengthLimitError>() => Err(Problem::new(
            StatusCode::PAYLOAD_TOO_LARGE,
            "body-too-large",
            "Body too large",
            "the body is larger than the service accepts",
        )
        .naming(BODY, format!("at most {limit} bytes (server.body_limit)"))),
        Err(_) => Err(Problem::new(
            StatusCode::BAD_REQUEST,
            "unreadable-body",
            "Unreadable body",
            "the body could not be read",
        )
        .naming(BODY, "must arrive whole")),
    }
}

/// A body's bytes, of any content type, within `server.body_limit`: for the routes whose
/// body is optional.
pub(super) struct BodyBytes(pub Bytes);

impl<S: BodyLimitOf + Send + Sync> FromRequest<S> for BodyBytes {
    type Rejection = Problem;

    async fn from_request(req: Request, state: &S) -> Result<Self, Problem> {
        read_limited(req, state.body_limit()).await.map(BodyBytes)
    }
}

/// Whether the content type is `application/json` or an `application/…+json` type.
fn is_json(headers: &HeaderMap) -> bool {
    let Some(value) = headers
        .get(header::CONTENT_TYPE)
        .and_then(|v| v.to_str().ok())
    else {
        return false;
    };
    // Media types are case-insensitive (RFC 9110 §8.3.1); compared without a lowered copy.
    let essence = value.split(';').next().unwrap_or("").trim().as_bytes();
    let starts = |prefix: &str| {
        essence.len() >= prefix.len()
            && essence[..prefix.len()].eq_ignore_ascii_case(prefix.as_bytes())
    };
    let ends = |suffix: &str| {
        essence.len() >= suffix.len()
            && essence[essence.len() - suffix.len()..].eq_ignore_ascii_case(suffix.as_bytes())
    };
    essence.eq_ignore_ascii_case(b"application/json") || (starts("application/") && ends("+json"))
}

/// Reads a whole body as `T`; a refusal names where in the body it went wrong and why.
pub(super) fn parse<T: DeserializeOwned>(body: &[u8]) -> Result<T, Problem> {
    if body.iter().all(u8::is_ascii_whitespace) {
        return Err(Problem::new(
            StatusCode::BAD_REQUEST,
            "empty-body",
            "Empty body",
            "the body is empty; this route takes a JSON document",
        )
        .naming(BODY, "must not be empty; send a JSON document"));
    }
    // The common case, a body that reads, goes without the path tracking (a wrapper around
    // every key and value); only a refused body is read again to name where it went wrong.
    let mut reader = serde_json::Deserializer::from_slice(body);
    if let Ok(value) = T::deserialize(&mut reader).and_then(|value| reader.end().map(|()| value)) {
        return Ok(value);
    }
    let mut reader = serde_json::Deserializer::from_slice(body);
    let value: T = serde_path_to_error::deserialize(&mut reader).map_err(|e| {
        let path = e.path().to_string();
        refusal(body, &path, &e.into_inner())
    })?;
    reader.end().map_err(|e| refusal(body, ".", &e))?;
    Ok(value)
}

/// The problem for one deserialization error at `path` (serde_path_to_error's form, `.` for
/// the top level).
fn refusal(body: &[u8], path: &str, error: &serde_json::Error) -> Problem {
    let text = error.to_string();
    let message = text
        .strip_suffix(&format!(
            " at line {} column {}",
            error.line(),
            error.column()
        ))
        .unwrap_or(&text);
    let field = field_name(path, message);
    match error.classify() {
        Category::Data => {
            let rule = clip(message);
            Problem::new(
                StatusCode::UNPROCESSABLE_ENTITY,
                "invalid-body",
                "Invalid body",
                format!("`{field}`: {rule}"),
            )
            .naming(field, rule)
        }
        Category::Syntax | Category::Eof | Category::Io => {
            let hint = if names_a_non_finite_number(body, error.line(), error.column()) {
                "; NaN and Infinity are not JSON numbers"
            } else {
                ""
            };
            let rule = format!("must be valid JSON: {}{hint}", clip(&text));
            Problem::new(
                StatusCode::BAD_REQUEST,
                "malformed-json",
                "Malformed JSON",
                format!("`{field}`: {rule}"),
            )
            .naming(field, rule)
        }
    }
}

/// The path as a field name: serde names an unknown, missing or repeated member only in its
/// message, so that name is appended; the top level is [`BODY`].
fn field_name(path: &str, message: &str) -> String {
    let base = if path == "." { "" } else { path };
    let named = ["unknown field `", "missing field `", "duplicate field `"]
        .iter()
        .find_map(|prefix| message.strip_prefix(prefix))
        .and_then(|rest| rest.split('`').next())
        .filter(|name| !name.is_empty());
    let field = match named {
        Some(name) if base.is_empty() => name.to_owned(),
        Some(name) if !base.ends_with(name) => format!("{base}.{name}"),
        _ => base.to_owned(),
    };
    if field.is_empty() {
        BODY.to_owned()
    } else {
        clip(&field)
    }
}

/// Whether the text around a syntax error's position spells `NaN` or `Infinity`.
fn names_a_non_finite_number(body: &[u8], line: usize, column: usize) -> bool {
    let line_start = body
        .split(|&b| b == b'\n')
        .take(line.saturating_sub(1))
        .map(|l| l.len() + 1)
        .sum::<usize>();
    let at = (line_start + column).saturating_sub(1).min(body.len());
    let window = &body[at.saturating_sub(10)..(at + 10).min(body.len())];
    [b"NaN".as_slice(), b"Infinity"]
        .iter()
        .any(|word| window.windows(word.len()).any(|w| w == *word))
}

fn clip(text: &str) -> String {
    crate::text::clip(text, MAX_ECHO_CHARS)
}

#[cfg(test)]
mod tests {
    use super::*;
    use serde::Deserialize;

    #[test]
    fn json_media_types_are_recognized_in_any_case_with_parameters() {
        let is = |value: &str| {
            let mut headers = HeaderMap::new();
            headers.insert(header::CONTENT_TYPE, value.parse().unwrap());
            is_json(&headers)
        };
        // Media types are case-insensitive (RFC 9110 §8.3.1); `+json` is the structured
        // syntax suffix (RFC 6839 §3.1).
        for accepted in [
            "application/json",
            "Application/JSON; charset=utf-8",
            " application/json ",
            "application/vnd.example+json",
            "APPLICATION/PROBLEM+JSON",
        ] {
            assert!(is(accepted), "{accepted}");
        }
        for refused in [
            "text/plain",
            "application/jsonx",
            "application/json-seq",
            "json",
            "",
        ] {
            assert!(!is(refused), "{refused}");
        }
        assert!(!is_json(&HeaderMap::new()), "no content type");
    }

    #[derive(Debug, Deserialize)]
    #[serde(deny_unknown_fields)]
    #[allow(dead_code)]
    struct Item {
        label: f64,
        tags: Vec<String>,
    }

    fn refused(body: &str) -> (u16, String, String) {
        let problem = parse::<Vec<Item>>(body.as_bytes()).unwrap_err();
        let error = &problem.errors[0];
        (
            problem.status.as_u16(),
            error.field.clone(),
            error.rule.clone(),
        )
    }

    #[test]
    fn a_refusal_names_the_path_into_the_body_and_the_rule() {
        let (status, field, rule) =
            refused(r#"[{"label": 1, "tags": []}, {"label": "1", "tags": []}]"#);
        assert_eq!((status, field.as_str()), (422, "[1].label"));
        assert!(rule.contains("invalid type: string"), "{rule}");

        let (status, field, _) = refused(r#"[{"label": 1, "tags": [], "colour": 2}]"#);
        assert_eq!((status, field.as_str()), (422, "[0].colour"));
        let (status, field, rule) = refused(r#"[{"label": 1}]"#);
        assert_eq!((status, field.as_str()), (422, "[0].tags"));
        assert!(rule.contains("missing field"), "{rule}");
        let (status, field, _) = refused(r#"{"label": 1}"#);
        assert_eq!((status, field.as_str()), (422, BODY));
    }

    #[test]
    fn text_that_is_not_json_is_a_400_and_says_so() {
        let (status, field, rule) = refused(r#"[{"label": NaN, "tags": []}]"#);
        assert_eq!((status, field.as_str()), (400, "[0].label"));
        assert!(
            rule.contains("NaN and Infinity are not JSON numbers"),
            "{rule}"
        );
        let (status, field, rule) = refused("[] []");
        assert_eq!((status, field.as_str()), (400, BODY));
        assert!(rule.contains("trailing characters"), "{rule}");
        let (status, field, rule) = refused("  \n ");
        assert_eq!((status, field.as_str()), (400, BODY));
        assert!(rule.contains("must not be empty"), "{rule}");
        let deep = "[".repeat(100_000);
        let problem = parse::<serde_json::Value>(deep.as_bytes()).unwrap_err();
        assert_eq!(problem.status, StatusCode::BAD_REQUEST);
        assert!(
            problem.errors[0].rule.contains("recursion limit"),
            "{problem:?}"
        );
        // In a typed body the first level that cannot be an array says so instead.
        let (status, field, rule) = refused(&deep);
        assert_eq!((status, field.as_str()), (422, "[0][0]"), "{rule}");
    }

    #[test]
    fn echoed_names_are_cut_to_a_bounded_length() {
        let long = "k".repeat(100_000);
        let (status, field, rule) =
            refused(&format!(r#"[{{"label": 1, "tags": [], "{long}": 1}}]"#));
        assert_eq!(status, 422);
        assert!(
            field.chars().count() <= MAX_ECHO_CHARS + 1,
            "{}",
            field.len()
        );
        assert!(rule.chars().count() <= MAX_ECHO_CHARS + 1, "{}", rule.len());
    }
}
