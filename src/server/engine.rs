//! The scoring engine a daemon serves with: one model and a pool of analyzers.
//!
//! An engine is immutable once built; a reload builds a new one and swaps the shared
//! pointer, so a message always finishes on the engine it started with. Scoring is CPU work
//! and runs on blocking threads, never on the async workers.

use std::sync::{Arc, Mutex, RwLock};

use crate::analyze::Analyzer;
use crate::features::SpecError;
use crate::mail::MailError;
use crate::model::LinearModel;

/// The outcome of scoring one message.
#[derive(Debug, Clone, Copy, PartialEq)]
pub struct Score {
    /// `w · x + b`.
    pub margin: f64,
    /// Calibrated probability of junk, when the model has a calibration.
    pub probability: Option<f64>,
}

/// Why a message could not be scored.
#[derive(Debug, thiserror::Error)]
pub enum ScoreError {
    /// The bytes are not a mail message.
    #[error(transparent)]
    Mail(#[from] MailError),
    /// An analyzer could not be built (the spec was accepted at load, so this is a bug).
    #[error(transparent)]
    Spec(#[from] SpecError),
}

/// A model ready to score, with reusable analyzers.
#[derive(Debug)]
pub struct Engine {
    model: LinearModel,
    /// Where the model came from, for logs and metrics.
    origin: String,
    analyzers: Mutex<Vec<Analyzer>>,
}

impl Engine {
    /// An engine for `model`; refused when this binary cannot reproduce its feature spec.
    pub fn new(model: LinearModel, origin: impl Into<String>) -> Result<Self, SpecError> {
        // Build one analyzer now so an unsupported spec fails at load, not at first message.
        let first = Analyzer::new(model.spec().clone())?;
        Ok(Engine {
            model,
            origin: origin.into(),
            analyzers: Mutex::new(vec![first]),
        })
    }

    /// The model in use.
    pub fn model(&self) -> &LinearModel {
        &self.model
    }

    /// Where the model came from (a path, or `built-in demonstration model`).
    pub fn origin(&self) -> &str {
        &self.origin
    }

    /// Scores one raw message. Blocking: call from a blocking thread.
    pub fn score(&self, raw: &[u8]) -> Result<Score, ScoreError> {
        let pooled = self.analyzers.lock().ok().and_then(|mut pool| pool.pop());
        let mut analyzer = match pooled {
            Some(a) => a,
            None => Analyzer::new(self.model.spec().clone())?,
        };
        let result = analyzer
            .vectorize(raw)
            .map(|x| {
                let margin = self.model.margin(x);
                Score {
                    margin,
                    probability: self.model.probability(margin),
                }
            })
            .map_err(ScoreError::from);
        if let Ok(mut pool) = self.analyzers.lock() {
            pool.push(analyzer);
        }
        result
    }
}

/// The engine currently serving, swappable by a reload.
#[derive(Debug, Clone)]
pub struct SharedEngine(Arc<RwLock<Arc<Engine>>>);

impl SharedEngine {
    /// Shares `engine`.
    pub fn new(engine: Engine) -> Self {
        SharedEngine(Arc::new(RwLock::new(Arc::new(engine))))
    }

    /// The engine to use for a new message; it stays valid after a swap.
    pub fn current(&self) -> Arc<Engine> {
        match self.0.read() {
            Ok(guard) => Arc::clone(&guard),
            Err(poisoned) => Arc::clone(&poisoned.into_inner()),
        }
    }

    /// Replaces the engine for messages that start from now on.
    pub fn swap(&self, engine: Engine) {
        let engine = Arc::new(engine);
        match self.0.write() {
            Ok(mut guard) => *guard = engine,
            Err(poisoned) => *poisoned.into_inner() = engine,
        }
    }
}
