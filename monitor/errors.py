"""The one exception type the command line turns into a plain message."""


class UserError(Exception):
    """Bad input from a user: a file, line, option or config key, and what is wrong.

    The message must name the place (``obs.csv line 14``, ``stations[0].tz``) and the
    problem, and read well on its own after ``quaywatch VERB:``.
    """
