"""Posterior sampling: priors, noise models (Gaussian, AR(1), Student-t), emcee, convergence,
credible and prediction bands."""

from graybox.posterior.bands import PredictiveBand, predictive_bands
from graybox.posterior.config import SAMPLING_KEYS, SamplerSettings, priors_from_spec, sampler_settings
from graybox.posterior.noise import NoiseLayout, noise_layout
from graybox.posterior.priors import Prior
from graybox.posterior.sample import PosteriorResult, run_posterior

__all__ = ["SAMPLING_KEYS", "NoiseLayout", "PosteriorResult", "PredictiveBand", "Prior", "SamplerSettings",
           "noise_layout", "predictive_bands", "priors_from_spec", "run_posterior", "sampler_settings"]
