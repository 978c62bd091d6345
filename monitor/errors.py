"""The monitor's errors: one type per room, all under :class:`MonitorError`.

Library code raises these; only the command line (:mod:`monitor.cli.app`) turns them into a
one-line message and an exit code, and the daemon logs them and carries on. Every message
names the place (``obs.csv line 14``, ``stations[0].tz``, ``store q.db``) and the problem,
and reads well on its own after ``quaywatch VERB:``.
"""


class MonitorError(Exception):
    """Bad input or state the monitor cannot work with; the message says where and what."""


class ConfigError(MonitorError):
    """The configuration (or a file or folder it names: constants, log, reports) cannot be used."""


class StoreError(MonitorError):
    """The store cannot be opened, is locked, newer than this program, or lacks what was asked."""


class FeedError(MonitorError):
    """A feed cannot be opened or read."""


class QcError(MonitorError):
    """A manual quality-control input (a flag, a staff reading) that cannot be taken."""
