"""Configuration: YAML text -> a validated, frozen :class:`Config` the daemon trusts.

Modules: :mod:`~fecproxy.config.schema` (the parser and Config), :mod:`~fecproxy.config.sections`
(the typed sections), :mod:`~fecproxy.config.limits` (named limits and defaults),
:mod:`~fecproxy.config.tables` (the key -> checker table),
:mod:`~fecproxy.config.addresses` (HOST:PORT in and out), :mod:`~fecproxy.config.loading`
(file and YAML reading, key files), :mod:`~fecproxy.config.messages` (how faults are worded).
"""

from fecproxy.config.addresses import Address, AddressError, format_sockaddr, parse_address
from fecproxy.config.loading import MAX_CONFIG_FILE_BYTES, load_config, load_keys, parse_config_text, read_key_file
from fecproxy.config.schema import *  # noqa: F403 - the schema's names are this package's API
from fecproxy.config.schema import Config, ConfigError, ConfigUnreadable, parse_config

__all__ = [
    "Address",
    "AddressError",
    "Config",
    "ConfigError",
    "ConfigUnreadable",
    "MAX_CONFIG_FILE_BYTES",
    "format_sockaddr",
    "load_config",
    "load_keys",
    "read_key_file",
    "parse_address",
    "parse_config",
    "parse_config_text",
]
