//! The OpenAPI document, generated from the handlers and types. The committed copy is openapi/openapi.json;
//! a test fails when the two differ (regenerate with `cargo run -- openapi > openapi/openapi.json`).
//!
//! Field ranges are stated on the wire types (`#[schema(minimum = ..)]`). What the derive cannot state is added
//! here, in `rules`: ranges of the items of number lists, closed and named variants of the tagged unions with
//! their discriminators, rules that tie fields together, and the types of the engine's vocabulary, which
//! carries no schema attributes. Every rule states one that the service enforces with a 422 (or, for list
//! sizes, a 413 at the default limits of `tailtally --help`), never a stricter one: a request the document
//! calls invalid is refused, and one it calls valid is refused only by a rule between values that JSON Schema
//! cannot express (one loading per probability, the work budget, a range no longer than the limit).

use serde_json::{json, Value};
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
        crate::api::routes::reverse_stress::reverse_stress,
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

/// The document as served and committed: the derived one with `rules` applied.
pub fn pretty_json() -> String {
    let mut doc = serde_json::to_value(document()).expect("the document serialises");
    rules(&mut doc);
    serde_json::to_string_pretty(&doc).expect("the document serialises") + "\n"
}

/// The most probabilities held per portfolio at the default limits (`--max-listed-exposures`).
const LISTED: u64 = 10_000_000;
/// The most thresholds, levels or layers per request at the default limits (`--max-thresholds`).
const THRESHOLDS: u64 = 10_000;
/// The largest total Poisson rate (`portfolio::Limits::max_poisson_rate`).
const POISSON_RATE: f64 = 1e9;

fn rules(doc: &mut Value) {
    examples(doc);
    doc["info"]["license"]["identifier"] = json!("MIT");
    multipart(doc);
    integer_ranges(&mut doc["components"]["schemas"]);
    let schemas = doc["components"]["schemas"].as_object_mut().expect("components.schemas");
    let probability = json!({"minimum": 0.0, "maximum": 1.0});
    let loading = json!({"minimum": 0.0, "exclusiveMaximum": 1.0});
    let level = json!({"exclusiveMinimum": 0.0, "exclusiveMaximum": 1.0});

    let portfolio = &mut schemas["PortfolioSpec"]["properties"];
    list(&mut portfolio["probabilities"], &probability, LISTED);
    list(&mut portfolio["loadings"], &loading, LISTED);
    list(&mut portfolio["units"], &json!({"minimum": 1, "maximum": 1_000_000_000}), LISTED);
    list(&mut portfolio["poisson_rates"], &json!({"minimum": 0.0, "maximum": POISSON_RATE}), LISTED);
    merge(&mut portfolio["ids"], &json!({"maxItems": LISTED}));
    merge(&mut schemas["ExposureId"]["oneOf"][0], &json!({"minimum": i64::MIN, "maximum": i64::MAX}));

    for (name, key) in [("TailRequest", "methods"), ("QuantilesRequest", "methods")] {
        merge(&mut schemas[name]["properties"][key], &json!({"uniqueItems": true}));
    }
    list(&mut schemas["QuantilesRequest"]["properties"]["levels"], &level, THRESHOLDS);
    list(&mut schemas["LayersRequest"]["properties"]["tail_levels"], &level, THRESHOLDS);
    // The chart draws the exact law as bars, and `auto` has no single curve: the other methods only.
    schemas["ChartRequest"]["properties"]["methods"]["items"] =
        json!({"type": "string", "enum": ["normal", "edgeworth", "poisson", "saddlepoint"]});

    merge(&mut schemas["ContributionsRequest"]["properties"]["top"], &json!({"maximum": u64::MAX}));

    // Rules between fields as conditions (if/then, dependentSchemas) rather than a union of object shapes,
    // which code generators would turn into one type per alternative.
    // At least one layer or one tail level.
    merge(
        &mut schemas["LayersRequest"],
        &json!({"if": {"properties": {"layers": {"maxItems": 0}}},
                "then": {"required": ["tail_levels"], "properties": {"tail_levels": {"minItems": 1}}}}),
    );
    // `from` and `to` together, and then no `mass`; null counts as absent.
    merge(
        &mut schemas["DistributionRequest"],
        &json!({"dependentSchemas": {
            "from": {"if": {"properties": {"from": {"type": "integer"}}},
                     "then": {"required": ["to"], "properties": {"to": {"type": "integer"}, "mass": {"type": "null"}}}},
            "to": {"if": {"properties": {"to": {"type": "integer"}}},
                   "then": {"required": ["from"], "properties": {"from": {"type": "integer"}}}},
        }}),
    );

    // The factor model's tolerance: relative 0 (relative accuracy off) or in [1e-13, 1), not both 0.
    let tolerance = &mut schemas["FactorTolerance"];
    tolerance["properties"]["relative"] = json!({
        "description": tolerance["properties"]["relative"]["description"],
        "example": 1e-7,
        "oneOf": [{"type": "null"}, {"type": "number", "const": 0.0},
                  {"type": "number", "minimum": 1e-13, "exclusiveMaximum": 1.0}],
    });
    merge(
        tolerance,
        &json!({"not": {"required": ["relative", "absolute"],
                        "properties": {"relative": {"const": 0.0}, "absolute": {"const": 0.0}}}}),
    );

    // One-key objects (serde's externally tagged enums): the key names the variant, its value a number.
    for (name, range) in [("Stress", json!({"minimum": 0.0})), ("Tolerance", json!({"exclusiveMinimum": 0.0}))] {
        for variant in schemas[name]["oneOf"].as_array_mut().expect("a oneOf") {
            for (_, value) in variant["properties"].as_object_mut().expect("properties") {
                merge(value, &range);
            }
            variant["additionalProperties"] = json!(false);
        }
    }
    // Internally tagged enums: each variant a closed, named schema, and the tag their discriminator.
    tagged(schemas, "FamilySpec", "Family", "kind");
    tagged(schemas, "SeveritySpec", "Severity", "kind");
    // A listed severity: sizes in 1..=1e9, probabilities in [0, 1] (their sum is a rule between values).
    let listed = &mut schemas["SeverityListed"]["properties"];
    let most = crate::portfolio::validate::MAX_SEVERITY_SIZES;
    list(&mut listed["sizes"], &json!({"minimum": 1, "maximum": 1_000_000_000}), most);
    list(&mut listed["probabilities"], &probability, most);
    merge(&mut listed["sizes"], &json!({"minItems": 1}));
    tagged(schemas, "Dependence", "Dependence", "model");
    merge(&mut schemas["FamilyLogistic"]["properties"]["scores"], &json!({"maxItems": LISTED}));
}

/// Each JSON operation's example request (openapi/examples/requests.json) and, beside its 200 answer, the
/// service's answer to it (responses.json, written by scripts/make_examples.py; tests/openapi_examples.rs
/// checks that the service still answers so).
fn examples(doc: &mut Value) {
    let requests: Value = serde_json::from_str(include_str!("../../openapi/examples/requests.json")).expect("JSON");
    let responses: Value = serde_json::from_str(include_str!("../../openapi/examples/responses.json")).expect("JSON");
    let ndjson = |lines: &Value| -> Value {
        let lines = lines.as_array().expect("lines");
        Value::String(lines.iter().map(|l| l.to_string() + "\n").collect())
    };
    let batch = &mut doc["paths"]["/v1/batch"]["post"];
    batch["requestBody"]["required"] = json!(true);
    batch["requestBody"]["content"]["application/x-ndjson"]["example"] = ndjson(&requests["batch"]);
    if let Some(answer) = responses.get("batch") {
        batch["responses"]["200"]["content"]["application/x-ndjson"]["example"] = ndjson(answer);
    }
    for (name, request) in requests.as_object().expect("an object").iter().filter(|(k, _)| *k != "batch") {
        // A line's key is the route's last segment in snake case (`reverse_stress` for /v1/reverse-stress).
        let op = &mut doc["paths"][format!("/v1/{}", name.replace('_', "-"))]["post"];
        // Every question needs its body (utoipa leaves `required` out, so generated clients made it optional).
        op["requestBody"]["required"] = json!(true);
        op["requestBody"]["content"]["application/json"]["example"] = request.clone();
        if let Some(answer) = responses.get(name) {
            op["responses"]["200"]["content"]["application/json"]["example"] = answer.clone();
        }
    }
}

/// The multipart form: its `request` part is the route's JSON request with the optional `table` object, sent
/// as JSON; its `exposures` part a CSV table or an Arrow IPC stream.
fn multipart(doc: &mut Value) {
    doc["components"]["schemas"]["TableUpload"]["properties"]["request"]["properties"] =
        json!({"table": {"$ref": "#/components/schemas/TableSpec"}});
    let encoding = json!({"request": {"contentType": "application/json"},
                          "exposures": {"contentType": "text/csv, application/vnd.apache.arrow.stream"}});
    for (_, item) in doc["paths"].as_object_mut().expect("paths") {
        let form = item.pointer_mut("/post/requestBody/content/multipart~1form-data");
        if let Some(form) = form {
            form["encoding"] = encoding.clone();
        }
    }
}

/// The upper end of every unsigned integer field whose type gives the only bound (u32 and u64 counts): a
/// larger integer is refused as out of range, and a document without the bound would call it valid.
fn integer_ranges(schema: &mut Value) {
    match schema {
        Value::Object(map) => {
            let top = match map.get("format").and_then(Value::as_str) {
                Some("u-int64") => Some(json!(u64::MAX)),
                Some("u-int32") => Some(json!(u32::MAX)),
                _ => None,
            };
            if let Some(top) = top {
                map.entry("maximum").or_insert(top);
            }
            map.values_mut().for_each(integer_ranges);
        }
        Value::Array(items) => items.iter_mut().for_each(integer_ranges),
        _ => {}
    }
}

/// A list of numbers: each item within `range`, at most `max` items.
fn list(schema: &mut Value, range: &Value, max: u64) {
    merge(&mut schema["items"], range);
    merge(schema, &json!({"maxItems": max}));
}

/// Add the keys of `extra` to the object `schema`.
fn merge(schema: &mut Value, extra: &Value) {
    let target = schema.as_object_mut().expect("a schema object");
    for (k, v) in extra.as_object().expect("an object") {
        target.insert(k.clone(), v.clone());
    }
}

/// The variants of the `oneOf` schema `name`, tagged by `tag`, as closed component schemas named `prefix` +
/// the tag's value in CamelCase, referred to by the union with a discriminator.
fn tagged(schemas: &mut serde_json::Map<String, Value>, name: &str, prefix: &str, tag: &str) {
    let variants = schemas[name]["oneOf"].as_array().expect("a oneOf").clone();
    let mut refs = Vec::new();
    let mut mapping = serde_json::Map::new();
    for mut variant in variants {
        let value = variant["properties"][tag]["enum"][0].as_str().expect("a tag value").to_string();
        let camel: String = value.split('_').map(|w| w[..1].to_ascii_uppercase() + &w[1..]).collect();
        let reference = format!("#/components/schemas/{prefix}{camel}");
        variant["additionalProperties"] = json!(false);
        schemas.insert(format!("{prefix}{camel}"), variant);
        refs.push(json!({"$ref": reference}));
        mapping.insert(value, json!(reference));
    }
    schemas[name]["oneOf"] = Value::Array(refs);
    schemas[name]["discriminator"] = json!({"propertyName": tag, "mapping": mapping});
}
