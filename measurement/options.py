"""Analysis options, validated at the door (command line and HTTP share them)."""

from __future__ import annotations

from collections.abc import Mapping
from dataclasses import asdict, dataclass, fields
from typing import Any

from samesource.errors import InputError
from samesource.input.design import did_you_mean

MISSING_METHODS = ("listwise", "fiml")
LISTWISE_DROP_LIMIT = 0.05  # above this share of rows dropped, the report recommends FIML
CHECK_MAX = 1000  # simulated surveys per scenario: each is a whole analysis (five scenarios)


@dataclass(frozen=True)
class AnalysisOptions:
    """The options of an analysis (keyword arguments of :func:`samesource.analyze`, the command
    line's flags, the HTTP API's "options"), each checked for its type and range."""

    missing: str = "listwise"        # "listwise" or "fiml" (full-information ML)
    drop_flagged: bool = False       # drop rows flagged by screening before the analysis
    fit_time_limit: float = 60.0     # CPU seconds of one model fit (its thread's time: load-independent)
    n_starts: int = 4                # starting points per model fit
    confidence: float = 0.95
    bootstrap: int | None = None     # None: the default (a bootstrap only for small samples)
    seed: int = 0
    min_group_size: int = 5          # common practice
    sheet: str | None = None         # worksheet of an .xlsx file
    check_corrections: int = 0       # simulated surveys per scenario of the correction check (0: none)

    @classmethod
    def from_dict(cls, obj: Mapping[str, Any] | None) -> AnalysisOptions:
        """Options from {NAME: value}; an unknown name or a bad value raises InputError naming it."""
        if obj is None:
            return cls()
        if not isinstance(obj, Mapping):
            raise InputError("must be a JSON object {NAME: value}", code="bad_options", field="options")
        known = {f.name for f in fields(cls)}
        unknown = sorted(set(obj) - known)
        if unknown:
            raise InputError(f"unknown option '{unknown[0]}'{did_you_mean(unknown[0], known)}; "
                             f"allowed: {', '.join(sorted(known))}",
                             code="bad_options", field=f"options.{unknown[0]}")
        values = dict(obj)
        if isinstance(values.get("missing"), str):  # "FIML" means "fiml"
            values["missing"] = values["missing"].strip().lower()
        opts = cls(**values)
        opts.validate()
        return opts

    def validate(self) -> None:
        """Raise InputError (field "options.NAME") for a value of the wrong type or range."""
        def bad(name: str, msg: str) -> InputError:
            return InputError(msg, code="bad_options", field=f"options.{name}")

        if self.missing not in MISSING_METHODS:
            hint = did_you_mean(self.missing, MISSING_METHODS) if isinstance(self.missing, str) else ""
            raise bad("missing", f"must be one of {', '.join(MISSING_METHODS)}, got {self.missing!r}{hint}")
        if not isinstance(self.drop_flagged, bool):
            raise bad("drop_flagged", "must be true or false")
        for name, lo, hi in (("fit_time_limit", 0.1, 3600.0), ("confidence", 0.5, 0.999)):
            v = getattr(self, name)
            if isinstance(v, bool) or not isinstance(v, int | float) or not lo <= v <= hi:
                raise bad(name, f"must be a number from {lo} to {hi}, got {v!r}")
        for name, lo, hi in (("n_starts", 1, 50), ("bootstrap", 0, 100_000), ("seed", 0, 2**32 - 1),
                             ("min_group_size", 2, 1000), ("check_corrections", 0, CHECK_MAX)):
            v = getattr(self, name)
            if name == "bootstrap" and v is None:
                continue
            if isinstance(v, bool) or not isinstance(v, int) or not lo <= v <= hi:
                raise bad(name, f"must be a whole number from {lo} to {hi}, got {v!r}")
        if self.sheet is not None and not isinstance(self.sheet, str):
            raise bad("sheet", "must be a worksheet name")

    def to_dict(self) -> dict:
        """The options as report.json's "options" shows them."""
        d = asdict(self)
        if not d["check_corrections"]:  # added later: shown when asked for, so earlier reports keep their keys
            del d["check_corrections"]
        return d
