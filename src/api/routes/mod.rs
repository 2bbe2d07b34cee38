//! One file per route. The JSON questions' routes are all the same three steps (decode the question, answer
//! it off the async threads, encode the answer), written once by [`json_route!`]; each route file names its
//! question, types and documentation.

/// A POST route that decodes a JSON question (or a multipart one with a table of exposures, `api::tables`), answers it off the async threads (`api::offload`) and
/// encodes the answer as JSON, with its OpenAPI operation (the shared problem answers included).
macro_rules! json_route {
    ($(#[$doc:meta])* $name:ident: $question:ty, $req:ty => $resp:ty,
     path = $path:literal, tag = $tag:literal, ok = $ok:literal) => {
        $(#[$doc])*
        #[utoipa::path(
            post, path = $path, tag = $tag,
            request_body(
                description = "The request as JSON, or as multipart/form-data with the exposures as a table (`TableUpload`)",
                content(($req = "application/json"), (crate::api::tables::TableUpload = "multipart/form-data"))
            ),
            responses((status = 200, description = $ok, body = $resp), ComputingProblems)
        )]
        pub async fn $name(
            axum::extract::State(state): axum::extract::State<crate::api::AppState>,
            admitted: Option<axum::Extension<crate::api::Admitted>>,
            crate::api::extract::Body(req): crate::api::extract::Body<$req>,
        ) -> Result<crate::api::encode::Json<$resp>, crate::api::problem::Problem> {
            let admitted = admitted.map(|axum::Extension(a)| a);
            Ok(crate::api::encode::Json(crate::api::offload::answer::<$question>(req, state.limits.clone(), admitted).await?))
        }
    };
}

pub mod batch;
pub mod chart;
pub mod contributions;
pub mod distribution;
pub mod docs;
pub mod health;
pub mod layers;
pub mod metrics;
pub mod page;
pub mod quantiles;
pub mod reverse_stress;
pub mod tail;
