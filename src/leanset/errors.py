"""leanset's small error hierarchy: one base class, raised where a problem is found."""


class LeansetError(Exception):
    """Base class of every error leanset raises on bad input; the CLI prints it as one line."""


class ConfigError(LeansetError):
    """The configuration file or an override is invalid."""


class InputError(LeansetError):
    """The input table cannot be used as configured."""


class StoreError(LeansetError):
    """The run store cannot be written or a run failed its final checks."""
