//! The command line's side of the HTTP API: one small blocking client for the commands that
//! talk to a running server (`status`, `log`, `models`, `retrain`, `rollback`, `freeze`,
//! `unfreeze`, `import --server`).
//!
//! Every refusal comes back as the server's problem detail, so the command can print it and
//! exit non-zero.
//!
//! HTTPS goes through rustls with the Mozilla root certificates (webpki-roots); a server whose
//! certificate comes from a private or self-signed authority is trusted with `--ca-cert`. Bulk
//! writes (`import --server`) go through [`ApiClient::post_retrying`], which waits out a busy
//! server's 503 for as long as its `Retry-After` says, a bounded number of times.

use std::path::Path;
use std::time::Duration;

use serde_json::Value as Json;

/// A call that did not succeed.
#[derive(Debug, thiserror::Error)]
pub(crate) enum ClientError {
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
    #[error("cannot use the CA certificate {path}: {rule}")]
    CaCertificate { path: String, rule: String },
    #[error(transparent)]
    Runtime(#[from] std::io::Error),
}

/// How [`ApiClient::post_retrying`] waits out a busy server.
#[derive(Debug, Clone, Copy)]
pub(crate) struct RetryPolicy {
    /// Tries in all, the first included.
    pub attempts: u32,
    /// The wait when a 503 carries no (readable) `Retry-After`.
    pub default_wait: Duration,
    /// The longest wait honoured, whatever `Retry-After` asks.
    pub max_wait: Duration,
}

impl Default for RetryPolicy {
    fn default() -> Self {
        RetryPolicy {
            attempts: 10,
            default_wait: Duration::from_secs(1),
            max_wait: Duration::from_secs(30),
        }
    }
}

impl RetryPolicy {
    /// The wait a 503's `Retry-After` asks for (delay-seconds; an HTTP date counts as the
    /// default), within `max_wait`.
    pub(crate) fn wait(&self, retry_after: Option<&str>) -> Duration {
        retry_after
            .and_then(|v| v.trim().parse::<u64>().ok())
            .map_or(self.default_wait, Duration::from_secs)
            .min(self.max_wait)
    }
}

/// One answer, before it is judged.
struct Answer {
    status: u16,
    retry_after: Option<String>,
    body: Json,
}

/// A client for one server, with an optional API key.
pub(crate) struct ApiClient {
    base: String,
    key: Option<String>,
    http: reqwest::Client,
    runtime: tokio::runtime::Runtime,
}

impl ApiClient {
    pub(crate) fn new(server: &str, key: Option<String>) -> Result<ApiClient, ClientError> {
        ApiClient::with_ca_cert(server, key, None)
    }

    /// A client that also trusts the certificate authority (or self-signed certificate) in
    /// the PEM file `ca_cert`, beside the usual public roots.
    pub(crate) fn with_ca_cert(
        server: &str,
        key: Option<String>,
        ca_cert: Option<&Path>,
    ) -> Result<ApiClient, ClientError> {
        let runtime = tokio::runtime::Builder::new_current_thread()
            .enable_all()
            .build()?;
        let mut builder = reqwest::Client::builder().timeout(Duration::from_secs(60));
        if let Some(path) = ca_cert {
            let refused = |rule: String| ClientError::CaCertificate {
                path: path.display().to_string(),
                rule,
            };
            let pem = std::fs::read(path).map_err(|e| refused(e.to_string()))?;
            let certificates = reqwest::Certificate::from_pem_bundle(&pem)
                .map_err(|e| refused(format!("not a PEM certificate: {e}")))?;
            if certificates.is_empty() {
                return Err(refused("holds no PEM certificate".into()));
            }
            for certificate in certificates {
                builder = builder.add_root_certificate(certificate);
            }
        }
        let http = builder.build().map_err(|source| ClientError::Unreachable {
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

    pub(crate) fn get(&self, path: &str) -> Result<Json, ClientError> {
        self.send("GET", path, None)
    }

    pub(crate) fn post(&self, path: &str, body: &Json) -> Result<Json, ClientError> {
        self.send("POST", path, Some(body))
    }

    /// A GET whose successful answer is text (an exported document); a refusal is still the
    /// server's problem detail.
    pub(crate) fn get_text(&self, path: &str) -> Result<String, ClientError> {
        let url = format!("{}{path}", self.base);
        self.runtime.block_on(async {
            let response = self.start(&url, None).await?;
            let status = response.status().as_u16();
            if (200..300).contains(&status) {
                return response
                    .text()
                    .await
                    .map_err(|source| ClientError::Unreachable { url, source });
            }
            let body: Json = response.json().await.unwrap_or(Json::Null);
            Err(refused("GET", path, status, &body))
        })
    }

    /// POSTs `body`, and on 503 waits as `Retry-After` asks and sends it again, up to
    /// `policy.attempts` tries. A request that fails on the way (no connection, or one closed
    /// while the body was still being written, which is how a server that sheds a large body
    /// often answers) is retried the same way after the default wait. `on_wait(attempt, wait,
    /// why)` hears of each wait (for a message). Only for requests that are safe to repeat,
    /// such as examples with their ids.
    pub(crate) fn post_retrying(
        &self,
        path: &str,
        body: &Json,
        policy: RetryPolicy,
        mut on_wait: impl FnMut(u32, Duration, &str),
    ) -> Result<Json, ClientError> {
        let mut attempt = 1;
        loop {
            let last = attempt >= policy.attempts;
            let (wait, why) = match self.exchange(path, Some(body)) {
                Ok(answer) if answer.status != 503 || last => return judge("POST", path, answer),
                Ok(answer) => (
                    policy.wait(answer.retry_after.as_deref()),
                    "server busy (503)".to_owned(),
                ),
                Err(ClientError::Unreachable { source, .. }) if !last => (
                    policy.default_wait,
                    format!("request failed: {}", innermost(&source)),
                ),
                Err(other) => return Err(other),
            };
            on_wait(attempt, wait, &why);
            std::thread::sleep(wait);
            attempt += 1;
        }
    }

    fn send(
        &self,
        method: &'static str,
        path: &str,
        body: Option<&Json>,
    ) -> Result<Json, ClientError> {
        let answer = self.exchange(path, body)?;
        judge(method, path, answer)
    }

    /// Sends one request (a POST of `body`, else a GET) with the key, if any.
    async fn start(
        &self,
        url: &str,
        body: Option<&Json>,
    ) -> Result<reqwest::Response, ClientError> {
        let mut request = match body {
            Some(body) => self.http.post(url).json(body),
            None => self.http.get(url),
        };
        if let Some(key) = &self.key {
            request = request.bearer_auth(key);
        }
        request
            .send()
            .await
            .map_err(|source| ClientError::Unreachable {
                url: url.to_owned(),
                source,
            })
    }

    /// One request and its answer, whatever the status.
    fn exchange(&self, path: &str, body: Option<&Json>) -> Result<Answer, ClientError> {
        let url = format!("{}{path}", self.base);
        self.runtime.block_on(async {
            let response = self.start(&url, body).await?;
            let status = response.status().as_u16();
            let retry_after = response
                .headers()
                .get(reqwest::header::RETRY_AFTER)
                .and_then(|v| v.to_str().ok())
                .map(str::to_owned);
            let body: Json = response
                .json()
                .await
                .map_err(|source| ClientError::NotJson {
                    path: path.to_owned(),
                    source,
                })?;
            Ok(Answer {
                status,
                retry_after,
                body,
            })
        })
    }
}

/// The deepest cause of an error, which names what actually happened (a refused connection,
/// a broken pipe) without the layers above repeating the URL.
fn innermost(error: &(dyn std::error::Error + 'static)) -> String {
    let mut cause = error;
    while let Some(next) = cause.source() {
        cause = next;
    }
    cause.to_string()
}

/// A 2xx answer's body, or the refusal with the server's detail.
fn judge(method: &'static str, path: &str, answer: Answer) -> Result<Json, ClientError> {
    if (200..300).contains(&answer.status) {
        Ok(answer.body)
    } else {
        Err(refused(method, path, answer.status, &answer.body))
    }
}

/// A refusal, with the detail of the server's problem body.
fn refused(method: &'static str, path: &str, status: u16, body: &Json) -> ClientError {
    ClientError::Refused {
        method,
        path: path.to_owned(),
        status,
        detail: body["detail"]
            .as_str()
            .unwrap_or("no detail given")
            .to_owned(),
    }
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn retry_after_in_seconds_is_honoured_within_the_longest_wait() {
        let policy = RetryPolicy::default();
        assert_eq!(policy.wait(Some("1")), Duration::from_secs(1));
        assert_eq!(policy.wait(Some(" 7 ")), Duration::from_secs(7));
        assert_eq!(policy.wait(Some("3600")), policy.max_wait);
        // An HTTP date, garbage or no header: the default wait.
        assert_eq!(
            policy.wait(Some("Wed, 21 Oct 2026 07:28:00 GMT")),
            policy.default_wait
        );
        assert_eq!(policy.wait(Some("-1")), policy.default_wait);
        assert_eq!(policy.wait(None), policy.default_wait);
    }

    #[test]
    fn a_missing_or_empty_ca_certificate_file_is_refused_naming_it() {
        let dir = tempfile::tempdir().unwrap();
        let missing = dir.path().join("none.pem");
        let error = ApiClient::with_ca_cert("https://127.0.0.1:1", None, Some(&missing))
            .err()
            .unwrap()
            .to_string();
        assert!(error.contains("none.pem"), "{error}");
        let empty = dir.path().join("empty.pem");
        std::fs::write(&empty, "not a certificate\n").unwrap();
        let error = ApiClient::with_ca_cert("https://127.0.0.1:1", None, Some(&empty))
            .err()
            .unwrap()
            .to_string();
        assert!(error.contains("empty.pem"), "{error}");
    }
}
