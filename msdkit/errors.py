"""Exception and warning categories shared by every stage.

One message template is used throughout: what was wrong, what was expected, what was got, and what to do.
"""


class MsdkitError(Exception):
    """Base class of msdkit's own errors."""


class ConfigError(MsdkitError, ValueError):
    """The configuration (file or command line) is invalid; nothing has been run."""


class InputError(MsdkitError, ValueError):
    """One input (movie or track table) cannot be analysed; other inputs are unaffected."""


class FitError(MsdkitError, ValueError):
    """A model cannot be fitted to the data given."""


class MsdkitWarning(UserWarning):
    """Base class of msdkit's own warnings."""


class ShortTrackWarning(MsdkitWarning):
    """Tracks are too short for the requested estimate; results are less precise."""


class FewTracksWarning(MsdkitWarning):
    """Too few tracks for a reliable sample estimate."""


def expected_got(what: str, expected: str, got: object, fix: str) -> str:
    """Format the one error-message template used everywhere.

    Examples
    --------
    >>> expected_got("pixel_size_um", "> 0", -0.1, "Set acquisition.pixel_size_um in the config.")
    'pixel_size_um must be > 0; got -0.1. Set acquisition.pixel_size_um in the config.'
    """
    return f"{what} must be {expected}; got {got}. {fix}"
