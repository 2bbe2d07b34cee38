//! Books as tables: every computing route also takes `multipart/form-data` with the JSON request as the part
//! `request` and the listed exposures as the part `exposures`, a CSV table (`text/csv`: a header row, a
//! probability column and an optional id column) or an Apache Arrow IPC stream
//! (`application/vnd.apache.arrow.stream`: a Float64 probability column, an optional Utf8, LargeUtf8 or
//! Int64 id column), either with an optional column of loss units (whole numbers; Int64 or UInt64 in Arrow)
//! that goes to `portfolio.units`. The JSON part may carry a `table` object naming the columns ([`TableSpec`]); other
//! columns are ignored. The table's rows are appended to `portfolio.probabilities` (after any listed in the
//! JSON, so row r of a table sent with n JSON probabilities has index n + r), and its ids to
//! `portfolio.ids`; from there on a request is the same as its JSON form.
//!
//! A bad row is a 422 problem whose pointer is `/exposures/<row>/<column>` (rows counted from 0 after the
//! header) and whose detail names the row, its CSV line and its id. Nothing is allocated past the body, which
//! the body limit already bounds, before the row count is known to fit `--max-listed-exposures` (413
//! beyond); a part of another type is 415; a body that is not multipart, or a table that cannot be read, 400.
//! The Arrow reader runs under `catch_unwind`, so that a hostile stream is refused with a problem even if it
//! reached a panic in the library.

use super::extract;
use super::problem::{escape_token, Problem};
use crate::analytics::chart::ChartRequest;
use crate::analytics::contributions::ContributionsRequest;
use crate::analytics::distribution::DistributionRequest;
use crate::analytics::layers::LayersRequest;
use crate::analytics::quantiles::QuantilesRequest;
use crate::analytics::reverse_stress::ReverseStressRequest;
use crate::analytics::tail::TailRequest;
use crate::config::ServiceLimits;
use crate::portfolio::families::expected_len;
use crate::portfolio::{ExposureId, PortfolioSpec, Violation};
use axum::http::StatusCode;
use bytes::Bytes;
use serde::de::DeserializeOwned;
use serde::Deserialize;
use serde_json::value::RawValue;
use utoipa::ToSchema;

/// Name of the part holding the JSON request.
pub const REQUEST_PART: &str = "request";
/// Name of the part holding the table of exposures.
pub const EXPOSURES_PART: &str = "exposures";
/// Media type of a CSV table.
pub const CSV: &str = "text/csv";
/// Media type of an Arrow IPC stream.
pub const ARROW_STREAM: &str = "application/vnd.apache.arrow.stream";

/// Most violations reported at once (as for the JSON form).
const MAX_REPORTED: usize = 20;
/// Most parts in one body, and the longest header block of a part.
const MAX_PARTS: usize = 8;
const MAX_PART_HEADERS: usize = 16 * 1024;

/// A request whose portfolio a table can fill.
pub trait Tabular {
    /// Whether the answer names exposures by id: only then are a table's ids kept. Elsewhere they are
    /// checked and used to name a bad row, and cost nothing else.
    const RETURNS_IDS: bool;
    fn portfolio_mut(&mut self) -> &mut PortfolioSpec;
}

macro_rules! tabular {
    ($($t:ty => $ids:literal),*) => {$(
        impl Tabular for $t {
            const RETURNS_IDS: bool = $ids;
            fn portfolio_mut(&mut self) -> &mut PortfolioSpec {
                &mut self.portfolio
            }
        }
    )*};
}
tabular!(
    TailRequest => false,
    QuantilesRequest => false,
    DistributionRequest => false,
    LayersRequest => false,
    ContributionsRequest => true,
    ChartRequest => false,
    ReverseStressRequest => false
);

/// The `table` object of a multipart request's JSON part: which columns of the `exposures` table to read.
#[derive(Debug, Clone, Default, Deserialize, ToSchema)]
#[serde(remote = "Self", deny_unknown_fields)]
pub struct TableSpec {
    /// Column of event probabilities in [0, 1] (default `probability`).
    #[schema(example = "pd")]
    pub probability: Option<String>,
    /// Column of exposure ids (default `id`, read when the table has it; named here, it must exist).
    #[schema(example = "loan_id")]
    pub id: Option<String>,
    /// Column of loss units per exposure, whole numbers in 1..=1e9 (default `units`, read when the table has
    /// it; named here, it must exist). Rows go to `portfolio.units` (1 for the JSON's listed exposures when
    /// the JSON gives none).
    #[schema(example = "sum_insured_k")]
    pub units: Option<String>,
    /// CSV only: the field delimiter, one ASCII character (default `,`; `;` and a tab are common).
    #[schema(example = ";")]
    pub delimiter: Option<String>,
}
crate::portfolio::objects::objects_only!(TableSpec, deserialize_only);

/// The multipart form of every computing route as the derive sees it (documentation only): the document
/// replaces it with one form per route, `<Route>Upload`, whose `request` part is that route's request schema
/// and whose `exposures` part states the table's rules (`api::openapi`, `multipart`).
#[derive(ToSchema)]
#[allow(dead_code)]
pub struct TableUpload {
    /// The route's JSON request, as for `application/json`, optionally with a `table` object (`TableSpec`)
    /// naming the columns. No content type, or `application/json`.
    #[schema(value_type = Object)]
    request: (),
    /// The listed exposures: CSV (`text/csv`, a header row) or an Arrow IPC stream
    /// (`application/vnd.apache.arrow.stream`). Rows are appended to `portfolio.probabilities`; ids to
    /// `portfolio.ids`. Problems about a row point at `/exposures/<row>/<column>`.
    #[schema(value_type = String, format = Binary, required = false)]
    exposures: (),
}

/// Decode a multipart request: the JSON part into `T`, the table's rows appended to its portfolio.
pub fn from_multipart<T: DeserializeOwned + Tabular>(
    body: Bytes,
    content_type: &str,
    limits: &ServiceLimits,
) -> Result<T, Problem> {
    let boundary = boundary(content_type).ok_or_else(|| {
        malformed_multipart("the Content-Type multipart/form-data has no boundary parameter".to_string())
    })?;
    let mut request = None;
    let mut exposures = None;
    for part in parts(&body, &boundary).map_err(malformed_multipart)? {
        let slot = match part.name.as_str() {
            REQUEST_PART => &mut request,
            EXPOSURES_PART => &mut exposures,
            other => {
                return Err(malformed_multipart(format!(
                    "unknown part {other:?}: the parts are {REQUEST_PART:?} (the JSON request) and {EXPOSURES_PART:?} (the table)"
                )))
            }
        };
        if slot.is_some() {
            return Err(malformed_multipart(format!("the part {:?} is sent twice", part.name)));
        }
        *slot = Some(part);
    }
    let request =
        request.ok_or_else(|| malformed_multipart(format!("no part named {REQUEST_PART:?} (the JSON request)")))?;
    if let Some(ct) = &request.content_type {
        let m = mime(ct);
        if m != "application/json" && !(m.starts_with("application/") && m.ends_with("+json")) {
            return Err(Problem::unsupported_media(format!(
                "the part {REQUEST_PART:?} must be application/json (or have no Content-Type), got {ct:?}"
            )));
        }
    }
    let (spec, mut req) = split_table::<T>(&request.data)?;
    let Some(exposures) = exposures else {
        if spec.is_some() {
            return Err(Problem::invalid(vec![Violation::new(
                "/table",
                format!("names the columns of a table, but there is no part named {EXPOSURES_PART:?}"),
            )]));
        }
        return Ok(req);
    };
    let spec = spec.unwrap_or_default();
    let columns = Columns::of(&spec, T::RETURNS_IDS)?;
    let portfolio = req.portfolio_mut();
    let listed =
        portfolio.families.iter().map(expected_len).fold(portfolio.probabilities.len() as u64, u64::saturating_add);
    let max = limits.portfolio.max_listed_exposures;
    let budget = Budget { rows: max.saturating_sub(listed), max, listed };
    let ct = exposures.content_type.as_deref().unwrap_or("");
    let table = match mime(ct).as_str() {
        CSV => read_csv(&exposures.data, &columns, &budget)?,
        ARROW_STREAM => read_arrow(exposures.data, &columns, &budget)?,
        m => {
            let hint = if m == "application/vnd.apache.arrow.file" {
                " (the Arrow IPC file format: send the stream format instead)"
            } else if m.is_empty() || m == "application/octet-stream" {
                " (with curl: -F 'exposures=@book.csv;type=text/csv')"
            } else {
                ""
            };
            return Err(Problem::unsupported_media(format!(
                "the part {EXPOSURES_PART:?} must be {CSV} or {ARROW_STREAM}, got {ct:?}{hint}"
            )));
        }
    };
    append(portfolio, table)?;
    Ok(req)
}

fn malformed_multipart(detail: String) -> Problem {
    Problem::new(StatusCode::BAD_REQUEST, "malformed-multipart", "Malformed multipart body", detail)
}

fn malformed_table(detail: String) -> Problem {
    Problem::new(StatusCode::BAD_REQUEST, "malformed-table", "Unreadable table", detail)
}

/// The media type of a Content-Type value, lower case, without parameters.
fn mime(ct: &str) -> String {
    ct.split(';').next().unwrap_or("").trim().to_ascii_lowercase()
}

// ---------------------------------------------------------------------------------------------------------
// The JSON part and its `table` object

/// Take the top-level `table` member out of the JSON part and decode the rest as the route's request. The
/// other members pass through as raw text, so every pointer in a problem stays that of the part as sent.
fn split_table<T: DeserializeOwned>(json: &[u8]) -> Result<(Option<TableSpec>, T), Problem> {
    let Ok(Members(members)) = serde_json::from_slice::<Members>(json) else {
        // Not an object, or not JSON: the request's own decoder says what is wrong.
        return extract::parse::<T>(json).map(|t| (None, t));
    };
    let mut table = None;
    let mut rest = String::with_capacity(json.len());
    rest.push('{');
    for (key, value) in &members {
        if key == "table" {
            if table.is_some() {
                return Err(Problem::invalid(vec![Violation::new("/table", "given twice")]));
            }
            table = Some(value.get());
            continue;
        }
        if rest.len() > 1 {
            rest.push(',');
        }
        rest.push_str(&serde_json::to_string(key).expect("a string serialises"));
        rest.push(':');
        rest.push_str(value.get());
    }
    rest.push('}');
    let spec = match table {
        None => None,
        Some(raw) => Some(extract::parse::<TableSpec>(raw.as_bytes()).map_err(|p| under("/table", p))?),
    };
    Ok((spec, extract::parse::<T>(rest.as_bytes())?))
}

/// A problem about a member, its pointers made relative to the document.
fn under(prefix: &str, p: Problem) -> Problem {
    if p.errors.is_empty() {
        return p;
    }
    Problem::invalid(p.errors.into_iter().map(|e| Violation::new(format!("{prefix}{}", e.pointer), e.detail)).collect())
}

/// The members of a JSON object in order, each value as its raw text.
struct Members<'a>(Vec<(String, &'a RawValue)>);

impl<'de> Deserialize<'de> for Members<'de> {
    fn deserialize<D: serde::Deserializer<'de>>(d: D) -> Result<Self, D::Error> {
        struct V;
        impl<'de> serde::de::Visitor<'de> for V {
            type Value = Members<'de>;
            fn expecting(&self, f: &mut std::fmt::Formatter) -> std::fmt::Result {
                f.write_str("a JSON object")
            }
            fn visit_map<A: serde::de::MapAccess<'de>>(self, mut map: A) -> Result<Members<'de>, A::Error> {
                let mut out = Vec::new();
                while let Some(entry) = map.next_entry::<String, &'de RawValue>()? {
                    out.push(entry);
                }
                Ok(Members(out))
            }
        }
        d.deserialize_map(V)
    }
}

/// The columns to read, with the pointer of the field that named each (for problems about a missing one).
struct Columns {
    probability: String,
    /// The id column, and whether the client named it (then it must exist).
    id: String,
    id_named: bool,
    /// The units column, and whether the client named it.
    units: String,
    units_named: bool,
    delimiter: u8,
    /// Whether the route returns ids (only then are they kept: 10^6 of them cost tens of milliseconds).
    keep_ids: bool,
}

impl Columns {
    fn of(spec: &TableSpec, keep_ids: bool) -> Result<Columns, Problem> {
        let mut errs = Vec::new();
        let probability = spec.probability.clone().unwrap_or_else(|| "probability".into());
        if probability.is_empty() {
            errs.push(Violation::new("/table/probability", "must name a column"));
        }
        let id = spec.id.clone().unwrap_or_else(|| "id".into());
        if id.is_empty() {
            errs.push(Violation::new("/table/id", "must name a column"));
        } else if id == probability {
            errs.push(Violation::new("/table/id", "must name another column than the probability's"));
        }
        let units = spec.units.clone().unwrap_or_else(|| "units".into());
        if units.is_empty() {
            errs.push(Violation::new("/table/units", "must name a column"));
        } else if units == probability || units == id {
            errs.push(Violation::new("/table/units", "must name another column than the probability's and the id's"));
        }
        let delimiter = match spec.delimiter.as_deref().map(str::as_bytes) {
            None => b',',
            Some(&[d]) if d.is_ascii() && !matches!(d, b'"' | b'\r' | b'\n') => d,
            Some(_) => {
                errs.push(Violation::new(
                    "/table/delimiter",
                    "must be one ASCII character other than a quote or a line break",
                ));
                b','
            }
        };
        if !errs.is_empty() {
            return Err(Problem::invalid(errs));
        }
        Ok(Columns {
            probability,
            id,
            id_named: spec.id.is_some(),
            units,
            units_named: spec.units.is_some(),
            delimiter,
            keep_ids,
        })
    }

    fn missing(&self, which: &str, found: &[String]) -> Problem {
        let (name, at, how) = if which == "probability" {
            (&self.probability, "/table/probability", "name it in table.probability")
        } else if which == "units" {
            (&self.units, "/table/units", "name it in table.units, or leave table.units out")
        } else {
            (&self.id, "/table/id", "name it in table.id, or leave table.id out")
        };
        let mut list: Vec<String> = found.iter().take(12).map(|c| format!("{c:?}")).collect();
        if found.len() > 12 {
            list.push(format!("and {} more", found.len() - 12));
        }
        let list = if list.is_empty() { "none".to_string() } else { list.join(", ") };
        let how = match found {
            [one] if one.contains(';') => format!("{how}; if the fields are separated by ';', set table.delimiter"),
            [one] if one.contains('\t') => format!("{how}; if the fields are separated by tabs, set table.delimiter"),
            _ => how.to_string(),
        };
        Problem::invalid(vec![Violation::new(
            at,
            format!("the table has no {which} column named {name:?} (its columns: {list}); {how}"),
        )])
    }
}

// ---------------------------------------------------------------------------------------------------------
// Tables

/// The rows a table may add: the listed-exposure limit less what the JSON part lists.
struct Budget {
    rows: u64,
    max: u64,
    listed: u64,
}

impl Budget {
    fn check(&self, rows: u64) -> Result<(), Problem> {
        if rows <= self.rows {
            return Ok(());
        }
        let json =
            if self.listed > 0 { format!(" ({} of them listed in the JSON part)", self.listed) } else { String::new() };
        Err(Problem::too_large(format!(
            "the table has more than {} rows: a request lists at most {} exposures{json} (see --max-listed-exposures); split the book",
            self.rows, self.max
        )))
    }

    /// Capacity to reserve for about `estimate` rows, never beyond what the limit lets through.
    fn capacity(&self, estimate: u64) -> usize {
        estimate.min(self.rows.saturating_add(1)) as usize
    }
}

/// A table's rows as the portfolio takes them.
#[derive(Debug)]
struct Table {
    probabilities: Vec<f64>,
    /// One per row when the table has an id column.
    ids: Option<Vec<Option<ExposureId>>>,
    /// One per row when the table has a units column.
    units: Option<Vec<u64>>,
}

/// Append the table to the portfolio: rows after the JSON's probabilities; ids after the JSON's (nulls for
/// the side that has none).
fn append(p: &mut PortfolioSpec, t: Table) -> Result<(), Problem> {
    let n = p.probabilities.len();
    if !p.ids.is_empty() && p.ids.len() != n {
        return Err(Problem::invalid(vec![Violation::new(
            "/portfolio/ids",
            format!("{} ids for {n} probabilities: give one id (or null) per probability, or none", p.ids.len()),
        )]));
    }
    match t.ids {
        Some(mut ids) => {
            if p.ids.is_empty() {
                p.ids.resize(n, None);
            }
            p.ids.append(&mut ids);
        }
        None if !p.ids.is_empty() => p.ids.resize(n + t.probabilities.len(), None),
        None => {}
    }
    if !p.units.is_empty() && p.units.len() != n {
        return Err(Problem::invalid(vec![Violation::new(
            "/portfolio/units",
            format!("{} units for {n} probabilities: give one per probability, or none", p.units.len()),
        )]));
    }
    match t.units {
        Some(mut units) => {
            if p.units.is_empty() {
                p.units.resize(n, 1);
            }
            p.units.append(&mut units);
        }
        None if !p.units.is_empty() => p.units.resize(n + t.probabilities.len(), 1),
        None => {}
    }
    if p.probabilities.is_empty() {
        p.probabilities = t.probabilities;
    } else {
        p.probabilities.extend_from_slice(&t.probabilities);
    }
    Ok(())
}

/// Violations of a table's rows, as many as are reported.
struct RowErrors {
    errs: Vec<Violation>,
    column: String,
}

impl RowErrors {
    fn new(probability_column: &str) -> RowErrors {
        RowErrors { errs: Vec::new(), column: escape_token(probability_column) }
    }

    fn full(&self) -> bool {
        self.errs.len() >= MAX_REPORTED
    }

    /// A bad probability at `row` (`line`: its CSV line, `id`: its id, when known).
    fn probability(&mut self, row: usize, line: Option<u64>, id: Option<&ExposureId>, name: &str, what: String) {
        if !self.full() {
            self.errs.push(Violation::new(
                format!("/exposures/{row}/{}", self.column),
                format!("{}, column {name}: {what}", where_(row, line, id)),
            ));
        }
    }

    fn other(&mut self, pointer: String, detail: String) {
        if !self.full() {
            self.errs.push(Violation::new(pointer, detail));
        }
    }

    fn finish(self) -> Result<(), Problem> {
        if self.errs.is_empty() {
            Ok(())
        } else {
            Err(Problem::invalid(self.errs))
        }
    }
}

/// "row 1043 (line 1045, id "L-77812")".
fn where_(row: usize, line: Option<u64>, id: Option<&ExposureId>) -> String {
    let mut s = format!("row {row}");
    match (line, id) {
        (Some(l), Some(id)) => s.push_str(&format!(" (line {l}, id {id})")),
        (Some(l), None) => s.push_str(&format!(" (line {l})")),
        (None, Some(id)) => s.push_str(&format!(" (id {id})")),
        (None, None) => {}
    }
    s
}

fn probability_ok(p: f64) -> bool {
    p.is_finite() && (0.0..=1.0).contains(&p)
}

/// Whether every value is a probability (`probability_ok`), folded without early exit so that it vectorises.
fn all_probabilities(ps: &[f64]) -> bool {
    ps.chunks(4096).all(|c| c.iter().fold(true, |ok, &p| ok & (0.0..=1.0).contains(&p)))
}

fn out_of_range(p: f64) -> String {
    format!("{p} is not in [0, 1]")
}

// ---------------------------------------------------------------------------------------------------------
// CSV

fn read_csv(data: &[u8], cols: &Columns, budget: &Budget) -> Result<Table, Problem> {
    let data = data.strip_prefix(b"\xEF\xBB\xBF").unwrap_or(data);
    let mut rdr = csv::ReaderBuilder::new().delimiter(cols.delimiter).flexible(true).from_reader(data);
    let headers = rdr.byte_headers().map_err(|e| malformed_table(format!("the CSV header row: {e}")))?.clone();
    let names: Vec<String> = headers.iter().map(|h| String::from_utf8_lossy(h).trim().to_string()).collect();
    let find = |name: &str, which: &str| column_index(&names, name, which);
    let p_col = find(&cols.probability, "probability")?.ok_or_else(|| cols.missing("probability", &names))?;
    let id_col = find(&cols.id, "id")?;
    if id_col.is_none() && cols.id_named {
        return Err(cols.missing("id", &names));
    }
    let u_col = find(&cols.units, "units")?;
    if u_col.is_none() && cols.units_named {
        return Err(cols.missing("units", &names));
    }
    // At most one row per line break: an upper bound on the rows, known before anything is allocated.
    let lines = memchr::memchr_iter(b'\n', data).count() as u64 + 1;
    let cap = budget.capacity(lines);
    let mut probabilities = Vec::with_capacity(cap);
    let mut ids: Option<Vec<Option<ExposureId>>> = id_col.filter(|_| cols.keep_ids).map(|_| Vec::with_capacity(cap));
    let id_ptr = escape_token(&cols.id);
    let mut units: Option<Vec<u64>> = u_col.map(|_| Vec::with_capacity(cap));
    let u_ptr = escape_token(&cols.units);
    let mut bad = RowErrors::new(&cols.probability);
    let mut rec = csv::ByteRecord::new();
    let mut row = 0usize;
    loop {
        match rdr.read_byte_record(&mut rec) {
            Ok(true) => {}
            Ok(false) => break,
            Err(e) => {
                let at = e.position().map(|p| format!(" (line {})", p.line())).unwrap_or_default();
                return Err(malformed_table(format!("the CSV table{at}: {e}")));
            }
        }
        budget.check(row as u64 + 1)?;
        // The record's first physical line, as an editor numbers it (only worked out for a bad row).
        // A record's position may sit on the line break before it (CRLF, skipped blank lines).
        let line_of = |rec: &csv::ByteRecord| {
            rec.position().map(|p| {
                let mut at = (p.byte() as usize).min(data.len());
                at += data[at..].iter().take_while(|&&b| b == b'\r' || b == b'\n').count();
                memchr::memchr_iter(b'\n', &data[..at]).count() as u64 + 1
            })
        };
        let name = &cols.probability;
        let p = match rec.get(p_col).map(trim) {
            None => Err(format!("missing (the row has {} fields)", rec.len())),
            Some(raw) => match parse_f64(raw) {
                Some(p) if probability_ok(p) => Ok(p),
                Some(p) => Err(out_of_range(p)),
                None => {
                    let text = String::from_utf8_lossy(raw);
                    Err(if raw.is_empty() {
                        "empty: every row needs a probability".to_string()
                    } else if text.contains(',') && !text.contains('.') {
                        format!("{text:?} is not a number (write the decimal separator as a point)")
                    } else {
                        format!("{text:?} is not a number")
                    })
                }
            },
        };
        // The id is checked on every row, but only kept (allocated) when the route returns ids or the row
        // is to be named in a problem.
        let mut id = None;
        if let Some(c) = id_col {
            let raw = rec.get(c).map(trim).unwrap_or_default();
            match std::str::from_utf8(raw) {
                Ok(s) if !s.is_empty() && (cols.keep_ids || p.is_err()) => id = Some(ExposureId::Text(s.to_string())),
                Ok(_) => {}
                Err(_) => bad.other(
                    format!("/exposures/{row}/{id_ptr}"),
                    format!("{}, column {}: the id is not UTF-8 text", where_(row, line_of(&rec), None), cols.id),
                ),
            }
        }
        if let (Some(c), Some(units)) = (u_col, units.as_mut()) {
            let raw = rec.get(c).map(trim).unwrap_or_default();
            let u = std::str::from_utf8(raw).ok().and_then(|s| s.parse::<u64>().ok());
            match u.filter(|u| units_ok(*u)) {
                Some(u) => units.push(u),
                None => {
                    let text = String::from_utf8_lossy(raw);
                    bad.other(
                        format!("/exposures/{row}/{u_ptr}"),
                        format!(
                            "{}, column {}: {}",
                            where_(row, line_of(&rec), id.as_ref()),
                            cols.units,
                            units_wrong(&text)
                        ),
                    );
                    units.push(1);
                }
            }
        }
        match p {
            Ok(p) => probabilities.push(p),
            Err(what) => {
                bad.probability(row, line_of(&rec), id.as_ref(), name, what);
                probabilities.push(f64::NAN);
            }
        }
        if let Some(ids) = ids.as_mut() {
            ids.push(id);
        }
        if bad.full() {
            break;
        }
        row += 1;
    }
    bad.finish()?;
    Ok(Table { probabilities, ids, units })
}

fn units_ok(u: u64) -> bool {
    (1..=crate::portfolio::validate::MAX_UNITS).contains(&u)
}

fn units_wrong(text: &str) -> String {
    format!("{text:?} is not a whole number of loss units in 1..={}", crate::portfolio::validate::MAX_UNITS)
}

fn trim(b: &[u8]) -> &[u8] {
    b.trim_ascii()
}

fn parse_f64(b: &[u8]) -> Option<f64> {
    std::str::from_utf8(b).ok()?.parse::<f64>().ok()
}

// ---------------------------------------------------------------------------------------------------------
// Arrow IPC stream

fn read_arrow(data: Bytes, cols: &Columns, budget: &Budget) -> Result<Table, Problem> {
    if data.starts_with(b"ARROW1") {
        return Err(Problem::unsupported_media(format!(
            "the part {EXPOSURES_PART:?} holds the Arrow IPC file format; send the stream format ({ARROW_STREAM})"
        )));
    }
    match std::panic::catch_unwind(std::panic::AssertUnwindSafe(|| decode_arrow(data, cols, budget))) {
        Ok(r) => r,
        Err(_) => Err(malformed_table("the Arrow IPC stream could not be read".to_string())),
    }
}

fn decode_arrow(data: Bytes, cols: &Columns, budget: &Budget) -> Result<Table, Problem> {
    use arrow_array::cast::AsArray;
    use arrow_array::types::{Float64Type, Int64Type};
    use arrow_array::Array;
    use arrow_schema::DataType;

    let unreadable = |e: arrow_schema::ArrowError| malformed_table(format!("the Arrow IPC stream: {e}"));
    let mut decoder = arrow_ipc::reader::StreamDecoder::new();
    let mut buf = arrow_buffer::Buffer::from(data);
    let mut probabilities: Vec<f64> = Vec::new();
    let mut ids: Option<Vec<Option<ExposureId>>> = None;
    let mut layout: Option<(usize, Option<usize>, Option<usize>)> = None;
    let mut units: Option<Vec<u64>> = None;
    let mut bad = RowErrors::new(&cols.probability);
    let mut row = 0usize;
    while !buf.is_empty() {
        let batch = decoder.decode(&mut buf).map_err(unreadable)?;
        if layout.is_none() {
            if let Some(schema) = decoder.schema() {
                let l = arrow_layout(&schema, cols)?;
                ids = l.1.filter(|_| cols.keep_ids).map(|_| Vec::new());
                units = l.2.map(|_| Vec::new());
                layout = Some(l);
            }
        }
        let (Some(batch), Some((p_col, id_col, u_col))) = (batch, layout) else { continue };
        let n = batch.num_rows();
        budget.check((row + n) as u64)?;
        let p = batch.column(p_col).as_primitive::<Float64Type>();
        probabilities.reserve(n);
        probabilities.extend_from_slice(p.values());
        let first = row;
        let id_column = id_col.map(|c| batch.column(c));
        if let (Some(col), Some(ids)) = (id_column, ids.as_mut()) {
            ids.reserve(n);
            match col.data_type() {
                DataType::Int64 => {
                    ids.extend(col.as_primitive::<Int64Type>().iter().map(|v| v.map(ExposureId::Integer)))
                }
                DataType::Utf8 => ids.extend(col.as_string::<i32>().iter().map(|v| v.map(text_id))),
                _ => ids.extend(col.as_string::<i64>().iter().map(|v| v.map(text_id))),
            }
        }
        if let (Some(c), Some(units)) = (u_col, units.as_mut()) {
            let col = batch.column(c);
            units.reserve(n);
            let u_ptr = escape_token(&cols.units);
            for i in 0..n {
                let u = if col.is_null(i) {
                    None
                } else if col.data_type() == &DataType::Int64 {
                    u64::try_from(col.as_primitive::<Int64Type>().value(i)).ok()
                } else {
                    Some(col.as_primitive::<arrow_array::types::UInt64Type>().value(i))
                };
                match u.filter(|u| units_ok(*u)) {
                    Some(u) => units.push(u),
                    None => {
                        let text = if col.is_null(i) {
                            "null".to_string()
                        } else {
                            format!("{}", u.map_or(-1, |u| u as i128))
                        };
                        let id = id_column.and_then(|c| arrow_id(c, i));
                        bad.other(
                            format!("/exposures/{}/{u_ptr}", first + i),
                            format!(
                                "{}, column {}: {}",
                                where_(first + i, None, id.as_ref()),
                                cols.units,
                                units_wrong(&text)
                            ),
                        );
                        units.push(1);
                    }
                }
            }
        }
        // Only the rows that break the rules are looked at twice; a column without nulls whose values are all
        // probabilities (the usual case) is told so by one branch-free pass.
        let clean = p.null_count() == 0 && all_probabilities(p.values());
        let walked: &[f64] = if clean { &[] } else { p.values() };
        for (i, &v) in walked.iter().enumerate() {
            let valid = p.is_valid(i);
            if valid && probability_ok(v) {
                continue;
            }
            let id = id_column.and_then(|c| arrow_id(c, i));
            let what = if valid { out_of_range(v) } else { "null: every row needs a probability".to_string() };
            bad.probability(first + i, None, id.as_ref(), &cols.probability, what);
            if bad.full() {
                break;
            }
        }
        if bad.full() {
            break;
        }
        row += n;
    }
    decoder.finish().map_err(unreadable)?;
    if layout.is_none() {
        return Err(malformed_table("the Arrow IPC stream is empty (no schema)".to_string()));
    }
    bad.finish()?;
    Ok(Table { probabilities, ids, units })
}

/// The id at row `i` of a column of a type `arrow_layout` accepted.
fn arrow_id(col: &arrow_array::ArrayRef, i: usize) -> Option<ExposureId> {
    use arrow_array::cast::AsArray;
    use arrow_array::types::Int64Type;
    use arrow_array::Array;
    if col.is_null(i) {
        return None;
    }
    Some(match col.data_type() {
        arrow_schema::DataType::Int64 => ExposureId::Integer(col.as_primitive::<Int64Type>().value(i)),
        arrow_schema::DataType::Utf8 => text_id(col.as_string::<i32>().value(i)),
        _ => text_id(col.as_string::<i64>().value(i)),
    })
}

fn text_id(s: &str) -> ExposureId {
    ExposureId::Text(s.to_string())
}

/// The position of the column called `name` among `names` (None when absent); two columns of that name are a
/// 422 at /table/<which>. Shared by the CSV and Arrow readers.
fn column_index(names: &[String], name: &str, which: &str) -> Result<Option<usize>, Problem> {
    let mut hits = names.iter().enumerate().filter(|(_, n)| *n == name).map(|(i, _)| i);
    match (hits.next(), hits.next()) {
        (Some(i), None) => Ok(Some(i)),
        (None, _) => Ok(None),
        (Some(_), Some(_)) => Err(Problem::invalid(vec![Violation::new(
            format!("/table/{which}"),
            format!("the table has more than one column named {name:?}"),
        )])),
    }
}

/// The positions of the probability, id and units columns, checked against the types read.
#[allow(clippy::type_complexity)]
fn arrow_layout(
    schema: &arrow_schema::Schema,
    cols: &Columns,
) -> Result<(usize, Option<usize>, Option<usize>), Problem> {
    use arrow_schema::DataType;
    let names: Vec<String> = schema.fields().iter().map(|f| f.name().clone()).collect();
    let find = |name: &str, which: &str| column_index(&names, name, which);
    let p = find(&cols.probability, "probability")?.ok_or_else(|| cols.missing("probability", &names))?;
    let pt = schema.field(p).data_type();
    if *pt != DataType::Float64 {
        return Err(Problem::invalid(vec![Violation::new(
            format!("/exposures/{}", escape_token(&cols.probability)),
            format!("the column {:?} is {pt}; probabilities are read as Float64", cols.probability),
        )]));
    }
    let id = find(&cols.id, "id")?;
    if id.is_none() && cols.id_named {
        return Err(cols.missing("id", &names));
    }
    if let Some(i) = id {
        let t = schema.field(i).data_type();
        if !matches!(t, DataType::Int64 | DataType::Utf8 | DataType::LargeUtf8) {
            return Err(Problem::invalid(vec![Violation::new(
                format!("/exposures/{}", escape_token(&cols.id)),
                format!("the column {:?} is {t}; ids are read as Int64, Utf8 or LargeUtf8", cols.id),
            )]));
        }
    }
    let units = find(&cols.units, "units")?;
    if units.is_none() && cols.units_named {
        return Err(cols.missing("units", &names));
    }
    if let Some(i) = units {
        let t = schema.field(i).data_type();
        if !matches!(t, DataType::Int64 | DataType::UInt64) {
            return Err(Problem::invalid(vec![Violation::new(
                format!("/exposures/{}", escape_token(&cols.units)),
                format!("the column {:?} is {t}; loss units are read as Int64 or UInt64", cols.units),
            )]));
        }
    }
    Ok((p, id, units))
}

// ---------------------------------------------------------------------------------------------------------
// multipart/form-data (RFC 7578 over RFC 2046): the whole body is in memory (bounded by the body limit), so
// each part is a slice of it.

/// One part of a form.
#[derive(Debug)]
pub struct Part {
    pub name: String,
    pub content_type: Option<String>,
    pub data: Bytes,
}

/// The `boundary` parameter of a multipart Content-Type.
pub fn boundary(content_type: &str) -> Option<String> {
    let (_, params) = content_type.split_once(';')?;
    let b = parameters(params).into_iter().find(|(k, _)| k.eq_ignore_ascii_case("boundary"))?.1;
    (!b.is_empty() && b.len() <= 200).then_some(b)
}

/// `key=value` parameters after a header's first `;`, values as tokens or quoted strings.
fn parameters(s: &str) -> Vec<(String, String)> {
    let mut out = Vec::new();
    let mut rest = s;
    loop {
        rest = rest.trim_start_matches([' ', '\t', ';']);
        if rest.is_empty() {
            break;
        }
        let Some(eq) = rest.find('=') else { break };
        let key = rest[..eq].trim().to_string();
        rest = rest[eq + 1..].trim_start();
        let value = if let Some(q) = rest.strip_prefix('"') {
            let mut v = String::new();
            let mut chars = q.char_indices();
            let mut end = q.len();
            while let Some((i, c)) = chars.next() {
                match c {
                    '\\' => {
                        if let Some((_, n)) = chars.next() {
                            v.push(n);
                        }
                    }
                    '"' => {
                        end = i + 1;
                        break;
                    }
                    c => v.push(c),
                }
            }
            rest = &q[end.min(q.len())..];
            v
        } else {
            let end = rest.find(';').unwrap_or(rest.len());
            let v = rest[..end].trim().to_string();
            rest = &rest[end..];
            v
        };
        out.push((key, value));
    }
    out
}

/// Split a multipart body into its parts.
pub fn parts(body: &Bytes, boundary: &str) -> Result<Vec<Part>, String> {
    let dash = format!("--{boundary}");
    let delimiter = format!("\r\n--{boundary}");
    let finder = memchr::memmem::Finder::new(delimiter.as_bytes());
    let mut pos = if body.starts_with(dash.as_bytes()) {
        dash.len()
    } else {
        finder.find(body).ok_or("the body has no boundary line: is it multipart/form-data?")? + delimiter.len()
    };
    let mut out = Vec::new();
    loop {
        let rest = &body[pos..];
        if rest.starts_with(b"--") {
            break;
        }
        let pad = rest.iter().take_while(|&&b| b == b' ' || b == b'\t').count();
        if !rest[pad..].starts_with(b"\r\n") {
            return Err("a boundary line is not followed by CRLF (or the closing boundary is missing)".into());
        }
        pos += pad + 2;
        let (headers, start) = if body[pos..].starts_with(b"\r\n") {
            ("", pos + 2)
        } else {
            let window = &body[pos..body.len().min(pos + MAX_PART_HEADERS)];
            let end = memchr::memmem::find(window, b"\r\n\r\n")
                .ok_or("a part's headers do not end with a blank line (or exceed 16 KiB)")?;
            let h = std::str::from_utf8(&body[pos..pos + end]).map_err(|_| "a part's headers are not UTF-8")?;
            (h, pos + end + 4)
        };
        let end = finder.find(&body[start..]).ok_or("a part is not closed by a boundary line")? + start;
        out.push(part(headers, body.slice(start..end))?);
        if out.len() > MAX_PARTS {
            return Err(format!("more than {MAX_PARTS} parts"));
        }
        pos = end + delimiter.len();
    }
    Ok(out)
}

fn part(headers: &str, data: Bytes) -> Result<Part, String> {
    let mut name = None;
    let mut content_type = None;
    for line in headers.split("\r\n") {
        let Some((k, v)) = line.split_once(':') else {
            return Err(format!("a part's header line has no colon: {line:?}"));
        };
        let k = k.trim();
        if k.eq_ignore_ascii_case("content-disposition") {
            let (kind, params) = v.split_once(';').unwrap_or((v, ""));
            if !kind.trim().eq_ignore_ascii_case("form-data") {
                return Err(format!("a part's Content-Disposition is {:?}, not form-data", kind.trim()));
            }
            name = parameters(params).into_iter().find(|(k, _)| k.eq_ignore_ascii_case("name")).map(|(_, v)| v);
        } else if k.eq_ignore_ascii_case("content-type") {
            content_type = Some(v.trim().to_string());
        }
    }
    let name = name.ok_or("a part has no Content-Disposition: form-data; name=...")?;
    Ok(Part { name, content_type, data })
}

#[cfg(test)]
mod tests {
    use super::*;

    /// The branch-free test of an Arrow column agrees with `probability_ok` row by row, for every value that
    /// breaks it, placed at the start, at a block's edge and at the end.
    #[test]
    fn all_probabilities_agrees_with_the_row_check() {
        let odd = [f64::NAN, f64::INFINITY, f64::NEG_INFINITY, -1e-300, 1.0 + f64::EPSILON, -1.0];
        let good = [0.0, -0.0, 1.0, 0.25, 5e-324];
        for n in [1usize, 4096, 4097, 9000] {
            let base: Vec<f64> = (0..n).map(|i| good[i % good.len()]).collect();
            assert!(all_probabilities(&base), "n={n}");
            for at in [0, 4095.min(n - 1), n - 1] {
                for &x in &odd {
                    let mut v = base.clone();
                    v[at] = x;
                    assert_eq!(all_probabilities(&v), v.iter().all(|&p| probability_ok(p)), "n={n}, at={at}, x={x}");
                    assert!(!all_probabilities(&v));
                }
            }
        }
    }

    #[test]
    fn a_column_is_found_once_absent_or_refused_when_named_twice() {
        let names: Vec<String> = ["id", "pd", "pd", "x"].iter().map(|s| s.to_string()).collect();
        assert_eq!(column_index(&names, "x", "probability").unwrap(), Some(3));
        assert_eq!(column_index(&names, "missing", "id").unwrap(), None);
        let p = column_index(&names, "pd", "probability").unwrap_err();
        let v = serde_json::to_value(&p).unwrap().to_string();
        assert!(v.contains("/table/probability") && v.contains("more than one column named"), "{v}");
    }

    fn body(parts: &[(&str, Option<&str>, &[u8])]) -> Bytes {
        let mut b = Vec::new();
        for (name, ct, data) in parts {
            b.extend_from_slice(b"--XyZ\r\n");
            b.extend_from_slice(format!("Content-Disposition: form-data; name=\"{name}\"\r\n").as_bytes());
            if let Some(ct) = ct {
                b.extend_from_slice(format!("Content-Type: {ct}\r\n").as_bytes());
            }
            b.extend_from_slice(b"\r\n");
            b.extend_from_slice(data);
            b.extend_from_slice(b"\r\n");
        }
        b.extend_from_slice(b"--XyZ--\r\n");
        Bytes::from(b)
    }

    #[test]
    fn boundaries_are_read_as_tokens_or_quoted_strings() {
        assert_eq!(boundary("multipart/form-data; boundary=abc").as_deref(), Some("abc"));
        assert_eq!(boundary("multipart/form-data; charset=x; boundary=\"a b;c\"").as_deref(), Some("a b;c"));
        assert_eq!(boundary("multipart/form-data; BOUNDARY=q").as_deref(), Some("q"));
        assert_eq!(boundary("multipart/form-data"), None);
        assert_eq!(boundary("multipart/form-data; boundary="), None);
    }

    #[test]
    fn parts_are_slices_of_the_body() {
        let b = body(&[("request", None, b"{\"a\":1}"), ("exposures", Some("text/csv"), b"probability\r\n0.1\r\n")]);
        let p = parts(&b, "XyZ").unwrap();
        assert_eq!(p.len(), 2);
        assert_eq!(
            (p[0].name.as_str(), p[0].content_type.as_deref(), &p[0].data[..]),
            ("request", None, &b"{\"a\":1}"[..])
        );
        assert_eq!(p[1].content_type.as_deref(), Some("text/csv"));
        assert_eq!(&p[1].data[..], b"probability\r\n0.1\r\n");
    }

    #[test]
    fn a_preamble_and_an_empty_part_are_allowed() {
        let b = Bytes::from_static(b"preamble\r\n--B\r\nContent-Disposition: form-data; name=x\r\n\r\n\r\n--B--");
        let p = parts(&b, "B").unwrap();
        assert_eq!((p[0].name.as_str(), p[0].data.len()), ("x", 0));
    }

    #[test]
    fn broken_bodies_are_refused() {
        for raw in [
            &b"no boundary at all"[..],
            b"--B\r\nContent-Disposition: form-data; name=x\r\n\r\nunterminated",
            b"--B\r\nContent-Disposition: attachment; name=x\r\n\r\nv\r\n--B--",
            b"--B\r\nContent-Type: text/plain\r\n\r\nv\r\n--B--",
            b"--B\r\nno colon\r\n\r\nv\r\n--B--",
            b"--Bjunk",
        ] {
            assert!(parts(&Bytes::copy_from_slice(raw), "B").is_err(), "{}", String::from_utf8_lossy(raw));
        }
    }

    #[test]
    fn the_table_member_is_taken_out_and_the_rest_decoded_as_sent() {
        #[derive(Deserialize, Debug)]
        #[serde(deny_unknown_fields)]
        struct R {
            a: Vec<u32>,
            b: Option<String>,
        }
        let (spec, r) =
            split_table::<R>(br#"{"a": [1, 2], "table": {"probability": "pd", "id": "k"}, "b": "x\"y"}"#).unwrap();
        let spec = spec.unwrap();
        assert_eq!((spec.probability.as_deref(), spec.id.as_deref()), (Some("pd"), Some("k")));
        assert_eq!((r.a, r.b.as_deref()), (vec![1, 2], Some("x\"y")));
        let p = split_table::<R>(br#"{"a": [1, "no"]}"#).unwrap_err();
        assert_eq!(p.errors[0].pointer, "/a/1");
        let p = split_table::<R>(br#"{"a": [], "table": {"probability": 3}}"#).unwrap_err();
        assert_eq!(p.errors[0].pointer, "/table/probability");
        let p = split_table::<R>(br#"{"a": [], "table": {"colour": "red"}}"#).unwrap_err();
        assert_eq!(p.status, 422);
        assert_eq!(split_table::<R>(br#"{"a": "#).unwrap_err().status, 400);
    }

    fn cols() -> Columns {
        Columns::of(&TableSpec::default(), true).unwrap()
    }

    fn budget(rows: u64) -> Budget {
        Budget { rows, max: rows, listed: 0 }
    }

    #[test]
    fn csv_rows_are_read_with_quotes_ids_and_extra_columns() {
        let csv = b"\xEF\xBB\xBFname,probability,id\r\n\"Smith, J\",0.25,a1\n x ,1e-3,\"b\"\"2\"\nz, 0 ,\n";
        let t = read_csv(csv, &cols(), &budget(10)).unwrap();
        assert_eq!(t.probabilities, vec![0.25, 1e-3, 0.0]);
        let ids = t.ids.unwrap();
        assert_eq!(ids, vec![Some(ExposureId::Text("a1".into())), Some(ExposureId::Text("b\"2".into())), None]);
    }

    #[test]
    fn bad_csv_rows_point_at_row_and_column() {
        let csv = b"id,pd\nA,0.1\nB,1.7\nC,\nD,\"0,5\"\nE\n";
        let spec = TableSpec { probability: Some("pd".into()), ..TableSpec::default() };
        let p = read_csv(csv, &Columns::of(&spec, true).unwrap(), &budget(10)).unwrap_err();
        let got: Vec<(&str, &str)> = p.errors.iter().map(|e| (e.pointer.as_str(), e.detail.as_str())).collect();
        assert_eq!(got[0], ("/exposures/1/pd", "row 1 (line 3, id \"B\"), column pd: 1.7 is not in [0, 1]"));
        assert_eq!(got[1].0, "/exposures/2/pd");
        assert!(got[1].1.contains("empty"), "{}", got[1].1);
        assert_eq!(got[2].0, "/exposures/3/pd");
        assert!(got[2].1.contains("decimal separator"), "{}", got[2].1);
        assert_eq!(got[3].0, "/exposures/4/pd");
        assert!(got[3].1.contains("missing"), "{}", got[3].1);
    }

    #[test]
    fn csv_limits_and_missing_columns() {
        let p = read_csv(b"probability\n0.1\n0.2\n0.3\n", &cols(), &budget(2)).unwrap_err();
        assert_eq!(p.status, 413);
        let p = read_csv(b"prob\n0.1\n", &cols(), &budget(2)).unwrap_err();
        assert_eq!((p.status, p.errors[0].pointer.as_str()), (422, "/table/probability"));
        let spec = TableSpec { id: Some("key".into()), ..TableSpec::default() };
        let p = read_csv(b"probability\n0.1\n", &Columns::of(&spec, true).unwrap(), &budget(2)).unwrap_err();
        assert_eq!(p.errors[0].pointer, "/table/id");
        let p = read_csv(b"probability,probability\n0.1,0.2\n", &cols(), &budget(2)).unwrap_err();
        assert_eq!(p.errors[0].pointer, "/table/probability");
        let semi = TableSpec { delimiter: Some(";".into()), ..TableSpec::default() };
        let t = read_csv(b"id;probability\n7;0.5\n", &Columns::of(&semi, true).unwrap(), &budget(2)).unwrap();
        assert_eq!(t.probabilities, vec![0.5]);
    }

    #[test]
    fn ids_follow_their_probabilities_when_a_table_is_appended() {
        let mut p = PortfolioSpec { probabilities: vec![0.1], ..PortfolioSpec::default() };
        let t =
            Table { probabilities: vec![0.2, 0.3], ids: Some(vec![Some(ExposureId::Integer(5)), None]), units: None };
        append(&mut p, t).unwrap();
        assert_eq!(p.probabilities, vec![0.1, 0.2, 0.3]);
        assert_eq!(p.ids, vec![None, Some(ExposureId::Integer(5)), None]);
        // Units follow their probabilities too: 1 for the JSON's exposure when the JSON gives none.
        let mut u = PortfolioSpec { probabilities: vec![0.1], ..PortfolioSpec::default() };
        append(&mut u, Table { probabilities: vec![0.2, 0.3], ids: None, units: Some(vec![40, 7]) }).unwrap();
        assert_eq!(u.units, vec![1, 40, 7]);
        let mut w = PortfolioSpec { probabilities: vec![0.1], units: vec![9], ..PortfolioSpec::default() };
        append(&mut w, Table { probabilities: vec![0.2], ids: None, units: None }).unwrap();
        assert_eq!(w.units, vec![9, 1]);
        let mut q = PortfolioSpec {
            probabilities: vec![0.1],
            ids: vec![Some(ExposureId::Integer(1))],
            ..PortfolioSpec::default()
        };
        append(&mut q, Table { probabilities: vec![0.2], ids: None, units: None }).unwrap();
        assert_eq!(q.ids, vec![Some(ExposureId::Integer(1)), None]);
        let mut r = PortfolioSpec { probabilities: vec![0.1, 0.2], ids: vec![None], ..PortfolioSpec::default() };
        assert_eq!(append(&mut r, Table { probabilities: vec![], ids: None, units: None }).unwrap_err().status, 422);
    }
}
