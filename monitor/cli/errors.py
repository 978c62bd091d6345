"""The command line's own error: a bad option or argument of a verb."""


class UserError(Exception):
    """Bad input from a user on the command line: an option or argument, and what is wrong.

    The message must name the option (``--station``, ``OBS.csv line 14``) and the problem,
    and read well on its own after ``quaywatch VERB:``. Library code never raises it: it
    raises the errors of :mod:`monitor.errors` (or predictor's), which the command line
    reports the same way.
    """
