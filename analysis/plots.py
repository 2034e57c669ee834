"""Plots for the report, as PNG bytes: how often each concept shows in each class, and its lift."""

from __future__ import annotations

import io

import numpy as np
import pandas as pd

from .concept_table import ConceptTable, Target


def _heatmap(values: pd.DataFrame, *, title: str, fmt: str, cmap: str, vmin: float | None = None, vmax: float | None = None) -> bytes:
    import matplotlib

    matplotlib.use("Agg")
    import matplotlib.pyplot as plt

    fig, ax = plt.subplots(figsize=(1.4 + 0.9 * values.shape[1], 1.0 + 0.32 * values.shape[0]), dpi=110)
    shown = values.to_numpy(dtype=float)
    im = ax.imshow(np.nan_to_num(shown, nan=0.0), cmap=cmap, aspect="auto", vmin=vmin, vmax=vmax)
    ax.set_xticks(range(values.shape[1]), [str(c) for c in values.columns], rotation=30, ha="right")
    ax.set_yticks(range(values.shape[0]), [str(i) for i in values.index])
    for (i, j), v in np.ndenumerate(shown):
        if np.isfinite(v):
            ax.text(j, i, format(v, fmt), ha="center", va="center", fontsize=7, color="black")
    ax.set_title(title, fontsize=10)
    fig.colorbar(im, ax=ax, fraction=0.04)
    fig.tight_layout()
    buf = io.BytesIO()
    fig.savefig(buf, format="png")
    plt.close(fig)
    return buf.getvalue()


def concept_rates(table: ConceptTable, target: Target = "predicted", top: int = 20) -> pd.DataFrame:
    """Share of each class's images showing each of the ``top`` most common concepts (concepts x classes)."""
    classes = table.targets(target)
    if table.design is not None:  # a sample: each image counts for its weight
        w = pd.Series(table.design.weights, index=table.presence.index)
        weighted = table.presence.astype(float).mul(w, axis=0)
        rates = weighted.groupby(classes.to_numpy()).sum().div(w.groupby(classes.to_numpy()).sum(), axis=0).T
        order = weighted.sum().sort_values(ascending=False).index[:top]
        return rates.loc[order]
    rates = table.presence.groupby(classes.to_numpy()).mean().T
    order = table.presence.sum().sort_values(ascending=False).index[:top]
    return rates.loc[order]


def frequency_plot(table: ConceptTable, target: Target = "predicted", top: int = 20) -> bytes:
    return _heatmap(concept_rates(table, target, top), title=f"Share of images showing each concept, by {target} class", fmt=".2f", cmap="Greens", vmin=0, vmax=1)


def lift_plot(table: ConceptTable, target: Target = "predicted", top: int = 20) -> bytes:
    """Lift of "concept => class" (share of the concept's images in the class / the class's share of all images)."""
    classes = table.targets(target)
    rates = concept_rates(table, target, top)
    w = pd.Series(table.design.weights if table.design is not None else 1.0, index=table.presence.index)  # a sample's weights, else 1
    prior = w.groupby(classes.to_numpy()).sum() / w.sum()
    present = table.presence.loc[:, rates.index].astype(float).mul(w, axis=0)
    in_class = present.groupby(classes.to_numpy()).sum().T
    lift = in_class.div(present.sum(), axis=0).div(prior.reindex(in_class.columns), axis=1)
    return _heatmap(lift, title=f"Lift of concept => {target} class (1 = no association)", fmt=".1f", cmap="PuOr_r", vmin=0, vmax=2)
