"""User-facing error types: each carries one line that names the file, key or value at fault."""


class FcnkitError(Exception):
    """Base for every error caused by the user's input; the CLI prints it on one line and exits 2."""


class ConfigError(FcnkitError):
    """A config file or config value is invalid."""


class DataError(FcnkitError):
    """An image, mask or dataset folder is unreadable or inconsistent."""


class ModelFileError(FcnkitError):
    """A model file is missing, malformed or incompatible."""
