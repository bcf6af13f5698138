"""Warning classes of the project (tests turn them into errors unless expected)."""


class SweepWarning(UserWarning):
    """Base class of every warning sweep emits."""


class CancellationWarning(SweepWarning):
    """The nominal open loop has a factor common to numerator and denominator."""


class IllConditionedWarning(SweepWarning):
    """A result could not be computed to full precision and was flagged."""


class UnusedParameterWarning(SweepWarning):
    """An uncertain parameter appears in no expression of the loop."""


class NothingKeptWarning(SweepWarning):
    """The ``[locus] keep`` setting selects no variant of the configured designs."""
