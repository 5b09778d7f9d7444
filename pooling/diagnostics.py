"""Convergence diagnostics of MCMC draws, vectorised over many parameters.

Every function takes draws `x` of shape (chains, draws, *rest) and returns one value per
parameter: an array of shape `rest`, or a Python float when `rest` is empty. The definitions are
those of Vehtari, Gelman, Simpson, Carpenter and Buerkner (2021), "Rank-normalization, folding, and
localization: an improved R-hat for assessing convergence of MCMC", Bayesian Analysis 16(2):

* split chains: each chain is cut into its first and last floor(draws/2) draws (the middle draw
  of an odd-length chain is dropped), giving M = 2*chains sequences of n draws, S = M*n in all;
* rank normalisation: the S split draws of a parameter are ranked jointly (ties get their
  average rank r) and replaced by the normal scores z = Phi^-1((r - 3/8) / (S + 1/4));
* R-hat of M sequences: W = mean of the within-sequence variances, B/n = variance of the
  sequence means (both with divisor count - 1), var+ = (n - 1)/n * W + B/n, R-hat = sqrt(var+/W);
* split R-hat = max(bulk R-hat of the rank-normalised split draws, tail R-hat of the
  rank-normalised |x - median(x)|, the median taken over the split draws);
* ESS of M sequences: rho_t = 1 - (W - mean_m acov_m(t)) / var+, where acov_m(t) is the
  autocovariance of sequence m at lag t (divisor n), and rho_0 = 1. Geyer's initial monotone
  sequence: the pair sums P_k = rho_2k + rho_2k+1 are kept while positive, for k < K where K is
  the first non-positive pair or (n - 3)//2, whichever comes first; the kept ones are made
  non-increasing by a running minimum; tau = -1 + 2 * sum_{k<K} P_k + c, with the closing term
  c = rho_2K if P_K > 0 (the sum was cut by the length bound) and max(rho_2K, 0) otherwise; tau
  is bounded below by 1/log10(S), so ESS = S / tau is at most S*log10(S) (antithetic chains).
  The length bound and the closing term were matched to the outputs of arviz 0.23;
* bulk ESS: ESS of the rank-normalised split draws; tail ESS: the smaller ESS of the split
  indicators I(x <= q05) and I(x <= q95), q being the 5% and 95% quantiles of all draws (numpy's
  default linear interpolation); mean ESS: ESS of the raw split draws; MCSE of the mean:
  sd(x, ddof=1) / sqrt(mean ESS).

Edge cases, chosen to agree with arviz 0.23: fewer than 4 draws, or any NaN draw, gives NaN; +-inf
draws are ranked like other values by the rank-based R-hat, bulk and tail ESS, and give NaN for
the mean ESS and MCSE; R-hat needs 2 chains (NaN for one); when every split draw of a quantity
is the same value its ESS is S (its mean is known exactly) and its R-hat is NaN (0/0).
Two known differences from arviz 0.23. Sequences that are each constant but differ from one
another (stuck chains) give R-hat = inf; arviz returns NaN or a huge finite number, depending on
the rounding error of its chain variances. And when (chains*draws - 1)*p is a whole number
(possible only when chains*draws is odd), numpy's quantile is exactly a draw while arviz's own
quantile can land an ulp below it, so the indicator, and the tail ESS, can differ there.

Speed: parameters are handled in blocks of `_BLOCK` columns, so memory stays bounded, and nothing
loops over single parameters in Python. One sort per parameter serves the ranks, the median and
the quantiles: a compiled bucket sort (`_sort_rows`), or numpy's argsort for the rows it hands back
(NaN, infinities, all values equal, values crowded into few buckets); ties share their average rank,
so either permutation gives the same scores; the normal scores and the folded draws' ranks (a linear merge of the
two sorted halves) are compiled loops (`_rank_block`). The tail ESS alone needs no sort: its
quantiles come from np.quantile. The autocovariances are computed lag by lag up to `_LAGS` lags,
stopping where Geyer's sequence stops (`_geyer_direct`), which settles most parameters of a
well-mixing run; only the parameters whose sequence is still positive there get the full
autocovariance by FFT. Large inputs (at least `_THREADED_MIN` numbers) have their blocks computed
on two threads (pooling._blocks), with results identical to one thread.
"""

from __future__ import annotations

import numpy as np
from numba import njit
from scipy.special import ndtri

from . import _jit_cache  # noqa: F401  (first: numba needs a writable cache folder, pooling/_jit_cache.py)
from ._blocks import Scratch, each_block
from .order import gather, sort_bucketed, sort_counts

__all__ = [
    "split_rhat",
    "bulk_ess",
    "tail_ess",
    "mean_ess",
    "mean_mc_error",
    "rhat_ess",
    "check_targets",
    "miss_records",
    "worst",
]

_BLOCK = 64  # parameters per block: 4 x 1000 float64 draws of 64 parameters are 2 MB, cache-sized
_LAGS = 32  # lags computed directly (compiled, stopping where Geyer's sequence stops) before falling back to FFT
_THREADED_MIN = 1_000_000  # draws x parameters below which one thread is faster than starting a pool
_MIN_DRAWS = 4


# --------------------------------------------------------------------------------------------
# building blocks; every array here has the parameter axis first


@njit(cache=True, nogil=True, error_model="numpy")
def _place_scores(vals, where, table, out):
    """out[where[i]] = the normal score of sorted position i of `vals`, ties sharing their average
    rank; table[2r] is the score of rank r (r a multiple of 1/2)."""
    size = vals.shape[0]
    i = 0
    while i < size:
        v = vals[i]
        if i + 1 < size and vals[i + 1] == v:  # a run of ties: positions i..j (0-based) share rank (i + j) / 2 + 1
            j = i + 1
            while j + 1 < size and vals[j + 1] == v:
                j += 1
            val = table[i + j + 2]
            for t in range(i, j + 1):
                out[where[t]] = val
            i = j + 1
        else:
            out[where[i]] = table[2 * i + 2]
            i += 1


@njit(cache=True, nogil=True, error_model="numpy")
def _sort_rows(xs, srt, orders, bad, count):
    """srt[p] = row p of xs (P, S) sorted ascending and orders[p] a permutation that sorts it, by the compiled
    bucket sort of pooling.order (on a real run's draws 36 us per 4,000 draws, where numpy 2.4's argsort took
    41 us on the machine of 2026-12-03 and 85-105 us on that of 2026-12-04); a row it hands back (NaN or infinite
    values, all values equal, values crowded into few buckets) is flagged in bad, for numpy's argsort. count:
    scratch from pooling.order.sort_counts(S)."""
    for p in range(xs.shape[0]):
        bad[p] = not sort_bucketed(xs[p], 1.0, srt[p], orders[p], count)


@njit(cache=True, nogil=True, error_model="numpy")
def _rank_block(xs, orders, table, z, zf, srt, redo):
    """For each row of xs (P, S), given a permutation `orders` that sorts it (any: tied values share their
    average rank, so their order does not matter): srt = the sorted values (taken through `orders` where
    redo[p], already in place elsewhere), z = normal scores of the values, zf = normal scores of the values
    folded about their median (|x - median|)."""
    p_rows, size = xs.shape
    k = size // 2
    folded = np.empty(size)
    where_f = np.empty(size, dtype=np.int64)
    for p in range(p_rows):
        x = xs[p]
        order = orders[p]
        row = srt[p]
        if redo[p]:
            for i in range(size):
                row[i] = x[order[i]]
        _place_scores(row, order, table, z[p])
        med = row[k] if size % 2 else (row[k - 1] + row[k]) / 2.0
        # the folded values are two sorted runs: med - row[k-1], ..., med - row[0] and row[k] - med, ...;
        # merging them, the first run first on ties, is the stable sort of their concatenation
        # (written without branches in the loop: which run comes next is data, and mispredicted jumps cost
        # more than the merge's arithmetic)
        i, j, m = 0, k, 0
        while i < k and j < size:
            a = med - row[k - 1 - i]
            b = row[j] - med
            first = a <= b
            folded[m] = a if first else b
            where_f[m] = order[k - 1 - i] if first else order[j]
            i += first
            j += 1 - first
            m += 1
        while i < k:
            folded[m] = med - row[k - 1 - i]
            where_f[m] = order[k - 1 - i]
            i += 1
            m += 1
        while j < size:
            folded[m] = row[j] - med
            where_f[m] = order[j]
            j += 1
            m += 1
        _place_scores(folded, where_f, table, zf[p])


@njit(cache=True, nogil=True, fastmath={"reassoc"}, error_model="numpy")
def _geyer_direct(y, const_seq, lags, ess, settled, w, var_plus):
    """The multi-sequence ESS of each row of y (P, M, n) by Geyer's initial monotone sequence, on
    autocovariances computed lag by lag and only as far as the sequence goes (a few lags for a
    well-mixing chain). Rows whose sequence runs past `lags` are marked unsettled, for the FFT path;
    w and var_plus are returned for it. Sums may be reassociated (SIMD): the results can differ
    from a strict left-to-right sum in the last bits."""
    p_rows, m, n = y.shape
    size = m * n
    npairs = max(0, (n - 3) // 2)
    denom = n * m
    floor = 1.0 / np.log10(size)
    d = np.empty((m, n))
    means = np.empty(m)
    for p in range(p_rows):
        for a in range(m):
            acc = 0.0
            for t in range(n):
                acc += y[p, a, t]
            means[a] = acc / n
            if const_seq[p, a]:
                d[a, :] = 0.0
            else:
                for t in range(n):
                    d[a, t] = y[p, a, t] - means[a]
        grand = means.sum() / m
        bvar = 0.0
        for a in range(m):
            bvar += (means[a] - grand) ** 2
        bvar /= m - 1
        acc = 0.0
        for a in range(m):
            for t in range(n):
                acc += d[a, t] * d[a, t]
        wp = (acc / denom) * (n / (n - 1))
        vp = (n - 1) / n * wp + bvar
        w[p] = wp
        var_plus[p] = vp
        settled[p] = False
        total = 0.0
        mono = np.inf
        k = 0
        r = np.empty(2)
        while 2 * k + 1 < lags:
            for h in range(2):
                lag = 2 * k + h
                if lag == 0:
                    r[h] = 1.0
                    continue
                acc = 0.0
                for a in range(m):
                    for t in range(n - lag):
                        acc += d[a, t] * d[a, t + lag]
                r[h] = 1.0 - (wp - acc / denom) / vp
            pair = r[0] + r[1]
            if not (pair > 0) or k == npairs:
                tau = -1.0 + 2.0 * total
                if pair > 0 or r[0] > 0:
                    tau += r[0]
                if tau < floor:
                    tau = floor
                ess[p] = size / tau
                settled[p] = True
                break
            mono = min(mono, pair)
            total += mono
            k += 1


_TABLES: dict[int, np.ndarray] = {}


def _score_table(size: int) -> np.ndarray:
    """table[i] = Phi^-1((i/2 - 3/8) / (size + 1/4)): the normal score of rank i/2 (ranks of tied values
    are averages, so multiples of 1/2), computed as the untied and tied scores were before."""
    table = _TABLES.get(size)
    if table is None:
        table = ndtri((np.arange(2 * size + 3) / 2.0 - 0.375) / (size + 0.25))
        _TABLES[size] = table
    return table


def _quantile_sorted(s: np.ndarray, prob: float) -> np.ndarray:
    """numpy's default (linear) quantile of each sorted row of `s`, with numpy's arithmetic."""
    size = s.shape[1]
    h = (size - 1) * prob
    lo = int(np.floor(h))
    g = h - lo
    a = s[:, lo]
    b = s[:, min(lo + 1, size - 1)]
    diff = b - a
    return a + diff * g if g < 0.5 else b - diff * (1.0 - g)


def _rhat(y: np.ndarray, const_seq: np.ndarray) -> np.ndarray:
    """R-hat of normal scores y (P, M, n); const_seq (P, M) marks sequences of equal values."""
    n = y.shape[-1]
    # one pass for the sums: safe here, as y holds normal scores (|y| < 9), not raw draws
    total = y.sum(axis=-1)
    mean = total / n
    var = (np.einsum("pmk,pmk->pm", y, y) - total * mean) / (n - 1)
    var[const_seq] = 0.0  # exactly, not a rounding error
    w = var.mean(axis=-1)
    var_plus = (n - 1) / n * w + mean.var(axis=-1, ddof=1)
    return np.sqrt(var_plus / w)


def _geyer(acov: np.ndarray, w, var_plus, n: int, size: int):
    """ESS from the mean autocovariances acov (P, L) of lags 0..L-1; also which rows it settled.

    A row is settled when its pair sequence stops within the L lags given; the other rows need
    more lags and their ESS returned here is meaningless.
    """
    p, lags = acov.shape
    rho = 1.0 - (w[:, None] - acov) / var_plus[:, None]
    rho[:, 0] = 1.0
    npairs = max(0, (n - 3) // 2)  # pairs that may be kept
    avail = min(npairs + 1, lags // 2)  # pair sums computable from the lags given
    pairs = rho[:, 0 : 2 * avail : 2] + rho[:, 1 : 2 * avail : 2]
    stop = ~(pairs > 0)  # NaN stops too
    if avail == npairs + 1:
        stop[:, npairs] = True  # the length bound
    settled = stop.any(axis=1)
    k_stop = stop.argmax(axis=1)  # K, the number of pairs kept (for settled rows)
    nk = min(npairs, avail)
    mono = np.minimum.accumulate(pairs[:, :nk], axis=1)
    keep = np.arange(nk)[None, :] < k_stop[:, None]
    tau = -1.0 + 2.0 * np.where(keep, mono, 0.0).sum(axis=1)
    rows = np.arange(p)
    closing = rho[rows, 2 * k_stop]
    tau += np.where((pairs[rows, k_stop] > 0) | (closing > 0), closing, 0.0)
    tau = np.maximum(tau, 1.0 / np.log10(size))
    return size / tau, settled


def _ess(y: np.ndarray, const_seq: np.ndarray) -> np.ndarray:
    """ESS of sequences y (P, M, n) by the multi-sequence estimator and Geyer's monotone sequence."""
    p, m, n = y.shape
    size = m * n
    ess, w, var_plus = np.empty(p), np.empty(p), np.empty(p)
    settled = np.empty(p, dtype=np.bool_)
    _geyer_direct(np.ascontiguousarray(y, dtype=np.float64), const_seq, min(n, _LAGS), ess, settled, w, var_plus)
    if not settled.all():
        rest = ~settled
        yr = y[rest]
        dr = yr - yr.mean(axis=-1)[..., None]
        dr[const_seq[rest]] = 0.0
        from scipy import fft as _fft  # only for sequences still positive after 32 lags: most runs never need it

        nfft = _fft.next_fast_len(2 * n, real=True)
        f = _fft.rfft(dr, nfft, axis=-1)
        power = (f.real**2 + f.imag**2).mean(axis=1)  # mean over sequences before inverting
        full = _fft.irfft(power, nfft, axis=-1)[:, :n] / n
        ess[rest], _ = _geyer(full, w[rest], var_plus[rest], n, size)
    same = const_seq.all(axis=1) & (y[:, :, 0] == y[:, :1, 0]).all(axis=1)
    ess[same] = size  # every draw equal: the mean is known exactly
    return ess


def _const_seq(y: np.ndarray) -> np.ndarray:
    return y.max(axis=-1) == y.min(axis=-1)


@njit(cache=True, nogil=True, error_model="numpy")
def _indicator(xs, q, ind, const):
    """ind[p, m, t] = 1.0 if xs[p, m, t] <= q[p] else 0.0 (NaN: 0.0), and const[p, m] whether a sequence of
    ind is one value."""
    for p in range(xs.shape[0]):
        qp = q[p]
        for m in range(xs.shape[1]):
            ones = 0
            n = xs.shape[2]
            for t in range(n):
                hit = xs[p, m, t] <= qp
                ind[p, m, t] = 1.0 if hit else 0.0
                ones += hit
            const[p, m] = ones == 0 or ones == n


# --------------------------------------------------------------------------------------------
# one block of parameters


def _block(xb: np.ndarray, want: frozenset[str]) -> dict[str, np.ndarray]:
    """The wanted diagnostics of one block of draws xb (P, chains, draws), float64, contiguous."""
    p, c, n_draws = xb.shape
    if n_draws < _MIN_DRAWS:
        return {k: np.full(p, np.nan) for k in want}
    h = n_draws // 2
    m = 2 * c
    size = m * h
    if n_draws % 2 == 0:
        xs = xb.reshape(p, m, h)  # the two halves of a chain are consecutive: a view
    else:
        xs = np.concatenate([xb[..., :h], xb[..., n_draws - h :]], axis=1)
    out: dict[str, np.ndarray] = {}
    const_seq = _const_seq(xs)

    srt = None
    if want & {"rhat", "bulk"}:
        flat = np.ascontiguousarray(xs.reshape(p, size))
        z, zf, srt = np.empty((p, size)), np.empty((p, size)), np.empty((p, size))
        orders = np.empty((p, size), dtype=np.int64)
        bad = np.empty(p, dtype=np.bool_)
        _sort_rows(flat, srt, orders, bad, sort_counts(size))
        if bad.any():
            orders[bad] = np.argsort(flat[bad], axis=1)
        _rank_block(flat, orders, _score_table(size), z, zf, srt, bad)  # _sort_rows sorted the rows not bad
        z, zf = z.reshape(p, m, h), zf.reshape(p, m, h)
        if "rhat" in want:
            bulk = _rhat(z, const_seq)
            tail = _rhat(zf, _const_seq(zf))
            r = np.fmax(bulk, tail)
            r[np.isnan(bulk) | np.isnan(tail)] = np.nan
            if c < 2:
                r[:] = np.nan
            out["rhat"] = r
        if "bulk" in want:
            out["bulk"] = _ess(z, const_seq)

    if "tail" in want:
        if srt is not None and n_draws % 2 == 0:  # then the split draws are all the draws
            qs = [_quantile_sorted(srt, pr) for pr in (0.05, 0.95)]
        else:
            qs = list(np.quantile(xb.reshape(p, c * n_draws), [0.05, 0.95], axis=1))
        tails = []
        ind = np.empty(xs.shape)
        const_ind = np.empty(xs.shape[:2], dtype=np.bool_)
        xs_c = np.ascontiguousarray(xs)
        for q in qs:
            _indicator(xs_c, np.ascontiguousarray(q, dtype=np.float64), ind, const_ind)  # 1.0 / 0.0
            tails.append(_ess(ind, const_ind))
        out["tail"] = np.fmin(tails[0], tails[1])
        out["tail"][np.isnan(tails[0]) | np.isnan(tails[1])] = np.nan

    if want & {"mean", "mcse"}:
        em = _ess(xs, const_seq)
        finite = np.isfinite(xb).all(axis=(1, 2))
        em[~finite] = np.nan
        if "mean" in want:
            out["mean"] = em
        if "mcse" in want:
            out["mcse"] = xb.reshape(p, c * n_draws).std(axis=1, ddof=1) / np.sqrt(em)

    has_nan = np.isnan(xb).any(axis=(1, 2))
    if has_nan.any():
        for v in out.values():
            v[has_nan] = np.nan
    return out


def _run(x, want: frozenset[str]) -> tuple[dict[str, np.ndarray], tuple[int, ...]]:
    x = np.asarray(x)
    if x.ndim < 2:
        raise ValueError(f"draws must have shape (chains, draws, *rest); got shape {x.shape}")
    if not (np.issubdtype(x.dtype, np.number) or x.dtype == bool) or np.iscomplexobj(x):
        raise ValueError(f"draws must be real numbers; got dtype {x.dtype}")
    c, n = x.shape[:2]
    rest = x.shape[2:]
    x2 = x.reshape(c * n, -1)
    p = x2.shape[1]
    res = {k: np.empty(p) for k in want}
    if x2.dtype != np.float64 or not x2.flags.c_contiguous:
        x2 = np.ascontiguousarray(x2, dtype=np.float64)
    scratch = Scratch(lambda: np.empty((_BLOCK, c * n)))

    def one(j0: int) -> None:
        j1 = min(p, j0 + _BLOCK)
        with scratch.lend() as buf:
            gather(x2, j0, j1, buf)
            xb = buf[: j1 - j0].reshape(j1 - j0, c, n)
            with np.errstate(invalid="ignore", divide="ignore"):  # 0/0 and inf - inf become NaN
                got = _block(xb, want)
        for k, v in got.items():
            res[k][j0:j1] = v

    each_block(one, range(0, p, _BLOCK), threaded=c * n * p >= _THREADED_MIN)
    return res, rest


def _shaped(v: np.ndarray, rest: tuple[int, ...]):
    return float(v[0]) if rest == () else v.reshape(rest)


# --------------------------------------------------------------------------------------------
# public


def split_rhat(x):
    """Rank-normalised split R-hat: max of the bulk and the folded (tail) R-hat, per parameter."""
    res, rest = _run(x, frozenset({"rhat"}))
    return _shaped(res["rhat"], rest)


def bulk_ess(x):
    """Bulk ESS: the ESS of the rank-normalised split chains, per parameter."""
    res, rest = _run(x, frozenset({"bulk"}))
    return _shaped(res["bulk"], rest)


def tail_ess(x):
    """Tail ESS: the smaller ESS of the split indicators I(x <= q05) and I(x <= q95), per parameter."""
    res, rest = _run(x, frozenset({"tail"}))
    return _shaped(res["tail"], rest)


def mean_ess(x):
    """Mean ESS: the ESS of the raw split chains, per parameter."""
    res, rest = _run(x, frozenset({"mean"}))
    return _shaped(res["mean"], rest)


def mean_mc_error(x):
    """Monte Carlo standard error of the mean: sd(x, ddof=1) / sqrt(mean_ess(x)), per parameter."""
    res, rest = _run(x, frozenset({"mcse"}))
    return _shaped(res["mcse"], rest)


def rhat_ess(x):
    """(split_rhat(x), bulk_ess(x), tail_ess(x)), computed together so the ranking is done once."""
    res, rest = _run(x, frozenset({"rhat", "bulk", "tail"}))
    return tuple(_shaped(res[k], rest) for k in ("rhat", "bulk", "tail"))


def check_targets(named: dict[str, np.ndarray], rhat_max: float = 1.01, ess_min: float = 400) -> list[dict]:
    """Entries with split R-hat not below rhat_max, or bulk or tail ESS below ess_min (NaN misses).

    Each array in `named` has shape (chains, draws, *rest); a miss is reported as
    {"name", "index" (a tuple into rest), "rhat", "bulk_ess", "tail_ess"}, in name then C order.
    A NaN diagnostic (one chain, a NaN draw, a constant quantity) counts as a miss: the target
    cannot be shown to be met.
    """
    misses = []
    for name, x in named.items():
        rhat, bulk, tail = (np.atleast_1d(np.asarray(v)) for v in rhat_ess(x))
        bad = ~(rhat < rhat_max) | ~(bulk >= ess_min) | ~(tail >= ess_min)
        misses += miss_records(name, np.shape(x)[2:], bad, rhat, bulk, tail)
    return misses


def miss_records(name: str, rest: tuple[int, ...], bad, rhat, bulk, tail) -> list[dict]:
    """One record per entry of `bad` (shaped `rest`, the quantity's own dimensions) that is True: the entry's
    index into rest and its R-hat, bulk and tail ESS, in C order."""
    out = []
    for flat in np.flatnonzero(np.ravel(bad)):
        out.append(
            {
                "name": name,
                "index": tuple(int(i) for i in np.unravel_index(flat, rest)) if rest else (),
                "rhat": float(np.ravel(rhat)[flat]),
                "bulk_ess": float(np.ravel(bulk)[flat]),
                "tail_ess": float(np.ravel(tail)[flat]),
            }
        )
    return out


def worst(named: dict[str, np.ndarray]) -> dict[str, dict[str, float]]:
    """Per name: {"rhat_max", "bulk_ess_min", "tail_ess_min"} over its entries (NaN if any is NaN)."""
    out = {}
    for name, x in named.items():
        rhat, bulk, tail = (np.asarray(v, dtype=float) for v in rhat_ess(x))
        out[name] = {
            "rhat_max": float(np.max(rhat)) if rhat.size else float("nan"),
            "bulk_ess_min": float(np.min(bulk)) if bulk.size else float("nan"),
            "tail_ess_min": float(np.min(tail)) if tail.size else float("nan"),
        }
    return out
