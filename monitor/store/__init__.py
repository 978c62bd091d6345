"""The store: one SQLite file per monitor (observations, checkpoints, derived series), its schema and migrations, its lock."""
