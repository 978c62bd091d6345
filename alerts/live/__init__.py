"""Live station pages: a snapshot of each station built from values passed in
(:mod:`alerts.live.snapshot`), its headline in words (:mod:`alerts.live.headline`), an HTML page
with an inline SVG chart (:mod:`alerts.live.chart`) and a JSON file rewritten atomically after
each processing pass, an overview of all stations (:mod:`alerts.live.render`), their
configuration (:mod:`alerts.live.settings`) and a small read-only HTTP server
(:mod:`alerts.live.server`). Nothing here reads the store: :mod:`monitor.service.live_pages` gathers the
values. The package imports none of its modules, so the configuration's validators load
without the templates."""
