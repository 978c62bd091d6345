"""The tide science's errors and warnings (all ``ValueError`` subclasses, as before)."""


class PredictorError(ValueError):
    """Input the tide science cannot work with; the message says where and what."""


class ConstantsFileError(PredictorError):
    """A constants file or constants table that cannot be used; the message says where."""


class FitError(PredictorError):
    """A harmonic fit that cannot be made."""


class FitInputError(FitError):
    """The record cannot be fitted as given (too few samples, unknown constituent, ...)."""


class FitConditioningWarning(UserWarning):
    """The normal equations are ill-conditioned; a minimum-norm solution was used."""
