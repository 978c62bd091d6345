"""The caution every output carries: the one home of its text.

Every email, report, page and command-line output of quaywatch says that it is an automated,
unofficial aid, that official warnings and the local emergency authorities come first, and
that local codes and licensed practice decide. The words live here and nowhere else; each
kind of output takes the variant that fits it (a tide prediction says it knows no weather, an
email says it is not an official warning). The module sits in :mod:`predictor`, the lowest
layer, so every layer can import it.
"""
from __future__ import annotations

import textwrap

__all__ = ["CAUTION", "PREDICTION", "ANALYSIS", "MESSAGE", "REPORT", "LIVE", "comment_lines"]

#: The plain caution: command-line output, the demo's summary, generated files.
CAUTION = ("Automated and unofficial: official warnings and the local emergency authorities come first; "
           "defer to local codes and licensed practice.")

#: Predictions of the astronomical tide (predict, table, datums; the constants file).
PREDICTION = ("Automated, unofficial prediction of the astronomical tide only (no weather effects). "
              "Official tide tables, official warnings and the local emergency authorities come first; "
              "defer to local codes and licensed practice.")

#: Harmonic analysis of a record (fit).
ANALYSIS = ("Automated, unofficial analysis. Official tide tables, official warnings and the local "
            "emergency authorities come first; defer to local codes and licensed practice.")

#: Every alert and test email, in full; it opens with :data:`CAUTION`, the one line every email
#: form (and every report page) shows at its top, so a reader sees that line first and the rest
#: below it.
MESSAGE = (f"{CAUTION} This message comes from a station monitor and is not an official warning: "
           "follow the instructions of official warnings and your local emergency authorities.")

#: Every daily report (page and email).
REPORT = ("This report is automated and unofficial. Official warnings and the local emergency "
          "authorities come first, always. Levels, predictions and residuals here can be wrong "
          "(a faulty gauge, constants fitted to a short record, weather the tide model cannot know). "
          "Defer to local codes, official tide tables and licensed practice for any decision about "
          "navigation, berthing or safety.")

#: Every live station page and the overview (they can also be old: a feed that stopped).
LIVE = ("This page is automated and unofficial. Official warnings and the local emergency "
        "authorities come first, always. Levels, forecasts and residuals here can be wrong or out "
        "of date (a faulty gauge, a feed that stopped, constants fitted to a short record, weather "
        "the tide model cannot know). Defer to local codes, official tide tables and licensed "
        "practice for any decision about navigation, berthing or safety.")


def comment_lines(text: str = CAUTION, width: int = 88) -> str:
    """The caution as ``#`` comment lines for the head of a generated file (TOML, CSV)."""
    return "".join(f"# {line}\n" for line in textwrap.wrap(text, width - 2))
