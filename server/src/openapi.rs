//! The OpenAPI 3 document, built from the same route table as the router: the table
//! (`crate::api::routes`) holds a [`RouteDoc`] per route, defined here so that this
//! module depends on nothing of the HTTP layer.

use crate::auth::Access;
use axum::http::Method;
use serde_json::{json, Map, Value};

/// Kind of request body a route takes.
#[derive(Clone, Copy, Debug, PartialEq, Eq)]
pub enum BodyKind {
    None,
    /// A JSON document of the named schema.
    Json(&'static str),
    /// Raw bytes (a model).
    Binary,
}

/// One route as documented: method, path (axum syntax, `{param}`), who may call it,
/// summary, query parameters and bodies.
#[derive(Clone, Debug)]
pub struct RouteDoc {
    pub method: Method,
    pub path: &'static str,
    pub access: Access,
    pub summary: &'static str,
    pub query: &'static [(&'static str, &'static str)],
    pub body: BodyKind,
    /// Content type of the success answer.
    pub produces: &'static str,
}

fn path_params(path: &str) -> Vec<String> {
    path.split('/').filter_map(|seg| seg.strip_prefix('{').and_then(|s| s.strip_suffix('}'))).map(String::from).collect()
}

/// An OpenAPI 3.0 document listing every route of `routes`.
pub fn document<'a>(routes: impl IntoIterator<Item = &'a RouteDoc>) -> Value {
    let mut paths = Map::new();
    for r in routes {
        let mut params: Vec<Value> = path_params(r.path)
            .into_iter()
            .map(|p| json!({"name": p, "in": "path", "required": true, "schema": {"type": "string"}}))
            .collect();
        for (name, desc) in r.query {
            params.push(json!({"name": name, "in": "query", "required": false, "description": desc, "schema": {"type": "string"}}));
        }
        let mut op = json!({
            "summary": r.summary,
            "operationId": format!("{}_{}", r.method.as_str().to_lowercase(),
                r.path.trim_start_matches('/').replace(['/', '.', '{', '}'], "_")),
            "parameters": params,
            "x-roles": r.access.roles(),
            "responses": {
                "200": {"description": "success", "content": {r.produces: {}}},
                "4XX": {"description": "bad request, unauthorized, forbidden, not found, conflict, too large, invalid",
                        "content": {"application/json": {"schema": {"$ref": "#/components/schemas/Error"}}}}
            }
        });
        if r.access == Access::Public {
            op["security"] = json!([]);
        }
        match r.body {
            BodyKind::None => {}
            BodyKind::Binary => {
                op["requestBody"] = json!({"required": true, "content": {"application/octet-stream": {"schema": {"type": "string", "format": "binary"}}}})
            }
            BodyKind::Json(schema) => {
                op["requestBody"] = json!({"required": true, "content": {"application/json": {"schema": {"$ref": format!("#/components/schemas/{schema}")}}}})
            }
        }
        let entry = paths.entry(r.path.to_string()).or_insert_with(|| json!({}));
        entry[r.method.as_str().to_lowercase()] = op;
    }
    json!({
        "openapi": "3.0.3",
        "info": {
            "title": "Tessera campaign server",
            "version": env!("CARGO_PKG_VERSION"),
            "description": format!("Campaigns, cells, leases and exact coverage accounting. {}", tessera_engine::caution::CAUTION)
        },
        "security": [{"bearer": []}],
        "paths": paths,
        "components": {
            "securitySchemes": {"bearer": {"type": "http", "scheme": "bearer"}},
            "schemas": {
                "Error": {"type": "object", "required": ["error", "detail"], "properties": {
                    "error": {"type": "string"}, "detail": {"type": "string"}, "field": {"type": "string"},
                    "errors": {"type": "array", "items": {"type": "object", "properties": {"path": {"type": "string"}, "message": {"type": "string"}}}}}},
                "Spec": {"type": "object", "description": "Campaign spec v1; controller.networks entries are sha256:HEX refs of uploaded models"},
                "LeaseRequest": {"type": "object", "required": ["max"], "properties": {
                    "max": {"type": "integer", "minimum": 1}, "worker": {"type": "string"}, "campaign_id": {"type": "string"}}},
                "ExtendRequest": {"type": "object", "required": ["lease_ids"], "properties": {
                    "lease_ids": {"type": "array", "items": {"type": "string"}}}},
                "SubmitRequest": {"type": "object", "required": ["results"], "properties": {
                    "worker": {"type": "string"}, "engine_version": {"type": "string"},
                    "results": {"type": "array", "items": {"type": "object", "required": ["lease_id", "result"], "properties": {
                        "lease_id": {"type": "string"},
                        "cell_id": {"type": "string", "description": "optional cross-check"},
                        "result": {"type": "object", "description": "verdict JSON {verdict, reason, split_hint, counterexample, stats} or {error}"},
                        "elapsed_ms": {"type": "number"}}}}}},
                "TokenRequest": {"type": "object", "required": ["role"], "properties": {
                    "role": {"type": "string", "enum": ["admin", "submitter", "worker", "viewer"]}, "label": {"type": "string"}}}
            }
        }
    })
}

#[cfg(test)]
mod tests {
    use super::*;
    use tessera_protocol::{ExtendRequest, LeaseRequest, ResultItem, SubmitRequest};

    /// The keys of `v` serialised, leaving out nulls.
    fn keys(v: impl serde::Serialize) -> Vec<String> {
        let v = serde_json::to_value(v).unwrap();
        let mut k: Vec<String> =
            v.as_object().unwrap().iter().filter(|(_, x)| !x.is_null()).map(|(k, _)| k.clone()).collect();
        k.sort();
        k
    }

    /// The schema's property names and required names, sorted.
    fn schema(v: &Value) -> (Vec<String>, Vec<String>) {
        let mut props: Vec<String> = v["properties"].as_object().unwrap().keys().cloned().collect();
        let mut req: Vec<String> = v["required"].as_array().unwrap().iter().map(|s| s.as_str().unwrap().to_string()).collect();
        props.sort();
        req.sort();
        (props, req)
    }

    #[test]
    fn request_schemas_match_the_protocol_types() {
        let doc = document(std::iter::empty());
        let s = &doc["components"]["schemas"];
        let item = |full: bool| ResultItem {
            lease_id: "l".into(),
            cell_id: full.then(|| "c".into()),
            result: json!({}),
            elapsed_ms: full.then_some(1.0),
        };
        // Every field is a property; the fields that are always written are required.
        let lease = |full: bool| LeaseRequest { max: 1, worker: full.then(|| "w".into()), campaign_id: full.then(|| "c".into()) };
        assert_eq!(schema(&s["LeaseRequest"]), (keys(lease(true)), keys(lease(false))));
        let ext = ExtendRequest { lease_ids: vec![] };
        assert_eq!(schema(&s["ExtendRequest"]), (keys(&ext), keys(&ext)));
        let submit = |full: bool| SubmitRequest {
            worker: full.then(|| "w".into()),
            engine_version: full.then(|| "0".into()),
            results: vec![item(full)],
        };
        assert_eq!(schema(&s["SubmitRequest"]), (keys(submit(true)), keys(submit(false))));
        assert_eq!(schema(&s["SubmitRequest"]["properties"]["results"]["items"]), (keys(item(true)), keys(item(false))));
    }
}
