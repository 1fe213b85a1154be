"""Harmonic current-distortion limits as data, with the editions named.

Values are percent of the rated current of the unit (IEEE 519 writes I_L,
the maximum demand load current; for generating equipment the rated current
is used, common practice). Ranges of the harmonic order h are half-open,
``low <= h < high``, as printed.

IEEE Std 519-2014, Table 2 (current distortion limits for systems rated
120 V through 69 kV), row I_sc/I_L < 20, which applies to *all* power
generation equipment regardless of the actual I_sc/I_L:
3 <= h < 11: 4.0 %; 11 <= h < 17: 2.0 %; 17 <= h < 23: 1.5 %;
23 <= h < 35: 0.6 %; 35 <= h <= 50: 0.3 %; TDD 5.0 %. Even harmonics are
limited to 25 % of the odd-harmonic limits above. The values are those of
IEEE 519-1992 Table 10.3 as reprinted in A. Kusko and M. T. Thompson,
"Power Quality in Electrical Systems", McGraw-Hill, 2007, p. 17; the 2014
edition keeps them in its Table 2 and limits the assessment to h <= 50.

IEEE Std 1547-2018, clause 7.3, Table 26 (odd harmonics, percent of rated
current): the same values as above, total rated-current distortion (TRD)
5.0 %; Table 27 (even harmonics): h = 2: 1.0 %, h = 4: 2.0 %, h = 6: 3.0 %,
8 <= h <= 50: the value of the odd range h falls in. These 1547 values are
from memory (not re-read from the standard) and must be checked against the
standard text before they are relied upon.

Above the tables (h > 50, which includes every switching-frequency
sideband of a converter switching above 2.5 kHz on a 50 Hz grid) neither
standard gives a limit; loopcheck applies the 35 <= h limit, 0.3 % of rated
current, to each sideband. This is a conservative design target used in
common practice, not a requirement of either standard. Non-integer orders
(interharmonics) up to 50 are given the odd-harmonic limit of the range
they fall in (loopcheck's assumption).

Local codes and the utility's interconnection requirements govern; these
tables are an aid for design, not a compliance test.

References
----------
.. [1] IEEE Std 519-2014, "IEEE Recommended Practice and Requirements for
   Harmonic Control in Electric Power Systems", Table 2 (values as reprinted
   from the 1992 edition in [3]).
.. [2] IEEE Std 1547-2018, "IEEE Standard for Interconnection and
   Interoperability of Distributed Energy Resources with Associated Electric
   Power Systems Interfaces", clause 7.3, Tables 26 and 27 (from memory).
.. [3] A. Kusko and M. T. Thompson, "Power Quality in Electrical Systems",
   McGraw-Hill, 2007, p. 17.
"""

from __future__ import annotations

import math
from dataclasses import dataclass

#: The limit loopcheck applies above h = 50 [percent of rated current] (assumption, see module docstring).
ABOVE_TABLE_LIMIT_PERCENT = 0.3
#: Highest order covered by the tables.
TABLE_MAX_ORDER = 50


@dataclass(frozen=True)
class LimitTable:
    """A current-distortion limit table.

    edition: e.g. "IEEE Std 519-2014, Table 2 (Isc/IL < 20)";
    odd_ranges: ((low, high, percent), ...) with low <= h < high
    [order, order, % of rated current]; the last range includes h = 50;
    total_percent: TDD / TRD limit [%]; even_rule: "quarter" (25 % of the
    odd limit) or "table" (``even_fixed`` then the odd range);
    even_fixed: ((h, percent), ...) for the "table" rule; source_note:
    how the values were obtained."""

    key: str
    edition: str
    odd_ranges: tuple[tuple[float, float, float], ...]
    total_percent: float
    total_name: str
    even_rule: str
    even_fixed: tuple[tuple[int, float], ...] = ()
    source_note: str = ""


IEEE_519_2014 = LimitTable(
    key="ieee519",
    edition="IEEE Std 519-2014, Table 2, row Isc/IL < 20 (all generation equipment)",
    odd_ranges=((3, 11, 4.0), (11, 17, 2.0), (17, 23, 1.5), (23, 35, 0.6), (35, 51, 0.3)),
    total_percent=5.0,
    total_name="TDD",
    even_rule="quarter",
    source_note=(
        "values of IEEE 519-1992 Table 10.3 as reprinted in Kusko & Thompson, Power Quality in "
        "Electrical Systems, McGraw-Hill 2007, p. 17; unchanged in 519-2014 Table 2"
    ),
)

IEEE_1547_2018 = LimitTable(
    key="ieee1547",
    edition="IEEE Std 1547-2018, clause 7.3, Tables 26 and 27",
    odd_ranges=((3, 11, 4.0), (11, 17, 2.0), (17, 23, 1.5), (23, 35, 0.6), (35, 51, 0.3)),
    total_percent=5.0,
    total_name="TRD",
    even_rule="table",
    even_fixed=((2, 1.0), (4, 2.0), (6, 3.0)),
    source_note="from memory, not re-read from the standard; check the standard text",
)

TABLES = (IEEE_519_2014, IEEE_1547_2018)


def limit_percent(order: float, table: LimitTable) -> tuple[float, bool]:
    """Limit [% of rated current] for a component of harmonic order ``order``
    (frequency / fundamental, may be non-integer) and whether it comes from
    loopcheck's above-table assumption (True) rather than the table.

    Orders below 2 are outside the tables; they get the lowest range's value
    (loopcheck's assumption, also flagged True)."""
    if order > TABLE_MAX_ORDER + 1e-9:
        return ABOVE_TABLE_LIMIT_PERCENT, True
    h = float(order)
    odd = None
    for lo, hi, pct in table.odd_ranges:
        if lo <= h < hi:
            odd = pct
            break
    assumed = False
    if odd is None:  # below 3
        odd = table.odd_ranges[0][2]
        assumed = True
    is_int = abs(h - round(h)) < 1e-9
    if is_int and int(round(h)) % 2 == 0:
        n = int(round(h))
        if table.even_rule == "quarter":
            return 0.25 * odd, assumed
        for he, pct in table.even_fixed:
            if he == n:
                return pct, False
        return odd, assumed
    if not is_int:
        assumed = True
    return odd, assumed


def limit_percent_all(order: float) -> float:
    """The strictest limit of :data:`TABLES` at ``order`` [% of rated current]."""
    return min(limit_percent(order, t)[0] for t in TABLES)


def margin_db(actual_percent: float, limit_pct: float) -> float:
    """20*log10(limit / actual) [dB]: positive when below the limit."""
    if actual_percent <= 0:
        return math.inf
    return 20.0 * math.log10(limit_pct / actual_percent)
