"""The one rule for the numbers a person gives every command and endpoint: a threshold, a precision, k.

The CLI (argparse types), the service (query-string and form values, its OpenAPI schema) and the
domain functions that take these numbers all check them here, so each has one stated range and one
message wherever it is given.

- threshold: a similarity in (0, 1]. Scores are cosines (normalised or verified), and a duplicate
  threshold at or below 0 would call unrelated images copies: `groups --threshold -0.5` put every
  file of a collection into one group.
- precision: in (0, 1), exclusive: precision 1 is no estimate a finite sample can promise.
- k: a whole number from 1 to MAX_K.
"""

from __future__ import annotations

import math
from dataclasses import dataclass

from .errors import UsageError

MAX_K = 100


@dataclass(frozen=True)
class Limit:
    name: str
    lo: float
    hi: float
    lo_open: bool = False
    hi_open: bool = False
    whole: bool = False

    @property
    def stated(self) -> str:
        if self.whole:
            return f"a whole number from {int(self.lo)} to {int(self.hi)}"
        return f"a number in {'(' if self.lo_open else '['}{self.lo:g}, {self.hi:g}{')' if self.hi_open else ']'}"

    def inside(self, value: float) -> bool:
        above = value > self.lo if self.lo_open else value >= self.lo
        below = value < self.hi if self.hi_open else value <= self.hi
        return math.isfinite(value) and above and below

    def check(self, value):
        """The value when it lies in the range, else a UsageError stating the range."""
        if value is None:
            return None
        try:
            number = float(value) if not isinstance(value, str) else float(value.strip())
        except ValueError:
            number = math.nan
        if self.whole and (not math.isfinite(number) or number != int(number)):
            number = math.nan
        if not self.inside(number):
            raise UsageError(f"{self.name} must be {self.stated}, not {str(value)[:40]!r}")
        return int(number) if self.whole else number

    def schema(self) -> dict:
        """The range as an OpenAPI 3.0 schema."""
        schema: dict = {"type": "integer" if self.whole else "number",
                        "minimum": int(self.lo) if self.whole else self.lo,
                        "maximum": int(self.hi) if self.whole else self.hi}
        if self.lo_open:
            schema["exclusiveMinimum"] = True
        if self.hi_open:
            schema["exclusiveMaximum"] = True
        return schema

    def argparse_type(self):
        """An argparse `type=` that refuses a value outside the range with the same message."""
        import argparse

        def parse(text: str):
            try:
                return self.check(text)
            except UsageError as exc:
                raise argparse.ArgumentTypeError(exc.message) from None

        parse.__name__ = self.name  # argparse names the type in its messages
        return parse


THRESHOLD = Limit("threshold", 0.0, 1.0, lo_open=True)
PRECISION = Limit("precision", 0.0, 1.0, lo_open=True, hi_open=True)
K = Limit("k", 1, MAX_K, whole=True)
