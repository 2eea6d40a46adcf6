//! Building what a daemon serves from a configuration: the engine (model + policy) and the
//! metrics' model description. Used at start-up and by every reload, so both validate the
//! same way.

use crate::config::{Config, ModelSource};
use crate::metrics::Metrics;
use crate::model::file::load_model;
use crate::model::{LinearModel, builtin};

use super::engine::{Decisions, Engine};

/// Why an engine could not be built.
#[derive(Debug, thiserror::Error)]
pub enum BuildError {
    /// The model file was refused.
    #[error(transparent)]
    ModelFile(#[from] crate::model::file::ModelFileError),
    /// The built-in model could not be trained (a bug).
    #[error(transparent)]
    Builtin(#[from] builtin::BuiltinError),
    /// Model and policy do not fit together.
    #[error(transparent)]
    Engine(#[from] super::engine::EngineError),
}

/// Loads the configured model (or trains the built-in one) and pairs it with the policy.
/// Blocking: model loading reads a file and the built-in model trains for about a second.
pub fn build_engine(config: &Config) -> Result<Engine, BuildError> {
    let (model, origin) = match &config.model {
        ModelSource::File(path) => (load_model(path)?, path.display().to_string()),
        ModelSource::Builtin => {
            tracing::warn!("{}", builtin::WARNING);
            (
                builtin::demonstration_model()?,
                "built-in demonstration model".to_string(),
            )
        }
    };
    let decisions = Decisions {
        policy: config.policy.clone(),
        headers: config.headers.clone(),
        on_failure: config.on_failure,
    };
    Ok(Engine::new(model, origin, decisions)?)
}

/// Publishes the model's identity in the `tamis_model_info` metric.
pub fn describe_model(metrics: &Metrics, model: &LinearModel) {
    let spec = model.spec();
    let summary = model.summary();
    metrics.set_model_info(
        &summary.tool_version,
        &summary.trained_at_unix.to_string(),
        &format!(
            "v{} norm{} b{} n{} seed{}",
            spec.version, spec.normalization_version, spec.hash_bits, spec.max_ngram, spec.seed
        ),
    );
}
