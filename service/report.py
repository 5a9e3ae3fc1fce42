"""A version's fit report as one HTML page: its summary and four plots (matplotlib, Agg).

The plots: the criterion against the number of components for each structure; the
log-likelihood per EM iteration; the distribution of the training log-densities
with the tail-fraction thresholds; and, for a pair of features, points with the
density contours of the mixture's marginal on those two features and each
component's ellipse. The points are training rows, from the sample a fitted version
keeps; an imported version has none, so its points are drawn from the model, and
the page says which.
"""

from __future__ import annotations

import base64
import html
import io
import json
from typing import Any

import numpy as np

from core import Mixture

from .store import VersionRecord

#: Tail fractions marked on the log-density histogram.
THRESHOLDS = (0.01, 0.001)
SAMPLE_POINTS = 1500
HISTOGRAM_BINS = 60
GRID = 120
STYLE = """
body { font-family: system-ui, sans-serif; margin: 2rem auto; max-width: 70rem; color: #222; }
h1 { font-size: 1.5rem; } h2 { font-size: 1.15rem; margin-top: 2rem; }
table { border-collapse: collapse; font-size: 0.9rem; }
td, th { border: 1px solid #ccc; padding: 0.2rem 0.5rem; text-align: right; }
th { background: #f3f3f3; } .key { font-weight: 600; } td:has(.key) { text-align: left; }
.plots { display: grid; grid-template-columns: 1fr 1fr; gap: 1rem; }
figure { margin: 0; } figcaption { font-size: 0.85rem; color: #555; }
img { width: 100%; height: auto; }
"""


def feature_names(record: VersionRecord) -> list[str]:
    return record.feature_names or [f"x{i}" for i in range(record.mixture.dimension)]


def total_variances(mixture: Mixture) -> np.ndarray:
    """Each feature's variance under the mixture: within plus between components."""
    within = np.einsum("k,ki->i", mixture.weights, per_component(mixture).diagonal(0, 1, 2))
    mean = mixture.weights @ mixture.means
    between = mixture.weights @ (mixture.means - mean) ** 2
    return within + between


def default_pair(mixture: Mixture) -> tuple[int, int]:
    """The two features on which the components separate best; needs two.

    Separation is Fisher's criterion on the pair's marginal, trace(W^-1 B), with W the
    weighted within-component and B the between-component covariance of the two
    features: unlike raw variance, it ignores units and favours features whose
    components do not overlap. With one component (B = 0) the first two features.
    """
    d = mixture.dimension
    first, second = np.triu_indices(d, k=1)
    within = np.einsum("k,kij->ij", mixture.weights, per_component(mixture))
    centred = mixture.means - mixture.weights @ mixture.means
    between = (centred.T * mixture.weights) @ centred
    # trace(W^-1 B) of every 2 x 2 block in closed form: (w22 b11 - 2 w12 b12 + w11 b22) / det W
    w11, w22, w12 = within[first, first], within[second, second], within[first, second]
    b11, b22, b12 = between[first, first], between[second, second], between[first, second]
    separation = (w22 * b11 - 2 * w12 * b12 + w11 * b22) / (w11 * w22 - w12**2)
    best = int(np.argmax(separation))  # the first pair of a tie, so (0, 1) when all are 0
    return int(first[best]), int(second[best])


def per_component(mixture: Mixture) -> np.ndarray:
    """(k, d, d) covariance matrices whatever the structure."""
    k, d = mixture.components, mixture.dimension
    c = mixture.covariances
    if mixture.structure == "full":
        return c
    if mixture.structure == "diagonal":
        return np.einsum("ki,ij->kij", c, np.eye(d))
    if mixture.structure == "spherical":
        return c[:, None, None] * np.eye(d)
    return np.broadcast_to(c, (k, d, d))


def _png(figure: Any) -> str:
    buffer = io.BytesIO()
    figure.savefig(buffer, format="png", dpi=100, bbox_inches="tight")
    return base64.b64encode(buffer.getvalue()).decode()


def _figure() -> tuple[Any, Any]:
    from matplotlib.figure import Figure  # heavy: imported when a report is asked for

    figure = Figure(figsize=(6.0, 4.0))
    return figure, figure.subplots()


def criterion_plot(report: dict[str, Any], mixture: Mixture) -> str:
    from matplotlib.ticker import MaxNLocator

    figure, axes = _figure()
    criterion = report.get("criterion", "bic")
    table = report["candidates"]
    for structure in sorted({row["structure"] for row in table}):
        rows = sorted((r for r in table if r["structure"] == structure),
                      key=lambda r: r["components"])
        line, = axes.plot([r["components"] for r in rows], [r[criterion] for r in rows],
                          marker="o", label=structure)
        degenerate = [r for r in rows if r["degenerate"]]
        axes.scatter([r["components"] for r in degenerate], [r[criterion] for r in degenerate],
                     s=90, facecolors="none", edgecolors=line.get_color())
    chosen = chosen_candidate(report, mixture)
    if chosen is not None:
        axes.scatter([chosen["components"]], [chosen[criterion]], marker="*", s=320,
                     color="gold", edgecolors="black", zorder=3, label="chosen")
        axes.annotate(f"chosen: {chosen['components']} {chosen['structure']}",
                      (chosen["components"], chosen[criterion]), xytext=(8, 10),
                      textcoords="offset points", fontsize=9, weight="bold")
    axes.xaxis.set_major_locator(MaxNLocator(integer=True))
    axes.set_xlabel("components")
    axes.set_ylabel(f"{criterion.upper()} (lower is better)")
    axes.legend(title="structure (circled: degenerate)")
    axes.grid(alpha=0.3)
    return _png(figure)


def chosen_candidate(report: dict[str, Any], mixture: Mixture) -> dict[str, Any] | None:
    """The candidate row of the version's own number of components and structure."""
    return next((r for r in report["candidates"] if r["components"] == mixture.components
                 and r["structure"] == mixture.structure), None)


def trace_plot(report: dict[str, Any]) -> str:
    from matplotlib.ticker import MaxNLocator

    figure, axes = _figure()
    trace = report["trace"]
    axes.plot(range(1, len(trace) + 1), trace, marker=".")
    axes.xaxis.set_major_locator(MaxNLocator(integer=True))
    axes.ticklabel_format(axis="y", useOffset=False)
    axes.set_xlabel("EM iteration (best restart)")
    axes.set_ylabel("log-likelihood")
    axes.grid(alpha=0.3)
    return _png(figure)


def density_plot(record: VersionRecord) -> str:
    """The training log-density distribution, read from the stored quantiles: the share
    of training points in each bin is the rise of their interpolated CDF across it."""
    assert record.quantiles is not None
    values = record.quantiles.values
    levels = np.linspace(0.0, 1.0, len(values))
    low = float(np.interp(0.0005, levels, values))
    edges = np.linspace(low, values[-1], HISTOGRAM_BINS + 1)
    shares = np.diff(np.interp(edges, values, levels))
    figure, axes = _figure()
    axes.stairs(shares / np.diff(edges), edges, fill=True, alpha=0.6)
    for row, tail in enumerate(THRESHOLDS):
        at = float(np.interp(tail, levels, values))
        axes.axvline(at, color="crimson", linestyle="--")
        axes.annotate(f"tail fraction {tail:g}", (at, 0.93 - 0.09 * row),
                      xycoords=("data", "axes fraction"), xytext=(4, 0),
                      textcoords="offset points", ha="left", va="top", fontsize=10,
                      color="crimson", bbox={"boxstyle": "round,pad=0.2", "facecolor": "white",
                                             "edgecolor": "crimson", "alpha": 0.9})
    axes.set_xlabel("log-density of training points")
    axes.set_ylabel("density")
    return _png(figure)


def plotted_points(record: VersionRecord) -> tuple[np.ndarray, np.ndarray]:
    """Up to SAMPLE_POINTS training rows, each with its most probable component; the
    model's own samples (and their components) when no training rows were kept."""
    mixture = record.mixture
    if record.sample is None:
        return mixture.sample(SAMPLE_POINTS, seed=0)
    rows = record.sample.rows
    if len(rows) > SAMPLE_POINTS:
        rows = rows[np.random.default_rng(0).choice(len(rows), SAMPLE_POINTS, replace=False)]
    return rows, mixture.responsibilities(rows).argmax(axis=1)


def pair_plot(record: VersionRecord, pair: tuple[int, int]) -> str:
    from matplotlib.patches import Ellipse

    mixture, names = record.mixture, feature_names(record)
    i, j = pair
    points, labels = plotted_points(record)
    marginal = mixture.marginal([i, j])
    spread = np.sqrt(total_variances(mixture)[[i, j]])
    lows = np.minimum(points[:, [i, j]].min(axis=0), mixture.means[:, [i, j]].min(axis=0))
    highs = np.maximum(points[:, [i, j]].max(axis=0), mixture.means[:, [i, j]].max(axis=0))
    xs = np.linspace(lows[0] - 0.1 * spread[0], highs[0] + 0.1 * spread[0], GRID)
    ys = np.linspace(lows[1] - 0.1 * spread[1], highs[1] + 0.1 * spread[1], GRID)
    gx, gy = np.meshgrid(xs, ys)
    density = marginal.log_density(np.column_stack([gx.ravel(), gy.ravel()])).reshape(gx.shape)
    figure, axes = _figure()
    top = density.max()
    contours = axes.contour(gx, gy, density, levels=np.linspace(top - 12, top, 9),
                            cmap="viridis", linewidths=0.8)
    figure.colorbar(contours, ax=axes, label="log-density (marginal)")
    colours = [f"C{k % 10}" for k in range(mixture.components)]
    for k in range(mixture.components):
        mine = labels == k
        axes.scatter(points[mine, i], points[mine, j], s=4, color=colours[k], alpha=0.5,
                     label=f"component {k}")
    covariances = per_component(mixture)[:, [i, j]][:, :, [i, j]]
    for k in range(mixture.components):
        eigenvalues, vectors = np.linalg.eigh(covariances[k])
        angle = np.degrees(np.arctan2(vectors[1, 1], vectors[0, 1]))
        width, height = 2 * 2 * np.sqrt(np.maximum(eigenvalues[::-1], 0))  # 2 sd each way
        axes.add_patch(Ellipse(tuple(mixture.means[k, [i, j]]), width, height, angle=angle,
                               fill=False, color="black", linewidth=1.2))
        axes.annotate(str(k), tuple(mixture.means[k, [i, j]]), fontsize=9, weight="bold")
    axes.legend(fontsize=8, markerscale=3, loc="best", framealpha=0.8)
    axes.set_xlabel(names[i])
    axes.set_ylabel(names[j])
    return _png(figure)


def _points_caption(record: VersionRecord) -> str:
    if record.sample is None:
        return f"{SAMPLE_POINTS} points drawn from the model (an import keeps no training rows)"
    shown = min(SAMPLE_POINTS, len(record.sample.rows))
    return f"{shown} training rows (of the {len(record.sample.rows)} the version keeps)"


def _table(header: list[str], rows: list[list[str]]) -> str:
    head = "".join(f"<th>{html.escape(h)}</th>" for h in header)
    body = "".join("<tr>" + "".join(f"<td>{cell}</td>" for cell in row) + "</tr>"
                   for row in rows)
    return f"<table><tr>{head}</tr>{body}</table>"


def components_table(record: VersionRecord) -> str:
    mixture, names = record.mixture, feature_names(record)
    sds = np.sqrt(per_component(mixture).diagonal(0, 1, 2))
    rows = [[str(k), f"{mixture.weights[k]:.4f}",
             *(f"{mixture.means[k, f]:.4g} ± {sds[k, f]:.3g}" for f in range(len(names)))]
            for k in range(mixture.components)]
    return _table(["component", "weight", *names], rows)


def _cell(value: Any) -> str:
    if isinstance(value, list):
        return ", ".join(_cell(item) for item in value)
    return html.escape(value if isinstance(value, str) else json.dumps(value))


def _key_value_table(header: list[str], items: dict[str, Any]) -> str:
    return _table(header, [[f'<span class="key">{html.escape(key)}</span>', _cell(value)]
                           for key, value in items.items()])


def held_table(report: dict[str, Any], names: list[str]) -> str:
    """The components the degeneracy guard held, and on which features."""
    held = report.get("held") or []
    if not held:
        return ""
    rows = [[str(h["component"]), html.escape(", ".join(names[j] for j in h["features"])),
             f"{h['rows']:,.1f}"] for h in held]
    return ("<p>Held by the degeneracy guard: the spread of these components along these "
            "features collapsed (rows sharing one value), so their variance there is held "
            "at the floor (the feature's resolution<sup>2</sup>/12 if one was given, else "
            "10<sup>-4</sup> of its variance) rather than shrinking to a spike.</p>"
            + _table(["component", "held features", "rows"], rows))


def provenance_table(record: VersionRecord) -> str:
    """Where the version came from; the fit options get a table of their own."""
    fields = {k: v for k, v in record.provenance.items() if k != "options"}
    if not fields:
        return "<p>No provenance (imported).</p>"
    options = record.provenance.get("options")
    return _key_value_table(["field", "value"], fields) + (
        "<h3>Fit options</h3>" + _key_value_table(["option", "value"], options)
        if options else "")


def _figure_html(png: str, alt: str, caption: str) -> str:
    return (f'<figure><img src="data:image/png;base64,{png}" alt="{html.escape(alt)}">'
            f"<figcaption>{html.escape(caption)}</figcaption></figure>")


def render(name: str, version: int, record: VersionRecord, serving: bool,
           pair: tuple[int, int] | None) -> str:
    """The whole page; no pair plot for a model of one feature (``pair`` None)."""
    mixture, names, report = record.mixture, feature_names(record), record.report
    figures = []
    if report and report.get("candidates"):
        figures.append(_figure_html(
            criterion_plot(report, mixture), "criterion by components",
            f"Criterion against the number of components, per structure; the star marks the "
            f"chosen candidate ({mixture.components} components, {mixture.structure}), the "
            f"lowest non-degenerate."))
    if report and report.get("trace"):
        reseeds = report.get("reseeds", 0)
        note = (f"; it drops where a collapsed component was re-seeded ({reseeds} times)"
                if reseeds else "")
        figures.append(_figure_html(trace_plot(report), "log-likelihood trace",
                                    f"Log-likelihood after each EM iteration of the chosen "
                                    f"restart{note}."))
    if record.quantiles is not None:
        figures.append(_figure_html(density_plot(record), "training log-density",
                                    "Training log-densities, from the 1001 stored quantiles, "
                                    "with the tail-fraction thresholds."))
    if pair is not None:
        figures.append(_figure_html(
            pair_plot(record, pair), f"{names[pair[0]]} against {names[pair[1]]}",
            f"{_points_caption(record)}, coloured by component (legend); contours of the "
            f"mixture's marginal log-density on {names[pair[0]]} and {names[pair[1]]} (colour "
            f"scale); ellipses at 2 standard deviations. The default pair is the one on which "
            f"the components separate best."))
    summary = _table(["model", "version", "serving", "source", "structure", "components",
                      "features", "created"],
                     [[html.escape(name), str(version), "yes" if serving else "no",
                       html.escape(record.source), mixture.structure,
                       str(mixture.components), str(mixture.dimension),
                       html.escape(record.created_at)]])
    fit = ""
    if report:
        fit = _table(["log-likelihood", "iterations", "converged", "BIC", "AIC", "rows"],
                     [[f"{report['log_likelihood']:,.2f}", str(report["iterations"]),
                       str(report["converged"]), f"{report['bic']:,.1f}",
                       f"{report['aic']:,.1f}", f"{report['rows']:,}"]]) + held_table(
                         report, names)
    title = f"{name} version {version}"
    plots = (f'<div class="plots">{"".join(figures)}</div>' if figures else
             "<p>No plots: imported parameters of one feature have no fit report, no "
             "training quantiles and no pair of features.</p>")
    return f"""<!DOCTYPE html>
<html lang="en"><head><meta charset="utf-8"><link rel="icon" href="data:,">
<title>{html.escape(title)} — fit report</title><style>{STYLE}</style></head>
<body><h1>{html.escape(title)}</h1>{summary}
<h2>Fit</h2>{fit or "<p>Imported parameters: no fit report.</p>"}
<h2>Plots</h2>{plots}
<h2>Components (mean ± standard deviation)</h2>{components_table(record)}
<h2>Provenance</h2>{provenance_table(record)}
</body></html>
"""
