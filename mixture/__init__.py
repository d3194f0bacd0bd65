"""The model core: a mixture of unigram language models, batch and stepwise EM.

Pure numpy/scipy: no Redis, no HTTP, no clock.
"""

from mixture.config import MixtureConfig
from mixture.errors import ConfigError, InputError, MixrouteError, StateFormatError

__all__ = ["ConfigError", "InputError", "MixrouteError", "MixtureConfig", "StateFormatError"]
