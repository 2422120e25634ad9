//! The bare axum ceiling as a server of its own, for `benches/external_load.sh`: the score
//! body's 30 named features into a fixed struct, a dot product, a sigmoid and a JSON answer.
//! No validation, no record, no middleware: what any axum service on this machine pays for
//! the same request, so the service's cost can be read against it from outside the process.
//!
//! `cargo run --release --example bare_ceiling -- 127.0.0.1:9101`

#[path = "../benches/support/mod.rs"]
mod support;

#[tokio::main]
async fn main() -> std::io::Result<()> {
    let listen = std::env::args()
        .nth(1)
        .unwrap_or_else(|| "127.0.0.1:9101".to_owned());
    let app = axum::Router::new().route("/v1/score", axum::routing::post(support::bare::score));
    let listener = tokio::net::TcpListener::bind(&listen).await?;
    eprintln!("bare ceiling listening on {listen}");
    axum::serve(listener, app).await
}
