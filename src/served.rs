//! The one loading path: how every command gets a model ready to run.
//!
//! `serve`, `check`, `bench` and `preprocess` (and every later command that runs a model:
//! evaluation, reloads, trials) call [`Loaded::load`]: read and check the model against its
//! config, plan it on its engine and warm it, build its preprocessing pipeline against the
//! contract, and resolve its lanes. [`Loaded::selftest`] runs its samples through that
//! pipeline and engine; [`Loaded::start`] starts its lanes and returns the [`ServedModel`]
//! the HTTP handlers use. Nothing here is specific to one command.

use std::sync::Arc;

use anyhow::Context as _;

use crate::batch::{Batcher, BatcherGuard, BatchingConfig, Lanes};
use crate::config::ModelConfig;
use crate::decision::DecisionTable;
use crate::metrics::{Metrics, ModelMetrics};
use crate::model::report::Report;
use crate::model::{Model, StateWrap, load};
use crate::preprocess::Pipeline;
use crate::retain::Retainer;
use crate::selftest;

/// How a command wants its models loaded.
#[derive(Debug, Clone)]
pub struct LoadOptions {
    /// `[server] max_pixels` and `max_decode_bytes`: the frames the pipeline decodes.
    pub limits: crate::preprocess::DecodeLimits,
    /// Models loaded together, sharing the cores: `lanes = "auto"` gives each its share.
    pub models: usize,
    /// Also build the layer report (`lineside check`).
    pub report: bool,
    /// The stacking decision calibrated when this model was loaded before (a reload keeps it).
    pub kept_stacking: Option<crate::model::Stacking>,
}

impl LoadOptions {
    /// One model alone on the box, no report, any frame size.
    pub fn single() -> LoadOptions {
        LoadOptions { limits: crate::preprocess::DecodeLimits::NONE, models: 1, report: false, kept_stacking: None }
    }
}

/// A model loaded, checked, planned, warmed, with its pipeline and lane count: ready to
/// self-test and to start.
pub struct Loaded {
    /// The model's config.
    pub config: ModelConfig,
    /// The planned model, shared by its lanes.
    pub model: Arc<Model>,
    /// Its preprocessing, resolved against the model (channels that follow the model, a
    /// uint8 model's raw pixels).
    pub pipeline: Arc<Pipeline>,
    /// Lanes to run: `lanes`, or for `"auto"` its share of the cores ([`share_lanes`]).
    pub lanes: usize,
    /// The layer report, when asked for.
    pub report: Option<Report>,
    /// `[models.decision]` checked against the labels: each label's verdict.
    pub decision: Option<DecisionTable>,
}

/// The lanes `lanes = "auto"` gives each of `models` models on `cores` cores, with
/// `lane_threads` threads a lane: the cores are shared out evenly, cores / models (at least
/// one core each), and each model runs as many lanes of `lane_threads` as fit its share (at
/// least one).
pub fn share_lanes(cores: usize, models: usize, lane_threads: usize) -> usize {
    let share = (cores / models.max(1)).max(1);
    (share / lane_threads.max(1)).max(1)
}

impl Loaded {
    /// Load `mc` the way every command does.
    ///
    /// # Errors
    /// Unreadable files, a model lineside cannot serve, a labels file or preprocessing that
    /// does not fit it: each message names the model, the file and what to change.
    pub fn load(mc: &ModelConfig, opts: &LoadOptions) -> anyhow::Result<Loaded> {
        let name = &mc.name;
        let spec = crate::model::load::Spec { kept_stacking: opts.kept_stacking.clone(), ..mc.spec() };
        let (model, report) = if opts.report {
            let (m, r) = load::load_with_report(&spec).with_context(|| format!("model {name:?}"))?;
            (m, Some(r))
        } else {
            (load::load(&spec).with_context(|| format!("model {name:?}"))?, None)
        };
        let pipeline = Pipeline::new(mc.preprocess.clone(), &model.contract, opts.limits)
            .map_err(|e| anyhow::anyhow!("model {name:?}: {}: {e}", model.file))?;
        let cores = std::thread::available_parallelism().map(|n| n.get()).unwrap_or(1);
        let lanes = match mc.batching.lanes {
            Lanes::Fixed(n) => n,
            Lanes::Auto => share_lanes(cores, opts.models, mc.batching.lane_threads),
        };
        let decision = mc
            .decision
            .as_ref()
            .map(|d| DecisionTable::new(d, &model.labels))
            .transpose()
            .map_err(|e| anyhow::anyhow!("model {name:?}: [models.decision]: {e}"))?;
        if let Some(r) = &mc.retain
            && let Some(unknown) = r.labels.iter().find(|l| !model.labels.contains(l))
        {
            anyhow::bail!(
                "model {name:?}: [models.retain] labels names {unknown:?}, which is not one of the model's labels {:?}",
                model.labels
            );
        }
        Ok(Loaded { config: mc.clone(), model: Arc::new(model), pipeline: Arc::new(pipeline), lanes, report, decision })
    }

    /// Run the model's self-test samples through its pipeline and engine (`None`: it has none).
    ///
    /// # Errors
    /// The samples cannot be read; a sample that fails is in the outcome, not an error.
    pub fn selftest(&self) -> anyhow::Result<Option<selftest::Outcome>> {
        let Some(st) = &self.config.selftest else { return Ok(None) };
        let samples =
            selftest::Samples::read(st).with_context(|| format!("model {:?}: self-test", self.config.name))?;
        Ok(Some(selftest::run(&self.model, &self.pipeline, &samples, st.tolerance)))
    }

    /// Start the model's lanes. `wrap`, when given, wraps each lane's engine state (tests put
    /// a fault-injecting engine around the real one).
    ///
    /// # Errors
    /// A lane's engine state or thread cannot be created.
    pub fn start(
        self,
        metrics: &Metrics,
        wrap: Option<&StateWrap>,
        selftest: Option<selftest::Outcome>,
    ) -> anyhow::Result<(ServedModel, BatcherGuard)> {
        let m = &self.model;
        let mm = metrics.for_model(&m.name, &m.version, m.engine().name(), &m.labels);
        let (batcher, guard) = Batcher::start(Arc::clone(m), &self.config.batching, self.lanes, mm.clone(), wrap)?;
        if self.decision.is_some() {
            metrics.expect_verdicts(&m.name);
        }
        let retain = match &self.config.retain {
            None => None,
            Some(r) => Some(Arc::new(
                Retainer::start(r.clone(), &m.name, metrics.for_retain(&m.name))
                    .with_context(|| format!("model {:?}: cannot start the retain writer", m.name))?,
            )),
        };
        let served = ServedModel {
            decision: self.decision,
            retain,
            model: self.model,
            pipeline: self.pipeline,
            batcher,
            metrics: mm,
            min_score: self.config.min_score,
            batching: self.config.batching,
            lanes: self.lanes,
            selftest,
        };
        Ok((served, guard))
    }
}

/// One model as the handlers see it: loaded, with its lanes running.
pub struct ServedModel {
    /// The loaded model (contract, labels, version).
    pub model: Arc<Model>,
    /// Its preprocessing.
    pub pipeline: Arc<Pipeline>,
    /// Its backlog.
    pub batcher: Batcher,
    /// Its metric handles.
    pub metrics: ModelMetrics,
    /// `[[models]] min_score`: answers below it are marked not confident.
    pub min_score: Option<f32>,
    /// `[models.batching]` as configured.
    pub batching: BatchingConfig,
    /// Lanes running (after `lanes = "auto"` is resolved).
    pub lanes: usize,
    /// The self-test's result at load, when the model has one.
    pub selftest: Option<selftest::Outcome>,
    /// Each label's verdict (`[models.decision]`), when configured.
    pub decision: Option<DecisionTable>,
    /// The retained-frame writer (`[models.retain]`), when configured.
    pub retain: Option<Arc<Retainer>>,
}

#[cfg(test)]
mod tests {
    use super::share_lanes;

    #[test]
    fn auto_lanes_share_the_cores_among_the_models() {
        // One model takes every core, one single-threaded lane a core.
        assert_eq!(share_lanes(8, 1, 1), 8);
        // Two models: half each.
        assert_eq!(share_lanes(8, 2, 1), 4);
        assert_eq!(share_lanes(8, 2, 2), 2);
        // More models than cores: one lane each, never none.
        assert_eq!(share_lanes(2, 3, 1), 1);
        // Lanes wider than the share: one lane.
        assert_eq!(share_lanes(4, 2, 4), 1);
        // An uneven split rounds down (3 models on 8 cores: 2 each, 2 cores left to HTTP and decoding).
        assert_eq!(share_lanes(8, 3, 1), 2);
    }
}
