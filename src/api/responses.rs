//! The problem answers every computing route documents, written once for the OpenAPI annotations.

use std::collections::BTreeMap;
use utoipa::openapi::content::ContentBuilder;
use utoipa::openapi::response::{ResponseBuilder, ResponsesBuilder};
use utoipa::openapi::{Ref, RefOr, Response};

/// 400, 408, 413, 415, 422 and 503, each an `application/problem+json` [`super::problem::Problem`].
pub struct ComputingProblems;

/// Status and description of each problem answer of a computing route.
pub const COMPUTING_PROBLEMS: [(&str, &str); 6] = [
    ("400", "Malformed JSON, multipart body or table"),
    ("408", "Not answered within the request timeout"),
    (
        "413",
        "Body, table rows or work over the configured limits (the default work budget, --max-work 2e9, is about 200 s of one core)",
    ),
    ("415", "Neither JSON nor multipart/form-data, or a part of another type"),
    ("422", "Invalid field, with its JSON pointer (/exposures/<row>/<column> for a table's row)"),
    ("503", "All computing slots busy and the queue full (see Retry-After)"),
];

impl utoipa::IntoResponses for ComputingProblems {
    fn responses() -> BTreeMap<String, RefOr<Response>> {
        let mut b = ResponsesBuilder::new();
        for (status, description) in COMPUTING_PROBLEMS {
            let content = ContentBuilder::new().schema(Some(Ref::from_schema_name("Problem"))).build();
            b = b.response(
                status,
                ResponseBuilder::new().description(description).content("application/problem+json", content),
            );
        }
        b.build().into()
    }
}
