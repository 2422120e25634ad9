//! `understudy export`: a model as a PMML 4.4 document, from the store on disk, a running
//! server, or a model file written by `train --model-out`.

use super::*;

/// Where `understudy export` finds the model.
pub(super) enum ExportSource {
    /// The config's data dir (or `--data`).
    Store,
    Server {
        server: String,
        key: Option<String>,
    },
    /// A file written by `train --model-out`.
    File(PathBuf),
}

pub(super) fn export(
    config: &Config,
    source: ExportSource,
    id: Option<&str>,
    out: Option<&Path>,
) -> anyhow::Result<()> {
    let schema = config.schema();
    let (model_id, document) = match source {
        ExportSource::Server { server, key } => {
            let client = ApiClient::new(&server, key)?;
            let id = match id {
                Some(id) => id.to_owned(),
                None => client.get("/v1/models")?["active"]
                    .as_str()
                    .context("the server has no active model; name one with --model ID")?
                    .to_owned(),
            };
            let document = client.get_text(&format!("/v1/models/{}/pmml", path_segment(&id)))?;
            (id, document)
        }
        ExportSource::Store | ExportSource::File(_) => {
            let model = match source {
                ExportSource::File(path) => {
                    let text = std::fs::read_to_string(&path)
                        .with_context(|| format!("reading {}", path.display()))?;
                    let file: Json = serde_json::from_str(&text)
                        .with_context(|| format!("{} is not JSON", path.display()))?;
                    serde_json::from_value::<crate::model::Model>(file["model"].clone())
                        .with_context(|| {
                            format!(
                                "{} is not a model file written by `understudy train --model-out` \
                                 (its `model` member does not read as a model)",
                                path.display()
                            )
                        })?
                }
                _ => {
                    let store = SledStore::open(&config.server.data_dir)?;
                    let id = match id {
                        Some(id) => id.to_owned(),
                        None => store.active_history()?.pop().with_context(|| {
                            format!(
                                "the store in {} has no active model; name one with --model ID",
                                config.server.data_dir.display()
                            )
                        })?,
                    };
                    store.model(&id)?.with_context(|| {
                        format!(
                            "no model with id `{id}` in {}",
                            config.server.data_dir.display()
                        )
                    })?
                }
            };
            let document = crate::model::pmml::to_pmml(&model, &schema)
                .with_context(|| format!("cannot export model {}", model.id))?;
            (model.id, document)
        }
    };
    match out {
        Some(path) => {
            std::fs::write(path, &document)
                .with_context(|| format!("writing {}", path.display()))?;
            eprintln!("wrote model {model_id} as PMML 4.4 to {}", path.display());
            Ok(())
        }
        None => emit(&document),
    }
}

/// A model id as one URL path segment.
pub(super) fn path_segment(id: &str) -> String {
    id.bytes()
        .map(|b| match b {
            b'A'..=b'Z' | b'a'..=b'z' | b'0'..=b'9' | b'-' | b'_' | b'.' | b'~' => {
                (b as char).to_string()
            }
            b => format!("%{b:02X}"),
        })
        .collect()
}
