"""Figures of a fit and of a validation (matplotlib, the ``plot`` extra).

One visual language across figures, readable in grey-scale: the estimate a solid dark line
over a light band (the fill alone, no edge lines); level effects as dark points on short,
wide band bars; the training weight as a grey histogram under each effect, labelled with what
it sums; the reference drawn as a thin solid line with the reference point marked by a
diamond. Relativities use a logarithmic y-axis (a relativity of 0.5 and one of 2 lie equally
far from 1) with plain-number ticks; a numeric input whose data bunch at one end of a long
range (a population density, a sum insured) gets a logarithmic x-axis. Every function returns
a matplotlib Figure; nothing is shown or printed.
"""

from __future__ import annotations

import numpy as np

INK = "#16324f"       # estimates
BAND = "#b8cde0"      # uncertainty bands
ACCENT = "#b5542b"    # observed / actual values
MUTED = "#8c8c8c"     # weight bars and reference lines
GRID = "#e6e6e6"
WEIGHT_BINS = 40      # histogram bins of the training weight under a continuous effect
MAX_LEVELS_DRAWN = 40  # levels drawn per level term (those with the most weight)
MIN_SPAN = 0.1        # an actual/expected axis covers at least 1 ± this

STAT_COLUMNS = {"estimate", "difference", "std_error", "lower", "upper", "relativity",
                "relativity_lower", "relativity_upper", "training_weight", "data_weight"}


def _plt():
    try:
        import matplotlib

        matplotlib.use("Agg", force=False)
        import matplotlib.pyplot as plt
    except ImportError as exc:  # pragma: no cover - depends on the installation
        raise ImportError("plots need matplotlib: pip install 'tallgam[plot]'") from exc
    return plt


def _style(ax) -> None:
    ax.grid(True, color=GRID, linewidth=0.8)
    ax.set_axisbelow(True)
    for side in ("top", "right"):
        ax.spines[side].set_visible(False)


def _plain_ticks(axis, lo: float, hi: float) -> None:
    """Plain-number ticks on a logarithmic axis from ``lo`` to ``hi`` (0.8, 1, 1.25 rather
    than powers of ten): evenly spaced values when the range is narrow, else 1-2-5 steps
    (1-3 or powers of ten over many decades)."""
    from matplotlib.ticker import FixedLocator, FuncFormatter, MaxNLocator, NullLocator

    if hi / lo < 4:
        ticks = MaxNLocator(nbins=6, steps=[1, 2, 2.5, 5, 10]).tick_values(lo, hi)
    else:
        decades = np.log10(hi / lo)
        subs = (1.0, 2.0, 5.0) if decades <= 2.5 else (1.0, 3.0) if decades <= 4 else (1.0,)
        powers = 10.0 ** np.arange(np.floor(np.log10(lo)), np.ceil(np.log10(hi)) + 1)
        ticks = np.array([p * m for p in powers for m in subs])
    ticks = [t for t in ticks if lo <= t <= hi and t > 0]
    axis.set_major_locator(FixedLocator(ticks))
    axis.set_minor_locator(NullLocator())
    axis.set_major_formatter(FuncFormatter(lambda v, _: f"{v:,.6g}"))


def skewed(x: np.ndarray, weight: np.ndarray | None) -> bool:
    """Whether a positive input is better drawn on a logarithmic axis: it spans more than
    two orders of magnitude and half its weight lies in the lowest tenth of its range."""
    x = np.asarray(x, dtype=np.float64)
    if len(x) < 3 or not np.all(np.isfinite(x)) or x.min() <= 0 or x.max() / x.min() < 100:
        return False
    w = np.ones(len(x)) if weight is None else np.asarray(weight, dtype=np.float64)
    order = np.argsort(x)
    cum = np.cumsum(w[order])
    if cum[-1] <= 0:
        return False
    median = x[order][np.searchsorted(cum, 0.5 * cum[-1])]
    return (median - x.min()) / (x.max() - x.min()) < 0.1


def _value_key(table) -> str:
    return [c for c in table.column_names if c not in STAT_COLUMNS][0]


def _relativity_limits(values: np.ndarray, ref: float, log: bool) -> tuple[float, float]:
    """The y-range of an effect chart: the values and the reference, padded; relativities
    span at least 1 ± ``MIN_SPAN``, so a term with next to no effect looks flat."""
    values = np.asarray(values, dtype=np.float64)
    values = values[np.isfinite(values) & ((values > 0) if log else True)]
    lo, hi = (float(values.min()), float(values.max())) if len(values) else (ref, ref)
    if log:
        lo, hi = min(lo, ref - MIN_SPAN), max(hi, ref + MIN_SPAN)
        pad = (np.log(hi) - np.log(lo)) * 0.06 or 0.05
        return float(np.exp(np.log(lo) - pad)), float(np.exp(np.log(hi) + pad))
    lo, hi = min(lo, ref), max(hi, ref)
    pad = (hi - lo) * 0.06 or 0.05
    return lo - pad, hi + pad


def effect_figure(table, title: str, *, log_link: bool, weight_label: str = "training weight",
                  reference=None, histogram=None):
    """A term's relativity (log link) or effect (link scale) with its band, over the
    training weight.

    ``table`` is a relativity table (:mod:`tallgam.outputs.tables`) of a term with one
    input (a per-level curve: one line per level); ``title`` names it for people;
    ``weight_label`` says what ``training_weight`` sums; ``reference`` is the input value
    where the relativity is 1 (marked); ``histogram`` (values, weights), e.g. the training
    profile's, draws the weight panel in more detail than the table's rows. The y-axis
    spans the estimate and its band where the central 99% of the training weight lies;
    what a few extreme policies at the ends do runs off the axis."""
    from tallgam.outputs.tables import central_rows

    plt = _plt()
    key = _value_key(table)
    per = [c for c in table.column_names if c not in STAT_COLUMNS and c != key]
    y, lo, hi = (("relativity", "relativity_lower", "relativity_upper") if log_link
                 else ("difference", "lower", "upper"))
    data = table.to_pydict()
    x_all = np.asarray(data[key])
    numeric = x_all.dtype.kind in "fiu"
    if not numeric:
        return _levels_figure(data, key, title, y, lo, hi, log_link, weight_label)
    weight = (np.asarray(data["training_weight"], dtype=np.float64)
              if "training_weight" in data else None)
    fig, (ax, bar) = plt.subplots(2, 1, figsize=(7.2, 4.8), sharex=True,
                                  gridspec_kw={"height_ratios": [3.2, 1], "hspace": 0.08})
    groups = [(None, np.ones(len(x_all), bool))]
    if per:
        levels = list(dict.fromkeys(data[per[0]]))
        groups = [(lev, np.array([v == lev for v in data[per[0]]])) for lev in levels]
    dashes = ["-", "--", "-.", ":"]
    shown = []
    for i, (name, mask) in enumerate(groups):
        x = x_all[mask]
        est = np.asarray(data[y], dtype=np.float64)[mask]
        lower = np.asarray(data[lo], dtype=np.float64)[mask]
        upper = np.asarray(data[hi], dtype=np.float64)[mask]
        ax.fill_between(x, lower, upper, color=BAND, alpha=0.45 if per else 0.85, linewidth=0)
        ax.plot(x, est, color=INK, linewidth=2.0, linestyle=dashes[i % 4],
                label=str(name) if name is not None else None)
        dense = (central_rows(weight) if weight is not None and not per
                 else np.ones(len(x), bool))
        shown += [est[dense], lower[dense], upper[dense]]
    base = 1.0 if log_link else 0.0
    ax.axhline(base, color=MUTED, linewidth=0.9)
    if reference is not None and np.isfinite(reference):
        ax.plot([reference], [base], marker="D", color=INK, markersize=5, linestyle="none")
    limits = _relativity_limits(np.concatenate(shown), base, log_link)
    if log_link:
        ax.set_yscale("log")
        _plain_ticks(ax.yaxis, *limits)
    ax.set_ylim(*limits)
    ax.set_ylabel("relativity" if log_link else "effect (link scale)")
    ax.set_title(title, loc="left", fontsize=11, color=INK)
    if per:
        ax.legend(title=per[0], frameon=False, fontsize=8, title_fontsize=8)
    _style(ax)
    log_x = skewed(x_all, weight)
    if log_x:
        bar.set_xscale("log")
        _plain_ticks(bar.xaxis, float(x_all.min()), float(x_all.max()))
    if histogram is not None:  # all levels of a per-level curve together
        _weight_histogram(bar, *histogram, log_x)
    elif weight is not None and not per:
        _weight_histogram(bar, x_all, weight, log_x)
    bar.set_ylabel(_wrap(weight_label), fontsize=7.5, labelpad=2)
    _thousands(bar.yaxis)
    bar.set_xlabel(key + (" (logarithmic axis)" if log_x else ""))
    _style(bar)
    fig.subplots_adjust(left=0.14, right=0.97, top=0.92, bottom=0.13)
    return fig


def _thousands(axis) -> None:
    from matplotlib.ticker import FuncFormatter

    axis.set_major_formatter(FuncFormatter(lambda v, _: f"{v:,.6g}"))


def _wrap(text: str, width: int = 18) -> str:
    import textwrap

    return "\n".join(textwrap.wrap(text, width))


def _weight_histogram(ax, x: np.ndarray, weight: np.ndarray, log_x: bool) -> None:
    """The training weight of the table's rows: a bar per value for a few whole-number
    values, else a histogram of ``WEIGHT_BINS`` equal bins on the axis as drawn."""
    whole = np.all(np.mod(x, 1) == 0) and len(x) <= 2 * WEIGHT_BINS
    if whole:
        ax.bar(x, weight, width=0.8, color=MUTED, alpha=0.75, linewidth=0)
        return
    t = np.log(x) if log_x else x
    edges = np.linspace(t.min(), t.max(), WEIGHT_BINS + 1)
    sums, _ = np.histogram(t, bins=edges, weights=weight)
    left, right = (np.exp(edges[:-1]), np.exp(edges[1:])) if log_x else (edges[:-1], edges[1:])
    ax.bar(left, sums, width=right - left, align="edge", color=MUTED, alpha=0.75,
           linewidth=0)


def _levels_figure(data, key, title, y, lo, hi, log_link, weight_label):
    """Level effects: a point per level on a wide band bar, the weight per level under it;
    at most ``MAX_LEVELS_DRAWN`` levels (those with the most weight)."""
    plt = _plt()
    labels = [str(v) for v in data[key]]
    weight = (np.asarray(data["training_weight"], dtype=np.float64)
              if "training_weight" in data else None)
    keep = np.arange(len(labels))
    note = ""
    if len(labels) > MAX_LEVELS_DRAWN:
        order = np.argsort(-(weight if weight is not None else np.zeros(len(labels))),
                           kind="stable")
        keep = np.sort(order[:MAX_LEVELS_DRAWN])
        note = f" ({MAX_LEVELS_DRAWN} of {len(labels)} levels, those with the most weight)"
    est = np.asarray(data[y], dtype=np.float64)[keep]
    lower = np.asarray(data[lo], dtype=np.float64)[keep]
    upper = np.asarray(data[hi], dtype=np.float64)[keep]
    pos = np.arange(len(keep))
    fig, (ax, bar) = plt.subplots(2, 1, figsize=(7.2, 4.8), sharex=True,
                                  gridspec_kw={"height_ratios": [3.2, 1], "hspace": 0.08})
    ax.vlines(pos, lower, upper, color=BAND, linewidth=7 if len(keep) <= 24 else 4)
    ax.plot(pos, est, "o", color=INK, markersize=5)
    base = 1.0 if log_link else 0.0
    ax.axhline(base, color=MUTED, linewidth=0.9)
    limits = _relativity_limits(np.concatenate([lower, upper]), base, log_link)
    if log_link:
        ax.set_yscale("log")
        _plain_ticks(ax.yaxis, *limits)
    ax.set_ylim(*limits)
    ax.set_ylabel("relativity" if log_link else "effect (link scale)")
    ax.set_title(title + note, loc="left", fontsize=11, color=INK)
    _style(ax)
    if weight is not None:
        bar.bar(pos, weight[keep], width=0.7, color=MUTED, alpha=0.75, linewidth=0)
    bar.set_ylabel(_wrap(weight_label), fontsize=7.5, labelpad=2)
    _thousands(bar.yaxis)
    bar.set_xlabel(key)
    bar.set_xticks(pos)
    many = len(keep) > 8
    bar.set_xticklabels([labels[i] for i in keep], rotation=45 if many else 0,
                        ha="right" if many else "center", fontsize=8)
    _style(bar)
    fig.subplots_adjust(left=0.14, right=0.97, top=0.92, bottom=0.2 if many else 0.13)
    return fig


def surface_figure(table, title: str, *, log_link: bool):
    """A two-column term as a filled map of its relativity (or effect), with contours."""
    plt = _plt()
    data = table.to_pydict()
    xk, zk = [c for c in table.column_names if c not in STAT_COLUMNS][:2]
    x, z = np.asarray(data[xk]), np.asarray(data[zk])
    v = np.asarray(data["relativity" if log_link else "difference"])
    nx, nz = len(np.unique(x)), len(np.unique(z))
    X, Z, V = (a.reshape(nx, nz) for a in (x, z, v))
    fig, ax = plt.subplots(figsize=(6.4, 5.0))
    filled = ax.contourf(X, Z, V, levels=14, cmap="cividis")
    lines = ax.contour(X, Z, V, levels=7, colors="white", linewidths=0.6)
    ax.clabel(lines, fontsize=7, fmt="%.3g")
    fig.colorbar(filled, ax=ax, label="relativity" if log_link else "effect (link scale)")
    ax.set_xlabel(xk)
    ax.set_ylabel(zk)
    ax.set_title(title, loc="left", fontsize=11, color=INK)
    return fig


def _ratio_limits(values) -> tuple[float, float]:
    """An actual/expected axis around 1, at least 1 ± ``MIN_SPAN`` so that small
    differences look small."""
    v = np.asarray([x for x in values if x is not None and np.isfinite(x)], dtype=np.float64)
    lo = min(1 - MIN_SPAN, float(v.min()) if len(v) else 1.0)
    hi = max(1 + MIN_SPAN, float(v.max()) if len(v) else 1.0)
    pad = 0.05 * (hi - lo)
    return lo - pad, hi + pad


def lift_figure(lift, rate_name: str = "rate per unit of exposure"):
    """Actual rate (bars) and predicted rate (points joined: the bands are ordered) per
    band of equal exposure, lowest predicted rate first."""
    plt = _plt()
    d = lift.to_pydict()
    band = np.asarray(d["band"])
    fig, ax = plt.subplots(figsize=(7.0, 4.0))
    ax.bar(band, d["actual_rate"], color=BAND, width=0.7, label="actual")
    ax.plot(band, d["expected_rate"], color=INK, marker="o", markerfacecolor="white",
            linewidth=2.0, label="predicted")
    ax.set_ylim(bottom=0)
    ax.set_xticks(band)
    ax.set_xlabel("band of equal exposure, lowest predicted rate first")
    ax.set_ylabel(rate_name)
    ax.set_title("Lift: actual and predicted rate by band", loc="left", fontsize=11, color=INK)
    ax.legend(frameon=False)
    _style(ax)
    return fig


def double_lift_figure(double):
    """Actual over expected of this model and the challenger by band of their ratio."""
    plt = _plt()
    d = double.to_pydict()
    band = np.asarray(d["band"])
    fig, ax = plt.subplots(figsize=(7.0, 4.0))
    ax.plot(band, d["actual_over_expected"], color=INK, marker="o", linewidth=2.0,
            label="this model")
    ax.plot(band, d["actual_over_expected_b"], color=ACCENT, marker="s", linestyle="--",
            linewidth=2.0, markerfacecolor="white", label="challenger")
    ax.axhline(1.0, color=MUTED, linewidth=0.9)
    ax.set_ylim(*_ratio_limits(list(d["actual_over_expected"])
                               + list(d["actual_over_expected_b"])))
    ax.set_xticks(band)
    ax.set_xlabel("band of the prediction ratio (this model / challenger), equal exposure")
    ax.set_ylabel("actual / expected")
    ax.set_title("Double lift", loc="left", fontsize=11, color=INK)
    ax.legend(frameon=False)
    _style(ax)
    return fig


def lorenz_figure(lorenz, gini: float):
    """The ordered Lorenz curve with the line of equality; ``gini`` is the normalised
    Gini, written in the corner."""
    plt = _plt()
    d = lorenz.to_pydict()
    fig, ax = plt.subplots(figsize=(4.8, 4.6))
    ax.plot([0, 1], [0, 1], color=MUTED, linewidth=0.9)
    ax.plot(d["exposure_share"], d["actual_share"], color=INK, linewidth=2.0)
    ax.fill_between(d["exposure_share"], d["actual_share"], d["exposure_share"], color=BAND,
                    alpha=0.6)
    ax.text(0.04, 0.93, f"Gini, normalised: {gini:.3f}", transform=ax.transAxes, fontsize=9,
            color=INK)
    ax.set_xlabel("share of exposure, lowest predicted rate first")
    ax.set_ylabel("share of actual")
    ax.set_title("Ordered Lorenz curve", loc="left", fontsize=11, color=INK)
    ax.set_aspect("equal")
    _style(ax)
    return fig


def actual_vs_expected_figure(table, column: str, *, ordered: bool = True,
                              exposure_name: str = "exposure"):
    """Actual over expected per band of a rating factor, with the exposure (or weight, or
    rows: ``exposure_name``) per band. ``ordered``: numeric bands, joined by a line; levels
    (unordered) are points only."""
    plt = _plt()
    d = table.to_pydict()
    if "band" in d:
        labels = [str(v) for v in d["band"]]
    else:
        from tallgam.outputs.formatting import number

        labels = [f"{number(a)} to {number(b)}" if a is not None else "(missing)"
                  for a, b in zip(d["band_from"], d["band_to"])]
    pos = np.arange(len(labels))
    fig, (ax, bar) = plt.subplots(2, 1, figsize=(7.0, 4.4), sharex=True,
                                  gridspec_kw={"height_ratios": [2.6, 1], "hspace": 0.08})
    ratio = np.array([np.nan if v is None else v for v in d["actual_over_expected"]], float)
    joined = {"linewidth": 1.5 if ordered else 0, "linestyle": "-" if ordered else "none"}
    ax.plot(pos, ratio, color=ACCENT, marker="o", markerfacecolor="white", label="smooth model",
            **joined)
    shown = list(ratio)
    if "actual_over_tariff" in d:  # a tariff's bands: its premium beside the model's
        banded = np.array([np.nan if v is None else v for v in d["actual_over_tariff"]], float)
        ax.plot(pos, banded, color=INK, marker="s", markerfacecolor="white",
                label="banded tariff", **{**joined, "linestyle": "--" if ordered else "none"})
        ax.legend(frameon=False, fontsize=8)
        shown += list(banded)
    ax.axhline(1.0, color=MUTED, linewidth=0.9)
    ax.set_ylim(*_ratio_limits(shown))
    ax.set_ylabel("actual / expected")
    ax.set_title(f"Actual over expected by {column}", loc="left", fontsize=11, color=INK)
    _style(ax)
    bar.bar(pos, d["exposure"], color=MUTED, alpha=0.75, linewidth=0)
    bar.set_ylabel(exposure_name, fontsize=8)
    _thousands(bar.yaxis)
    bar.set_xticks(pos)
    bar.set_xticklabels(labels, rotation=45 if len(labels) > 6 else 0,
                        ha="right" if len(labels) > 6 else "center", fontsize=8)
    _style(bar)
    fig.subplots_adjust(left=0.12, right=0.97, top=0.92, bottom=0.24)
    return fig


def banded_curve_figure(table, name: str):
    """A factor's fitted relativity (line) and its tariff bands (steps), with the training
    exposure; ``table`` has ``value``, ``fitted``, ``tariff`` and ``training_exposure``."""
    plt = _plt()
    d = table.to_pydict()
    x = np.asarray(d["value"], dtype=float)
    fig, (ax, bar) = plt.subplots(2, 1, figsize=(7.0, 4.4), sharex=True,
                                  gridspec_kw={"height_ratios": [3.0, 1], "hspace": 0.08})
    ax.plot(x, d["fitted"], color=MUTED, linewidth=1.6, label="fitted (smooth)")
    ax.step(x, d["tariff"], where="post", color=INK, linewidth=2.0, label="tariff band")
    ax.axhline(1.0, color=MUTED, linewidth=0.9)
    ax.set_ylabel("relativity")
    ax.set_title(f"{name}: fitted relativity and tariff bands", loc="left", fontsize=11,
                 color=INK)
    ax.legend(frameon=False, fontsize=8)
    _style(ax)
    width = np.min(np.diff(x)) * 0.8 if len(x) > 1 else 0.8
    bar.bar(x, d["training_exposure"], width=width, color=MUTED, alpha=0.75, linewidth=0)
    bar.set_ylabel("training\nexposure", fontsize=8, labelpad=2)
    _thousands(bar.yaxis)
    bar.set_xlabel(name)
    _style(bar)
    fig.subplots_adjust(left=0.12, right=0.97, top=0.92, bottom=0.14)
    return fig


def premium_ratio_figure(ratio_bands, threshold: float = 0.05):
    """Share of policies by range of the ratio tariff premium / model premium, the ranges
    within ± ``threshold`` drawn light."""
    plt = _plt()
    d = ratio_bands.to_pydict()
    labels = []
    for lo, hi in zip(d["ratio_from"], d["ratio_to"]):
        labels.append(f"< {hi:g}" if not np.isfinite(lo) else
                      f"≥ {lo:g}" if not np.isfinite(hi) else f"{lo:g}–{hi:g}")
    inside = [np.isfinite(lo) and np.isfinite(hi) and lo >= 1 - threshold - 1e-12
              and hi <= 1 + threshold + 1e-12 for lo, hi in zip(d["ratio_from"], d["ratio_to"])]
    pos = np.arange(len(labels))
    share = 100 * np.asarray(d["share_of_policies"], dtype=float)
    fig, ax = plt.subplots(figsize=(7.0, 3.8))
    ax.bar(pos, share, color=[BAND if i else ACCENT for i in inside], edgecolor=INK)
    ax.set_xticks(pos)
    ax.set_xticklabels(labels, fontsize=8)
    ax.set_xlabel("tariff premium / model premium")
    ax.set_ylabel("% of policies")
    ax.set_title(f"How far the tariff moves each premium (dark: beyond ±{100 * threshold:g}%)",
                 loc="left", fontsize=11, color=INK)
    _style(ax)
    fig.subplots_adjust(bottom=0.16)
    return fig


def to_png(fig, dpi: int = 110) -> bytes:
    """The figure as PNG bytes (and closed, to free its memory)."""
    import io

    plt = _plt()
    buf = io.BytesIO()
    fig.savefig(buf, format="png", dpi=dpi)
    plt.close(fig)
    return buf.getvalue()
