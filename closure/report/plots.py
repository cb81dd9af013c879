"""Report figures as pure functions of arrays: each returns a matplotlib Figure.

Figures are sized in inches and saved at :data:`DPI` by :func:`save_png`, so a figure of
``FIGSIZE`` (8 x 6 in) becomes an 800 x 600 pixel PNG. The Agg backend is selected here,
before anything else of matplotlib is loaded here, so nothing ever opens a window; figures
are built as ``Figure`` objects, outside pyplot's global state.
"""

from __future__ import annotations

import os
from collections.abc import Mapping, Sequence
from pathlib import Path

import matplotlib

matplotlib.use("Agg")
import matplotlib.ticker  # noqa: E402
import numpy as np  # noqa: E402
from matplotlib.figure import Figure  # noqa: E402

from closure.units import label as _label  # noqa: E402

#: Size of every report figure, inches (width, height), and the resolution it is saved at.
FIGSIZE = (8.0, 6.0)
DPI = 100
#: spectral values below this fraction of the largest are drawn as absent (round-off)
SPECTRUM_FLOOR = 1e-12


def agreement(exact: np.ndarray, modelled: np.ndarray) -> dict[str, float]:
    """R^2 (coefficient of determination of ``modelled`` as a prediction of ``exact``) and
    the Pearson correlation, over all points."""
    y = np.asarray(exact, dtype=float).ravel()
    p = np.asarray(modelled, dtype=float).ravel()
    if y.shape != p.shape:
        raise ValueError(f"exact has {y.size} points, modelled {p.size}")
    ss_res = float(np.sum((y - p) ** 2))
    ss_tot = float(np.sum((y - y.mean()) ** 2))
    r2 = 1.0 - ss_res / ss_tot if ss_tot > 0 else float("nan")
    sy, sp = y.std(), p.std()
    corr = float(np.mean((y - y.mean()) * (p - p.mean())) / (sy * sp)) if sy > 0 and sp > 0 \
        else float("nan")
    return {"r2": r2, "correlation": corr}


def agreement_title(name: str, stats: Mapping[str, float]) -> str:
    """The panel title of an a priori scatter: ``"tau_xy: R^2 = 0.812, corr = 0.905"``."""
    return f"{name}: R^2 = {stats['r2']:.3f}, corr = {stats['correlation']:.3f}"


def _grid_of_panels(n: int) -> tuple[int, int]:
    cols = 1 if n == 1 else 2 if n <= 4 else 3
    return -(-n // cols), cols


#: (line style, marker) of the non-reference curves, in order: lines that coincide stay
#: distinguishable (a dashed line over a solid one, markers at interleaved points).
LINE_STYLES = [("-", "o"), ("--", "s"), (":", "^"), ("-.", "D"), ((0, (5, 1, 1, 1)), "v"),
               ((0, (1, 1)), "P"), ((0, (8, 2)), "X"), ((0, (3, 1, 1, 1, 1, 1)), "*")]


def line_style(i: int, n_points: int, n_lines: int) -> dict:
    """Matplotlib keywords of the i-th curve: its line style and a hollow marker of its own
    shape and size every few points (offset per curve when there are many points), so
    coinciding curves show both markers."""
    ls, marker = LINE_STYLES[i % len(LINE_STYLES)]
    step = max(1, n_points // 8)
    offset = min(i * max(1, step // max(n_lines, 1)), max(n_points - 1, 0)) if step > 1 else 0
    # earlier curves get larger markers: a later marker at the same point sits inside
    return dict(ls=ls, marker=marker, ms=max(4.5, 10.0 - 1.1 * i), mfc="none", mew=1.3,
                markevery=(offset, step))


def coinciding(curves: Mapping[str, tuple[np.ndarray, np.ndarray]],
               rtol: float = 1e-3) -> list[tuple[list[str], float]]:
    """Groups of curves (``curves[label] = (x, y)``) that would hide one another: same x and
    y within ``rtol`` of the largest |y| of the pair at every point (NaN where the other is
    NaN). Returns ``[(labels, largest relative difference), ...]``."""
    labels = list(curves)
    groups: list[tuple[list[str], float]] = []
    seen: set[str] = set()
    for i, a in enumerate(labels):
        if a in seen:
            continue
        xa, ya = (np.asarray(v, dtype=float) for v in curves[a])
        group, worst = [a], 0.0
        for b in labels[i + 1:]:
            if b in seen:
                continue
            xb, yb = (np.asarray(v, dtype=float) for v in curves[b])
            if xa.shape != xb.shape or ya.shape != yb.shape or not np.array_equal(
                    np.isfinite(ya), np.isfinite(yb)) or not np.allclose(xa, xb, equal_nan=True):
                continue
            ok = np.isfinite(ya)
            scale = max(float(np.abs(ya[ok]).max(initial=0.0)),
                        float(np.abs(yb[ok]).max(initial=0.0)))
            diff = float(np.abs(ya[ok] - yb[ok]).max(initial=0.0))
            if diff <= rtol * scale or diff == 0.0:
                group.append(b)
                worst = max(worst, diff / scale if scale > 0 else 0.0)
        if len(group) > 1:
            seen.update(group)
            groups.append((group, worst))
    return groups


def spread(values: Sequence[float]) -> float:
    """(max - min) / |mean| of the finite values: how far a coefficient moves across filter
    widths, as a fraction of its size (NaN with fewer than two values or a zero mean)."""
    v = np.asarray(values, dtype=float)
    v = v[np.isfinite(v)]
    if v.size < 2 or v.mean() == 0:
        return float("nan")
    return float((v.max() - v.min()) / abs(v.mean()))


def apriori_hexbin(exact: Mapping[str, np.ndarray], modelled: Mapping[str, np.ndarray],
                   gridsize: int = 50, figsize=FIGSIZE,
                   stats: Mapping[str, Mapping[str, float]] | None = None,
                   units: Mapping[str, str | None] | None = None) -> Figure:
    """Exact vs modelled subgrid term, one hexbin panel per component (log counts).

    ``exact`` and ``modelled`` map component names (e.g. ``tau_xx``) to arrays of equal shape
    (any: pooled over points and snapshots). Each panel has the 1:1 line and the title
    :func:`agreement_title` of these arrays, or of ``stats[name]`` when given (scores over
    more points than are drawn). ``units[name]`` labels both axes (None: not recorded).
    """
    names = [n for n in exact if n in modelled]
    if not names:
        raise ValueError("no component is in both exact and modelled")
    rows, cols = _grid_of_panels(len(names))
    fig = Figure(figsize=figsize, layout="constrained")
    axes = fig.subplots(rows, cols, squeeze=False)
    for ax in axes.ravel()[len(names):]:
        ax.set_visible(False)
    for ax, name in zip(axes.ravel(), names, strict=False):
        y = np.asarray(exact[name], dtype=float).ravel()
        p = np.asarray(modelled[name], dtype=float).ravel()
        lo = float(min(y.min(), p.min()))
        hi = float(max(y.max(), p.max()))
        if hi <= lo:
            hi = lo + 1.0
        ax.hexbin(y, p, gridsize=gridsize, bins="log", mincnt=1, cmap="viridis",
                  extent=(lo, hi, lo, hi))
        ax.plot([lo, hi], [lo, hi], color="crimson", lw=1.0, label="1:1")
        ax.set_xlim(lo, hi)
        ax.set_ylim(lo, hi)
        un = (units or {}).get(name)
        ax.set_xlabel(_label("exact", un))
        ax.set_ylabel(_label("model", un))
        title_stats = stats[name] if stats and name in stats else agreement(y, p)
        ax.set_title(agreement_title(name, title_stats), fontsize=9)
    fig.suptitle("A priori: exact vs modelled subgrid term (held-out snapshots)")
    return fig


def transfer_spectra(k: np.ndarray, curves: Mapping[str, np.ndarray], title: str,
                     ylabel: str, figsize=FIGSIZE, *, k_units: str | None = None,
                     units: str | None = None) -> Figure:
    """Transfer spectra T(k) of several sources (e.g. exact, model) against k.

    ``k`` are shell wavenumbers (the k = 0 shell is dropped: it carries no transfer on a
    periodic domain); log-scaled k, linear T (it changes sign under backscatter). ``k_units``
    and ``units`` (of T) label the axes; None: not recorded.
    """
    k = np.asarray(k, dtype=float)
    keep = k > 0
    fig = Figure(figsize=figsize, layout="constrained")
    ax = fig.subplots()
    n = int(keep.sum())
    for i, (label, t) in enumerate(curves.items()):
        ax.plot(k[keep], np.asarray(t, dtype=float)[keep], label=label,
                **line_style(i, n, len(curves)))
    ax.axhline(0.0, color="grey", lw=0.6)
    ax.set_xscale("log")
    ax.set_xlabel(_label("wavenumber k", k_units))
    ax.set_ylabel(_label(ylabel, units))
    ax.set_title(title)
    ax.legend()
    return fig


def coefficients(names: Sequence[str], scaled: Sequence[float], std_error: Sequence[float],
                 selection_frequency: Sequence[float] | None = None,
                 figsize=FIGSIZE, *, units: Sequence[str | None] | None = None) -> Figure:
    """D-scaled coefficients with +/- one standard error, and (second panel) how often each
    term was selected across resamples (0..1). ``units[i]``: the units of the i-th scaled
    coefficient (None: not recorded); shown on the axis when all agree, else per term."""
    n = len(names)
    y = np.arange(n)
    freq = selection_frequency is not None and any(f is not None for f in selection_frequency)
    fig = Figure(figsize=figsize, layout="constrained")
    if freq:
        ax, ax2 = fig.subplots(1, 2, sharey=True, width_ratios=[3, 1])
    else:
        ax, ax2 = fig.subplots(), None
    err = np.array([np.nan if e is None else e for e in std_error], dtype=float)
    ax.errorbar(np.asarray(scaled, dtype=float), y, xerr=np.where(np.isfinite(err), err, 0.0),
                fmt="o", capsize=4, color="tab:blue")
    ax.axvline(0.0, color="grey", lw=0.6)
    units = list(units) if units is not None else [None] * n
    same = len(set(units)) == 1
    ax.set_yticks(y, list(names) if same else [
        n if u is None else _label(n, u) for n, u in zip(names, units, strict=True)])
    ax.invert_yaxis()
    ax.set_xlabel(_label("scaled coefficient c / D^p, +/- 1 std error",
                         units[0] if same and units else None))
    ax.set_title("Coefficients")
    if ax2 is not None:
        f = np.array([0.0 if v is None else v for v in selection_frequency], dtype=float)
        ax2.barh(y, f, height=0.6, color="tab:orange")
        ax2.set_xlim(0, 1)
        ax2.set_xlabel(_label("selection frequency", "1").replace(" (", "\n("))
        ax2.set_title("Selection")
    return fig


def _width_axis(ax, d: np.ndarray, units: str | None = None) -> None:
    """Log x axis with ticks at the filter widths themselves (few, often within a decade)."""
    ax.set_xscale("log")
    ax.xaxis.set_minor_locator(matplotlib.ticker.NullLocator())
    ticks = np.unique(d[np.isfinite(d) & (d > 0)])
    ax.set_xticks(ticks, [f"{v:.3g}" for v in ticks])
    ax.set_xlabel(_label("filter width D", units))


def sweep_coefficients(delta: Sequence[float], scaled: Mapping[str, Sequence[float]],
                       std_error: Mapping[str, Sequence[float]] | None = None,
                       figsize=FIGSIZE, *, units: Mapping[str, str | None] | None = None,
                       length_units: str | None = None) -> Figure:
    """D-scaled coefficient of each term against the filter width D (log axis), one small
    panel per term with its own y axis, which always includes 0, so a drift shows in
    proportion to the coefficient's size; each panel's title gives the term's
    :func:`spread` across the widths.

    A closure whose D-scaling is right gives flat lines. ``scaled[name][i]`` is the
    coefficient at ``delta[i]``; NaN where the term was not selected. ``units[name]``: the
    coefficient's units; ``length_units``: D's (None: not recorded).
    """
    d = np.asarray(delta, dtype=float)
    fig = Figure(figsize=figsize, layout="constrained")
    names = list(scaled)
    rows, cols = _grid_of_panels(max(len(names), 1))
    axes = fig.subplots(rows, cols, squeeze=False, sharex=True)
    for ax in axes.ravel()[len(names):]:
        ax.set_visible(False)
    for i, (ax, name) in enumerate(zip(axes.ravel(), names, strict=False)):
        c = np.asarray(scaled[name], dtype=float)
        e = None
        if std_error is not None and name in std_error:
            e = np.asarray(std_error[name], dtype=float)
            e = np.where(np.isfinite(e), e, 0.0)
        ax.errorbar(d, c, yerr=e, marker="o", capsize=3, color=f"C{i % 10}")
        ax.axhline(0.0, color="grey", lw=0.6)
        ok = np.isfinite(c)
        if ok.any():
            lo = c[ok] - (e[ok] if e is not None else 0.0)
            hi = c[ok] + (e[ok] if e is not None else 0.0)
            lo, hi = min(0.0, float(lo.min())), max(0.0, float(hi.max()))
            pad = 0.08 * (hi - lo) if hi > lo else 1.0
            ax.set_ylim(lo - pad, hi + pad)
        _width_axis(ax, d, length_units)
        ax.set_ylabel(_label("c / D^p", (units or {}).get(name)), fontsize=8)
        sp = spread(c)
        selected = int(ok.sum())
        note = (f"spread {sp:.1%} of mean" if np.isfinite(sp) else
                f"selected at {selected} width{'s' if selected != 1 else ''}")
        ax.set_title(f"{name}:\n{note}", fontsize=8)
    fig.suptitle("Scaled coefficients vs filter width, +/- 1 std error (flat: the D-scaling "
                 "holds)", fontsize=11)
    return fig


def sweep_scores(delta: Sequence[float], scores: Mapping[str, Sequence[float]],
                 figsize=FIGSIZE, *, length_units: str | None = None) -> Figure:
    """Held-out scores (e.g. R^2, correlation; dimensionless) against the filter width D
    (``length_units``: D's units, None: not recorded)."""
    d = np.asarray(delta, dtype=float)
    fig = Figure(figsize=figsize, layout="constrained")
    ax = fig.subplots()
    for i, (name, s) in enumerate(scores.items()):
        ax.plot(d, np.asarray(s, dtype=float), label=name, **line_style(i, d.size, len(scores)))
    _width_axis(ax, d, length_units)
    ax.set_ylabel(_label("held-out score", "1"))
    ax.set_title("A priori scores on held-out snapshots vs filter width")
    ax.legend(fontsize=8)
    return fig


def aposteriori_spectra(curves: Mapping[str, tuple[np.ndarray, np.ndarray]],
                        reference: str | None = None, figsize=FIGSIZE, *,
                        k_units: str | None = None, units: str | None = None) -> Figure:
    """Energy spectra E(k) of coarse runs (model, baselines) and of the filtered reference,
    log-log; ``curves[label] = (k, E)``; the reference is drawn black and thick, the others
    each in its own line style and marker (:func:`line_style`), so coinciding runs stay
    visible. Values below :data:`SPECTRUM_FLOOR` times the largest are left out (round-off
    beyond a dealiasing cutoff would otherwise set the axis). ``k_units``, ``units``: of k
    and E (None: not recorded)."""
    fig = Figure(figsize=figsize, layout="constrained")
    ax = fig.subplots()
    peak = max((float(np.nanmax(np.asarray(e, dtype=float), initial=0.0))
                for _, e in curves.values()), default=0.0)
    floor = SPECTRUM_FLOOR * peak  # below: round-off in modes the solver removes (dealiasing)
    others = [lab for lab in curves if lab != reference]
    for label, (k, e) in curves.items():
        k = np.asarray(k, dtype=float)
        e = np.asarray(e, dtype=float)
        keep = (k > 0) & (e > floor) & np.isfinite(e)
        if label == reference:
            ax.loglog(k[keep], e[keep], color="black", lw=2.5, label=label, zorder=3)
        else:
            ax.loglog(k[keep], e[keep], lw=1.2, label=label,
                      **line_style(others.index(label), int(keep.sum()), len(others)))
    ax.set_xlabel(_label("wavenumber k", k_units))
    ax.set_ylabel(_label("E(k)", units))
    ax.set_title("A posteriori energy spectra")
    ax.legend(fontsize=8)
    return fig


def time_series(series: Mapping[str, tuple[np.ndarray, np.ndarray]], ylabel: str,
                blowup: Mapping[str, float | None] | None = None,
                reference: str | None = None, log: bool = False,
                figsize=FIGSIZE, *, time_units: str | None = None,
                units: str | None = None) -> Figure:
    """Time series (``series[label] = (t, y)``) with each run's blow-up time marked by a
    dashed vertical line of the run's colour and an x at the last finite value. The
    reference is black and thick, the others each in its own line style and marker.
    ``time_units``, ``units``: of t and y (None: not recorded)."""
    fig = Figure(figsize=figsize, layout="constrained")
    ax = fig.subplots()
    blowup = blowup or {}
    others = [lab for lab in series if lab != reference]
    for label, (t, y) in series.items():
        t = np.asarray(t, dtype=float)
        y = np.asarray(y, dtype=float)
        ok = np.isfinite(y)
        kw = dict(color="black", lw=2.5, zorder=3) if label == reference else dict(
            lw=1.2, **line_style(others.index(label), int(ok.sum()), len(others)))
        (line,) = ax.plot(t[ok], y[ok], label=label, **kw)
        tb = blowup.get(label)
        if tb is not None and np.isfinite(tb):
            ax.axvline(tb, color=line.get_color(), ls="--", lw=1.0)
            if ok.any():
                ax.plot(t[ok][-1], y[ok][-1], "x", color=line.get_color(), ms=10, mew=2)
            line.set_label(f"{label} (blow-up t = {tb:.3g})")
    if log:
        ax.set_yscale("log")
    ax.set_xlabel(_label("time", time_units))
    ax.set_ylabel(_label(ylabel, units))
    ax.set_title(f"A posteriori {ylabel}")
    ax.legend(fontsize=8)
    return fig


def save_png(fig: Figure, path: str | os.PathLike, dpi: int = DPI) -> Path:
    """Write ``fig`` as a PNG of exactly figsize * dpi pixels and release it."""
    path = Path(path)
    fig.savefig(path, dpi=dpi, format="png")
    return path


def pdfs(curves: Mapping[str, tuple[np.ndarray, np.ndarray]], variable: str,
         reference: str | None = None, figsize=FIGSIZE, *, units: str | None = None,
         density_units: str | None = None) -> Figure:
    """Probability densities ``curves[label] = (values, density)`` on a log density axis;
    ``units``, ``density_units``: of the variable and of its density (None: not recorded)."""
    fig = Figure(figsize=figsize, layout="constrained")
    ax = fig.subplots()
    others = [lab for lab in curves if lab != reference]
    for label, (x, p) in curves.items():
        x = np.asarray(x, dtype=float)
        p = np.asarray(p, dtype=float)
        keep = p > 0
        kw = dict(color="black", lw=2.5, zorder=3) if label == reference else dict(
            lw=1.2, **line_style(others.index(label), int(keep.sum()), len(others)))
        ax.semilogy(x[keep], p[keep], label=label, **kw)
    ax.set_xlabel(_label(variable, units))
    ax.set_ylabel(_label("probability density", density_units))
    ax.set_title(f"A posteriori PDF of the {variable}")
    ax.legend(fontsize=8)
    return fig


def long_run_spectra(curves: Mapping[str, tuple[np.ndarray, np.ndarray]],
                     reference: str | None = None,
                     band: tuple[np.ndarray, np.ndarray, np.ndarray] | None = None,
                     figsize=FIGSIZE, *, k_units: str | None = None,
                     units: str | None = None) -> Figure:
    """Time-mean energy spectra of long runs (``curves[label] = (k, E)``, log-log) with the
    reference drawn black and, when given, ``band = (k, E_min, E_max)``: the range the
    reference snapshots span, shaded grey. Values below :data:`SPECTRUM_FLOOR` times the
    largest are left out, as in :func:`aposteriori_spectra`."""
    fig = aposteriori_spectra(curves, reference, figsize, k_units=k_units, units=units)
    ax = fig.axes[0]
    if band is not None:
        k, lo, hi = (np.asarray(a, dtype=float) for a in band)
        peak = float(np.nanmax(hi, initial=0.0))
        keep = (k > 0) & (lo > SPECTRUM_FLOOR * peak) & np.isfinite(lo) & np.isfinite(hi)
        ax.fill_between(k[keep], lo[keep], hi[keep], color="0.8", zorder=1,
                        label=f"{reference or 'reference'}: range of the snapshots")
        ax.legend(fontsize=8)
    ax.set_title("Long runs: time-mean energy spectra after the spin-up")
    return fig


def stability_lines(runs: Mapping[str, Mapping], figsize=FIGSIZE, *,
                    time_units: str | None = None) -> Figure:
    """One horizontal line per run (``runs[label] = {"duration", "stable", "blowup_time"}``,
    times from the run's start): solid to the end when it was stable ("stable for T"), else
    to its blow-up time, ending in an x ("blew up at t")."""
    labels = list(runs)
    fig = Figure(figsize=figsize, layout="constrained")
    ax = fig.subplots()
    top = 0.0
    for i, label in enumerate(labels):
        r = runs[label]
        duration = float(r.get("duration") or 0.0)
        top = max(top, duration)
        y = len(labels) - 1 - i
        if r.get("stable"):
            ax.plot([0, duration], [y, y], color="tab:green", lw=4, solid_capstyle="butt")
            text = f"stable for {duration:.4g}"
        else:
            tb = r.get("blowup_time")
            end = float(tb) if tb is not None else 0.0
            ax.plot([0, end], [y, y], color="tab:red", lw=4, solid_capstyle="butt")
            ax.plot([end], [y], "x", color="tab:red", ms=12, mew=3)
            text = f"blew up at {end:.4g}" if tb is not None else "blew up"
        ax.annotate(text, (0, y), xytext=(4, 7), textcoords="offset points", fontsize=8)
    ax.set_yticks(range(len(labels)), labels[::-1])
    ax.set_ylim(-0.7, len(labels) - 0.3)
    ax.set_xlim(0, top * 1.02 if top > 0 else 1.0)
    ax.set_xlabel(_label("time since the start of the run", time_units))
    ax.set_title("Stability of the long runs")
    return fig


def selection_front(candidates: Sequence[Mapping], chosen: str | None = None,
                    figsize=FIGSIZE) -> Figure:
    """The front of a selection by coarse runs: number of terms against the a priori
    (held-out relative) error and against the long-run score (spectrum error + vorticity
    PDF distance), one point per candidate; candidates that blew up are drawn as x at the top
    of the long-run panel, the chosen one circled. Every quantity is dimensionless."""
    fig = Figure(figsize=figsize, layout="constrained")
    left, right = fig.subplots(1, 2, sharex=True)
    n = [int(c["n_terms"]) for c in candidates]
    apriori = [_num(((c.get("apriori") or {}).get("test") or {}).get("relative_error"))
               for c in candidates]
    score = [_num(c.get("score")) for c in candidates]
    stable = [bool((c.get("long_run") or {}).get("stable")) for c in candidates]
    finite = [s for s, ok in zip(score, stable, strict=True) if ok and np.isfinite(s)]
    ceiling = 1.2 * max(finite) if finite else 1.0
    for i, c in enumerate(candidates):
        mark = "o" if stable[i] else "x"
        colour = "tab:blue" if stable[i] else "tab:red"
        if np.isfinite(apriori[i]):
            left.plot(n[i], apriori[i], mark, color=colour, ms=8, mew=2)
        y = score[i] if stable[i] and np.isfinite(score[i]) else ceiling
        right.plot(n[i], y, mark, color=colour, ms=8, mew=2)
        if c.get("label") == chosen:
            for ax, v in ((left, apriori[i]), (right, y)):
                if np.isfinite(v):
                    ax.plot(n[i], v, "o", ms=16, mfc="none", mec="black", mew=1.5)
        right.annotate(str(c.get("label", "")), (n[i], y), xytext=(4, 4),
                       textcoords="offset points", fontsize=7)
    left.set_xlabel("number of terms")
    right.set_xlabel("number of terms")
    left.set_ylabel("a priori held-out relative error (1)")
    right.set_ylabel("long-run score: spectrum error + PDF distance (1)")
    left.set_title("A priori")
    right.set_title("Long coarse runs (x: blew up)")
    left.xaxis.set_major_locator(matplotlib.ticker.MaxNLocator(integer=True))
    return fig


def _num(v) -> float:
    try:
        return float(v)
    except (TypeError, ValueError):
        return float("nan")
