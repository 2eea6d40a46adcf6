//! The scoring engine a daemon serves with: one model and a pool of analyzers.
//!
//! An engine is immutable once built; a reload builds a new one and swaps the shared
//! pointer, so a message always finishes on the engine it started with. Scoring is CPU work
//! and runs on blocking threads, never on the async workers.

use std::sync::{Arc, Mutex, RwLock};

use crate::analyze::Analyzer;
use crate::config::{FailureMode, HeaderConfig};
use crate::features::SpecError;
use crate::model::LinearModel;
use crate::model::explain::top_contributions;
use crate::policy::Policy;

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
    /// An analyzer could not be built (the spec was accepted at load, so this is a bug).
    #[error(transparent)]
    Spec(#[from] SpecError),
}

/// What turns a score into actions; swapped together with the model on reload.
#[derive(Debug, Clone)]
pub struct Decisions {
    /// Per-domain thresholds.
    pub policy: Policy,
    /// Header fields added to tagged mail.
    pub headers: HeaderConfig,
    /// What to do with a message that cannot be scored.
    pub on_failure: FailureMode,
}

/// A model ready to score, with reusable analyzers and the policy that reads its margins.
#[derive(Debug)]
pub struct Engine {
    model: LinearModel,
    /// Where the model came from, for logs and metrics.
    origin: String,
    decisions: Decisions,
    analyzers: Mutex<Vec<Analyzer>>,
}

/// Why an engine could not be built from a model and a policy.
#[derive(Debug, thiserror::Error)]
pub enum EngineError {
    /// The model's feature spec is not reproducible by this binary.
    #[error(transparent)]
    Spec(#[from] SpecError),
    /// The policy reads probabilities but the model has no calibration.
    #[error(
        "the policy sets thresholds on probabilities but model {0} has no calibration; use margins or a calibrated model"
    )]
    NoCalibration(String),
}

impl Engine {
    /// An engine for `model` under `decisions`; refused when this binary cannot reproduce
    /// the model's feature spec or the policy needs a calibration the model lacks.
    pub fn new(
        model: LinearModel,
        origin: impl Into<String>,
        decisions: Decisions,
    ) -> Result<Self, EngineError> {
        let origin = origin.into();
        // Build one analyzer now so an unsupported spec fails at load, not at first message.
        let first = Analyzer::new(model.spec().clone())?;
        if decisions.policy.needs_probability() && model.calibration().is_none() {
            return Err(EngineError::NoCalibration(origin));
        }
        Ok(Engine {
            model,
            origin,
            decisions,
            analyzers: Mutex::new(vec![first]),
        })
    }

    /// The policy, header settings and failure mode in force.
    pub fn decisions(&self) -> &Decisions {
        &self.decisions
    }

    /// The model in use.
    pub fn model(&self) -> &LinearModel {
        &self.model
    }

    /// Where the model came from (a path, or `built-in demonstration model`).
    pub fn origin(&self) -> &str {
        &self.origin
    }

    /// Scores one raw message handed over by a relay. Any bytes are scored: relayed mail is
    /// never refused as "not mail" (see [`Analyzer::vectorize_relayed`]). Blocking: call
    /// from a blocking thread.
    pub fn score(&self, raw: &[u8]) -> Result<Score, ScoreError> {
        self.score_explained(raw, 0, |_| false)
            .map(|(score, _)| score)
    }

    /// Scores one raw message and, when `explain` says so for its score, names the (at
    /// most) `k` features that pushed its margin most towards junk, strongest first
    /// (e.g. `body:"claim your"`). Naming features costs about as much as scoring, so
    /// the caller asks only for verdicts that are not a plain accept. Blocking: call from
    /// a blocking thread.
    pub fn score_explained(
        &self,
        raw: &[u8],
        k: usize,
        explain: impl FnOnce(&Score) -> bool,
    ) -> Result<(Score, Vec<String>), ScoreError> {
        let pooled = self.analyzers.lock().ok().and_then(|mut pool| pool.pop());
        let mut analyzer = match pooled {
            Some(a) => a,
            None => Analyzer::new(self.model.spec().clone())?,
        };
        // Relayed mode: the relay handed these bytes over as mail, so they are scored
        // whatever their first line looks like; refusing them would let a sender opt out.
        let x = analyzer.vectorize_relayed(raw);
        let margin = self.model.margin(x);
        let score = Score {
            margin,
            probability: self.model.probability(margin),
        };
        let reasons = if k > 0 && explain(&score) {
            top_contributions(&self.model, &mut analyzer, k.saturating_mul(4))
                .into_iter()
                .filter(|c| c.contribution > 0.0)
                .take(k)
                .map(|c| c.feature)
                .collect()
        } else {
            Vec::new()
        };
        if let Ok(mut pool) = self.analyzers.lock() {
            pool.push(analyzer);
        }
        Ok((score, reasons))
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
