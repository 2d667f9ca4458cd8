"""User-facing error types: each carries one line that names the file, key or value at fault."""


class FcnkitError(Exception):
    """Base for every error caused by the user's input; the CLI prints it on one line and exits 2."""


class ConfigError(FcnkitError):
    """A config file or config value is invalid."""


class DataError(FcnkitError):
    """An image, mask or dataset folder is unreadable or inconsistent."""


class ModelFileError(FcnkitError):
    """A model file is missing, malformed or incompatible."""


class DiskFullError(FcnkitError):
    """A file could not be written for lack of space (or a quota, or a file size limit): ``path`` is the file,
    ``reason`` the system's words for it."""

    def __init__(self, message: str, path: object, reason: str) -> None:
        super().__init__(message)
        self.path, self.reason = path, reason


class Interrupted(KeyboardInterrupt):
    """Ctrl-C (SIGINT) or SIGTERM: the command stops, cleaning up as it goes; the CLI exits with 128 + the
    signal's number (130 for SIGINT, 143 for SIGTERM), the shell's convention for a process ended by a signal."""

    def __init__(self, message: str = "", signum: int = 2) -> None:
        super().__init__(message)
        self.signum = signum
