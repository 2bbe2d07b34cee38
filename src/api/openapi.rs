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
    // Rules the service enforces that no keyword states: in words, so that a client (and the acceptance
    // hooks, scripts/acceptance_hooks.py) can meet them.
    append(
        &mut schemas["PortfolioSpec"]["properties"]["units"]["description"],
        "The exact engine works on the lattice of totals: its width in steps is about the sum of the units \
         (a group's window of counts times its units, a family's members times theirs, a compound source's \
         sizes times its window of counts) over their greatest common divisor. The work of a question, that \
         width plus the exposures (plus the Poisson part's window, 2 r(rate) + 4 with r(v) = 25 + sqrt(625 + \
         150 v)) times its evaluations, must fit the work budget (`--max-work`, 2e9 by default, about 200 s \
         of one core); past it the answer is 413 with the factor by which coarser units would fit: divide every \
         unit and severity size by it and round.",
    );
    append(
        &mut schemas["ChartRequest"]["description"],
        "A chart evaluates up to 300 bars with the exact method and again with each overlay method, so its work \
         is (listed exposures and family members + 64 per group + 64 + the lattice width in units, 0 for a \
         count + the windows of the wide parts, as for `LayersRequest`) x (300 x (1 + overlay methods) + 1); \
         past the work budget (`--max-work`, 2e9 by default) the answer is 413.",
    );
    append(
        &mut schemas["LayersRequest"]["description"],
        "Each layer costs 3 exact evaluations and each tail level about 5 (its quantile's search and the \
         expectation beyond), plus 40 under `one_factor_gaussian` in loss units, so the work is (listed \
         exposures and family members + 64 per group + 64 + the lattice width in units, 0 for a count + the \
         windows of the wide parts) x (3 x layers + 5 x tail levels (+ 40)) x (150 under \
         `one_factor_gaussian`) x (2 under a stress). The windows of the wide parts: for a count, per group of \
         size m, min(m + 1, 2 r(m / 4) + 4) - 64 when above 0, and with a Poisson part (a rate above 0 in \
         `poisson_rates`) 2 r(total rate x the stress factor when above 1) + 4, where r(v) = 25 + sqrt(625 + \
         150 v); every question counts these windows in its work. Past the work budget (`--max-work`, 2e9 by \
         default) the answer is 413.",
    );
    append(
        &mut schemas["QuantilesRequest"]["description"],
        "A quantile's search costs about 4 exact tails per level and method (its probes share tilted laws), so \
         the work is (listed exposures and family members + 64 per group + 64 + the lattice width in units, 0 \
         for a count + the windows of the wide parts, as for `LayersRequest`) x (4 x levels x methods) x (150 \
         under `one_factor_gaussian`) x (2 under a stress); past the work budget (`--max-work`, 2e9 by \
         default) the answer is 413.",
    );
    let unbounded = "With a Poisson part (a rate above 0 here, or a compound source) the total has no largest \
         value, and a threshold, count or range end above 1e9 is refused (422).";
    append(&mut schemas["PortfolioSpec"]["properties"]["poisson_rates"]["description"], unbounded);
    append(&mut schemas["PortfolioSpec"]["properties"]["compound_sources"]["description"], unbounded);
    append(
        &mut schemas["Dependence"]["description"],
        "Under `one_factor_gaussian`, a portfolio in loss units (a `units` value anywhere, a units column of a \
         table) or with compound sources is answered by every question that takes a dependence model (the \
         sources do not load on the factor); /v1/contributions then builds each exposure's law without it at \
         every node, one per distinct probability, units and loading, and a book past the work budget by \
         that count is answered 413.",
    );
    multipart(doc);
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

/// The multipart form of each computing route, `<Route>Upload`: its `request` part is the route's JSON
/// request with the optional `table` object (`<Route>UploadRequest`, a copy of the request's schema, which
/// is closed), sent as JSON; its `exposures` part a CSV table or an Arrow IPC stream (`ExposuresTable`).
/// Run last, so that the copies carry every rule added above.
fn multipart(doc: &mut Value) {
    let encoding = json!({"request": {"contentType": "application/json"},
                          "exposures": {"contentType": "text/csv, application/vnd.apache.arrow.stream"}});
    let mut routes = Vec::new();
    for (path, item) in doc["paths"].as_object_mut().expect("paths") {
        let Some(content) = item.pointer_mut("/post/requestBody/content") else { continue };
        if content.get("multipart/form-data").is_none() {
            continue;
        }
        let request = content["application/json"]["schema"]["$ref"].as_str().expect("a JSON request schema");
        let request = request.rsplit('/').next().expect("a name").to_string();
        let form = format!("{}Upload", request.strip_suffix("Request").unwrap_or(&request));
        content["multipart/form-data"] =
            json!({"schema": {"$ref": format!("#/components/schemas/{form}")}, "encoding": encoding});
        item["post"]["requestBody"]["description"] = json!(format!(
            "The request as JSON, or as multipart/form-data (`{form}`) with the listed exposures as a CSV or Arrow table"
        ));
        routes.push((path.clone(), request, form));
    }
    let schemas = doc["components"]["schemas"].as_object_mut().expect("components.schemas");
    schemas.remove("TableUpload");
    for (path, request, form) in routes {
        let mut part = schemas[&request].clone();
        // An object or absent: the service refuses `"table": null`.
        part["properties"]["table"] = json!({"$ref": "#/components/schemas/TableSpec"});
        part["description"] = json!(format!(
            "The `request` part of a multipart {path} request: `{request}` with the optional `table` object naming \
             the columns of the `exposures` part, sent as application/json (or without a Content-Type)."
        ));
        schemas.insert(format!("{form}Request"), part);
        schemas.insert(
            form.clone(),
            json!({
                "description": format!(
                    "{path} as multipart/form-data: the JSON request as the part `request`, the listed exposures as the \
                     part `exposures` (`ExposuresTable`). A `table` object needs the `exposures` part."
                ),
                "type": "object",
                "required": ["request"],
                "additionalProperties": false,
                "properties": {
                    "request": {"$ref": format!("#/components/schemas/{form}Request")},
                    "exposures": {"$ref": "#/components/schemas/ExposuresTable"},
                },
                // The condition names the properties it requires (a linter asks so).
                "if": {"properties": {"request": {"required": ["table"], "properties": {"table": {"type": "object"}}}}},
                "then": {"required": ["exposures"], "properties": {"exposures": {"type": "string"}}},
            }),
        );
    }
    schemas.insert("ExposuresTable".into(), exposures_table());
    // A name the table must hold; the delimiter one ASCII character other than a quote or a line break.
    let table = &mut schemas["TableSpec"]["properties"];
    for column in ["probability", "id", "units"] {
        merge(&mut table[column], &json!({"minLength": 1}));
    }
    merge(
        &mut table["delimiter"],
        &json!({"minLength": 1, "maxLength": 1,
                "pattern": "^[\\u0000-\\u0009\\u000B\\u000C\\u000E-\\u0021\\u0023-\\u007F]$"}),
    );
}

/// The `exposures` part: the rules of the table in words (what a schema for bytes cannot state), an example.
fn exposures_table() -> Value {
    let units = crate::portfolio::validate::MAX_UNITS;
    json!({
        "description": format!("The listed exposures as a table, one row per exposure, appended to \
`portfolio.probabilities` after those listed in the JSON part (with n of those, row r has index n + r).

CSV (`text/csv`): a header row of column names, then one row per exposure. Fields are separated by \
    `table.delimiter` (default `,`) and quoted with `\"` where they hold the delimiter, a quote or a line break; \
    names and fields are read with surrounding white space removed, so a name in `table` with surrounding white \
space matches no CSV column. Columns in any order, others ignored, the three below each under one name:
- the probability (`table.probability`, default `probability`): a decimal number in [0, 1] on every row;
- an optional id (`table.id`, default `id`): any text, empty for none;
- optional loss units (`table.units`, default `units`): a whole number in 1..={units} on every row.

Arrow (`application/vnd.apache.arrow.stream`, the IPC stream format, not the file format): the same columns \
by field name; the probability Float64, the id Utf8, LargeUtf8 or Int64, the units Int64 or UInt64.

Rules between the parts: a column named in `table` must exist, and the probability, id and units columns are \
    three different columns; `portfolio.ids` and `portfolio.units` of the JSON part, when given, have one entry per \
    probability of the JSON part (the table's rows bring their own, or none and 1 unit); `portfolio.loadings`, when \
    given, has one per probability, the table's rows included; the table's units enter the lattice as the JSON's \
    do (see `portfolio.units`). Problems about a row point at `/exposures/<row>/<column>` (rows from 0 after the \
    header)."),
        "type": "string",
        "examples": ["id,probability,units\nL-1,0.01,250\nL-2,0.02,40\nL-3,0.15,1000\n"],
    })
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

/// Add a paragraph to a description (or start one).
fn append(description: &mut Value, text: &str) {
    *description = match description.as_str() {
        Some(d) if !d.is_empty() => json!(format!("{d}\n\n{text}")),
        _ => json!(text),
    };
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
