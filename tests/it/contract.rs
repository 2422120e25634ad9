//! openapi.yaml against the live router: every documented route answers, every route is
//! documented.

use std::collections::BTreeSet;

use crate::helpers::spawn_app;

/// (METHOD, path) pairs from openapi.yaml's `paths` section (two-space path keys, four-space
/// method keys: the layout the file keeps).
fn documented() -> BTreeSet<(String, String)> {
    let text = include_str!("../../openapi.yaml");
    let mut out = BTreeSet::new();
    let mut in_paths = false;
    let mut path = String::new();
    for line in text.lines() {
        if line == "paths:" {
            in_paths = true;
            continue;
        }
        if in_paths && !line.starts_with(' ') && !line.is_empty() {
            break;
        }
        if let Some(p) = line.strip_prefix("  /") {
            path = format!("/{}", p.trim_end_matches(':'));
        } else if let Some(m) = line.strip_prefix("    ").and_then(|l| l.strip_suffix(':')) {
            if ["get", "post", "put", "delete", "patch"].contains(&m) {
                out.insert((m.to_uppercase(), path.clone()));
            }
        }
    }
    out
}

#[tokio::test(flavor = "multi_thread", worker_threads = 2)]
async fn every_route_is_documented_and_every_documented_route_answers() {
    let routed: BTreeSet<(String, String)> = understudy::api::routes()
        .into_iter()
        .map(|r| (r.method.to_string(), r.path.to_owned()))
        .collect();
    assert_eq!(
        documented(),
        routed,
        "openapi.yaml and api::routes() differ"
    );

    let app = spawn_app().await;
    for (method, path) in documented() {
        let concrete = path.replace("{id}", "x-1");
        let request = match method.as_str() {
            "GET" => app.client.get(app.url(&concrete)),
            _ => app
                .client
                .post(app.url(&concrete))
                .json(&serde_json::json!({})),
        };
        let response = request.send().await.unwrap();
        let status = response.status().as_u16();
        let is_problem = response
            .headers()
            .get("content-type")
            .is_some_and(|v| v == "application/problem+json");
        // A 404 is fine only as the route's own "no such id" problem, not the fallback.
        // Every answer is JSON except the metrics' text exposition.
        let text = response.text().await.unwrap();
        let body: serde_json::Value = if path == "/metrics" {
            assert!(text.contains("# TYPE understudy_"), "{text}");
            serde_json::Value::String(text)
        } else if path == "/" {
            assert!(text.contains("<svg id=\"roc-chart\""), "{text}");
            serde_json::Value::String(text)
        } else {
            serde_json::from_str(&text).unwrap()
        };
        assert_ne!(status, 405, "{method} {path}");
        assert!(
            status < 500 || status == 503,
            "{method} {path} → {status}: {body}"
        );
        if status == 404 {
            assert!(
                is_problem && body["detail"] != "no such route; see openapi.yaml",
                "{method} {path}: {body}"
            );
        }
    }
    let (status, body) = app.get("/v1/nothing-here").await;
    assert_eq!(
        (status, body["detail"].as_str()),
        (404, Some("no such route; see openapi.yaml"))
    );
    app.stop().await;
}

#[test]
fn the_contract_is_valid_yaml_with_a_response_for_every_operation() {
    use yaml_rust2::{Yaml, YamlLoader};
    let docs = YamlLoader::load_from_str(include_str!("../../openapi.yaml"))
        .expect("openapi.yaml parses as YAML");
    let doc = &docs[0];
    assert_eq!(doc["openapi"].as_str(), Some("3.1.0"));
    let paths = doc["paths"].as_hash().expect("a paths mapping");
    assert_eq!(
        paths.len(),
        documented()
            .iter()
            .map(|(_, p)| p)
            .collect::<BTreeSet<_>>()
            .len()
    );
    for (path, item) in paths {
        for (method, operation) in item.as_hash().expect("a path item") {
            let responses = operation["responses"].as_hash();
            assert!(
                responses.is_some_and(|r| !r.is_empty()),
                "{path:?} {method:?} documents no response"
            );
            assert!(
                !matches!(operation["summary"], Yaml::BadValue),
                "{path:?} {method:?}"
            );
        }
    }
    // Schemas that are referenced exist.
    let schemas = doc["components"]["schemas"].as_hash().expect("schemas");
    let text = include_str!("../../openapi.yaml");
    for reference in text.split("#/components/schemas/").skip(1) {
        let name: String = reference
            .chars()
            .take_while(|c| c.is_alphanumeric())
            .collect();
        assert!(
            schemas.contains_key(&Yaml::String(name.clone())),
            "schema {name} is referenced but not defined"
        );
    }
}

/// A known path with a method it does not take is a 405 problem that keeps axum's `Allow`
/// (it was an empty body with no content type: the one error that was not a problem).
#[tokio::test(flavor = "multi_thread", worker_threads = 2)]
async fn a_method_a_path_does_not_take_is_a_405_problem_with_allow() {
    let app = spawn_app().await;
    for (method, path, allow) in [
        (reqwest::Method::DELETE, "/v1/score", "POST"),
        (reqwest::Method::GET, "/v1/retrain", "POST"),
        (reqwest::Method::PUT, "/v1/models/x-1", "GET,HEAD"),
    ] {
        let response = app
            .client
            .request(method.clone(), app.url(path))
            .send()
            .await
            .unwrap();
        assert_eq!(response.status(), 405, "{method} {path}");
        let headers = response.headers().clone();
        assert_eq!(
            headers.get("content-type").unwrap(),
            "application/problem+json"
        );
        assert_eq!(headers.get("allow").unwrap(), allow, "{method} {path}");
        let body: serde_json::Value = response.json().await.unwrap();
        assert_eq!(
            (body["status"].as_u64(), body["type"].as_str()),
            (Some(405), Some("/problems/method-not-allowed")),
            "{body}"
        );
    }
    app.stop().await;
}

/// An `{id}` whose percent-decoding is not UTF-8 is a 422 problem naming `id` (it was axum's
/// plain-text 400).
#[tokio::test(flavor = "multi_thread", worker_threads = 2)]
async fn an_id_that_is_not_utf8_is_a_422_problem_naming_it() {
    let app = spawn_app().await;
    for path in ["/v1/models/%FF", "/v1/runs/r-%C3%28"] {
        let response = app.client.get(app.url(path)).send().await.unwrap();
        assert_eq!(
            response.headers().get("content-type").unwrap(),
            "application/problem+json",
            "{path}"
        );
        let (status, body) = crate::helpers::split(response).await;
        assert_eq!(status, 422, "{path}: {body}");
        assert_eq!(
            crate::helpers::problem_fields(&body),
            vec!["id".to_owned()],
            "{body}"
        );
    }
    app.stop().await;
}
