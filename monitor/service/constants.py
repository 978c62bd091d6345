"""Loading a station's tide model: its constants file, or the fit in use kept in the store.

A constants file records the datum its mean is measured from; the model is put on the station
datum here, once, so every level the monitor computes is on the station datum.
"""
from __future__ import annotations

import tempfile
import tomllib
from pathlib import Path
from typing import Any

import pandas as pd

from monitor.errors import ConfigError
from monitor.service.config import STATION_DATUM_NAMES, StationConfig, datum_words
from monitor.store.database import Store
from predictor import TideModel

__all__ = ["load_model", "model_from_text", "model_to_text", "on_station_datum"]


def model_from_text(text: str, where: str):
    """A TideModel from constants TOML text kept in the store."""
    try:
        return TideModel.from_dict(tomllib.loads(text), where=f"{where}: ")
    except (tomllib.TOMLDecodeError, ValueError) as exc:
        raise ConfigError(f"{where}: stored constants cannot be read ({exc})") from None


def model_to_text(model) -> str:
    """Constants TOML text of a TideModel (the same text as its constants file)."""
    with tempfile.TemporaryDirectory() as tmp:
        path = Path(tmp) / "constants.toml"
        model.save(path)
        return path.read_text(encoding="utf-8")


def load_model(store: Store | None, station: StationConfig) -> tuple[Any, str]:
    """The station's tide model and where it came from; (None, reason) when there is none yet.

    Raises
    ------
    ConfigError
        A configured constants file that cannot be read.
    """
    if station.constants is not None:
        try:
            model = TideModel.load(station.constants)
        except ValueError as exc:
            raise ConfigError(f"station {station.id} constants: {exc}") from None
        model, how = on_station_datum(model, station, f"station {station.id} constants {station.constants}")
        return model, f"file {station.constants} ({how})"
    if store is None:
        return None, "fitted from history (no store)"
    fit = store.fit_in_use(station.id)
    if fit is None:
        return None, "none yet: to be fitted from the station's own history"
    when = pd.Timestamp(fit["fitted_at"], unit="s", tz="UTC").strftime("%Y-%m-%d %H:%MZ")
    model = model_from_text(fit["constants"], f"fit {fit['id']}")
    if model.datum is None:  # fitted to the store's levels, which are on the station datum
        model.datum = "station"
    model, _ = on_station_datum(model, station, f"station {station.id} fit #{fit['id']}")
    return model, f"fit #{fit['id']} of {when}"


def on_station_datum(model, station: StationConfig, where: str) -> tuple[Any, str]:
    """The model with its levels on the station datum, and words saying what was done.

    A constants file records the datum its mean is measured from (key ``datum``). On the
    station datum it is used as it is; on another datum of the station (``chart``, say)
    that datum's height above the station datum is added, explicitly; a datum the
    station does not define is refused, never taken silently as a metre off.
    A file that records no datum is taken as on the station datum, and said so.

    Raises
    ------
    ConfigError
        The file names a datum this station does not define.
    """
    datum = getattr(model, "datum", None)
    if datum is None:
        return model, "its datum is not recorded in the file: taken as the station datum"
    if datum in STATION_DATUM_NAMES:
        return model, "on the station datum"
    if datum in station.datums:
        z = float(station.datums[datum])
        return model.referred_to("station", z), (f"mean on {datum_words(datum)}, {z:+.3f} m added "
                                                 f"to put it on the station datum")
    known = ", ".join(sorted(set(station.datums) - {"station"})) or "none besides the station datum"
    raise ConfigError(f"{where}: the constants' mean is on datum {datum!r}, which station {station.id} does not "
                    f"define (its datums: {known}); add {datum} under [stations.datums] with its height above "
                    f"the station datum, or give the file the datum its levels are on (key 'datum')")
