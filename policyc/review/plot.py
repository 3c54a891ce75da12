"""Pictures for reviewers: decision regions over two features, the risk-reject curve, the posterior simplex.

matplotlib (the ``plot`` extra) is imported inside the functions, and figures
are drawn on an Agg canvas without pyplot, so importing this module costs
nothing and no global backend is switched. The file format follows the
suffix: ``.png`` (raster, size in pixels = inches x dpi) or ``.svg``.
"""

from __future__ import annotations

import re
from collections.abc import Iterator, Mapping, Sequence
from contextlib import contextmanager
from dataclasses import dataclass
from pathlib import Path
from typing import Any, Protocol

import numpy as np

from policyc.errors import ReviewError
from policyc.evidence.io import read_feature_batches
from policyc.files import atomic_path
from policyc.geometry.decisions import align_columns, decide_on_posteriors, matching_actions
from policyc.geometry.sampling import DEFAULT_SIMPLEX_SAMPLES, decision_pair_shares, mean_and_se
from policyc.geometry.ternary import HEIGHT, VERTICES, boundary_segments, simplex_raster, to_plane
from policyc.review.shared.bootstrap import DEFAULT_SEED
from policyc.review.shared.gaussians import gaussian_moments
from policyc.review.shared.loading import LoadedRule
from policyc.runtime import Rule

__all__ = [
    "DEFAULT_DPI",
    "DEFAULT_SIZE",
    "FigureSize",
    "PlotError",
    "decision_regions",
    "gaussian_moments",
    "parse_size",
    "risk_reject_curve",
    "simplex_map",
]

DEFAULT_DPI = 100
SUFFIXES = {".png": "png", ".svg": "svg"}
PALETTE = ("#4e79a7", "#f28e2b", "#59a14f", "#e15759", "#b07aa1", "#edc948", "#76b7b2", "#ff9da7", "#9c755f")
REJECT_COLOUR = "#bab0ac"
CLASS_MARKERS = ("o", "s", "^", "D", "v", "P", "*", "X", "h")
MAX_POINTS = 4000


class CurvePointLike(Protocol):
    @property
    def reject_cost(self) -> float: ...
    @property
    def risk(self) -> float: ...
    @property
    def reject_rate(self) -> float: ...
    @property
    def error_rate(self) -> float: ...
    @property
    def accepted_error_rate(self) -> float: ...
    @property
    def own(self) -> bool: ...


class CurveReport(Protocol):
    """What the risk-reject picture reads from an evaluation (``policyc.review.evaluate.Evaluation`` has it)."""

    @property
    def rule(self) -> Rule: ...
    @property
    def curve(self) -> Sequence[CurvePointLike]: ...
    @property
    def data(self) -> str: ...
    @property
    def rows(self) -> int: ...
    @property
    def label(self) -> str: ...
    @property
    def reach_value(self) -> float: ...


class PlotError(ReviewError):
    """A picture cannot be drawn as asked (missing matplotlib, wrong rule kind, unknown feature...)."""


@dataclass(frozen=True)
class FigureSize:
    """Width and height in inches, and dots per inch for raster output."""

    width: float
    height: float
    dpi: int = DEFAULT_DPI

    @property
    def pixels(self) -> tuple[int, int]:
        return round(self.width * self.dpi), round(self.height * self.dpi)


DEFAULT_SIZE = FigureSize(8.0, 6.0)


def parse_size(text: str, dpi: int = DEFAULT_DPI) -> FigureSize:
    """``WxH`` in inches (``8x6``) or pixels (``1200x900px``)."""
    match = re.fullmatch(r"\s*(\d+(?:\.\d+)?)\s*[xX×]\s*(\d+(?:\.\d+)?)\s*(px|in)?\s*", text)
    if match is None:
        raise PlotError(f"size {text!r} is not WxH (inches, e.g. 8x6) or WxHpx (pixels, e.g. 1200x900px)")
    width, height, unit = float(match[1]), float(match[2]), match[3]
    if unit == "px":
        width, height = width / dpi, height / dpi  # inches = pixels / dots per inch
    if not (1.0 <= width <= 40.0 and 1.0 <= height <= 40.0):
        raise PlotError(f"size {text!r} is outside 1 to 40 inches ({dpi} pixels per inch)")
    return FigureSize(width, height, dpi)


def _matplotlib() -> Any:
    try:
        import matplotlib
        from matplotlib.backends.backend_agg import FigureCanvasAgg  # noqa: F401  (registers the Agg canvas)
    except ImportError:
        raise PlotError("pictures need matplotlib; install it with: pip install 'policyc[plot]'") from None
    return matplotlib


def _figure(size: FigureSize, **kwargs: Any) -> Any:
    _matplotlib()
    from matplotlib.backends.backend_agg import FigureCanvasAgg
    from matplotlib.figure import Figure

    figure = Figure(figsize=(size.width, size.height), dpi=size.dpi, layout="constrained", **kwargs)
    FigureCanvasAgg(figure)
    return figure


def _format(output: Path) -> str:
    fmt = SUFFIXES.get(output.suffix.lower())
    if fmt is None:
        raise PlotError(f"{output}: unknown picture format {output.suffix!r}; use .png or .svg")
    return fmt


@contextmanager
def _style() -> Iterator[None]:
    matplotlib = _matplotlib()
    with matplotlib.rc_context(
        {
            "font.size": 9,
            "axes.titlesize": 10,
            "hatch.linewidth": 0.6,
            "hatch.color": "#333333",
            "svg.hashsalt": "policyc",
        }
    ):
        yield


def _save(figure: Any, output: Path, size: FigureSize) -> Path:
    fmt = _format(output)
    with atomic_path(output) as temporary:
        figure.savefig(temporary, format=fmt, dpi=size.dpi, metadata=_metadata(fmt))
    return output


def _metadata(fmt: str) -> dict[str, Any]:
    # no creation date, so the same picture gives the same bytes
    return {"Date": None} if fmt == "svg" else {}


def _colours(actions: Sequence[str], reject_actions: Sequence[str | None]) -> dict[str, str]:
    colours: dict[str, str] = {}
    plain = [a for a in actions if a not in reject_actions]
    for index, name in enumerate(plain):
        colours[name] = PALETTE[index % len(PALETTE)]
    for name in actions:
        colours.setdefault(name, REJECT_COLOUR)
    return colours


def _title(rule: Rule) -> str:
    return f"{rule.manifest.get('policy')} r{rule.manifest.get('revision')}"


def _unit(rule: Rule) -> str:
    unit = rule.manifest.get("loss_unit")
    return f" ({unit})" if unit else ""


def _action_legend(
    ax: Any, actions: Sequence[str], colours: Mapping[str, str], extra: Sequence[Any] = (), below: bool = False
) -> None:
    from matplotlib.patches import Patch

    handles = [*(Patch(facecolor=colours[a], edgecolor="#333333", linewidth=0.5, label=a) for a in actions), *extra]
    if below:
        ax.legend(handles=handles, loc="upper center", bbox_to_anchor=(0.5, 0.0), ncols=3, frameon=False)
    else:
        ax.legend(handles=handles, loc="upper left", bbox_to_anchor=(1.01, 1.0), frameon=False, title="action")


# --- (a) decision regions over two features ----------------------------------------------------


def _held_values(rule: Rule, x: str, y: str, hold: Mapping[str, float]) -> np.ndarray:
    for name in (x, y, *hold):
        if name not in rule.features:
            raise PlotError(f"{name!r} is not a feature of the rule ({', '.join(rule.features)})")
    if x == y:
        raise PlotError("--x and --y must name two different features")
    values = np.array(rule.params["centre"], dtype=np.float64)  # default: the mean of the class means
    for name, value in hold.items():
        values[rule.features.index(name)] = value
    return values


def _read_points(path: Path, x: str, y: str, label: str) -> tuple[np.ndarray, np.ndarray]:
    chunks, labels = [], []
    for batch in read_feature_batches(path, [x, y], label=label):
        assert batch.labels is not None
        chunks.append(batch.features)
        labels.append(batch.labels)
    points, names = np.concatenate(chunks), np.concatenate(labels)
    if points.shape[0] > MAX_POINTS:  # keep the picture readable: a seeded subsample
        keep = np.sort(np.random.default_rng(0).choice(points.shape[0], MAX_POINTS, replace=False))
        points, names = points[keep], names[keep]
    return points, names


def _span(means: np.ndarray, sds: np.ndarray, extra: np.ndarray | None) -> tuple[float, float]:
    low, high = float((means - 3.0 * sds).min()), float((means + 3.0 * sds).max())
    if extra is not None and extra.size:
        low, high = min(low, float(np.nanmin(extra))), max(high, float(np.nanmax(extra)))
    pad = 0.03 * (high - low)
    return low - pad, high + pad


def decision_regions(
    loaded: LoadedRule,
    x: str,
    y: str,
    output: Path,
    hold: Mapping[str, float] | None = None,
    points: Path | None = None,
    label: str | None = None,
    size: FigureSize = DEFAULT_SIZE,
    resolution: int = 400,
) -> Path:
    """Decision regions of a gaussian rule over features ``x`` and ``y``, the others held fixed.

    Held values default to the mean of the class means (the kernel's ``centre``). Optional labelled
    points (e.g. the training data) are overlaid, one marker per class; more than 4000 are subsampled.
    """
    rule = loaded.rule
    if rule.evidence != "gaussian":
        raise PlotError(f"the rule's evidence is {rule.evidence!r}; decision regions over features need gaussian")
    means, covariances = gaussian_moments(rule)
    values = _held_values(rule, x, y, hold or {})
    ix, iy = rule.features.index(x), rule.features.index(y)
    overlay = _read_points(points, x, y, label) if points is not None and label is not None else None
    sds = np.sqrt(np.diagonal(covariances, axis1=1, axis2=2))
    x_span = _span(means[:, ix], sds[:, ix], overlay[0][:, 0] if overlay else None)
    y_span = _span(means[:, iy], sds[:, iy], overlay[0][:, 1] if overlay else None)
    xs, ys = np.linspace(*x_span, resolution), np.linspace(*y_span, resolution)
    grid = np.tile(values, (resolution * resolution, 1))
    grid[:, ix] = np.tile(xs, resolution)
    grid[:, iy] = np.repeat(ys, resolution)
    assessment = rule.assess(grid)
    chosen = assessment.action.reshape(resolution, resolution)
    novel = (assessment.reason == "novelty").reshape(resolution, resolution)
    colours = _colours(rule.actions, [rule.reject_action])
    with _style():
        figure = _figure(size)
        ax = figure.add_subplot()
        _draw_regions(ax, chosen, rule.actions, colours, (*x_span, *y_span))
        extra = _draw_means(ax, rule, means[:, [ix, iy]])
        extra += _draw_novelty_boundary(ax, xs, ys, novel)
        if overlay is not None:
            extra += _draw_points(ax, rule, *overlay)
        ax.set_xlabel(x)
        ax.set_ylabel(y)
        held = _held_text(rule, values, (ix, iy), hold or {})
        figure.suptitle(f"{_title(rule)}: decision regions over {x} and {y}\n{held}")
        _action_legend(ax, rule.actions, colours, extra)
        return _save(figure, output, size)


def _draw_novelty_boundary(ax: Any, xs: np.ndarray, ys: np.ndarray, novel: np.ndarray) -> list[Any]:
    """A dashed line where novelty rejection starts: rows beyond it are outside every class's region."""
    if not novel.any() or novel.all():
        return []
    from matplotlib.lines import Line2D

    ax.contour(xs, ys, novel.astype(float), levels=[0.5], colors="black", linestyles="--", linewidths=1.4)
    return [Line2D([], [], color="black", linestyle="--", label="novelty boundary (beyond: deferred)")]


def _held_text(rule: Rule, values: np.ndarray, shown: tuple[int, int], hold: Mapping[str, float]) -> str:
    names = [name for i, name in enumerate(rule.features) if i not in shown]
    if not names:
        return ""
    parts = [f"{name}={values[rule.features.index(name)]:.4g}" + (" (given)" if name in hold else "") for name in names]
    defaults = [name for name in names if name not in hold]
    default = (
        ""
        if not defaults
        else " (the mean of the class means)"
        if not hold
        else " (others: the mean of the class means)"
    )
    return "held at " + ", ".join(parts) + default


def _draw_regions(ax: Any, chosen: np.ndarray, actions: Sequence[str], colours: Mapping[str, str], extent: Any) -> None:
    from matplotlib.colors import ListedColormap

    cmap = ListedColormap([colours[a] for a in actions])
    ax.imshow(
        chosen,
        origin="lower",
        extent=extent,
        aspect="auto",
        interpolation="nearest",
        cmap=cmap,
        vmin=-0.5,
        vmax=len(actions) - 0.5,
        alpha=0.85,
    )


def _draw_means(ax: Any, rule: Rule, means: np.ndarray) -> list[Any]:
    from matplotlib.lines import Line2D

    for name, (mx, my) in zip(rule.classes, means, strict=True):
        ax.plot(mx, my, marker="X", markersize=9, color="black", markeredgecolor="white", linestyle="none")
        ax.annotate(name, (mx, my), xytext=(6, 6), textcoords="offset points", fontsize=8, weight="bold")
    return [
        Line2D(
            [], [], marker="X", color="black", linestyle="none", markeredgecolor="white", label="class mean (in x, y)"
        )
    ]


def _draw_points(ax: Any, rule: Rule, points: np.ndarray, labels: np.ndarray) -> list[Any]:
    from matplotlib.lines import Line2D

    handles = []
    names = list(dict.fromkeys([*rule.classes, *sorted(set(labels.tolist()))]))
    for index, name in enumerate(names):
        mask = labels == name
        if not mask.any():
            continue
        marker = CLASS_MARKERS[index % len(CLASS_MARKERS)]
        style = {"marker": marker, "s": 10, "facecolors": "none", "edgecolors": "#222222", "linewidths": 0.5}
        ax.scatter(points[mask, 0], points[mask, 1], alpha=0.6, **style)
        handles.append(
            Line2D(
                [], [], marker=marker, linestyle="none", markerfacecolor="none", color="#222222", label=f"{name} (data)"
            )
        )
    return handles


# --- (b) the risk-reject curve -----------------------------------------------------------------


def risk_reject_curve(evaluation: CurveReport, output: Path, size: FigureSize = DEFAULT_SIZE) -> Path:
    """Risk (top) and reject and error rates (bottom) against the reject cost, the rule's own cost marked."""
    _matplotlib()
    from matplotlib.ticker import PercentFormatter

    rule = evaluation.rule
    costs = np.array([p.reject_cost for p in evaluation.curve])
    risk = np.array([p.risk for p in evaluation.curve])
    own = next((p for p in evaluation.curve if p.own), None)
    with _style():
        figure = _figure(size)
        top, bottom = figure.subplots(2, 1, sharex=True)
        top.plot(costs, risk, color=PALETTE[0], marker=".", label="empirical risk")
        top.set_ylabel(f"risk per row{_unit(rule)}")
        top.set_title(
            f"{_title(rule)}: risk-reject curve on {Path(evaluation.data).name} "
            f"({evaluation.rows} rows, label {evaluation.label!r})"
        )
        bottom.plot(costs, [p.reject_rate for p in evaluation.curve], color=PALETTE[1], marker=".", label="reject rate")
        errors = bottom.twinx()  # error rates are often a few percent: their own scale, on the right
        errors.plot(
            costs, [p.error_rate for p in evaluation.curve], color=PALETTE[3], marker=".", label="error rate (all rows)"
        )
        errors.plot(
            costs,
            [p.accepted_error_rate for p in evaluation.curve],
            color=PALETTE[4],
            linestyle="--",
            marker=".",
            label="error rate (accepted rows)",
        )
        for axis, label in ((bottom, "reject rate (share of rows)"), (errors, "error rate (share of rows)")):
            axis.yaxis.set_major_formatter(PercentFormatter(1.0))
            axis.set_ylabel(label)
            axis.set_ylim(bottom=0.0)
        never = f"deferring is never chosen at or above V = {evaluation.reach_value:.4g}"
        bottom.set_xlabel(f"reject cost{_unit(rule)}; {never}")
        for ax in (top, bottom):
            if own is not None:
                ax.axvline(own.reject_cost, color="#555555", linestyle=":", label=f"rule's cost {own.reject_cost:.4g}")
            ax.grid(True, color="#dddddd", linewidth=0.6)
        top.legend(loc="best", frameon=False)
        handles = bottom.get_legend_handles_labels()[0] + errors.get_legend_handles_labels()[0]
        bottom.legend(handles=handles, loc="upper center", bbox_to_anchor=(0.5, -0.2), ncols=4, frameon=False)
        return _save(figure, output, size)


# --- (c) the posterior simplex -----------------------------------------------------------------


def _aligned(reference: Rule, other: Rule) -> np.ndarray:
    try:
        return align_columns(other.params["loss"], other.classes, reference.classes)
    except ValueError as error:
        raise PlotError(f"the rules' classes differ: {error}") from None


def _changed_share(old: Rule, new: Rule) -> tuple[float, float]:
    """Share of the simplex where the action changes, ± its standard error: the same estimate as `policyc diff`."""
    same = matching_actions(old.actions, old.reject_action, new.actions, new.reject_action)
    new_loss = align_columns(new.params["loss"], new.classes, old.classes)
    shares = decision_pair_shares(np.asarray(old.params["loss"]), new_loss, DEFAULT_SIMPLEX_SAMPLES, DEFAULT_SEED)
    return mean_and_se((shares * ~same).sum(axis=(1, 2)))  # per replicate: Σ over changed (a, b) pairs


def simplex_map(
    loaded: LoadedRule,
    output: Path,
    compare: LoadedRule | None = None,
    size: FigureSize = DEFAULT_SIZE,
    resolution: int = 500,
) -> Path:
    """Decision regions of a three-class rule on the posterior simplex (a ternary map).

    With ``compare`` (the old rule), the regions of ``loaded`` (the new rule) are filled, the old
    boundaries are drawn as dashed lines and the area where the action changes is hatched.
    """
    rule = loaded.rule
    if len(rule.classes) != 3:
        raise PlotError(f"the simplex picture needs exactly three classes; the rule has {len(rule.classes)}")
    loss = np.asarray(rule.params["loss"])
    old_loss = _aligned(rule, compare.rule) if compare is not None else None
    xs, ys, posteriors, inside = simplex_raster(resolution)
    chosen = decide_on_posteriors(loss, posteriors)
    old_actions = tuple(compare.rule.actions) if compare is not None else ()
    actions = list(dict.fromkeys([*rule.actions, *old_actions]))
    colours = _colours(actions, [rule.reject_action, compare.rule.reject_action if compare else None])
    with _style():
        figure = _figure(size)
        ax = figure.add_subplot()
        _fill_simplex(ax, chosen, inside, rule.actions, colours, (xs, ys))
        _draw_simplex_frame(ax, rule.classes)
        for segment in boundary_segments(loss):
            ax.plot(segment[:, 0], segment[:, 1], color="#222222", linewidth=0.8)
        extra: list[Any] = []
        title = f"{_title(rule)}: decisions on the posterior simplex\n(white lines: each P(class) in steps of 0.2)"
        if compare is not None and old_loss is not None:
            extra = _draw_comparison(ax, compare, old_loss, rule, chosen, posteriors, inside, (xs, ys))
            changed_share, standard_error = _changed_share(compare.rule, rule)
            title = (
                f"{_title(compare.rule)} → {_title(rule)} on the posterior simplex\n"
                "filled: new regions; dashed: old boundaries; hatched: the action changes\n"
                f"({changed_share:.2%} ± {standard_error:.2%} of the simplex, uniform measure)"
            )
        figure.suptitle(title)
        shown = [a for a in actions if a in rule.actions]
        _action_legend(ax, shown, colours, extra, below=True)
        return _save(figure, output, size)


def _fill_simplex(
    ax: Any, chosen: np.ndarray, inside: np.ndarray, actions: Sequence[str], colours: Mapping[str, str], grid: Any
) -> None:
    from matplotlib.colors import to_rgba

    xs, ys = grid
    palette = np.array([to_rgba(colours[a], 0.85) for a in actions])
    image = palette[chosen]
    image[~inside] = (1.0, 1.0, 1.0, 0.0)
    ax.imshow(
        image.reshape(ys.size, xs.size, 4), origin="lower", extent=(0.0, 1.0, 0.0, HEIGHT), interpolation="nearest"
    )


def _draw_simplex_frame(ax: Any, classes: Sequence[str]) -> None:
    for level in (0.2, 0.4, 0.6, 0.8):  # lines of constant P(class) help read the coordinates
        for k in range(3):
            i, j = [m for m in range(3) if m != k]
            start = level * np.eye(3)[k] + (1.0 - level) * np.eye(3)[i]
            end = level * np.eye(3)[k] + (1.0 - level) * np.eye(3)[j]
            line = to_plane(np.stack([start, end]))
            ax.plot(line[:, 0], line[:, 1], color="white", linewidth=0.5, alpha=0.7)
    outline = to_plane(np.vstack([np.eye(3), np.eye(3)[:1]]))
    ax.plot(outline[:, 0], outline[:, 1], color="black", linewidth=1.0)
    offsets = ((0.0, -0.04, "center"), (0.0, -0.04, "center"), (0.0, 0.035, "center"))
    for (vx, vy), name, (dx, dy, align) in zip(VERTICES, classes, offsets, strict=True):
        ax.text(vx + dx, vy + dy, f"P({name}) = 1", ha=align, va="center", fontsize=9, weight="bold")
    ax.set_xlim(-0.16, 1.16)
    ax.set_ylim(-0.08, HEIGHT + 0.06)
    ax.set_aspect("equal")
    ax.axis("off")


def _draw_comparison(
    ax: Any,
    compare: LoadedRule,
    old_loss: np.ndarray,
    rule: Rule,
    chosen: np.ndarray,
    posteriors: np.ndarray,
    inside: np.ndarray,
    grid: Any,
) -> list[Any]:
    from matplotlib.lines import Line2D
    from matplotlib.patches import Patch

    xs, ys = grid
    old_rule = compare.rule
    old_chosen = decide_on_posteriors(old_loss, posteriors)
    same = matching_actions(old_rule.actions, old_rule.reject_action, rule.actions, rule.reject_action)
    changed = ~same[old_chosen, chosen] & inside
    field = np.where(inside, changed.astype(float), np.nan).reshape(ys.size, xs.size)
    if changed.any():
        ax.contourf(xs, ys, field, levels=[0.5, 1.5], colors="none", hatches=["////"])
    for segment in boundary_segments(old_loss):
        ax.plot(segment[:, 0], segment[:, 1], color="black", linewidth=1.8, linestyle=(0, (4, 2)))
    extra = [
        Line2D(
            [], [], color="black", linewidth=1.8, linestyle=(0, (4, 2)), label=f"old boundaries ({_title(old_rule)})"
        ),
        Patch(facecolor="none", edgecolor="#333333", hatch="////", label="action changes"),
    ]
    return extra
