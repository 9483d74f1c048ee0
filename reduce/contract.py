"""The contracts other parts rely on, each in one place: format strings of what reduce
writes, the browser's safe-integer limit, the accounting keys and the invalid-row reasons.

Modules import these; none restates a value. Changing one changes a published contract:
payloads, manifests and the audit read them too.
"""

from __future__ import annotations

from enum import IntEnum

# Format strings: the "format" member of each document reduce writes.
COLUMNS_FORMAT = "reduce.columns/1"  # the default payload layout
GEOJSON_FORMAT = "reduce.geojson/1"  # our foreign member in GeoJSON payloads (RFC 7946 §6.1)
MANIFEST_FORMAT = "reduce.manifest/1"  # the manifest beside every payload
LEVELS_FORMAT = "reduce.levels/1"  # the store of measured levels in a cache entry

# Every integer a payload holds is within ±(2^53 - 1), so a browser's numbers (IEEE 754
# doubles) hold it exactly (ECMAScript Number.MAX_SAFE_INTEGER, from memory).
MAX_SAFE_INTEGER = 2**53 - 1

# The accounting identity: input = filtered + invalid + suppressed + represented (plus
# unassigned, apart from invalid, for recipes that assign regions from boundaries).
ACCOUNTING_KEYS: tuple[str, ...] = (
    "input_rows",
    "filtered_rows",
    "invalid_rows",
    "suppressed_rows",
    "represented_rows",
)
UNASSIGNED_KEY = "unassigned_rows"
# The order the accounting block is written in (unassigned after invalid, when present).
ACCOUNTING_ORDER: tuple[str, ...] = (
    "input_rows",
    "filtered_rows",
    "invalid_rows",
    UNASSIGNED_KEY,
    "suppressed_rows",
    "represented_rows",
)


class Invalid(IntEnum):
    """Why a row is invalid (the code the scan gives it; 0 is a valid row). The names are the
    reasons manifests report in ``accounting.invalid_by_reason``."""

    VALID = 0
    COORDINATES = 1  # null, NaN or out-of-range latitude or longitude
    TIME = 2  # missing or unparseable time
    KEY = 3  # a null region, category or flow end
    UNASSIGNED = 4  # outside every boundary polygon (counted apart from invalid rows)

    @property
    def reason(self) -> str:
        return self.name.lower()


INVALID_REASONS: dict[int, str] = {int(r): r.reason for r in Invalid if r is not Invalid.VALID}
