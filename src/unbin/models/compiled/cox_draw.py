"""A bootstrap replicate's rows laid out from the full sample's Cox layout as one compiled
pass (``unbin.models.cox.layout.draw_layout``): for each of the full sample's laid-out rows,
in its (stratum, time) order, the replicate's copies of it, each with its event-time indices
counted among the replicate's event times; what the numpy path computes with about twenty
whole-length gathers and repeats."""

from __future__ import annotations

import numba

__all__ = ["drawn_rows"]


@numba.njit(cache=True, nogil=True, error_model="numpy")
def drawn_rows(copies, first, b_idx, a_idx, seg_start, count, time_s, event_s, entry_s,
               code_s, recode, weights, out_order, out_time, out_event, out_entry, out_code,
               out_w, out_b, out_a, out_lo, out_src):  # pragma: no cover
    """Fill the ``out_*`` arrays with the replicate's rows and return (their number, the
    replicate's events). Inputs per laid-out row r of the full sample (all read in order):
    ``copies[r]``, ``first[r]`` (the position of its first copy among the drawn rows),
    ``weights[r]`` (empty: none), ``b_idx``/``a_idx`` the layout's (b + 1; a + 1 or 0),
    ``time_s``, ``event_s``, ``entry_s``, ``code_s`` its values (``entry_s``/``code_s``
    empty: none); per full-sample event time k: ``seg_start[k]``, the first of its stratum,
    and ``count[k + 1]``, the replicate's event times up to k; ``recode`` maps the full
    sample's stratum codes to the replicate's; ``out_src`` receives each row's laid-out row r
    of the full sample. A row at risk in the replicate at no event time (b <= a) is left out,
    with its copies."""
    has_entry = entry_s.size > 0
    has_codes = code_s.size > 0
    has_w = weights.size > 0
    k = 0
    events = 0
    for r in range(copies.size):
        c = copies[r]
        if c == 0:
            continue
        if event_s[r]:
            events += c
        bf = b_idx[r] - 1
        lo_f = seg_start[bf]
        af = a_idx[r] - 1 if a_idx[r] > 0 else lo_f - 1
        b = count[bf + 1] - 1
        a = count[af + 1] - 1
        if b <= a:
            continue
        lo = count[lo_f]
        f = first[r]
        for j in range(c):
            out_order[k] = f + j
            out_time[k] = time_s[r]
            out_event[k] = event_s[r]
            if has_entry:
                out_entry[k] = entry_s[r]
            if has_codes:
                out_code[k] = recode[code_s[r]]
            if has_w:
                out_w[k] = weights[r]
            out_b[k] = b
            out_a[k] = a
            out_lo[k] = lo
            out_src[k] = r
            k += 1
    return k, events
