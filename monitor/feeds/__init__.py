"""Telemetry in: feeds that hand out complete raw lines and a checkpoint of how far they got.

Kinds: a followed file (``filetail``), a drop folder (``dropfolder``), a serial line
(``serialline``) and a paced replay of a recorded file (``replay``). The configuration keys of
a feed are documented in :mod:`monitor.feeds.spec`.

Use::

    spec, errors = feed_from_config(table, "feeds.quay")
    feed = open_feed(spec, "quay")
    feed.restore(saved_state)          # JSON from the store, or None
    lines = feed.poll()                # list[RawLine]
    checkpoint = feed.state()          # store it with the observations, in one transaction
"""
from monitor.feeds.base import Feed, RawLine
from monitor.feeds.spec import KINDS, FeedSpec, feed_from_config, open_feed

__all__ = ["Feed", "FeedSpec", "KINDS", "RawLine", "feed_from_config", "open_feed"]
