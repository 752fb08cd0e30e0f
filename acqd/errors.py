"""One error type the command line turns into a single clear line (never a traceback).

Every message names *where* (file, resource, field) and *what is allowed*, because the person
reading it is at a bench, not in a debugger.
"""


class AcqdError(Exception):
    """A user-facing failure: bad input, an unreachable instrument, a refused setting."""


class ConfigError(AcqdError):
    """A profile, driver file or command-line value is malformed or out of range."""

    def __init__(self, source: str, field: str, problem: str) -> None:
        self.source, self.field, self.problem = source, field, problem
        where = f"{source}: {field}" if field else source
        super().__init__(f"{where}: {problem}")


class InstrumentError(AcqdError):
    """An instrument could not be reached, timed out, or reported an error."""

    def __init__(self, resource: str, problem: str) -> None:
        self.resource, self.problem = resource, problem
        super().__init__(f"{resource}: {problem}")


class SafetyError(ConfigError):
    """A requested output exceeds a driver or profile limit; nothing was sent."""
