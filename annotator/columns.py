"""How an annotator describes a column it adds.

A :class:`ColumnSpec` carries everything the writer, the VOParquet metadata, the SQL layer and
``annotator describe`` need: the name (with its unit as a suffix by convention), the Arrow type,
the VOUnit, the IVOA UCD1+ word(s) and a one-line description.
"""

from __future__ import annotations

import re
from dataclasses import dataclass, field

import pyarrow as pa

_NAME = re.compile(r"^[a-z][a-z0-9_]*$")


@dataclass(frozen=True)
class ColumnSpec:
    """One output column.

    :param name: lower-case snake name, unit suffix by convention (``_mpc``, ``_gyr``, ``_mag``).
    :param type: Arrow type of the column (``pa.float64()``, ``pa.bool_()``, ...).
    :param unit: VOUnit string (``"Mpc"``, ``"Gyr"``, ``"mag"``, ``"c"``), or ``None``.
    :param ucd: IVOA UCD1+ (e.g. ``"pos.distance;phys.cosmology"``), or ``None``.
    :param description: one sentence saying what the value means.
    """

    name: str
    type: pa.DataType
    unit: str | None
    ucd: str | None
    description: str
    extra: dict = field(default_factory=dict, compare=False, hash=False)

    def __post_init__(self) -> None:
        if not _NAME.match(self.name):
            raise ValueError(
                f"column name {self.name!r} must be lower-case letters, digits and underscores"
            )
        if not isinstance(self.type, pa.DataType):
            raise TypeError(f"column {self.name!r}: type must be a pyarrow DataType")

    def to_dict(self) -> dict:
        return {
            "name": self.name,
            "type": str(self.type),
            "unit": self.unit,
            "ucd": self.ucd,
            "description": self.description,
        }


FLAGS_COLUMN = ColumnSpec(
    name="annotation_flags",
    type=pa.string(),
    unit=None,
    ucd="meta.code.qual",
    description=(
        "Reasons a row could not be fully annotated, separated by ';' "
        "(empty string for a clean row)."
    ),
)
