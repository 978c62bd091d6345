"""The tests of both level sensors over a whole record, combined as the station pass combines
them, with pandas' rolling windows throughout (``run_tests`` and ``_confirm``): the reference
the incremental and in-memory passes are compared with (tests/test_qc_tail.py,
tests/test_qc_context.py)."""
from __future__ import annotations

import pandas as pd

from monitor.quality import checks as qc
from monitor.quality.checks import QcSettings, run_tests


def whole_record_tests(obs: dict[str, pd.Series], model, settings: QcSettings, now: float,
                       position: tuple[float, float] | None = None) -> dict[str, pd.DataFrame]:
    """Per-test flags and ``flag`` of ``obs["primary"]`` and ``obs["backup"]`` (levels [m]),
    each judged with the other as its co-located sensor, the prediction from ``model``."""
    preds = {sn: model.predict(x.index) for sn, x in obs.items()}
    single = {sn: run_tests(x, settings, preds[sn], None, now, position=position) for sn, x in obs.items()}
    out = {}
    for sn, o in (("primary", "backup"), ("backup", "primary")):
        tests = single[sn].copy()
        other_ok = obs[o].where(single[o]["flag"].to_numpy() != qc.FAIL)
        shape_only = ~(single[o][[c for c in qc.TESTS if c not in ("spike", "resid")]] == qc.FAIL).any(axis=1)
        tests["multi"] = qc.multi_sensor_test(obs[sn], other_ok, settings.multi_suspect, settings.gap_limit)
        tests["multi"] = tests["multi"].where(tests["syntax"] != qc.MISSING, qc.NOT_EVALUATED)
        tests["flag"] = qc.aggregate_flags(tests)
        tests = qc._confirm(tests, obs[sn], obs[sn] - preds[sn], obs[o].where(shape_only.to_numpy()), settings)
        out[sn] = tests
    return out
