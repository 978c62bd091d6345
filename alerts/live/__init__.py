"""Live station pages: a snapshot of each station built from values passed in, its headline in
words, an HTML page with an inline SVG chart and a JSON file rewritten atomically after each
processing pass, an overview of all stations, and a small read-only HTTP server
(:mod:`alerts.live.server`). Nothing here reads the store: :mod:`monitor` gathers the values."""
from alerts.live.headline import Line, gauge_verdict, headline, local_time
from alerts.live.render import (atomic_write, caution_line, render_overview, render_station, write_overview,
                                write_station)
from alerts.live.settings import LiveSettings, Mark, live_settings_from, marks_from_config
from alerts.live.snapshot import (MarkState, Snapshot, age_words, build_snapshot, mark_at_high_water, mark_now,
                                  rate_per_hour, trend_words)

__all__ = ["Line", "gauge_verdict", "headline", "local_time", "atomic_write", "caution_line", "render_overview",
           "render_station", "write_overview", "write_station", "LiveSettings", "Mark", "live_settings_from",
           "marks_from_config", "MarkState", "Snapshot", "age_words", "build_snapshot", "mark_at_high_water",
           "mark_now", "rate_per_hour", "trend_words"]
