//! The one list of API routes. The router is built from it, and the OpenAPI document is
//! written from it, so the two cannot drift apart (a test checks both ways anyway). Each
//! route names its parameters, the scope it needs, and what it answers.

use serde_json::{Map, Value, json};

use crate::store::TokenScope;

/// What answers a route.
#[derive(Debug, Clone, Copy, PartialEq, Eq)]
pub enum Handler {
    Listing(Endpoint),
    Query,
    OpenApi,
}

/// The listings the API serves (answered by the CLI's own functions).
#[derive(Debug, Clone, Copy, PartialEq, Eq)]
pub enum Endpoint {
    Sources,
    Snapshots,
    Curve,
    Nowcast,
    Scores,
    Delays,
    Quality,
    Alerts,
}

/// One query parameter.
#[derive(Debug, Clone, Copy)]
pub struct Param {
    pub name: &'static str,
    pub required: bool,
    pub description: &'static str,
}

/// One route under `/api/v1`.
#[derive(Debug, Clone, Copy)]
pub struct Route {
    pub method: Method,
    /// Relative to `/api/v1`.
    pub path: &'static str,
    pub handler: Handler,
    /// `None`: no token needed.
    pub scope: Option<TokenScope>,
    pub summary: &'static str,
    pub params: &'static [Param],
}

#[derive(Debug, Clone, Copy, PartialEq, Eq)]
pub enum Method {
    Get,
    Post,
}

impl Method {
    pub fn name(self) -> &'static str {
        match self {
            Method::Get => "get",
            Method::Post => "post",
        }
    }
}

/// Where the API lives.
pub const API_BASE: &str = "/api/v1";

const fn param(name: &'static str, required: bool, description: &'static str) -> Param {
    Param { name, required, description }
}

const FORMAT: Param = param("format", false, "json (default) or csv; `Accept: text/csv` also gives CSV");
const AS_OF: Param = param(
    "as_of",
    false,
    "RFC 3339 time or YYYY-MM-DD (end of that day, UTC): answer from the snapshot current then (default: the latest)",
);
const SOURCE: Param = param("source", true, "source name");
const SOURCE_FILTER: Param = param("source", false, "only this source");
const BY: Param = param("by", true, "date field: onset_date, report_date, ... (or onset, report, ...)");

/// Every route of the API.
pub const ROUTES: &[Route] = &[
    Route {
        method: Method::Get,
        path: "/sources",
        handler: Handler::Listing(Endpoint::Sources),
        scope: Some(TokenScope::Read),
        summary: "Configured sources with their snapshot counts and latest applied snapshot",
        params: &[FORMAT],
    },
    Route {
        method: Method::Get,
        path: "/snapshots",
        handler: Handler::Listing(Endpoint::Snapshots),
        scope: Some(TokenScope::Read),
        summary: "Snapshots with status and row counts (as `tidemark snapshots`)",
        params: &[SOURCE_FILTER, FORMAT],
    },
    Route {
        method: Method::Get,
        path: "/curve",
        handler: Handler::Listing(Endpoint::Curve),
        scope: Some(TokenScope::Read),
        summary: "Epidemic curve: counts per day of a date field as of a snapshot (as `tidemark curve`)",
        params: &[
            SOURCE,
            BY,
            AS_OF,
            param("stratify", false, "jurisdiction, age, sex, outcome or hospitalised"),
            FORMAT,
        ],
    },
    Route {
        method: Method::Get,
        path: "/nowcast",
        handler: Handler::Listing(Endpoint::Nowcast),
        scope: Some(TokenScope::Read),
        summary: "Backfill-corrected counts with 50/90/95% prediction intervals (as `tidemark nowcast`); estimates, not certainties",
        params: &[
            SOURCE,
            BY,
            AS_OF,
            param("method", false, "auto (default), hazard, smooth or ensemble"),
            param("stratify", false, "jurisdiction, age or sex"),
            FORMAT,
        ],
    },
    Route {
        method: Method::Get,
        path: "/scores",
        handler: Handler::Listing(Endpoint::Scores),
        scope: Some(TokenScope::Read),
        summary: "Rolling scores of the stored nowcasts whose truth has matured, by method, stratum and horizon (as `tidemark scores`); they drive `auto`",
        params: &[SOURCE, BY, AS_OF, FORMAT],
    },
    Route {
        method: Method::Get,
        path: "/delays",
        handler: Handler::Listing(Endpoint::Delays),
        scope: Some(TokenScope::Read),
        summary: "Delay distribution summary and fits with censoring and truncation (as `tidemark delays`)",
        params: &[
            SOURCE,
            param("from", true, "start date field"),
            param("to", true, "end date field, or first_seen"),
            param("family", false, "auto (default), gamma, lognormal or weibull"),
            AS_OF,
            param("stratify", false, "jurisdiction, age or sex"),
            param("by_week", false, "true: one row per week of the start date"),
            param("compare_by", false, "Mann-Whitney U tests between the groups of this field"),
            FORMAT,
        ],
    },
    Route {
        method: Method::Get,
        path: "/quality",
        handler: Handler::Listing(Endpoint::Quality),
        scope: Some(TokenScope::Read),
        summary: "Data-quality measures of the snapshot current at as_of (view quality_latest without as_of)",
        params: &[SOURCE_FILTER, AS_OF, FORMAT],
    },
    Route {
        method: Method::Get,
        path: "/alerts",
        handler: Handler::Listing(Endpoint::Alerts),
        scope: Some(TokenScope::Read),
        summary: "Alerts open at as_of (view alert_open without as_of); signals for investigation, not confirmed outbreaks",
        params: &[SOURCE_FILTER, AS_OF, FORMAT],
    },
    Route {
        method: Method::Post,
        path: "/query",
        handler: Handler::Query,
        scope: Some(TokenScope::Sql),
        summary: "One read-only SQL statement; body {\"sql\": \"SELECT ...\"}; refused if it would write; row, time, value-size and answer-size limits, a few at once",
        params: &[FORMAT],
    },
    Route {
        method: Method::Get,
        path: "/openapi.json",
        handler: Handler::OpenApi,
        scope: None,
        summary: "This OpenAPI 3 document",
        params: &[],
    },
];

/// The OpenAPI 3.0 document of `ROUTES`.
pub fn openapi() -> Value {
    let mut paths = Map::new();
    for route in ROUTES {
        let entry = paths.entry(format!("{API_BASE}{}", route.path)).or_insert_with(|| json!({}));
        entry[route.method.name()] = operation(route);
    }
    json!({
        "openapi": "3.0.3",
        "info": {
            "title": "tidemark API",
            "version": env!("CARGO_PKG_VERSION"),
            "description": "Read-only access to a tidemark store: versioned case line lists, epidemic curves, \
                nowcasts, delay distributions, data quality and alerts. Nowcasts are estimates with stated \
                uncertainty; alerts are signals for investigation, not confirmed outbreaks; follow your \
                jurisdiction's protocols. Responses are JSON arrays of objects with snake_case keys, or CSV."
        },
        "servers": [{"url": "/"}],
        "components": {
            "securitySchemes": {"bearer": {"type": "http", "scheme": "bearer", "description": "a token from `tidemark token create NAME --scope read|sql`"}},
            "schemas": {
                "Rows": {"type": "array", "items": {"type": "object", "additionalProperties": true}},
                "Error": {"type": "object", "properties": {"error": {"type": "string"}}, "required": ["error"]},
                "Query": {"type": "object", "properties": {"sql": {"type": "string"}}, "required": ["sql"]}
            }
        },
        "paths": paths,
    })
}

fn operation(route: &Route) -> Value {
    let params: Vec<Value> = route
        .params
        .iter()
        .map(|p| {
            json!({"name": p.name, "in": "query", "required": p.required,
                   "description": p.description, "schema": {"type": "string"}})
        })
        .collect();
    let error = |text: &str| json!({"description": text, "content": {"application/json": {"schema": {"$ref": "#/components/schemas/Error"}}}});
    let mut responses = json!({
        "200": {"description": "rows", "content": {
            "application/json": {"schema": {"$ref": "#/components/schemas/Rows"}},
            "text/csv": {"schema": {"type": "string"}}}},
        "400": error("bad parameter or refused query"),
    });
    if route.handler == Handler::OpenApi {
        responses = json!({"200": {"description": "this document", "content": {"application/json": {}}}});
    }
    let mut op = json!({
        "summary": route.summary,
        "operationId": route.path.trim_start_matches('/').replace(['.', '/'], "_"),
        "parameters": params,
        "responses": responses,
    });
    if let Some(scope) = route.scope {
        op["security"] = json!([{"bearer": []}]);
        op["description"] = json!(format!("needs a token with scope {} (sql includes read)", scope.name()));
        op["responses"]["401"] = error("missing, wrong or revoked token");
        op["responses"]["403"] = error("the token lacks the scope");
        op["responses"]["404"] = error("no such source or no applied snapshot at that time");
        op["responses"]["408"] = error("the request took longer than serve.request_timeout");
        op["responses"]["503"] = error("not available in this store");
    }
    if route.handler == Handler::Query {
        op["requestBody"] = json!({"required": true, "content": {"application/json": {"schema": {"$ref": "#/components/schemas/Query"}}}});
        op["responses"]["400"] =
            error("bad parameter, refused query, or a query over its row, time, value or answer limit");
        op["responses"]["413"] = error("body larger than the limit");
        op["responses"]["503"] = error(
            "serve.query_concurrency queries already running (see Retry-After), or the store is unavailable",
        );
    }
    op
}
