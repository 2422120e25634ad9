//! The active model, swapped atomically and restored from the store on start.
//!
//! Scoring loads the active model with one atomic pointer read (`arc-swap`); a promotion or a
//! rollback stores a new pointer. A request holds its own `Arc`, so it never sees a
//! half-swapped state and an old model lives until its last request ends. The shadowing
//! candidate, if any, sits beside it the same way.

use std::sync::Arc;

use arc_swap::ArcSwapOption;

use crate::model::Model;
use crate::schema::Schema;
use crate::store::{Store, StoreError};

#[derive(Debug, thiserror::Error)]
pub enum RestoreError {
    #[error(transparent)]
    Store(#[from] StoreError),
    #[error("the activation history names model {0}, which is not in the store")]
    MissingModel(String),
    #[error("{0}; restore the matching config or roll back to a compatible model")]
    Incompatible(String),
}

#[derive(Default)]
pub struct Registry {
    active: ArcSwapOption<Model>,
    shadow: ArcSwapOption<Model>,
}

impl Registry {
    /// Loads the active model (the last entry of the activation history) from the store.
    pub fn restore(store: &dyn Store, schema: &Schema) -> Result<Registry, RestoreError> {
        let registry = Registry::default();
        if let Some(id) = store.active_history()?.last() {
            let model = store
                .model(id)?
                .ok_or_else(|| RestoreError::MissingModel(id.clone()))?;
            model
                .compatible_with(schema)
                .map_err(RestoreError::Incompatible)?;
            registry.activate(Arc::new(model));
        }
        if let Some(state) = store.shadow_state()? {
            // A shadow that no longer fits the schema is dropped, not fatal: it never answered.
            if let Some(model) = store.model(&state.candidate_id)? {
                if model.compatible_with(schema).is_ok() {
                    registry.set_shadow(Some(Arc::new(model)));
                }
            }
        }
        Ok(registry)
    }

    /// The active model, if any.
    pub fn active(&self) -> Option<Arc<Model>> {
        self.active.load_full()
    }

    pub fn active_id(&self) -> Option<String> {
        self.active.load().as_ref().map(|m| m.id.clone())
    }

    /// Makes `model` the active one for every request that starts after this call.
    pub fn activate(&self, model: Arc<Model>) {
        self.active.store(Some(model));
    }

    /// The candidate scoring live requests in the shadows, if any.
    pub fn shadow(&self) -> Option<Arc<Model>> {
        self.shadow.load_full()
    }

    pub fn set_shadow(&self, model: Option<Arc<Model>>) {
        self.shadow.store(model);
    }
}
