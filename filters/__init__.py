"""casecloud's numerical core: particle clouds over stochastic epidemic models.

Pure numpy/scipy: no I/O, no asyncio, no Kafka. Every random draw goes
through a ``numpy.random.Generator`` that is passed in.
"""

from ._compartmental import CompartmentalModel, ModelError, ModelGuardError
from ._expressions import ExpressionError, compile_expression
from ._forecast import FORECAST_LEVELS, FirstExceedance, Forecast, forecast
from ._filter import FilterConfig, ParticleFilter, StepResult
from ._interventions import DayEffects, Effects, InterventionError, compile_interventions
from ._linear_gaussian import LocalLevelModel
from ._individual import IndividualModel
from ._families import build_model
from ._population import Population, PopulationError, Venues, build_population
from ._setting_effects import SettingEffects, SettingScenarioResult, compile_setting_interventions, run_setting_scenarios
from ._model import Model
from ._observation import Observation, ObservationError, delay_kernel
from ._nowcast import NowcastEntry, nowcast
from ._nowcast_draws import nowcast_draws
from ._chain_ladder import ChainLadder, chain_ladder, chain_ladder_draws, reporting_triangle
from ._particles import ParticleSet
from ._predictive import Predictive, PredictiveLaw, one_step_predictive
from ._reports import Report, ReportingCdfTable, reporting_cdf
from ._pmmh import (
    CalibrationParameter,
    CalibrationResult,
    CalibrationState,
    CalibrationSettings,
    CalibrationStateError,
    NoiseCheck,
    calibrate,
    calibration_parameters,
    history_observations,
    log_evidence_noise,
    log_likelihood_estimate,
    mcmc_ess,
    one_step_intervals,
    split_rhat,
    unconstrained_log_prior,
)
from ._resampling import RESAMPLERS, resample
from ._scores import (
    auc,
    bias,
    coverage,
    crps_from_samples,
    crps_normal,
    interval_score,
    log_score_from_samples,
    roc_curve,
    weighted_interval_score,
)
from ._scenario import (
    CAUTION,
    SCENARIO_LEVELS,
    Interval,
    Probability,
    ScenarioOutcome,
    ScenarioReport,
    ThresholdCheck,
    run_scenarios,
)
from ._rng import generator_state, restore_generator, stream_generator
from ._simulate import SimulatedSeason, simulate_season
from ._summary import Summary, summarise, weighted_quantiles
from ._weights import effective_sample_size, log_sum_exp, normalised_weights

__all__ = [
    "CalibrationParameter",
    "CalibrationResult",
    "CalibrationState",
    "CalibrationSettings",
    "CalibrationStateError",
    "NoiseCheck",
    "calibrate",
    "calibration_parameters",
    "history_observations",
    "log_evidence_noise",
    "log_likelihood_estimate",
    "mcmc_ess",
    "one_step_intervals",
    "one_step_predictive",
    "Predictive",
    "PredictiveLaw",
    "split_rhat",
    "unconstrained_log_prior",
    "CompartmentalModel",
    "DayEffects",
    "Effects",
    "InterventionError",
    "compile_interventions",
    "ExpressionError",
    "FORECAST_LEVELS",
    "FilterConfig",
    "FirstExceedance",
    "Forecast",
    "forecast",
    "LocalLevelModel",
    "IndividualModel",
    "build_model",
    "Population",
    "PopulationError",
    "Venues",
    "build_population",
    "SettingEffects",
    "SettingScenarioResult",
    "compile_setting_interventions",
    "run_setting_scenarios",
    "Model",
    "ModelError",
    "ModelGuardError",
    "Observation",
    "ObservationError",
    "ParticleFilter",
    "ParticleSet",
    "NowcastEntry",
    "nowcast",
    "nowcast_draws",
    "ChainLadder",
    "chain_ladder",
    "chain_ladder_draws",
    "reporting_triangle",
    "Report",
    "ReportingCdfTable",
    "reporting_cdf",
    "RESAMPLERS",
    "CAUTION",
    "Interval",
    "Probability",
    "SCENARIO_LEVELS",
    "ScenarioOutcome",
    "ScenarioReport",
    "ThresholdCheck",
    "run_scenarios",
    "SimulatedSeason",
    "StepResult",
    "Summary",
    "compile_expression",
    "delay_kernel",
    "effective_sample_size",
    "generator_state",
    "log_sum_exp",
    "normalised_weights",
    "resample",
    "restore_generator",
    "simulate_season",
    "stream_generator",
    "summarise",
    "weighted_quantiles",
    "auc",
    "bias",
    "coverage",
    "crps_from_samples",
    "crps_normal",
    "interval_score",
    "log_score_from_samples",
    "roc_curve",
    "weighted_interval_score",
]
