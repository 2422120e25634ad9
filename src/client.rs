//! The command line's side of the HTTP API: one small blocking client for the commands that
//! talk to a running server (`status`, `log`, `models`, `retrain`, `rollback`, `freeze`,
//! `unfreeze`, `import --server`).
//!
//! Every refusal comes back as the server's problem detail, so the command can print it and
//! exit non-zero.

use std::time::Duration;

use serde_json::Value as Json;

/// A call that did not succeed.
#[derive(Debug, thiserror::Error)]
pub enum ClientError {
    #[error("cannot reach {url}: {source}")]
    Unreachable { url: String, source: reqwest::Error },
    #[error("{method} {path} → {status}: {detail}")]
    Refused {
        method: &'static str,
        path: String,
        status: u16,
        detail: String,
    },
    #[error("the server's answer to {path} is not JSON: {source}")]
    NotJson {
        path: String,
        source: reqwest::Error,
    },
    #[error(transparent)]
    Runtime(#[from] std::io::Error),
}

/// A client for one server, with an optional API key.
pub struct ApiClient {
    base: String,
    key: Option<String>,
    http: reqwest::Client,
    runtime: tokio::runtime::Runtime,
}

impl ApiClient {
    pub fn new(server: &str, key: Option<String>) -> Result<ApiClient, ClientError> {
        let runtime = tokio::runtime::Builder::new_current_thread()
            .enable_all()
            .build()?;
        let http = reqwest::Client::builder()
            .timeout(Duration::from_secs(60))
            .build()
            .map_err(|source| ClientError::Unreachable {
                url: server.to_owned(),
                source,
            })?;
        Ok(ApiClient {
            base: server.trim_end_matches('/').to_owned(),
            key,
            http,
            runtime,
        })
    }

    pub fn get(&self, path: &str) -> Result<Json, ClientError> {
        self.send("GET", path, None)
    }

    pub fn post(&self, path: &str, body: &Json) -> Result<Json, ClientError> {
        self.send("POST", path, Some(body))
    }

    /// A GET whose successful answer is text (an exported document); a refusal is still the
    /// server's problem detail.
    pub fn get_text(&self, path: &str) -> Result<String, ClientError> {
        let url = format!("{}{path}", self.base);
        self.runtime.block_on(async {
            let mut request = self.http.get(&url);
            if let Some(key) = &self.key {
                request = request.bearer_auth(key);
            }
            let response = request
                .send()
                .await
                .map_err(|source| ClientError::Unreachable {
                    url: url.clone(),
                    source,
                })?;
            let status = response.status();
            if status.is_success() {
                return response
                    .text()
                    .await
                    .map_err(|source| ClientError::Unreachable { url, source });
            }
            let body: Json = response.json().await.unwrap_or(Json::Null);
            Err(ClientError::Refused {
                method: "GET",
                path: path.to_owned(),
                status: status.as_u16(),
                detail: body["detail"]
                    .as_str()
                    .unwrap_or("no detail given")
                    .to_owned(),
            })
        })
    }

    fn send(
        &self,
        method: &'static str,
        path: &str,
        body: Option<&Json>,
    ) -> Result<Json, ClientError> {
        let url = format!("{}{path}", self.base);
        self.runtime.block_on(async {
            let mut request = match body {
                Some(body) => self.http.post(&url).json(body),
                None => self.http.get(&url),
            };
            if let Some(key) = &self.key {
                request = request.bearer_auth(key);
            }
            let response = request
                .send()
                .await
                .map_err(|source| ClientError::Unreachable {
                    url: url.clone(),
                    source,
                })?;
            let status = response.status();
            let body: Json = response
                .json()
                .await
                .map_err(|source| ClientError::NotJson {
                    path: path.to_owned(),
                    source,
                })?;
            if status.is_success() {
                Ok(body)
            } else {
                Err(ClientError::Refused {
                    method,
                    path: path.to_owned(),
                    status: status.as_u16(),
                    detail: body["detail"]
                        .as_str()
                        .unwrap_or("no detail given")
                        .to_owned(),
                })
            }
        })
    }
}
