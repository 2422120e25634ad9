//! What the handlers reach: the running service's parts, as the API sees them.
//!
//! The API defines the state it needs and the application (`app`) builds it, so the API never
//! imports the layer that starts it. Every part is shared (`Arc`): the application keeps its
//! own handles to stop them in order.

use std::sync::Arc;

use crate::access::Keyring;
use crate::config::Config;
use crate::monitor::DriftCache;
use crate::registry::Registry;
use crate::scheduler::Retrainer;
use crate::schema::Schema;
use crate::store::outcome_writer::OutcomeWriter;
use crate::store::recorded::FeatureLayout;
use crate::store::recorder::ScoreRecorder;
use crate::store::watched::WriteWatch;
use crate::store::Store;
use crate::telemetry::Telemetry;

/// The parts a request can touch.
pub struct ApiState {
    pub config: Arc<Config>,
    pub schema: Arc<Schema>,
    /// The schema's names as score records render their values with (see `store::recorded`).
    pub record_layout: Arc<FeatureLayout>,
    /// Reads (log, models, runs, drift) and the examples write.
    pub store: Arc<dyn Store>,
    /// The active model and the shadow for scoring; rollback and freeze go through it.
    pub registry: Arc<Registry>,
    /// Score records, written off the response path.
    pub recorder: Arc<ScoreRecorder>,
    /// Outcomes, group-committed before the answer.
    pub outcomes: Arc<OutcomeWriter>,
    /// Manual retrains, and the label counts the schedule watches.
    pub retrainer: Arc<Retrainer>,
    pub keyring: Arc<Keyring>,
    pub telemetry: Arc<Telemetry>,
    /// How the store's latest writes ended (the probes read it instead of writing).
    pub writes: Arc<WriteWatch>,
    /// The latest drift report, so a metrics scrape does not recompute it.
    pub drift_cache: DriftCache,
}
