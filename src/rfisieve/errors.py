"""Errors that reach the user as one line: which file, what is wrong, what to do."""


class RfisieveError(Exception):
    """A problem the user can fix; the CLI prints ``str(err)`` on one line and exits 2."""


class ScanError(RfisieveError):
    """A scan file that cannot be read as the layout it should have."""

    def __init__(self, path, problem):
        self.path = str(path)
        self.problem = problem
        super().__init__(f"{self.path}: {problem}")


class ConfigError(RfisieveError):
    """A run or band config value that is missing, unknown or out of range."""

    def __init__(self, path, problem):
        self.path = str(path)
        self.problem = problem
        super().__init__(f"{self.path}: {problem}")
