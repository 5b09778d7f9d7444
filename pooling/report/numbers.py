"""How numbers are written on the page, in the terminal and on the history page: one set of rules.

* values of the measured quantity get their decimals from the data's own spread (two significant digits of
  a typical posterior sd), so 1e7 + 0.123 with an sd of 0.01 reads 10000000.123, never 1e+07;
* probabilities get three decimals, with the ends told apart: exactly 0 is '0', exactly 1 is '1', a value
  that would round to either end reads '<0.001' or '>0.999' (so 0.9995 never reads 1.000);
* other figures (R-hat, effective sample sizes, error bounds, mean squares) are written in plain decimals
  with a few significant digits; scientific notation only for magnitudes no plain decimal can carry
  (at least 1e12, or below 1e-5 and not zero);
* counts carry thousands separators; down-weighted counts (a store's half-life) one decimal;
* a number the user gave (a threshold, a limit, an allowed bias) reads back as given: the fewest digits that
  name the same double, in plain decimals (1000000000.3, never 1e+09);
* two figures set side by side (a run's value then and now) get the decimals it takes for two different
  figures never to read the same (`apart`), and a probability beside a decision made at P the decimals it
  takes not to read as P (`prob_near`).
"""

from __future__ import annotations

import math

import numpy as np

DASH = "–"
PLAIN_ABOVE = 1e12  # from here on, scientific notation
PLAIN_BELOW = 1e-5  # and below this (except 0)


def _bad(x) -> bool:
    try:
        return x is None or not math.isfinite(float(x))
    except (TypeError, ValueError):
        return True


class Values:
    """Values of the measured quantity at the precision of their uncertainty: two significant digits of
    a typical posterior sd, so 412.37 ± 3 reads 412.4 and 1000000000.123 ± 0.01 keeps its last digits."""

    def __init__(self, typical_sd: float, sep: str = "\u2009", dash: str = DASH):
        if typical_sd > 0 and math.isfinite(typical_sd):
            self.dec = int(min(12, max(0, 1 - math.floor(math.log10(typical_sd)))))
        else:
            self.dec = 4
        self.sep, self.dash = sep, dash

    def __call__(self, x, extra: int = 0) -> str:
        if _bad(x):
            return self.dash
        text = f"{float(x):,.{self.dec + extra}f}".replace(",", self.sep)
        if text.startswith("-") and not any(c in "123456789" for c in text):
            text = text[1:]  # no "-0.0"
        return text

    v = __call__


def prob(x, dash: str = DASH) -> str:
    """A probability: '0', '<0.001', three decimals, '>0.999', '1'.

    >>> [prob(x) for x in (0.0, 0.0004, 0.0421, 0.9996, 1.0)]
    ['0', '<0.001', '0.042', '>0.999', '1']
    """
    if _bad(x):
        return dash
    x = float(x)
    if x <= 0.0:
        return "0"
    if x >= 1.0:
        return "1"
    if x < 0.0005:
        return "<0.001"
    if x >= 0.9995:
        return ">0.999"
    return f"{x:.3f}"


def prob_eq(x) -> str:
    """'= 0.042', '< 0.001', '> 0.999' for prose: 'p = 0.042'.

    >>> prob_eq(0.0421), prob_eq(0.0001)
    ('= 0.042', '< 0.001')
    """
    text = prob(x)
    return text[0] + " " + text[1:] if text[0] in "<>" else "= " + text


def sig(x, digits: int = 3, dash: str = DASH) -> str:
    """x with `digits` significant digits in plain decimals (1.42e+03 reads 1420, 0.000123 reads 0.000123);
    scientific notation only beyond PLAIN_ABOVE or below PLAIN_BELOW."""
    if _bad(x):
        return dash
    x = float(x)
    if x == 0.0:
        return "0"
    a = abs(x)
    if a >= PLAIN_ABOVE or a < PLAIN_BELOW:
        return f"{x:.{max(digits - 1, 0)}e}"
    dec = max(0, digits - 1 - math.floor(math.log10(a)))
    text = f"{x:,.{dec}f}"
    if "." in text and dec > 0:
        text = text.rstrip("0").rstrip(".")
    return text


def given(x, dash: str = DASH) -> str:
    """A number the user gave, written back with the fewest digits that read as the same double: plain decimals
    from 1e-6 to 1e16 (so 1000000000.3 never reads 1e+09 and 1e15 + 0.5 reads 1000000000000000.5), beyond that
    scientific notation with every digit it needs.

    >>> [given(x) for x in (400.0, 1000000000.3, 1e15 + 0.5, -2.5e-3, 1e20 + 2**17)]
    ['400', '1000000000.3', '1000000000000000.5', '-0.0025', '1.0000000000000013e+20']
    """
    if _bad(x):
        return dash
    x = float(x)
    if x == 0.0:
        return "0"
    if 1e-6 <= abs(x) < 1e16:
        return np.format_float_positional(x, unique=True, trim="-")
    return np.format_float_scientific(x, unique=True, trim="-")


def apart(values, show, start: int = 0, most: int = 24) -> list[str]:
    """The texts of `values` written by show(x, extra), with the fewest extra decimals (from `start`) at which
    figures that differ read differently (a run's mu then and now, 1000000000.31 and 1000000000.34, read
    1000000000.31 and 1000000000.34, not twice 1000000000.3); past `most` extra decimals, `given`'s digits.

    >>> apart([1000000000.31, 1000000000.34], Values(0.5, sep=""))
    ['1000000000.31', '1000000000.34']
    """
    xs = [float(x) if not _bad(x) else math.nan for x in values]
    distinct = len({x for x in xs if math.isfinite(x)})
    for extra in range(start, start + most):
        texts = [show(x, extra) for x in xs]
        if len({t for t, x in zip(texts, xs) if math.isfinite(x)}) == distinct:
            return texts
    return [given(x) for x in xs]


def then_now(then, now, show) -> tuple[str, str, str]:
    """A figure of the previous run and of this one, and the size of the shift now - then (its sign is the
    presenter's), each written by show(x, extra): then and now told apart (`apart`), the shift with at least one
    decimal more and never reading 0 when the two differ.

    >>> then_now(1000000000.31, 1000000000.34, Values(0.5, sep=""))
    ('1000000000.31', '1000000000.34', '0.030')
    """
    a, b = apart([then, now], show)
    return a, b, apart([0.0, abs(float(now) - float(then))], show, start=1)[1]


def prob_near(p, at: float, dash: str = DASH) -> str:
    """A probability shown beside a decision made at `at`, with as many decimals as it takes not to read as `at`
    when it is not (0.9496 against 0.95 reads 0.9496, not 0.950).

    >>> prob_near(0.9496, 0.95), prob_near(0.9, 0.95)
    ('0.9496', '0.900')
    """
    text = prob(p, dash)
    d = 3
    while d < 6 and p != at and text.replace(">", "").replace("<", "") == f"{at:.{d}f}":
        d += 1
        text = f"{p:.{d}f}"
    return text


def whole(x, dash: str = DASH) -> str:
    """A count with separators: 12,345; a fractional (down-weighted) count with one decimal."""
    if _bad(x):
        return dash
    x = float(x)
    return f"{round(x):,}" if x == round(x) else f"{x:,.1f}"


def plural(n, one: str, many: str | None = None) -> str:
    """'1 group', '2 groups', '1,234 measurements', '58.9 measurements' (down-weighted counts)."""
    x = float(n)
    word = one if x == 1 else (many or one + "s")
    return f"{whole(x)} {word}"


def rhat(x, dash: str = DASH) -> str:
    """R-hat to three decimals (from 10 on, three significant digits)."""
    if _bad(x):
        return dash
    return f"{float(x):.3f}" if float(x) < 10 else sig(x, 3)


def ess(x, dash: str = DASH) -> str:
    """An effective sample size: a whole number with separators."""
    return dash if _bad(x) else f"{float(x):,.0f}"


def percent(x, digits: int = 2) -> str:
    return DASH if _bad(x) else f"{100 * float(x):.{digits}f}%"


def typical_sd(values) -> float:
    """The spread the value formats are set by: the median posterior sd, or 1 without one."""
    v = np.asarray(values, dtype=float)
    v = v[np.isfinite(v) & (v > 0)]
    return float(np.median(v)) if v.size else 1.0


GROUP_LEVEL = frozenset({"theta", "sigma", "lambda"})  # checked quantities of one group each


def rerun_advice(diag: dict, draws_requested: int, code=str) -> str:
    """What to do after the diagnostics targets were missed, for the terminal, the warning and the page (`code`
    marks up an option): more draws always; a proper prior on tau only when a hyperparameter (mu, tau, s, nu, an
    effect) missed, as a flat prior on tau with few groups mixes slowly, not when only some group's theta or
    sigma did (a group with two or three measurements, far from the rest, needs more draws, not another prior)."""
    tg = diag.get("targets", {})
    rmax, emin = tg.get("rhat_below", 1.01), tg.get("ess_at_least", 400)
    hyper_missed = any(
        not (
            w.get("rhat_max", np.nan) < rmax
            and w.get("bulk_ess_min", np.nan) >= emin
            and w.get("tail_ess_min", np.nan) >= emin
        )
        for name, w in (diag.get("worst") or {}).items()
        if name not in GROUP_LEVEL
    )
    n = draws_requested
    text = f"run again with more draws, for example {code(f'--draws {2 * n} --max-draws {8 * n}')}"
    if hyper_missed:
        text += f", or with a proper prior on tau ({code('--tau half-cauchy:SCALE')})"
    return text
