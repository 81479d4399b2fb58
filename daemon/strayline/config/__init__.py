"""Configuration: the validated schema, sample-type profiles, loading and its errors.

:func:`load_config` reads a YAML file into a frozen :class:`Config` (the rule set parsed
once into typed specs, :attr:`Config.rule_set`); a bad file raises
:class:`~strayline.errors.ConfigError` naming the file and the key path.
"""

from strayline.config._sections import LATEST_CALIBRATION
from strayline.config.schema import (
    PROFILE_SECTIONS,
    Config,
    config_digest,
    config_from_mapping,
    load_config,
    select_profile,
)

__all__ = [
    "LATEST_CALIBRATION",
    "PROFILE_SECTIONS",
    "Config",
    "config_digest",
    "config_from_mapping",
    "load_config",
    "select_profile",
]
