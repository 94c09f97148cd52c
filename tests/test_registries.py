"""The registries: file formats (input/loading.READERS), corrections (corrections/paths.py
CORRECTIONS) and report sections (output/sections.py, tested with the page in
test_html_report.py). What is made from them must be what the code said by hand before:
the constants and the preference order are pinned here as they were written out."""

from __future__ import annotations

import gzip
import io

import pandas as pd
import pytest

from samesource.corrections import paths
from samesource.corrections.paths_stage import PREFERENCE
from samesource.input import loading
from samesource.output.tables import METHOD_LABELS

# as written out before the registry (loading.py)
FORMATS = ("csv", "tsv", "txt", "xlsx", "sav", "parquet")
READABLE = (".csv, .tsv or .txt (delimited text), .xlsx, .sav or .parquet (any of them also "
            "gzip-compressed, as .csv.gz)")

# as written out before the registry (paths_stage.py): the order and reasons _preferred reads
PINNED_PREFERENCE = [
    ("method_factor_adjusted", "marker", "the marker-identified method factor passed its checks: it corrects "
                                         "unreliability and the shared method the marker identifies"),
    ("measured_method_adjusted", None, "the measured method construct's model fitted cleanly: it corrects "
                                       "unreliability and the method variance the method scale measures"),
    ("method_factor_adjusted", "plain", "the plain method factor passed its identification checks"),
    ("latent", None, "no method-variance correction passed its checks, so the latent model leads: it corrects "
                     "unreliability but not shared method"),
    ("errors_in_variables", None, "the latent model did not fit cleanly; the single-indicator model corrects "
                                  "unreliability only"),
    ("observed", None, "no corrected estimate could be computed"),
]
ASSUMPTION_IDS = {"marker_carries_method", "method_loadings", "method_orthogonal", "items_continuous",
                  "checks_agree", "estimate_stable", "marker_pure_method", "no_shared_method"}  # contract.md and assumptions.py


def test_format_constants_are_made_from_the_registry():
    assert loading.FORMATS == FORMATS
    assert loading.READABLE == READABLE
    assert loading.TEXT_EXTENSIONS == {".csv": "csv", ".tsv": "tsv", ".txt": "txt"}
    for f in loading.READERS:
        assert f.suffixes and all(s.startswith(".") and s == s.lower() for s in f.suffixes)
        assert f.media_types and all("/" in t for t in f.media_types)
    assert loading.READER["sav"].row_label == "case"


def test_the_openapi_enum_is_the_registry():
    from samesource.service.api.openapi import document

    doc = document()
    assert doc["components"]["schemas"]["Dataset"]["properties"]["format"]["enum"] == list(FORMATS)


@pytest.mark.parametrize("fmt", ["csv", "tsv", "parquet"])
def test_each_format_is_sniffed_and_read_through_its_object(fmt):
    frame = pd.DataFrame({"a": [1, 2, 3], "b": [4, 5, 6]})
    if fmt == "parquet":  # written by pyarrow, the format's own library
        buf = io.BytesIO()
        frame.to_parquet(buf, index=False)
        data = buf.getvalue()
    else:
        data = frame.to_csv(index=False, sep="\t" if fmt == "tsv" else ",").encode()
    for blob in (data, gzip.compress(data)):
        t = loading.load_table(blob, name=f"survey.{fmt}" + (".gz" if blob is not data else ""))
        assert t.format == fmt and list(t.frame.columns) == ["a", "b"]


def test_corrections_registry_makes_methods_notes_labels_and_the_preference():
    assert paths.METHODS == ("observed", "disattenuated", "disattenuated_omega", "errors_in_variables",
                             "latent", "marker_adjusted", "method_factor_adjusted",
                             "measured_method_adjusted")  # contract.md's METHOD keys, in report order
    assert PREFERENCE == PINNED_PREFERENCE
    assert METHOD_LABELS == {c.name: c.label for c in paths.CORRECTIONS}
    assert set(paths.NOTES) == set(paths.METHODS) and all(paths.NOTES.values())
    for c in paths.CORRECTIONS:
        assert set(c.assumptions) <= ASSUMPTION_IDS, c.name
        assert "estimate_stable" in c.assumptions  # every estimate's fit is checked
    # the estimates that correct unreliability only are the ones that assume no shared method
    from samesource.method_checks.assumptions import UNRELIABILITY_ONLY
    assert {c.name for c in paths.CORRECTIONS if "no_shared_method" in c.assumptions} == set(UNRELIABILITY_ONLY)


def test_every_estimate_is_written_by_its_correction():
    from conftest import small_survey

    from samesource.input.design import parse_design

    data, design = small_survey(n=150)
    dsg = parse_design(design)
    X = pd.read_csv(io.BytesIO(data))[list(dsg.items)].to_numpy(dtype=float)
    for it in (i for c in dsg.constructs.values() for i in c.reverse):
        j = list(dsg.items).index(it)
        X[:, j] = dsg.scale_min + dsg.scale_max - X[:, j]
    est = paths.PathEstimator(dsg, use_method_factor="marker", method_loadings="equal", use_measured=False,
                              time_limit=30)
    out, extra = est.estimate(X, compute_se=False)
    assert set(out) == set(est.keys)  # every (correction, path) once
    assert all(out[("measured_method_adjusted", o, x)].status == "absent"
               for _, o, x in est.keys if _ == "measured_method_adjusted")
    assert "r_m" in extra and set(extra["alpha"]) == set(est.path_names)
