//! The OpenAPI document, generated from the handlers and types. The committed copy is openapi/openapi.json;
//! a test fails when the two differ (regenerate with `cargo run -- openapi > openapi/openapi.json`).

use utoipa::OpenApi;

#[derive(OpenApi)]
#[openapi(
    info(
        title = "tailtally",
        description = "Tail probabilities, quantiles and the law of a count of independent events (Poisson-binomial, binomial and Poisson parts), each estimate with its error bound.\n\nAssumption: exposures are independent unless the one-factor Gaussian dependence model is requested. Results support, and do not replace, the judgement of a qualified actuary or engineer and local regulation.",
        license(name = "MIT")
    ),
    paths(
        crate::api::routes::tail::tail,
        crate::api::routes::quantiles::quantiles,
        crate::api::routes::distribution::distribution,
        crate::api::routes::layers::layers,
        crate::api::routes::contributions::contributions,
        crate::api::routes::chart::chart,
        crate::api::routes::batch::batch,
        crate::api::routes::page::explorer,
        crate::api::routes::health::healthz,
        crate::api::routes::health::readyz,
        crate::api::routes::metrics::metrics,
        crate::api::routes::docs::docs,
    ),
    components(schemas(crate::api::problem::Problem, crate::api::problem::FieldError, crate::api::tables::TableSpec)),
    tags(
        (name = "probabilities", description = "Tail and point probabilities"),
        (name = "analytics", description = "Quantiles, the distribution, layers, stress and dependence"),
        (name = "operations", description = "Probes and service documents"),
    )
)]
pub struct ApiDoc;

pub fn document() -> utoipa::openapi::OpenApi {
    ApiDoc::openapi()
}

pub fn pretty_json() -> String {
    document().to_pretty_json().expect("the document serialises") + "\n"
}
