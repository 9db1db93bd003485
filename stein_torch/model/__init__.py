"""What is sampled: targets, their latents, data and declared sampler defaults. Imports no sampler."""

from .data import ObservedData
from .defaults import SamplerDefaults
from .latent import Latent
from .target import Target

__all__ = ["Target", "Latent", "ObservedData", "SamplerDefaults"]
