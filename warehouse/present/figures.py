"""Figures of a blocked comparison, drawn with matplotlib (Agg, no pyplot state).

Every function takes plain pandas frames (or lists of dicts) and returns a matplotlib Figure;
`save` writes one to a .png or .svg file atomically and `png_bytes` gives PNG bytes for a report.

    obs    treatment, block, value            (one row per treatment and block)
    cells  treatment, block, instance, value  (one row per treatment and instance)

matplotlib is imported inside the functions, so importing this module stays cheap.
"""
from __future__ import annotations

import io
import math
import os
import tempfile

import numpy as np
import pandas as pd

from ..errors import InputError

FORMATS = (".png", ".svg")

# Blockyard's own plain look: ink-dark text, a light horizontal grid, no box around the plot,
# and a small palette of earthy colours told apart also by marker and line style.
INK = "#26323b"
GRID = "#dde3e8"
PALETTE = ["#1f5f8b", "#b5542b", "#4c7a34", "#7d4a8c", "#a8861c", "#2f8f8a", "#8c2f3f", "#55606a"]
MARKERS = ["o", "s", "^", "D", "v", "P", "X", "h"]
DASHES = ["-", "--", "-.", ":"]
BETTER = "#2f7a5a"
WORSE = "#a8432b"
NEUTRAL = "#6b7780"


def better_words(sense: str) -> str:
    return "higher is better" if sense == "max" else "lower is better"


def _t(text) -> str:
    """Data as literal text: matplotlib would read $...$ in a solver name as mathematics."""
    return str(text).replace("\\", "\\\\").replace("$", r"\$")


def _figure(width: float = 7.2, height: float = 4.4):
    from matplotlib.backends.backend_agg import FigureCanvasAgg
    from matplotlib.figure import Figure

    fig = Figure(figsize=(width, height), dpi=100, layout="constrained")
    FigureCanvasAgg(fig)
    fig.patch.set_facecolor("white")
    ax = fig.add_subplot()
    _style(ax)
    return fig, ax


def _style(ax) -> None:
    ax.set_facecolor("white")
    for side in ("top", "right"):
        ax.spines[side].set_visible(False)
    for side in ("left", "bottom"):
        ax.spines[side].set_color(INK)
        ax.spines[side].set_linewidth(0.8)
    ax.tick_params(colors=INK, labelsize=8.5, length=3)
    ax.yaxis.grid(True, color=GRID, linewidth=0.8)
    ax.set_axisbelow(True)


def _title(ax, title: str, sub: str | None = None) -> None:
    ax.set_title(_t(title), loc="left", fontsize=11.5, color=INK, fontweight="bold", pad=14 if sub else 8)
    if sub:
        ax.text(0, 1.01, _t(sub), transform=ax.transAxes, fontsize=8.5, color=NEUTRAL, va="bottom", ha="left")


def _labels(ax, x: str, y: str) -> None:
    ax.set_xlabel(_t(x), color=INK, fontsize=9.5)
    ax.set_ylabel(_t(y), color=INK, fontsize=9.5)


def _legend(ax, n: int) -> None:
    if n == 0:
        return
    if n > 6:
        ax.legend(loc="upper left", bbox_to_anchor=(1.01, 1), frameon=False, fontsize=8.5, labelcolor=INK)
    else:
        ax.legend(frameon=False, fontsize=8.5, labelcolor=INK)


def _frame(data, needed: tuple[str, ...], what: str) -> pd.DataFrame:
    df = data.copy() if isinstance(data, pd.DataFrame) else pd.DataFrame(list(data or []))
    missing = [c for c in needed if c not in df.columns]
    if missing:
        raise InputError(f"{what} needs the columns {', '.join(needed)}; missing {', '.join(missing)}")
    df["treatment"] = df["treatment"].astype(str)
    if "block" in df.columns:
        df["block"] = df["block"].astype(str)
    df["value"] = pd.to_numeric(df["value"], errors="coerce").astype(float) if "value" in df.columns else np.nan
    return df


def _order(labels) -> list[str]:
    seen: dict[str, None] = {}
    for x in labels:
        seen.setdefault(str(x), None)
    return list(seen)


# --- block profile -----------------------------------------------------------------------------

def block_profile(obs, sense: str = "min", metric: str = "value", treatments: list[str] | None = None):
    """The metric per block, one line per treatment; blocks ordered by their mean over treatments."""
    df = _frame(obs, ("treatment", "block", "value"), "the block profile").dropna(subset=["value"])
    if df.empty:
        raise InputError("the block profile needs at least one observation")
    order = df.groupby("block")["value"].mean().sort_values(kind="mergesort").index.tolist()
    pos = {b: i for i, b in enumerate(order)}
    names = [t for t in (treatments or []) if t in set(df["treatment"])] or _order(df["treatment"])
    fig, ax = _figure(min(16.0, max(7.2, 0.38 * len(order) + 3.0)), 4.6)
    for i, t in enumerate(names):
        part = df[df["treatment"] == t].copy()
        part["x"] = part["block"].map(pos)
        part = part.sort_values("x")
        ax.plot(part["x"], part["value"], color=PALETTE[i % len(PALETTE)], marker=MARKERS[i % len(MARKERS)],
                linestyle=DASHES[(i // len(PALETTE)) % len(DASHES)], linewidth=1.3, markersize=4.5, label=_t(t))
    ax.set_xticks(range(len(order)))
    ax.set_xticklabels([_t(b) for b in order], rotation=55 if len(order) > 5 else 0,
                       ha="right" if len(order) > 5 else "center", fontsize=8 if len(order) > 12 else 8.5)
    _title(ax, f"{metric} per block ({better_words(sense)})",
           f"{len(names)} treatments on {len(order)} blocks; blocks ordered by their mean")
    _labels(ax, "block (instance group)", metric)
    _legend(ax, len(names))
    return fig


def relative_profile(obs, sense: str = "min", metric: str = "value", treatments: list[str] | None = None,
                     baseline: str | None = None):
    """Each treatment's value per block as a percentage difference from the baseline's value on
    that block (or from the block's mean over treatments when there is no baseline): a few
    percent shows even when blocks differ by orders of magnitude. Blocks where the reference is
    zero or missing are left out, and the subtitle says how many."""
    df = _frame(obs, ("treatment", "block", "value"), "the relative block profile").dropna(subset=["value"])
    if df.empty:
        raise InputError("the relative block profile needs at least one observation")
    wide = df.pivot_table(index="block", columns="treatment", values="value", aggfunc="first")
    if baseline is not None and baseline in wide.columns:
        ref, against = wide[baseline], f"{baseline} on the same block"
    else:
        ref, against = wide.mean(axis=1), "the block's mean over treatments"
    usable = ref.notna() & (ref != 0)
    left_out = int((~usable).sum())
    rel = (wide[usable].div(ref[usable], axis=0) - 1.0) * 100.0
    if rel.empty:
        raise InputError("no block has a non-zero reference value to compare with")
    order = rel.mean(axis=1).sort_values(kind="mergesort").index.tolist()
    names = [t for t in (treatments or []) if t in rel.columns] or _order(list(rel.columns))
    fig, ax = _figure(min(16.0, max(7.2, 0.38 * len(order) + 3.0)), 4.6)
    ax.axhline(0.0, color="#888888", linewidth=0.9)
    for i, t in enumerate(names):
        y = rel.loc[order, t]
        ax.plot(range(len(order)), y.to_numpy(), color=PALETTE[i % len(PALETTE)], marker=MARKERS[i % len(MARKERS)],
                linestyle=DASHES[(i // len(PALETTE)) % len(DASHES)], linewidth=1.3, markersize=4.5, label=_t(t))
    ax.set_xticks(range(len(order)))
    ax.set_xticklabels([_t(b) for b in order], rotation=55 if len(order) > 5 else 0,
                       ha="right" if len(order) > 5 else "center", fontsize=8 if len(order) > 12 else 8.5)
    gone = f"; {left_out} blocks left out (reference zero or missing)" if left_out else ""
    _title(ax, f"{metric} per block, relative to {against} ({better_words(sense)})",
           f"{len(names)} treatments on {len(order)} blocks, in % of the reference{gone}")
    _labels(ax, "block (instance group)", f"{metric}: % difference")
    _legend(ax, len(names))
    return fig


# --- residuals of the additive block model -----------------------------------------------------

def additive_fit(obs) -> pd.DataFrame:
    """Fitted values and residuals of the additive model value ~ treatment + block.

    On a complete design (every treatment once in every block) this is the textbook form
    r = y - block mean - treatment mean + grand mean; with holes the same model is fitted by
    least squares. Returns obs with the columns `fitted` and `residual` added.
    """
    df = _frame(obs, ("treatment", "block", "value"), "the residuals").dropna(subset=["value"]).reset_index(drop=True)
    if df.duplicated(["treatment", "block"]).any():
        t, b = df.loc[df.duplicated(["treatment", "block"]), ["treatment", "block"]].iloc[0]
        raise InputError(f"several values for {t} on block {b}; the residual figures need one value per treatment and block")
    ts, bs = _order(df["treatment"]), _order(df["block"])
    if len(ts) < 2 or len(bs) < 2:
        raise InputError("the residual figures need at least two treatments and two blocks")
    y = df["value"].to_numpy(float)
    if len(df) == len(ts) * len(bs):
        block_mean = df.groupby("block")["value"].transform("mean").to_numpy(float)
        treat_mean = df.groupby("treatment")["value"].transform("mean").to_numpy(float)
        fitted = block_mean + treat_mean - y.mean()
    else:
        ti = df["treatment"].map({t: i for i, t in enumerate(ts)}).to_numpy()
        bi = df["block"].map({b: i for i, b in enumerate(bs)}).to_numpy()
        X = np.zeros((len(df), 1 + len(ts) - 1 + len(bs) - 1))
        X[:, 0] = 1.0
        for j in range(1, len(ts)):
            X[ti == j, j] = 1.0
        for j in range(1, len(bs)):
            X[bi == j, len(ts) - 1 + j] = 1.0
        beta, *_ = np.linalg.lstsq(X, y, rcond=None)
        fitted = X @ beta
    df["fitted"] = fitted
    df["residual"] = y - fitted
    return df


def blom_positions(n: int) -> np.ndarray:
    """Blom's plotting positions (i - 0.375) / (n + 0.25), i = 1..n."""
    i = np.arange(1, n + 1, dtype=float)
    return (i - 0.375) / (n + 0.25)


def qq_points(residuals) -> tuple[np.ndarray, np.ndarray]:
    """(normal quantiles at Blom's positions, sorted residuals)."""
    from scipy.stats import norm

    r = np.sort(np.asarray(residuals, dtype=float))
    return norm.ppf(blom_positions(len(r))), r


def residual_qq(obs, metric: str = "value"):
    """Normal Q-Q plot of the additive model's residuals, with the line through the quartiles."""
    fit = additive_fit(obs)
    x, r = qq_points(fit["residual"])
    fig, ax = _figure(6.0, 4.8)
    ax.scatter(x, r, s=18, color=PALETTE[0], edgecolor="white", linewidth=0.4, zorder=3, label="residuals")
    q1, q3 = np.percentile(r, [25, 75])
    from scipy.stats import norm

    z1, z3 = norm.ppf([0.25, 0.75])
    if q3 > q1:
        slope = (q3 - q1) / (z3 - z1)
        line_label = "line through the quartiles"
    else:  # flat middle half: fall back to the residual standard deviation
        slope = float(np.std(r, ddof=1)) if len(r) > 1 else 0.0
        q1, z1 = float(np.mean(r)), 0.0
        line_label = "line with the residual sd as slope"
    xs = np.array([x.min(), x.max()]) if len(x) else np.array([-1.0, 1.0])
    ax.plot(xs, q1 + slope * (xs - z1), color=PALETTE[1], linewidth=1.2, linestyle="--", label=line_label)
    ax.xaxis.grid(True, color=GRID, linewidth=0.8)
    _title(ax, f"{metric}: residuals against the normal distribution",
           f"{len(r)} residuals of the additive treatment + block model; Blom plotting positions")
    _labels(ax, "normal quantile", f"residual ({metric})")
    _legend(ax, 2)
    return fig


def residuals_vs_fitted(obs, metric: str = "value", treatments: list[str] | None = None):
    """Residuals of the additive model against its fitted values, coloured by treatment."""
    fit = additive_fit(obs)
    names = [t for t in (treatments or []) if t in set(fit["treatment"])] or _order(fit["treatment"])
    fig, ax = _figure(7.2, 4.6)
    ax.axhline(0.0, color=INK, linewidth=0.9)
    for i, t in enumerate(names):
        part = fit[fit["treatment"] == t]
        ax.scatter(part["fitted"], part["residual"], s=20, color=PALETTE[i % len(PALETTE)],
                   marker=MARKERS[i % len(MARKERS)], edgecolor="white", linewidth=0.4, zorder=3, label=_t(t))
    sd = float(np.std(fit["residual"], ddof=1)) if len(fit) > 1 else 0.0
    if sd > 0:
        for k in (-3, 3):
            ax.axhline(k * sd, color=NEUTRAL, linewidth=0.7, linestyle=":")
    ax.xaxis.grid(True, color=GRID, linewidth=0.8)
    _title(ax, f"{metric}: residuals against fitted values",
           "additive treatment + block model; dotted lines at 3 residual standard deviations")
    _labels(ax, f"fitted {metric}", f"residual ({metric})")
    _legend(ax, len(names))
    return fig


# --- differences from the baseline -------------------------------------------------------------

def _end(x, default: float) -> float:
    if x is None:
        return default
    try:
        v = float(x)
    except (TypeError, ValueError):
        return default
    return default if math.isnan(v) else v


def baseline_differences(comparisons, baseline: str, metric: str = "value", sense: str = "min",
                         confidence: float = 0.95):
    """Each treatment's difference from the baseline with its interval; zero marks no difference.

    `comparisons` has treatment, diff, ci_low, ci_high (and optionally verdict). A missing or
    infinite interval end is the open side of a one-sided interval: drawn to the edge with an arrow.
    """
    df = comparisons.copy() if isinstance(comparisons, pd.DataFrame) else pd.DataFrame(list(comparisons or []))
    for c in ("treatment", "diff"):
        if c not in df.columns:
            raise InputError(f"the baseline differences need the columns treatment, diff, ci_low, ci_high; missing {c}")
    if df.empty:
        raise InputError("the baseline differences need at least one comparison")
    for c in ("ci_low", "ci_high"):
        if c not in df.columns:
            df[c] = None
    rows = []
    for r in df.to_dict("records"):
        rows.append((str(r["treatment"]), _end(r["diff"], 0.0), _end(r["ci_low"], -math.inf),
                     _end(r["ci_high"], math.inf), str(r.get("verdict") or "")))
    finite = [0.0] + [v for _, d, lo, hi, _ in rows for v in (d, lo, hi) if math.isfinite(v)]
    span = (max(finite) - min(finite)) or 1.0
    left, right = min(finite) - 0.15 * span, max(finite) + 0.15 * span
    fig, ax = _figure(7.2, max(2.6, 0.55 * len(rows) + 1.9))
    ax.yaxis.grid(False)
    ax.xaxis.grid(True, color=GRID, linewidth=0.8)
    ax.axvline(0.0, color=INK, linewidth=1.0)
    shown = set()
    for i, (t, d, lo, hi, verdict) in enumerate(rows):
        y = len(rows) - 1 - i
        colour = BETTER if verdict == "better" else WORSE if verdict == "worse" else NEUTRAL
        key = verdict if verdict in ("better", "worse") else "no clear difference"
        a, b = max(lo, left), min(hi, right)
        ax.plot([a, b], [y, y], color=colour, linewidth=5, alpha=0.35, solid_capstyle="butt")
        if not math.isfinite(lo):
            ax.plot([left], [y], marker="<", color=colour, markersize=7)
        if not math.isfinite(hi):
            ax.plot([right], [y], marker=">", color=colour, markersize=7)
        ax.plot([d], [y], marker="o", color=colour, markersize=6.5, linestyle="none",
                label=None if key in shown else key)
        shown.add(key)
    ax.set_xlim(left, right)
    ax.set_ylim(-0.7, len(rows) - 0.3)
    ax.set_yticks(range(len(rows)))
    ax.set_yticklabels([_t(r[0]) for r in reversed(rows)])
    pct = f"{confidence * 100:g} %"
    _title(ax, f"{metric}: difference from {baseline} ({better_words(sense)})",
           f"treatment minus baseline per treatment, with its {pct} interval; an arrow marks an open end")
    _labels(ax, f"difference in {metric} (treatment - baseline)", "")
    from matplotlib.transforms import blended_transform_factory

    where = blended_transform_factory(ax.transData, ax.transAxes)
    if sense == "max":
        ax.text(0.0, 0.02, "  better \u2192", transform=where, ha="left", va="bottom", fontsize=8.5, color=BETTER)
    else:
        ax.text(0.0, 0.02, "\u2190 better  ", transform=where, ha="right", va="bottom", fontsize=8.5, color=BETTER)
    _legend(ax, len(shown))
    return fig


# --- performance profile -----------------------------------------------------------------------

def _instance_keys(df: pd.DataFrame) -> pd.Series:
    if "block" in df.columns:
        return df["block"].astype(str) + "/" + df["instance"].astype(str)
    return df["instance"].astype(str)


def performance_ratios(cells, sense: str = "min") -> pd.DataFrame:
    """Performance ratios after Dolan and More (2002): one row per instance, one column per treatment.

    The ratio is a treatment's value over the best value any treatment reached on the instance
    (for sense "max": the best value over the treatment's value), so the best scores 1. A row
    without a value (every run of the treatment there failed) is a failure: its ratio is infinite,
    never within any factor of the best, as in the paper; an instance no treatment solved is
    infinite for all. Instances some treatment has no row for (never ran) are left out; the values
    must be positive.
    """
    df = _frame(cells, ("treatment", "instance", "value"), "the performance profile")
    df["key"] = _instance_keys(df)
    if df.duplicated(["treatment", "key"]).any():
        t, k = df.loc[df.duplicated(["treatment", "key"]), ["treatment", "key"]].iloc[0]
        raise InputError(f"several values for {t} on instance {k}; the performance profile needs one per treatment and instance")
    names = _order(df["treatment"])
    failed = pd.to_numeric(df["value"], errors="coerce").isna()
    df["value"] = pd.to_numeric(df["value"], errors="coerce").where(~failed, np.inf)  # not NaN: NaN is "never ran"
    wide = df.pivot(index="key", columns="treatment", values="value").reindex(columns=names)
    wide = wide.dropna(how="any")
    if wide.empty:
        raise InputError("no instance was run by every treatment; the performance profile compares treatments "
                         "on common instances only")
    solved = wide.where(np.isfinite(wide))
    bad = solved[(solved <= 0).any(axis=1)]
    if not bad.empty:
        key = bad.index[0]
        t = next(c for c in wide.columns if bad.loc[key, c] <= 0)
        raise InputError(f"the performance profile needs positive values: {t} has {bad.loc[key, t]:g} on {key} "
                         f"({len(bad)} instances have a zero or negative value); a ratio to the best is undefined "
                         "there, so plot a positive metric (a time, a count) or use the block profile")
    if sense == "max":
        ratios = solved.rdiv(solved.max(axis=1), axis=0)
    else:
        ratios = solved.div(solved.min(axis=1), axis=0)
    ratios = ratios.fillna(np.inf)  # failures, and every treatment on an instance none solved
    ratios.index.name = "instance"
    ratios.columns.name = None
    return ratios


def profile_share(ratios: pd.DataFrame, tau: float) -> pd.Series:
    """rho_s(tau): the share of instances on which treatment s is within a factor tau of the best."""
    return (ratios <= tau).mean(axis=0)


def profile_steps(ratios: pd.Series) -> tuple[np.ndarray, np.ndarray]:
    """The step curve of one treatment: (tau, rho(tau)) at every tau where rho jumps, from tau = 1.
    Failures (infinite ratios) never count, so the curve stays below 1 by their share."""
    r = np.sort(np.asarray(ratios, dtype=float))
    n = len(r)
    r = r[np.isfinite(r)]
    if not len(r):
        return np.array([1.0]), np.array([0.0])
    taus, counts = np.unique(r, return_counts=True)
    shares = np.cumsum(counts) / n
    if taus[0] > 1.0:
        taus, shares = np.concatenate([[1.0], taus]), np.concatenate([[0.0], shares])
    return taus, shares


def performance_profile(cells, sense: str = "min", metric: str = "value"):
    """Dolan and More's performance profile: for each treatment, rho(tau) against tau (log scale)."""
    ratios = performance_ratios(cells, sense)
    finite = ratios.to_numpy()[np.isfinite(ratios.to_numpy())]
    top = float(finite.max()) if finite.size else 1.0
    failures = int((~np.isfinite(ratios.to_numpy())).sum())
    right = max(top * 1.08, 1.05)
    fig, ax = _figure(7.2, 4.6)
    for i, t in enumerate(ratios.columns):
        taus, shares = profile_steps(ratios[t])
        xs = np.concatenate([taus, [right]])
        ys = np.concatenate([shares, [shares[-1]]])
        ax.step(xs, ys, where="post", color=PALETTE[i % len(PALETTE)], linestyle=DASHES[i % len(DASHES)],
                linewidth=1.6, label=_t(t))
    ax.set_xscale("log", base=2)
    ax.set_xlim(1.0, right)
    ax.set_ylim(0.0, 1.03)
    ax.xaxis.grid(True, color=GRID, linewidth=0.8, which="both")
    from matplotlib.ticker import FixedLocator, FuncFormatter, MaxNLocator, NullLocator

    if right < 4:
        ticks = [v for v in MaxNLocator(6).tick_values(1.0, right) if 1.0 <= v <= right]
    else:
        ticks = [2.0 ** k for k in range(0, int(math.log2(right)) + 1)]
    ax.xaxis.set_major_locator(FixedLocator(ticks))
    ax.xaxis.set_minor_locator(NullLocator())
    ax.xaxis.set_major_formatter(FuncFormatter(lambda v, _: f"{v:.4g}"))
    failed = f"; {failures} failures count as never solved" if failures else ""
    _title(ax, f"{metric}: performance profile ({better_words(sense)})",
           f"{len(ratios)} instances every treatment ran{failed}; at 1: the share where a treatment is best")
    _labels(ax, "within this factor of the best treatment on the instance (log scale)", "share of instances")
    _legend(ax, len(ratios.columns))
    return fig


# --- solved fraction over time (runtimes with a cutoff) ----------------------------------------

def solved_fraction(per_treatment, cutoff: float, metric: str = "time", unit: str = ""):
    """The Kaplan-Meier share of runs solved by each time, one step curve per treatment, up to the
    cutoff (dashed line). `per_treatment` is the `per_treatment` list of a censored result: dicts
    with treatment and curve ([time, solved fraction] at the curve's steps). A log time axis when
    the solve times span more than two orders of magnitude."""
    rows = list(per_treatment or [])
    if not rows or any("treatment" not in r or "curve" not in r for r in rows):
        raise InputError("the solved-fraction figure needs each treatment's curve (an analysis run with --cutoff)")
    cutoff = float(cutoff)
    times = [float(t) for r in rows for t, _ in r["curve"] if float(t) > 0]
    log = bool(times) and cutoff / min(times) > 100
    left = min(times) / 1.5 if log else 0.0
    fig, ax = _figure(7.2, 4.6)
    for i, r in enumerate(rows):
        pts = [(max(float(t), left), float(f)) for t, f in r["curve"]]
        xs = [left] + [t for t, _ in pts] + [cutoff]
        ys = [0.0] + [f for _, f in pts] + [pts[-1][1] if pts else 0.0]
        ax.step(xs, ys, where="post", color=PALETTE[i % len(PALETTE)], linestyle=DASHES[i % len(DASHES)],
                linewidth=1.6, label=_t(f"{r['treatment']} ({r.get('solved', '?')} of {r.get('runs', '?')} solved)"))
    ax.axvline(cutoff, color=NEUTRAL, linewidth=0.9, linestyle="--")
    if log:
        ax.set_xscale("log")
        ax.set_xlim(left, cutoff * 1.05)
    else:
        ax.set_xlim(0.0, cutoff * 1.02)
    ax.set_ylim(0.0, 1.03)
    ax.xaxis.grid(True, color=GRID, linewidth=0.8)
    u = f" ({unit})" if unit else ""
    _title(ax, f"{metric}: share of runs solved by each time",
           f"Kaplan-Meier; failed runs and runs at or past the cutoff ({cutoff:g}{' ' + unit if unit else ''}, "
           "dashed) count as unsolved")
    _labels(ax, f"{metric}{u}" + (" (log scale)" if log else ""), "share of runs solved")
    _legend(ax, len(rows))
    return fig


# --- output ------------------------------------------------------------------------------------

def png_bytes(fig, dpi: int = 110) -> bytes:
    buf = io.BytesIO()
    fig.savefig(buf, format="png", dpi=dpi, facecolor="white", metadata={"Software": None})
    return buf.getvalue()


def figure_format(path: str) -> str:
    ext = os.path.splitext(str(path))[1].lower()
    if ext not in FORMATS:
        raise InputError(f"{path}: a figure is written as {' or '.join(FORMATS)}; give a file name ending in one of them")
    return ext[1:]


def atomic_write(path: str, write) -> str:
    """Call write(binary file) on a temporary file beside PATH, then rename it over PATH, so a reader
    never sees half a file. The file gets the usual permissions (0666 less the umask)."""
    folder = os.path.dirname(os.path.abspath(path))
    if not os.path.isdir(folder):
        raise InputError(f"{path}: the folder {folder} does not exist")
    fd, tmp = tempfile.mkstemp(prefix=".blockyard-", suffix=os.path.splitext(str(path))[1], dir=folder)
    try:
        with os.fdopen(fd, "wb") as fh:
            write(fh)
        mask = os.umask(0)
        os.umask(mask)
        os.chmod(tmp, 0o666 & ~mask)
        os.replace(tmp, path)
    except BaseException:
        if os.path.exists(tmp):
            os.unlink(tmp)
        raise
    return str(path)


def save(fig, path: str, dpi: int = 110) -> str:
    """Write a figure to PATH (.png or .svg) atomically: a temporary file beside it, then a rename."""
    fmt = figure_format(path)

    def write(fh):
        if fmt == "svg":
            import matplotlib

            with matplotlib.rc_context({"svg.fonttype": "none", "svg.hashsalt": "blockyard"}):
                fig.savefig(fh, format="svg", facecolor="white", metadata={"Date": None})
        else:
            fig.savefig(fh, format="png", dpi=dpi, facecolor="white", metadata={"Software": None})

    return atomic_write(path, write)


def analysis_scale(obs, transform: dict | None) -> pd.DataFrame:
    """obs with `value` moved to the scale a blocktest analysed it on (its stored transform document:
    name none | log | boxcox | rank, shift, boxcox_lambda), so residual figures match the analysis."""
    df = obs.copy() if isinstance(obs, pd.DataFrame) else pd.DataFrame(list(obs or []))
    name = (transform or {}).get("name") or "none"
    if name == "none" or df.empty:
        return df
    y = pd.to_numeric(df["value"], errors="coerce").to_numpy(float)
    if name == "rank":
        from scipy.stats import rankdata

        df["value"] = rankdata(y)
        return df
    shifted = y + float((transform or {}).get("shift") or 0.0)
    lam = (transform or {}).get("boxcox_lambda")
    if name == "boxcox" and lam is not None and abs(float(lam)) >= 1e-10:
        df["value"] = np.expm1(float(lam) * np.log(shifted)) / float(lam)
    else:
        df["value"] = np.log(shifted)
    return df


# --- variance components -----------------------------------------------------------------------

def component_shares(parts: list[tuple[str, list[dict]]], metric: str = "value"):
    """Stacked bars of the variance shares: one bar per (label, components) pair, e.g. pooled,
    each treatment, and a treatment difference; a segment per level, its share printed in it."""
    if not parts:
        raise InputError("no components to draw")
    coarse_first = ["group", "treatment x group", "instance", "treatment x instance", "seed"]
    levels: list[str] = []
    for _, rows in parts:
        for r in rows:
            if r["level"] not in levels:
                levels.append(r["level"])
    levels.sort(key=lambda x: coarse_first.index(x) if x in coarse_first else len(coarse_first))
    fig, ax = _figure(7.2, 0.9 + 0.55 * len(parts))
    ax.yaxis.grid(False)
    ax.xaxis.grid(True, color=GRID, linewidth=0.8)
    y = np.arange(len(parts))[::-1]
    left = np.zeros(len(parts))
    for k, level in enumerate(levels):
        share = np.array([next((float(r["share"] or 0.0) for r in rows if r["level"] == level), 0.0)
                          for _, rows in parts])
        ax.barh(y, share * 100, left=left * 100, color=PALETTE[k % len(PALETTE)], height=0.62, label=_t(level),
                edgecolor="white", linewidth=0.8)
        for yy, l, s in zip(y, left, share):
            if s >= 0.08:
                ax.text((l + s / 2) * 100, yy, f"{100 * s:.0f} %", ha="center", va="center", fontsize=8, color="white")
        left += share
    ax.set_yticks(y)
    ax.set_yticklabels([_t(label) for label, _ in parts])
    ax.set_xlim(0, 100)
    _labels(ax, "share of the variance (%)", "")
    _title(ax, f"where {metric} varies", "pooled over treatments, per treatment, and for a treatment difference")
    ax.legend(loc="upper center", bbox_to_anchor=(0.5, -0.18 - 0.1 / max(1, len(parts))), ncol=min(len(levels), 5),
              frameon=False, fontsize=8.5, labelcolor=INK)
    return fig
