"""PNG plots a person can open: the goal's per-row losses against the margin (or residual), a
sweep's validation curve, and a fit's convergence. matplotlib draws them off-screen (Agg)."""

from __future__ import annotations

from pathlib import Path

import numpy as np

from objc.checker import CheckedObjective, EvalEnv, _rows_body, evaluate, render

# our own palette: ink for the 0-1 reference, warm-to-cool for the terms
_INK = "#2b2b2b"
_PALETTE = ("#c8553d", "#2a7f62", "#3d5a98", "#d8a31a", "#7a4b94", "#1f9aa8", "#8c6d46")


def _figure(title: str):
    import matplotlib
    matplotlib.use("Agg")
    import matplotlib.pyplot as plt
    fig, ax = plt.subplots(figsize=(7.2, 4.4), dpi=120)
    import textwrap
    ax.set_title("\n".join(textwrap.wrap(title, 78)), loc="left", fontsize=10)
    ax.grid(True, color="#e3e0da", linewidth=0.8)
    ax.set_facecolor("#fbfaf7")
    for side in ("top", "right"):
        ax.spines[side].set_visible(False)
    return fig, ax, plt


def _save(fig, plt, out: Path) -> Path:
    from objc.model_io import _atomic_write
    import io
    buf = io.BytesIO()
    fig.tight_layout()
    fig.savefig(buf, format="png")
    plt.close(fig)
    _atomic_write(Path(out), buf.getvalue())
    return Path(out)


def loss_curves(checked: CheckedObjective, out: Path, span: float = 3.0) -> Path:
    """Each per-row term of the goal as a function of the margin m = y s (or the residual r = y - s),
    with the 0-1 loss drawn for classification."""
    margin = checked.task != "residual"
    grid = np.linspace(-span, span, 601)
    fig, ax, plt = _figure(f"per-row losses of {Path(checked.source.name).name}")
    # score values that give the wanted margin (y = +1) or residual (y = 0, s = -r)
    score = grid if margin else -grid
    y = np.ones_like(grid) if margin else np.zeros_like(grid)
    env = EvalEnv(["_"], {}, {}, y, score, {t.name: t.default for t in checked.spec.tunables})
    k = 0
    for t in checked.terms:
        if t.kind != "rows" or t.body is None:
            continue
        with np.errstate(all="ignore"):
            v = np.broadcast_to(np.asarray(evaluate(_rows_body(t.body), env), dtype=float), grid.shape)
        ax.plot(grid, v, color=_PALETTE[k % len(_PALETTE)], linewidth=2.0,
                label=f"term {t.index + 1}: {render(t.body)}")
        k += 1
    if margin:
        ax.step(grid, np.where(grid <= 0, 1.0, 0.0), where="post", color=_INK, linewidth=1.2, linestyle=(0, (4, 3)),
                label="0-1 loss (what is counted)")
        ax.set_xlabel("margin m = y * s")
    else:
        ax.set_xlabel("residual r = y - s")
    ax.set_ylabel("loss of one row")
    top = ax.get_ylim()[1]
    ax.set_ylim(bottom=min(0.0, ax.get_ylim()[0]), top=min(top, 8.0))
    ax.legend(frameon=False, fontsize=8)
    return _save(fig, plt, out)


def sweep_curve(sweep: dict, out: Path) -> Path:
    """A sweep's validation curve against the first tunable: with folds, the mean of the ranking
    metric with a band of +- one standard error, one curve per value of the other tunables; on
    held-out rows, the training and held-out figures. The chosen point is marked. Log axis when the
    grid is positive and wide."""
    rows = sweep["points"]
    names = sweep.get("tunables") or [sweep["tunable"]]
    name = names[0]
    from objc.training import metric_label
    label = metric_label(sweep["metric"])
    folds = (sweep.get("validation") or {}).get("kind") == "folds"
    fig, ax, plt = _figure(f"sweep of {', '.join(names)}: {label} on {sweep.get('ranked_on', 'the rows')}")

    def at(r: dict, n: str) -> float:
        return float(r["setting"][n]) if "setting" in r else float(r["value"])
    xs = np.array([at(r, name) for r in rows], dtype=float)
    groups: dict[tuple, list[int]] = {}
    for i, r in enumerate(rows):
        groups.setdefault(tuple(at(r, n) for n in names[1:]), []).append(i)
    for g, (key, idx) in enumerate(groups.items()):
        idx = sorted(idx, key=lambda i: xs[i])
        colour = _PALETTE[g % len(_PALETTE)]
        tag = ", ".join(f"{n} = {v:.3g}" for n, v in zip(names[1:], key))
        if folds:
            mean = np.array([rows[i]["mean"] for i in idx], dtype=float)
            se = np.array([np.nan if rows[i].get("se") is None else rows[i]["se"] for i in idx], dtype=float)
            ax.plot(xs[idx], mean, color=colour, marker="o", linewidth=1.8,
                    label=f"mean over the folds{': ' + tag if tag else ''}")
            ax.fill_between(xs[idx], mean - se, mean + se, color=colour, alpha=0.18 if len(groups) == 1 else 0.07,
                            linewidth=0,
                            label="+- one standard error" if g == 0 else None)
        else:
            ax.plot(xs[idx], [rows[i]["train"] for i in idx], color=_PALETTE[2], marker="o", linewidth=1.4,
                    linestyle=(0, (3, 2)) if tag else "-", label=f"training rows{': ' + tag if tag else ''}")
            if any(rows[i].get("held") is not None for i in idx):
                ax.plot(xs[idx], [rows[i]["held"] for i in idx], color=colour if tag else _PALETTE[0], marker="s",
                        linewidth=2.0, label=f"held-out rows{': ' + tag if tag else ''}")
    chosen = sweep.get("chosen") or sweep.get("best")
    if chosen is not None:
        cx = at(rows[chosen["index"]], name)
        cy = rows[chosen["index"]]["mean"] if folds else (rows[chosen["index"]].get("held")
                                                           if rows[chosen["index"]].get("held") is not None
                                                           else rows[chosen["index"]]["train"])
        ax.axvline(cx, color=_INK, linewidth=1.0, linestyle=(0, (2, 2)))
        ax.plot([cx], [cy], marker="*", markersize=13, color=_INK, linestyle="none",
                label=f"chosen ({(sweep.get('rule') or {}).get('name', 'best')})")
        ax.annotate(f"chosen {name} = {cx:.3g}", (cx, ax.get_ylim()[1]), fontsize=8,
                    ha="left", va="top", xytext=(4, -4), textcoords="offset points")
    if np.all(xs > 0) and xs.max() / xs.min() > 20:
        ax.set_xscale("log")
    ax.set_xlabel(name)
    ax.set_ylabel(label)
    ax.legend(frameon=False, fontsize=8)
    return _save(fig, plt, out)


def convergence_curve(history: list[dict], out: Path, title: str) -> Path:
    """The certificate (gap or residual) against passes over the data, on a log scale."""
    fig, ax, plt = _figure(title)
    passes = [h["passes"] for h in history]
    gaps = [h.get("gap") for h in history]
    objs = [h["objective"] for h in history]
    if any(g is not None and g > 0 for g in gaps):
        ax.semilogy(passes, [g if g and g > 0 else np.nan for g in gaps], color=_PALETTE[1], linewidth=2.0,
                    label="certificate (relative)")
        ax.set_ylabel("relative gap or residual")
    else:
        # a non-finite objective is stored as null: it has no place on the curve
        kept = [(k, o) for k, o in zip(passes, objs) if o is not None and np.isfinite(o)]
        if len(kept) < 2:
            raise ValueError("the history holds fewer than two finite objectives and no certificate")
        best = min(o for _k, o in kept)
        ax.semilogy([k for k, _o in kept], [o - best + 1e-16 for _k, o in kept], color=_PALETTE[1], linewidth=2.0,
                    label="objective above the least value")
    ax.set_xlabel("passes over the data")
    ax.legend(frameon=False, fontsize=8)
    return _save(fig, plt, out)


def weight_path(values: list[float], weights: list[np.ndarray] | np.ndarray, names: list[str] | tuple[str, ...],
                tunable: str, chosen: float | None, out: Path) -> Path:
    """Each weight against the tunable along a regularization path (one line per input, the largest
    ones named at the right end), the chosen value marked; log axis when every value is positive."""
    xs = np.asarray(values, dtype=float)
    W = np.asarray(weights, dtype=float).reshape(len(xs), -1)
    if W.shape[1] != len(names):
        raise ValueError(f"{W.shape[1]} weights per point for {len(names)} names")
    order = np.argsort(xs)
    xs, W = xs[order], W[order]
    fig, ax, plt = _figure(f"regularization path: each weight against {tunable}")
    ax.axhline(0.0, color=_INK, linewidth=0.8)
    # the inputs that reach the largest weight anywhere get a colour and a label; the rest stay grey
    reach = np.max(np.abs(W), axis=0) if len(xs) else np.zeros(len(names))
    named = set(np.argsort(-reach)[:len(_PALETTE)][reach[np.argsort(-reach)[:len(_PALETTE)]] > 0].tolist())
    k = 0
    for j, name in enumerate(names):
        if j in named:
            colour = _PALETTE[k % len(_PALETTE)]
            k += 1
            ax.plot(xs, W[:, j], color=colour, linewidth=1.8, label=str(name))
        else:
            ax.plot(xs, W[:, j], color="#b9b4aa", linewidth=1.0)
    if len(named) < len(names):
        ax.plot([], [], color="#b9b4aa", linewidth=1.0, label=f"{len(names) - len(named)} other input(s)")
    if chosen is not None:
        ax.axvline(float(chosen), color=_INK, linewidth=1.0, linestyle=(0, (2, 2)), label=f"chosen {tunable}")
        ax.annotate(f"{tunable} = {float(chosen):.3g}", (float(chosen), ax.get_ylim()[1]), fontsize=8,
                    ha="left", va="top", xytext=(4, -4), textcoords="offset points")
    if len(xs) and np.all(xs > 0):
        ax.set_xscale("log")
    ax.set_xlabel(tunable)
    ax.set_ylabel("weight")
    ax.legend(frameon=False, fontsize=8, loc="best")
    return _save(fig, plt, out)
