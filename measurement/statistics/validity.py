"""Discriminant validity between constructs: HTMT and the Fornell-Larcker criterion.

Item correlations for :func:`htmt` come from ``DataFrame.corr()`` (pairwise-complete
Pearson), which the callers compute; no wrapper is provided for it.
"""

from __future__ import annotations

from collections.abc import Mapping, Sequence
from itertools import combinations

import numpy as np
import pandas as pd

# Henseler, Ringle & Sarstedt (2015): HTMT above 0.85 (strict) or 0.90 (liberal) signals a
# lack of discriminant validity.
HTMT_STRICT = 0.85
HTMT_LIBERAL = 0.90


def _monotrait_mean(corr: pd.DataFrame, items: Sequence[str]) -> float | None:
    if len(items) < 2:
        return None
    sub = corr.loc[list(items), list(items)].to_numpy(dtype=float)
    vals = sub[np.triu_indices(len(items), k=1)]
    if not np.all(np.isfinite(vals)):
        return None
    return float(vals.mean())


def htmt(
    corr: pd.DataFrame, blocks: Mapping[str, Sequence[str]]
) -> dict[tuple[str, str], float | None]:
    """Heterotrait-monotrait ratio of correlations for every pair of constructs.

    HTMT(a, b) = |mean r| over the item pairs with one item in a and one in b
    (heterotrait-heteromethod correlations, signed, as in the paper; the absolute value of
    the ratio is taken at the end), divided by the square root of the product of
    the mean correlation among a's own items and the mean among b's own items
    (monotrait-heteromethod: the off-diagonal correlations within each block).

    Parameters
    ----------
    corr : pandas.DataFrame
        Item correlation matrix with item names as index and columns; items reverse-keyed
        so that within-construct correlations are positive.
    blocks : mapping of str to list of str
        Construct name -> its item names.

    Returns
    -------
    dict
        ``{(a, b): value}`` for every pair, ``a`` before ``b`` in ``blocks`` order. The value
        is ``None`` (undefined) when either construct has fewer than two items (no
        monotrait correlation), when a monotrait mean is not positive (its square root and
        the ratio have no meaning; usually an item that still needs reverse-keying), or
        when a needed correlation is missing (NaN).

    References
    ----------
    Henseler, J., Ringle, C. M., & Sarstedt, M. (2015). A new criterion for assessing
    discriminant validity in variance-based structural equation modeling. Journal of the
    Academy of Marketing Science, 43(1), 115-135.
    """
    missing = [i for items in blocks.values() for i in items if i not in corr.index]
    missing += [i for items in blocks.values() for i in items if i not in corr.columns]
    if missing:
        raise KeyError(f"items not in the correlation matrix: {sorted(set(missing))}")
    mono = {name: _monotrait_mean(corr, items) for name, items in blocks.items()}
    out: dict[tuple[str, str], float | None] = {}
    for a, b in combinations(blocks, 2):
        hetero = corr.loc[list(blocks[a]), list(blocks[b])].to_numpy(dtype=float)
        ma, mb = mono[a], mono[b]
        if ma is None or mb is None or ma <= 0 or mb <= 0 or not np.all(np.isfinite(hetero)):
            out[(a, b)] = None
            continue
        # the published formula on signed correlations; the ratio's sign (the direction of
        # the association) is dropped, as discriminant validity concerns its size only
        out[(a, b)] = float(abs(hetero.mean()) / np.sqrt(ma * mb))
    return out


HTMT_VARIANT = ("HTMT as published (Henseler, Ringle & Sarstedt 2015): arithmetic means of the signed item "
                "correlations (reverse-keyed items recoded first), the absolute value of the ratio reported; "
                "HTMT2 (Roemer, Schuberth & Henseler 2021): geometric means, defined only when every "
                "heterotrait correlation has the same sign and every monotrait correlation is positive")


def htmt2(
    corr: pd.DataFrame, blocks: Mapping[str, Sequence[str]]
) -> dict[tuple[str, str], float | None]:
    """HTMT2: the heterotrait-monotrait ratio with geometric instead of arithmetic means.

    HTMT2(a, b) = geometric mean of |r| over the heterotrait item pairs, divided by the
    square root of the product of the geometric means of each construct's monotrait
    correlations. Geometric means need positive values: the value is ``None`` when a
    monotrait correlation is not positive, when the heterotrait correlations differ in sign
    (or one is zero), and when a construct has fewer than two items.

    References
    ----------
    Roemer, E., Schuberth, F., & Henseler, J. (2021). HTMT2 - an improved criterion for
    assessing discriminant validity in structural equation modeling. Industrial Management
    & Data Systems, 121(12), 2637-2650.
    """
    def geo(v: np.ndarray) -> float | None:
        if v.size == 0 or not np.all(np.isfinite(v)) or np.any(v <= 0):
            return None
        return float(np.exp(np.mean(np.log(v))))

    mono = {}
    for name, items in blocks.items():
        sub = corr.loc[list(items), list(items)].to_numpy(dtype=float)
        mono[name] = geo(sub[np.triu_indices(len(items), k=1)]) if len(items) >= 2 else None
    out: dict[tuple[str, str], float | None] = {}
    for a, b in combinations(blocks, 2):
        hetero = corr.loc[list(blocks[a]), list(blocks[b])].to_numpy(dtype=float).ravel()
        same_sign = bool(np.all(hetero > 0) or np.all(hetero < 0))
        h = geo(np.abs(hetero)) if same_sign else None
        ma, mb = mono[a], mono[b]
        out[(a, b)] = None if h is None or ma is None or mb is None else float(h / np.sqrt(ma * mb))
    return out


def fornell_larcker(
    ave: Mapping[str, float | None], factor_corr: Mapping[tuple[str, str], float | None]
) -> dict[tuple[str, str], dict]:
    """Fornell-Larcker criterion for each pair of constructs.

    Discriminant validity holds for a pair when each construct's average variance
    extracted exceeds the squared correlation between the two constructs.

    Parameters
    ----------
    ave : mapping of str to float or None
        Construct -> AVE (see :func:`samesource.statistics.reliability.average_variance_extracted`).
    factor_corr : mapping of (str, str) to float or None
        Latent (factor) correlation for each pair to judge.

    Returns
    -------
    dict
        ``{(a, b): {"r_squared", "ave_a", "ave_b", "holds"}}`` in ``factor_corr`` order.
        ``holds`` is ``True`` when ``ave_a > r_squared`` and ``ave_b > r_squared``, ``False``
        when either is not, and ``None`` (undecided) when an AVE or the correlation is
        missing; a missing value is ``None`` in the entry too.

    References
    ----------
    Fornell, C., & Larcker, D. F. (1981). Evaluating structural equation models with
    unobservable variables and measurement error. Journal of Marketing Research, 18(1),
    39-50.
    """

    def clean(v: float | None) -> float | None:
        return None if v is None or not np.isfinite(v) else float(v)

    out: dict[tuple[str, str], dict] = {}
    for (a, b), r in factor_corr.items():
        r = clean(r)
        r2 = None if r is None else r * r
        ave_a, ave_b = clean(ave.get(a)), clean(ave.get(b))
        holds = None
        if r2 is not None and ave_a is not None and ave_b is not None:
            holds = bool(ave_a > r2 and ave_b > r2)
        out[(a, b)] = {"r_squared": r2, "ave_a": ave_a, "ave_b": ave_b, "holds": holds}
    return out
