"""``samesource.analyze``: the one call the command line, the HTTP service and a notebook make.

It takes the data as a pandas DataFrame, a path or the bytes of a file, and the design as a
dict, a path to its JSON file or a :class:`~samesource.input.design.Design`; options are
keyword arguments (those of :class:`~samesource.options.AnalysisOptions`). It runs the stages
of :mod:`samesource.pipeline` and returns a :class:`~samesource.output.report.Report`.
"""

from __future__ import annotations

import os
from collections.abc import Callable, Mapping
from typing import Any

from samesource import pipeline
from samesource.errors import InputError
from samesource.input.design import Design, load_design
from samesource.input.frames import Data
from samesource.options import AnalysisOptions
from samesource.output.report import Report


def analyze(data: Data, design: Design | Mapping | str | os.PathLike, *,
            options: AnalysisOptions | Mapping | None = None, name: str | None = None,
            progress: Callable[[str, int, int], None] | None = None, executor: Any = None,
            sources: Mapping[str, Any] | None = None, **option_values: Any) -> Report:
    """Analyse a survey: reliability and validity of each scale, every common-method check,
    and each key path re-estimated with the shared method's bias corrected or bounded.

    Parameters
    ----------
    data:
        A pandas DataFrame (one row per respondent, one column per item), a path to a data
        file (.csv, .tsv, .txt, .xlsx, .sav, .parquet, also gzip-compressed) or its bytes.
    design:
        The study design: a dict as in docs/design-file.md, a path to its JSON file, or a Design.
    name:
        The file name messages and the report use (for bytes or a frame).
    progress:
        Called as ``progress(stage, done, total)`` as the stages and the bootstrap go on.
    sources:
        The design's second sources (its ``sources`` field): NAME -> a DataFrame, a path or
        bytes of that source's file, joined to the main file on the ids.
    executor:
        Where bootstrap replicates run (default: serial for a few, else a local pool of
        worker processes that need no ``if __name__ == "__main__"`` guard in the caller).
    **option_values:
        missing="listwise"|"fiml", bootstrap=N, seed=N, confidence=C, min_group_size=N,
        drop_flagged=bool, fit_time_limit=S, n_starts=N, sheet=NAME; or ``options=`` a dict.

    Raises :class:`~samesource.errors.InputError` (with the file, row, column or design field)
    for bad input.

    >>> import samesource
    >>> report = samesource.analyze("sample_surveys/staff_survey.csv",
    ...                             "sample_surveys/staff_survey_design.json")  # doctest: +SKIP
    >>> report.to_frame("constructs")                                           # doctest: +SKIP
    """
    opts = _options(options, option_values)
    if isinstance(design, str | os.PathLike):
        design = load_design(design)
    result = pipeline.analyze(data, design, opts, name=name, progress=progress, executor=executor,
                              sources=sources)
    return Report.from_dict(result.report, fits=result.fits)


def _options(options: AnalysisOptions | Mapping | None, values: Mapping[str, Any]) -> AnalysisOptions:
    if isinstance(options, AnalysisOptions):
        if values:
            return AnalysisOptions.from_dict({**options.to_dict(), **values})
        return options
    if options is not None and not isinstance(options, Mapping):
        raise InputError("options must be a dict {NAME: value} or AnalysisOptions", code="bad_options",
                         field="options")
    return AnalysisOptions.from_dict({**(options or {}), **values})

