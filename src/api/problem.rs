//! Problem details (RFC 9457): the one error type of the service. Every 4xx and 5xx answer is
//! `application/problem+json`, and validation problems carry the JSON pointers (RFC 6901) of the fields at fault.

use crate::portfolio::Violation;
use axum::http::{header, HeaderValue, StatusCode};
use axum::response::{IntoResponse, Response};
use serde::Serialize;
use utoipa::ToSchema;

/// A problem-details document.
#[derive(Debug, Clone, Serialize, ToSchema)]
pub struct Problem {
    /// URI reference identifying the problem type.
    #[serde(rename = "type")]
    pub kind: String,
    pub title: String,
    pub status: u16,
    pub detail: String,
    /// Each offending field, by JSON pointer into the request document.
    #[serde(skip_serializing_if = "Vec::is_empty")]
    pub errors: Vec<FieldError>,
}

#[derive(Debug, Clone, Serialize, ToSchema)]
pub struct FieldError {
    /// JSON pointer (RFC 6901) to the field, e.g. "/portfolio/probabilities/3".
    pub pointer: String,
    pub detail: String,
}

impl Problem {
    pub fn new(status: StatusCode, slug: &str, title: &str, detail: impl Into<String>) -> Problem {
        Problem {
            kind: format!("/problems/{slug}"),
            title: title.into(),
            status: status.as_u16(),
            detail: detail.into(),
            errors: vec![],
        }
    }

    pub fn malformed(detail: impl Into<String>) -> Problem {
        Problem::new(StatusCode::BAD_REQUEST, "malformed-json", "Malformed JSON", detail)
    }

    pub fn invalid(errors: Vec<Violation>) -> Problem {
        let detail = match errors.first() {
            Some(v) if errors.len() == 1 => format!("{}: {}", v.pointer, v.detail),
            Some(v) => format!("{} problems; the first: {}: {}", errors.len(), v.pointer, v.detail),
            None => "the request is invalid".into(),
        };
        Problem {
            errors: errors.into_iter().map(|v| FieldError { pointer: v.pointer, detail: v.detail }).collect(),
            ..Problem::new(StatusCode::UNPROCESSABLE_ENTITY, "invalid-request", "Invalid request", detail)
        }
    }

    pub fn too_large(detail: impl Into<String>) -> Problem {
        Problem::new(StatusCode::PAYLOAD_TOO_LARGE, "too-large", "Request too large", detail)
    }

    pub fn unsupported_media(detail: impl Into<String>) -> Problem {
        Problem::new(StatusCode::UNSUPPORTED_MEDIA_TYPE, "unsupported-media-type", "Unsupported media type", detail)
    }

    pub fn internal(detail: impl Into<String>) -> Problem {
        Problem::new(StatusCode::INTERNAL_SERVER_ERROR, "internal", "Internal error", detail)
    }

    pub fn overloaded(detail: impl Into<String>) -> Problem {
        Problem::new(StatusCode::SERVICE_UNAVAILABLE, "overloaded", "Service overloaded", detail)
    }

    pub fn not_found(path: &str) -> Problem {
        Problem::new(StatusCode::NOT_FOUND, "not-found", "Not found", format!("no route for {path}"))
    }
}

impl IntoResponse for Problem {
    fn into_response(self) -> Response {
        let status = StatusCode::from_u16(self.status).unwrap_or(StatusCode::INTERNAL_SERVER_ERROR);
        let body = serde_json::to_vec(&self).unwrap_or_else(|_| b"{}".to_vec());
        let mut res = (status, body).into_response();
        res.headers_mut().insert(header::CONTENT_TYPE, HeaderValue::from_static("application/problem+json"));
        res.extensions_mut().insert(ProblemType(self.kind));
        res
    }
}

/// The `type` of a problem answer, left in the response's extensions for the metrics middleware.
#[derive(Debug, Clone)]
pub struct ProblemType(pub String);

/// RFC 6901 escaping of one reference token.
pub fn escape_token(s: &str) -> String {
    s.replace('~', "~0").replace('/', "~1")
}
