"""Records of results that cross a process boundary as JSON: frozen, with NaN as ``null``.

The study results, the meta-analysis and the planning results are written to JSON and read
back. An undefined number is NaN in memory; JSON has no NaN, so it is written as ``null``
and read back as NaN.
"""

from __future__ import annotations

from typing import Annotated, Any

from pydantic import BaseModel, BeforeValidator, ConfigDict


def _none_is_nan(value: Any) -> Any:
    return float("nan") if value is None else value


Number = Annotated[float, BeforeValidator(_none_is_nan)]
"""A float written to JSON as ``null`` when undefined (NaN) and read back as NaN."""


class ResultRecord(BaseModel):
    """A frozen record that refuses unknown fields and writes NaN as ``null``."""

    model_config = ConfigDict(
        frozen=True, extra="forbid", allow_inf_nan=True, ser_json_inf_nan="null"
    )
