"""The checks of the extract-reading keys the schema cannot express: a cohort's ``csv`` block
(a known encoding, a usable date format, a CSV path) and a survival outcome's follow-up (dates,
the study's end, the time scale and its age column)."""

from __future__ import annotations

import codecs
import datetime as dt
import re
from collections.abc import Callable
from typing import Any


def _fails(read: Callable[[str], object], value: str, error: type[Exception]) -> bool:
    """Whether ``read(value)`` raises ``error``."""
    try:
        read(value)
    except error:
        return True
    return False


def csv_problems(raw: dict[str, Any]) -> list[str]:
    problems: list[str] = []
    for i, c in enumerate(raw.get("cohorts") or []):
        opts = c.get("csv") if isinstance(c, dict) else None
        if not isinstance(opts, dict):
            continue
        where = f"cohorts[{i}].csv"
        path = str(c.get("path", "")).lower()
        if not (path.endswith(".csv") or path.endswith(".csv.gz")):
            problems.append(f"{where}: the csv block applies to .csv and .csv.gz extracts only; "
                            f"remove it for {c.get('path')!r}.")
        enc = opts.get("encoding")
        if isinstance(enc, str) and _fails(codecs.lookup, enc, LookupError):
            problems.append(f"{where}.encoding: {enc!r} is not a known text encoding; use "
                            "for example utf-8, cp1252 or latin-1.")
        if opts.get("delimiter") is not None and opts.get("delimiter") == opts.get("decimal"):
            problems.append(f"{where}: the delimiter and the decimal mark are both "
                            f"{opts['decimal']!r}; a file with decimal commas is separated by "
                            "';' (or a tab).")
        fmt = opts.get("date_format")
        if isinstance(fmt, str):
            probe = dt.date(2001, 2, 3)
            try:
                ok = dt.datetime.strptime(probe.strftime(fmt), fmt).date() == probe
            except ValueError:
                ok = False
            if not ok:
                problems.append(f"{where}.date_format: {fmt!r} does not read back a whole date "
                                "(day, month and year); write it with %d, %m and %Y, e.g. "
                                "'%d.%m.%Y'.")
    return problems


def followup_problems(raw: dict[str, Any]) -> list[str]:
    problems: list[str] = []
    for i, a in enumerate(raw.get("analyses") or []):
        out = a.get("outcome") if isinstance(a, dict) else None
        if not isinstance(out, dict) or out.get("type") != "survival":
            continue
        where = f"analyses[{i}] ({a.get('name')}).outcome"
        time = out.get("time")
        scale = out.get("time_scale", "on_study")
        if isinstance(time, dict):
            end = time.get("study_end")
            if (isinstance(end, str) and re.fullmatch(r"\d{4}-\d{2}-\d{2}", end)
                    and _fails(dt.date.fromisoformat, end, ValueError)):
                problems.append(f"{where}.time.study_end: {end!r} is not a calendar date; "
                                "write it as YYYY-MM-DD.")
            if time.get("start") is not None and time.get("start") == time.get("end"):
                problems.append(f"{where}.time: start and end are the same column "
                                f"{time.get('start')!r}; end is the date of the event or of "
                                "the end of follow-up.")
            if "entry" in time and "entry" in out:
                problems.append(f"{where}: delayed entry is given twice (time.entry, a date "
                                "column, and entry, a duration column); keep one.")
            if scale == "attained_age" and time.get("unit", "years") != "years":
                problems.append(f"{where}.time.unit: {time.get('unit')!r} with time_scale "
                                "attained_age; ages are in years, so use unit: years.")
        if scale == "attained_age" and "age" not in out:
            problems.append(f"{where}: time_scale attained_age needs 'age' (the column with the "
                            "age in years at the start of follow-up); add it.")
        if scale != "attained_age" and "age" in out:
            problems.append(f"{where}.age: used only with time_scale: attained_age; add that or "
                            "remove age.")
    return problems
