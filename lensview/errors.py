"""Input errors that the app and the command line show to the user verbatim."""


class LensviewInputError(ValueError):
    """A problem with a file or value supplied by the user.

    The message says what is wrong and what to do about it; the app and the
    command line print it as it is, without a traceback.
    """


class OutsideFootprintWarning(UserWarning):
    """Positions fell outside a lens model's footprint and were given NaN."""


class MissingMassWarning(UserWarning):
    """A deflection built from a convergence map lacks the mass outside the map."""
