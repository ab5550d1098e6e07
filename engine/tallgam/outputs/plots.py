"""Figures of a fit and of a validation (matplotlib, the ``plot`` extra).

One visual language across figures, readable in grey-scale: the estimate is a solid dark
line, its band a light fill edged by dashed lines, the training exposure a grey bar panel
under the effect, observed values hollow markers. Every function returns a matplotlib
Figure; nothing is shown or printed.
"""

from __future__ import annotations

import numpy as np

INK = "#16324f"       # estimates
BAND = "#b8cde0"      # uncertainty bands
ACCENT = "#b5542b"    # observed / actual values
MUTED = "#8c8c8c"     # exposure and reference lines
GRID = "#e6e6e6"


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


def _value_key(table) -> str:
    return [c for c in table.column_names if c not in STAT_COLUMNS][0]


STAT_COLUMNS = {"estimate", "difference", "std_error", "lower", "upper", "relativity",
                 "relativity_lower", "relativity_upper", "training_weight"}


def effect_figure(table, label: str, *, log_link: bool):
    """A term's relativity (log link) or effect, with its band and the training weight.

    ``table`` is a relativity table (:mod:`tallgam.tables`) of a one-column term; a
    per-level curve draws one line per level."""
    plt = _plt()
    key = _value_key(table)
    per = [c for c in table.column_names if c not in STAT_COLUMNS and c != key]
    y, lo, hi = (("relativity", "relativity_lower", "relativity_upper") if log_link
                 else ("difference", "lower", "upper"))
    fig, (ax, bar) = plt.subplots(2, 1, figsize=(7.0, 4.6), sharex=True,
                                  gridspec_kw={"height_ratios": [3.2, 1], "hspace": 0.08})
    data = table.to_pydict()
    x_all = np.asarray(data[key])
    numeric = x_all.dtype.kind in "fiu"
    groups = [(None, np.ones(len(x_all), bool))]
    if per:
        levels = list(dict.fromkeys(data[per[0]]))
        groups = [(lev, np.array([v == lev for v in data[per[0]]])) for lev in levels]
    styles = ["-", "--", ":", "-."]
    for i, (name, mask) in enumerate(groups):
        x = x_all[mask]
        pos = x if numeric else np.arange(len(x))
        est = np.asarray(data[y])[mask]
        if numeric:
            ax.fill_between(pos, np.asarray(data[lo])[mask], np.asarray(data[hi])[mask],
                            color=BAND, alpha=0.55 if per else 0.9, linewidth=0)
            ax.plot(pos, np.asarray(data[lo])[mask], color=INK, linewidth=0.7, linestyle=":")
            ax.plot(pos, np.asarray(data[hi])[mask], color=INK, linewidth=0.7, linestyle=":")
            ax.plot(pos, est, color=INK, linewidth=2.0, linestyle=styles[i % 4],
                    label=str(name) if name is not None else None)
        else:
            err = np.vstack([est - np.asarray(data[lo])[mask], np.asarray(data[hi])[mask] - est])
            ax.errorbar(pos, est, yerr=err, fmt="o", color=INK, ecolor=INK, elinewidth=1.2,
                        capsize=3, markersize=5, markerfacecolor="white")
    ax.axhline(1.0 if log_link else 0.0, color=MUTED, linewidth=1.0, linestyle="--")
    ax.set_ylabel("relativity" if log_link else "effect (link scale)")
    ax.set_title(label, loc="left", fontsize=11, color=INK)
    if per:
        ax.legend(title=per[0], frameon=False, fontsize=8, title_fontsize=8)
    _style(ax)
    if "training_weight" in data and not per:
        weight = np.asarray(data["training_weight"], dtype=float)
        pos = x_all if numeric else np.arange(len(x_all))
        width = np.min(np.diff(np.unique(pos))) * 0.8 if numeric and len(np.unique(pos)) > 1 \
            else 0.8
        bar.bar(pos, weight, width=width, color=MUTED, alpha=0.7)
    bar.set_ylabel("training\nweight", fontsize=8, labelpad=2)
    bar.set_xlabel(key)
    _style(bar)
    if not numeric:
        bar.set_xticks(np.arange(len(x_all)))
        bar.set_xticklabels([str(v) for v in x_all], rotation=45 if len(x_all) > 8 else 0,
                            ha="right" if len(x_all) > 8 else "center", fontsize=8)
    fig.subplots_adjust(left=0.14, right=0.97, top=0.92, bottom=0.16)
    return fig


def surface_figure(table, label: str, *, log_link: bool):
    """A two-column term as a filled contour map of its relativity (or effect)."""
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
    ax.set_title(label, loc="left", fontsize=11, color=INK)
    return fig


def lift_figure(lift, title: str = "Lift by band of predicted rate"):
    """Actual rate (bars) and predicted rate (line) per band of equal exposure."""
    plt = _plt()
    d = lift.to_pydict()
    band = np.asarray(d["band"])
    fig, ax = plt.subplots(figsize=(7.0, 4.0))
    ax.bar(band, d["actual_rate"], color=BAND, edgecolor=INK, hatch="//", label="actual")
    ax.plot(band, d["expected_rate"], color=INK, marker="o", markerfacecolor="white",
            linewidth=2.0, label="predicted")
    ax.set_xticks(band)
    ax.set_xlabel("band (equal exposure, lowest predicted rate first)")
    ax.set_ylabel("rate per unit exposure")
    ax.set_title(title, loc="left", fontsize=11, color=INK)
    ax.legend(frameon=False)
    _style(ax)
    return fig


def double_lift_figure(double):
    """Actual over expected of champion and challenger by band of their ratio."""
    plt = _plt()
    d = double.to_pydict()
    band = np.asarray(d["band"])
    fig, ax = plt.subplots(figsize=(7.0, 4.0))
    ax.plot(band, d["actual_over_expected"], color=INK, marker="o", linewidth=2.0,
            label="this model")
    ax.plot(band, d["actual_over_expected_b"], color=ACCENT, marker="s", linestyle="--",
            linewidth=2.0, markerfacecolor="white", label="challenger")
    ax.axhline(1.0, color=MUTED, linestyle=":")
    ax.set_xticks(band)
    ax.set_xlabel("band of prediction ratio (this model / challenger)")
    ax.set_ylabel("actual / expected")
    ax.set_title("Double lift", loc="left", fontsize=11, color=INK)
    ax.legend(frameon=False)
    _style(ax)
    return fig


def lorenz_figure(lorenz, gini: float):
    """The ordered Lorenz curve with the line of equality."""
    plt = _plt()
    d = lorenz.to_pydict()
    fig, ax = plt.subplots(figsize=(4.8, 4.6))
    ax.plot([0, 1], [0, 1], color=MUTED, linestyle="--", linewidth=1.0)
    ax.plot(d["exposure_share"], d["actual_share"], color=INK, linewidth=2.0)
    ax.fill_between(d["exposure_share"], d["actual_share"], d["exposure_share"], color=BAND,
                    alpha=0.6)
    ax.set_xlabel("share of exposure (lowest predicted rate first)")
    ax.set_ylabel("share of actual")
    ax.set_title(f"Ordered Lorenz curve · Gini {gini:.3f} (normalised)", loc="left",
                 fontsize=11, color=INK)
    ax.set_aspect("equal")
    _style(ax)
    return fig


def actual_vs_expected_figure(table, column: str):
    """Actual over expected per band of a rating factor, with the exposure per band."""
    plt = _plt()
    d = table.to_pydict()
    if "band" in d:
        labels = [str(v) for v in d["band"]]
    else:
        labels = [f"{a:.4g}–{b:.4g}" if a is not None else "(missing)"
                  for a, b in zip(d["band_from"], d["band_to"])]
    pos = np.arange(len(labels))
    fig, (ax, bar) = plt.subplots(2, 1, figsize=(7.0, 4.4), sharex=True,
                                  gridspec_kw={"height_ratios": [2.6, 1], "hspace": 0.08})
    ratio = np.array([np.nan if v is None else v for v in d["actual_over_expected"]], float)
    ax.plot(pos, ratio, color=ACCENT, marker="o", markerfacecolor="white", linewidth=1.5,
            label="smooth model")
    if "actual_over_tariff" in d:  # a tariff's bands: its premium beside the model's
        banded = np.array([np.nan if v is None else v for v in d["actual_over_tariff"]], float)
        ax.plot(pos, banded, color=INK, marker="s", markerfacecolor="white", linewidth=1.5,
                linestyle="--", label="banded tariff")
        ax.legend(frameon=False, fontsize=8)
    ax.axhline(1.0, color=MUTED, linestyle="--")
    ax.set_ylabel("actual / expected")
    ax.set_title(f"Actual versus expected by {column}", loc="left", fontsize=11, color=INK)
    _style(ax)
    bar.bar(pos, d["exposure"], color=MUTED, alpha=0.7)
    bar.set_ylabel("exposure", fontsize=8)
    bar.set_xticks(pos)
    bar.set_xticklabels(labels, rotation=45 if len(labels) > 6 else 0,
                        ha="right" if len(labels) > 6 else "center", fontsize=8)
    _style(bar)
    fig.subplots_adjust(left=0.12, right=0.97, top=0.92, bottom=0.22)
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
    ax.axhline(1.0, color=MUTED, linewidth=1.0, linestyle=":")
    ax.set_ylabel("relativity")
    ax.set_title(f"{name}: fitted relativity and tariff bands", loc="left", fontsize=11,
                 color=INK)
    ax.legend(frameon=False, fontsize=8)
    _style(ax)
    width = np.min(np.diff(x)) * 0.8 if len(x) > 1 else 0.8
    bar.bar(x, d["training_exposure"], width=width, color=MUTED, alpha=0.7)
    bar.set_ylabel("training\nexposure", fontsize=8, labelpad=2)
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
